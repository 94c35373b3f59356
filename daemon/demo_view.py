"""What the demo shows: the live terminal view and the scenario part of the summary.

Kept apart from ``daemon.demo``, which starts and stops the broker, station and daemon.
"""
from __future__ import annotations

import math
import os
from typing import Callable, Optional

import numpy as np

from .simulator import DEFAULT_START_T

MODEL = "bearing_temp"
# The scenario the demo config was tuned on (see demo_config.yaml): 3 days, seasons from 1.25 d,
# wear from 2 d. Shorter runs keep the same proportions of their span.
SEASON_AT_D, FAULT_AT_D, FULL_SPAN_D = 1.25, 2.0, 3.0



def scenario_times(span_s: float) -> tuple[float, float]:
    """(season_at_s, fault_at_s) for a run of ``span_s`` simulated seconds."""
    full = FULL_SPAN_D * 86400.0
    scale = 1.0 if span_s >= full else span_s / full
    return SEASON_AT_D * 86400.0 * scale, FAULT_AT_D * 86400.0 * scale


class View:
    """Live progress: a block redrawn in place on a terminal, a plain line now and then otherwise."""

    def __init__(self, tty: bool, write: Callable[[str], None], duration: float, span_s: float) -> None:
        self.tty, self.write, self.duration = tty, write, duration
        self.season_s, self.fault_s = scenario_times(span_s)
        self.drawn = 0
        self.last_lr: Optional[float] = None
        self.events: list[dict] = []

    def note_status(self, st: Optional[dict], messages: list[dict]) -> None:
        """Record a learning-rate change (drift boost, its end, a guard cut) at the latest sim time."""
        model = (st or {}).get("models", {}).get(MODEL)
        if model is None:
            return
        lr = float(model["learning_rate"])
        if self.last_lr is not None and lr != self.last_lr and messages:
            self.events.append({"t": messages[-1]["t"], "kind": "learning_rate", "value": f"{lr:.3g}",
                                "model": MODEL})
        self.last_lr = lr

    def lines(self, elapsed: float, st: Optional[dict], messages: list[dict]) -> list[str]:
        model = (st or {}).get("models", {}).get(MODEL, {})
        last = messages[-1] if messages else None
        sim_h = (last["t"] - DEFAULT_START_T) / 3600.0 if last else 0.0
        res = [m["residual"] for m in messages[-200:] if m.get("residual") is not None]
        rmse = f"{math.sqrt(float(np.mean(np.square(res)))):.2f} degC" if res else "-"
        loss = model.get("recent_loss")
        phase = ("bearing wear" if sim_h * 3600 > self.fault_s else
                 "seasonal warming" if sim_h * 3600 > self.season_s else "normal running")
        lr = model.get("learning_rate")
        return [
            f"edgeprop demo  {elapsed:5.0f} s of {self.duration:g}   simulated {sim_h:6.1f} h   {phase}",
            f"  samples {model.get('samples', 0):>7}   predictions {len(messages):>7}"
            f"   rejects {sum((st or {}).get('rejects', {}).values())}",
            f"  loss (recent, standardised) {'-' if loss is None else f'{loss:.4f}'}"
            f"   RMSE last 200: {rmse}",
            f"  drift {'ACTIVE' if model.get('drift_active') else 'no':<6}   learning rate "
            f"{'-' if lr is None else f'{lr:.4g}'} (configured {model.get('configured_learning_rate', '-')})",
            "  bearing temp  " + ("waiting for the first prediction (warm-up)" if last is None else
                                  f"measured {last['measured']:.2f} degC   predicted {last['predicted']:.2f} degC"),
        ]

    def show(self, elapsed: float, st: Optional[dict], messages: list[dict]) -> None:
        lines = self.lines(elapsed, st, messages)
        if self.tty:
            up = f"\x1b[{self.drawn}F" if self.drawn else ""
            self.write(up + "".join(f"\x1b[K{line}\n" for line in lines))
            self.drawn = len(lines)
        else:
            self.write(" | ".join(" ".join(line.split()) for line in lines) + "\n")


def _report(out: str, messages: list[dict], view: View, span_s: float, speed: float,
            interrupted: bool) -> int:
    from .report import write_report
    if not messages:
        print("no predictions arrived (stopped during warm-up?); nothing to plot. "
              f"See {os.path.join(out, 'daemon.log')}", flush=True)
        return 0 if interrupted else 1
    title = f"edgeprop demo: bearing temperature of a simulated pump station ({span_s / 3600:.0f} h at {speed:g}x)"
    png, txt = write_report(messages, out, title, view.events)
    with open(txt, "a", encoding="utf-8") as f:
        f.write(scenario_text(messages, view, out))
    print(f"plot: {png}\nsummary: {txt}", flush=True)
    return 0


def scenario_text(messages: list[dict], view: View, out: str) -> str:
    """What the simulated plant did, on the plot's time axis, and what the residual made of it."""
    t = np.array([m["t"] for m in messages], float)
    r = np.array([np.nan if m["residual"] is None else m["residual"] for m in messages], float)
    drift = np.array([bool(m["drift"]) for m in messages])
    t0 = t[0]
    season_t, fault_t = DEFAULT_START_T + view.season_s, DEFAULT_START_T + view.fault_s
    h = lambda x: (x - t0) / 3600.0  # noqa: E731
    lines = ["scenario (simulated; hours on the plot's axis, from the first prediction)",
             f"  seasonal warming from  {h(season_t):6.1f} h  (ambient +8 degC over a day; to be followed, not flagged)",
             f"  bearing wear from      {h(fault_t):6.1f} h  (friction grows 8 %/h; the residual should show it)"]
    before, worn = r[t < fault_t], r[t >= fault_t]
    if np.isfinite(before).any():
        lines.append(f"  mean residual before wear  {np.nanmean(before):+.2f} degC")
    if np.isfinite(worn).any():
        last = worn[len(worn) // 2:]
        lines.append(f"  mean residual, later half of the wear  {np.nanmean(last):+.2f} degC")
    starts = np.flatnonzero(drift & ~np.r_[False, drift[:-1]])
    after = [h(t[i]) - h(fault_t) for i in starts if t[i] >= fault_t]
    lines.append(f"  drift alarms: {int((t[starts] < fault_t).sum())} before the wear, {len(after)} after"
                 + (f" (first {after[0]:.1f} h after it began)" if after else ""))
    lines.append(f"  learning-rate changes: {len(view.events)}")
    lines.append(f"  daemon log {os.path.join(out, 'daemon.log')}, config {os.path.join(out, 'demo.yaml')}")
    return "\n".join(lines) + "\n"
