"""Prometheus metrics: one private registry per daemon, updates cheap enough for every message.

Why it looks like this: the worker handles up to ~10k readings/s, so every label lookup is done
once, when a model is registered, and the hot path only touches pre-bound children; slow-moving
figures (weight norm, loss levels, drift scores, windowed error statistics) are refreshed every
``refresh_every`` samples. The per-message figures (messages, processing time, samples, steps,
published predictions, the latest values) are plain Python numbers on the worker side, read into
the scrape when it is collected: a prometheus-client call takes a lock and costs about a
microsecond, and the worker made ~20 of them per sample. Labels carry config names (model, input) and our own short codes
(reason, cause, result), never topics or reading values. Each ``Metrics`` builds its own
``CollectorRegistry`` so tests and replay never share state with a running daemon.

The worker's calls (models and inputs named as in the config)::

    metrics = Metrics(node="station-7", queue_capacity=10000)
    metrics.register_model("bearing_temp", "4-32x32-1 tanh", ["speed", "current"],
                           task="regression", coverage=0.9)
    metrics.observe_message(seconds)                  # every message the worker handled
    metrics.rejected("undecodable")                   # an unusable message, by reason
    metrics.observe_published(model, predicted, low, high)
    metrics.observe_sample(runtime, prediction, measured, learn_result)
    metrics.skipped(model, "stale"); metrics.guard_tripped(model, "loss_blowup")
    metrics.drift_event(model, source)                # source: "loss" or an input name
    metrics.checkpoint_saved(model, checkpoint_id, at); metrics.checkpoint_failed(model)
    metrics.checkpoint_restored(model, checkpoint_id)
    metrics.checkpoint_skipped_corrupt(model, store.skipped_corrupt)   # the store's running total
    metrics.rolled_back(model, cause, checkpoint_id)  # cause: operator | guard | drift
    metrics.learning_rate_changed(model, learning_rate)                # reload, boost, guard cut
    metrics.reload(result)                            # applied | invalid | partial
    metrics.transport(queue_depth=, queue_dropped=, connected=, reconnects=, publish_dropped=)
    server = serve(settings.metrics, metrics.registry)   # None when listen is null

``observe_sample`` reads a ``ModelRuntime`` (name, learner, guard, interval, drift); callers
without one use ``metrics.model(name)`` and its ``learned``/``outcome``/``levels`` directly.
Scales: loss levels are the guard's moving averages of the per-sample training loss;
``loss_drift`` is the detector statistic over its alarm level (1.0 = alarm); input shift is
the recent-mean shift in reference spreads; coverage is the interval's achieved share.
"""
from __future__ import annotations

import math
import platform
import re
import threading
import time
from typing import Any, Callable, Iterable, Optional

from prometheus_client import CollectorRegistry, Counter, Gauge, Info

from daemon import __version__
from daemon.guard import REASONS as GUARD_REASONS
from daemon.metric_figures import MessageFigures, Pending, PendingCounter, PendingGauge, WindowStats

PREFIX = "edgeprop_"
# Per-message processing time runs from ~20 us (a rejected reading) to tens of ms (a sample
# with several SGD steps on a slow ARM box); buckets are a 1-2-5 series over that span.
PROCESSING_BUCKETS = (2e-5, 5e-5, 1e-4, 2e-4, 5e-4, 1e-3, 2e-3, 5e-3, 1e-2, 2e-2, 5e-2)
RESIDUAL_PERCENTILES = (5, 25, 50, 75, 95)
ROLLBACK_CAUSES = ("operator", "guard", "drift")
RELOAD_RESULTS = ("applied", "invalid", "partial")
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


class Metrics:
    """Every edgeprop metric, on a registry of its own."""

    def __init__(self, registry: Optional[CollectorRegistry] = None, node: str = "edgeprop",
                 queue_capacity: int = 0, residual_window: int = 500, refresh_every: int = 32,
                 clock: Callable[[], float] = time.time) -> None:
        self.registry = r = registry if registry is not None else CollectorRegistry()
        self._stats_args = (residual_window, refresh_every)
        self._models: dict[str, ModelMetrics] = {}

        def c(name: str, doc: str, *labels: str) -> Counter:
            return Counter(PREFIX + name, doc, list(labels), registry=r)

        def g(name: str, doc: str) -> Gauge:
            return Gauge(PREFIX + name, doc, registry=r)

        self._messages = MessageFigures(PREFIX, PROCESSING_BUCKETS)
        r.register(self._messages)
        self._rejected = _codes(c("messages_rejected", "Messages dropped as unusable, by reason.",
                                  "reason"))
        self._queue = g("inbound_queue_depth", "Messages waiting for the worker.")
        g("inbound_queue_capacity", "Size of the inbound queue.").set(queue_capacity)
        self._connected = g("broker_connected", "1 while the MQTT session is up.")
        self._totals = [_Total(c(k, doc)) for k, doc in (
            ("inbound_dropped", "Messages lost because the inbound queue was full."),
            ("broker_reconnects", "Successful reconnections to the broker."),
            ("publish_dropped", "Outgoing messages not sent (no session or too many unsent)."))]
        reloads = c("config_reloads", "Configuration reloads, by result.", "result")
        self._reloads = {res: reloads.labels(res) for res in RELOAD_RESULTS}
        g("start_time_seconds", "Unix time the daemon started.").set(clock())
        Info(PREFIX + "build", "Version of edgeprop and Python; node identity.",
             registry=r).info({"version": __version__, "python": platform.python_version(),
                               "node": node})
        self._families = _ModelFamilies(r)

    def register_model(self, name: str, architecture: str, input_names: Iterable[str],
                       task: str = "regression", coverage: Optional[float] = None
                       ) -> "ModelMetrics":
        """Create and cache every labelled child for one model; call once per model."""
        if name in self._models:
            raise ValueError(f"model {name!r} is already registered with the metrics")
        mm = ModelMetrics(self._families, name, architecture, list(input_names), task, coverage,
                          *self._stats_args)
        self._models[name] = mm
        return mm

    def model(self, name: str) -> "ModelMetrics":
        """Return the metrics of a registered model."""
        try:
            return self._models[name]
        except KeyError:
            raise ValueError(f"no metrics for model {name!r}; registered: "
                             f"{sorted(self._models)}") from None

    # -- process-wide ------------------------------------------------------------------------
    def observe_message(self, seconds: float) -> None:
        """Count one message the worker handled and the time it took."""
        self._messages.observe(seconds)

    def rejected(self, reason: str, model: Optional[str] = None) -> None:
        """Count an unusable message by reason (per reason only: unknown topics have no model)."""
        self._rejected(reason).inc()

    def transport(self, queue_depth: int, queue_dropped: int, connected: bool,
                  reconnects: int, publish_dropped: int) -> None:
        """Copy the broker link's and inbound queue's own figures (running totals) in."""
        self._queue.set(queue_depth)
        self._connected.set(1 if connected else 0)
        for counter, total in zip(self._totals, (queue_dropped, reconnects, publish_dropped)):
            counter.sync(total)

    def reload(self, result: str) -> None:
        """Count one reload: applied, invalid (nothing changed) or partial (some refused)."""
        child = self._reloads.get(result)
        if child is None:
            raise ValueError(f"reload result {result!r}; allowed: {', '.join(RELOAD_RESULTS)}")
        child.inc()

    # -- per model, by config name -----------------------------------------------------------
    def observe_published(self, model: str, predicted: Optional[float] = None,
                          low: Optional[float] = None, high: Optional[float] = None) -> None:
        """Count one published prediction; with values, also the latest prediction and band."""
        self.model(model).published(predicted, low, high)

    def observe_sample(self, rt: Any, pred: Any, measured: float, result: Any) -> None:
        """Record a learned sample from a ``ModelRuntime``; ``pred`` is None during warm-up."""
        mm = self.model(rt.name)
        learner = rt.learner
        mm.learned(result.steps, learner.learning_rate, result.grad_norm)
        if pred is None:
            return
        mm.drift_active(rt.drift.active)
        if mm.outcome(measured, pred.value):
            guard = rt.guard
            mm.levels(weight_norm=learner.weight_norm(), coverage=rt.interval.coverage,
                      loss_short=guard.short if guard.seen else None,
                      loss_long=guard.long if guard.seen else None,
                      loss_drift=rt.drift.loss_score, input_shift=rt.drift.input_scores)

    def skipped(self, model: str, reason: str) -> None:
        """Count a target reading that formed no sample."""
        self.model(model).skipped(reason)

    def guard_tripped(self, model: str, reason: str) -> None:
        """Count one guard trip."""
        self.model(model).guard_tripped(reason)

    def drift_event(self, model: str, source: str) -> None:
        """Count one drift alarm; ``source`` is "loss" or an input name."""
        self.model(model).drift_event(source)

    def checkpoint_saved(self, model: str, checkpoint_id: str, at: float) -> None:
        """Record a checkpoint written at unix time ``at``."""
        self.model(model).checkpoint_saved(checkpoint_id, at)

    def checkpoint_failed(self, model: str) -> None:
        """Count one failed checkpoint write."""
        self.model(model).checkpoint_failed()

    def checkpoint_restored(self, model: str, checkpoint_id: str) -> None:
        """Count a checkpoint loaded into the model."""
        self.model(model).checkpoint_restored(checkpoint_id)

    def checkpoint_skipped_corrupt(self, model: str, total: int) -> None:
        """Copy the store's running total of checkpoints passed over as corrupt."""
        self.model(model).checkpoint_skipped_corrupt(total)

    def learning_rate_changed(self, model: str, learning_rate: float) -> None:
        """Record a learning rate set outside a step (reload, drift boost, guard cut)."""
        self.model(model).levels(learning_rate=learning_rate)

    def rolled_back(self, model: str, cause: str, checkpoint_id: str) -> None:
        """Count a return to an earlier checkpoint: operator, guard or drift."""
        self.model(model).rolled_back(cause, checkpoint_id)


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


# The endpoint lives in its own module; re-exported so callers import one place.
from daemon.metrics_http import MetricsServer, parse_listen, read_password, serve  # noqa: E402,F401

__all__ = ["Metrics", "ModelMetrics", "MetricsServer", "parse_listen", "read_password", "serve"]
