"""A small pumping station to feed the demo: one centrifugal pump on a variable-speed drive.

The point is a plant whose bearing temperature a soft sensor can learn from
speed, flow, current and ambient readings, and which then misbehaves in two
ways a real plant does: a bearing starts to wear (it runs hot for its load,
which the residual should show) and the season changes (ambient rises, which
the model should follow, not flag). The plant values are invented but
plausible for a 15 kW, 400 V, two-pole pump set.

Physics (all SI except where the unit is in the name):

Pump affinity laws, between operating points on one system parabola
(Q flow, H head, P shaft power, n speed; index 0 = rated point)::

    Q/Q0 = n/n0        H/H0 = (n/n0)^2        P/P0 = (n/n0)^3

They hold exactly here because the system curve is taken as pure friction
(H = c*Q^2, no static head) and pump efficiency is constant along the
parabola; a real rising main with static head deviates at low speed.
Shaft power is the hydraulic power over pump efficiency:
P = rho*g*Q*H / eta_pump, which is 12.5 kW at the rated 120 m3/h, 32 m.

Supply current of the drive, three-phase::

    P_shaft = sqrt(3) * U * I * cos(phi) * eta   =>   I = P_shaft / (sqrt(3) * U * cos(phi) * eta)

with U = 400 V line voltage, cos(phi) the supply-side power factor and eta
the motor-and-drive efficiency, both held constant (real ones fall at light
load, and a motor also draws magnetising current; we leave that out).

Operating schedule: water flows into a wet well on a daily demand profile
(night trough, morning and evening peaks) plus slowly varying noise. A
proportional level controller sets the drive's speed once a minute, in
25 rpm steps, clamped to the pump's allowed range; the drive ramps to it.

Ambient temperature: a daily cosine (warmest mid-afternoon) plus slow weather
noise; from ``season_at_s`` an offset rises linearly by 8 degC over one day.

Bearing temperature, first-order thermal lag towards a load-dependent steady state::

    dT/dt = (T_ss - T) / tau,   T_ss = T_amb + k_load * P_shaft + k_fric * (n/n0) * w(t)

tau = 30 min. Friction heating grows with speed (friction torque roughly
constant, so friction power proportional to speed). The wear fault: from
``fault_at_s`` the friction factor w(t) grows linearly from 1 at
``wear_growth_per_h`` per hour. Integrated exactly for inputs held over a step:
T <- T + (T_ss - T) * (1 - exp(-dt/tau)).

Every published reading carries Gaussian sensor noise and its sim-epoch time. All randomness comes
from one ``numpy.random.Generator``; the same seed gives the same readings.
"""
from __future__ import annotations

import json
import math
from dataclasses import dataclass
from typing import Callable, Optional, Protocol

import numpy as np

DEFAULT_START_T = 1748736000.0   # 2025-06-01T00:00:00Z: a fixed sim epoch, so runs compare
RHO_WATER = 1000.0               # kg/m3
G = 9.81                         # m/s2


@dataclass(frozen=True)
class PlantParams:
    """Invented but plausible values for a 15 kW, 400 V, two-pole pump set."""

    rated_speed_rpm: float = 2950.0
    rated_flow_m3h: float = 120.0
    rated_head_m: float = 32.0
    pump_efficiency: float = 0.84
    line_voltage_v: float = 400.0
    power_factor: float = 0.90
    drive_efficiency: float = 0.88        # motor x drive
    min_speed_rpm: float = 1200.0
    max_speed_rpm: float = 2950.0
    speed_step_rpm: float = 25.0          # resolution of the level controller's set point
    control_period_s: float = 60.0
    ramp_rpm_per_s: float = 20.0
    well_area_m2: float = 20.0
    level_setpoint_m: float = 1.5
    level_gain_rpm_per_m: float = 1500.0
    speed_bias_rpm: float = 2000.0
    inflow_base_m3h: float = 78.0
    inflow_noise_m3h: float = 4.0
    inflow_noise_tau_s: float = 1200.0
    ambient_mean_c: float = 18.0
    ambient_swing_c: float = 4.0          # amplitude of the daily cosine
    ambient_peak_hour: float = 15.0
    weather_c: float = 1.0
    weather_tau_s: float = 6 * 3600.0
    season_shift_c: float = 8.0
    season_ramp_s: float = 86400.0
    bearing_tau_s: float = 1800.0
    bearing_k_load: float = 1.2           # K per kW of shaft power
    bearing_k_friction: float = 8.0       # K at rated speed, healthy bearing
    wear_growth_per_h: float = 0.08       # friction factor added per hour of wear
    noise_speed_rpm: float = 3.0
    noise_flow_m3h: float = 1.0
    noise_current_a: float = 0.15
    noise_ambient_c: float = 0.15
    noise_bearing_c: float = 0.2


def flow_m3h(speed_rpm: float, p: PlantParams) -> float:
    """Affinity law: flow proportional to speed."""
    return p.rated_flow_m3h * speed_rpm / p.rated_speed_rpm


def head_m(speed_rpm: float, p: PlantParams) -> float:
    """Affinity law: head proportional to speed squared."""
    return p.rated_head_m * (speed_rpm / p.rated_speed_rpm) ** 2


def shaft_power_kw(speed_rpm: float, p: PlantParams) -> float:
    """Hydraulic power over pump efficiency; proportional to speed cubed."""
    q = flow_m3h(speed_rpm, p) / 3600.0
    return RHO_WATER * G * q * head_m(speed_rpm, p) / p.pump_efficiency / 1000.0


def supply_current_a(shaft_kw: float, p: PlantParams) -> float:
    """I = P / (sqrt(3) * U * cos(phi) * eta), three-phase supply."""
    return shaft_kw * 1000.0 / (math.sqrt(3.0) * p.line_voltage_v * p.power_factor * p.drive_efficiency)


def demand_inflow_m3h(hour_of_day: float, p: PlantParams) -> float:
    """Daily inflow: night trough near 03:00, peaks near 07:30 and 19:00."""
    def bump(centre: float, width: float) -> float:
        d = (hour_of_day - centre + 12.0) % 24.0 - 12.0     # wrap around midnight
        return math.exp(-0.5 * (d / width) ** 2)
    return p.inflow_base_m3h + 28.0 * bump(7.5, 1.5) + 22.0 * bump(19.0, 2.0) - 24.0 * bump(3.0, 2.5)


class PumpStation:
    """The simulated station; ``step()`` advances ``dt_s`` of simulated time and returns readings."""

    def __init__(self, seed: int | np.random.Generator = 0, start_t: float = DEFAULT_START_T,
                 fault_at_s: Optional[float] = None, season_at_s: Optional[float] = None,
                 dt_s: float = 60.0, plant: PlantParams = PlantParams()) -> None:
        if dt_s <= 0:
            raise ValueError(f"dt_s must be > 0, got {dt_s!r}")
        self.rng = seed if isinstance(seed, np.random.Generator) else np.random.default_rng(seed)
        self.p = plant
        self.start_t = float(start_t)
        self.fault_at_s = fault_at_s
        self.season_at_s = season_at_s
        self.dt_s = float(dt_s)
        self.elapsed_s = 0.0
        self._held_speed: Optional[float] = None
        self._inflow_noise = 0.0
        self._weather = 0.0
        self._next_control_s = 0.0
        inflow = demand_inflow_m3h(self._hour_of_day(), plant)
        self.speed_rpm = self._clamp(plant.rated_speed_rpm * inflow / plant.rated_flow_m3h)
        self.level_m = plant.level_setpoint_m + (self.speed_rpm - plant.speed_bias_rpm) / plant.level_gain_rpm_per_m
        self._command_rpm = self.speed_rpm
        self.inflow_m3h = inflow
        self.bearing_c = self.bearing_steady_c()   # start thermally settled

    def __repr__(self) -> str:
        return f"PumpStation(t={self.t:.0f}, speed={self.speed_rpm:.0f} rpm, bearing={self.bearing_c:.1f} degC)"

    @property
    def t(self) -> float:
        """Sim epoch seconds: the fixed start plus simulated time."""
        return self.start_t + self.elapsed_s

    def hold_speed(self, rpm: Optional[float]) -> None:
        """Put the drive in hand mode at ``rpm`` (None: back to the level controller)."""
        self._held_speed = None if rpm is None else float(rpm)
        if rpm is not None:
            self._command_rpm = float(rpm)

    def _hour_of_day(self) -> float:
        return (self.t % 86400.0) / 3600.0

    def _clamp(self, rpm: float) -> float:
        return min(self.p.max_speed_rpm, max(self.p.min_speed_rpm, rpm))

    def wear_factor(self) -> float:
        """Friction factor w(t): 1 for a healthy bearing, growing linearly once wear starts."""
        if self.fault_at_s is None or self.elapsed_s <= self.fault_at_s:
            return 1.0
        return 1.0 + self.p.wear_growth_per_h * (self.elapsed_s - self.fault_at_s) / 3600.0

    def season_offset_c(self) -> float:
        """Ambient offset of the seasonal shift: 0, then a linear rise to ``season_shift_c``."""
        if self.season_at_s is None or self.elapsed_s <= self.season_at_s:
            return 0.0
        frac = min(1.0, (self.elapsed_s - self.season_at_s) / self.p.season_ramp_s)
        return self.p.season_shift_c * frac

    def ambient_c(self) -> float:
        """True ambient: daily cosine + weather + seasonal offset."""
        p = self.p
        phase = 2.0 * math.pi * (self._hour_of_day() - p.ambient_peak_hour) / 24.0
        return p.ambient_mean_c + p.ambient_swing_c * math.cos(phase) + self._weather + self.season_offset_c()

    def bearing_steady_c(self) -> float:
        """Temperature the bearing would settle at if speed and ambient stayed as they are."""
        p = self.p
        friction = p.bearing_k_friction * (self.speed_rpm / p.rated_speed_rpm) * self.wear_factor()
        return self.ambient_c() + p.bearing_k_load * shaft_power_kw(self.speed_rpm, p) + friction

    def _ar1(self, x: float, sigma: float, tau_s: float) -> float:
        a = math.exp(-self.dt_s / tau_s)
        return a * x + math.sqrt(1.0 - a * a) * sigma * float(self.rng.standard_normal())

    def _advance_hydraulics(self) -> None:
        p, dt = self.p, self.dt_s
        self._inflow_noise = self._ar1(self._inflow_noise, p.inflow_noise_m3h, p.inflow_noise_tau_s)
        inflow = max(0.0, demand_inflow_m3h(self._hour_of_day(), p) + self._inflow_noise)
        self.level_m = max(0.0, self.level_m + (inflow - flow_m3h(self.speed_rpm, p)) * dt / 3600.0 / p.well_area_m2)
        if self._held_speed is None and self.elapsed_s >= self._next_control_s:
            raw = p.speed_bias_rpm + p.level_gain_rpm_per_m * (self.level_m - p.level_setpoint_m)
            self._command_rpm = self._clamp(round(raw / p.speed_step_rpm) * p.speed_step_rpm)
            self._next_control_s += p.control_period_s
        max_change = p.ramp_rpm_per_s * dt
        delta = self._command_rpm - self.speed_rpm
        self.speed_rpm += max(-max_change, min(max_change, delta))
        self.inflow_m3h = inflow

    def step(self) -> dict[str, float]:
        """Advance ``dt_s`` and return the noisy readings plus ``t`` (sim epoch seconds)."""
        p = self.p
        self.elapsed_s += self.dt_s
        self._advance_hydraulics()
        self._weather = self._ar1(self._weather, p.weather_c, p.weather_tau_s)
        self.bearing_c += (self.bearing_steady_c() - self.bearing_c) * (1.0 - math.exp(-self.dt_s / p.bearing_tau_s))
        noise = self.rng.standard_normal(5)
        shaft = shaft_power_kw(self.speed_rpm, p)
        return {
            "t": self.t,
            "speed_rpm": self.speed_rpm + p.noise_speed_rpm * noise[0],
            "flow_m3h": flow_m3h(self.speed_rpm, p) + p.noise_flow_m3h * noise[1],
            "current_a": supply_current_a(shaft, p) + p.noise_current_a * noise[2],
            "ambient_c": self.ambient_c() + p.noise_ambient_c * noise[3],
            "bearing_c": self.bearing_c + p.noise_bearing_c * noise[4],
        }

    @property
    def truth(self) -> dict[str, float]:
        """Noise-free plant state for plots and tests (not published)."""
        p = self.p
        shaft = shaft_power_kw(self.speed_rpm, p)
        healthy = p.bearing_k_friction * self.speed_rpm / p.rated_speed_rpm
        return {
            "t": self.t, "speed_rpm": self.speed_rpm, "flow_m3h": flow_m3h(self.speed_rpm, p),
            "shaft_kw": shaft, "current_a": supply_current_a(shaft, p), "ambient_c": self.ambient_c(),
            "bearing_c": self.bearing_c, "bearing_steady_c": self.bearing_steady_c(),
            "wear_factor": self.wear_factor(), "wear_heating_c": healthy * (self.wear_factor() - 1.0),
            "season_offset_c": self.season_offset_c(), "level_m": self.level_m,
            "inflow_m3h": self.inflow_m3h,
        }


class StopFlag(Protocol):
    def is_set(self) -> bool: ...


class SimClock:
    """Sim epoch time running ``speed`` times faster than ``clock`` from the moment it is made.

    For tools that need "now" on the simulated time axis (the demo's view reads
    sim time from the messages instead; every reading carries its own ``ts``).
    """

    def __init__(self, start_t: float, speed: float, clock: Callable[[], float]) -> None:
        self.start_t, self.speed, self.clock = float(start_t), float(speed), clock
        self.origin = clock()

    def __call__(self) -> float:
        return self.start_t + (self.clock() - self.origin) * self.speed


INPUT_TOPICS = (("speed", "speed_rpm"), ("flow", "flow_m3h"), ("current", "current_a"), ("ambient", "ambient_c"))
TARGET_TOPIC = ("bearing_temp", "bearing_c")


def reading_messages(r: dict[str, float], node_prefix: str) -> list[tuple[str, bytes]]:
    """One step's readings as MQTT messages: inputs first, then the bearing temperature.

    Every payload is ``{"value": v, "ts": t}`` with the sim-epoch time, because
    the simulator runs faster than real time: arrival times would not line up
    with simulated time, and the daemon aligns inputs to the target by ``ts``.
    """
    ts = round(r["t"], 3)
    out = []
    for leaf, key in (*INPUT_TOPICS, TARGET_TOPIC):
        body = {"value": round(r[key], 2), "ts": ts}
        out.append((f"{node_prefix}/{leaf}", json.dumps(body).encode()))
    return out


def publish_loop(client_publish: Callable[[str, bytes], None], station: PumpStation,
                 node_prefix: str, speed: float, duration_s: Optional[float],
                 clock: Callable[[], float], sleep: Callable[[float], None],
                 stop_event: Optional[StopFlag]) -> int:
    """Publish the station's readings paced at ``speed`` simulated seconds per real second; return steps.

    ``duration_s`` is simulated seconds (None: until ``stop_event``); ``speed``
    = inf publishes as fast as possible. Payloads as in ``reading_messages``.
    """
    if not speed > 0:
        raise ValueError(f"speed must be > 0 simulated seconds per real second, got {speed!r}")
    origin, done, begin = clock(), 0, station.elapsed_s
    while duration_s is None or station.elapsed_s - begin + station.dt_s <= duration_s + 1e-9:
        if stop_event is not None and stop_event.is_set():
            break
        due = origin + (station.elapsed_s - begin + station.dt_s) / speed
        while (wait := due - clock()) > 0:
            if stop_event is not None and stop_event.is_set():
                return done
            sleep(min(wait, 0.25))
        for topic, payload in reading_messages(station.step(), node_prefix):
            client_publish(topic, payload)
        done += 1
    return done


def write_capture(path: str, station: PumpStation, duration_s: float, node_prefix: str = "site/p1") -> int:
    """Write ``duration_s`` simulated seconds of readings as a capture file (arrival = sim time); return lines.

    What ``record`` would have written had the station published in real time:
    handy for trying ``replay`` and ``tune`` without a broker.
    """
    from .capture import CaptureWriter
    steps = int(round(duration_s / station.dt_s))
    with CaptureWriter(path, overwrite=True) as writer:
        for _ in range(steps):
            r = station.step()
            for topic, payload in reading_messages(r, node_prefix):
                writer.write(r["t"], topic, payload)
        return writer.lines
