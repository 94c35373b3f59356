"""Prometheus metrics: one private registry per daemon, updates cheap enough for every message.

Why it looks like this: the worker handles up to ~10k readings/s, so every label lookup is done
once, when a model is registered, and the hot path only touches pre-bound children. Labels carry
config names (model, input) and our own short codes (reason, cause, result), never topics or
reading values. Each ``Metrics`` builds its own ``CollectorRegistry`` so tests and replay never
share state with a running daemon.

Who calls what (all from the worker thread unless marked *any thread*)::

    metrics = Metrics(node="station-7", queue_capacity=10000)
    mm = metrics.register_model("bearing_temp", "4-32x32-1 tanh", ["speed", "current"],
                                task="regression", coverage=0.9)
    metrics.message_received()            # any thread: every message taken from the broker
    metrics.inbound_dropped()             # any thread: inbound queue full (also counted received)
    metrics.message_rejected("undecodable")
    metrics.queue_depth(n); metrics.observe_processing(seconds)
    metrics.broker_connected(True); metrics.broker_reconnected(); metrics.publish_dropped()
    metrics.config_reloaded("applied")   # applied | invalid | partial
    mm.published(predicted, low, high)   # every prediction sent, predict-only ticks included
    mm.outcome(measured, predicted, loss, low, high)   # target known: error statistics
    mm.trained(steps, learning_rate, weight_norm, gradient_norm)
    mm.skipped("stale_input"); mm.guard_tripped("non_finite")
    mm.loss_drift(score); mm.loss_drift_event(); mm.input_shift("speed", score)
    mm.input_shift_event("speed"); mm.drift_active(True)
    mm.checkpoint_saved(checkpoint_id, at); mm.checkpoint_failed()
    mm.checkpoint_restored(checkpoint_id); mm.checkpoint_skipped_corrupt()
    mm.rolled_back("operator", checkpoint_id)   # operator | guard | drift
    server = serve(settings.metrics, metrics.registry)   # None when listen is null

Scales the callers agree on: ``loss`` is the training loss of one sample (standardised target);
``loss_drift`` is the detector statistic divided by its alarm level (1.0 = alarm);
``input_shift`` is the recent-mean shift in reference spreads. Windowed statistics (RMSE,
residual percentiles, coverage, log-loss, accuracy) cover the last ``residual_window`` outcomes
and are refreshed every ``refresh_every`` outcomes to keep the per-sample cost low.
"""
from __future__ import annotations

import base64
import hmac
import math
import os
import platform
import re
import socket
import ssl
import stat
import threading
import time
from dataclasses import dataclass
from typing import Any, Callable, Iterable, Optional
from wsgiref.simple_server import WSGIRequestHandler, WSGIServer, make_server

import numpy as np
from prometheus_client import (CollectorRegistry, Counter, Gauge, Histogram, Info,
                               make_wsgi_app, start_http_server)
from prometheus_client.exposition import ThreadingWSGIServer
from prometheus_client.parser import text_string_to_metric_families

from daemon import __version__
from daemon.errors import ConfigError, EdgepropError
from daemon.settings import MetricsSettings

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
            if key == code:
                cache[code] = hit
        return hit
    return child


class Metrics:
    """Every edgeprop metric, on a registry of its own."""

    def __init__(self, registry: Optional[CollectorRegistry] = None, node: str = "edgeprop",
                 queue_capacity: int = 0, residual_window: int = 500, refresh_every: int = 32,
                 loss_short_span: int = 50, loss_long_span: int = 1000,
                 clock: Callable[[], float] = time.time) -> None:
        self.registry = registry if registry is not None else CollectorRegistry()
        r = self.registry
        self._stats_args = (residual_window, refresh_every, loss_short_span, loss_long_span)
        self._models: dict[str, ModelMetrics] = {}
        self.received = Counter(PREFIX + "messages_received", "Messages taken from the broker.",
                                registry=r)
        self.rejected = Counter(PREFIX + "messages_rejected",
                                "Messages dropped as unusable, by reason.", ["reason"], registry=r)
        self._rejected = _codes(self.rejected)
        self.queue = Gauge(PREFIX + "inbound_queue_depth", "Readings waiting for the worker.",
                           registry=r)
        Gauge(PREFIX + "inbound_queue_capacity", "Size of the inbound queue.",
              registry=r).set(queue_capacity)
        self.dropped = Counter(PREFIX + "inbound_dropped",
                               "Messages dropped because the inbound queue was full.", registry=r)
        self.processing = Histogram(PREFIX + "message_processing_seconds",
                                    "Worker time per message, decode to metrics.",
                                    buckets=PROCESSING_BUCKETS, registry=r)
        self.connected = Gauge(PREFIX + "broker_connected", "1 while the MQTT session is up.",
                               registry=r)
        self.reconnects = Counter(PREFIX + "broker_reconnects",
                                  "Successful reconnections to the broker.", registry=r)
        self.pub_dropped = Counter(PREFIX + "publish_dropped",
                                   "Outgoing messages dropped (outbound bound reached).",
                                   registry=r)
        reloads = Counter(PREFIX + "config_reloads", "Configuration reloads, by result.",
                          ["result"], registry=r)
        self._reloads = {res: reloads.labels(res) for res in RELOAD_RESULTS}
        Gauge(PREFIX + "start_time_seconds", "Unix time the daemon started.",
              registry=r).set(clock())
        Info(PREFIX + "build", "Version of edgeprop and Python; node identity.",
             registry=r).info({"version": __version__, "python": platform.python_version(),
                               "node": node})
        self._model_families = _ModelFamilies(r)

    def register_model(self, name: str, architecture: str, input_names: Iterable[str],
                       task: str = "regression", coverage: Optional[float] = None
                       ) -> "ModelMetrics":
        """Create and cache every labelled child for one model; call once per model."""
        if name in self._models:
            raise ValueError(f"model {name!r} is already registered with the metrics")
        mm = ModelMetrics(self._model_families, name, architecture, list(input_names), task,
                          coverage, *self._stats_args)
        self._models[name] = mm
        return mm

    def model(self, name: str) -> "ModelMetrics":
        """Return the metrics of a registered model."""
        try:
            return self._models[name]
        except KeyError:
            raise ValueError(f"no metrics for model {name!r}; registered: "
                             f"{sorted(self._models)}") from None

    def message_received(self, n: int = 1) -> None:
        """Count messages taken from the broker (any thread)."""
        self.received.inc(n)

    def message_rejected(self, reason: str) -> None:
        """Count one unusable message under a short reason code."""
        self._rejected(reason).inc()

    def inbound_dropped(self) -> None:
        """Count one message lost to a full inbound queue (any thread)."""
        self.dropped.inc()

    def queue_depth(self, depth: int) -> None:
        """Record how many readings wait in the inbound queue."""
        self.queue.set(depth)

    def observe_processing(self, seconds: float) -> None:
        """Record the worker time spent on one message."""
        self.processing.observe(seconds)

    def broker_connected(self, up: bool) -> None:
        """Record whether the broker session is up."""
        self.connected.set(1 if up else 0)

    def broker_reconnected(self) -> None:
        """Count one reconnection after a lost session."""
        self.reconnects.inc()

    def publish_dropped(self) -> None:
        """Count one outgoing message that was not sent."""
        self.pub_dropped.inc()

    def config_reloaded(self, result: str) -> None:
        """Count one reload: applied, invalid (nothing changed) or partial (some refused)."""
        child = self._reloads.get(result)
        if child is None:
            raise ValueError(f"reload result {result!r}; allowed: {', '.join(RELOAD_RESULTS)}")
        child.inc()


class _ModelFamilies:
    """The metric families labelled by model, shared by every ``ModelMetrics``."""

    def __init__(self, r: CollectorRegistry) -> None:
        def g(name: str, doc: str, *labels: str) -> Gauge:
            return Gauge(PREFIX + name, doc, ["model", *labels], registry=r)

        def c(name: str, doc: str, *labels: str) -> Counter:
            return Counter(PREFIX + name, doc, ["model", *labels], registry=r)

        self.samples = c("samples", "Target readings scored and added to the window.")
        self.steps = c("training_steps", "SGD steps taken.")
        self.skipped = c("samples_skipped", "Target readings that formed no sample.", "reason")
        self.published = c("predictions_published", "Predictions published.")
        self.loss = g("prequential_loss", "Test-then-train loss, moving average.", "window")
        self.rmse = g("rmse", "Root mean squared residual over recent samples, target units.")
        self.log_loss = g("log_loss", "Mean logistic loss over recent samples (binary models).")
        self.accuracy = g("accuracy_ratio", "Share of recent samples classed right (binary).")
        # A "quantile" label is reserved for summaries (promtool says so), hence percentile.
        self.percentile = g("residual_percentile", "Percentile of recent residuals, target units.",
                            "percentile")
        self.coverage = g("interval_coverage_ratio", "Share of recent readings inside the band.")
        self.coverage_goal = g("interval_coverage_target_ratio", "Coverage the band aims for.")
        self.lr = g("learning_rate", "Learning rate in force.")
        self.wnorm = g("weight_norm", "Euclidean norm of all weights.")
        self.gnorm = g("gradient_norm", "Euclidean norm of the last gradient, before clipping.")
        self.loss_drift = g("loss_drift_score", "Loss drift statistic over its alarm level.")
        self.loss_events = c("loss_drift_events", "Drift alarms on the loss stream.")
        self.shift = g("input_shift_score", "Input mean shift, in reference spreads.", "input")
        self.shift_events = c("input_shift_events", "Shift alarms on an input.", "input")
        self.drift = g("drift_active", "1 while the published drift flag is up.")
        self.ckpt_time = g("checkpoint_last_success_timestamp_seconds",
                           "Unix time of the last checkpoint written by this process; 0: none.")
        self.ckpt_fail = c("checkpoint_failures", "Checkpoint writes that failed.")
        self.ckpt_restore = c("checkpoint_restores", "Checkpoints loaded into the model.")
        self.ckpt_corrupt = c("checkpoint_skipped_corrupt", "Checkpoints skipped as corrupt.")
        self.rollbacks = c("rollbacks", "Returns to an earlier checkpoint, by cause.", "cause")
        self.guard = c("guard_trips", "Guard trips (non-finite or runaway loss).", "reason")
        self.last = {k: g("last_" + k, f"Latest {k.replace('_', ' ')}, target units.")
                     for k in ("measured", "predicted", "residual", "interval_low",
                               "interval_high")}
        self.info = Info(PREFIX + "model", "Checkpoint in service and network shape.",
                         ["model"], registry=r)


class ModelMetrics:
    """Pre-bound metric children and windowed error statistics for one model."""

    def __init__(self, f: _ModelFamilies, name: str, architecture: str, inputs: list[str],
                 task: str, coverage: Optional[float], window: int, refresh_every: int,
                 short_span: int, long_span: int) -> None:
        if task not in ("regression", "binary"):
            raise ValueError(f"task {task!r}; allowed: regression, binary")
        self.name, self.task = name, task
        b = (name,)
        self._samples, self._steps = f.samples.labels(*b), f.steps.labels(*b)
        self._published = f.published.labels(*b)
        self._skipped, self._guard = _codes(f.skipped, name), _codes(f.guard, name)
        self._loss = (f.loss.labels(name, "short"), f.loss.labels(name, "long"))
        if task == "regression":
            self._rmse = f.rmse.labels(*b)
            self._percentiles = [f.percentile.labels(name, str(q)) for q in RESIDUAL_PERCENTILES]
        else:
            self._log_loss, self._accuracy = f.log_loss.labels(*b), f.accuracy.labels(*b)
        self._coverage = f.coverage.labels(*b)
        if coverage is not None:
            f.coverage_goal.labels(*b).set(coverage)
        self._lr, self._wnorm, self._gnorm = (m.labels(*b) for m in (f.lr, f.wnorm, f.gnorm))
        self._loss_drift, self._loss_events = f.loss_drift.labels(*b), f.loss_events.labels(*b)
        self._shift = {i: f.shift.labels(name, i) for i in inputs}
        self._shift_events = {i: f.shift_events.labels(name, i) for i in inputs}
        self._drift = f.drift.labels(*b)
        self._ckpt_time = f.ckpt_time.labels(*b)
        self._ckpt_fail, self._ckpt_restore, self._ckpt_corrupt = (
            m.labels(*b) for m in (f.ckpt_fail, f.ckpt_restore, f.ckpt_corrupt))
        self._rollbacks = {c: f.rollbacks.labels(name, c) for c in ROLLBACK_CAUSES}
        self._last = {k: m.labels(*b) for k, m in f.last.items()}
        self._info, self._arch = f.info.labels(*b), architecture
        for child in self._unknown_until_set():
            child.set(math.nan)              # a gap on the chart, not a false zero
        self._set_info("none")
        self._stats = _WindowStats(task, window, refresh_every, short_span, long_span)

    def __repr__(self) -> str:
        return f"ModelMetrics({self.name!r}, task={self.task!r})"

    def _unknown_until_set(self) -> list[Any]:
        windowed = ([self._rmse, *self._percentiles] if self.task == "regression"
                    else [self._log_loss, self._accuracy])
        return [*self._loss, *windowed, self._coverage, self._lr, self._wnorm, self._gnorm,
                *self._last.values()]

    def _set_info(self, checkpoint: str) -> None:
        self._info.info({"checkpoint": checkpoint, "architecture": self._arch, "task": self.task})

    def published(self, predicted: float, low: Optional[float], high: Optional[float]) -> None:
        """Record one published prediction and its band."""
        self._published.inc()
        self._last["predicted"].set(predicted)
        if low is not None and high is not None:
            self._last["interval_low"].set(low)
            self._last["interval_high"].set(high)

    def outcome(self, measured: float, predicted: float, loss: float,
                low: Optional[float] = None, high: Optional[float] = None) -> None:
        """Record a scored target reading: counts, latest values, windowed error statistics."""
        self._samples.inc()
        self._last["measured"].set(measured)
        self._last["residual"].set(measured - predicted)
        inside = None if low is None or high is None else low <= measured <= high
        if self._stats.add(measured, predicted, loss, inside):
            self.flush()

    def flush(self) -> None:
        """Recompute the windowed statistics now (normally done every ``refresh_every``)."""
        st = self._stats
        st.pending = 0
        self._loss[0].set(st.short)
        self._loss[1].set(st.long)
        if st.count:
            if self.task == "regression":
                rmse, ps = st.regression()
                self._rmse.set(rmse)
                for child, value in zip(self._percentiles, ps):
                    child.set(value)
            else:
                log_loss, accuracy = st.binary()
                self._log_loss.set(log_loss)
                self._accuracy.set(accuracy)
        if st.inside_count:
            self._coverage.set(st.coverage())

    def trained(self, steps: int, learning_rate: float, weight_norm: float,
                gradient_norm: float) -> None:
        """Record SGD steps just taken and the state they left."""
        self._steps.inc(steps)
        self._lr.set(learning_rate)
        self._wnorm.set(weight_norm)
        self._gnorm.set(gradient_norm)

    def learning_rate(self, value: float) -> None:
        """Record a learning rate change made outside a step (reload, drift boost, guard)."""
        self._lr.set(value)

    def skipped(self, reason: str) -> None:
        """Count a target reading that formed no sample (e.g. stale_input)."""
        self._skipped(reason).inc()

    def guard_tripped(self, reason: str) -> None:
        """Count one guard trip (e.g. non_finite, blowup)."""
        self._guard(reason).inc()

    def loss_drift(self, score: float) -> None:
        """Record the loss detector statistic as a fraction of its alarm level."""
        self._loss_drift.set(score)

    def loss_drift_event(self) -> None:
        """Count one drift alarm on the loss stream."""
        self._loss_events.inc()

    def input_shift(self, input_name: str, score: float) -> None:
        """Record the mean shift of one input in reference spreads."""
        self._input(self._shift, input_name).set(score)

    def input_shift_event(self, input_name: str) -> None:
        """Count one shift alarm on an input."""
        self._input(self._shift_events, input_name).inc()

    def _input(self, children: dict[str, Any], input_name: str) -> Any:
        child = children.get(input_name)
        if child is None:
            raise ValueError(f"model {self.name!r} has no input {input_name!r}; "
                             f"inputs: {sorted(children)}")
        return child

    def drift_active(self, active: bool) -> None:
        """Record whether the published drift flag is up."""
        self._drift.set(1 if active else 0)

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

    def checkpoint_skipped_corrupt(self) -> None:
        """Count a checkpoint passed over because it failed its checks."""
        self._ckpt_corrupt.inc()

    def rolled_back(self, cause: str, checkpoint_id: str) -> None:
        """Count a return to an earlier checkpoint by cause: operator, guard or drift."""
        child = self._rollbacks.get(cause)
        if child is None:
            raise ValueError(f"rollback cause {cause!r}; allowed: {', '.join(ROLLBACK_CAUSES)}")
        child.inc()
        self._set_info(checkpoint_id)


class _WindowStats:
    """Ring buffers and loss averages behind the windowed gauges (worker thread only)."""

    def __init__(self, task: str, window: int, refresh_every: int, short_span: int,
                 long_span: int) -> None:
        if window < 1 or refresh_every < 1 or short_span < 1 or long_span < 1:
            raise ValueError("residual_window, refresh_every and loss spans must be >= 1")
        self.is_binary = task == "binary"
        self.err = np.zeros(window)          # residuals, or per-sample log-loss when binary
        self.hit = np.zeros(window)          # binary: 1 when classed right
        self.inside = np.zeros(window)
        self.count = self.pos = self.inside_count = self.inside_pos = 0
        self.every = refresh_every
        self.pending = refresh_every - 1     # so the first outcome refreshes the gauges
        # Exponential moving averages with weight 1/span: common practice, no source.
        self.a_short, self.a_long = 1.0 / short_span, 1.0 / long_span
        self.short = self.long = float("nan")

    def add(self, measured: float, predicted: float, loss: float,
            inside: Optional[bool]) -> bool:
        """Take one outcome; return True when the gauges are due for a refresh."""
        self.pending += 1
        n = self.err.size
        if self.is_binary:
            # Probability clipped as scikit-learn's log_loss does (float64 eps).
            p = min(max(predicted, 2.220446049250313e-16), 1 - 2.220446049250313e-16)
            e = -math.log(p) if measured >= 0.5 else -math.log1p(-p)
            self.hit[self.pos] = float((predicted >= 0.5) == (measured >= 0.5))
        else:
            e = measured - predicted
        if math.isfinite(e):                 # a non-finite step is the guard's business
            self.err[self.pos] = e
            self.pos = (self.pos + 1) % n
            self.count = min(self.count + 1, n)
        if inside is not None:
            self.inside[self.inside_pos] = 1.0 if inside else 0.0
            self.inside_pos = (self.inside_pos + 1) % n
            self.inside_count = min(self.inside_count + 1, n)
        if math.isfinite(loss):
            if self.short != self.short:     # the first finite loss seeds both averages
                self.short = self.long = float(loss)
            else:
                self.short += self.a_short * (loss - self.short)
                self.long += self.a_long * (loss - self.long)
        return self.pending >= self.every    # first outcome, then every refresh_every

    def regression(self) -> tuple[float, list[float]]:
        """RMSE and residual percentiles over the filled part of the window."""
        r = self.err[:self.count]
        return float(np.sqrt(np.mean(r * r))), np.percentile(r, RESIDUAL_PERCENTILES).tolist()

    def binary(self) -> tuple[float, float]:
        """Mean log-loss and accuracy over the filled part of the window."""
        return float(np.mean(self.err[:self.count])), float(np.mean(self.hit[:self.count]))

    def coverage(self) -> float:
        """Share of recent readings that fell inside their band."""
        return float(np.mean(self.inside[:self.inside_count]))


# --- HTTP endpoint ----------------------------------------------------------------------------

def parse_listen(listen: str) -> tuple[str, int]:
    """Split ``HOST:PORT`` (IPv6 as ``[::1]:9740``) into host and port."""
    m = re.fullmatch(r"\[([0-9A-Fa-f:.%a-zA-Z]+)\]:(\d{1,5})|([^:\[\]\s]+):(\d{1,5})", listen)
    port = int(m.group(2) or m.group(4)) if m else -1
    if not m or port > 65535:
        raise ConfigError([f"metrics.listen: {listen!r} is not HOST:PORT (port 0-65535; IPv6 "
                           "as [::1]:9740; use null to turn the endpoint off)"])
    return m.group(1) or m.group(3), port


@dataclass
class MetricsServer:
    """A running metrics endpoint; ``close()`` stops it and frees the port."""

    httpd: WSGIServer
    thread: threading.Thread
    tls: bool

    @property
    def host(self) -> str:
        return str(self.httpd.server_address[0])

    @property
    def port(self) -> int:
        return int(self.httpd.server_address[1])

    @property
    def url(self) -> str:
        host = f"[{self.host}]" if ":" in self.host else self.host
        return f"{'https' if self.tls else 'http'}://{host}:{self.port}/metrics"

    def close(self) -> None:
        """Stop serving and close the listening socket."""
        self.httpd.shutdown()
        self.httpd.server_close()
        self.thread.join(timeout=5)

    shutdown = close


def serve(settings: MetricsSettings, registry: CollectorRegistry) -> Optional[MetricsServer]:
    """Start the scrape endpoint in a daemon thread; None when ``listen`` is null."""
    if settings.listen is None:
        return None
    host, port = parse_listen(settings.listen)
    tls = settings.tls
    if tls is not None:
        _tls_context(tls.cert_file, tls.key_file)        # fail early, with a clear message
    try:
        if settings.basic_auth is None:
            # prometheus-client's own server, TLS included (0.26: certfile=/keyfile=).
            httpd, thread = start_http_server(port, host, registry,
                                              certfile=tls.cert_file if tls else None,
                                              keyfile=tls.key_file if tls else None)
        else:
            password = read_password(settings.basic_auth.password_file)
            app = _basic_auth(make_wsgi_app(registry), settings.basic_auth.username, password)
            httpd, thread = _start_wsgi(host, port, app, tls)
    except OSError as e:
        raise EdgepropError(f"metrics.listen {settings.listen!r}: cannot listen ({e}); "
                            "choose a free port or set metrics.listen: null") from e
    return MetricsServer(httpd, thread, tls is not None)


def read_password(path: str) -> str:
    """Read a one-line password from a file that only its owner may read."""
    key = "metrics.basic_auth.password_file"
    try:
        if os.stat(path).st_mode & (stat.S_IRWXG | stat.S_IRWXO):
            raise ConfigError([f"{key}: {path} is readable by group/others; chmod 600 it"])
        with open(path, encoding="utf-8") as f:
            password = f.readline().rstrip("\r\n")
    except (OSError, UnicodeDecodeError) as e:
        raise ConfigError([f"{key}: cannot read {path}: {e}"]) from e
    if not password:
        raise ConfigError([f"{key}: {path} is empty; put the password on its first line"])
    return password


def _tls_context(cert_file: str, key_file: str) -> ssl.SSLContext:
    ctx = ssl.SSLContext(ssl.PROTOCOL_TLS_SERVER)
    try:
        ctx.load_cert_chain(cert_file, key_file)
    except (OSError, ssl.SSLError) as e:
        raise ConfigError([f"metrics.tls: cannot load cert_file {cert_file} / key_file "
                           f"{key_file}: {e}"]) from e
    return ctx


def _basic_auth(app: Callable, username: str, password: str) -> Callable:
    """Wrap a WSGI app so only requests with the right Basic credentials reach it."""
    user_b, pass_b = username.encode(), password.encode()

    def guarded(environ: dict, start_response: Callable) -> Iterable[bytes]:
        scheme, _, token = environ.get("HTTP_AUTHORIZATION", "").partition(" ")
        try:
            given_user, _, given_pass = base64.b64decode(token.strip(), validate=True
                                                         ).partition(b":")
        except ValueError:
            given_user = given_pass = b""
        user_ok = hmac.compare_digest(given_user, user_b)
        pass_ok = hmac.compare_digest(given_pass, pass_b)     # both compared, always
        if scheme.lower() == "basic" and user_ok and pass_ok:
            return app(environ, start_response)
        start_response("401 Unauthorized",
                       [("WWW-Authenticate", 'Basic realm="edgeprop metrics", charset="UTF-8"'),
                        ("Content-Type", "text/plain; charset=utf-8")])
        return [b"credentials required\n"]
    return guarded


class _QuietHandler(WSGIRequestHandler):
    timeout = 10                             # a stalled client cannot hold a thread forever

    def log_message(self, format: str, *args: Any) -> None:
        pass                                 # scrapes every 15 s would flood the journal


def _start_wsgi(host: str, port: int, app: Callable, tls: Any
                ) -> tuple[WSGIServer, threading.Thread]:
    """Serve ``app`` from wsgiref in a daemon thread (the basic-auth path)."""
    family = socket.getaddrinfo(host, port, type=socket.SOCK_STREAM,
                                flags=socket.AI_PASSIVE)[0][0]
    server_class = type("_Server", (ThreadingWSGIServer,), {"address_family": family})
    httpd = make_server(host, port, app, server_class, handler_class=_QuietHandler)
    if tls is not None:
        ctx = _tls_context(tls.cert_file, tls.key_file)
        httpd.socket = ctx.wrap_socket(httpd.socket, server_side=True)
    thread = threading.Thread(target=httpd.serve_forever, name="metrics-http", daemon=True)
    thread.start()
    return httpd, thread


# --- names used by the deploy/ files (for tests that hold them against a live scrape) -------

def metric_names_in(promql: str) -> set[str]:
    """Metric names an expression reads, ignoring quoted label values."""
    bare = re.sub(r'"(?:[^"\\]|\\.)*"|\'(?:[^\'\\]|\\.)*\'', '""', promql)
    return set(re.findall(r"(?<![A-Za-z0-9_:])(" + PREFIX + r"[a-z0-9_]+)", bare))


def dashboard_exprs(dashboard: dict) -> list[str]:
    """Every PromQL string in a dashboard model: panel targets and template queries."""
    found: list[str] = []

    def walk(node: Any, key: str = "") -> None:
        if isinstance(node, dict):
            for k, v in node.items():
                walk(v, k)
        elif isinstance(node, list):
            for v in node:
                walk(v, key)
        elif isinstance(node, str) and key in ("expr", "query", "definition"):
            found.append(node)
    walk(dashboard)
    return found


def rule_exprs(rules: dict) -> list[str]:
    """Every ``expr`` in a Prometheus rule file (already parsed from YAML)."""
    return [r["expr"] for g in rules.get("groups", []) for r in g.get("rules", [])]


def scraped_names(text: str) -> set[str]:
    """Names of the samples present in a text-format scrape (``_total``, ``_bucket`` ...)."""
    return {s.name for fam in text_string_to_metric_families(text) for s in fam.samples}
