"""The worker's per-message path: decode -> align -> predict -> publish -> learn -> watch.

``Engine`` knows nothing of sockets or threads: it is handed one inbound
message at a time and a ``publish`` callable, and it reads time only from the
clock it is given. ``run`` drives it from the broker, ``replay`` from a
capture file: the same code, so replay reproduces what run publishes.
"""
from __future__ import annotations

import json
import math
import time
from typing import Callable, Optional



from .errors import CheckpointError, PayloadError, SampleSkipped
from .learner import Diverged, Prediction
from .logs import LogFn, RateLimited
from .payloads import TARGET_ROLE, MessageDecoder, TopicRoutes
from .runtime import ModelRuntime
from .settings import ModelSettings, Settings

Publish = Callable[[str, bytes, int, bool], object]
CLOCK_STEP_S = 1.0      # an arrival stamp this much older than the newest: the clock was set back

ADVISORY = ("Predictions are advisory only. Never use them as, or in place of, a protective "
            "function (trip, interlock, safety instrumented system); local codes and licensed "
            "practice govern.")


class Engine:
    """Holds every model and applies one message at a time to them."""

    def __init__(self, settings: Settings, publish: Publish, log: LogFn, metrics=None,
                 clock: Callable[[], float] = time.time, stores: Optional[dict] = None) -> None:
        self.settings = settings
        self.publish = publish
        self.log = log
        self.say_once = RateLimited(log)
        self.metrics = metrics
        self.clock = clock
        self.routes = TopicRoutes(settings)
        self.decoder = MessageDecoder(self.routes.sources_by_topic, settings.broker.max_payload_bytes)
        self.models: dict[str, ModelRuntime] = {}
        for m in settings.models:
            store = (stores or {}).get(m.name)
            self.models[m.name] = ModelRuntime(m, settings.publish_topic(m), store)
            if metrics is not None:
                metrics.register_model(m.name, self.models[m.name].learner.net.architecture,
                                       [i.name for i in m.inputs], task=m.task,
                                       coverage=m.interval.coverage)
        self.last_checkpoint_t = clock()
        self.rejects: dict[str, int] = {}
        self.drift_events: dict[str, int] = {}
        self.guard_trips: dict[str, int] = {}
        self.messages = 0
        self._names_json: dict[str, str] = {}
        self._newest_arrival = -math.inf      # arrival stamps only ever grow, unless the clock steps

    # -- one inbound message ---------------------------------------------------
    def handle(self, topic: str, payload: bytes, arrival_t: float,
               outcomes: tuple | None = None) -> None:
        """Apply one MQTT message; bad input is counted and logged, never raised.

        ``outcomes`` is what ``MessageDecoder.decode_message`` made of the payload when the
        broker connection's process has decoded it already; None: decode it here.
        """
        self.messages += 1
        started = time.perf_counter()
        if arrival_t > self._newest_arrival:
            self._newest_arrival = arrival_t
        elif arrival_t < self._newest_arrival - CLOCK_STEP_S:
            self._clock_stepped_back(self._newest_arrival - arrival_t)
            self._newest_arrival = arrival_t
        try:
            routes = self.routes.lookup(topic)
        except PayloadError as exc:
            self._reject(exc, topic=topic)
            if self.metrics is not None:      # taken from the queue like any other message
                self.metrics.observe_message(time.perf_counter() - started)
            return
        if outcomes is None:
            outcomes = self.decoder.decode_message(topic, payload, arrival_t)
        for route in routes:
            rt = self.models[route.model]
            readings = outcomes[route.slot]
            if type(readings) is not tuple:          # the decoder's refusal (a PayloadError)
                self._reject(readings, model=rt.name, input=route.role)
                continue
            try:
                _refuse_future(readings, arrival_t, rt.settings.align.max_ahead_s)
                if route.role == TARGET_ROLE:
                    for t, value in readings:
                        self._on_target(rt, t, value)
                else:
                    add = rt.assembler.add
                    for reading in readings:
                        add(route.role, reading)
            except PayloadError as exc:
                self._reject(exc, model=rt.name, input=route.role)
            except SampleSkipped as exc:
                self._skip(rt, exc)
            except Diverged as exc:
                self._trip_guard(rt, exc.reason, str(exc))
        if self.metrics is not None:
            self.metrics.observe_message(time.perf_counter() - started)

    def _clock_stepped_back(self, step_s: float) -> None:
        """Arrival stamps come from one clock in arrival order, so a stamp older than the
        newest means the wall clock was set back (NTP stepping a box that booted with a wrong
        time). Left alone, every reading stamped on arrival would count as late until the
        clock caught up again, hours for an hour's step: their histories move back with it."""
        moved = sum(len(rt.assembler.shift_arrival_stamped(-step_s)) for rt in self.models.values())
        self.log("warning", "wall_clock_stepped_back", step_s=round(step_s, 3), inputs_moved=moved,
                 action="histories of inputs stamped on arrival moved back with the clock; "
                        "sensor-stamped inputs keep their sensors' times")

    def _on_target(self, rt: ModelRuntime, t: float, y: float) -> None:
        if rt.learner.binary and y not in (0.0, 1.0):
            raise PayloadError("wrong_type", f"binary target must be 0 or 1, got {y!r}")
        x = rt.assembler.features_at(t)
        pred: Prediction | None = None
        if rt.learner.warmed_up:
            pred = rt.learner.predict(x)
            self._publish_prediction(rt, t, pred, y)
        result = rt.learner.learn(x, y, pred)
        if pred is None:
            if self.metrics is not None:
                self.metrics.observe_sample(rt, None, y, result)
            return
        rt.last_loss = result.loss
        if not rt.learner.binary:
            rt.interval.update(y, pred.value)
        rt.note_sample_time(self.clock())
        xl = x.tolist()
        event = rt.drift.update(result.loss, [xl[i] for i in rt.lag0_cols])
        if event is not None:
            self._on_drift(rt, event)
        trip = rt.guard.observe(result.loss)
        n = rt.settings.guard.blowup_samples
        if trip == "loss_blowup" and not rt.good_state_fits(rt.guard.bar, n):
            # the last good state is as wrong on these samples: the plant moved, not the model
            self.say_once("warning", "loss_level_changed", ("loss_level_changed", rt.name),
                          model=rt.name, detail=rt.guard.describe(),
                          action="guard relearns the normal loss level; weights and learning rate kept")
            rt.guard.restart()
        elif trip is not None:
            self._trip_guard(rt, trip, rt.guard.describe() if trip == "loss_blowup"
                             else f"non-finite prequential loss {result.loss!r}")
        if self.metrics is not None:
            self.metrics.observe_sample(rt, pred, y, result)

    # -- publishing ---------------------------------------------------------------
    def _publish_prediction(self, rt: ModelRuntime, t: float, pred: Prediction, y: float | None) -> None:
        low = high = outside = None
        if not rt.learner.binary:
            bounds = rt.interval.bounds(pred.value)
            if bounds is not None and all(map(math.isfinite, bounds)):
                low, high = bounds
                if y is not None:
                    outside = bool(y < low or y > high)
        values = (t, pred.value, y, None if y is None else y - pred.value, low, high, outside,
                  bool(rt.drift.active), rt.checkpoint_id, rt.learner.samples)
        try:
            body = _message_json(self._name_json(rt.name), values).encode()
        except ValueError:
            msg = dict(zip(("model", *_MESSAGE_KEYS), (rt.name, *values)))
            raise Diverged(f"refusing to publish a non-finite number: {msg}") from None
        p = rt.settings.publish
        self.publish(rt.publish_topic, body, p.qos, p.retain)
        if self.metrics is not None:
            self.metrics.observe_published(rt.name, pred.value, low, high)

    def _name_json(self, name: str) -> str:
        text = self._names_json.get(name)
        if text is None:
            text = self._names_json[name] = json.dumps(name)
        return text

    def publish_model_info(self) -> None:
        """Retained description of each model beside its predictions, with the advisory notice."""
        for rt in self.models.values():
            info = {"model": rt.name, "node": self.settings.node, "task": rt.settings.task,
                    "architecture": rt.learner.net.architecture,
                    "inputs": [i.name for i in rt.settings.inputs], "advisory": ADVISORY}
            self.publish(rt.publish_topic + "/info", json.dumps(info).encode(), 1, True)

    # -- periodic work --------------------------------------------------------------
    def tick(self, now: float) -> None:
        """Predict-only cadence and the checkpoint timer; call often, between messages."""
        if now < self.last_checkpoint_t:       # the clock was set back: count from now
            self.last_checkpoint_t = now
        for rt in self.models.values():
            every = rt.settings.publish.every_s
            if rt.last_tick is not None and now < rt.last_tick:
                rt.last_tick = now
            if every and (rt.last_tick is None or now - rt.last_tick >= every):
                rt.last_tick = now
                self._predict_only(rt, now)
        if now - self.last_checkpoint_t >= self.settings.checkpoints.every_s:
            self.last_checkpoint_t = now
            # A model that learned nothing since its last save is not written again: an idle
            # plant would otherwise wear the flash of a small box with identical files.
            for rt in self.models.values():
                if rt.unsaved_changes():
                    self.checkpoint_model(rt, "timer")

    def _predict_only(self, rt: ModelRuntime, now: float) -> None:
        if not rt.learner.warmed_up or not rt.assembler.fresh_at(now):
            return
        try:
            pred = rt.learner.predict(rt.assembler.features_at(now))
            self._publish_prediction(rt, now, pred, None)
        except SampleSkipped:
            return
        except Diverged as exc:
            self._trip_guard(rt, exc.reason, str(exc))

    def checkpoint_all(self, reason: str) -> None:
        """Save every model; a failure is counted and logged, learning goes on."""
        for rt in self.models.values():
            self.checkpoint_model(rt, reason)

    def checkpoint_changed(self, reason: str) -> None:
        """Save every model whose state differs from its newest checkpoint (at shutdown:
        restarts of an idle daemon must not fill ``keep`` with copies of one state)."""
        for rt in self.models.values():
            if rt.unsaved_changes():
                self.checkpoint_model(rt, reason)
            else:
                self.log("debug", "checkpoint_not_needed", model=rt.name, reason=reason,
                         newest=rt.checkpoint_id, samples=rt.learner.samples)

    def checkpoint_model(self, rt: ModelRuntime, reason: str) -> str | None:
        began = time.perf_counter()      # wall time of the save: slow flash shows up in the log
        try:
            cid = rt.checkpoint(reason)
        except (CheckpointError, OSError) as exc:
            rt.last_save_error = str(exc)
            self.log("error", "checkpoint_failed", model=rt.name, reason=reason, error=str(exc))
            if self.metrics is not None:
                self.metrics.checkpoint_failed(rt.name)
            return None
        if cid is not None:
            self.log("info", "checkpoint_saved", model=rt.name, id=cid, reason=reason,
                     samples=rt.learner.samples, guard_fallback=rt.good_id == cid,
                     ms=f"{1000 * (time.perf_counter() - began):.1f}")
            if self.metrics is not None:
                self.metrics.checkpoint_saved(rt.name, cid, self.clock())
        return cid

    # -- when things go wrong ----------------------------------------------------------
    def _reject(self, exc: PayloadError, **where: object) -> None:
        self.rejects[exc.reason] = self.rejects.get(exc.reason, 0) + 1
        if self.metrics is not None:
            self.metrics.rejected(exc.reason, where.get("model"))
        self.say_once("warning", "payload_rejected", (exc.reason, where.get("model"), where.get("input")),
                      reason=exc.reason, detail=str(exc), **where)

    def _skip(self, rt: ModelRuntime, exc: SampleSkipped) -> None:
        rt.skipped[exc.reason] = rt.skipped.get(exc.reason, 0) + 1
        if self.metrics is not None:
            self.metrics.skipped(rt.name, exc.reason)
        self.say_once("info", "sample_skipped", (rt.name, exc.reason), model=rt.name,
                      reason=exc.reason, detail=str(exc))

    def _trip_guard(self, rt: ModelRuntime, reason: str, detail: str) -> None:
        # The restored state carries the multiplier of its day; each trip must cut further
        # than the last, or a rate that always diverges would loop at the same value.
        multiplier = rt.learner.lr_multiplier
        source = rt.restore_good()
        rt.guard.after_restore()
        rt.learner.lr_multiplier = min(multiplier, rt.learner.lr_multiplier)
        rt.learner.cut_learning_rate(rt.settings.guard.lr_factor)
        if self.metrics is not None:
            self.metrics.learning_rate_changed(rt.name, rt.learner.learning_rate)
            if source not in ("memory", "fresh"):
                self.metrics.rolled_back(rt.name, "guard", source)
        self.guard_trips[rt.name] = self.guard_trips.get(rt.name, 0) + 1
        self.log("warning", "guard_tripped", model=rt.name, reason=reason, detail=detail,
                 restored=source, learning_rate=rt.learner.learning_rate)
        if self.metrics is not None:
            self.metrics.guard_tripped(rt.name, reason)

    def _on_drift(self, rt: ModelRuntime, event) -> None:
        action = rt.drift.response
        self.drift_events[rt.name] = self.drift_events.get(rt.name, 0) + 1
        # A slow process cycle can take an input across its shift level many times an hour:
        # one line per model and source a minute (with the count held back); metrics count all.
        self.say_once("warning", "drift_detected", ("drift_detected", rt.name, event.source),
                      model=rt.name, source=event.source, score=event.score, action=action.kind)
        if self.metrics is not None:
            self.metrics.drift_event(rt.name, event.source)
        if action.kind == "boost_lr":
            rt.learner.boost(action.lr_factor, action.samples)
            if self.metrics is not None:
                self.metrics.learning_rate_changed(rt.name, rt.learner.learning_rate)
        elif action.kind == "shrink_window":
            keep = max(rt.learner.training.batch_size, getattr(event, "since", 0) or action.samples)
            rt.learner.window.keep_newest(keep)
        elif action.kind == "restore" and rt.store is not None:
            self._restore_before_change(rt, max(int(getattr(event, "since", 0) or 0), 1))

    def _restore_before_change(self, rt: ModelRuntime, since: int) -> None:
        """Roll back to the newest checkpoint saved before the first post-change sample."""
        changed_at = rt.time_of(since)
        cid = rt.store.id_before(changed_at) if changed_at is not None else None
        if cid is None:
            self.log("warning", "drift_restore_skipped", model=rt.name, since=since,
                     reason="no checkpoint from before the change" if changed_at is not None
                     else "the change is older than the sample times remembered (the last 4096; a "
                     "checkpoint written by an older edgeprop has none)")
            return
        # the drift watch (flag up, references rebased) and the input histories follow the
        # live stream; only the learned state goes back
        monitor, inputs, times = rt.drift, rt.assembler, rt.sample_times()
        self.rollback(rt.name, cid, cause="drift")
        rt.drift, rt.assembler = monitor, inputs
        rt.load_sample_times(times)         # they count the samples the kept watch has seen

    # -- operator actions (between two messages) ----------------------------------------
    def rollback(self, model: str, cid: str, cause: str = "operator") -> str:
        rt = self._model(model)
        rt.restore(cid)
        rt.guard.after_restore()
        self.log("warning", "rolled_back", model=model, to=cid, cause=cause, samples=rt.learner.samples)
        if self.metrics is not None:
            self.metrics.rolled_back(model, cause, cid)
        return cid

    def _model(self, name: str) -> ModelRuntime:
        try:
            return self.models[name]
        except KeyError:
            raise CheckpointError(f"no model named {name!r}; models: {', '.join(self.models)}") from None

    def status(self) -> dict:
        return {"node": self.settings.node, "messages": self.messages, "rejects": dict(self.rejects),
                "models": {name: rt.status() for name, rt in self.models.items()}}

    def restore_all(self) -> None:
        """On start: newest fitting checkpoint per model, or fresh (logged either way)."""
        for rt in self.models.values():
            cid = rt.restore_newest()
            mismatches = getattr(rt.store, "mismatches", []) if rt.store else []
            if cid is None and mismatches and not self.settings.checkpoints.fresh_on_mismatch:
                raise CheckpointError(
                    f"model {rt.name!r}: saved checkpoints do not fit the configured model "
                    f"({mismatches[0][1]}); set checkpoints.fresh_on_mismatch: true to start fresh, "
                    f"or restore the old settings")
            self.log("info", "model_restored" if cid else "model_fresh", model=rt.name, id=cid,
                     samples=rt.learner.samples, architecture=rt.learner.net.architecture)
            ahead = rt.assembler.clear_arrival_stamped_after(self.clock() + CLOCK_STEP_S)
            if ahead:
                self.log("warning", "input_history_ahead_of_clock", model=rt.name,
                         inputs=",".join(ahead), action="cleared; they refill from live readings "
                         "(the clock was set back since the checkpoint was saved)")
            if self.metrics is not None:
                if cid:
                    self.metrics.checkpoint_restored(rt.name, cid)
                if rt.store is not None:
                    self.metrics.checkpoint_skipped_corrupt(rt.name, rt.store.skipped_corrupt)

    def apply_settings(self, new: Settings) -> list[str]:
        """Hot-apply what can change live; return refusals (the rest is applied)."""
        from .reload import apply_to_engine
        return apply_to_engine(self, new)


_MESSAGE_KEYS = ("t", "predicted", "measured", "residual", "low", "high", "outside", "drift",
                 "checkpoint", "samples")
_MESSAGE_HEADS = tuple(f',"{k}":' for k in _MESSAGE_KEYS)


def _message_json(model_json: str, values: tuple) -> str:
    """The published message as ``json.dumps(msg, separators=(",", ":"), allow_nan=False)``
    writes it, keys in contract order; built directly, as json.dumps with options sets up a
    new encoder for every call. ValueError on a non-finite number, as json.dumps raises."""
    t, predicted, measured, residual, low, high, outside, drift, checkpoint, samples = values
    # The usual message (finite floats, both bounds, a checkpoint id) in one formatting call;
    # x - x == 0.0 is false for nan and inf only. Anything else takes the general path.
    if (type(t) is type(predicted) is type(measured) is type(residual) is type(low) is type(high)
            is float and t - t == predicted - predicted == measured - measured == residual - residual
            == low - low == high - high == 0.0 and type(checkpoint) is str and _json_safe(checkpoint)
            and type(samples) is int and type(drift) is bool and (outside is None or type(outside) is bool)):
        return _USUAL_MESSAGE % (model_json, t, predicted, measured, residual, low, high,
                                 _JSON_FLAG[outside], _JSON_FLAG[drift], checkpoint, samples)
    parts = ['{"model":', model_json]
    for head, v in zip(_MESSAGE_HEADS, values):
        parts.append(head)
        # most values are finite floats (inf - inf and nan - nan are nan, not 0)
        parts.append(float.__repr__(v) if type(v) is float and v - v == 0.0 else _json_value(v))
    parts.append("}")
    return "".join(parts)


_USUAL_MESSAGE = ('{"model":%s,"t":%r,"predicted":%r,"measured":%r,"residual":%r,"low":%r,'
                  '"high":%r,"outside":%s,"drift":%s,"checkpoint":"%s","samples":%d}')
_JSON_FLAG = {False: "false", True: "true", None: "null"}


def _json_safe(text: str) -> bool:
    """True if json.dumps writes ``text`` as it is between quotes (a checkpoint id always)."""
    return text.isascii() and text.isprintable() and '"' not in text and "\\" not in text


def _json_value(v: object) -> str:
    """One value as json writes it: float and int by their own repr, nan and inf refused."""
    if v is None:
        return "null"
    if v is True:
        return "true"
    if v is False:
        return "false"
    if isinstance(v, float):
        if not math.isfinite(v):
            raise ValueError(f"out of range float value {v!r}")
        return float.__repr__(v)
    if isinstance(v, int):
        return int.__repr__(v)
    return json.dumps(v, allow_nan=False)      # strings and anything else: json's own rules


def _refuse_future(readings: list, arrival_t: float, max_ahead_s: float | None) -> None:
    """A sensor clock far ahead would block its input (later readings look late) until it passes."""
    if max_ahead_s is None:
        return
    for t, _value in readings:
        if t - arrival_t > max_ahead_s:
            raise PayloadError("future_time", f"sensor time {t:.3f} is {t - arrival_t:.0f} s "
                               f"ahead of arrival; align.max_ahead_s is {max_ahead_s:g} "
                               f"(check the sensor's clock and time unit)")


def model_settings_shape(m: ModelSettings) -> tuple:
    """What a model's network shape depends on; a change needs a new model."""
    return (m.task, tuple((i.name, i.lags_s) for i in m.inputs), m.net.hidden, m.net.activation,
            m.net.dtype, m.training.optimizer)
