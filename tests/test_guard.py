"""DivergenceGuard on hand-made loss streams: what trips it, what must not, and its state."""
from __future__ import annotations

import math

import numpy as np
import pytest

from daemon.guard import MIN_SEEN, DivergenceGuard
from daemon.settings import GuardSettings

K, N = 10.0, 20


def settled(seed: int = 0, samples: int = 400,
            **overrides: bool) -> tuple[DivergenceGuard, np.random.Generator]:
    """A guard that has seen ``samples`` ordinary losses: squared N(0, 0.3) residuals."""
    guard = DivergenceGuard(GuardSettings(blowup_factor=K, blowup_samples=N, **overrides))
    rng = np.random.default_rng(seed)
    for loss in (0.3 * rng.standard_normal(samples)) ** 2:
        assert guard.observe(float(loss)) is None
    return guard, rng


@pytest.mark.parametrize("bad", [math.nan, math.inf, -math.inf])
def test_non_finite_loss_trips_at_once_and_leaves_the_levels_alone(bad: float) -> None:
    guard, _ = settled()
    levels = (guard.short, guard.long, guard.seen)
    assert guard.observe(bad) == "non_finite"
    assert (guard.short, guard.long, guard.seen) == levels


def test_non_finite_trips_even_when_blowup_checks_are_off_or_young() -> None:
    off, _ = settled(enabled=False)
    assert off.observe(math.nan) == "non_finite"
    young = DivergenceGuard(GuardSettings())
    assert young.observe(math.inf) == "non_finite"


def test_sustained_blowup_trips_on_exactly_the_nth_sample() -> None:
    guard, _ = settled()
    bar = guard.bar
    assert bar == pytest.approx(K * guard.long)
    results = [guard.observe(bar * 1.01) for _ in range(N)]
    assert results == [None] * (N - 1) + ["loss_blowup"]
    assert guard.run == 0                       # counting starts over after a trip


def test_growing_loss_of_a_diverging_model_trips() -> None:
    guard, _ = settled()
    loss, results = guard.long, []
    for _ in range(60):
        loss *= 1.5                             # SGD past its stable rate: geometric growth
        results.append(guard.observe(loss))
    assert "loss_blowup" in results


def test_spikes_shorter_than_n_never_trip_however_large() -> None:
    guard, rng = settled()
    for burst in (1, 5, N - 1):
        for _ in range(burst):
            assert guard.observe(1e12) is None  # a transmitter glitch, not a diverging model
        assert guard.observe(float((0.3 * rng.standard_normal()) ** 2)) is None
        assert guard.run == 0


def test_run_is_broken_by_a_single_ordinary_sample() -> None:
    guard, _ = settled()
    high, ordinary = guard.bar * 2, guard.long
    for _ in range(3):
        for _ in range(N - 1):
            assert guard.observe(high) is None
        assert guard.observe(ordinary) is None


def test_long_level_does_not_learn_from_blowup_samples() -> None:
    guard, _ = settled()
    long_before = guard.long
    for _ in range(N - 1):
        guard.observe(guard.bar * 3)
    assert guard.long == long_before            # the bar did not rise with the blow-up
    assert guard.short > long_before            # while the short level shows it
    guard.observe(long_before * 2)              # an ordinary (under-bar) sample is learned from
    assert guard.long > long_before


def test_long_level_is_a_plain_mean_until_its_time_constant() -> None:
    guard = DivergenceGuard(GuardSettings())
    losses = [4.0, 0.1, 0.2, 0.3]
    for loss in losses:
        guard.observe(loss)
    # bias-free start: the first loss (often the worst) weighs no more than the others
    assert guard.long == pytest.approx(np.mean(losses))
    assert guard.short == pytest.approx(np.mean(losses))


def test_no_blowup_trip_before_the_long_level_means_anything() -> None:
    young = DivergenceGuard(GuardSettings(blowup_factor=K, blowup_samples=N))
    old, _ = settled()
    ramp = [0.01] * (MIN_SEEN // 2) + [1e6] * (MIN_SEEN // 2)   # a fresh model's first losses
    assert [young.observe(x) for x in ramp] == [None] * MIN_SEEN
    assert "loss_blowup" in [old.observe(x) for x in ramp]      # the same stream, later on


def test_disabled_guard_never_reports_a_blowup() -> None:
    guard, _ = settled(enabled=False)
    assert all(guard.observe(1e9) is None for _ in range(5 * N))


def test_after_restore_the_run_starts_over_from_the_long_level() -> None:
    guard, _ = settled()
    for _ in range(N - 1):
        guard.observe(guard.bar * 2)
    guard.after_restore()
    assert guard.run == 0 and guard.short == guard.long
    assert [guard.observe(guard.bar * 2) for _ in range(N - 1)] == [None] * (N - 1)


def test_restart_forgets_the_normal_level() -> None:
    guard, _ = settled()
    guard.restart()
    assert (guard.short, guard.long, guard.seen, guard.run) == (0.0, 0.0, 0, 0)
    guard.observe(5.0)
    assert guard.long == 5.0


def test_state_round_trip_continues_identically() -> None:
    guard, rng = settled(seed=3)
    for _ in range(7):
        guard.observe(guard.bar * 2)            # save mid-run: the run count must survive
    arrays = guard.state()
    assert all(isinstance(a, np.ndarray) and a.dtype.kind in "fiu" for a in arrays.values())
    copy = DivergenceGuard(GuardSettings(blowup_factor=K, blowup_samples=N))
    copy.load_state({k: np.array(v) for k, v in arrays.items()})
    assert repr(copy) == repr(guard)
    tail = [guard.bar * 2] * (N - 7) + list((0.3 * rng.standard_normal(50)) ** 2)
    assert [copy.observe(float(x)) for x in tail] == [guard.observe(float(x)) for x in tail]
    assert (copy.short, copy.long, copy.seen, copy.run, copy.under) == \
        (guard.short, guard.long, guard.seen, guard.run, guard.under)
    assert copy.observe(guard.bar * 2) == guard.observe(guard.bar * 2)


def test_state_from_before_the_under_count_still_loads() -> None:
    old = {"levels": np.asarray([0.2, 0.1]), "counts": np.asarray([500, 3])}
    guard = DivergenceGuard(GuardSettings())
    guard.load_state(old)
    assert (guard.short, guard.long, guard.seen, guard.run, guard.under) == (0.2, 0.1, 500, 3, 500)


def test_calm_turns_false_during_a_run_and_after_a_glitch_until_the_short_level_settles() -> None:
    guard, rng = settled()
    assert guard.calm
    guard.observe(guard.bar * 1.5)                    # first sample of a possible run
    assert guard.run == 1 and not guard.calm
    guard.observe(float((0.3 * rng.standard_normal()) ** 2))
    assert guard.run == 0                             # an ordinary sample breaks the run
    glitch = guard.bar * 1000.0                       # one wild reading: short jumps over the bar
    guard.observe(glitch)
    guard.observe(float((0.3 * rng.standard_normal()) ** 2))
    assert guard.run == 0 and guard.short > guard.bar and not guard.calm
    for loss in (0.3 * rng.standard_normal(200)) ** 2:
        guard.observe(float(loss))
    assert guard.calm                                  # the average decays back under the bar


def test_a_young_guard_is_calm_its_bar_means_nothing_yet() -> None:
    guard = DivergenceGuard(GuardSettings(blowup_factor=K, blowup_samples=N))
    for _ in range(MIN_SEEN):
        guard.observe(1e6)
    assert guard.calm and guard.run == 0
