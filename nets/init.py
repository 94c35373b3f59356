"""Weight initialisation: Glorot (Glorot & Bengio 2010) and He (He et al. 2015)."""
from __future__ import annotations

import numpy as np

INIT_NAMES = ("auto", "glorot", "he")


def scheme_for(activation: str, init: str = "auto") -> str:
    """Pick He for rectifiers and Glorot for saturating units unless told otherwise."""
    if init not in INIT_NAMES:
        raise ValueError(f"unknown init {init!r}; choose one of {list(INIT_NAMES)}")
    if init != "auto":
        return init
    return "he" if activation in ("relu", "leaky_relu") else "glorot"


def init_weights(fan_in: int, fan_out: int, scheme: str, rng: np.random.Generator,
                 dtype: np.dtype) -> np.ndarray:
    """A (fan_in, fan_out) weight matrix drawn from the named scheme."""
    if scheme == "glorot":
        # Glorot uniform: U(-b, b), b = sqrt(6 / (fan_in + fan_out))
        bound = np.sqrt(6.0 / (fan_in + fan_out))
        w = rng.uniform(-bound, bound, size=(fan_in, fan_out))
    elif scheme == "he":
        # He normal: N(0, 2 / fan_in)
        w = rng.normal(0.0, np.sqrt(2.0 / fan_in), size=(fan_in, fan_out))
    else:
        raise ValueError(f"unknown init scheme {scheme!r}")
    return w.astype(dtype)
