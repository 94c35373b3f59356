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

import platform
import time
from typing import Any, Callable, Iterable, Optional

from prometheus_client import CollectorRegistry, Counter, Gauge, Info

from daemon import __version__
from daemon.metric_figures import MessageFigures
from daemon.model_metrics import PREFIX, ModelMetrics, _codes, _ModelFamilies, _Total

# Per-message processing time runs from ~20 us (a rejected reading) to tens of ms (a sample
# with several SGD steps on a slow ARM box); buckets are a 1-2-5 series over that span.
PROCESSING_BUCKETS = (2e-5, 5e-5, 1e-4, 2e-4, 5e-4, 1e-3, 2e-3, 5e-3, 1e-2, 2e-2, 5e-2)
RELOAD_RESULTS = ("applied", "invalid", "partial")


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


# The endpoint lives in its own module; re-exported so callers import one place.
from daemon.metrics_http import MetricsServer, parse_listen, read_password, serve  # noqa: E402,F401

__all__ = ["Metrics", "ModelMetrics", "MetricsServer", "parse_listen", "read_password", "serve"]
