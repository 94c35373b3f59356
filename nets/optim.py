"""Optimisers over a flat parameter vector, with state kept as plain arrays.

The learning rate is a plain attribute: change it between steps and the
momentum / moment estimates carry on, which is what a live reload needs.
"""
from __future__ import annotations

import numpy as np


class SGD:
    """Stochastic gradient descent with optional (Nesterov) momentum.

    Update (momentum mu, learning rate lr, gradient g):
      v <- mu*v - lr*g;  p <- p + v             (classical momentum)
      v <- mu*v - lr*g;  p <- p + mu*v - lr*g   (Nesterov, in the form of Sutskever et al. 2013)
    """

    name = "sgd"

    def __init__(self, size: int, learning_rate: float, momentum: float = 0.0,
                 nesterov: bool = False, dtype: str | np.dtype = "float64") -> None:
        if not 0.0 <= momentum < 1.0:
            raise ValueError(f"momentum must be in [0, 1), got {momentum!r}")
        self.learning_rate = float(learning_rate)
        self.momentum = float(momentum)
        self.nesterov = bool(nesterov)
        self.velocity = np.zeros(size, dtype)
        self._tmp = np.zeros(size, dtype)
        self.steps = 0

    def __repr__(self) -> str:
        return f"SGD(lr={self.learning_rate}, momentum={self.momentum}, nesterov={self.nesterov})"

    def step(self, params: np.ndarray, grads: np.ndarray) -> None:
        """Apply one update to ``params`` in place."""
        self.steps += 1
        if self.momentum == 0.0:
            np.multiply(grads, self.learning_rate, out=self._tmp)
            params -= self._tmp
            return
        v = self.velocity
        v *= self.momentum
        np.multiply(grads, self.learning_rate, out=self._tmp)
        v -= self._tmp
        if self.nesterov:
            params -= self._tmp
            np.multiply(v, self.momentum, out=self._tmp)
            params += self._tmp
        else:
            params += v

    def state(self) -> dict[str, np.ndarray]:
        return {"velocity": self.velocity.copy(), "steps": np.asarray(self.steps),
                "learning_rate": np.asarray(self.learning_rate)}

    def load_state(self, arrays: dict[str, np.ndarray]) -> None:
        _load_like(self.velocity, arrays["velocity"], "velocity")
        self.steps = int(arrays["steps"])
        self.learning_rate = float(arrays["learning_rate"])


class Adam:
    """Adam (Kingma & Ba 2015, Algorithm 1), bias-corrected first and second moments.

    m <- b1*m + (1-b1)*g;  v <- b2*v + (1-b2)*g^2
    p <- p - lr * (m / (1-b1^t)) / (sqrt(v / (1-b2^t)) + eps)
    """

    name = "adam"

    def __init__(self, size: int, learning_rate: float, beta1: float = 0.9,
                 beta2: float = 0.999, eps: float = 1e-8, dtype: str | np.dtype = "float64") -> None:
        self.learning_rate = float(learning_rate)
        self.beta1, self.beta2, self.eps = float(beta1), float(beta2), float(eps)
        self.m = np.zeros(size, dtype)
        self.v = np.zeros(size, dtype)
        self._tmp = np.zeros(size, dtype)
        self.steps = 0

    def __repr__(self) -> str:
        return f"Adam(lr={self.learning_rate}, beta1={self.beta1}, beta2={self.beta2})"

    def step(self, params: np.ndarray, grads: np.ndarray) -> None:
        """Apply one update to ``params`` in place."""
        self.steps += 1
        t = self.steps
        b1, b2, tmp = self.beta1, self.beta2, self._tmp
        self.m *= b1
        np.multiply(grads, 1.0 - b1, out=tmp)
        self.m += tmp
        self.v *= b2
        np.multiply(grads, grads, out=tmp)
        tmp *= 1.0 - b2
        self.v += tmp
        m_scale = self.learning_rate / (1.0 - b1 ** t)
        np.divide(self.v, 1.0 - b2 ** t, out=tmp)
        np.sqrt(tmp, out=tmp)
        tmp += self.eps
        np.divide(self.m, tmp, out=tmp)
        tmp *= m_scale
        params -= tmp

    def state(self) -> dict[str, np.ndarray]:
        return {"m": self.m.copy(), "v": self.v.copy(), "steps": np.asarray(self.steps),
                "learning_rate": np.asarray(self.learning_rate)}

    def load_state(self, arrays: dict[str, np.ndarray]) -> None:
        _load_like(self.m, arrays["m"], "m")
        _load_like(self.v, arrays["v"], "v")
        self.steps = int(arrays["steps"])
        self.learning_rate = float(arrays["learning_rate"])


def _load_like(dest: np.ndarray, src: np.ndarray, name: str) -> None:
    if src.shape != dest.shape:
        raise ValueError(f"optimiser {name} has shape {src.shape}, expected {dest.shape}")
    dest[...] = src


def make_optimizer(name: str, size: int, learning_rate: float, momentum: float = 0.0,
                   nesterov: bool = False, dtype: str | np.dtype = "float64") -> SGD | Adam:
    """Build an optimiser by its config name."""
    if name == "sgd":
        return SGD(size, learning_rate, momentum, nesterov, dtype)
    if name == "adam":
        return Adam(size, learning_rate, dtype=dtype)
    raise ValueError(f"unknown optimizer {name!r}; choose 'sgd' or 'adam'")
