"""Losses on the network's raw output, each with its gradient scaled for a batch mean.

Conventions (per sample, summed over outputs, then averaged over the batch):
  squared   (z - y)^2                          -- no factor 1/2
  huber     r^2/2 if |r| <= delta else delta*(|r| - delta/2)   (Huber 1964)
  logistic  softplus(z) - y*z, z a logit, y in {0, 1}
``grad`` writes dL/dz (already divided by the batch size) into ``out``.
"""
from __future__ import annotations

import numpy as np

from .activations import sigmoid

LOSS_NAMES = ("squared", "huber", "logistic")


class Loss:
    """A named loss; ``delta`` is used by ``huber`` only."""

    def __init__(self, name: str, delta: float = 1.0) -> None:
        if name not in LOSS_NAMES:
            raise ValueError(f"unknown loss {name!r}; choose one of {list(LOSS_NAMES)}")
        if not delta > 0:
            raise ValueError(f"huber delta must be > 0, got {delta!r}")
        self.name = name
        self.delta = float(delta)

    def __repr__(self) -> str:
        return f"Loss({self.name!r}, delta={self.delta})" if self.name == "huber" else f"Loss({self.name!r})"

    def per_sample(self, z: np.ndarray, y: np.ndarray) -> np.ndarray:
        """Loss of each row, shape (batch,)."""
        if self.name == "squared":
            r = z - y
            return np.einsum("ij,ij->i", r, r)
        if self.name == "huber":
            a = np.abs(z - y)
            d = self.delta
            return np.where(a <= d, 0.5 * a * a, d * (a - 0.5 * d)).sum(axis=1)
        # softplus(z) - y z, written so neither exp nor log1p sees a large argument
        sp = np.maximum(z, 0.0) + np.log1p(np.exp(-np.abs(z)))
        return (sp - y * z).sum(axis=1)

    def value(self, z: np.ndarray, y: np.ndarray) -> float:
        """Batch-mean loss."""
        return float(self.per_sample(z, y).mean())

    def value_and_grad(self, z: np.ndarray, y: np.ndarray, out: np.ndarray) -> float:
        """Batch-mean loss, with dL/dz written into ``out``; the squared loss shares its residual."""
        if self.name != "squared":
            value = self.value(z, y)
            self.grad(z, y, out)
            return value
        np.subtract(z, y, out=out)
        flat = out.reshape(-1)
        value = float(np.dot(flat, flat)) / z.shape[0]
        out *= 2.0 / z.shape[0]
        return value

    def grad(self, z: np.ndarray, y: np.ndarray, out: np.ndarray) -> np.ndarray:
        """Write dL/dz of the batch-mean loss into ``out`` and return it."""
        scale = 1.0 / z.shape[0]
        if self.name == "squared":
            np.subtract(z, y, out=out)
            out *= 2.0 * scale
        elif self.name == "huber":
            np.subtract(z, y, out=out)
            np.clip(out, -self.delta, self.delta, out=out)
            out *= scale
        else:
            sigmoid(z, out=out)
            out -= y
            out *= scale
        return out
