"""Pick a learning rate (and batch size) for each model by replaying one capture per candidate.

Each candidate is a full replay through the daemon's path in its own process,
with every model on the candidate's values. Models share only the readings
(each has its own network, window and guard), so that one replay scores the
candidate for every model, and each model is ranked on its own error: RMSE for
regression, log-loss for binary. One shared winner would overwrite rates that
suit one model and not another.
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
from .report import log_loss_terms
from .settings import ModelSettings, Settings

WINDOWS = 10        # the worst moving window spans a tenth of the predictions


@dataclasses.dataclass
class Candidate:
    learning_rate: float
    batch_size: int | None
    error_second_half: float = math.nan
    worst_window: float = math.nan
    divergences: int = 0
    predictions: int = 0
    why: str = ""           # why predictions were few, from the replay's tally

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


def model_errors(messages: list[dict], name: str, binary: bool) -> np.ndarray:
    """Per-prediction error of one model: squared residual, or log-loss for a binary model."""
    scored = [m for m in messages if m["model"] == name and m["measured"] is not None]
    if binary:
        return log_loss_terms([m["predicted"] for m in scored], [m["measured"] for m in scored])
    return np.asarray([m["residual"] for m in scored], float) ** 2


def worst_window(err: np.ndarray, size: int) -> float:
    """Largest mean of ``size`` consecutive per-prediction errors (every start, not just blocks)."""
    if not np.all(np.isfinite(err)):
        return math.inf
    c = np.concatenate([[0.0], np.cumsum(err, dtype=np.float64)])
    return float(np.max((c[size:] - c[:-size]) / size))


def score(cand: Candidate, err: np.ndarray, binary: bool) -> Candidate:
    """Fill in the error figures: RMSE for regression, mean log-loss for binary."""
    cand.predictions = len(err)
    if len(err) >= 2 * WINDOWS:
        root = (lambda v: v) if binary else math.sqrt
        with np.errstate(over="ignore", invalid="ignore"):
            cand.error_second_half = root(float(np.mean(err[len(err) // 2:])))
            cand.worst_window = root(worst_window(err, len(err) // WINDOWS))
    return cand


def evaluate(config_path: str, capture: str, learning_rate: float,
             batch_size: int | None) -> dict[str, Candidate]:
    """Replay one candidate and score it for each model on its own; runs in a worker process."""
    settings = with_training(load_config(config_path), learning_rate, batch_size)
    messages: list[dict] = []
    # a rate too large overflows on its way to the guard; the divergence count says so, not warnings
    with np.errstate(over="ignore", invalid="ignore"):
        _, engine = replay(settings, capture, messages.append, log=lambda *a, **k: None)
    out = {}
    for m in settings.models:
        binary = m.task == "binary"
        cand = score(Candidate(learning_rate, batch_size, divergences=engine.guard_trips.get(m.name, 0)),
                     model_errors(messages, m.name, binary), binary)
        if engine.tally[m.name].few(cand.predictions):
            cand.why = engine.tally[m.name].why()
        out[m.name] = cand
    return out


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
    """``edgeprop tune``: rank candidates per model and print each model's winning lines."""
    settings = load_config(args.config)
    rates = parse_list(args.learning_rates, float, "--learning-rates")
    batches: Sequence[int | None] = parse_list(args.batch_sizes, int, "--batch-sizes") or [None]
    input_file("--capture", args.capture, CAPTURE_EXPECTED)
    grid = [(lr, b) for lr in rates for b in batches]
    jobs = max(1, min(args.jobs or os.cpu_count() or 1, len(grid)))
    with ProcessPoolExecutor(max_workers=jobs) as pool:
        results = list(pool.map(evaluate, [args.config] * len(grid), [args.capture] * len(grid),
                                [g[0] for g in grid], [g[1] for g in grid]))
    if not any(c.predictions for r in results for c in r.values()):
        why = "".join(f"\n  {name}: {c.why}" for name, c in results[0].items())
        raise EdgepropError(f"no candidate published a scored prediction from {args.capture}:{why}\n"
                            f"check that its topics match the config's and that it is longer than "
                            f"warm-up plus the longest lag")
    for k, m in enumerate(settings.models):
        if k:
            print()
        print_model(m, sorted((r[m.name] for r in results), key=Candidate.rank_key))
    return 0


def print_model(m: ModelSettings, ranked: list[Candidate]) -> None:
    """One model's ranking table and the lines to paste under its own ``training:``."""
    unit = "log-loss" if m.task == "binary" else "RMSE"
    print(f"model {m.name} ({m.task}): ranked by divergences, then {unit} over the second half "
          f"of its predictions, then the worst moving-window {unit}")
    print(f"{'rank':>4} {'learning_rate':>13} {'batch':>5} {unit + ' 2nd half':>15} "
          f"{'worst window':>13} {'divergences':>11} {'predictions':>11}")
    for i, c in enumerate(ranked, 1):
        batch = c.batch_size or m.training.batch_size
        print(f"{i:>4} {c.learning_rate:>13g} {batch:>5} {c.error_second_half:>15.5g} "
              f"{c.worst_window:>13.5g} {c.divergences:>11} {c.predictions:>11}")
    best = ranked[0]
    if not math.isfinite(best.error_second_half):
        print(f"No recommendation for {m.name}: "
              + (f"{best.predictions} scored predictions, {2 * WINDOWS} needed to rank"
                 if best.predictions < 2 * WINDOWS else f"its {unit} is not a finite number")
              + (f"; {best.why}" if best.why else ""))
        return
    if best.divergences:
        print(f"Every candidate tripped {m.name}'s divergence guard; try smaller learning rates.")
    print(f"Paste under {m.name}'s `training:` to use its winner:")
    print(f"    learning_rate: {best.learning_rate:g}")
    if best.batch_size:
        print(f"    batch_size: {best.batch_size}")
