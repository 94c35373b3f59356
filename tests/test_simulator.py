"""The demo's pumping station: determinism, textbook physics, the two faults, the publish loop."""
from __future__ import annotations

import dataclasses
import json
import math
import os
import threading
import typing

import numpy as np
import pytest
import yaml

from daemon import settings as st
from daemon.simulator import (DEFAULT_START_T, PlantParams, PumpStation, flow_m3h, head_m,
                              publish_loop, shaft_power_kw, supply_current_a)

P = PlantParams()
QUIET = dataclasses.replace(P, ambient_swing_c=0.0, weather_c=0.0, noise_speed_rpm=0.0,
                            noise_flow_m3h=0.0, noise_current_a=0.0, noise_ambient_c=0.0,
                            noise_bearing_c=0.0)


def run(station: PumpStation, seconds: float) -> list[dict]:
    return [station.step() for _ in range(int(round(seconds / station.dt_s)))]


def test_same_seed_same_readings_other_seed_differs():
    a = run(PumpStation(7, fault_at_s=3600, season_at_s=1800, dt_s=30), 4 * 3600)
    b = run(PumpStation(7, fault_at_s=3600, season_at_s=1800, dt_s=30), 4 * 3600)
    c = run(PumpStation(8, fault_at_s=3600, season_at_s=1800, dt_s=30), 4 * 3600)
    assert a == b
    assert [r["bearing_c"] for r in a] != [r["bearing_c"] for r in c]
    assert set(a[0]) == {"t", "speed_rpm", "flow_m3h", "current_a", "ambient_c", "bearing_c"}
    assert a[0]["t"] == DEFAULT_START_T + 30 and a[-1]["t"] == DEFAULT_START_T + 4 * 3600


def test_generator_can_be_passed_in():
    a = run(PumpStation(np.random.default_rng(3), dt_s=60), 3600)
    b = run(PumpStation(3, dt_s=60), 3600)
    assert a == b


def test_affinity_laws():
    # Pump affinity laws Q ~ n, H ~ n^2, P ~ n^3 (any centrifugal pump handbook, e.g. Karassik,
    # Pump Handbook; quoted from memory).
    n = 1400.0
    assert flow_m3h(2 * n, P) == pytest.approx(2 * flow_m3h(n, P), rel=1e-12)
    assert head_m(2 * n, P) == pytest.approx(4 * head_m(n, P), rel=1e-12)
    assert shaft_power_kw(2 * n, P) == pytest.approx(8 * shaft_power_kw(n, P), rel=1e-12)
    # Same through the running station: hold the drive at n, then at 2n.
    s = PumpStation(1, dt_s=30, plant=QUIET)
    s.hold_speed(n)
    run(s, 600)
    low = s.truth
    s.hold_speed(2 * n)
    run(s, 600)
    high = s.truth
    assert high["speed_rpm"] == 2 * n
    assert high["flow_m3h"] / low["flow_m3h"] == pytest.approx(2.0, rel=1e-12)
    assert high["shaft_kw"] / low["shaft_kw"] == pytest.approx(8.0, rel=1e-12)


def test_rated_point_power_and_current():
    # Hydraulic power rho*g*Q*H over pump efficiency, worked by hand:
    # 1000 * 9.81 * (120/3600) * 32 / 0.84 = 12457.1 W
    assert shaft_power_kw(2950.0, P) == pytest.approx(12.4571, abs=1e-4)
    # Three-phase power P = sqrt(3)*U*I*cos(phi)*eta (standard electrical-engineering relation):
    # 12457.1 / (1.7320508 * 400 * 0.90 * 0.88) = 22.70 A, worked by hand.
    assert supply_current_a(12.4571, P) == pytest.approx(22.70, abs=0.01)
    assert supply_current_a(12.4571, P) < 15000 / (math.sqrt(3) * 400 * 0.9 * 0.88)   # below 15 kW rating


def test_bearing_first_order_step_response():
    # A first-order lag reaches 1 - 1/e = 63.2 % of a step after one time constant and
    # 1 - e^-3 = 95.0 % after three (textbook control engineering, e.g. Ogata, Modern
    # Control Engineering, first-order systems; quoted from memory).
    plant = dataclasses.replace(QUIET, ramp_rpm_per_s=1000.0)    # the drive steps within one dt
    s = PumpStation(1, dt_s=30, plant=plant)
    s.hold_speed(1500.0)
    run(s, 10 * plant.bearing_tau_s)
    before = s.truth["bearing_c"]
    s.hold_speed(2900.0)
    run(s, plant.bearing_tau_s)
    target = s.truth["bearing_steady_c"]
    assert target - before > 10.0              # a real step, not noise
    frac1 = (s.truth["bearing_c"] - before) / (target - before)
    run(s, 2 * plant.bearing_tau_s)
    frac3 = (s.truth["bearing_c"] - before) / (target - before)
    assert frac1 == pytest.approx(1 - math.exp(-1), abs=1e-3)
    assert frac3 == pytest.approx(1 - math.exp(-3), abs=1e-3)


def test_wear_fault_runs_the_bearing_hot_at_equal_load():
    healthy = PumpStation(5, dt_s=30, fault_at_s=None)
    worn = PumpStation(5, dt_s=30, fault_at_s=3600.0)
    for s in (healthy, worn):
        s.hold_speed(2500.0)
    a, b = run(healthy, 8 * 3600), run(worn, 8 * 3600)
    # Everything but the bearing is identical: same seed, same load.
    for key in ("speed_rpm", "flow_m3h", "current_a", "ambient_c"):
        assert [r[key] for r in a] == [r[key] for r in b]
    early = slice(0, 100)                      # before the fault: the same bearing
    assert [r["bearing_c"] for r in a[early]] == [r["bearing_c"] for r in b[early]]
    last_hour = slice(-120, None)
    hotter = np.mean([r["bearing_c"] for r in b[last_hour]]) - np.mean([r["bearing_c"] for r in a[last_hour]])
    # 7 h of wear at 0.08/h: friction factor 1.56 -> +0.56 * 8 K * 2500/2950 = +3.8 K steady state.
    assert 2.5 < hotter < 4.5
    assert worn.truth["wear_heating_c"] == pytest.approx(0.56 * 8.0 * 2500 / 2950, rel=1e-9)


def test_seasonal_shift_raises_ambient_by_eight_over_a_day():
    base = PumpStation(2, dt_s=60, season_at_s=None, plant=QUIET)
    warm = PumpStation(2, dt_s=60, season_at_s=3600.0, plant=QUIET)
    run(base, 3600 + 43200)
    run(warm, 3600 + 43200)
    assert warm.truth["ambient_c"] - base.truth["ambient_c"] == pytest.approx(4.0, abs=1e-9)
    run(base, 2 * 86400)
    run(warm, 2 * 86400)
    assert warm.truth["ambient_c"] - base.truth["ambient_c"] == pytest.approx(8.0, abs=1e-9)


def test_speed_follows_demand_in_controller_steps():
    s = PumpStation(4, dt_s=60)
    truth = []
    for _ in range(2 * 1440):
        s.step()
        truth.append(s.truth)
    speed = np.array([x["speed_rpm"] for x in truth])
    hour = np.array([(x["t"] % 86400) / 3600 for x in truth])
    assert speed.min() >= P.min_speed_rpm and speed.max() <= P.max_speed_rpm
    # Settled speeds sit on the controller's 25 rpm grid (the ramp only passes through).
    settled = speed[1:][np.diff(speed) == 0]
    assert np.all(np.mod(settled, P.speed_step_rpm) == 0)
    # Morning peak (07-09 h) needs more pumping than the night trough (02-04 h).
    assert speed[(hour >= 7) & (hour < 9)].mean() > speed[(hour >= 2) & (hour < 4)].mean() + 400


class FakeTime:
    """A clock that only moves when slept on."""

    def __init__(self) -> None:
        self.now = 1000.0
        self.slept = 0.0

    def clock(self) -> float:
        return self.now

    def sleep(self, s: float) -> None:
        self.now += s
        self.slept += s


def test_publish_loop_topics_payloads_and_pacing():
    sent: list[tuple[str, bytes]] = []
    ft = FakeTime()
    station = PumpStation(1, dt_s=30)
    steps = publish_loop(lambda t, p: sent.append((t, p)), station, "site/p1", 60.0, 600.0,
                         ft.clock, ft.sleep, threading.Event())
    assert steps == 20
    assert len(sent) == 20 * 5
    topics = [t for t, _ in sent[:5]]
    assert topics == ["site/p1/speed", "site/p1/flow", "site/p1/current", "site/p1/ambient",
                      "site/p1/bearing_temp"]
    # every reading carries its sim-epoch time: the sim runs faster than real time, so
    # arrival times cannot pair inputs with the target
    bodies = [json.loads(p) for _, p in sent]
    assert all(set(b) == {"value", "ts"} and math.isfinite(b["value"]) for b in bodies)
    for k in range(20):
        assert {b["ts"] for b in bodies[5 * k:5 * k + 5]} == {DEFAULT_START_T + 30 * (k + 1)}
    assert ft.slept == pytest.approx(600.0 / 60.0)    # 600 simulated s at 60x = 10 real s


def test_publish_loop_stops_on_event():
    ft = FakeTime()
    stop = threading.Event()
    sent = []

    def publish(topic, payload):
        sent.append(topic)
        if len(sent) == 15:
            stop.set()

    steps = publish_loop(publish, PumpStation(1, dt_s=30), "plant", 1e9, None, ft.clock, ft.sleep, stop)
    assert steps == 3 and sent[0] == "plant/speed"


def _check_keys(mapping: dict, cls: type, path: str) -> list[str]:
    hints = typing.get_type_hints(cls)
    names = {f.name for f in dataclasses.fields(cls)}
    problems = [f"{path}{k}" for k in mapping if k not in names]
    for k, v in mapping.items():
        sub = [a for a in typing.get_args(hints.get(k)) if dataclasses.is_dataclass(a)] or \
              ([hints[k]] if dataclasses.is_dataclass(hints.get(k)) else [])
        inner = typing.get_args(hints.get(k))
        if isinstance(v, dict) and sub:
            problems += _check_keys(v, sub[0], f"{path}{k}.")
        elif isinstance(v, list) and inner and dataclasses.is_dataclass(inner[0]):
            for i, item in enumerate(v):
                problems += _check_keys(item, inner[0], f"{path}{k}[{i}].")
    return problems


def test_demo_config_uses_only_settings_keys():
    here = os.path.join(os.path.dirname(__file__), "..", "daemon", "demo_config.yaml")
    with open(here, encoding="utf-8") as f:
        doc = yaml.safe_load(f)
    assert _check_keys(doc, st.Settings, "") == []
    m = doc["models"][0]
    assert doc["node"] == "demo-station" and m["name"] == "bearing_temp"
    assert m["target"] == {"topic": "site/p1/bearing_temp", "field": "value", "time_field": "ts"}
    assert [i["name"] for i in m["inputs"]] == ["speed", "current", "ambient", "flow"]
    assert m["drift"]["detector"] == "page_hinkley" and m["drift"]["on_drift"] == "boost_lr"


def test_sim_clock_runs_speed_times_faster_from_its_start():
    from daemon.simulator import SimClock
    ft = FakeTime()
    clock = SimClock(DEFAULT_START_T, 60.0, ft.clock)
    assert clock() == DEFAULT_START_T
    ft.sleep(10.0)
    assert clock() == DEFAULT_START_T + 600.0
