"""The learner's one-pass predict-publish-learn against the separate steps it stands for.

``predict_and_learn`` takes the prediction from the first training step's forward pass. It
must publish what ``predict`` would have published, before any learning from the sample,
and leave the model where ``predict`` then ``learn`` leave it. The stream is scikit-learn's
Friedman #1 benchmark function (``make_friedman1``), its binary form split at the median.
"""
from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from sklearn.datasets import make_friedman1

from daemon.learner import Diverged, ModelLearner
from daemon.settings import (InputSettings, ModelSettings, NetSettings, SourceSettings,
                             TrainingSettings)

CASES = {
    "sgd squared": ({}, {}, "regression"),
    "adam huber, decay, clip, recent": (
        {"optimizer": "adam", "learning_rate": 0.003, "loss": "huber", "weight_decay": 1e-4,
         "clip_norm": 0.5, "sampling": "recent"}, {}, "regression"),
    "three steps per sample, momentum": ({"steps_per_sample": 3, "momentum": 0.9}, {}, "regression"),
    "binary logistic": ({"loss": "logistic"}, {}, "binary"),
    "float32 relu": ({}, {"dtype": "float32", "activation": "relu"}, "regression"),
}


def _settings(training: dict, net: dict, task: str) -> ModelSettings:
    return ModelSettings(
        name="m1", target=SourceSettings("site/p1/t"), task=task,
        inputs=tuple(InputSettings(f"x{i}", f"site/p1/x{i}") for i in range(5)),
        net=dataclasses.replace(NetSettings(), hidden=(16, 8), **net),
        training=dataclasses.replace(TrainingSettings(), warmup_samples=40, batch_size=16, **training))


def _stream(task: str, n: int = 600):
    x, y = make_friedman1(n_samples=n, n_features=5, noise=0.5, random_state=3)
    if task == "binary":
        y = (y > np.median(y)).astype(float)
    return x, y


@pytest.mark.parametrize("case", CASES)
def test_one_pass_publishes_and_learns_what_the_separate_steps_do(case):
    training, net, task = CASES[case]
    settings = _settings(training, net, task)
    one_pass, separate = ModelLearner(settings), ModelLearner(settings)
    published: list = []
    x, y = _stream(task)
    tol = 1e-5 if net.get("dtype") == "float32" else 1e-9
    for xi, yi in zip(x, float_list(y)):
        before = one_pass.net.params.copy()
        pred, result = one_pass.predict_and_learn(xi, yi, lambda p: published.append(
            (p, np.array_equal(one_pass.net.params, before), one_pass.counters.steps,
             one_pass.counters.samples)))
        expected = separate.predict(xi) if separate.warmed_up else None
        reference = separate.learn(xi, yi, expected)
        if expected is None:
            assert pred is None and not published
        else:
            (got, unchanged, steps_then, samples_then), = published
            published.clear()
            assert got is pred and unchanged, "published after learning had begun"
            assert steps_then == separate.counters.steps - reference.steps
            assert samples_then == separate.counters.samples - 1     # what the message says
            assert pred.value == pytest.approx(expected.value, rel=tol, abs=tol)
            assert result.loss == pytest.approx(reference.loss, rel=tol, abs=tol)
        assert result.steps == reference.steps
        assert result.train_loss == pytest.approx(reference.train_loss, rel=tol, abs=tol, nan_ok=True)
    assert one_pass.counters.samples == separate.counters.samples == len(y)
    assert one_pass.counters.steps == separate.counters.steps
    assert one_pass.rng.bit_generator.state == separate.rng.bit_generator.state
    assert np.allclose(one_pass.net.params, separate.net.params, rtol=100 * tol, atol=100 * tol)
    assert np.array_equal(one_pass.window.newest()[0], separate.window.newest()[0])


def float_list(y: np.ndarray) -> list[float]:
    return [float(v) for v in y]


def test_a_diverged_network_publishes_nothing():
    learner = ModelLearner(_settings({}, {}, "regression"))
    x, y = _stream("regression", 80)
    for xi, yi in zip(x, float_list(y)):
        learner.predict_and_learn(xi, yi, lambda p: None)
    learner.net.params[:] = np.nan
    published: list = []
    with pytest.raises(Diverged, match="non-finite network output"):
        learner.predict_and_learn(x[0], float(y[0]), published.append)
    assert published == []
