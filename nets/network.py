"""A small multilayer perceptron whose parameters live in one flat vector.

Weights and biases are views into ``params`` (and their gradients views into
``grads``), so an optimiser updates the whole network with one or two numpy
calls and a checkpoint is a single array. Buffers for each batch size are
allocated once and reused: at the sizes we run (tens of units) numpy's
per-call overhead, not arithmetic, is the cost, so every call saved counts.

Shapes: x (batch, n_inputs); weights[i] (fan_in, fan_out); output (batch, n_outputs).

In ``params`` a layer's bias follows its weights, so the two together are one
(fan_in + 1, fan_out) block, ``blocks[i]``. Inside the passes activations are kept one
column per sample with a row of ones under them: one matrix product with a block then does
the whole affine map, and one product gives the weight and bias gradients together. That
drops a bias add per layer forward and a bias sum per layer backward (about a fifth of a
32-32 tanh step at batch 32; measured in DEVELOPERS.md).
"""
from __future__ import annotations

from typing import Sequence

import numpy as np

from .activations import ACTIVATIONS, get_activation, sigmoid
from .init import init_weights, scheme_for
from .losses import Loss

HEADS = ("regression", "binary")
DTYPES = ("float64", "float32")


class _Buffers:
    """Per-batch-size scratch, one column per sample: activations, deltas, temporaries.

    ``acts[0]`` receives the input and ``acts[i]`` layer i's output, each with a last row of
    ones that stays ones: the bias row of the next block multiplies it.
    """

    def __init__(self, sizes: Sequence[int], batch: int, dtype: np.dtype) -> None:
        self.acts = [np.ones((n + 1, batch), dtype) for n in sizes]
        self.x_rows = self.acts[0][:-1]
        self.deltas = [np.empty((n, batch), dtype) for n in sizes[1:]]
        self.tmps = [np.empty((n, batch), dtype) for n in sizes[1:-1]]
        self.out = self.acts[-1][:-1].T          # (batch, n_outputs), what callers see
        self.out_delta = self.deltas[-1].T
        self.forward_plan: list[tuple] = []
        self.backward_plan: list[tuple] = []

    def plan(self, net: "Network") -> None:
        """Bind every array the passes touch once, so a step does no lookups or view creation."""
        n = len(net.blocks)
        self.forward_plan = [(net.blocks[i].T, self.acts[i], self.acts[i + 1][:-1], i < n - 1)
                             for i in range(n)]
        self.backward_plan = [
            (self.acts[i], net.grad_blocks[i], net.weights[i],
             None if i == 0 else self.deltas[i - 1],
             None if i == 0 else self.acts[i][:-1], None if i == 0 else self.tmps[i - 1])
            for i in range(n - 1, -1, -1)]


class Network:
    """Dense layers with one hidden activation and an identity (regression) or logit (binary) head."""

    def __init__(self, n_inputs: int, hidden: Sequence[int], activation: str = "tanh",
                 head: str = "regression", n_outputs: int = 1,
                 rng: np.random.Generator | None = None, dtype: str = "float64",
                 init: str = "auto") -> None:
        if head not in HEADS:
            raise ValueError(f"unknown head {head!r}; choose one of {list(HEADS)}")
        if dtype not in DTYPES:
            raise ValueError(f"unknown dtype {dtype!r}; choose one of {list(DTYPES)}")
        if n_inputs < 1 or n_outputs < 1 or any(int(h) < 1 for h in hidden):
            raise ValueError(f"layer sizes must be >= 1, got inputs={n_inputs} hidden={list(hidden)}")
        self.activation = activation
        self._act = get_activation(activation)
        self.head = head
        self.dtype = np.dtype(dtype)
        self.sizes = [int(n_inputs), *(int(h) for h in hidden), int(n_outputs)]
        self.params, self.grads = self._allocate()
        self.weights, self.biases = self._views(self.params)
        self.weight_grads, self.bias_grads = self._views(self.grads)
        self.blocks, self.grad_blocks = self._blocks(self.params), self._blocks(self.grads)
        self.decay_mask = self._weight_mask()
        self._buffers: dict[int, _Buffers] = {}
        scheme = scheme_for(activation, init)
        rng = rng if rng is not None else np.random.default_rng(0)
        for w in self.weights:
            w[...] = init_weights(w.shape[0], w.shape[1], scheme, rng, self.dtype)

    def __repr__(self) -> str:
        return f"Network({self.architecture}, {self.dtype.name}, {self.params.size} params)"

    @property
    def architecture(self) -> str:
        """Layer sizes, activation and head, e.g. ``8-32-32-1 tanh regression``."""
        return "-".join(map(str, self.sizes)) + f" {self.activation} {self.head}"

    @property
    def n_inputs(self) -> int:
        return self.sizes[0]

    def _allocate(self) -> tuple[np.ndarray, np.ndarray]:
        n = sum(a * b + b for a, b in zip(self.sizes[:-1], self.sizes[1:]))
        return np.zeros(n, self.dtype), np.zeros(n, self.dtype)

    def _views(self, flat: np.ndarray) -> tuple[list[np.ndarray], list[np.ndarray]]:
        """Weights (fan_in, fan_out) and biases (fan_out,) per layer: rows of ``_blocks``."""
        blocks = self._blocks(flat)
        return [b[:-1] for b in blocks], [b[-1] for b in blocks]

    def _blocks(self, flat: np.ndarray) -> list[np.ndarray]:
        """Each layer's weights with its bias as one more row: views into ``flat``."""
        blocks, at = [], 0
        for fan_in, fan_out in zip(self.sizes[:-1], self.sizes[1:]):
            blocks.append(flat[at:at + (fan_in + 1) * fan_out].reshape(fan_in + 1, fan_out))
            at += (fan_in + 1) * fan_out
        return blocks

    def _weight_mask(self) -> np.ndarray:
        """1 where ``params`` holds a weight, 0 for a bias: L2 decay skips biases."""
        mask = np.zeros_like(self.params)
        for w in self._views(mask)[0]:
            w[...] = 1.0
        return mask

    def _buf(self, batch: int) -> _Buffers:
        buf = self._buffers.get(batch)
        if buf is None:
            if len(self._buffers) > 8:      # odd batch sizes (window filling up) must not pile up
                self._buffers.clear()
            buf = self._buffers[batch] = _Buffers(self.sizes, batch, self.dtype)
            buf.plan(self)
        return buf

    def forward(self, x: np.ndarray) -> np.ndarray:
        """Raw output (identity or logit), shape (batch, n_outputs); a reused buffer: copy to keep."""
        buf = self._buf(x.shape[0])
        np.copyto(buf.x_rows, x.T)
        act = self._act.forward
        for block_t, a, out, hidden in buf.forward_plan:
            np.dot(block_t, a, out=out)
            if hidden:
                act(out)
        return buf.out

    def predict(self, x: np.ndarray) -> np.ndarray:
        """Prediction per row: the value (regression) or the probability of 1 (binary)."""
        z = self.forward(np.asarray(x, dtype=self.dtype).reshape(-1, self.sizes[0]))
        return sigmoid(z) if self.head == "binary" else z.copy()

    def gradient(self, x: np.ndarray, y: np.ndarray, loss: Loss) -> float:
        """Fill ``grads`` with d(batch-mean loss)/d(params) by backpropagation; return the loss."""
        z = self.forward(x)
        buf = self._buffers[x.shape[0]]
        value = loss.value_and_grad(z, y, out=buf.out_delta)
        delta = buf.deltas[-1]
        backprop = self._act.backprop
        for a_in, grad_block, w, prev, a_prev, tmp in buf.backward_plan:
            np.dot(a_in, delta.T, out=grad_block)        # weights and bias gradient at once
            if prev is not None:
                np.dot(w, delta, out=prev)
                backprop(a_prev, prev, tmp)
                delta = prev
        return value

    def state(self) -> dict[str, np.ndarray]:
        """Arrays that fully describe the network (architecture travels in the header)."""
        return {"params": self.params.copy(), "sizes": np.asarray(self.sizes, np.int64)}

    def load_state(self, arrays: dict[str, np.ndarray]) -> None:
        """Restore parameters saved by ``state``; refuses a different architecture."""
        sizes = [int(s) for s in arrays["sizes"]]
        if sizes != self.sizes:
            raise ValueError(f"saved layer sizes {sizes} differ from this network's {self.sizes}")
        self.params[...] = arrays["params"].astype(self.dtype, copy=False)


def activation_names() -> list[str]:
    """Names accepted for ``activation``."""
    return sorted(ACTIVATIONS)
