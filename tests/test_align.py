"""As-of feature assembly: hand-worked lag examples, staleness, lateness, capacity, restart."""
from __future__ import annotations

import io

import numpy as np
import pytest

from daemon.align import FeatureAssembler, InputHistory
from daemon.errors import CheckpointError, PayloadError, SampleSkipped
from daemon.payloads import Reading
from daemon.settings import AlignSettings, InputSettings, ModelSettings, SourceSettings
from nets.store import read_state, write_state

T0 = 1733000000.0


def pump_model(max_age_s=60.0, late_tolerance_s=5.0, history=512) -> ModelSettings:
    """Bearing temperature from pump speed now and motor current now and 30 s ago."""
    return ModelSettings(
        name="bearing_temp",
        target=SourceSettings("site/p1/bearing_temp", "value"),
        inputs=(InputSettings("speed", "site/p1/speed"),
                InputSettings("current", "site/p1/current", field="value", lags_s=(0.0, 30.0))),
        align=AlignSettings(max_age_s=max_age_s, late_tolerance_s=late_tolerance_s,
                            history=history))


def skip_of(fa: FeatureAssembler, t: float) -> SampleSkipped:
    with pytest.raises(SampleSkipped) as info:
        fa.features_at(t)
    assert fa.fresh_at(t) is False          # the two must agree
    return info.value


# --- InputHistory -------------------------------------------------------------

def test_as_of_takes_newest_at_or_before():
    h = InputHistory(8, late_tolerance_s=5.0)
    for t, v in [(10.0, 1.0), (20.0, 2.0), (30.0, 3.0)]:
        h.add(t, v)
    assert h.as_of(9.99) is None
    assert h.as_of(10.0) == (10.0, 1.0)
    assert h.as_of(29.99) == (20.0, 2.0)
    assert h.as_of(30.0) == (30.0, 3.0)
    assert h.as_of(1e9) == (30.0, 3.0)


def test_equal_timestamp_newer_message_wins():
    h = InputHistory(8, 5.0)
    h.add(18.0, 1.0)
    h.add(20.0, 2.0)
    h.add(20.0, 2.5)          # repeat of the newest
    h.add(18.0, 1.5)          # repeat of an older one, within tolerance
    assert len(h) == 2
    assert h.as_of(18.0) == (18.0, 1.5) and h.as_of(20.0) == (20.0, 2.5)


def test_out_of_order_within_tolerance_is_inserted_in_order():
    h = InputHistory(8, 5.0)
    for t in (100.0, 101.0, 104.0):
        h.add(t, t)
    h.add(102.5, -1.0)        # 1.5 s behind the newest
    h.add(99.0, -2.0)         # exactly the tolerance behind: kept
    t, v = h.arrays()
    assert t.tolist() == [99.0, 100.0, 101.0, 102.5, 104.0]
    assert v.tolist() == [-2.0, 100.0, 101.0, -1.0, 104.0]
    assert h.as_of(103.0) == (102.5, -1.0)


def test_late_reading_is_refused_and_history_unchanged():
    h = InputHistory(8, 5.0)
    h.add(100.0, 1.0)
    h.add(110.0, 2.0)
    with pytest.raises(PayloadError) as info:
        h.add(104.9, 9.0)     # 5.1 s behind the newest
    assert info.value.reason == "late" and "late_tolerance_s" in str(info.value)
    assert h.arrays()[0].tolist() == [100.0, 110.0]


def test_non_finite_reading_is_refused():
    h = InputHistory(4, 5.0)
    with pytest.raises(PayloadError) as info:
        h.add(1.0, float("nan"))
    assert info.value.reason == "non_finite" and len(h) == 0


def test_capacity_keeps_the_newest():
    h = InputHistory(4, 5.0)
    for k in range(11):
        h.add(float(k), 10.0 * k)
    t, v = h.arrays()
    assert t.tolist() == [7.0, 8.0, 9.0, 10.0] and v.tolist() == [70.0, 80.0, 90.0, 100.0]
    assert h.as_of(6.5) is None and h.oldest_t == 7.0 and h.newest_t == 10.0


def test_matches_a_plain_sorted_list_under_jitter():
    """Random jittered arrivals against a dict-and-sort reference kept alongside."""
    rng = np.random.default_rng(7)
    cap, tol = 16, 3.0
    h = InputHistory(cap, tol)
    ref: dict[float, float] = {}
    newest = -np.inf
    late = 0
    for k in range(600):
        t = float(np.round(k * 0.5 + rng.uniform(-4.0, 0.5), 1))
        v = float(rng.normal())
        if t < newest - tol:
            with pytest.raises(PayloadError):
                h.add(t, v)
            late += 1
            continue
        h.add(t, v)
        ref[t] = v
        newest = max(newest, t)
        kept = sorted(ref)[-cap:]
        ref = {x: ref[x] for x in kept}
        assert h.arrays()[0].tolist() == kept
        assert h.arrays()[1].tolist() == [ref[x] for x in kept]
        probe = t - rng.uniform(0.0, 5.0)
        below = [x for x in kept if x <= probe]
        assert h.as_of(probe) == ((below[-1], ref[below[-1]]) if below else None)
    assert late >= 10            # the jitter did exercise the late path
    assert len(h) == cap


# --- FeatureAssembler ---------------------------------------------------------

def fed_assembler(**kw) -> FeatureAssembler:
    fa = FeatureAssembler(pump_model(**kw))
    for dt, rpm in [(0, 1450.0), (40, 1480.0), (80, 1500.0)]:
        fa.add("speed", Reading(T0 + dt, rpm))
    for dt, amps in [(0, 12.0), (20, 12.5), (50, 13.1), (70, 13.4)]:
        fa.add("current", Reading(T0 + dt, amps))
    return fa


def test_features_hand_worked_with_lag():
    fa = fed_assembler()
    assert fa.n_features == 3
    # t = T0+75: speed as of 75 -> reading at 40 (1480); current as of 75 -> at 70 (13.4);
    # current as of 75-30 = 45 -> reading at 20 (12.5).
    np.testing.assert_array_equal(fa.features_at(T0 + 75), [1480.0, 13.4, 12.5])
    # t = T0+50: speed at 40 (1480); current at 50 (13.1, exact time counts); lag -> 20 (12.5).
    np.testing.assert_array_equal(fa.features_at(T0 + 50), [1480.0, 13.1, 12.5])
    # t = T0+100: speed at 80 (1500); current at 70 (13.4); lag -> 70 -> reading at 70 (13.4).
    out = fa.features_at(T0 + 100)
    assert out.dtype == np.float64 and out.tolist() == [1500.0, 13.4, 13.4]
    assert fa.fresh_at(T0 + 100)


def test_no_look_ahead():
    fa = fed_assembler()
    # A target stamped T0+45 must not see the speed reading from T0+80.
    assert fa.features_at(T0 + 45)[0] == 1480.0


def test_stale_input_message():
    fa = FeatureAssembler(pump_model(max_age_s=60.0))
    fa.add("speed", Reading(T0 + 100, 1450.0))
    fa.add("current", Reading(T0 + 25, 12.0))
    exc = skip_of(fa, T0 + 100)
    assert exc.reason == "stale"
    assert str(exc) == "stale: input 'current' last seen 75.0 s before t (max_age_s 60)"


def test_age_equal_to_max_age_is_fresh():
    fa = FeatureAssembler(pump_model(max_age_s=60.0))
    fa.add("speed", Reading(T0, 1450.0))
    fa.add("current", Reading(T0, 12.0))
    fa.add("current", Reading(T0 + 31, 12.2))
    # speed is exactly 60 s old; the lagged current (as of T0+30) is the T0 reading, 30 s old.
    assert fa.features_at(T0 + 60).tolist() == [1450.0, 12.2, 12.0]
    assert skip_of(fa, T0 + 60.5).reason == "stale"      # speed is now 60.5 s old


def test_lagged_feature_stale():
    fa = FeatureAssembler(pump_model(max_age_s=60.0))
    fa.add("speed", Reading(T0 + 200, 1450.0))
    fa.add("current", Reading(T0 + 100, 12.0))
    fa.add("current", Reading(T0 + 195, 12.5))
    # at t = T0+200 the lagged look-up is at T0+170; newest then is T0+100, 70 s before.
    exc = skip_of(fa, T0 + 200)
    assert exc.reason == "stale"
    assert "'current' (lag 30 s) last seen 70.0 s before t - 30 s" in str(exc)


def test_lag_reaching_before_the_first_reading_is_stale():
    fa = FeatureAssembler(pump_model())
    fa.add("speed", Reading(T0 + 10, 1450.0))
    fa.add("current", Reading(T0 + 5, 12.0))
    exc = skip_of(fa, T0 + 10)                # the lag looks at T0-20, before any current
    assert exc.reason == "stale" and "no reading at or before t - 30 s" in str(exc)


def test_never_seen_is_no_data():
    fa = FeatureAssembler(pump_model())
    fa.add("current", Reading(T0, 12.0))
    exc = skip_of(fa, T0)
    assert exc.reason == "no_data" and "'speed'" in str(exc)


def test_late_input_through_assembler():
    fa = fed_assembler(late_tolerance_s=5.0)
    with pytest.raises(PayloadError) as info:
        fa.add("current", Reading(T0 + 60, 99.0))     # newest current is T0+70
    assert info.value.reason == "late"
    fa.add("current", Reading(T0 + 66, 13.3))         # 4 s out of order: kept
    assert fa.features_at(T0 + 67).tolist() == [1480.0, 13.3, 12.5]


def test_unknown_input_name():
    fa = FeatureAssembler(pump_model())
    with pytest.raises(KeyError, match="ambient"):
        fa.add("ambient", Reading(T0, 20.0))


def test_history_capacity_comes_from_settings():
    fa = FeatureAssembler(pump_model(history=3))
    for k in range(10):
        fa.add("speed", Reading(T0 + k, float(k)))
    assert len(fa.history("speed")) == 3 and fa.history("speed").oldest_t == T0 + 7


def test_apply_settings_on_reload():
    fa = fed_assembler(max_age_s=60.0, late_tolerance_s=5.0)
    assert skip_of(fa, T0 + 150).reason == "stale"            # current last seen 80 s before
    fa.apply_settings(AlignSettings(max_age_s=120.0, late_tolerance_s=30.0, history=2))
    assert fa.features_at(T0 + 150).tolist() == [1500.0, 13.4, 13.4]
    assert fa.history("current").arrays()[0].tolist() == [T0 + 50, T0 + 70]
    fa.add("current", Reading(T0 + 55, 12.9))                  # 15 s back: now within tolerance
    assert fa.history("current").arrays()[0].tolist() == [T0 + 55, T0 + 70]  # capacity 2 holds


# --- restart -------------------------------------------------------------------

def test_state_round_trip_through_a_state_file():
    fa = fed_assembler()
    arrays = fa.state()
    assert sorted(arrays) == ["current.t", "current.v", "speed.t", "speed.v"]
    buf = io.BytesIO()
    write_state(buf, arrays, {"kind": "align"})       # the real checkpoint format
    buf.seek(0)
    loaded, _ = read_state(buf)
    fb = FeatureAssembler(pump_model())
    fb.load_state(loaded)
    for t in (T0 + 50, T0 + 75, T0 + 100):
        np.testing.assert_array_equal(fb.features_at(t), fa.features_at(t))
    # and it carries on: the late check uses the restored newest reading
    with pytest.raises(PayloadError):
        fb.add("current", Reading(T0 + 60, 1.0))


def test_load_state_keeps_newest_when_history_shrank():
    fa = fed_assembler()
    fb = FeatureAssembler(pump_model(history=2))
    fb.load_state(fa.state())
    assert fb.history("current").arrays()[0].tolist() == [T0 + 50, T0 + 70]


def test_load_state_new_input_starts_empty():
    fa = fed_assembler()
    arrays = {k: v for k, v in fa.state().items() if k.startswith("speed.")}
    fb = FeatureAssembler(pump_model())
    fb.load_state(arrays)
    assert len(fb.history("speed")) == 3 and len(fb.history("current")) == 0


@pytest.mark.parametrize("damage", [
    lambda a: a.pop("current.v"),
    lambda a: a.__setitem__("current.t", a["current.t"][::-1].copy()),
    lambda a: a.__setitem__("current.v", np.array([1.0, np.nan, 2.0, 3.0])),
    lambda a: a.__setitem__("current.v", a["current.v"][:2]),
    lambda a: a.__setitem__("current.t", a["current.t"].reshape(2, 2)),
])
def test_bad_state_is_refused_and_nothing_changes(damage):
    src = fed_assembler().state()
    damage(src)
    fb = FeatureAssembler(pump_model())
    fb.add("speed", Reading(T0 + 500, 1.0))
    with pytest.raises(CheckpointError, match="current"):
        fb.load_state(src)
    # speed.* was valid, but nothing is applied unless everything is
    assert fb.history("speed").arrays()[0].tolist() == [T0 + 500]
