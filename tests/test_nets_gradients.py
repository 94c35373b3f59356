"""Backpropagation against central finite differences, and the losses at their edges.

External reference: the central difference (f(p+h) - f(p-h)) / 2h, whose error is
O(h^2) truncation plus O(eps*|f|/h) rounding -- about 1e-10 here, far below the
1e-6 relative tolerance.
"""
from __future__ import annotations

import itertools
import warnings

import numpy as np
import pytest
from scipy.special import expit
from sklearn.metrics import log_loss

from nets import Loss, Network, sigmoid

ACTS = ("tanh", "relu", "leaky_relu", "sigmoid", "identity")
LOSSES = ("squared", "huber", "logistic")
H = 1e-6
HUBER_DELTA = 0.5
KINK_MARGIN = 1e-3     # pre-activations / huber residuals kept this far from a kink


def reference_preactivations(net: Network, x: np.ndarray) -> list[np.ndarray]:
    """Hidden pre-activations computed independently of Network.forward."""
    fns = {"tanh": np.tanh, "relu": lambda z: np.maximum(z, 0.0),
           "leaky_relu": lambda z: np.where(z > 0, z, 0.01 * z),
           "sigmoid": expit, "identity": lambda z: z}
    zs, a = [], x
    for w, b in zip(net.weights[:-1], net.biases[:-1]):
        z = a @ w + b
        zs.append(z)
        a = fns[net.activation](z)
    return zs


def numeric_gradient(net: Network, x: np.ndarray, y: np.ndarray, loss: Loss) -> np.ndarray:
    """Central differences of the batch-mean loss, one parameter at a time."""
    g = np.empty_like(net.params)
    for i in range(net.params.size):
        keep = net.params[i]
        net.params[i] = keep + H
        up = loss.value(net.forward(x), y)
        net.params[i] = keep - H
        down = loss.value(net.forward(x), y)
        net.params[i] = keep
        g[i] = (up - down) / (2 * H)
    return g


def draw_case(activation: str, loss_name: str, depth: int, batch: int):
    """A small net and batch with every kink (relu at 0, huber at delta) safely avoided."""
    head = "binary" if loss_name == "logistic" else "regression"
    n_out = 1 if head == "binary" else 2
    for seed in range(50):
        rng = np.random.default_rng(1000 * depth + batch + seed)
        net = Network(3, [5] * depth, activation, head=head, n_outputs=n_out, rng=rng)
        net.params += rng.normal(0.0, 0.1, net.params.size)   # non-zero biases too
        x = rng.normal(0.0, 1.0, (batch, 3))
        if head == "binary":
            y = (rng.random((batch, 1)) < 0.5).astype(float)
        else:
            # residuals of order one keep the loss (and so the rounding error of the
            # central difference, ~eps*|f|/h) small beside the gradient
            y = net.forward(x) + rng.normal(0.0, 0.6, (batch, n_out))
        zs = reference_preactivations(net, x)
        far_from_kink = min(np.abs(z).min() for z in zs) > KINK_MARGIN
        # a batch of one can leave every rectifier off; insist on some live units per layer
        far_from_kink &= all((z > 0).any(axis=0).sum() >= 2 for z in zs)
        if loss_name == "huber":
            r = np.abs(net.forward(x) - y)
            far_from_kink &= np.abs(r - HUBER_DELTA).min() > KINK_MARGIN
        if far_from_kink:
            return net, x, y
    raise AssertionError("no kink-free draw found; widen the search")


@pytest.mark.parametrize("activation,loss_name,depth,batch",
                         list(itertools.product(ACTS, LOSSES, (1, 2, 3), (1, 32))))
def test_backprop_matches_central_differences(activation, loss_name, depth, batch):
    net, x, y = draw_case(activation, loss_name, depth, batch)
    loss = Loss(loss_name, delta=HUBER_DELTA)
    value = net.gradient(x, y, loss)
    analytic = net.grads.copy()
    assert value == pytest.approx(loss.value(net.forward(x), y), rel=1e-15)
    if loss_name == "huber" and batch > 1:
        r = np.abs(net.forward(x) - y)
        assert (r < HUBER_DELTA).any() and (r > HUBER_DELTA).any(), "both huber branches"
    numeric = numeric_gradient(net, x, y, loss)
    big = np.abs(analytic) > 1e-3
    assert big.sum() >= 5, "too few sizeable gradients to make the check meaningful"
    rel = np.abs(analytic - numeric)[big] / np.abs(analytic)[big]
    assert rel.max() < 1e-6, f"worst relative error {rel.max():.2e}"
    # small entries (dead relu units, tiny weights) must agree in absolute terms
    assert np.abs(analytic - numeric)[~big].max(initial=0.0) < 1e-8


def test_gradient_of_sum_over_outputs_and_batch_mean():
    """Doubling the batch by repeating it leaves the mean-loss gradient unchanged."""
    net, x, y = draw_case("tanh", "squared", 2, 32)
    loss = Loss("squared")
    net.gradient(x, y, loss)
    once = net.grads.copy()
    net.gradient(np.vstack([x, x]), np.vstack([y, y]), loss)
    np.testing.assert_allclose(net.grads, once, rtol=1e-12, atol=1e-15)


# --- losses -----------------------------------------------------------------------------

def strict_floats():
    """Overflow, invalid and divide-by-zero become errors. Underflow stays silent: exp(-800)
    rounding to 0 is the correctly rounded double result (numpy ignores it by default too)."""
    return np.errstate(over="raise", invalid="raise", divide="raise", under="ignore")


def test_logistic_loss_and_gradient_at_extreme_logits():
    z = np.array([[800.0], [-800.0], [800.0], [-800.0], [0.0]])
    y = np.array([[0.0], [1.0], [1.0], [0.0], [1.0]])
    loss = Loss("logistic")
    out = np.empty_like(z)
    with strict_floats(), warnings.catch_warnings():
        warnings.simplefilter("error")
        per = loss.per_sample(z, y)
        grad = loss.grad(z, y, out) * z.shape[0]
    # softplus(z) - y*z: a confident wrong logit costs |z|, a confident right one ~0
    np.testing.assert_array_equal(per[:4], [800.0, 800.0, 0.0, 0.0])
    assert per[4] == pytest.approx(np.log(2.0), rel=1e-15)
    np.testing.assert_array_equal(grad[:4, 0], [1.0, -1.0, 0.0, 0.0])
    assert grad[4, 0] == pytest.approx(-0.5, rel=1e-15)


def test_logistic_loss_matches_sklearn_log_loss():
    # reference: scikit-learn sklearn.metrics.log_loss on probabilities sigmoid(z)
    rng = np.random.default_rng(3)
    z = rng.normal(0.0, 3.0, (200, 1))
    y = (rng.random((200, 1)) < expit(z)).astype(float)
    ours = Loss("logistic").value(z, y)
    theirs = log_loss(y[:, 0], expit(z[:, 0]), labels=[0, 1])
    assert ours == pytest.approx(theirs, rel=1e-12)


def test_sigmoid_matches_scipy_expit_without_overflow():
    # reference: scipy.special.expit
    z = np.concatenate([np.linspace(-40, 40, 161), [-800.0, -710.0, 710.0, 800.0]])
    with strict_floats(), warnings.catch_warnings():
        warnings.simplefilter("error")
        ours = sigmoid(z)
    np.testing.assert_allclose(ours, expit(z), rtol=1e-15, atol=1e-300)  # denormals
    z32 = z.astype(np.float32)
    with strict_floats():
        assert sigmoid(z32).dtype == np.float32
    np.testing.assert_allclose(sigmoid(z32), expit(z32), rtol=1e-6, atol=0.0)


def test_huber_is_half_squared_inside_delta_and_linear_outside():
    # Huber (1964): rho(r) = r^2/2 for |r| <= delta, delta*(|r| - delta/2) beyond
    delta = 1.5
    huber, squared = Loss("huber", delta=delta), Loss("squared")
    y = np.zeros((7, 1))
    inside = np.array([[-1.49], [-1.0], [-0.3], [0.0], [0.2], [1.0], [1.49]])
    np.testing.assert_allclose(huber.per_sample(inside, y), squared.per_sample(inside, y) / 2,
                               rtol=1e-15)
    g_h, g_s = np.empty_like(inside), np.empty_like(inside)
    np.testing.assert_allclose(huber.grad(inside, y, g_h), squared.grad(inside, y, g_s) / 2,
                               rtol=1e-15)
    outside = np.array([[-10.0], [-1.6], [1.6], [4.0], [100.0], [-3.0], [2.0]])
    expected = delta * (np.abs(outside[:, 0]) - delta / 2)
    np.testing.assert_allclose(huber.per_sample(outside, y), expected, rtol=1e-15)
    # the gradient saturates at +-delta (per sample, before the batch mean)
    np.testing.assert_allclose(huber.grad(outside, y, g_h)[:, 0] * 7,
                               np.clip(outside[:, 0], -delta, delta), rtol=1e-15)


def test_unknown_names_are_refused_with_the_choices():
    with pytest.raises(ValueError, match="squared"):
        Loss("hinge")
    with pytest.raises(ValueError, match="delta"):
        Loss("huber", delta=0.0)
    with pytest.raises(ValueError, match="tanh"):
        Network(2, [3], activation="swish")
