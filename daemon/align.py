"""As-of feature assembly: what each input read at the moment the target was measured.

Inputs and targets arrive on their own clocks and cadences. A training sample
pairs a target reading at time t with each input *as of* t (its newest reading
at or before t, never a later one, so no look-ahead leaks into training) and
as of t - lag for lagged features. An input whose reading is too old to stand
for the plant at that moment skips the sample instead of feeding a guess.
"""
from __future__ import annotations

import math
from bisect import bisect_left, bisect_right

import numpy as np

from daemon.errors import CheckpointError, PayloadError, SampleSkipped
from daemon.payloads import Reading
from daemon.settings import AlignSettings, ModelSettings


class InputHistory:
    """The newest ``capacity`` readings of one input, kept sorted by time.

    Times and values are plain float lists whose live part is ``[lo:]``: a reading is
    one list append (or an insert when it comes a little late) and a lookup is one
    binary search, without numpy's per-call overhead on a single number. Readings
    that fall out of the capacity are cut off in one go once as many again have
    piled up, so appends stay O(1) amortised.
    """

    def __init__(self, capacity: int, late_tolerance_s: float) -> None:
        if capacity < 1:
            raise ValueError(f"history capacity must be >= 1, got {capacity}")
        self.capacity = int(capacity)
        self.late_tolerance_s = float(late_tolerance_s)
        self._t: list[float] = []
        self._v: list[float] = []
        self._lo = 0

    def __repr__(self) -> str:
        newest = f", newest t={self.newest_t:.3f}" if len(self) else ""
        return f"InputHistory({len(self)}/{self.capacity}{newest})"

    def __len__(self) -> int:
        return len(self._t) - self._lo

    @property
    def newest_t(self) -> float | None:
        """Time of the newest reading, or None when empty."""
        return self._t[-1] if len(self._t) > self._lo else None

    @property
    def oldest_t(self) -> float | None:
        """Time of the oldest reading kept, or None when empty."""
        return self._t[self._lo] if len(self._t) > self._lo else None

    def add(self, t: float, value: float) -> None:
        """Insert a reading in time order; ``PayloadError('late')`` if beyond the tolerance."""
        if not (math.isfinite(t) and math.isfinite(value)):
            raise PayloadError("non_finite", f"reading t={t}, value={value}")
        t, value = float(t), float(value)
        times = self._t
        if len(times) == self._lo or t > times[-1]:
            times.append(t)
            self._v.append(value)
            self._trim()
            return
        newest = times[-1]
        if t < newest - self.late_tolerance_s:
            raise PayloadError("late", f"reading at t={t:.3f} is {newest - t:.3f} s older than "
                               f"the newest ({newest:.3f}); align.late_tolerance_s is "
                               f"{self.late_tolerance_s:g}")
        i = bisect_left(times, t, self._lo)
        if times[i] == t:              # same timestamp: the newer message wins
            self._v[i] = value
            return
        times.insert(i, t)
        self._v.insert(i, value)
        self._trim()

    def clear(self) -> None:
        """Forget every reading."""
        self._t, self._v, self._lo = [], [], 0

    def shift(self, dt: float) -> None:
        """Move every reading's time by ``dt`` s (the clock that stamped them was stepped)."""
        lo = self._lo
        self._t = [t + dt for t in self._t[lo:]]
        del self._v[:lo]
        self._lo = 0

    def as_of(self, t: float) -> tuple[float, float] | None:
        """(reading time, value) of the newest reading at or before ``t``, or None."""
        j = bisect_right(self._t, t, self._lo) - 1
        if j < self._lo:
            return None
        return self._t[j], self._v[j]

    def arrays(self) -> tuple[np.ndarray, np.ndarray]:
        """Copies of the live (times, values), oldest first."""
        lo = self._lo
        return np.array(self._t[lo:], np.float64), np.array(self._v[lo:], np.float64)

    def load(self, t: np.ndarray, v: np.ndarray) -> None:
        """Replace the contents with arrays already passed through ``check_arrays``."""
        self._t = np.asarray(t, np.float64)[-self.capacity:].tolist()
        self._v = np.asarray(v, np.float64)[-self.capacity:].tolist()
        self._lo = 0

    def _trim(self) -> None:
        n = len(self._t)
        if n - self._lo > self.capacity:
            self._lo = n - self.capacity
            if self._lo >= self.capacity:
                del self._t[:self._lo]
                del self._v[:self._lo]
                self._lo = 0


def check_arrays(name: str, t: np.ndarray, v: np.ndarray) -> None:
    """Refuse a saved history unless 1-D, numeric, finite, equal-length and time-increasing."""
    if t.ndim != 1 or v.ndim != 1 or t.shape != v.shape:
        raise CheckpointError(f"history of input {name!r}: times {t.shape} and values "
                              f"{v.shape} must be 1-D arrays of equal length")
    if not (np.issubdtype(t.dtype, np.number) and np.issubdtype(v.dtype, np.number)):
        raise CheckpointError(f"history of input {name!r}: arrays must be numeric, got "
                              f"{t.dtype} and {v.dtype}")
    if not (np.all(np.isfinite(t)) and np.all(np.isfinite(v))):
        raise CheckpointError(f"history of input {name!r} holds non-finite numbers")
    if t.shape[0] > 1 and not np.all(np.diff(t) > 0):
        raise CheckpointError(f"history of input {name!r}: times are not strictly increasing")


class FeatureAssembler:
    """Per-input histories of one model and the as-of feature vector they give."""

    def __init__(self, model: ModelSettings) -> None:
        self.model_name = model.name
        self.max_age_s = float(model.align.max_age_s)
        self._hist = {inp.name: InputHistory(model.align.history, model.align.late_tolerance_s)
                      for inp in model.inputs}
        # (input name, lag s, its history) in feature order: inputs, then lags as listed.
        self._plan = [(inp.name, float(lag), self._hist[inp.name])
                      for inp in model.inputs for lag in inp.lags_s]
        self.n_features = len(self._plan)
        self._arrival_stamped = [inp.name for inp in model.inputs if inp.time_field is None]

    def __repr__(self) -> str:
        return f"FeatureAssembler({self.model_name!r}, {self.n_features} features)"

    def apply_settings(self, align: AlignSettings) -> None:
        """Hot-apply new align settings (SIGHUP); a resized history keeps its newest readings."""
        self.max_age_s = float(align.max_age_s)
        for name, old in list(self._hist.items()):
            if old.capacity == align.history:
                old.late_tolerance_s = float(align.late_tolerance_s)
                continue
            new = InputHistory(align.history, align.late_tolerance_s)
            new.load(*old.arrays())
            self._hist[name] = new
        self._plan = [(name, lag, self._hist[name]) for name, lag, _old in self._plan]

    def history(self, input_name: str) -> InputHistory:
        """The history of one input (for status and tests; do not add to it directly)."""
        return self._hist[self._check_name(input_name)]

    def add(self, input_name: str, reading: Reading | tuple[float, float]) -> None:
        """Record an input reading; ``PayloadError('late')`` if it is too far out of order."""
        hist = self._hist.get(input_name)
        if hist is None:
            self._check_name(input_name)
        hist.add(*reading)

    def shift_arrival_stamped(self, dt: float) -> list[str]:
        """Move the histories of inputs stamped on arrival (no ``time_field``) by ``dt`` s;
        returns their names. Sensor-stamped inputs keep their sensors' own times."""
        moved = [name for name in self._arrival_stamped if len(self._hist[name])]
        for name in moved:
            self._hist[name].shift(dt)
        return moved

    def clear_arrival_stamped_after(self, t: float) -> list[str]:
        """Empty the histories of inputs stamped on arrival whose newest reading is after
        ``t``; returns their names. A restored history ahead of the clock was stamped by a
        clock since set back: where its readings sit in today's time cannot be known."""
        ahead = [name for name in self._arrival_stamped
                 if len(self._hist[name]) and self._hist[name].newest_t > t]
        for name in ahead:
            self._hist[name].clear()
        return ahead

    def features_at(self, t: float) -> np.ndarray:
        """Feature vector for a target measured at ``t``; ``SampleSkipped`` if an input is stale."""
        values = []
        max_age = self.max_age_s
        for name, lag, hist in self._plan:
            at = t - lag
            hit = hist.as_of(at)
            if hit is None or at - hit[0] > max_age:
                raise self._skip(name, lag, hist, hit, at)
            values.append(hit[1])
        return np.array(values, np.float64)

    def fresh_at(self, t: float) -> bool:
        """True when every feature at ``t`` has a reading within ``max_age_s``."""
        for _name, lag, hist in self._plan:
            at = t - lag
            hit = hist.as_of(at)
            if hit is None or at - hit[0] > self.max_age_s:
                return False
        return True

    def state(self) -> dict[str, np.ndarray]:
        """Histories as plain arrays, keys ``<input>.t`` and ``<input>.v``."""
        out: dict[str, np.ndarray] = {}
        for name, hist in self._hist.items():
            out[f"{name}.t"], out[f"{name}.v"] = hist.arrays()
        return out

    def load_state(self, arrays: dict[str, np.ndarray]) -> None:
        """Restore histories saved by ``state``; all are checked before any is replaced."""
        staged = []
        for name, hist in self._hist.items():
            tk, vk = f"{name}.t", f"{name}.v"
            if tk not in arrays and vk not in arrays:
                continue               # an input added since the save starts empty
            if tk not in arrays or vk not in arrays:
                raise CheckpointError(f"history of input {name!r} is incomplete: need both "
                                      f"{tk!r} and {vk!r}")
            t, v = np.asarray(arrays[tk]), np.asarray(arrays[vk])
            check_arrays(name, t, v)
            staged.append((hist, t.astype(np.float64), v.astype(np.float64)))
        for hist, t, v in staged:
            hist.load(t, v)

    def _check_name(self, input_name: str) -> str:
        if input_name not in self._hist:
            raise KeyError(f"model {self.model_name!r} has no input {input_name!r}; "
                           f"inputs: {sorted(self._hist)}")
        return input_name

    def _skip(self, name: str, lag: float, hist: InputHistory,
              hit: tuple[float, float] | None, at: float) -> SampleSkipped:
        when = "t" if lag == 0 else f"t - {lag:g} s"
        label = f"input {name!r}" + ("" if lag == 0 else f" (lag {lag:g} s)")
        if len(hist) == 0:
            return SampleSkipped("no_data", f"{label} has no reading yet")
        if hit is None:
            return SampleSkipped("stale", f"{label} has no reading at or before {when} "
                                 f"(oldest kept is {hist.oldest_t - at:.1f} s after it)")
        return SampleSkipped("stale", f"{label} last seen {at - hit[0]:.1f} s before {when} "
                             f"(max_age_s {self.max_age_s:g})")
