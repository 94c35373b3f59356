"""Divergence guard: notice a model that is blowing up before it publishes nonsense.

Two moving averages of the per-sample loss are kept: a short one that reacts
within tens of samples and a long one that stands for the model's normal
level. A short level above ``blowup_factor`` times the long one for
``blowup_samples`` samples in a row trips the guard; so does any non-finite
number (handled by the caller, which sees it first).
"""
from __future__ import annotations

import math

import numpy as np

from .settings import GuardSettings

SHORT_ALPHA = 0.1      # ~10-sample memory (common practice, no source)
LONG_ALPHA = 0.002     # ~500-sample memory (common practice, no source)
MIN_SEEN = 100         # the long level means nothing before this many samples


class DivergenceGuard:
    """Watches the prequential loss stream of one model."""

    def __init__(self, settings: GuardSettings) -> None:
        self.settings = settings
        self.short = 0.0
        self.long = 0.0
        self.seen = 0
        self.run = 0

    def __repr__(self) -> str:
        return f"DivergenceGuard(short={self.short:.4g}, long={self.long:.4g}, seen={self.seen})"

    def observe(self, loss: float) -> str | None:
        """Take one sample's loss; return a trip reason or None."""
        if not math.isfinite(loss):
            return "non_finite"
        if self.seen == 0:
            self.short = self.long = loss
        else:
            self.short += SHORT_ALPHA * (loss - self.short)
        self.seen += 1
        s = self.settings
        tripped = (s.enabled and self.seen > MIN_SEEN
                   and self.short > s.blowup_factor * max(self.long, 1e-12))
        self.run = self.run + 1 if tripped else 0
        if not tripped:
            # the long level learns only from normal samples, so a blow-up cannot raise its own bar
            self.long += LONG_ALPHA * (loss - self.long) if self.seen > 1 else 0.0
        if self.run >= s.blowup_samples:
            self.run = 0
            return "loss_blowup"
        return None

    def after_restore(self) -> None:
        """Start the short level afresh from the long one after a restore."""
        self.short = self.long
        self.run = 0

    def state(self) -> dict[str, np.ndarray]:
        return {"levels": np.asarray([self.short, self.long]), "counts": np.asarray([self.seen, self.run])}

    def load_state(self, arrays: dict[str, np.ndarray]) -> None:
        self.short, self.long = (float(v) for v in arrays["levels"])
        self.seen, self.run = (int(v) for v in arrays["counts"])
