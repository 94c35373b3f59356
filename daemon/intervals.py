"""Prediction intervals from recent residuals, kept honest under drift by adaptive conformal inference.

The band is predicted +- q, where q is the conformal quantile of the newest
``window`` absolute residuals: the k-th smallest with k = ceil((n + 1)(1 - alpha_t))
(split-conformal rank, Lei et al. 2018). A fixed alpha_t = 1 - coverage
covers well while residuals are exchangeable; under drift the window lags and
coverage slips. Adaptive conformal inference (Gibbs & Candes 2021) steers alpha_t
by the misses it sees,

    alpha_{t+1} = alpha_t + gamma * (alpha - err_t),   err_t = 1 if y_t fell outside,

which keeps the long-run miss rate within (max(alpha_1, 1 - alpha_1) + gamma) / (gamma T)
of alpha whatever the sequence (their Proposition 4.1), as long as alpha_t stays in
[-gamma, 1 + gamma]. ``gamma`` is ``adapt_rate``; 0 gives the plain quantile.

Edges: when k > n (alpha_t below 1/(n+1), where the paper's band is the whole
line) the band is ``WIDE_MARGIN`` x the largest stored residual, so the
published ``low``/``high`` stay finite numbers. A miss of even that band, or an
exactly-zero residual with a zero-width band, could push alpha_t outside the
paper's range, so it is clipped to [-gamma, 1 + gamma].
"""
from __future__ import annotations

import math
from bisect import bisect_left, insort
from typing import Optional

import numpy as np

from .settings import IntervalSettings

MIN_RESIDUALS = 20    # fewer residuals give no usable quantile (common practice, no source)
WIDE_MARGIN = 2.0     # stand-in for an unbounded band (common practice, no source)


class ConformalInterval:
    """Symmetric band around a prediction from the recent |residuals|, with ACI correction."""

    def __init__(self, settings: IntervalSettings) -> None:
        self.settings = settings
        self.buf = np.zeros(int(settings.window), np.float64)
        self.head = self.size = 0
        # the stored residuals kept sorted beside the ring: the k-th smallest is then a
        # lookup, not a partition of the whole window for every prediction
        self._sorted: list[float] = []
        self.alpha_t = 1.0 - settings.coverage
        self.scored = self.inside = 0
        self._half: Optional[float] = None
        self._stale = True

    def __repr__(self) -> str:
        return (f"ConformalInterval(coverage={self.settings.coverage}, level={self.level:.4f}, "
                f"residuals={self.size}/{self.buf.size})")

    @property
    def level(self) -> float:
        """Quantile level in use now, 1 - alpha_t (may leave [0, 1] briefly)."""
        return 1.0 - self.alpha_t

    @property
    def coverage(self) -> float:
        """Achieved fraction of scored readings inside their band since start or reload (nan before any)."""
        return self.inside / self.scored if self.scored else math.nan

    def half_width(self) -> Optional[float]:
        """Half the band width for the next reading, or None with under MIN_RESIDUALS residuals."""
        if self.size < MIN_RESIDUALS:
            return None
        if self._stale:
            n = self.size
            rank = math.ceil((n + 1) * (1.0 - self.alpha_t) - 1e-9)   # 1-based; guard float fuzz
            if rank > n:
                self._half = WIDE_MARGIN * self._sorted[-1]
            elif rank < 1:
                self._half = 0.0
            else:
                self._half = self._sorted[rank - 1]
            self._stale = False
        return self._half

    def bounds(self, predicted: float) -> Optional[tuple[float, float]]:
        """(low, high) around ``predicted``, or None until enough residuals are seen."""
        half = self.half_width()
        if half is None:
            return None
        return predicted - half, predicted + half

    def update(self, measured: float, predicted: float) -> bool:
        """Score a reading against the band it was given, then learn from it; True if it was outside."""
        r = abs(measured - predicted)
        if not math.isfinite(r):
            return False                    # the guard handles non-finite values
        half = self.half_width()
        outside = False
        if half is not None:
            outside = r > half
            self.scored += 1
            self.inside += not outside
            gamma = self.settings.adapt_rate
            alpha = 1.0 - self.settings.coverage
            self.alpha_t = min(max(self.alpha_t + gamma * (alpha - outside), -gamma), 1.0 + gamma)
        if self.size == self.buf.size:                  # the oldest residual leaves
            del self._sorted[bisect_left(self._sorted, float(self.buf[self.head]))]
        else:
            self.size += 1
        insort(self._sorted, float(r))
        self.buf[self.head] = r
        self.head = (self.head + 1) % self.buf.size
        self._stale = True
        return outside

    def newest(self) -> np.ndarray:
        """Stored |residuals|, oldest first (a copy)."""
        if self.size < self.buf.size:
            return self.buf[:self.size].copy()
        return np.concatenate([self.buf[self.head:], self.buf[:self.head]])

    def apply_settings(self, new: IntervalSettings) -> None:
        """Take reloaded settings; keeps the newest residuals and the learned correction."""
        if new.window != self.buf.size:
            self._refill(self.newest(), int(new.window))
        if new.coverage != self.settings.coverage:
            # keep the drift correction learned so far, move the target
            self.alpha_t += self.settings.coverage - new.coverage
            self.scored = self.inside = 0   # achieved coverage against the old target means nothing now
        self.settings = new
        self._stale = True

    def _refill(self, values: np.ndarray, capacity: int) -> None:
        values = values[-capacity:]
        self.buf = np.zeros(capacity, np.float64)
        self.buf[:values.size] = values
        self.size = values.size
        self.head = values.size % capacity
        self._sorted = sorted(values.tolist())
        self._stale = True

    def state(self) -> dict[str, np.ndarray]:
        """Plain arrays for a checkpoint."""
        return {"residuals": self.newest(), "alpha_t": np.asarray(self.alpha_t),
                "scored": np.asarray(self.scored), "inside": np.asarray(self.inside)}

    def load_state(self, arrays: dict[str, np.ndarray]) -> None:
        """Restore from ``state`` output; a smaller window keeps the newest residuals."""
        residuals = np.asarray(arrays["residuals"], np.float64).ravel()
        if not np.all(np.isfinite(residuals)) or np.any(residuals < 0):
            raise ValueError("interval state holds negative or non-finite residuals")
        self._refill(residuals, self.buf.size)
        self.alpha_t = float(np.asarray(arrays["alpha_t"]))
        self.scored, self.inside = int(arrays["scored"]), int(arrays["inside"])
