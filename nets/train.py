"""One training step: gradient, L2 weight decay, global-norm clipping, update."""
from __future__ import annotations

import math

import numpy as np

from .losses import Loss
from .network import Network
from .optim import SGD, Adam


def train_step(net: Network, opt: SGD | Adam, x: np.ndarray, y: np.ndarray, loss: Loss,
               weight_decay: float = 0.0, clip_norm: float | None = None) -> tuple[float, float]:
    """Take one step on the batch (x, y); return (batch loss before the step, gradient norm).

    Weight decay adds ``weight_decay * w`` to each weight's gradient (biases are
    not decayed). Clipping rescales the whole gradient when its L2 norm exceeds
    ``clip_norm``; the returned norm is the one before clipping.
    """
    value = net.gradient(x, y, loss)
    g = net.grads
    if weight_decay:
        g += weight_decay * net.params * net.decay_mask
    norm = math.sqrt(float(np.dot(g, g)))
    if clip_norm is not None and norm > clip_norm:
        g *= clip_norm / norm
    opt.step(net.params, g)
    return value, norm
