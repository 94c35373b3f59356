"""Drift detection on the loss stream and on each input, and the response it calls for.

What the loss detectors watch: the per-sample loss of a standardised target is
heavy-tailed (squared loss of a Gaussian residual is chi-square(1): mean 1,
spread 1.4) and its level falls as the model learns. Fed raw to Page-Hinkley at
the defaults (allowance 0.005, alarm level 50) it gave 71 false alarms per
100,000 stationary samples (|residual| still gave 7), and ADWIN's bound assumes
values in [0, 1]. So both detectors watch the *relative loss*

    u = min(loss / (4 * reference), 1)

``reference`` is the loss level the model has been achieving: a running mean over
its first samples, then an exponentially weighted mean (time constant
``LOSS_REFERENCE_SAMPLES``) of the loss clipped at 4x the reference, so one outlier
cannot move it; 4 is the 2-sigma point of a squared Gaussian residual. ``u`` is
unit-free (any sensor; squared, Huber or logistic loss), lies in [0, 1] and spreads
little (~0.28 for Gaussian residuals): at the defaults false alarms stay near zero
while a 3-sigma residual step lifts its mean by ~0.7 and is found within 100 samples
(tests/bench_detectors.py). Only *increases* alarm: a model getting better is not drift.
But a learning model leaves the lagging reference above its loss, so u dips and later
climbs back, which a detector remembering the dip reads as an increase (measured: about
one false alarm per fresh model). So each time the reference falls by ``REARM_RATIO``
the detector is re-armed on the newest ``REARM_KEEP`` values only.

Inputs: per input, the mean of the newest ``input_recent`` raw values against a
reference mean, in units of the reference spread (both from the first
``input_reference`` values after a start or a rebase).
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Optional

import numpy as np

from .detectors import Adwin, Detector, NoDetector, PageHinkley, _arrays, _scalar
from .settings import DriftSettings

LARGE_LOSS = 4.0                # loss ratio mapped to u = 1; 2-sigma of a squared Gaussian residual
LOSS_REFERENCE_SAMPLES = 1000   # time constant of the loss reference (common practice, no source)
LOSS_FLOOR = 1e-9               # reference floor for a perfect fit (common practice, no source)
CHANGE_SEARCH = 2048            # newest u values searched for the change point
REARM_RATIO = 0.9               # reference fall that re-arms the detector (tuned on learning curves)
REARM_KEEP = 300                # newest u values a re-armed detector keeps (common practice, no source)
ACTIONS = ("none", "boost_lr", "shrink_window", "restore")
DETECTORS = ("page_hinkley", "adwin", "none")


def _part(prefix: str, arrays: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    return {k[len(prefix):]: v for k, v in arrays.items() if k.startswith(prefix)}


class RelativeLoss:
    """The loss as the detectors see it (u in [0, 1], see the module notes), and where it changed."""

    def __init__(self, warmup: int, time_constant: int = LOSS_REFERENCE_SAMPLES) -> None:
        self.warmup, self.time_constant = max(int(warmup), 1), int(time_constant)
        self.history = np.zeros(CHANGE_SEARCH)
        self.reset()

    def __repr__(self) -> str:
        return f"RelativeLoss(reference={self.reference:.4g}, n={self.n})"

    def reset(self) -> None:
        """Start a new reference (after a drift is acted on)."""
        self.n, self.reference, self.armed, self.kept = 0, 0.0, 0.0, 0

    def update(self, loss: float) -> Optional[float]:
        """Relative loss of this sample, or None while the reference is forming."""
        u = None
        if self.n >= self.warmup:
            u = min(loss / (LARGE_LOSS * self.reference), 1.0)
            loss = min(loss, LARGE_LOSS * self.reference)
            self.history[self.kept % CHANGE_SEARCH] = u
            self.kept += 1
        self.n += 1
        ref = self.reference + (loss - self.reference) / min(self.n, self.time_constant)
        self.reference = max(ref, LOSS_FLOOR)
        if self.n in (self.warmup, self.time_constant):
            self.armed = self.reference      # again once the reference is a full average
        return u

    def improved(self) -> bool:
        """True (once) when the reference has fallen by ``REARM_RATIO`` since the last time.

        A model that gets better leaves the lagging reference above its loss for a while,
        so u dips and later climbs back: to a detector that remembers the dip this looks
        like an increase. So at each such fall the detector is re-armed with only the
        newest ``REARM_KEEP`` values (the history is cut to them too).
        """
        if self.n > self.warmup and self.reference < REARM_RATIO * self.armed:
            keep = self.newest()[-REARM_KEEP:]
            self.history[:keep.size] = keep
            self.armed, self.kept = self.reference, keep.size
            return True
        return False

    def newest(self) -> np.ndarray:
        """The kept u values (at most CHANGE_SEARCH), oldest first."""
        if self.kept <= CHANGE_SEARCH:
            return self.history[:self.kept].copy()
        return np.roll(self.history, -(self.kept % CHANGE_SEARCH))

    def change_age(self) -> int:
        """Samples since the likeliest start of an increase of u: the split k maximising
        C_k^2 / (k(n-k)/n), C_k = S_k - (k/n) S_n < 0, the maximum-likelihood change point
        of a mean shift in Gaussian noise (Hinkley 1970, from memory)."""
        u = self.newest()
        n = u.size
        if n < 2:
            return n
        k = np.arange(1, n)
        c = np.cumsum(u)[:-1] - k / n * u.sum()
        stat = np.where(c < 0, c * c / (k * (n - k) / n), -1.0)
        return int(n - 1 - np.argmax(stat))

    def state(self) -> dict[str, np.ndarray]:
        """Plain arrays for a checkpoint."""
        return {**_arrays(n=self.n, reference=self.reference, armed=self.armed),
                "history": self.newest()}

    def load_state(self, arrays: dict[str, np.ndarray]) -> None:
        """Restore from ``state`` output."""
        self.n, self.reference = int(arrays["n"]), _scalar(arrays, "reference")
        self.armed = _scalar(arrays, "armed")
        values = np.asarray(arrays["history"], np.float64).ravel()[-CHANGE_SEARCH:]
        self.history = np.zeros(CHANGE_SEARCH)
        self.history[:values.size] = values
        self.kept = values.size


def _sum(values: list[float]) -> float:
    """Exact sum of finite readings; inf when it passes the float range (fsum raises there)."""
    try:
        return math.fsum(values)
    except OverflowError:      # e.g. two readings of 1e308: finite each, not their sum
        return sum(values)     # plain float sum: inf or nan, never raises


class InputShift:
    """Shift of one input's recent mean from its reference mean, in reference spreads.

    Quiet until the reference (first ``reference`` values after a start or rebase) is complete.
    """

    def __init__(self, reference: int = 500, recent: int = 50, threshold: float = 4.0) -> None:
        self.reference, self.recent, self.threshold = int(reference), int(recent), float(threshold)
        self.rebase()

    def __repr__(self) -> str:
        return f"InputShift(score={self.score:.3g}, reference {self.ref_n}/{self.reference})"

    def rebase(self) -> None:
        """Start a new reference from the next ``reference`` values."""
        self.ref_n, self.ref_mean, self.ref_m2 = 0, 0.0, 0.0
        self._fill([])
        self.score, self.above = 0.0, False

    def _fill(self, values: list[float]) -> None:
        values = values[len(values) - self.recent:] if len(values) > self.recent else values
        self.buf = values + [0.0] * (self.recent - len(values))
        self.count = len(values)
        self.head = self.count % self.recent
        self.total = _sum(values)

    @property
    def ready(self) -> bool:
        """True once the reference is complete and the recent window full."""
        return self.ref_n >= self.reference and self.count >= self.recent

    @property
    def ref_std(self) -> float:
        var = self.ref_m2 / self.ref_n if self.ref_n else 0.0
        return math.sqrt(var) if var >= 0.0 else math.nan   # -inf/nan after a 1e308 reading

    def update(self, x: float) -> bool:
        """Add one raw value; True on the sample where the shift first exceeds the threshold."""
        ref_n, buf, head, recent = self.ref_n, self.buf, self.head, self.recent
        if ref_n < self.reference:
            ref_n = self.ref_n = ref_n + 1
            d = x - self.ref_mean
            mean = self.ref_mean = self.ref_mean + d / ref_n
            self.ref_m2 += d * (x - mean)
        self.total += x - buf[head]
        buf[head] = x
        head = self.head = (head + 1) % recent
        if self.count < recent:                     # count never exceeds recent (see _fill)
            self.count += 1
        if head == 0:
            self.total = _sum(buf)                  # no rounding creep over millions of samples
        if ref_n < self.reference or self.count < recent:     # not ready
            return False
        # a constant reference (a setpoint) gets a tiny spread, so any real move is a shift
        # common practice, no source: a floor relative to the level
        spread = max(self.ref_std, 1e-9 * max(1.0, abs(self.ref_mean)))
        self.score = abs(self.total / self.recent - self.ref_mean) / spread
        fired = self.score > self.threshold and not self.above
        self.above = self.score > self.threshold
        return fired

    def resize(self, reference: int, recent: int, threshold: float) -> None:
        """New sizes from a reload; keeps the reference and the newest recent values."""
        values = self.newest()
        self.reference, self.recent, self.threshold = int(reference), int(recent), float(threshold)
        self._fill(values)

    def newest(self) -> list[float]:
        """The recent values, oldest first."""
        if self.count < self.recent:
            return self.buf[:self.count]
        return self.buf[self.head:] + self.buf[:self.head]

    def state(self) -> dict[str, np.ndarray]:
        """Plain arrays for a checkpoint."""
        return _arrays(ref_n=self.ref_n, ref_mean=self.ref_mean, ref_m2=self.ref_m2,
                       recent=np.asarray(self.newest(), np.float64), score=self.score,
                       above=int(self.above))

    def load_state(self, arrays: dict[str, np.ndarray]) -> None:
        """Restore from ``state`` output; a different ``recent`` size keeps the newest values."""
        self.ref_n = int(arrays["ref_n"])
        self.ref_mean, self.ref_m2 = _scalar(arrays, "ref_mean"), _scalar(arrays, "ref_m2")
        self.score, self.above = _scalar(arrays, "score"), bool(int(arrays["above"]))
        self._fill(np.asarray(arrays["recent"], np.float64).ravel().tolist())


@dataclass(frozen=True)
class DriftEvent:
    """A newly detected change: ``source`` is "loss" or an input name; ``since`` is the
    estimated number of samples from the change to its detection (the post-change part)."""

    source: str
    score: float
    since: int


@dataclass(frozen=True)
class DriftAction:
    """What the learner should do about an event.

    ``none``; ``boost_lr``: multiply the learning rate by ``lr_factor`` for ``samples``;
    ``shrink_window``: keep only the newest ``samples`` (the post-change part);
    ``restore``: go back to the newest checkpoint older than ``samples`` samples.
    """

    kind: str
    lr_factor: float = 1.0
    samples: int = 0


def action_for(settings: DriftSettings, event: Optional[DriftEvent]) -> DriftAction:
    """The response ``settings.on_drift`` calls for on ``event``."""
    kind = settings.on_drift
    if kind not in ACTIONS:
        raise ValueError(f"drift.on_drift is {kind!r}; allowed: {', '.join(ACTIONS)}")
    if kind == "boost_lr":
        return DriftAction(kind, float(settings.boost_factor), int(settings.boost_samples))
    if kind in ("shrink_window", "restore"):
        return DriftAction(kind, 1.0, max(event.since if event else 0, 1))
    return DriftAction("none", 1.0, 0)


def make_detector(settings: DriftSettings) -> Detector:
    """The loss detector ``settings.detector`` names."""
    if settings.detector == "page_hinkley":
        return PageHinkley(settings.delta, settings.threshold, settings.min_samples)
    if settings.detector == "adwin":
        return Adwin(settings.confidence, settings.min_samples)
    if settings.detector == "none":
        return NoDetector()
    raise ValueError(f"drift.detector is {settings.detector!r}; allowed: {', '.join(DETECTORS)}")


class DriftMonitor:
    """One model's drift watch: the loss detector, an input shift per input, and the response.

    After any event the loss detector and its reference start afresh and every input
    reference is rebased, so one change raises one event. ``active`` (the published
    ``drift`` flag) stays up for ``hold_samples`` samples from the event, counting the
    event's own sample, or while a learning-rate boost lasts.
    """

    def __init__(self, settings: DriftSettings, input_names: list[str]) -> None:
        self.settings = settings
        self.input_names = list(input_names)
        self.relative = RelativeLoss(settings.min_samples)
        self.detector = make_detector(settings)
        self.inputs = [InputShift(settings.input_reference, settings.input_recent,
                                  settings.input_threshold) for _ in self.input_names]
        self.response = action_for(settings, None)
        self.hold_left = self.boost_left = self.samples = self.events = 0

    def __repr__(self) -> str:
        return (f"DriftMonitor({self.settings.detector}, inputs={len(self.inputs)}, "
                f"events={self.events}, active={self.active})")

    @property
    def active(self) -> bool:
        """True while a change is being acted on (the published ``drift`` flag)."""
        return self.hold_left > 0 or self.boost_left > 0

    @property
    def loss_score(self) -> float:
        """Loss detector statistic over its alarm level (1.0 = alarm)."""
        return float(self.detector.score)

    @property
    def input_scores(self) -> dict[str, float]:
        """Per input: recent-mean shift in reference spreads (0 until its reference is complete)."""
        return {name: s.score for name, s in zip(self.input_names, self.inputs)}

    def update(self, loss: float, x_raw: np.ndarray) -> Optional[DriftEvent]:
        """Watch one scored sample; returns an event when a new change is found.

        ``x_raw`` holds one raw (lag-0) value per input name. Non-finite values are
        skipped (the guard deals with a non-finite loss).
        """
        if len(x_raw) != len(self.inputs):
            raise ValueError(f"drift monitor got {len(x_raw)} input values, expected "
                             f"{len(self.inputs)} ({', '.join(self.input_names)})")
        self.samples += 1
        self.hold_left = max(self.hold_left - 1, 0)
        self.boost_left = max(self.boost_left - 1, 0)
        event = None
        if math.isfinite(loss):
            u = self.relative.update(loss)
            if u is not None and self.relative.improved():
                self._rearm()
            elif u is not None and self.detector.update(u):
                event = DriftEvent("loss", float(self.detector.alarm_score), self.relative.change_age())
        fired = []
        for name, shift, value in zip(self.input_names, self.inputs, x_raw):
            value = float(value)
            if math.isfinite(value) and shift.update(value):
                fired.append((shift.score, name))
        if event is None and fired:
            score, name = max(fired)
            event = DriftEvent(name, float(score), self.settings.input_recent)
        if event is not None:
            self._act(event)
        return event

    def _rearm(self) -> None:
        """Restart the detector on the newest values only (the model got better)."""
        self.detector.reset()
        for u in self.relative.newest().tolist():
            if self.detector.update(u):
                self.detector.reset()      # an increase inside the kept values: drop it too

    def _act(self, event: DriftEvent) -> None:
        self.events += 1
        self.response = action_for(self.settings, event)
        self.hold_left = self.settings.hold_samples
        if self.response.kind == "boost_lr":
            self.boost_left = self.response.samples
        self.detector.reset()
        self.relative.reset()
        for shift in self.inputs:
            shift.rebase()

    def apply_settings(self, new: DriftSettings) -> None:
        """Take reloaded settings, keeping every statistic that still means the same."""
        action_for(new, None)          # refuse an unknown on_drift before changing anything
        if new.detector != self.settings.detector:
            self.detector = make_detector(new)
        elif isinstance(self.detector, PageHinkley):
            self.detector.delta, self.detector.threshold = float(new.delta), float(new.threshold)
            self.detector.min_samples = int(new.min_samples)
        elif isinstance(self.detector, Adwin):
            self.detector.confidence = float(new.confidence)
            self.detector.min_samples = int(new.min_samples)
        self.relative.warmup = max(int(new.min_samples), 1)
        for shift in self.inputs:
            shift.resize(new.input_reference, new.input_recent, new.input_threshold)
        self.hold_left = min(self.hold_left, new.hold_samples)
        self.boost_left = min(self.boost_left, new.boost_samples)
        self.settings = new

    def state(self) -> dict[str, np.ndarray]:
        """Plain arrays for a checkpoint (keys without '/')."""
        r = self.response
        arrays = _arrays(detector=DETECTORS.index(self.settings.detector), n_inputs=len(self.inputs),
                         hold_left=self.hold_left, boost_left=self.boost_left, samples=self.samples,
                         events=self.events,
                         response=np.asarray([ACTIONS.index(r.kind), r.lr_factor, r.samples], np.float64))
        arrays.update({f"det.{k}": v for k, v in self.detector.state().items()})
        arrays.update({f"rel.{k}": v for k, v in self.relative.state().items()})
        for i, shift in enumerate(self.inputs):
            arrays.update({f"in{i}.{k}": v for k, v in shift.state().items()})
        return arrays

    def load_state(self, arrays: dict[str, np.ndarray]) -> None:
        """Restore; a saved state of another detector kind leaves a fresh detector."""
        n = int(arrays["n_inputs"])
        if n != len(self.inputs):
            raise ValueError(f"drift state has {n} inputs, the model has {len(self.inputs)}")
        if int(arrays["detector"]) == DETECTORS.index(self.settings.detector):
            self.detector.load_state(_part("det.", arrays))
        self.relative.load_state(_part("rel.", arrays))
        for i, shift in enumerate(self.inputs):
            shift.load_state(_part(f"in{i}.", arrays))
        kind, factor, samples = np.asarray(arrays["response"], np.float64).tolist()
        self.response = DriftAction(ACTIONS[int(kind)], float(factor), int(samples))
        self.hold_left, self.boost_left = int(arrays["hold_left"]), int(arrays["boost_left"])
        self.samples, self.events = int(arrays["samples"]), int(arrays["events"])
