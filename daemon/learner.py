"""One model's online learner: standardise, predict, then learn from the window.

Test-then-train (prequential): every target reading is first predicted with
the model as it stands, and only then added to the window and learned from,
so the published error is an honest out-of-sample error.

The window keeps *raw* (x, y); minibatches are standardised with the scalers
as they are at training time. Storing standardised rows would freeze old
scaling into the window while the scalers keep moving.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from nets import Loss, Network, RunningScaler, Window, make_optimizer, sigmoid, train_step
from nets.bundle import HasState, bundle_arrays, check_architecture, network_header, split_parts

from .settings import ModelSettings, TrainingSettings


# A standardised output this far from every target seen comes only from runaway weights:
# inputs are clipped to +-input_clip, so a sound network cannot reach it (common practice,
# no source). Such a prediction is never published; the guard restores the model at once.
MAX_OUTPUT_Z = 1000.0


class Diverged(Exception):
    """The model produced a non-finite or absurd number; the guard must restore it."""

    def __init__(self, message: str, reason: str = "non_finite") -> None:
        super().__init__(message)
        self.reason = reason


@dataclass
class Prediction:
    value: float           # in target units (regression) or probability of 1 (binary)
    z: float               # raw network output: standardised value or logit


@dataclass
class LearnResult:
    loss: float            # prequential loss of the prediction made before learning
    train_loss: float      # mean minibatch loss of the steps taken (nan if none)
    grad_norm: float       # gradient norm of the last step (nan if none)
    steps: int


class _Counters:
    """Plain counters saved with the model so a restart continues them."""

    def __init__(self) -> None:
        self.samples = 0
        self.steps = 0

    def state(self) -> dict[str, np.ndarray]:
        return {"samples": np.asarray(self.samples), "steps": np.asarray(self.steps)}

    def load_state(self, arrays: dict[str, np.ndarray]) -> None:
        self.samples = int(arrays["samples"])
        self.steps = int(arrays["steps"])


class ModelLearner:
    """Owns a model's network, optimiser, scalers and window; no I/O, no clock."""

    def __init__(self, settings: ModelSettings) -> None:
        self.settings = settings
        net_s, tr = settings.net, settings.training
        self.binary = settings.task == "binary"
        self.n_features = settings.n_features
        self.net = Network(self.n_features, net_s.hidden, net_s.activation,
                           head="binary" if self.binary else "regression",
                           rng=np.random.default_rng(net_s.seed), dtype=net_s.dtype, init=net_s.init)
        self.opt = make_optimizer(tr.optimizer, self.net.params.size, tr.learning_rate,
                                  tr.momentum, tr.nesterov, self.net.dtype)
        self.loss_fn = Loss(tr.loss, tr.huber_delta)
        self.x_scaler = RunningScaler(self.n_features)
        self.y_scaler = RunningScaler(1)
        self.window = Window(tr.window, self.n_features, 1, "float64")
        self.rng = np.random.default_rng([net_s.seed, 7])
        self.counters = _Counters()
        self.training = tr
        self.lr_multiplier = 1.0         # set by drift boosts and the guard
        self._boost_left = 0
        self._x1 = np.empty((1, self.n_features), self.net.dtype)
        self._y1 = np.empty((1, 1), self.net.dtype)
        self._batch: tuple[np.ndarray, np.ndarray] | None = None    # standardised minibatch

    def __repr__(self) -> str:
        return f"ModelLearner({self.settings.name!r}, {self.net.architecture}, samples={self.samples})"

    # -- reading -------------------------------------------------------------
    @property
    def samples(self) -> int:
        return self.counters.samples

    @property
    def warmed_up(self) -> bool:
        return self.counters.samples >= self.training.warmup_samples

    @property
    def learning_rate(self) -> float:
        """The learning rate in force (config value times any boost or guard cut)."""
        return self.opt.learning_rate

    # -- predict and learn ----------------------------------------------------
    def predict(self, x_raw: np.ndarray) -> Prediction:
        """Predict one sample from raw input features."""
        # one sample: plain floats beat numpy's per-call overhead, with the same arithmetic
        self._x1[0] = self.x_scaler.transform_one(x_raw.tolist(), self.training.input_clip)
        z = float(self.net.forward(self._x1)[0, 0])
        if not math.isfinite(z):
            raise Diverged(f"non-finite network output {z!r}")
        if abs(z) > MAX_OUTPUT_Z:
            raise Diverged(f"network output {z:.4g} is beyond +-{MAX_OUTPUT_Z:g} (standardised "
                           f"target units, or logit)", "output_range")
        if self.binary:
            return Prediction(float(sigmoid(np.asarray(z))), z)
        y = self.y_scaler
        return Prediction(z * float(y.std[0]) + float(y.mean[0]), z)

    def sample_loss(self, pred: Prediction, y: float) -> float:
        """Loss of one prediction, in standardised target units (or on the logit)."""
        y_std = y if self.binary else (y - float(self.y_scaler.mean[0])) / float(self.y_scaler.std[0])
        name = self.loss_fn.name
        if self.net.dtype == np.float64 and name != "logistic":
            # the float64 network's own arithmetic on one value, without six array calls
            r = pred.z - y_std
            if name == "squared":
                return r * r
            a, d = abs(r), self.loss_fn.delta
            return 0.5 * a * a if a <= d else d * (a - 0.5 * d)
        self._y1[0, 0] = y_std
        self._x1[0, 0] = pred.z
        return float(self.loss_fn.per_sample(self._x1[:, :1], self._y1)[0])

    def learn(self, x_raw: np.ndarray, y: float, pred: Prediction | None) -> LearnResult:
        """Add (x, y) to the window and take the configured SGD steps."""
        loss = self.sample_loss(pred, y) if pred is not None else float("nan")
        self.x_scaler.update_one(x_raw.tolist())
        if not self.binary:
            self.y_scaler.update_one((y,))
        self.window.add(x_raw, y)
        self.counters.samples += 1
        train_losses, norm, steps = 0.0, float("nan"), 0
        if self.warmed_up:
            for _ in range(self.training.steps_per_sample):
                value, norm = self._step()
                train_losses += value
                steps += 1
        self._count_down_boost()
        if steps and not (math.isfinite(train_losses) and math.isfinite(norm)):
            raise Diverged(f"non-finite training loss {train_losses!r} or gradient norm {norm!r}")
        return LearnResult(loss, train_losses / steps if steps else float("nan"), norm, steps)

    def _step(self) -> tuple[float, float]:
        tr = self.training
        xb, yb = self.window.sample(tr.batch_size, self.rng, tr.sampling)
        xs_buf, ys_buf = self._batch_buffers(xb.shape[0])
        xs = self.x_scaler.transform(xb, tr.input_clip, out=xs_buf).astype(self.net.dtype, copy=False)
        if self.binary:
            ys = yb
        else:
            ys = np.subtract(yb, self.y_scaler.mean, out=ys_buf)
            np.divide(ys, self.y_scaler.std, out=ys)
        ys = ys.astype(self.net.dtype, copy=False)
        self.counters.steps += 1
        return train_step(self.net, self.opt, xs, ys, self.loss_fn, tr.weight_decay, tr.clip_norm)

    def _batch_buffers(self, batch: int) -> tuple[np.ndarray, np.ndarray]:
        """Float64 scratch for one standardised minibatch, kept while the batch size holds."""
        buf = self._batch
        if buf is None or buf[0].shape[0] != batch:
            buf = self._batch = (np.empty((batch, self.n_features)), np.empty((batch, 1)))
        return buf

    def weights_finite(self) -> bool:
        """True while every parameter is a finite number."""
        return bool(np.isfinite(self.net.params).all())

    def weight_norm(self) -> float:
        return float(np.sqrt(np.dot(self.net.params, self.net.params)))

    # -- learning-rate control --------------------------------------------------
    def boost(self, factor: float, samples: int) -> None:
        """Multiply the learning rate by ``factor`` for the next ``samples`` samples."""
        self._boost_left = samples
        self._set_lr(self.training.learning_rate * self.lr_multiplier * factor)

    def _count_down_boost(self) -> None:
        if self._boost_left:
            self._boost_left -= 1
            if self._boost_left == 0:
                self._set_lr(self.training.learning_rate * self.lr_multiplier)

    def cut_learning_rate(self, factor: float) -> None:
        """Lasting cut after a divergence: multiply the standing multiplier."""
        self.lr_multiplier *= factor
        self._boost_left = 0
        self._set_lr(self.training.learning_rate * self.lr_multiplier)

    def _set_lr(self, lr: float) -> None:
        self.opt.learning_rate = float(lr)

    def apply_training(self, tr: TrainingSettings) -> None:
        """Take new hot-reloadable training settings; keeps weights and optimiser state."""
        if tr.window != self.window.capacity:
            self.window.resize(tr.window)
        self.loss_fn = Loss(tr.loss, tr.huber_delta)
        if hasattr(self.opt, "momentum"):
            self.opt.momentum = tr.momentum
            self.opt.nesterov = tr.nesterov
        rate_changed = tr.learning_rate != self.training.learning_rate
        self.training = tr
        if rate_changed:                  # an operator's new rate replaces any guard cut or boost
            self.lr_multiplier = 1.0
            self._boost_left = 0
            self._set_lr(tr.learning_rate)

    # -- persistence ------------------------------------------------------------
    def parts(self) -> dict[str, HasState]:
        return {"opt": self.opt, "xscale": self.x_scaler, "yscale": self.y_scaler,
                "window": self.window, "count": self.counters, "lr": _LrState(self)}

    def state_arrays(self) -> dict[str, np.ndarray]:
        """Every array needed to continue exactly where this learner stands."""
        arrays = bundle_arrays({"net": self.net, **self.parts()})
        arrays["rng/state"] = np.frombuffer(repr(self.rng.bit_generator.state).encode(), np.uint8)
        return arrays

    def header(self) -> dict:
        return network_header(self.net)

    def check_header(self, header: dict) -> None:
        """Raise StateFileError('shape') if a saved header does not fit this model."""
        check_architecture(header, self.net)

    def load_arrays(self, arrays: dict[str, np.ndarray]) -> dict[str, dict[str, np.ndarray]]:
        """Restore from ``state_arrays`` output; returns parts this class does not own."""
        grouped = split_parts(arrays)
        self.net.load_state(grouped.pop("net"))
        for name, obj in self.parts().items():
            obj.load_state(grouped.pop(name))
        rng_state = grouped.pop("rng", None)
        if rng_state is not None:
            self.rng.bit_generator.state = _parse_rng_state(rng_state["state"])
        return grouped


class _LrState:
    """Learning-rate multiplier and boost countdown, saved with the model."""

    def __init__(self, learner: ModelLearner) -> None:
        self.learner = learner

    def state(self) -> dict[str, np.ndarray]:
        return {"multiplier": np.asarray(self.learner.lr_multiplier),
                "boost_left": np.asarray(self.learner._boost_left),
                "base": np.asarray(self.learner.training.learning_rate)}

    def load_state(self, arrays: dict[str, np.ndarray]) -> None:
        """Keep the saved rate only if the configured base rate is unchanged since the save."""
        learner = self.learner
        learner.lr_multiplier = float(arrays["multiplier"])
        if float(arrays["base"]) == learner.training.learning_rate:
            learner._boost_left = int(arrays["boost_left"])
        else:
            learner._boost_left = 0
            learner._set_lr(learner.training.learning_rate * learner.lr_multiplier)


def _parse_rng_state(raw: np.ndarray) -> dict:
    """Read back the bit generator state saved as the text of a dict of ints and strings."""
    import ast
    return ast.literal_eval(raw.tobytes().decode())
