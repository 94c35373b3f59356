"""RunningScaler (Welford / Chan et al.) and the sample Window."""
from __future__ import annotations

import numpy as np
import pytest

from nets import RunningScaler, Window


def sensor_batch(n: int = 1000, seed: int = 0) -> np.ndarray:
    """Channels like a pump station's: a large offset, mixed spreads, one constant channel."""
    rng = np.random.default_rng(seed)
    return np.column_stack([1450.0 + 30.0 * rng.normal(size=n),     # speed, rpm
                            12.0 + 0.5 * rng.standard_t(3, size=n),  # flow, heavy tails
                            1e-3 * rng.random(n),                     # a tiny spread
                            np.full(n, 21.5)])                        # constant ambient


# --- RunningScaler ------------------------------------------------------------------------

def test_batch_update_matches_numpy_mean_and_population_variance():
    x = sensor_batch()
    s = RunningScaler(4)
    s.update(x)
    # reference: numpy's two-pass np.mean / np.var (ddof=0)
    np.testing.assert_allclose(s.mean, x.mean(axis=0), rtol=1e-14)
    np.testing.assert_allclose(s.variance, x.var(axis=0), rtol=1e-12, atol=1e-20)
    assert s.count == len(x)


def test_single_updates_batch_and_merged_halves_agree():
    # Welford (1962) one at a time vs Chan, Golub & LeVeque (1979) pairwise merge
    x = sensor_batch(777, seed=1)
    one = RunningScaler(4)
    for row in x:
        one.update(row)
    batch = RunningScaler(4)
    batch.update(x)
    left, right = RunningScaler(4), RunningScaler(4)
    left.update(x[:300])
    for row in x[300:]:
        right.update(row)
    left.merge(right)
    for other in (batch, left):
        assert other.count == one.count
        np.testing.assert_allclose(other.mean, one.mean, rtol=1e-12)
        np.testing.assert_allclose(other.variance, one.variance, rtol=1e-12, atol=1e-20)
    np.testing.assert_allclose(one.variance, x.var(axis=0), rtol=1e-12, atol=1e-20)


def test_transform_standardises_and_inverse_undoes_it():
    x = sensor_batch(500, seed=2)
    s = RunningScaler(4)
    s.update(x)
    z = s.transform(x)
    assert np.isfinite(z).all()
    np.testing.assert_allclose(z[:, :3].mean(axis=0), 0.0, atol=1e-10)
    np.testing.assert_allclose(z[:, :3].std(axis=0), 1.0, rtol=1e-10)
    np.testing.assert_allclose(s.inverse(z)[:, :3], x[:, :3], rtol=1e-12)
    # the constant channel: scaled by 1, not by 1/0, and restored exactly
    np.testing.assert_array_equal(z[:, 3], 0.0)
    np.testing.assert_array_equal(s.inverse(z)[:, 3], x[:, 3])


def test_constant_channel_one_at_a_time_stays_finite():
    s = RunningScaler(2)
    for k in range(50):
        s.update(np.array([3.3, float(k)]))
        z = s.transform(np.array([3.3, 1.0]))
        assert np.isfinite(z).all()
    assert z[0] == 0.0
    np.testing.assert_array_equal(s.inverse(s.transform(np.array([3.3, 7.0]))), [3.3, 7.0])


def test_before_two_samples_nothing_is_scaled():
    s = RunningScaler(2)
    np.testing.assert_array_equal(s.transform(np.array([5.0, -2.0])), [5.0, -2.0])
    s.update(np.array([1.0, 1.0]))
    np.testing.assert_array_equal(s.variance, [0.0, 0.0])
    np.testing.assert_array_equal(s.transform(np.array([5.0, -2.0])), [4.0, -3.0])


def test_clip_bounds_standardised_values():
    s = RunningScaler(1)
    s.update(np.array([[0.0], [1.0], [2.0]]))
    z = s.transform(np.array([[1e9], [-1e9], [1.5]]), clip=6.0)
    np.testing.assert_array_equal(z[:2, 0], [6.0, -6.0])
    assert z[2, 0] == pytest.approx(0.5 / np.sqrt(2 / 3))


def test_scaler_state_round_trip_and_errors():
    s = RunningScaler(4)
    s.update(sensor_batch(100))
    t = RunningScaler(4)
    t.load_state(s.state())
    x = sensor_batch(5, seed=9)
    np.testing.assert_array_equal(t.transform(x), s.transform(x))
    assert t.count == 100
    with pytest.raises(ValueError, match="channels"):
        RunningScaler(3).load_state(s.state())
    with pytest.raises(ValueError, match="merge"):
        RunningScaler(3).merge(s)


def test_float32_scaler_outputs_float32():
    s = RunningScaler(4, dtype="float32")
    s.update(sensor_batch(50))
    assert s.transform(sensor_batch(3)).dtype == np.float32


# --- Window -------------------------------------------------------------------------------

def filled(capacity: int, n: int) -> Window:
    """Sample k has x = (k, -k) and y = k + 1 (so an empty slot, y = 0, is recognisable)."""
    w = Window(capacity, 2, 1)
    for k in range(n):
        w.add(np.array([k, -k], float), k + 1.0)
    return w


def test_ring_overwrites_oldest_first():
    w = filled(4, 6)
    x, y = w.newest()
    np.testing.assert_array_equal(y[:, 0], [3, 4, 5, 6])      # samples 2..5, oldest first
    np.testing.assert_array_equal(x[:, 0], [2, 3, 4, 5])
    np.testing.assert_array_equal(w.newest(2)[1][:, 0], [5, 6])
    assert len(w) == 4 and w.newest(99)[1].shape == (4, 1)
    w.add_many(np.array([[10.0, 0], [11, 0], [12, 0], [13, 0], [14, 0]]), np.arange(5.0) + 20)
    np.testing.assert_array_equal(w.newest()[1][:, 0], [21, 22, 23, 24])


def test_add_many_equals_repeated_add():
    rng = np.random.default_rng(0)
    x, y = rng.normal(size=(11, 2)), rng.normal(size=11)
    a, b = Window(7, 2), Window(7, 2)
    a.add(x[0], y[0])
    b.add(x[0], y[0])
    for k in range(1, 11):
        a.add(x[k], y[k])
    b.add_many(x[1:5], y[1:5])
    b.add_many(x[5:], y[5:])
    for u, v in zip(a.newest(), b.newest()):
        np.testing.assert_array_equal(u, v)


def test_sampling_draws_only_filled_slots():
    rng = np.random.default_rng(1)
    w = filled(50, 7)
    for mode in ("uniform", "recent"):
        _, by = w.sample(4000, rng, mode=mode)
        assert set(np.unique(by[:, 0])) == {1, 2, 3, 4, 5, 6, 7}
    w = filled(5, 12)                     # wrapped: only samples 7..11 remain
    _, by = w.sample(2000, rng)
    assert set(np.unique(by[:, 0])) == {8, 9, 10, 11, 12}
    with pytest.raises(ValueError, match="empty"):
        Window(3, 2).sample(1, rng)


def test_sampled_rows_keep_x_and_y_together():
    w = filled(20, 33)
    bx, by = w.sample(500, np.random.default_rng(2), mode="recent")
    np.testing.assert_array_equal(bx[:, 0] + 1, by[:, 0])
    np.testing.assert_array_equal(bx[:, 1], -bx[:, 0])


def test_recent_mode_favours_new_samples_by_its_half_life():
    # documented weights: age k (0 = newest) drawn with probability proportional to
    # 2^(-k/half_life), k < size. With size 100 and half-life 25 (the default, size/4):
    # P(k < 25) = (1 - 2^-1)/(1 - 2^-4) = 0.5333, P(k < 50) = 0.75/0.9375 = 0.8,
    # and the single oldest sample gets 2^(-99/25)(1 - 2^(-1/25))/(1 - 2^-4) = 0.0011.
    w = filled(100, 100)
    rng = np.random.default_rng(3)
    n = 40_000
    age_recent = 100 - w.sample(n, rng, mode="recent")[1][:, 0]
    age_uniform = 100 - w.sample(n, rng, mode="uniform")[1][:, 0]
    # 4 standard errors of a proportion at n = 40k is at most 0.01
    assert np.mean(age_recent < 25) == pytest.approx(0.5333, abs=0.01)
    assert np.mean(age_recent < 50) == pytest.approx(0.8, abs=0.01)
    assert np.mean(age_recent == 99) < 0.003
    assert np.mean(age_uniform < 25) == pytest.approx(0.25, abs=0.01)
    assert np.mean(age_uniform < 50) == pytest.approx(0.50, abs=0.01)
    k = np.arange(100)
    weights = 2.0 ** (-k / 25.0)
    assert age_recent.mean() == pytest.approx(np.sum(k * weights) / weights.sum(), abs=0.5)
    ages = 100 - w.sample(n, rng, mode="recent", half_life=5.0)[1][:, 0]
    assert np.mean(ages < 5) == pytest.approx(0.50, abs=0.01)
    with pytest.raises(ValueError, match="uniform"):
        w.sample(1, rng, mode="oldest")


def test_uniform_mode_gives_every_filled_slot_the_same_chance():
    # 7 filled slots, 70,000 draws: each count is binomial(70k, 1/7), sd = 92.6; 5 sd = 463
    w = filled(50, 7)
    _, by = w.sample(70_000, np.random.default_rng(4), mode="uniform")
    counts = np.bincount(by[:, 0].astype(int), minlength=8)[1:]
    assert np.all(np.abs(counts - 10_000) < 463), counts


def test_resize_and_keep_newest():
    w = filled(8, 11)                     # holds samples 3..10 (y 4..11)
    w.resize(3)
    assert w.capacity == 3 and len(w) == 3
    np.testing.assert_array_equal(w.newest()[1][:, 0], [9, 10, 11])
    w.resize(6)
    w.add(np.array([50.0, -50.0]), 51.0)
    np.testing.assert_array_equal(w.newest()[1][:, 0], [9, 10, 11, 51])
    w.keep_newest(2)
    assert w.capacity == 6
    np.testing.assert_array_equal(w.newest()[1][:, 0], [11, 51])
    with pytest.raises(ValueError, match="capacity"):
        w.resize(0)


def test_window_state_round_trip():
    w = filled(10, 23)
    v = Window(10, 2, 1)
    v.load_state(w.state())
    for a, b in zip(w.newest(), v.newest()):
        np.testing.assert_array_equal(a, b)
    # same ages drawn from the same seed give the same rows, whatever the ring position
    for a, b in zip(w.sample(64, np.random.default_rng(4)), v.sample(64, np.random.default_rng(4))):
        np.testing.assert_array_equal(a, b)
    small = Window(4, 2, 1)
    small.load_state(w.state())
    np.testing.assert_array_equal(small.newest()[1][:, 0], [20, 21, 22, 23])
    with pytest.raises(ValueError, match="shape"):
        Window(10, 3, 1).load_state(w.state())
