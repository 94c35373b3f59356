"""Change detectors for a stream of values in [0, 1]: Page-Hinkley (Page 1954) and ADWIN
(Bifet & Gavalda 2007). ``daemon.drift`` decides what stream they watch and what to do on alarm.
"""
from __future__ import annotations

import math
from typing import Iterator, Union

import numpy as np

ADWIN_BUCKETS = 5               # buckets per size class, "M" in Bifet & Gavalda 2007
ADWIN_CHECK_EVERY = 16          # samples between cut checks (pure-Python cost; see Adwin)
ADWIN_MIN_SIDE = 5              # fewest samples on either side of a cut (common practice, no source)


def _scalar(arrays: dict[str, np.ndarray], key: str) -> float:
    return float(np.asarray(arrays[key]))


def _arrays(**values: object) -> dict[str, np.ndarray]:
    return {k: np.asarray(v) for k, v in values.items()}


class PageHinkley:
    """Page-Hinkley test for an increase of the mean (Page 1954, Hinkley's cumulative form).

    m_t = sum_{i<=t} (x_i - mean_t - delta), alarm when m_t - min(0, m_1..m_t) > threshold,
    mean_t being the running mean up to and including x_t. Starts afresh after an alarm.
    """

    def __init__(self, delta: float = 0.005, threshold: float = 50.0, min_samples: int = 30) -> None:
        self.delta, self.threshold, self.min_samples = float(delta), float(threshold), int(min_samples)
        self.alarm_score = 0.0
        self.reset()

    def __repr__(self) -> str:
        return f"PageHinkley(delta={self.delta}, threshold={self.threshold}, n={self.n})"

    def reset(self) -> None:
        """Forget everything seen so far."""
        self.n, self.mean, self.cum, self.low = 0, 0.0, 0.0, 0.0

    @property
    def score(self) -> float:
        """Statistic over its alarm level (1.0 = alarm)."""
        return (self.cum - self.low) / self.threshold

    def update(self, x: float) -> bool:
        """Add one value; True on the sample that raises an alarm."""
        self.n += 1
        self.mean += (x - self.mean) / self.n
        self.cum += x - self.mean - self.delta
        self.low = min(self.low, self.cum)
        if self.n >= self.min_samples and self.cum - self.low > self.threshold:
            self.alarm_score = self.score
            self.reset()
            return True
        return False

    def state(self) -> dict[str, np.ndarray]:
        """Plain arrays for a checkpoint."""
        return _arrays(n=self.n, mean=self.mean, cum=self.cum, low=self.low)

    def load_state(self, arrays: dict[str, np.ndarray]) -> None:
        """Restore from ``state`` output."""
        self.n = int(arrays["n"])
        self.mean, self.cum, self.low = (_scalar(arrays, k) for k in ("mean", "cum", "low"))


class Adwin:
    """ADWIN2 adaptive window (Bifet & Gavalda 2007) over an exponential histogram.

    The window is kept as buckets of 1, 2, 4, ... samples, at most ``ADWIN_BUCKETS``
    per size, so memory and a full check cost O(log W). A cut between an older and
    a newer part is made when their means differ by more than

        eps = sqrt(2/m * var_W * ln(2/d)) + 2/(3m) * ln(2/d),  m = 1/(1/n0 + 1/n1),
        d = confidence / ln(W)

    (the paper's normal-approximation bound; d = delta/ln W is from memory of the same
    paper), dropping the oldest bucket until no cut remains. A check walks every bucket
    in pure Python (~20 us at W = 100,000, measured), ten times the rest of an update,
    so it runs every ``ADWIN_CHECK_EVERY`` samples: up to that many samples of extra
    delay. A cut with a *higher* newer part is an alarm, after which the window starts
    afresh (as Page-Hinkley does); a lower newer part just shrinks the window.
    """

    def __init__(self, confidence: float = 0.002, min_samples: int = 30,
                 check_every: int = ADWIN_CHECK_EVERY) -> None:
        self.confidence, self.min_samples = float(confidence), int(min_samples)
        self.check_every = int(check_every)
        self.alarm_score = 0.0
        self.reset()

    def __repr__(self) -> str:
        return f"Adwin(confidence={self.confidence}, width={self.width}, buckets={self.n_buckets})"

    def reset(self) -> None:
        """Empty the window."""
        self.sums: list[list[float]] = [[]]    # sums[level] oldest first; bucket size 2**level
        self.m2s: list[list[float]] = [[]]     # squared deviations about each bucket's mean
        self.width, self.total, self.m2 = 0, 0.0, 0.0
        self.tick, self._score = 0, 0.0

    @property
    def n_buckets(self) -> int:
        return sum(len(s) for s in self.sums)

    @property
    def score(self) -> float:
        """Largest (newer - older) mean gap over its cut bound at the last check (1.0 = alarm)."""
        return self._score

    def update(self, x: float) -> bool:
        """Add one value; True on the sample where an increase is found."""
        old_mean = self.total / self.width if self.width else x
        self.width += 1
        self.total += x
        self.m2 += (x - old_mean) * (x - self.total / self.width)   # Welford
        self.sums[0].append(x)
        self.m2s[0].append(0.0)
        self._compress()
        self.tick += 1
        if self.tick < self.check_every or self.width < self.min_samples:
            return False
        self.tick = 0
        return self._check()

    def _compress(self) -> None:
        level = 0
        while len(self.sums[level]) > ADWIN_BUCKETS:
            if level + 1 == len(self.sums):
                self.sums.append([])
                self.m2s.append([])
            s1, s2 = self.sums[level].pop(0), self.sums[level].pop(0)
            v1, v2 = self.m2s[level].pop(0), self.m2s[level].pop(0)
            n = float(1 << level)
            # Chan, Golub & LeVeque (1979): M2 of two equal-sized parts
            self.sums[level + 1].append(s1 + s2)
            self.m2s[level + 1].append(v1 + v2 + (s1 - s2) ** 2 / (2.0 * n))
            level += 1

    def _drop_oldest(self) -> None:
        top = len(self.sums) - 1
        s, v, n = self.sums[top].pop(0), self.m2s[top].pop(0), 1 << top
        rest = self.width - n
        if rest == 0:
            self.reset()
            return
        diff = s / n - (self.total - s) / rest
        self.m2 = max(self.m2 - v - diff * diff * n * rest / self.width, 0.0)
        self.total -= s
        self.width = rest
        while top > 0 and not self.sums[top]:
            self.sums.pop()
            self.m2s.pop()
            top -= 1

    def _check(self) -> bool:
        while True:
            best, cut = self._scan()
            if best > 1.0:
                self.alarm_score = best
                self.reset()
                return True
            if not cut:
                return False
            self._drop_oldest()

    def _oldest_first(self) -> Iterator[tuple[int, float]]:
        for level in range(len(self.sums) - 1, -1, -1):
            for s in self.sums[level]:
                yield 1 << level, s

    def _scan(self) -> tuple[float, bool]:
        """Largest (newer - older) mean gap over its bound, and whether any split is significant."""
        w, total = self.width, self.total
        best, cut = 0.0, False
        if w < 2 * ADWIN_MIN_SIDE:
            self._score = best
            return best, cut
        log_term = math.log(2.0 * math.log(w) / self.confidence)
        var = self.m2 / w
        n0, s0 = 0, 0.0
        for size, s in self._oldest_first():
            n0 += size
            s0 += s
            n1 = w - n0
            if n1 < ADWIN_MIN_SIDE:
                break
            if n0 < ADWIN_MIN_SIDE:
                continue
            gap = (total - s0) / n1 - s0 / n0
            m = 1.0 / (1.0 / n0 + 1.0 / n1)
            eps = math.sqrt(2.0 / m * var * log_term) + 2.0 / (3.0 * m) * log_term
            best = max(best, gap / eps)
            cut = cut or abs(gap) > eps
        self._score = best
        return best, cut

    def state(self) -> dict[str, np.ndarray]:
        """Plain arrays for a checkpoint: buckets oldest first with their size class."""
        order = range(len(self.sums) - 1, -1, -1)
        return {"levels": np.asarray([lv for lv in order for _ in self.sums[lv]], np.int64),
                "sums": np.asarray([s for lv in order for s in self.sums[lv]], np.float64),
                "m2s": np.asarray([v for lv in order for v in self.m2s[lv]], np.float64),
                **_arrays(width=self.width, total=self.total, m2=self.m2, tick=self.tick,
                          score=self._score)}

    def load_state(self, arrays: dict[str, np.ndarray]) -> None:
        """Restore from ``state`` output."""
        levels = np.asarray(arrays["levels"], np.int64)
        top = int(levels.max()) if levels.size else 0
        self.sums = [[] for _ in range(top + 1)]
        self.m2s = [[] for _ in range(top + 1)]
        for lv, s, v in zip(levels.tolist(), arrays["sums"].tolist(), arrays["m2s"].tolist()):
            self.sums[lv].append(s)
            self.m2s[lv].append(v)
        if sum(1 << lv for lv in levels.tolist()) != int(arrays["width"]):
            raise ValueError("ADWIN state: bucket sizes do not add up to the window width")
        self.width, self.tick = int(arrays["width"]), int(arrays["tick"])
        self.total, self.m2, self._score = (_scalar(arrays, k) for k in ("total", "m2", "score"))


class NoDetector:
    """Stands in when ``detector: none``: watches nothing, never alarms."""

    score = alarm_score = 0.0

    def update(self, x: float) -> bool:
        """Never alarms."""
        return False

    def reset(self) -> None:
        """Nothing to forget."""

    def state(self) -> dict[str, np.ndarray]:
        """Nothing to save."""
        return {}

    def load_state(self, arrays: dict[str, np.ndarray]) -> None:
        """Nothing to restore."""


Detector = Union[PageHinkley, Adwin, NoDetector]
