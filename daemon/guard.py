"""Divergence guard: notice a model that is blowing up before it publishes nonsense.

The guard trips when the per-sample prequential loss stays above ``blowup_factor``
times its long-run level for ``blowup_samples`` samples in a row, and on any
non-finite loss (the caller also trips it on non-finite weights or outputs, which
it sees first). Counting single samples, not a moving average, is deliberate: one
wild reading (a transmitter glitch) may be a thousand times the usual loss, and an
average would carry it over the bar for many samples; a run of ``n`` keeps any burst
shorter than ``n`` from ever tripping, however large. A diverging network grows its
error sample after sample, so it keeps the run going.

The long-run level learns only from samples under the bar, so a blow-up cannot raise
its own bar. A short moving average is kept beside it for the metrics and status.
Both averages start as plain running means (bias-free) until they reach their time
constants, so the first prediction's loss does not dominate the long level.
"""
from __future__ import annotations

import math

import numpy as np

from .settings import GuardSettings

SHORT_ALPHA = 0.1      # ~10-sample memory (common practice, no source)
LONG_ALPHA = 0.002     # ~500-sample memory (common practice, no source)
MIN_SEEN = 100         # the long level means nothing before this many samples
LEVEL_FLOOR = 1e-12    # a perfect fit still leaves a bar above zero
REASONS = ("non_finite", "output_range", "loss_blowup")   # trip reasons, as counted in the metrics


class DivergenceGuard:
    """Watches the prequential loss stream of one model."""

    def __init__(self, settings: GuardSettings) -> None:
        self.settings = settings
        self.short = 0.0
        self.long = 0.0
        self.seen = 0          # finite losses observed
        self.run = 0           # samples in a row above the bar
        self.under = 0         # samples the long level has learned from

    def __repr__(self) -> str:
        return (f"DivergenceGuard(short={self.short:.4g}, long={self.long:.4g}, "
                f"seen={self.seen}, run={self.run})")

    @property
    def bar(self) -> float:
        """Loss above which a sample counts towards a blow-up."""
        return self.settings.blowup_factor * max(self.long, LEVEL_FLOOR)

    def observe(self, loss: float) -> str | None:
        """Take one sample's loss; return a trip reason ("non_finite", "loss_blowup") or None."""
        if not math.isfinite(loss):
            return "non_finite"
        self.seen += 1
        self.short += (loss - self.short) * max(SHORT_ALPHA, 1.0 / self.seen)
        s = self.settings
        above = s.enabled and self.seen > MIN_SEEN and loss > self.bar
        if above:
            self.run += 1
        else:
            self.run = 0
            self.under += 1
            self.long += (loss - self.long) * max(LONG_ALPHA, 1.0 / self.under)
        if self.run >= s.blowup_samples:
            self.run = 0
            return "loss_blowup"
        return None

    @property
    def calm(self) -> bool:
        """No run over the bar in progress and the recent average under it.

        A model whose loss has begun to climb may still be finite and under the trip count
        when a timer checkpoint is taken; such a state must not become the one the guard
        falls back to, or the fallback would carry the fault it is meant to undo.
        """
        return self.run == 0 and (self.seen <= MIN_SEEN or self.short <= self.bar)

    def describe(self) -> str:
        """Why a blow-up trip happened, for the log."""
        s = self.settings
        return (f"loss above {s.blowup_factor:g} x its long-run level {self.long:.4g} "
                f"for {s.blowup_samples} samples in a row")

    def restart(self) -> None:
        """Forget the normal level and learn it afresh (after a change of the plant itself)."""
        self.short = self.long = 0.0
        self.seen = self.run = self.under = 0

    def after_restore(self) -> None:
        """Start the short level afresh from the long one after a restore."""
        self.short = self.long
        self.run = 0

    def state(self) -> dict[str, np.ndarray]:
        """Plain arrays for a checkpoint."""
        return {"levels": np.asarray([self.short, self.long]),
                "counts": np.asarray([self.seen, self.run, self.under])}

    def load_state(self, arrays: dict[str, np.ndarray]) -> None:
        """Restore from ``state`` output (older two-count states included)."""
        self.short, self.long = (float(v) for v in arrays["levels"])
        counts = [int(v) for v in np.asarray(arrays["counts"]).ravel()]
        self.seen, self.run = counts[0], counts[1]
        self.under = counts[2] if len(counts) > 2 else self.seen
