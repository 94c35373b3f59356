"""Our forward pass and SGD steps against scikit-learn's MLPRegressor / MLPClassifier.

Reference: scikit-learn ``sklearn.neural_network`` (solver 'sgd'). Its regression loss is
half the mean squared error (gradient (p - y)/n), ours the full MSE (gradient 2(p - y)/n), so
its learning rate is twice ours; its binary log-loss gradient is p - y like ours, so the
rates are equal. momentum=0 makes its velocity -lr*g every step (nothing carried over) and
Nesterov then adds momentum*velocity = 0, so ``nesterovs_momentum`` cannot matter: both
settings are run. alpha=0 removes its L2 term; batch_size = the batch we hand it and
shuffle=False make one partial_fit call exactly one step on exactly our rows.
"""
from __future__ import annotations

import numpy as np
import pytest
from sklearn.neural_network import MLPClassifier, MLPRegressor

from nets import SGD, Loss, Network, train_step

HIDDEN = (7, 5)
N_IN = 4
LR = 0.05


def stream(head: str, batch: int, steps: int, seed: int = 11):
    """Inputs and targets for ``steps`` batches plus one batch used to initialise sklearn."""
    rng = np.random.default_rng(seed)
    x = rng.normal(0.0, 1.0, ((steps + 1) * batch, N_IN))
    if head == "binary":
        y = ((x[:, 0] * x[:, 1] + 0.3 * x[:, 2]) > 0).astype(np.int64)
    else:
        y = np.sin(x[:, 0] + x[:, 1]) + 0.5 * x[:, 2] * x[:, 3] + 0.1 * rng.normal(size=len(x))
    return x, y


def make_pair(head: str, activation: str, batch: int, nesterov: bool, x, y):
    """Our network and a scikit-learn estimator holding identical weights."""
    net = Network(N_IN, list(HIDDEN), activation, head=head, rng=np.random.default_rng(5))
    net.params += np.random.default_rng(6).normal(0.0, 0.05, net.params.size)  # non-zero biases
    common = dict(hidden_layer_sizes=HIDDEN, activation=activation, solver="sgd", momentum=0.0,
                  nesterovs_momentum=nesterov, alpha=0.0, batch_size=batch, shuffle=False,
                  learning_rate="constant", max_iter=1, random_state=0)
    if head == "binary":
        sk = MLPClassifier(learning_rate_init=LR, **common)
        sk.partial_fit(x[:batch], y[:batch], classes=[0, 1])
    else:
        sk = MLPRegressor(learning_rate_init=2 * LR, **common)
        sk.partial_fit(x[:batch], y[:batch])
    assert [c.shape for c in sk.coefs_] == [w.shape for w in net.weights]
    sk.coefs_ = [w.copy() for w in net.weights]
    sk.intercepts_ = [b.copy() for b in net.biases]
    return net, sk


def max_param_gap(net: Network, sk) -> float:
    gaps = [np.abs(w - c).max() for w, c in zip(net.weights, sk.coefs_)]
    gaps += [np.abs(b - i).max() for b, i in zip(net.biases, sk.intercepts_)]
    return float(max(gaps))


def run_steps(head: str, activation: str, batch: int, steps: int, nesterov: bool):
    x, y = stream(head, batch, steps)
    net, sk = make_pair(head, activation, batch, nesterov, x, y)
    start = net.params.copy()
    opt = SGD(net.params.size, LR)
    loss = Loss("logistic" if head == "binary" else "squared")
    gaps = []
    for s in range(1, steps + 1):
        xb, yb = x[s * batch:(s + 1) * batch], y[s * batch:(s + 1) * batch]
        sk.partial_fit(xb, yb)
        train_step(net, opt, xb, yb.reshape(-1, 1).astype(float), loss)
        gaps.append(max_param_gap(net, sk))
    moved = float(np.abs(net.params - start).max())
    return net, sk, gaps, moved


@pytest.mark.parametrize("head", ["regression", "binary"])
@pytest.mark.parametrize("activation", ["tanh", "relu"])
@pytest.mark.parametrize("batch", [1, 32])
@pytest.mark.parametrize("nesterov", [False, True])
def test_one_sgd_step_equals_sklearn_partial_fit(head, activation, batch, nesterov):
    net, sk, gaps, moved = run_steps(head, activation, batch, 1, nesterov)
    assert moved > 1e-4, "the step must actually change the weights"
    assert gaps[0] <= 1e-12


@pytest.mark.parametrize("head", ["regression", "binary"])
@pytest.mark.parametrize("activation", ["tanh", "relu"])
@pytest.mark.parametrize("batch", [1, 32])
def test_200_sgd_steps_stay_with_sklearn(head, activation, batch):
    net, sk, gaps, moved = run_steps(head, activation, batch, 200, nesterov=False)
    assert moved > 1e-2
    assert max(gaps) <= 1e-12, f"worst gap {max(gaps):.2e} at step {int(np.argmax(gaps)) + 1}"
    # and the trained models predict alike on fresh rows
    xt = np.random.default_rng(99).normal(size=(50, N_IN))
    if head == "binary":
        np.testing.assert_allclose(net.predict(xt)[:, 0], sk.predict_proba(xt)[:, 1],
                                   rtol=0, atol=1e-12)
    else:
        np.testing.assert_allclose(net.predict(xt)[:, 0], sk.predict(xt), rtol=0, atol=1e-12)


@pytest.mark.parametrize("activation", ["tanh", "relu", "identity", "logistic"])
def test_forward_matches_sklearn_predict(activation):
    # sklearn calls the sigmoid 'logistic'; our name is 'sigmoid'
    ours = "sigmoid" if activation == "logistic" else activation
    x, y = stream("regression", 16, 1)
    net = Network(N_IN, list(HIDDEN), ours, rng=np.random.default_rng(2))
    sk = MLPRegressor(hidden_layer_sizes=HIDDEN, activation=activation, solver="sgd",
                      batch_size=16, max_iter=1, random_state=0)
    sk.partial_fit(x[:16], y[:16])
    sk.coefs_ = [w.copy() for w in net.weights]
    sk.intercepts_ = [b.copy() + 0.1 for b in net.biases]
    for b in net.biases:
        b += 0.1
    np.testing.assert_allclose(net.predict(x)[:, 0], sk.predict(x), rtol=0, atol=1e-13)
