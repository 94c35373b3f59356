"""Detection delay and false alarms of the drift detectors at the default settings.

Run: ``python tests/bench_detectors.py [--runs 50] [--none-runs 20]``. Prints markdown
tables for DEVELOPERS.md. Not collected by pytest (the name does not start with test_).

What is stepped: the *residual* stream r (standardised target, so the model's
residual spread is 1) goes from N(0, 1) to N(mu, 1) (mean step) or N(0, 2)
(variance doubled, spread x1.41). The detectors see it the way the daemon feeds
them: squared loss r**2 -> DriftMonitor (relative loss -> detector), with no inputs.
Each run has ``PRE`` + 0..63 stationary samples, then the change, then up to ``POST``
samples; the delay counts samples from the first changed one to the event.
"""
from __future__ import annotations

import argparse
import os
import sys
import time
from dataclasses import replace

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
from daemon.drift import DriftMonitor, InputShift  # noqa: E402
from daemon.settings import DriftSettings  # noqa: E402

PRE, POST, STATIONARY = 2000, 5000, 100_000
NO_INPUTS = np.empty(0)
SCENARIOS = {
    "mean step 1 sigma": lambda rng, n: rng.normal(1.0, 1.0, n),
    "mean step 3 sigma": lambda rng, n: rng.normal(3.0, 1.0, n),
    "variance x2": lambda rng, n: rng.normal(0.0, np.sqrt(2.0), n),
}


def events(settings: DriftSettings, residuals: np.ndarray) -> list[int]:
    """Sample indices at which the monitor raised a loss event."""
    mon = DriftMonitor(settings, [])
    out = []
    for i, loss in enumerate((residuals * residuals).tolist()):
        if mon.update(loss, NO_INPUTS) is not None:
            out.append(i)
    return out


def no_change(settings: DriftSettings, runs: int, kind: str) -> tuple[int, int]:
    """False alarms over ``runs`` x 100,000 samples with no change: Gaussian, Student-t 3
    (unit variance), or a model learning: residual spread falling from 1 to 0.14 with a
    time constant of 2000 samples, then steady."""
    alarms = 0
    for seed in range(runs):
        rng = np.random.default_rng(1000 + seed)
        if kind == "t3":
            r = rng.standard_t(3, STATIONARY) / np.sqrt(3.0)
        elif kind == "learning":
            r = rng.standard_normal(STATIONARY) * np.sqrt(0.02 + 0.98 * np.exp(-np.arange(STATIONARY) / 2000))
        else:
            r = rng.standard_normal(STATIONARY)
        alarms += len(events(settings, r))
    return alarms, runs * STATIONARY


def step(settings: DriftSettings, make, runs: int) -> tuple[list[int], int, float]:
    """Delays of the first event after the change, misses, and false alarms per 100,000 before it."""
    delays, missed, early, pre_total = [], 0, 0, 0
    for seed in range(runs):
        rng = np.random.default_rng(2000 + seed)
        pre = PRE + int(rng.integers(0, 64))        # vary the change's phase against ADWIN's checks
        pre_total += pre
        r = np.concatenate([rng.standard_normal(pre), make(rng, POST)])
        ev = events(settings, r)
        early += sum(i < pre for i in ev)
        after = [i - pre for i in ev if i >= pre]
        if after:
            delays.append(after[0] + 1)
        else:
            missed += 1
    return delays, missed, early / pre_total * 1e5


def loss_table(runs: int, none_runs: int) -> str:
    rows = ["| detector | scenario (residual stream) | runs | detected | mean delay | median | "
            "max | false alarms per 100,000 |", "|---|---|---|---|---|---|---|---|"]
    for det in ("page_hinkley", "adwin"):
        s = replace(DriftSettings(), detector=det)
        for label, kind in (("none, N(0,1)", "gauss"), ("none, Student-t 3 (heavy tails)", "t3"),
                            ("none, model learning (spread 1 -> 0.14)", "learning")):
            alarms, n = no_change(s, none_runs, kind)
            rows.append(f"| {det} | {label}, {n:,} samples | {none_runs} | - | - | - | - | "
                        f"{alarms / n * 1e5:.2f} ({alarms} in {n:,}) |")
        for label, make in SCENARIOS.items():
            delays, missed, early = step(s, make, runs)
            d = np.asarray(delays, float)
            stats = (f"{d.mean():.0f} | {np.median(d):.0f} | {d.max():.0f}" if d.size else "- | - | -")
            rows.append(f"| {det} | {label} | {runs} | {runs - missed}/{runs} within {POST} | {stats} | "
                        f"{early:.2f} (before the change) |")
    return "\n".join(rows)


def input_table(runs: int) -> str:
    s = DriftSettings()
    rows = ["| input stream (default input_threshold, reference, recent) | runs | detected | "
            "mean delay | max | false alarms per 100,000 |", "|---|---|---|---|---|---|"]
    for thr in (s.input_threshold, 2.0):
        for label, phi in (("N(0,1)", 0.0), ("AR(1) phi=0.9", 0.9), ("AR(1) phi=0.99", 0.99)):
            alarms = 0
            for seed in range(runs):
                e = np.random.default_rng(3000 + seed).standard_normal(STATIONARY)
                alarms += len(_input_events(replace(s, input_threshold=thr), e if phi == 0 else _ar1(e, phi)))
            rows.append(f"| stationary {label}, input_threshold {thr} | {runs} | - | - | - | "
                        f"{alarms / (runs * STATIONARY) * 1e5:.2f} |")
    for thr in (s.input_threshold, 2.0):
        for size in (3.0, 6.0):
            delays = []
            for seed in range(runs):
                rng = np.random.default_rng(4000 + seed)
                x = np.concatenate([rng.standard_normal(s.input_reference + 100),
                                    rng.normal(size, 1.0, 500)])
                fired = _input_events(replace(s, input_threshold=thr), x)
                after = [i - s.input_reference - 100 for i in fired if i >= s.input_reference + 100]
                if after:
                    delays.append(after[0] + 1)
            d = np.asarray(delays, float)
            stats = f"{d.mean():.0f} | {d.max():.0f}" if d.size else "- | -"
            rows.append(f"| step {size:.0f} sigma, input_threshold {thr} | {runs} | "
                        f"{len(delays)}/{runs} | {stats} | - |")
    return "\n".join(rows)


def _ar1(e: np.ndarray, phi: float) -> np.ndarray:
    x = np.empty_like(e)
    acc, scale = 0.0, np.sqrt(1 - phi * phi)
    for i, v in enumerate(e.tolist()):
        acc = phi * acc + scale * v
        x[i] = acc
    return x


def _input_events(s: DriftSettings, x: np.ndarray) -> list[int]:
    shift = InputShift(s.input_reference, s.input_recent, s.input_threshold)
    out = []
    for i, v in enumerate(x.tolist()):
        if shift.update(v):
            out.append(i)
            shift.rebase()          # as the monitor does after an event
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=50, help="seeded runs per step scenario")
    ap.add_argument("--none-runs", type=int, default=20, help="seeded 100,000-sample stationary runs")
    args = ap.parse_args()
    started = time.perf_counter()
    print(f"Defaults: {DriftSettings()}\n")
    print(loss_table(args.runs, args.none_runs))
    print()
    print(input_table(max(args.runs // 5, 5)))
    print(f"\n(took {time.perf_counter() - started:.0f} s)")


if __name__ == "__main__":
    main()
