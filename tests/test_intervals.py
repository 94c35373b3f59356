"""Prediction intervals: conformal quantile, adaptive conformal inference, state."""
from __future__ import annotations

import io
import math
from dataclasses import replace

import numpy as np
import pytest

from daemon.intervals import MIN_RESIDUALS, WIDE_MARGIN, ConformalInterval
from daemon.settings import IntervalSettings
from nets.store import read_state, write_state

T = 20_000


def run(settings: IntervalSettings, residuals: np.ndarray) -> ConformalInterval:
    ci = ConformalInterval(settings)
    for r in residuals.tolist():
        ci.update(r, 0.0)            # predicted 0, measured = residual
    return ci


def wear_cycles(rng: np.random.Generator) -> np.ndarray:
    """Bearing-wear-like noise: its spread doubles every 1000 samples, reset by a repair every 4000."""
    return rng.standard_normal(T) * 2.0 ** ((np.arange(T) % 4000) / 1000)


def transmitter_drift(rng: np.random.Generator) -> np.ndarray:
    """A bias creeping up 0.002 noise spreads per sample that the model does not follow."""
    return rng.standard_normal(T) + 0.002 * np.arange(T)


def test_quantile_is_the_split_conformal_rank():
    # split conformal (Lei, G'Sell, Rinaldo, Tibshirani & Wasserman 2018): the k-th smallest
    # score, k = ceil((n+1)(1-alpha)); numpy's "inverted_cdf" quantile (Hyndman & Fan 1996,
    # type 1) at level k/n is that order statistic
    rng = np.random.default_rng(1)
    for n, coverage in ((20, 0.9), (137, 0.8), (500, 0.95)):
        ci = ConformalInterval(IntervalSettings(coverage=coverage, window=n, adapt_rate=0.0))
        scores = np.abs(rng.standard_normal(n))
        for s in scores.tolist():
            ci.update(s, 0.0)
        want = np.quantile(scores, math.ceil((n + 1) * coverage) / n, method="inverted_cdf")
        assert ci.half_width() == want
        assert ci.bounds(10.0) == (10.0 - want, 10.0 + want)


def test_no_band_until_enough_residuals():
    ci = ConformalInterval(IntervalSettings())
    for i in range(MIN_RESIDUALS - 1):
        assert ci.bounds(1.0) is None
        assert ci.update(1.0 + i, 1.0) is False
    ci.update(0.5, 1.0)
    assert ci.bounds(1.0) is not None
    assert math.isnan(ConformalInterval(IntervalSettings()).coverage)


def test_update_scores_against_the_band_given_before():
    ci = run(IntervalSettings(adapt_rate=0.0), np.abs(np.random.default_rng(2).standard_normal(300)))
    low, high = ci.bounds(5.0)
    assert ci.update(high + 1e-6, 5.0) is True
    low, high = ci.bounds(5.0)
    assert ci.update(low + 1e-6, 5.0) is False


@pytest.mark.parametrize("gamma", [0.0, 0.005])
def test_stationary_coverage_within_two_points(gamma):
    ci = run(replace(IntervalSettings(), adapt_rate=gamma), np.random.default_rng(3).standard_normal(T))
    assert abs(ci.coverage - 0.9) <= 0.02, ci.coverage


@pytest.mark.parametrize("stream", [wear_cycles, transmitter_drift])
def test_drifting_coverage_held_by_the_conformal_correction(stream):
    residuals = stream(np.random.default_rng(4))
    plain = run(replace(IntervalSettings(), adapt_rate=0.0), residuals)
    aci = run(IntervalSettings(), residuals)
    assert plain.coverage < 0.87, plain.coverage          # the lagging quantile misses by > 3 points
    assert abs(aci.coverage - 0.9) <= 0.03, aci.coverage
    # Gibbs & Candes 2021, Proposition 4.1: |miss rate - alpha| <= (max(a1, 1 - a1) + gamma) / (gamma T)
    gamma, alpha = aci.settings.adapt_rate, 0.1
    assert abs((1 - aci.coverage) - alpha) <= (max(alpha, 1 - alpha) + gamma) / (gamma * aci.scored)


def test_extreme_levels_give_finite_bands():
    ci = run(IntervalSettings(), np.abs(np.random.default_rng(5).standard_normal(100)))
    biggest = ci.newest().max()
    ci.alpha_t = -0.004                  # level above n/(n+1): the paper's band is the whole line
    ci.update(0.0, 0.0)
    assert ci.half_width() == pytest.approx(WIDE_MARGIN * biggest)
    ci.alpha_t = 1.004                   # level below 0: a point band
    ci.update(0.0, 0.0)
    assert ci.half_width() == 0.0


def test_alpha_stays_in_the_papers_range():
    # exact zeros are always "inside" a zero-width band; alpha_t must not climb without bound
    s = IntervalSettings()
    ci = run(s, np.zeros(5000))
    assert ci.alpha_t <= 1 + s.adapt_rate
    ci = run(replace(s, adapt_rate=0.5), np.r_[np.ones(100), 10.0 ** np.arange(1, 40)])
    assert ci.alpha_t >= -0.5


def test_non_finite_readings_are_ignored():
    ci = run(IntervalSettings(), np.ones(50))
    assert ci.update(float("nan"), 0.0) is False
    assert ci.size == 50 and ci.scored == 30


def test_state_round_trip_reproduces_identical_outputs():
    s = IntervalSettings()
    residuals = wear_cycles(np.random.default_rng(6))[:3000]
    a = run(s, residuals[:1500])
    buf = io.BytesIO()                                  # through the real state-file format
    write_state(buf, a.state(), {})
    buf.seek(0)
    b = ConformalInterval(s)
    b.load_state(read_state(buf)[0])
    for r in residuals[1500:].tolist():
        assert (a.bounds(3.0), a.update(r, 3.0)) == (b.bounds(3.0), b.update(r, 3.0))
    assert a.coverage == b.coverage and a.alpha_t == b.alpha_t


def test_load_state_refuses_bad_residuals():
    state = run(IntervalSettings(), np.ones(50)).state()
    state["residuals"][3] = -1.0
    with pytest.raises(ValueError, match="negative or non-finite residuals"):
        ConformalInterval(IntervalSettings()).load_state(state)


def test_apply_settings_keeps_residuals_and_correction():
    ci = run(IntervalSettings(), wear_cycles(np.random.default_rng(7))[:3000])
    newest, alpha_t = ci.newest(), ci.alpha_t
    ci.apply_settings(IntervalSettings(window=200))
    np.testing.assert_array_equal(ci.newest(), newest[-200:])
    assert ci.alpha_t == alpha_t and ci.scored > 0
    ci.apply_settings(IntervalSettings(window=200, coverage=0.95))
    assert ci.alpha_t == pytest.approx(alpha_t - 0.05)
    assert ci.scored == 0 and math.isnan(ci.coverage)     # coverage against the old target dropped
    ci.update(0.0, 0.0)
    assert ci.coverage == 1.0
