"""Metrics labelled by model: the families every model shares and one model's bound children.

Split from daemon/metrics.py (which holds the daemon-wide figures and the registry): each
model's children are bound once at registration, the hot path touches only those and plain
numbers, and slow figures are refreshed every ``refresh_every`` samples (WindowStats).
"""
from __future__ import annotations

import math
import re
import threading
from typing import Any, Callable, Optional

from prometheus_client import CollectorRegistry, Counter, Gauge, Info

from daemon.guard import REASONS as GUARD_REASONS
from daemon.metric_figures import Pending, PendingCounter, PendingGauge, WindowStats

PREFIX = "edgeprop_"
RESIDUAL_PERCENTILES = (5, 25, 50, 75, 95)
ROLLBACK_CAUSES = ("operator", "guard", "drift")
_CODE = re.compile(r"[a-z][a-z0-9_]{0,31}\Z")
_MAX_CODES = 32            # distinct reason codes per metric before they fold into "other"


def _codes(metric: Any, *bound: str) -> Callable[[str], Any]:
    """Return a lookup from a short reason code to a cached child; odd or excess codes -> other."""
    cache: dict[str, Any] = {}

    def child(code: str) -> Any:
        hit = cache.get(code)
        if hit is None:
            key = code if (_CODE.match(code) and len(cache) < _MAX_CODES) else "other"
            hit = cache.get(key) or metric.labels(*bound, key)
            cache[key] = hit
        return hit
    return child


class _Total:
    """A counter fed from someone else's running total (link, queue, checkpoint store)."""

    def __init__(self, child: Any) -> None:
        self.child, self.last = child, 0

    def sync(self, total: int) -> None:
        """Advance by the growth since the last call; a total that went down restarted at 0."""
        delta = total - self.last if total >= self.last else total
        if delta:
            self.child.inc(delta)
        self.last = total


class _ModelFamilies:
    """The metric families labelled by model, shared by every ``ModelMetrics``."""

    def __init__(self, r: CollectorRegistry) -> None:
        self.pending: list[Callable[[], None]] = []      # each model's bring_in
        self._lock = threading.Lock()

        def g(name: str, doc: str, *labels: str, cls: type = Gauge) -> Gauge:
            return self._hook(cls(PREFIX + name, doc, ["model", *labels], registry=r))

        def c(name: str, doc: str, *labels: str, cls: type = Counter) -> Counter:
            return self._hook(cls(PREFIX + name, doc, ["model", *labels], registry=r))

        self.samples = c("samples", "Target readings learned from (warm-up included).",
                         cls=PendingCounter)
        self.steps = c("training_steps", "SGD steps taken.", cls=PendingCounter)
        self.skipped = c("samples_skipped", "Target readings that formed no sample.", "reason")
        self.published = c("predictions_published", "Predictions published.", cls=PendingCounter)
        self.loss = g("prequential_loss", "Test-then-train loss, moving average.", "window")
        self.rmse = g("rmse", "Root mean squared residual over recent samples, target units.")
        self.log_loss = g("log_loss", "Mean logistic loss over recent samples (binary models).")
        self.accuracy = g("accuracy_ratio", "Share of recent samples classed right (binary).")
        # A "quantile" label is reserved for summaries (promtool says so), hence percentile.
        self.percentile = g("residual_percentile", "Percentile of recent residuals, target units.",
                            "percentile")
        self.coverage = g("interval_coverage_ratio", "Share of scored readings inside the band.")
        self.coverage_goal = g("interval_coverage_target_ratio", "Coverage the band aims for.")
        self.lr = g("learning_rate", "Learning rate in force.", cls=PendingGauge)
        self.wnorm = g("weight_norm", "Euclidean norm of all network parameters.")
        self.gnorm = g("gradient_norm", "Euclidean norm of the last gradient.", cls=PendingGauge)
        self.loss_drift = g("loss_drift_score", "Loss drift statistic over its alarm level.")
        self.loss_events = c("loss_drift_events", "Drift alarms on the loss stream.")
        self.shift = g("input_shift_score", "Input mean shift, in reference spreads.", "input")
        self.shift_events = c("input_shift_events", "Shift alarms on an input.", "input")
        self.drift = g("drift_active", "1 while the published drift flag is up.", cls=PendingGauge)
        self.ckpt_time = g("checkpoint_last_success_timestamp_seconds",
                           "Unix time of the last checkpoint written by this process; 0: none.")
        self.ckpt_fail = c("checkpoint_failures", "Checkpoint writes that failed.")
        self.ckpt_restore = c("checkpoint_restores", "Checkpoints loaded into the model.")
        self.ckpt_corrupt = c("checkpoint_skipped_corrupt", "Checkpoints skipped as corrupt.")
        self.rollbacks = c("rollbacks", "Returns to an earlier checkpoint, by cause.", "cause")
        self.guard = c("guard_trips", "Guard trips (non-finite or runaway loss).", "reason")
        self.last = {k: g("last_" + k, f"Latest {k.replace('_', ' ')}, target units.",
                          cls=PendingGauge)
                     for k in ("measured", "predicted", "residual", "interval_low",
                               "interval_high")}
        self.info = Info(PREFIX + "model", "Checkpoint in service and network shape.",
                         ["model"], registry=r)

    def _hook(self, family: Any) -> Any:
        if isinstance(family, Pending):
            family.bring_in = self.bring_in
        return family

    def bring_in(self) -> None:
        """Copy every model's pending figures into the metric children (any thread)."""
        with self._lock:
            for bring_in in self.pending:
                bring_in()


class ModelMetrics:
    """Pre-bound metric children and windowed error statistics for one model."""

    def __init__(self, f: _ModelFamilies, name: str, architecture: str, inputs: list[str],
                 task: str, coverage: Optional[float], window: int, refresh_every: int) -> None:
        if task not in ("regression", "binary"):
            raise ValueError(f"task {task!r}; allowed: regression, binary")
        self.name, self.task = name, task
        b = (name,)
        self._samples, self._steps = f.samples.labels(*b), f.steps.labels(*b)
        self._published = f.published.labels(*b)
        self._skipped, self._guard = _codes(f.skipped, name), _codes(f.guard, name)
        for reason in GUARD_REASONS:
            # exported at 0 from the start: increase() over a series that appears at 1 is 0,
            # so an alert on the first trip would never fire
            self._guard(reason)
        self._loss = (f.loss.labels(name, "short"), f.loss.labels(name, "long"))
        if task == "regression":
            self._windowed = [f.rmse.labels(*b),
                              *(f.percentile.labels(name, str(p)) for p in RESIDUAL_PERCENTILES)]
        else:
            self._windowed = [f.log_loss.labels(*b), f.accuracy.labels(*b)]
        self._coverage, self._coverage_goal = f.coverage.labels(*b), f.coverage_goal.labels(*b)
        self._coverage_goal.set(math.nan if coverage is None else coverage)
        self._lr, self._wnorm, self._gnorm = (m.labels(*b) for m in (f.lr, f.wnorm, f.gnorm))
        self._loss_drift, self._loss_events = f.loss_drift.labels(*b), f.loss_events.labels(*b)
        self._shift = {i: f.shift.labels(name, i) for i in inputs}
        self._shift_events = {i: f.shift_events.labels(name, i) for i in inputs}
        self._drift = f.drift.labels(*b)
        self._ckpt_time = f.ckpt_time.labels(*b)
        self._ckpt_fail, self._ckpt_restore = f.ckpt_fail.labels(*b), f.ckpt_restore.labels(*b)
        self._ckpt_corrupt = _Total(f.ckpt_corrupt.labels(*b))
        self._rollbacks = {c: f.rollbacks.labels(name, c) for c in ROLLBACK_CAUSES}
        self._last = {k: m.labels(*b) for k, m in f.last.items()}
        for child in (*self._loss, *self._windowed, self._coverage, self._lr, self._wnorm,
                      self._gnorm, *self._last.values()):
            child.set(math.nan)              # unknown yet: a gap on the chart, not a false zero
        self._info, self._arch = f.info.labels(*b), architecture
        self._set_info("none")
        self._stats = WindowStats(task == "binary", window, refresh_every, RESIDUAL_PERCENTILES)
        # Worker side of the per-sample figures: running totals and latest values, copied
        # into the children by bring_in (under the families' lock) when a family is read.
        # The worker only overwrites these slots, so a concurrent read needs no lock.
        self._totals = [0, 0, 0]                     # samples, steps, published
        self._total_children = (self._samples, self._steps, self._published)
        self._brought = [0, 0, 0]
        self._latest_children = (self._last["predicted"], self._last["interval_low"],
                                 self._last["interval_high"], self._last["measured"],
                                 self._last["residual"], self._lr, self._gnorm, self._drift)
        self._latest = [math.nan] * 7 + [0.0]        # what the children were set to above
        f.pending.append(self._bring_in)

    def _bring_in(self) -> None:
        for i, (child, total) in enumerate(zip(self._total_children, list(self._totals))):
            if total != self._brought[i]:
                child.inc(total - self._brought[i])
                self._brought[i] = total
        for child, latest in zip(self._latest_children, list(self._latest)):
            child.set(latest)

    def __repr__(self) -> str:
        return f"ModelMetrics({self.name!r}, task={self.task!r})"

    def _set_info(self, checkpoint: str) -> None:
        self._info.info({"checkpoint": checkpoint, "architecture": self._arch, "task": self.task})

    def published(self, predicted: Optional[float], low: Optional[float],
                  high: Optional[float]) -> None:
        """Count one published prediction; record it and its band when given."""
        self._totals[2] += 1
        latest = self._latest
        if predicted is not None:
            latest[_PREDICTED] = predicted
        if low is not None and high is not None:
            latest[_LOW] = low
            latest[_HIGH] = high

    def outcome(self, measured: float, predicted: float) -> bool:
        """Record a reading scored against its prediction; True when slow gauges are due."""
        latest = self._latest
        latest[_MEASURED] = measured
        latest[_RESIDUAL] = measured - predicted
        if self._stats.add(measured, predicted):
            for child, value in zip(self._windowed, self._stats.summary()):
                child.set(value)
            return True
        return False

    def learned(self, steps: int, learning_rate: float, gradient_norm: float) -> None:
        """Count one sample learned from, its SGD steps (none in warm-up) and the rate in force."""
        totals, latest = self._totals, self._latest
        totals[0] += 1
        latest[_LR] = learning_rate
        if steps:
            totals[1] += steps
            latest[_GNORM] = gradient_norm

    def levels(self, *, weight_norm: Optional[float] = None, coverage: Optional[float] = None,
               loss_short: Optional[float] = None, loss_long: Optional[float] = None,
               loss_drift: Optional[float] = None, input_shift: Optional[dict[str, float]] = None,
               learning_rate: Optional[float] = None,
               coverage_target: Optional[float] = None) -> None:
        """Set the slow-moving figures that are given; leave the others as they are."""
        for child, value in ((self._wnorm, weight_norm), (self._coverage, coverage),
                             (self._loss[0], loss_short), (self._loss[1], loss_long),
                             (self._loss_drift, loss_drift),
                             (self._coverage_goal, coverage_target)):
            if value is not None:
                child.set(value)
        if learning_rate is not None:
            self._latest[_LR] = learning_rate        # the per-sample path keeps it too
        for name, score in (input_shift or {}).items():
            self._input(self._shift, name).set(score)

    def _input(self, children: dict[str, Any], input_name: str) -> Any:
        child = children.get(input_name)
        if child is None:
            raise ValueError(f"model {self.name!r} has no input {input_name!r}; "
                             f"inputs: {sorted(children)}")
        return child

    def drift_active(self, active: bool) -> None:
        """Record whether the published drift flag is up."""
        self._latest[_DRIFT] = 1 if active else 0

    def drift_event(self, source: str) -> None:
        """Count one drift alarm: "loss" for the error stream, else the input's name."""
        if source == "loss":
            self._loss_events.inc()
        else:
            self._input(self._shift_events, source).inc()

    def skipped(self, reason: str) -> None:
        """Count a target reading that formed no sample (e.g. stale)."""
        self._skipped(reason).inc()

    def guard_tripped(self, reason: str) -> None:
        """Count one guard trip (e.g. non_finite, loss_blowup)."""
        self._guard(reason).inc()

    def checkpoint_saved(self, checkpoint_id: str, at: float) -> None:
        """Record a checkpoint written at unix time ``at``; it is now the one in service."""
        self._ckpt_time.set(at)
        self._set_info(checkpoint_id)

    def checkpoint_failed(self) -> None:
        """Count one failed checkpoint write."""
        self._ckpt_fail.inc()

    def checkpoint_restored(self, checkpoint_id: str) -> None:
        """Count a checkpoint loaded into the model (start-up or guard restore)."""
        self._ckpt_restore.inc()
        self._set_info(checkpoint_id)

    def checkpoint_skipped_corrupt(self, total: int) -> None:
        """Copy the store's running total of checkpoints passed over as corrupt."""
        self._ckpt_corrupt.sync(total)

    def rolled_back(self, cause: str, checkpoint_id: str) -> None:
        """Count a return to an earlier checkpoint by cause: operator, guard or drift."""
        child = self._rollbacks.get(cause)
        if child is None:
            raise ValueError(f"rollback cause {cause!r}; allowed: {', '.join(ROLLBACK_CAUSES)}")
        child.inc()
        self._set_info(checkpoint_id)


# slots of ModelMetrics._latest, in the order of its _latest_children
_PREDICTED, _LOW, _HIGH, _MEASURED, _RESIDUAL, _LR, _GNORM, _DRIFT = range(8)
