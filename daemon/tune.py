"""Pick a learning rate (and batch size) by replaying one capture per candidate.

Each candidate is a full replay through the daemon's path in its own process.
Ranking: divergences first (a rate that needs the guard is not a rate to
deploy), then prequential error over the second half, then the worst
moving-window error, which punishes rates that learn fast but swing.
"""
from __future__ import annotations

import argparse
import dataclasses
import math
import os
from concurrent.futures import ProcessPoolExecutor
from typing import Sequence

import numpy as np

from .cli_files import input_file
from .config import load_config
from .errors import ConfigError, EdgepropError
from .replay import CAPTURE_EXPECTED, replay
from .settings import Settings

WINDOWS = 10        # the worst moving window spans a tenth of the predictions


@dataclasses.dataclass
class Candidate:
    learning_rate: float
    batch_size: int | None
    error_second_half: float = math.nan
    worst_window: float = math.nan
    divergences: int = 0
    predictions: int = 0

    def rank_key(self) -> tuple:
        bad = not math.isfinite(self.error_second_half)
        return (self.divergences, bad, self.error_second_half, self.worst_window)


def with_training(settings: Settings, learning_rate: float, batch_size: int | None) -> Settings:
    """Settings with every model's learning rate (and batch size) replaced."""
    models = []
    for m in settings.models:
        tr = dataclasses.replace(m.training, learning_rate=learning_rate,
                                 batch_size=batch_size or m.training.batch_size)
        models.append(dataclasses.replace(m, training=tr))
    return dataclasses.replace(settings, models=tuple(models))


def _errors(messages: list[dict], binary: bool) -> np.ndarray:
    scored = [m for m in messages if m["measured"] is not None]
    if binary:   # log-loss per prediction, clipped so one confident miss stays finite
        p = np.clip(np.asarray([m["predicted"] for m in scored], float), 1e-12, 1 - 1e-12)
        y = np.asarray([m["measured"] for m in scored], float)
        return -(y * np.log(p) + (1 - y) * np.log(1 - p))
    return np.asarray([m["residual"] for m in scored], float) ** 2


def worst_window(err: np.ndarray, size: int) -> float:
    """Largest mean of ``size`` consecutive per-prediction errors (every start, not just blocks)."""
    if not np.all(np.isfinite(err)):
        return math.inf
    c = np.concatenate([[0.0], np.cumsum(err, dtype=np.float64)])
    return float(np.max((c[size:] - c[:-size]) / size))


def evaluate(config_path: str, capture: str, learning_rate: float, batch_size: int | None) -> Candidate:
    """Replay one candidate; runs in a worker process."""
    settings = with_training(load_config(config_path), learning_rate, batch_size)
    messages: list[dict] = []
    # a rate too large overflows on its way to the guard; the divergence count says so, not warnings
    with np.errstate(over="ignore", invalid="ignore"):
        _, engine = replay(settings, capture, messages.append, log=lambda *a, **k: None)
    binary = any(rt.learner.binary for rt in engine.models.values())
    err = _errors(messages, binary)
    cand = Candidate(learning_rate, batch_size, predictions=len(err),
                     divergences=sum(engine.guard_trips.values()))
    if len(err) >= 2 * WINDOWS:
        root = (lambda v: math.sqrt(v)) if not binary else (lambda v: v)
        with np.errstate(over="ignore", invalid="ignore"):
            cand.error_second_half = root(float(np.mean(err[len(err) // 2:])))
            cand.worst_window = root(worst_window(err, len(err) // WINDOWS))
    return cand


def parse_list(text: str | None, kind: type, name: str) -> list:
    """Parse ``a,b,c``; a bad entry is a usage error naming the option."""
    if not text:
        return []
    try:
        values = [kind(v) for v in text.split(",") if v.strip()]
    except ValueError:
        raise ConfigError([f"{name}: {text!r} is not a comma-separated list of {kind.__name__} values"]) from None
    if not values or not all(math.isfinite(v) and v > 0 for v in values):
        raise ConfigError([f"{name}: {text!r}: every value must be a finite number > 0"])
    return values


def run_tune(args: argparse.Namespace) -> int:
    """``edgeprop tune``: rank candidates and print the config lines for the winner."""
    settings = load_config(args.config)
    rates = parse_list(args.learning_rates, float, "--learning-rates")
    batches: Sequence[int | None] = parse_list(args.batch_sizes, int, "--batch-sizes") or [None]
    input_file("--capture", args.capture, CAPTURE_EXPECTED)
    grid = [(lr, b) for lr in rates for b in batches]
    jobs = max(1, min(args.jobs or os.cpu_count() or 1, len(grid)))
    with ProcessPoolExecutor(max_workers=jobs) as pool:
        results = list(pool.map(evaluate, [args.config] * len(grid), [args.capture] * len(grid),
                                [g[0] for g in grid], [g[1] for g in grid]))
    results.sort(key=Candidate.rank_key)
    if not any(c.predictions for c in results):
        raise EdgepropError(f"no candidate published a scored prediction from {args.capture}: check "
                            f"that its topics match the config's (a replay shows rejects by reason)")
    binary = any(m.task == "binary" for m in settings.models)
    unit = "log-loss" if binary else "RMSE"
    print(f"{'rank':>4} {'learning_rate':>13} {'batch':>5} {unit + ' 2nd half':>15} "
          f"{'worst window':>13} {'divergences':>11} {'predictions':>11}")
    for i, c in enumerate(results, 1):
        batch = c.batch_size or settings.models[0].training.batch_size
        print(f"{i:>4} {c.learning_rate:>13g} {batch:>5} {c.error_second_half:>15.5g} "
              f"{c.worst_window:>13.5g} {c.divergences:>11} {c.predictions:>11}")
    best = results[0]
    print("\nPaste under each model's `training:` to use the winner:")
    print(f"    learning_rate: {best.learning_rate:g}")
    if best.batch_size:
        print(f"    batch_size: {best.batch_size}")
    return 0
