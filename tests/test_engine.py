"""The engine driven directly, one message at a time: prequential order, the divergence
guard, drift responses and intervals, with a fake clock and no broker."""
from __future__ import annotations

import dataclasses
import json
import math

import numpy as np
import pytest
from prometheus_client import generate_latest
from prometheus_client.parser import text_string_to_metric_families

from daemon.checkpoints import CheckpointStore
from daemon.config import parse_config
from daemon.engine import Engine
from daemon.errors import ConfigError
from daemon.metrics import Metrics
from daemon_proc import bearing_stream, model_config

MESSAGE_KEYS = {"model", "t", "predicted", "measured", "residual", "low", "high", "outside",
                "drift", "checkpoint", "samples"}
T0 = 1_765_000_000.0


def strict_json(body: bytes) -> dict:
    """Parse a published message; NaN, Infinity and -Infinity are refused, not read."""
    def refuse(token: str) -> float:
        raise AssertionError(f"non-finite number {token} published: {body[:200]!r}")
    return json.loads(body, parse_constant=refuse)


class Plant:
    """One model on the test pump (daemon_proc.bearing_stream) behind an Engine, fake clock."""

    def __init__(self, tmp_path, store: bool = False, seed: int = 1, keep: int = 100,
                 checkpoints: dict | None = None, **model: object) -> None:
        raw = {"node": "station-7", "state_dir": str(tmp_path / "state"),
               "metrics": {"listen": None}, "models": [model_config(**model)],
               "checkpoints": checkpoints or {}}
        self.settings = parse_config(raw)
        self.now = T0
        self.index = 0                  # targets handed to the engine so far
        self.bodies: list[bytes] = []
        self.logs: list[tuple[int, str, dict]] = []
        self.metrics = Metrics()
        stores = None
        if store:
            stores = {"m1": CheckpointStore(str(tmp_path / "state" / "m1"), keep=keep,
                                            clock=lambda: self.now, log=lambda *a, **k: None)}
        self.engine = Engine(self.settings, self._publish, self._log, metrics=self.metrics,
                             clock=lambda: self.now, stores=stores)
        self.rt = self.engine.models["m1"]
        self.stream = bearing_stream(10_000_000, t0=T0, seed=seed)

    def _publish(self, topic: str, body: bytes, qos: int, retain: bool) -> None:
        assert topic == "edgeprop/station-7/m1"
        self.bodies.append(body)

    def _log(self, level: str, event: str, **fields: object) -> None:
        self.logs.append((self.index, event, fields))

    @property
    def messages(self) -> list[dict]:
        return [strict_json(b) for b in self.bodies]

    def inputs(self) -> None:
        """Hand the engine the next speed and current readings (the target is left pending)."""
        for _ in range(2):
            topic, payload, truth = next(self.stream)
            assert truth is None
            self.now += 0.01
            self.engine.handle(topic, payload.encode(), self.now)

    def target(self, shift: float = 0.0) -> None:
        topic, payload, truth = next(self.stream)
        assert truth is not None
        if shift:
            reading = json.loads(payload)
            reading["value"] += shift
            payload = json.dumps(reading)
        self.index += 1
        self.now += 0.98
        self.engine.handle(topic, payload.encode(), self.now)

    def feed(self, n: int, shift: float = 0.0) -> None:
        for _ in range(n):
            self.inputs()
            self.target(shift)

    def events(self, name: str) -> list[tuple[int, dict]]:
        return [(i, f) for i, e, f in self.logs if e == name]

    def scrape(self) -> dict:
        text = generate_latest(self.metrics.registry).decode()
        return {(s.name, tuple(sorted(s.labels.items()))): s.value
                for fam in text_string_to_metric_families(text) for s in fam.samples}

    def metric(self, name: str, **labels: str) -> float:
        return self.scrape()[(name, tuple(sorted({"model": "m1", **labels}.items())))]

    def rmse(self, last: int) -> float:
        r = np.array([m["residual"] for m in self.messages[-last:]])
        return float(np.sqrt(np.mean(r * r)))


# -- prequential order and the message ------------------------------------------------------

def test_first_prediction_comes_after_warmup_and_is_made_before_learning(tmp_path) -> None:
    p = Plant(tmp_path, warmup=50)
    p.feed(50)
    assert p.bodies == [] and p.rt.learner.samples == 50
    p.inputs()
    x = p.rt.assembler.features_at(p.now + 0.98)
    before = p.rt.learner.predict(x).value          # the model as it stands, not yet taught
    p.target()
    (first,) = p.messages
    assert set(first) == MESSAGE_KEYS
    assert first["predicted"] == before
    assert first["samples"] == 50                   # samples learned before this prediction
    assert first["residual"] == first["measured"] - first["predicted"]
    assert p.rt.learner.samples == 51
    p.feed(30)
    assert [m["samples"] for m in p.messages] == list(range(50, 81))


def test_every_regression_message_has_a_band_once_residuals_exist(tmp_path) -> None:
    from daemon.intervals import MIN_RESIDUALS
    p = Plant(tmp_path, warmup=50)
    p.feed(50 + 400)
    msgs = p.messages
    assert len(msgs) == 400
    for m in msgs[:MIN_RESIDUALS]:                  # k-th prediction has k scored residuals
        assert m["low"] is None and m["high"] is None and m["outside"] is None
    for m in msgs[MIN_RESIDUALS:]:
        assert m["low"] <= m["predicted"] <= m["high"]
        assert m["outside"] is (not m["low"] <= m["measured"] <= m["high"])
    outside = np.mean([m["outside"] for m in msgs[-300:]])
    assert 0.0 < outside < 0.25      # coverage 0.9 aimed at; test_intervals checks it closely


# -- the divergence guard -----------------------------------------------------------------------

@pytest.mark.parametrize("store", [True, False], ids=["checkpoint-on-disk", "replay-in-memory"])
def test_injected_nan_restores_the_last_good_state_and_cuts_the_rate(tmp_path, store) -> None:
    p = Plant(tmp_path, store=store, warmup=50, guard={"lr_factor": 0.25})
    p.feed(200)
    p.engine.checkpoint_all("test")
    cid = p.rt.checkpoint_id
    assert (cid is not None) == store
    good = p.rt.learner.net.params.copy()
    lr0 = p.rt.learner.learning_rate
    p.feed(30)
    assert not np.array_equal(p.rt.learner.net.params, good)
    published = len(p.bodies)

    p.rt.learner.net.params[::7] = np.nan            # a corrupted step, between two messages
    p.inputs()
    inputs = p.rt.assembler.state()
    p.target()

    assert len(p.bodies) == published                # nothing published for that reading
    assert np.array_equal(p.rt.learner.net.params, good)
    assert p.rt.learner.samples == 200
    assert p.rt.learner.learning_rate == pytest.approx(lr0 * 0.25)
    live = p.rt.assembler.state()                    # input histories are not rolled back
    assert live.keys() == inputs.keys() and all(np.array_equal(live[k], inputs[k]) for k in live)
    assert p.engine.guard_trips == {"m1": 1}
    ((_, trip),) = p.events("guard_tripped")
    assert trip["reason"] == "non_finite" and trip["restored"] == (cid if store else "memory")
    assert trip["learning_rate"] == pytest.approx(lr0 * 0.25)
    assert p.metric("edgeprop_guard_trips_total", reason="non_finite") == 1
    assert p.metric("edgeprop_guard_trips_total", reason="loss_blowup") == 0
    assert p.metric("edgeprop_rollbacks_total", cause="guard") == (1 if store else 0)
    assert p.metric("edgeprop_learning_rate") == pytest.approx(lr0 * 0.25)

    p.feed(100)
    assert len(p.bodies) == published + 100 and p.engine.guard_trips == {"m1": 1}
    assert all(math.isfinite(m["predicted"]) for m in p.messages)


def test_a_finite_but_absurd_output_is_not_published_either(tmp_path) -> None:
    from daemon.learner import MAX_OUTPUT_Z
    p = Plant(tmp_path, warmup=50)
    p.feed(200)
    p.engine.checkpoint_all("test")
    good = p.rt.learner.net.params.copy()
    published = len(p.bodies)
    p.rt.learner.net.params *= 1e4                   # runaway weights, still finite
    p.inputs()
    z = p.rt.learner.net.forward(p.rt.learner.x_scaler.transform(
        p.rt.assembler.features_at(p.now + 0.98), 6.0)[None, :])[0, 0]
    assert math.isfinite(z) and abs(z) > MAX_OUTPUT_Z
    p.target()
    assert len(p.bodies) == published
    assert p.events("guard_tripped")[0][1]["reason"] == "output_range"
    assert np.array_equal(p.rt.learner.net.params, good)
    assert p.metric("edgeprop_guard_trips_total", reason="output_range") == 1


def test_nan_before_any_checkpoint_starts_a_fresh_model_that_learns_again(tmp_path) -> None:
    p = Plant(tmp_path, warmup=50)
    p.feed(300)
    p.rt.learner.net.params[0] = np.nan
    p.feed(1)
    assert p.events("guard_tripped")[0][1]["restored"] == "fresh"
    assert p.rt.learner.samples == 0 and p.rt.guard.seen == 0
    published = len(p.bodies)
    p.feed(600)
    # the new model warms up, then predicts; a level learned by the old one does not trip it
    assert len(p.bodies) == published + 550
    assert p.engine.guard_trips == {"m1": 1}


@pytest.mark.filterwarnings("ignore:overflow encountered:RuntimeWarning")
def test_a_state_poisoned_in_warmup_is_never_kept_as_the_good_one(tmp_path) -> None:
    # A finite but wild target (1e306) would overflow the target scaler while the weights stay
    # finite. Decoding refuses it (out_of_range); should a scaler still be poisoned, a state
    # kept as "last good" would trip on every prediction for ever, so it must never be kept.
    p = Plant(tmp_path, store=True, warmup=50)
    p.feed(20)
    p.inputs()
    topic, _payload, _truth = next(p.stream)
    p.index += 1
    p.engine.handle(topic, json.dumps({"value": 1e306}).encode(), p.now)
    assert p.engine.rejects.get("out_of_range") == 1
    assert np.isfinite(p.rt.learner.y_scaler.std).all()
    p.feed(30)                                # the refused reading was no sample: 50 now
    scaler = p.rt.learner.y_scaler            # poison it as an overflow would have
    scaler.m2[:] = np.inf
    scaler._refresh_std()
    assert not np.isfinite(p.rt.learner.y_scaler.std).all()
    p.engine.checkpoint_all("timer")
    ((_, failed),) = p.events("checkpoint_failed")
    assert "non-finite" in failed["error"] and p.rt.good is None and p.rt.checkpoint_id is None
    assert p.metric("edgeprop_checkpoint_failures_total") == 1
    p.feed(1)                                        # first prediction: non-finite, not published
    assert p.bodies == [] and p.events("guard_tripped")[0][1]["restored"] == "fresh"
    p.feed(200)
    assert len(p.bodies) == 150 and p.engine.guard_trips == {"m1": 1}


def test_absurd_learning_rate_trips_the_guard_until_it_is_safe_and_nothing_non_finite_is_published(
        tmp_path) -> None:
    p = Plant(tmp_path, store=True, warmup=50)
    p.feed(600)
    before = p.rmse(200)
    p.engine.checkpoint_all("before reload")
    # The config schema refuses 1e6 (training.learning_rate is at most 10), so the reload is
    # handed settings built past the validator: the guard must cope even then.
    bad = model_config(lr=1e6)
    with pytest.raises(ConfigError, match=r"models\[0\]\.training\.learning_rate"):
        parse_config({"models": [bad]})
    m = p.settings.models[0]
    absurd = dataclasses.replace(p.settings, models=(dataclasses.replace(
        m, training=dataclasses.replace(m.training, learning_rate=1e6)),))
    assert p.engine.apply_settings(absurd) == []
    assert p.rt.learner.learning_rate == 1e6

    p.feed(800)

    trips = p.engine.guard_trips["m1"]
    assert trips >= 10          # 1e6 has to come down by halves to a workable rate
    assert p.rt.learner.learning_rate == pytest.approx(1e6 * 0.5 ** trips)
    reasons = [f["reason"] for _, f in p.events("guard_tripped")]
    assert set(reasons) <= {"non_finite", "output_range", "loss_blowup"}
    for reason in ("non_finite", "output_range", "loss_blowup"):
        assert p.metric("edgeprop_guard_trips_total", reason=reason) == reasons.count(reason)
    assert all(f["restored"] == p.rt.checkpoint_id for _, f in p.events("guard_tripped"))
    msgs = p.messages                                # strict parse: no NaN or Infinity anywhere
    assert all(math.isfinite(v) for m in msgs for v in (m["predicted"], m["residual"]))
    last_trip = p.events("guard_tripped")[-1][0]
    assert p.index - last_trip >= 300, "the guard was still tripping near the end"
    assert p.rmse(200) < 1.5 * before + 0.1, (before, p.rmse(200))


def test_runaway_but_finite_loss_trips_as_a_blowup_and_restores(tmp_path) -> None:
    # clip_norm bounds every step, so a too-large rate walks the weights away without ever
    # overflowing: the loss blows up while staying finite.
    p = Plant(tmp_path, store=True, warmup=50, training={"clip_norm": 1.0})
    p.feed(600)
    p.engine.checkpoint_all("before reload")
    good = p.rt.learner.net.params.copy()
    m = p.settings.models[0]
    wild = dataclasses.replace(p.settings, models=(dataclasses.replace(
        m, training=dataclasses.replace(m.training, learning_rate=10.0)),))
    p.engine.apply_settings(wild)
    while not p.events("guard_tripped") and p.index < 1000:
        p.feed(1)
    ((at, trip),) = p.events("guard_tripped")
    assert trip["reason"] == "loss_blowup" and trip["restored"] == p.rt.checkpoint_id
    assert at - 600 >= p.settings.models[0].guard.blowup_samples
    assert np.array_equal(p.rt.learner.net.params, good)
    assert p.rt.learner.learning_rate == pytest.approx(5.0)
    assert p.metric("edgeprop_guard_trips_total", reason="loss_blowup") == 1
    assert p.events("loss_level_changed") == []


def test_a_checkpoint_taken_while_the_loss_climbs_is_saved_but_never_fallen_back_to(tmp_path) -> None:
    # A timer checkpoint can land after a model has begun to run away but before the guard
    # trips; falling back to it would restore the fault. It is saved (an operator may still
    # want it), but the guard keeps the state before it.
    p = Plant(tmp_path, store=True, warmup=50, training={"clip_norm": 1.0})
    p.feed(600)
    p.engine.checkpoint_all("timer")
    calm_id, good = p.rt.checkpoint_id, p.rt.learner.net.params.copy()
    m = p.settings.models[0]
    p.engine.apply_settings(dataclasses.replace(p.settings, models=(dataclasses.replace(
        m, training=dataclasses.replace(m.training, learning_rate=10.0)),)))
    while p.rt.guard.run == 0 and p.index < 1000:
        p.feed(1)
    assert p.rt.guard.run > 0 and not p.events("guard_tripped") and not p.rt.guard.calm
    p.engine.checkpoint_all("timer")
    climbing_id = p.rt.checkpoint_id
    saved = p.events("checkpoint_saved")
    assert [f["guard_fallback"] for _, f in saved] == [True, False]
    assert climbing_id != calm_id and p.rt.good_id == calm_id
    assert climbing_id in [c.id for c in p.rt.store.list()]
    while not p.events("guard_tripped") and p.index < 1200:
        p.feed(1)
    ((_, trip),) = p.events("guard_tripped")
    assert trip["reason"] == "loss_blowup" and trip["restored"] == calm_id
    assert np.array_equal(p.rt.learner.net.params, good)
    p.feed(5)
    assert {msg["checkpoint"] for msg in p.messages[-5:]} == {calm_id}


def test_a_plant_step_change_is_not_treated_as_divergence(tmp_path) -> None:
    # A re-calibrated transmitter: +20 degC on the target (~15x the model's error). The loss
    # jumps far above the bar for good, but the last checkpoint is as wrong as the running
    # model, so restoring it (and cutting the rate, again and again) would only stop learning.
    p = Plant(tmp_path, store=True, warmup=50, drift={"on_drift": "shrink_window"})
    p.feed(1000)
    p.engine.checkpoint_all("before the change")
    lr0 = p.rt.learner.learning_rate
    p.feed(800, shift=20.0)
    assert p.engine.guard_trips == {}
    assert len(p.events("loss_level_changed")) == 1
    assert p.rt.learner.learning_rate == lr0
    assert p.rmse(200) < 2.0                         # it followed the new level


# -- drift responses --------------------------------------------------------------------------

CHANGE = 1251          # first target with the level shift
SHIFT = 5.0            # degC on the bearing temperature, ~6x the model's error here


def drift_plant(tmp_path, on_drift: str, **extra) -> tuple[Plant, int]:
    """Feed a clear level shift at target CHANGE; returns the plant and the event's target."""
    p = Plant(tmp_path, warmup=50, drift={"on_drift": on_drift, "hold_samples": 50,
                                         "boost_factor": 4.0, "boost_samples": 120}, **extra)
    checkpoints = []
    while p.index < CHANGE - 1:
        p.feed(1)
        if p.rt.store is not None and p.index % 100 == 0:
            p.engine.checkpoint_all("test")
            checkpoints.append((p.index, p.rt.checkpoint_id))
    p.checkpoints = checkpoints
    while not p.events("drift_detected") and p.index < CHANGE + 300:
        p.feed(1, shift=SHIFT)
    ((event_at, event),) = p.events("drift_detected")
    assert event["source"] == "loss" and event["action"] == on_drift
    assert event_at - CHANGE < 150, "the shift should be found within 150 samples"
    return p, event_at


def test_repeated_drift_lines_are_limited_per_model_and_source_and_all_counted(tmp_path) -> None:
    """An input crossing its shift level with a slow process cycle fired a line each time
    (the soak's binary model: about 50 an hour). One line per model and source a minute;
    the next says how many were held back; status and metrics count every event."""
    from daemon.drift import DriftEvent
    p = Plant(tmp_path, warmup=50)
    monotonic = [100.0]
    p.engine.say_once.clock = lambda: monotonic[0]
    for _ in range(10):
        p.engine._on_drift(p.rt, DriftEvent("speed", 4.5, 40))
        monotonic[0] += 1.0
    p.engine._on_drift(p.rt, DriftEvent("loss", 1.2, 30))
    assert [f["source"] for _i, f in p.events("drift_detected")] == ["speed", "loss"]
    monotonic[0] += 60.0
    p.engine._on_drift(p.rt, DriftEvent("speed", 4.1, 40))
    *_, (_i, last) = p.events("drift_detected")
    assert (last["source"], last["suppressed"], last["score"]) == ("speed", 9, 4.1)
    assert p.engine.drift_events["m1"] == 12
    assert p.metric("edgeprop_input_shift_events_total", input="speed") == 11
    assert p.metric("edgeprop_loss_drift_events_total") == 1


def flags_after(p: Plant, event_at: int, n: int) -> list[bool]:
    """The published drift flag of the n targets after the event's target."""
    first = 50 + 1                           # target index of the first published message
    msgs = p.messages
    return [m["drift"] for m in msgs[event_at + 1 - first: event_at + 1 - first + n]]


def test_drift_none_only_raises_the_flag(tmp_path) -> None:
    p, at = drift_plant(tmp_path, "none")
    lr, size = p.rt.learner.learning_rate, len(p.rt.learner.window)
    p.feed(60, shift=SHIFT)
    assert flags_after(p, at, 50) == [True] * 50          # hold_samples
    assert flags_after(p, at, 60)[50:] == [False] * 10
    assert not any(m["drift"] for m in p.messages[:at - 51])
    assert p.rt.learner.learning_rate == lr and len(p.rt.learner.window) == size + 60
    assert p.metric("edgeprop_loss_drift_events_total") == 1


def test_drift_boost_raises_the_rate_for_n_samples_then_restores_it(tmp_path) -> None:
    p, at = drift_plant(tmp_path, "boost_lr")
    base = p.settings.models[0].training.learning_rate
    assert p.rt.learner.learning_rate == pytest.approx(4.0 * base)
    rates = []
    for _ in range(130):
        p.feed(1, shift=SHIFT)
        rates.append(p.rt.learner.learning_rate)
    # the boost covers the 120 samples learned after the event's own
    assert rates[:119] == [pytest.approx(4.0 * base)] * 119
    assert rates[119:] == [pytest.approx(base)] * 11
    assert flags_after(p, at, 130) == [True] * 120 + [False] * 10   # flag up while boosted
    assert p.metric("edgeprop_learning_rate") == pytest.approx(base)


def test_drift_shrink_keeps_only_the_post_change_part_of_the_window(tmp_path) -> None:
    p, at = drift_plant(tmp_path, "shrink_window")
    post_change = at - CHANGE + 1
    size = len(p.rt.learner.window)
    assert size < 200 and size >= p.settings.models[0].training.batch_size
    assert abs(size - post_change) <= 10, (size, post_change)
    p.feed(10, shift=SHIFT)
    assert len(p.rt.learner.window) == size + 10
    assert flags_after(p, at, 10) == [True] * 10


def test_drift_restore_goes_back_to_the_checkpoint_from_before_the_change(tmp_path) -> None:
    p, at = drift_plant(tmp_path, "restore", store=True)
    before_change = [cid for i, cid in p.checkpoints if i < CHANGE]
    ((_, back),) = p.events("rolled_back")
    assert back["cause"] == "drift"
    assert back["to"] == before_change[-1]           # saved at target 1200, before the shift
    assert p.rt.checkpoint_id == before_change[-1]
    assert p.rt.learner.samples == 1200
    assert p.metric("edgeprop_rollbacks_total", cause="drift") == 1
    # the input histories stay live: the newest readings, not those of target 1200 (stale now)
    assert p.rt.assembler.features_at(p.now).shape == (2,)
    p.feed(20, shift=SHIFT)
    assert flags_after(p, at, 20) == [True] * 20     # the drift watch survives the rollback
    assert p.engine.drift_events == {"m1": 1}


def test_drift_restore_without_a_checkpoint_before_the_change_says_so(tmp_path) -> None:
    p = Plant(tmp_path, store=True, warmup=50, drift={"on_drift": "restore"})
    p.feed(CHANGE - 1)
    while not p.events("drift_detected") and p.index < CHANGE + 300:
        p.feed(1, shift=SHIFT)
    assert p.events("rolled_back") == []
    ((_, skipped),) = p.events("drift_restore_skipped")
    assert skipped["reason"] == "no checkpoint from before the change"


def test_drift_restore_after_a_restart_finds_the_checkpoint_from_before_the_change(tmp_path) -> None:
    """The restored drift watch counts samples from before the restart, so the times those
    samples were handled are saved with the checkpoint too. Before, a change that began
    before a restart and was found after it logged drift_restore_skipped ("older than the
    samples remembered") and the model learned on from the changed state."""
    drift = {"on_drift": "restore", "hold_samples": 50, "boost_factor": 4.0, "boost_samples": 120}
    p = Plant(tmp_path, store=True, warmup=50, drift=drift)
    while p.index < CHANGE - 1:
        p.feed(1)
        if p.index % 100 == 0:
            p.engine.checkpoint_all("test")
    before_change = p.rt.checkpoint_id                    # saved at target 1200
    p.feed(30, shift=SHIFT)
    p.engine.checkpoint_all("test")                       # 30 changed samples in it
    assert not p.events("drift_detected")
    restarted = Plant(tmp_path, store=True, warmup=50, drift=drift)
    restarted.now, restarted.stream, restarted.index = p.now, p.stream, p.index
    restarted.engine.restore_all()
    assert restarted.rt.learner.samples == CHANGE - 1 + 30
    while not restarted.events("drift_detected") and restarted.index < CHANGE + 300:
        restarted.feed(1, shift=SHIFT)
    ((at, event),) = restarted.events("drift_detected")
    assert event["source"] == "loss"
    assert restarted.events("drift_restore_skipped") == []
    ((_, back),) = restarted.events("rolled_back")
    assert (back["cause"], back["to"]) == ("drift", before_change)
    assert restarted.rt.learner.samples == 1200


# -- the checkpoint timer --------------------------------------------------------------------

def test_timer_saves_a_model_only_after_it_learned_something(tmp_path) -> None:
    p = Plant(tmp_path, store=True, warmup=5)
    every = p.settings.checkpoints.every_s
    p.feed(10)
    p.now += every
    p.engine.tick(p.now)
    assert [f["samples"] for _, f in p.events("checkpoint_saved")] == [10]
    for _ in range(3):                         # readings, but no target: nothing learned
        p.now += every
        p.engine.handle("site/p1/speed", b'{"value": 1000}', p.now)
        p.engine.tick(p.now)
    assert len(p.events("checkpoint_saved")) == 1
    p.feed(1)
    p.now += every
    p.engine.tick(p.now)
    assert [f["samples"] for _, f in p.events("checkpoint_saved")] == [10, 11]
    assert [f["reason"] for _, f in p.events("checkpoint_saved")] == ["timer", "timer"]
    p.engine.checkpoint_all("shutdown")        # on stop (and on request) it always saves
    assert len(p.events("checkpoint_saved")) == 3
    # each line says how long the save took (wall time; a slow card shows up here)
    assert all(0.0 <= float(f["ms"]) < 10_000 for _, f in p.events("checkpoint_saved"))


# -- the published JSON, built without json.dumps on the hot path ------------------------------

def test_message_json_writes_exactly_what_json_dumps_writes() -> None:
    # Reference: the standard library's json.dumps with the options the contract used before
    # the message was built by hand. Values drawn to cover what a message can hold.
    from daemon.engine import _MESSAGE_KEYS, _message_json
    rng = np.random.default_rng(20261202)
    pool = [None, True, False, 0, 7, 123456789, -0.0, 0.0, 5e-324, 1e-300, 1.7976931348623157e308,
            0.1, -2.5, "20261202T140000Z-000003", 'odd "id" \\ é']

    def draw():
        if rng.random() < 0.5:
            return float(rng.normal() * 10.0 ** rng.integers(-12, 13))
        return pool[rng.integers(len(pool))]
    for _ in range(5000):
        values = tuple(draw() for _ in _MESSAGE_KEYS)
        name = str(rng.choice(["m1", "bearing \"temp\"", "kühlraum"]))
        expected = json.dumps(dict(zip(("model", *_MESSAGE_KEYS), (name, *values))),
                              separators=(",", ":"), allow_nan=False)
        assert _message_json(json.dumps(name), values) == expected
    # the usual message (six finite floats, flags, a checkpoint id, a count) has its own path
    ids = ["20261202T140000Z-000003", 'odd "id"', "back\\slash", "é", "\x7f", "tab\t"]
    for i in range(5000):
        values = (*(float(rng.normal() * 10.0 ** rng.integers(-300, 300)) for _ in range(6)),
                  *(pool[rng.integers(3)] for _ in range(2)), ids[i % len(ids)], int(rng.integers(10 ** 9)))
        expected = json.dumps(dict(zip(("model", *_MESSAGE_KEYS), ("m1", *values))),
                              separators=(",", ":"), allow_nan=False)
        assert _message_json('"m1"', values) == expected
    for bad in (math.nan, math.inf, -math.inf):
        values = (1.0, bad) + (None,) * (len(_MESSAGE_KEYS) - 2)
        with pytest.raises(ValueError):
            _message_json('"m1"', values)
        with pytest.raises(ValueError):
            json.dumps(list(values), allow_nan=False)


# -- the wall clock set back -----------------------------------------------------------------

def test_wall_clock_set_back_moves_arrival_stamped_histories_and_timers_with_it(tmp_path) -> None:
    """NTP stepping the box's clock back an hour: predictions go on at once (before, every
    reading stamped on arrival counted as late for the whole hour) and the checkpoint timer
    counts from the new time instead of waiting an hour for its old due time."""
    plant = Plant(tmp_path, store=True, checkpoints={"every_s": 60})
    plant.feed(120)
    published, saved = len(plant.bodies), len(plant.rt.store.list())
    plant.now -= 3600.0
    plant.feed(100)
    for _ in range(100):          # 100 x 1 s of clock: the timer must fire in this stretch
        plant.now += 1.0
        plant.engine.tick(plant.now)
    assert "late" not in plant.engine.rejects, plant.engine.rejects
    assert len(plant.bodies) - published == 100
    (_, step), = plant.events("wall_clock_stepped_back")
    assert 3598.0 < step["step_s"] < 3600.0 and step["inputs_moved"] == 2
    assert len(plant.rt.store.list()) > saved
    assert plant.messages[-1]["t"] < plant.messages[published - 1]["t"]   # the messages say wall time


def test_histories_saved_ahead_of_a_clock_since_set_back_are_cleared_on_restore(tmp_path) -> None:
    """Saved while the clock ran an hour ahead, restored after it was put right: the readings
    stamped on arrival cannot be placed in today's time, so they go (before, they stood an
    hour in the future and every new reading counted as late)."""
    ahead = Plant(tmp_path, store=True)
    ahead.feed(120)
    ahead.engine.checkpoint_all("test")
    plant = Plant(tmp_path, store=True)
    plant.now = ahead.now - 3600.0
    plant.engine.restore_all()
    assert plant.rt.learner.samples == 120
    (_, event), = plant.events("input_history_ahead_of_clock")
    assert event["inputs"] == "speed,current"
    plant.feed(20)
    assert "late" not in plant.engine.rejects, plant.engine.rejects
    assert len(plant.bodies) == 20
