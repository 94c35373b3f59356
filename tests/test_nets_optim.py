"""Optimiser updates recomputed from their published formulas, and train_step by hand.

Every reference below is written out in plain numpy in this file, straight from the paper,
and run side by side with the optimiser over several steps, with the learning rate changed
mid-run (the state must carry on, as a live reload needs).
"""
from __future__ import annotations

import numpy as np
import pytest

from nets import SGD, Adam, Loss, Network, make_optimizer, train_step

SIZE = 17
STEPS = 12
SWITCH = 6          # the learning rate changes before this step


def lr_at(step: int) -> float:
    return 0.1 if step < SWITCH else 0.03


def gradients(seed: int = 0) -> np.ndarray:
    return np.random.default_rng(seed).normal(0.0, 1.0, (STEPS, SIZE))


def test_plain_sgd_is_p_minus_lr_g():
    g = gradients()
    p0 = np.random.default_rng(1).normal(size=SIZE)
    opt, p, ref = SGD(SIZE, lr_at(0)), p0.copy(), p0.copy()
    for t in range(STEPS):
        opt.learning_rate = lr_at(t)
        opt.step(p, g[t])
        ref = ref - lr_at(t) * g[t]
    np.testing.assert_allclose(p, ref, rtol=1e-14, atol=1e-15)
    assert opt.steps == STEPS


def test_classical_momentum():
    # Polyak (1964), heavy ball, in the classical form: v <- mu*v - lr*g ; p <- p + v
    mu, g = 0.9, gradients(2)
    p0 = np.random.default_rng(3).normal(size=SIZE)
    opt, p = SGD(SIZE, lr_at(0), momentum=mu), p0.copy()
    ref_p, ref_v = p0.copy(), np.zeros(SIZE)
    for t in range(STEPS):
        opt.learning_rate = lr_at(t)
        opt.step(p, g[t])
        ref_v = mu * ref_v - lr_at(t) * g[t]
        ref_p = ref_p + ref_v
        np.testing.assert_allclose(p, ref_p, rtol=1e-13, atol=1e-14)
        np.testing.assert_allclose(opt.velocity, ref_v, rtol=1e-13, atol=1e-14)


def test_nesterov_follows_sutskever_2013_lookahead_form():
    """Sutskever, Martens, Dahl & Hinton (2013), eqs. 3-4:
        v_{t+1} = mu*v_t - lr*grad f(theta_t + mu*v_t);  theta_{t+1} = theta_t + v_{t+1}.
    An implementation that stores the look-ahead point Theta = theta + mu*v needs only
    grad f(Theta). We run the paper's form on a quadratic f(x) = x'Ax/2 - b'x and the
    optimiser on Theta, and check Theta_t == theta_t + mu*v_t at every step."""
    rng = np.random.default_rng(4)
    m = rng.normal(size=(SIZE, SIZE))
    a = m @ m.T / SIZE + np.eye(SIZE)
    b = rng.normal(size=SIZE)
    grad = lambda x: a @ x - b        # noqa: E731
    mu = 0.8
    theta, v = rng.normal(size=SIZE), np.zeros(SIZE)
    opt = SGD(SIZE, lr_at(0), momentum=mu, nesterov=True)
    big_theta = theta.copy()          # Theta_0 = theta_0 + mu*0
    big_theta_0 = theta.copy()
    for t in range(STEPS):
        lr = lr_at(t)
        opt.learning_rate = lr
        opt.step(big_theta, grad(big_theta))
        v = mu * v - lr * grad(theta + mu * v)
        theta = theta + v
        np.testing.assert_allclose(big_theta, theta + mu * v, rtol=1e-12, atol=1e-13)
        np.testing.assert_allclose(opt.velocity, v, rtol=1e-12, atol=1e-13)
    # and it descends towards the minimiser A^-1 b
    x_star = np.linalg.solve(a, b)
    assert np.linalg.norm(theta - x_star) < 0.5 * np.linalg.norm(big_theta_0 - x_star)


def test_adam_matches_kingma_ba_algorithm_1():
    # Kingma & Ba (2015), Algorithm 1: m_t, v_t, bias-corrected m^_t, v^_t, then
    # theta_t = theta_{t-1} - alpha * m^_t / (sqrt(v^_t) + eps)
    b1, b2, eps = 0.9, 0.999, 1e-8
    g = gradients(5) * np.linspace(0.01, 10.0, SIZE)     # mixed gradient scales
    p0 = np.random.default_rng(6).normal(size=SIZE)
    opt, p = Adam(SIZE, lr_at(0), beta1=b1, beta2=b2, eps=eps), p0.copy()
    ref_p, m, v = p0.copy(), np.zeros(SIZE), np.zeros(SIZE)
    for t in range(1, STEPS + 1):
        alpha = lr_at(t - 1)
        opt.learning_rate = alpha
        opt.step(p, g[t - 1])
        m = b1 * m + (1 - b1) * g[t - 1]
        v = b2 * v + (1 - b2) * g[t - 1] ** 2
        m_hat = m / (1 - b1 ** t)
        v_hat = v / (1 - b2 ** t)
        ref_p = ref_p - alpha * m_hat / (np.sqrt(v_hat) + eps)
        np.testing.assert_allclose(p, ref_p, rtol=1e-13, atol=1e-14)
        np.testing.assert_allclose(opt.m, m, rtol=1e-13, atol=1e-16)
        np.testing.assert_allclose(opt.v, v, rtol=1e-13, atol=1e-18)


def test_adam_first_step_has_size_lr_whatever_the_gradient_scale():
    # Kingma & Ba (2015), sec. 2.1: with bias correction the first step is about
    # alpha * sign(g), independent of the gradient's scale
    g = np.array([1e-4, -3.0, 250.0, -1e3, 0.5])
    opt, p = Adam(5, 0.01), np.zeros(5)
    opt.step(p, g)
    np.testing.assert_allclose(p, -0.01 * np.sign(g), rtol=1e-4)


def test_optimizer_state_round_trip_continues_identically():
    g = gradients(7)
    for make in (lambda: SGD(SIZE, 0.05, momentum=0.9, nesterov=True), lambda: Adam(SIZE, 0.01)):
        a, b = make(), make()
        pa = np.zeros(SIZE)
        for t in range(SWITCH):
            a.step(pa, g[t])
        a.learning_rate = 0.02
        b.load_state({k: v.copy() for k, v in a.state().items()})
        pb = pa.copy()
        for t in range(SWITCH, STEPS):
            a.step(pa, g[t])
            b.step(pb, g[t])
        np.testing.assert_array_equal(pa, pb)
        assert b.learning_rate == 0.02 and b.steps == STEPS


def test_make_optimizer_and_bad_settings():
    assert isinstance(make_optimizer("sgd", 3, 0.1, momentum=0.5), SGD)
    assert isinstance(make_optimizer("adam", 3, 0.1), Adam)
    with pytest.raises(ValueError, match="adam"):
        make_optimizer("rmsprop", 3, 0.1)
    with pytest.raises(ValueError, match="momentum"):
        SGD(3, 0.1, momentum=1.0)


# --- train_step: weight decay and global-norm clipping, by hand ------------------------

def by_hand(net: Network, x, y, loss, lr, weight_decay, clip_norm):
    """Expected params after one plain-SGD train_step, from the raw backprop gradient."""
    twin = Network(net.sizes[0], net.sizes[1:-1], net.activation, n_outputs=net.sizes[-1])
    twin.params[...] = net.params
    value = twin.gradient(x, y, loss)
    g = twin.grads.copy()
    # L2 decay on weights only: build the weight/bias mask from the layer sizes
    mask = np.concatenate([np.r_[np.ones(i * o), np.zeros(o)]
                           for i, o in zip(net.sizes[:-1], net.sizes[1:])])
    g = g + weight_decay * net.params * mask
    norm = np.sqrt(np.sum(g * g))
    if clip_norm is not None and norm > clip_norm:
        g = g * (clip_norm / norm)       # rescale the whole vector, direction kept
    return net.params - lr * g, value, norm


@pytest.mark.parametrize("weight_decay,clip_norm", [(0.0, None), (0.01, None), (0.0, 0.05),
                                                    (0.1, 0.05), (0.1, 1e6)])
def test_train_step_decay_and_clipping(weight_decay, clip_norm):
    rng = np.random.default_rng(8)
    net = Network(4, [6, 5], "tanh", rng=rng)
    net.params += rng.normal(0.0, 0.3, net.params.size)
    x, y = rng.normal(size=(16, 4)), rng.normal(size=(16, 1)) * 3
    loss, lr = Loss("squared"), 0.1
    expected, value, norm = by_hand(net, x, y, loss, lr, weight_decay, clip_norm)
    before = net.params.copy()
    got_value, got_norm = train_step(net, SGD(net.params.size, lr), x, y, loss,
                                     weight_decay=weight_decay, clip_norm=clip_norm)
    np.testing.assert_allclose(net.params, expected, rtol=1e-13, atol=1e-15)
    assert got_value == pytest.approx(value, rel=1e-15)
    assert got_norm == pytest.approx(norm, rel=1e-13)     # the norm before clipping
    applied = np.linalg.norm(net.params - before) / lr
    if clip_norm is not None and norm > clip_norm:
        assert applied == pytest.approx(clip_norm, rel=1e-12)
        assert norm > 10 * clip_norm, "the case must actually clip"
    else:
        assert applied == pytest.approx(norm, rel=1e-12)


def test_weight_decay_leaves_biases_alone():
    net = Network(3, [4], "identity", rng=np.random.default_rng(9))
    net.params[...] = 1.0
    x = np.zeros((2, 3))
    # zero inputs and targets equal to the output: the loss gradient on every weight is 0
    y = net.forward(x).copy()
    train_step(net, SGD(net.params.size, 0.5), x, y, Loss("squared"), weight_decay=0.2)
    for w, b in zip(net.weights, net.biases):
        np.testing.assert_allclose(w, 1.0 - 0.5 * 0.2, rtol=1e-15)
        np.testing.assert_array_equal(b, 1.0)
