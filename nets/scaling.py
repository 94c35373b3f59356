"""Running standardisation by Welford's algorithm, mergeable by Chan et al.'s rule.

Online learning sees each reading once and cannot pre-compute a mean and
spread; Welford's update is the numerically stable way to keep them. A channel
that has not varied yet (zero variance) is scaled by 1, not by 1/0.
"""
from __future__ import annotations

import math
from typing import Sequence

import numpy as np

MIN_VARIANCE = 1e-12   # below this a channel counts as constant (common practice, no source)


class RunningScaler:
    """Per-channel running mean and variance; standardises and undoes it."""

    def __init__(self, n_channels: int, dtype: str | np.dtype = "float64") -> None:
        self.dtype = np.dtype(dtype)
        self.count = 0
        self.mean = np.zeros(n_channels, np.float64)
        self.m2 = np.zeros(n_channels, np.float64)
        self.std = np.ones(n_channels, np.float64)

    def __repr__(self) -> str:
        return f"RunningScaler(channels={self.mean.size}, count={self.count})"

    def update(self, x: np.ndarray) -> None:
        """Add one sample (shape (channels,)) or a batch (shape (n, channels))."""
        x = np.asarray(x, np.float64)
        if x.ndim == 1:
            self.update_one(x.tolist())
            return
        n = x.shape[0]
        if n == 0:
            return
        self._merge(n, x.mean(axis=0), ((x - x.mean(axis=0)) ** 2).sum(axis=0))
        self._refresh_std()

    def update_one(self, values: Sequence[float]) -> None:
        """Add one sample given as plain floats, one per channel.

        The per-message path: at a few channels numpy's per-call overhead is most of
        the cost, so the step runs on Python floats. It is the same IEEE-754 double
        operations in the same order as the array form (float / int converts the
        count exactly, and sqrt is correctly rounded in both), so the statistics
        are bit-identical to updating with arrays.
        """
        mean, m2 = self.mean.tolist(), self.m2.tolist()
        if len(values) != len(mean):
            raise ValueError(f"sample has {len(values)} channels, expected {len(mean)}")
        n = self.count = self.count + 1
        for i, x in enumerate(values):
            old = mean[i]
            d = x - old
            new = old + d / n
            mean[i] = new
            m2[i] += d * (x - new)
        self.mean[:] = mean
        self.m2[:] = m2
        if n > 1:
            # as _refresh_std: a variance that is not above the floor (nan too) scales by 1
            self.std[:] = [math.sqrt(v) if v > MIN_VARIANCE else 1.0 for v in [s / n for s in m2]]
        else:
            self.std[:] = 1.0

    def merge(self, other: "RunningScaler") -> None:
        """Fold in another scaler's statistics as if its samples had come here too."""
        if other.mean.shape != self.mean.shape:
            raise ValueError(f"cannot merge {other.mean.size} channels into {self.mean.size}")
        if other.count:
            self._merge(other.count, other.mean, other.m2)
            self._refresh_std()

    def _merge(self, n_b: int, mean_b: np.ndarray, m2_b: np.ndarray) -> None:
        # Chan, Golub & LeVeque (1979) pairwise combination
        n_a = self.count
        n = n_a + n_b
        d = mean_b - self.mean
        self.mean = self.mean + d * (n_b / n)
        self.m2 = self.m2 + m2_b + d * d * (n_a * n_b / n)
        self.count = n

    def _refresh_std(self) -> None:
        var = self.variance
        self.std = np.where(var > MIN_VARIANCE, np.sqrt(np.maximum(var, 0.0)), 1.0)

    @property
    def variance(self) -> np.ndarray:
        """Population variance per channel (zero before two samples)."""
        return self.m2 / self.count if self.count > 1 else np.zeros_like(self.m2)

    def transform(self, x: np.ndarray, clip: float | None = None,
                  out: np.ndarray | None = None) -> np.ndarray:
        """Standardise ``x``; with ``clip``, bound the result to +-clip.

        ``out`` (float64, the shape of ``x``) takes the result without allocating;
        the clip is done as maximum then minimum, which is what ``np.clip`` computes
        (nan stays nan) with two plain ufunc calls instead of its Python wrapper.
        """
        if out is None:
            out = np.empty(np.shape(x), np.float64)
        np.subtract(x, self.mean, out=out)
        np.divide(out, self.std, out=out)
        if clip is not None:
            np.maximum(out, -clip, out=out)
            np.minimum(out, clip, out=out)
        return out.astype(self.dtype, copy=False)

    def transform_one(self, values: Sequence[float], clip: float) -> list[float]:
        """``transform`` of one sample given as plain floats (the per-message path)."""
        return [min(max((x - m) / s, -clip), clip)
                for x, m, s in zip(values, self.mean.tolist(), self.std.tolist())]

    def inverse(self, z: np.ndarray) -> np.ndarray:
        """Undo ``transform`` (used on the regression output)."""
        return np.asarray(z, np.float64) * self.std + self.mean

    def state(self) -> dict[str, np.ndarray]:
        return {"count": np.asarray(self.count), "mean": self.mean.copy(), "m2": self.m2.copy()}

    def load_state(self, arrays: dict[str, np.ndarray]) -> None:
        if arrays["mean"].shape != self.mean.shape:
            raise ValueError(f"scaler has {arrays['mean'].size} channels, expected {self.mean.size}")
        self.count = int(arrays["count"])
        self.mean = arrays["mean"].astype(np.float64)
        self.m2 = arrays["m2"].astype(np.float64)
        self._refresh_std()
