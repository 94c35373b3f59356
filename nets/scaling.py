"""Running standardisation by Welford's algorithm, mergeable by Chan et al.'s rule.

Online learning sees each reading once and cannot pre-compute a mean and
spread; Welford's update is the numerically stable way to keep them. A channel
that has not varied yet (zero variance) is scaled by 1, not by 1/0.
"""
from __future__ import annotations

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
            self.count += 1
            d = x - self.mean
            self.mean += d / self.count
            self.m2 += d * (x - self.mean)
        else:
            n = x.shape[0]
            if n == 0:
                return
            self._merge(n, x.mean(axis=0), ((x - x.mean(axis=0)) ** 2).sum(axis=0))
        self._refresh_std()

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

    def transform(self, x: np.ndarray, clip: float | None = None) -> np.ndarray:
        """Standardise ``x``; with ``clip``, bound the result to +-clip."""
        z = (np.asarray(x, np.float64) - self.mean) / self.std
        if clip is not None:
            np.clip(z, -clip, clip, out=z)
        return z.astype(self.dtype, copy=False)

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
