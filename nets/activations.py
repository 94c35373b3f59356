"""Hidden-unit activations, applied in place, with derivatives taken from the output.

Every derivative here can be written in terms of the unit's *output* a = f(z),
so the forward pass need not keep z: that halves the buffers and the numpy
calls on the hot path. ``backprop(a, delta, tmp)`` multiplies ``delta`` in place
by f'(z) evaluated through a.
"""
from __future__ import annotations

from typing import Callable, NamedTuple

import numpy as np

LEAKY_SLOPE = 0.01   # common practice, no source: the usual default slope


class Activation(NamedTuple):
    forward: Callable[[np.ndarray], None]                            # z -> f(z), in place
    backprop: Callable[[np.ndarray, np.ndarray, np.ndarray], None]   # delta *= f'(z)


def _tanh(z: np.ndarray) -> None:
    np.tanh(z, out=z)


def _tanh_back(a: np.ndarray, delta: np.ndarray, tmp: np.ndarray) -> None:
    np.multiply(a, a, out=tmp)
    np.subtract(1.0, tmp, out=tmp)
    np.multiply(delta, tmp, out=delta)


def _relu(z: np.ndarray) -> None:
    np.maximum(z, 0.0, out=z)


def _relu_back(a: np.ndarray, delta: np.ndarray, tmp: np.ndarray) -> None:
    # f'(z) = 1 where a > 0; at z == 0 we take 0, as the usual subgradient
    np.greater(a, 0.0, out=tmp, casting="unsafe")
    np.multiply(delta, tmp, out=delta)


def _leaky(z: np.ndarray) -> None:
    np.maximum(z, z * LEAKY_SLOPE, out=z)


def _leaky_back(a: np.ndarray, delta: np.ndarray, tmp: np.ndarray) -> None:
    # a has the sign of z, so the slope is read off the output
    np.greater(a, 0.0, out=tmp, casting="unsafe")
    tmp *= 1.0 - LEAKY_SLOPE
    tmp += LEAKY_SLOPE
    np.multiply(delta, tmp, out=delta)


def _sigmoid(z: np.ndarray) -> None:
    sigmoid(z, out=z)


def _sigmoid_back(a: np.ndarray, delta: np.ndarray, tmp: np.ndarray) -> None:
    np.subtract(1.0, a, out=tmp)
    tmp *= a
    np.multiply(delta, tmp, out=delta)


def _identity(z: np.ndarray) -> None:
    return None


def _identity_back(a: np.ndarray, delta: np.ndarray, tmp: np.ndarray) -> None:
    return None


def sigmoid(z: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
    """Logistic function that never overflows, for any |z| (exp only of -|z|)."""
    z = np.asarray(z)
    e = np.exp(-np.abs(z))
    pos = z >= 0
    res = np.where(pos, 1.0, e) / (1.0 + e)
    res = res.astype(z.dtype if z.dtype.kind == "f" else np.float64, copy=False)
    if out is None:
        return res
    out[...] = res
    return out


ACTIVATIONS: dict[str, Activation] = {
    "tanh": Activation(_tanh, _tanh_back),
    "relu": Activation(_relu, _relu_back),
    "leaky_relu": Activation(_leaky, _leaky_back),
    "sigmoid": Activation(_sigmoid, _sigmoid_back),
    "identity": Activation(_identity, _identity_back),
}


def get_activation(name: str) -> Activation:
    """Look up an activation by its config name."""
    try:
        return ACTIVATIONS[name]
    except KeyError:
        raise ValueError(f"unknown activation {name!r}; choose one of {sorted(ACTIVATIONS)}") from None
