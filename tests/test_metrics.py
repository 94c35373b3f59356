"""Metrics: values reach the scrape, labels stay config names, the endpoint guards itself."""
from __future__ import annotations

import base64
import math
import os
import platform
import socket
import ssl
import statistics
import subprocess
import time
import urllib.error
import urllib.request

import numpy as np
import pytest
from prometheus_client import REGISTRY, generate_latest
from prometheus_client.parser import text_string_to_metric_families
from sklearn.metrics import accuracy_score, log_loss, mean_squared_error

from daemon.errors import ConfigError, EdgepropError
from daemon.metrics import Metrics, parse_listen, serve
from daemon.metrics_http import RELOAD_CHECK_S
from daemon.runtime import ModelRuntime
from daemon.settings import (InputSettings, MetricsAuth, MetricsSettings, MetricsTls,
                             ModelSettings, NetSettings, SourceSettings, TrainingSettings)
from tooling import require_tool

TOPICS = ("site/p1/bearing_temp", "site/p1/speed", "site/p1/current")


def samples(metrics: Metrics) -> dict[tuple[str, frozenset], float]:
    """Scrape a registry the way Prometheus would and index the samples by name and labels."""
    text = generate_latest(metrics.registry).decode()
    return {(s.name, frozenset(s.labels.items())): s.value
            for fam in text_string_to_metric_families(text) for s in fam.samples}


def value(scrape: dict, name: str, **labels: str) -> float:
    return scrape[(name, frozenset(labels.items()))]


@pytest.fixture()
def pump() -> Metrics:
    m = Metrics(node="station-7", queue_capacity=100, residual_window=8, refresh_every=4,
                clock=lambda: 1_733_000_000.0)
    m.register_model("bearing_temp", "4-32x32-1 tanh", ["speed", "current"], coverage=0.9)
    return m


def test_worker_calls_reach_the_scrape(pump: Metrics) -> None:
    for _ in range(3):
        pump.observe_message(3e-4)
    pump.rejected("undecodable", "bearing_temp")
    pump.transport(queue_depth=7, queue_dropped=2, connected=True, reconnects=1,
                   publish_dropped=0)
    pump.reload("applied")
    pump.observe_published("bearing_temp", 61.0, 59.5, 62.5)
    mm = pump.model("bearing_temp")
    mm.learned(2, 0.01, 0.25)
    mm.outcome(61.9, 61.0)
    mm.levels(weight_norm=3.5, coverage=0.88, loss_short=0.3, loss_long=0.2, loss_drift=0.7,
              input_shift={"speed": 1.5})
    mm.drift_active(True)
    pump.skipped("bearing_temp", "stale")
    pump.drift_event("bearing_temp", "current")
    pump.drift_event("bearing_temp", "loss")
    pump.checkpoint_saved("bearing_temp", "20261201T101500Z-000042", 1_733_000_100.0)
    pump.checkpoint_failed("bearing_temp")
    pump.checkpoint_restored("bearing_temp", "20261201T101500Z-000042")
    pump.checkpoint_skipped_corrupt("bearing_temp", 1)
    pump.rolled_back("bearing_temp", "guard", "20261201T100000Z-000041")
    pump.guard_tripped("bearing_temp", "loss_blowup")
    s = samples(pump)
    assert value(s, "edgeprop_messages_received_total") == 3
    assert value(s, "edgeprop_message_processing_seconds_bucket", le="0.0005") == 3
    assert value(s, "edgeprop_message_processing_seconds_bucket", le="0.0002") == 0
    assert value(s, "edgeprop_messages_rejected_total", reason="undecodable") == 1
    assert value(s, "edgeprop_inbound_queue_depth") == 7
    assert value(s, "edgeprop_inbound_queue_capacity") == 100
    assert value(s, "edgeprop_inbound_dropped_total") == 2
    assert value(s, "edgeprop_broker_connected") == 1
    assert value(s, "edgeprop_broker_reconnects_total") == 1
    assert value(s, "edgeprop_publish_dropped_total") == 0
    assert value(s, "edgeprop_config_reloads_total", result="applied") == 1
    assert value(s, "edgeprop_config_reloads_total", result="invalid") == 0
    assert value(s, "edgeprop_start_time_seconds") == 1_733_000_000.0
    b = dict(model="bearing_temp")
    assert value(s, "edgeprop_predictions_published_total", **b) == 1
    assert value(s, "edgeprop_samples_total", **b) == 1
    assert value(s, "edgeprop_training_steps_total", **b) == 2
    assert value(s, "edgeprop_samples_skipped_total", reason="stale", **b) == 1
    assert value(s, "edgeprop_last_measured", **b) == 61.9
    assert value(s, "edgeprop_last_predicted", **b) == 61.0
    assert value(s, "edgeprop_last_residual", **b) == pytest.approx(0.9)
    assert value(s, "edgeprop_last_interval_low", **b) == 59.5
    assert value(s, "edgeprop_last_interval_high", **b) == 62.5
    assert value(s, "edgeprop_learning_rate", **b) == 0.01
    assert value(s, "edgeprop_weight_norm", **b) == 3.5
    assert value(s, "edgeprop_gradient_norm", **b) == 0.25
    assert value(s, "edgeprop_prequential_loss", window="short", **b) == 0.3
    assert value(s, "edgeprop_prequential_loss", window="long", **b) == 0.2
    assert value(s, "edgeprop_input_shift_score", input="speed", **b) == 1.5
    assert value(s, "edgeprop_input_shift_events_total", input="current", **b) == 1
    assert value(s, "edgeprop_input_shift_events_total", input="speed", **b) == 0
    assert value(s, "edgeprop_loss_drift_score", **b) == 0.7
    assert value(s, "edgeprop_loss_drift_events_total", **b) == 1
    assert value(s, "edgeprop_drift_active", **b) == 1
    assert value(s, "edgeprop_checkpoint_last_success_timestamp_seconds", **b) == 1_733_000_100
    assert value(s, "edgeprop_checkpoint_failures_total", **b) == 1
    assert value(s, "edgeprop_checkpoint_restores_total", **b) == 1
    assert value(s, "edgeprop_checkpoint_skipped_corrupt_total", **b) == 1
    assert value(s, "edgeprop_rollbacks_total", cause="guard", **b) == 1
    assert value(s, "edgeprop_rollbacks_total", cause="operator", **b) == 0
    assert value(s, "edgeprop_guard_trips_total", reason="loss_blowup", **b) == 1
    assert value(s, "edgeprop_interval_coverage_ratio", **b) == 0.88
    assert value(s, "edgeprop_interval_coverage_target_ratio", **b) == 0.9
    assert value(s, "edgeprop_build_info", node="station-7", version="0.1.0",
                 python=platform.python_version()) == 1


def test_running_totals_become_counters(pump: Metrics) -> None:
    for dropped, reconnects in ((0, 0), (5, 1), (5, 1), (9, 3), (2, 0)):   # last: a new link
        pump.transport(queue_depth=0, queue_dropped=dropped, connected=False,
                       reconnects=reconnects, publish_dropped=0)
    for corrupt in (0, 2, 2, 3):
        pump.checkpoint_skipped_corrupt("bearing_temp", corrupt)
    s = samples(pump)
    assert value(s, "edgeprop_inbound_dropped_total") == 9 + 2
    assert value(s, "edgeprop_broker_reconnects_total") == 3
    assert value(s, "edgeprop_broker_connected") == 0
    assert value(s, "edgeprop_checkpoint_skipped_corrupt_total", model="bearing_temp") == 3


def test_reload_updates_rate_and_band_target(pump: Metrics) -> None:
    pump.learning_rate_changed("bearing_temp", 0.003)
    pump.model("bearing_temp").levels(coverage_target=0.95)
    s = samples(pump)
    assert value(s, "edgeprop_learning_rate", model="bearing_temp") == 0.003
    assert value(s, "edgeprop_interval_coverage_target_ratio", model="bearing_temp") == 0.95


def test_unknown_values_are_gaps_not_zeros(pump: Metrics) -> None:
    s = samples(pump)
    for name in ("edgeprop_rmse", "edgeprop_learning_rate", "edgeprop_last_predicted",
                 "edgeprop_interval_coverage_ratio", "edgeprop_weight_norm"):
        assert math.isnan(value(s, name, model="bearing_temp")), name
    assert math.isnan(value(s, "edgeprop_prequential_loss", model="bearing_temp", window="long"))


def test_observe_sample_reads_a_real_model_runtime() -> None:
    settings = ModelSettings(
        "bearing_temp", SourceSettings("site/p1/bearing_temp"),
        (InputSettings("speed", "site/p1/speed"), InputSettings("current", "site/p1/current")),
        training=TrainingSettings(warmup_samples=5, batch_size=4), net=NetSettings(hidden=(8,)))
    rt = ModelRuntime(settings, "edgeprop/station-7/bearing_temp", None)
    m = Metrics(refresh_every=1)
    m.register_model(rt.name, rt.learner.net.architecture, ["speed", "current"])
    rng = np.random.default_rng(5)
    for _ in range(40):                        # the engine's order: predict, learn, watch
        x = rng.normal([1450.0, 12.0], [30.0, 0.5])
        y = float(40.0 + 0.01 * x[0] + 0.8 * x[1] + rng.normal(0, 0.2))
        pred = rt.learner.predict(x) if rt.learner.warmed_up else None
        result = rt.learner.learn(x, y, pred)
        if pred is not None:
            rt.interval.update(y, pred.value)
            rt.drift.update(result.loss, x[rt.lag0])
            rt.guard.observe(result.loss)
        m.observe_sample(rt, pred, y, result)
    s = samples(m)
    b = dict(model="bearing_temp")
    assert value(s, "edgeprop_samples_total", **b) == rt.learner.samples == 40
    assert value(s, "edgeprop_training_steps_total", **b) == rt.learner.counters.steps
    assert value(s, "edgeprop_learning_rate", **b) == rt.learner.learning_rate
    assert value(s, "edgeprop_weight_norm", **b) == pytest.approx(rt.learner.weight_norm())
    assert value(s, "edgeprop_gradient_norm", **b) == pytest.approx(result.grad_norm)
    assert value(s, "edgeprop_prequential_loss", window="short", **b) == rt.guard.short
    assert value(s, "edgeprop_prequential_loss", window="long", **b) == rt.guard.long
    assert value(s, "edgeprop_last_measured", **b) == y
    assert value(s, "edgeprop_last_residual", **b) == pytest.approx(y - pred.value)
    assert value(s, "edgeprop_loss_drift_score", **b) == rt.drift.loss_score
    for name, score in rt.drift.input_scores.items():
        assert value(s, "edgeprop_input_shift_score", input=name, **b) == score
    cov = rt.interval.coverage
    assert (math.isnan(cov) and math.isnan(value(s, "edgeprop_interval_coverage_ratio", **b))
            or value(s, "edgeprop_interval_coverage_ratio", **b) == cov)


def test_windowed_regression_statistics_match_outside_formulas() -> None:
    rng = np.random.default_rng(3)
    m = Metrics(residual_window=50, refresh_every=1)
    mm = m.register_model("flow", "3-8-1 tanh", ["speed"])
    measured = rng.normal(40.0, 2.0, 80)
    predicted = measured + rng.normal(0.0, 0.5, 80)
    for y, p in zip(measured, predicted):
        mm.outcome(float(y), float(p))
    y, p = measured[-50:], predicted[-50:]           # only the last window counts
    s = samples(m)
    # scikit-learn's mean_squared_error, square-rooted.
    assert value(s, "edgeprop_rmse", model="flow") == pytest.approx(
        math.sqrt(mean_squared_error(y, p)), rel=1e-12)
    # Python's statistics.quantiles, method="inclusive" (Hyndman & Fan type 7).
    cuts = statistics.quantiles((y - p).tolist(), n=100, method="inclusive")
    for pct in (5, 25, 50, 75, 95):
        assert value(s, "edgeprop_residual_percentile", model="flow",
                     percentile=str(pct)) == pytest.approx(cuts[pct - 1], rel=1e-9)


def test_linear_percentiles_equal_numpys_bit_for_bit() -> None:
    from daemon.metric_figures import linear_percentiles
    # numpy's np.percentile, default method "linear", is the reference (outside the project).
    rng = np.random.default_rng(11)
    ps = (0, 1, 5, 25, 50, 75, 95, 99, 100)
    for trial in range(3000):
        n = int(rng.integers(1, 600))
        scale = 10.0 ** rng.uniform(-8, 8)
        values = rng.normal(0.0, scale, n)
        if trial % 3 == 0:
            values = np.round(values / scale, 1) * scale      # many ties
        assert linear_percentiles(values, ps) == np.percentile(values, ps).tolist(), (trial, n)


def test_windowed_binary_statistics_match_scikit_learn() -> None:
    m = Metrics(residual_window=100, refresh_every=1)
    mm = m.register_model("seal_leak", "3-16-1 relu", ["flow"], task="binary")
    truth = [1, 0, 1, 1, 0, 0, 1, 0]
    prob = [0.9, 0.2, 0.4, 1.0, 0.0, 0.7, 0.0, 0.5]   # includes 0 and 1: clipping matters
    for y, p in zip(truth, prob):
        mm.outcome(float(y), p)
    s = samples(m)
    assert value(s, "edgeprop_log_loss", model="seal_leak") == pytest.approx(
        log_loss(truth, prob, labels=[0, 1]), rel=1e-9)
    assert value(s, "edgeprop_accuracy_ratio", model="seal_leak") == pytest.approx(
        accuracy_score(truth, [int(p >= 0.5) for p in prob]))
    assert ("edgeprop_rmse", frozenset({("model", "seal_leak")})) not in s


def test_windowed_gauges_refresh_on_the_cadence(pump: Metrics) -> None:
    mm = pump.model("bearing_temp")            # refresh_every=4
    assert mm.outcome(2.0, 0.0)                # the first outcome refreshes at once
    assert value(samples(pump), "edgeprop_rmse", model="bearing_temp") == 2.0
    assert not any(mm.outcome(4.0, 0.0) for _ in range(3))
    assert value(samples(pump), "edgeprop_rmse", model="bearing_temp") == 2.0
    assert mm.outcome(4.0, 0.0)
    assert value(samples(pump), "edgeprop_rmse", model="bearing_temp") == pytest.approx(
        math.sqrt((4 + 4 * 16) / 5))
    mm.outcome(float("nan"), 0.0)              # a non-finite residual is left out
    mm.outcome(float("inf"), 0.0)
    mm.outcome(0.0, 0.0)
    assert mm.outcome(0.0, 0.0)
    assert value(samples(pump), "edgeprop_rmse", model="bearing_temp") == pytest.approx(
        math.sqrt((4 + 4 * 16) / 7))


def test_labels_carry_names_never_topics_or_values(pump: Metrics) -> None:
    pump.rejected(TOPICS[1])                   # a caller mistake must not leak the topic
    pump.rejected("value 61.9")
    pump.skipped("bearing_temp", "site/p1/current")
    for i in range(40):                        # a flood of distinct codes folds into "other"
        pump.rejected(f"code_{i}")
    text = generate_latest(pump.registry).decode()
    values = {v for fam in text_string_to_metric_families(text) for smp in fam.samples
              for k, v in smp.labels.items() if k not in ("le", "python")}
    assert not any("/" in v or v in TOPICS or "61.9" in v for v in values)
    rejected = {dict(k[1])["reason"] for k in samples(pump)
                if k[0] == "edgeprop_messages_rejected_total"}
    assert "other" in rejected and len(rejected) <= 32


def test_model_info_keeps_one_series_per_model(pump: Metrics) -> None:
    pump.checkpoint_saved("bearing_temp", "20261201T101500Z-000042", 1.0)
    pump.checkpoint_saved("bearing_temp", "20261201T102000Z-000043", 2.0)
    infos = [dict(k[1]) for k in samples(pump) if k[0] == "edgeprop_model_info"]
    assert infos == [{"model": "bearing_temp", "checkpoint": "20261201T102000Z-000043",
                      "architecture": "4-32x32-1 tanh", "task": "regression"}]


def test_mistakes_name_what_is_allowed(pump: Metrics) -> None:
    with pytest.raises(ValueError, match="operator, guard, drift"):
        pump.rolled_back("bearing_temp", "whim", "x")
    with pytest.raises(ValueError, match="applied, invalid, partial"):
        pump.reload("maybe")
    with pytest.raises(ValueError, match="'current', 'speed'"):
        pump.drift_event("bearing_temp", "torque")
    with pytest.raises(ValueError, match="already registered"):
        pump.register_model("bearing_temp", "x", [])
    with pytest.raises(ValueError, match="registered: \\['bearing_temp'\\]"):
        pump.skipped("flow", "stale")
    with pytest.raises(ValueError, match="regression, binary"):
        pump.register_model("flow", "x", [], task="multiclass")


def test_each_metrics_object_has_its_own_registry() -> None:
    a, b = Metrics(), Metrics()
    a.observe_message(1e-4)
    assert value(samples(b), "edgeprop_messages_received_total") == 0
    assert b"edgeprop_" not in generate_latest(REGISTRY)


@pytest.mark.parametrize("text, host, port", [
    ("127.0.0.1:9740", "127.0.0.1", 9740), ("[::1]:0", "::1", 0),
    ("gateway.local:80", "gateway.local", 80)])
def test_parse_listen_accepts_host_port(text: str, host: str, port: int) -> None:
    assert parse_listen(text) == (host, port)


@pytest.mark.parametrize("text", ["9740", ":9740", "127.0.0.1:99999", "::1:9740", "a b:1"])
def test_parse_listen_names_the_key(text: str) -> None:
    with pytest.raises(ConfigError, match="metrics.listen"):
        parse_listen(text)


# --- the endpoint ---------------------------------------------------------------------------

def get(url: str, auth: tuple[str, str] | None = None, context: ssl.SSLContext | None = None
        ) -> tuple[int, str]:
    req = urllib.request.Request(url)
    if auth:
        req.add_header("Authorization",
                       "Basic " + base64.b64encode(":".join(auth).encode()).decode())
    try:
        with urllib.request.urlopen(req, timeout=5, context=context) as resp:
            return resp.status, resp.read().decode()
    except urllib.error.HTTPError as e:
        assert e.code != 401 or "Basic" in e.headers.get("WWW-Authenticate", "")
        return e.code, ""


def test_no_listen_means_no_server() -> None:
    assert serve(MetricsSettings(listen=None), Metrics().registry) is None


def test_default_binds_loopback_only(pump: Metrics) -> None:
    assert parse_listen(MetricsSettings().listen)[0] == "127.0.0.1"
    server = serve(MetricsSettings(listen="127.0.0.1:0"), pump.registry)
    try:
        assert server.host == "127.0.0.1" and server.port > 0
        status, body = get(server.url)
        assert status == 200 and "edgeprop_build_info{" in body
        other = _non_loopback_address()
        if other:                              # the same port on the LAN address is shut
            with pytest.raises(OSError):
                socket.create_connection((other, server.port), timeout=2).close()
    finally:
        server.close()


def _non_loopback_address() -> str | None:
    with socket.socket(socket.AF_INET, socket.SOCK_DGRAM) as s:
        try:
            s.connect(("192.0.2.1", 9))        # TEST-NET-1: no packet is sent for UDP connect
            addr = s.getsockname()[0]
        except OSError:
            return None
    return None if addr.startswith("127.") else addr


def test_ipv6_loopback(pump: Metrics) -> None:
    try:
        socket.socket(socket.AF_INET6).bind(("::1", 0))
    except OSError:
        pytest.skip("no IPv6 loopback on this machine")
    server = serve(MetricsSettings(listen="[::1]:0"), pump.registry)
    try:
        assert server.url.startswith("http://[::1]:")
        assert get(server.url)[0] == 200
    finally:
        server.close()


def test_busy_port_is_a_clear_error(pump: Metrics) -> None:
    first = serve(MetricsSettings(listen="127.0.0.1:0"), pump.registry)
    try:
        with pytest.raises(EdgepropError, match="metrics.listen.*cannot listen"):
            serve(MetricsSettings(listen=f"127.0.0.1:{first.port}"), pump.registry)
    finally:
        first.close()


@pytest.fixture()
def password_file(tmp_path) -> str:
    path = tmp_path / "scrape.pw"
    path.write_text("s3cret-pump\n")
    path.chmod(0o600)
    return str(path)


def test_basic_auth_wants_the_right_credentials(pump: Metrics, password_file: str) -> None:
    settings = MetricsSettings(listen="127.0.0.1:0",
                               basic_auth=MetricsAuth("prometheus", password_file))
    server = serve(settings, pump.registry)
    try:
        assert get(server.url)[0] == 401
        assert get(server.url, ("prometheus", "wrong"))[0] == 401
        assert get(server.url, ("grafana", "s3cret-pump"))[0] == 401
        assert get(server.url, ("prometheus", "s3cret-pump\n"))[0] == 401
        status, body = get(server.url, ("prometheus", "s3cret-pump"))
        assert status == 200 and "edgeprop_messages_received_total" in body
    finally:
        server.close()


def test_password_file_must_be_private_and_non_empty(pump: Metrics, tmp_path) -> None:
    loose = tmp_path / "loose.pw"
    loose.write_text("x\n")
    loose.chmod(0o644)
    empty = tmp_path / "empty.pw"
    empty.write_text("")
    empty.chmod(0o600)
    for path, why in ((loose, "group/others"), (empty, "empty"),
                      (tmp_path / "absent.pw", "cannot read")):
        with pytest.raises(ConfigError, match=f"metrics.basic_auth.password_file.*{why}"):
            serve(MetricsSettings("127.0.0.1:0", basic_auth=MetricsAuth("p", str(path))),
                  pump.registry)


@pytest.fixture(scope="module")
def self_signed(tmp_path_factory) -> tuple[str, str]:
    openssl = require_tool("openssl")
    d = tmp_path_factory.mktemp("tls")
    cert, key = str(d / "cert.pem"), str(d / "key.pem")
    subprocess.run([openssl, "req", "-x509", "-newkey", "ec", "-pkeyopt",
                    "ec_paramgen_curve:prime256v1", "-nodes", "-keyout", key, "-out", cert,
                    "-days", "2", "-subj", "/CN=edgeprop-test",
                    "-addext", "subjectAltName=IP:127.0.0.1"],
                   check=True, capture_output=True)
    return cert, key


@pytest.mark.parametrize("with_auth", [False, True])
def test_tls_serves_https_only(pump: Metrics, self_signed, password_file: str,
                               with_auth: bool) -> None:
    cert, key = self_signed
    auth = MetricsAuth("prometheus", password_file) if with_auth else None
    server = serve(MetricsSettings("127.0.0.1:0", MetricsTls(cert, key), auth), pump.registry)
    try:
        assert server.url.startswith("https://127.0.0.1:")
        trust = ssl.create_default_context(cafile=cert)
        status, body = get(server.url, ("prometheus", "s3cret-pump"), context=trust)
        assert status == 200 and "edgeprop_build_info" in body
        if with_auth:
            assert get(server.url, context=trust)[0] == 401
        with pytest.raises((urllib.error.URLError, ConnectionError, OSError)):
            get(server.url.replace("https://", "http://"))
    finally:
        server.close()


def test_unreadable_tls_files_name_the_key(pump: Metrics, tmp_path) -> None:
    bad = MetricsTls(str(tmp_path / "no-cert.pem"), str(tmp_path / "no-key.pem"))
    with pytest.raises(ConfigError, match="metrics.tls"):
        serve(MetricsSettings("127.0.0.1:0", tls=bad), pump.registry)


@pytest.mark.parametrize("with_auth", [False, True])
def test_silent_client_does_not_block_tls_scrapes(pump: Metrics, self_signed,
                                                  password_file: str, with_auth: bool) -> None:
    cert, key = self_signed
    auth = MetricsAuth("prometheus", password_file) if with_auth else None
    server = serve(MetricsSettings("127.0.0.1:0", MetricsTls(cert, key), auth), pump.registry)
    silent = socket.create_connection(("127.0.0.1", server.port), timeout=5)
    try:                                       # connects and never starts the handshake
        trust = ssl.create_default_context(cafile=cert)
        assert get(server.url, ("prometheus", "s3cret-pump"), context=trust)[0] == 200
    finally:
        silent.close()
        server.close()


@pytest.mark.parametrize("with_auth", [False, True])
def test_failed_requests_are_one_rate_limited_line_not_a_traceback_each(
        pump: Metrics, self_signed, password_file: str, with_auth: bool, capfd) -> None:
    """Plain HTTP to the TLS endpoint (a scrape job with the wrong scheme, or anyone on the
    network) made the standard library print a 20-line traceback per request to stderr."""
    cert, key = self_signed
    auth = MetricsAuth("prometheus", password_file) if with_auth else None
    lines: list[tuple[str, str, dict]] = []
    server = serve(MetricsSettings("127.0.0.1:0", MetricsTls(cert, key), auth), pump.registry,
                   log=lambda level, event, **fields: lines.append((level, event, fields)))
    try:
        for _ in range(20):
            with pytest.raises((urllib.error.URLError, ConnectionError, OSError)):
                get(server.url.replace("https://", "http://"))
        trust = ssl.create_default_context(cafile=cert)
        assert get(server.url, ("prometheus", "s3cret-pump"), context=trust)[0] == 200
        handler = server.httpd.handle_error
        wait_for = time.monotonic() + 5
        while handler.count < 20 and time.monotonic() < wait_for:   # handler threads finish
            time.sleep(0.02)
    finally:
        server.close()
    assert handler.count == 20
    assert [(level, event) for level, event, _ in lines] == [("warning", "metrics_request_failed")]
    assert "SSL" in lines[0][2]["error"] and lines[0][2]["client"] == "127.0.0.1"
    assert "Traceback" not in capfd.readouterr().err


def _self_signed_pair(directory, name: str) -> tuple[str, str]:
    openssl = require_tool("openssl")
    cert, key = str(directory / f"{name}.crt"), str(directory / f"{name}.key")
    subprocess.run([openssl, "req", "-x509", "-newkey", "ec", "-pkeyopt",
                    "ec_paramgen_curve:prime256v1", "-nodes", "-keyout", key, "-out", cert,
                    "-days", "2", "-subj", f"/CN={name}", "-addext", "subjectAltName=IP:127.0.0.1"],
                   check=True, capture_output=True)
    return cert, key


def _replace(path: str, source: str) -> None:
    """Write beside, then rename over: how a renewal should land (no half-read file)."""
    tmp = path + ".new"
    with open(source, "rb") as src, open(tmp, "wb") as dst:
        dst.write(src.read())
    os.chmod(tmp, 0o600)
    os.replace(tmp, path)


def test_renewed_certificate_and_rotated_password_are_served_without_a_restart(
        pump: Metrics, tmp_path, password_file: str) -> None:
    """Before, the endpoint served the certificate and checked the password it started
    with until restarted: a renewed certificate meant failed scrapes after the old expired."""
    old_cert, old_key = _self_signed_pair(tmp_path, "first")
    new_cert, new_key = _self_signed_pair(tmp_path, "renewed")
    cert, key = str(tmp_path / "live.crt"), str(tmp_path / "live.key")
    _replace(cert, old_cert)
    _replace(key, old_key)
    lines: list[tuple] = []
    server = serve(MetricsSettings("127.0.0.1:0", MetricsTls(cert, key),
                                   MetricsAuth("prometheus", password_file)),
                   pump.registry, log=lambda level, event, **f: lines.append((level, event, f)))
    trust_old = ssl.create_default_context(cafile=old_cert)
    trust_new = ssl.create_default_context(cafile=new_cert)
    try:
        assert get(server.url, ("prometheus", "s3cret-pump"), context=trust_old)[0] == 200
        _replace(cert, new_cert)
        _replace(key, new_key)
        with open(password_file, "w") as f:
            f.write("rotated-pump\n")
        time.sleep(RELOAD_CHECK_S + 0.1)
        assert get(server.url, ("prometheus", "rotated-pump"), context=trust_new)[0] == 200
        assert get(server.url, ("prometheus", "s3cret-pump"), context=trust_new)[0] == 401
        with pytest.raises((urllib.error.URLError, ssl.SSLError)):
            get(server.url, ("prometheus", "rotated-pump"), context=trust_old)
        # a careless replacement is reported once and the loaded password stays in force
        os.chmod(password_file, 0o644)
        time.sleep(RELOAD_CHECK_S + 0.1)
        for _ in range(3):
            assert get(server.url, ("prometheus", "rotated-pump"), context=trust_new)[0] == 200
    finally:
        server.close()
    # (the refused old-certificate client also gave one metrics_request_failed line)
    lines = [line for line in lines if line[1].startswith("metrics_files_")]
    events = [(level, event, f.get("changed")) for level, event, f in lines]
    assert events == [
        ("info", "metrics_files_reloaded",
         "metrics.basic_auth.password_file,metrics.tls.cert_file,metrics.tls.key_file"),
        ("warning", "metrics_files_unusable", "metrics.basic_auth.password_file")], lines
    assert "group/others" in lines[1][2]["problem"]
