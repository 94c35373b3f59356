"""Monitoring against the real daemon: a live scrape passes promtool and carries every metric the
dashboard and alerts read; a reload to an absurd learning rate trips the guard and the daemon
recovers without publishing a non-finite number."""
from __future__ import annotations

import json
import math
import signal
import urllib.request

import numpy as np
import yaml
from prometheus_client.parser import text_string_to_metric_families

from daemon_proc import Daemon, Probe, bearing_stream, cli, model_config, wait_until, write_config
from test_deploy_monitoring import run_promtool, scraped_names, used_metric_names

TOPIC = "edgeprop/testnode/m1"
WARMUP = 50


def get(url: str) -> str:
    with urllib.request.urlopen(url, timeout=5) as resp:
        assert resp.status == 200
        return resp.read().decode()


def samples(text: str) -> dict[tuple, float]:
    return {(s.name, tuple(sorted(s.labels.items()))): s.value
            for fam in text_string_to_metric_families(text) for s in fam.samples}


def value(text: str, name: str, **labels: str) -> float:
    return samples(text)[(name, tuple(sorted(labels.items())))]


def total(text: str, name: str) -> float:
    return sum(v for (n, _labels), v in samples(text).items() if n == name)


def strict(body: bytes) -> dict:
    """A published message; NaN and Infinity are refused, not parsed."""
    def refuse(token: str) -> float:
        raise AssertionError(f"non-finite {token} published: {body[:200]!r}")
    return json.loads(body, parse_constant=refuse)


def start(tmp_path, broker, **model) -> tuple[str, Daemon, str, Probe]:
    cfg = write_config(tmp_path, broker, [model_config(warmup=WARMUP, **model)],
                       metrics={"listen": "127.0.0.1:0"})
    daemon = Daemon(cfg)
    url = daemon.metrics_url()
    daemon.wait_ready()
    return cfg, daemon, url, Probe(broker)


def feed(probe: Probe, url: str, stream, targets: int) -> None:
    """Publish ``targets`` readings of each topic and wait until the worker has taken them."""
    before = total(get(url), "edgeprop_messages_received_total")
    sent = probe.publish_many(next(stream) for _ in range(3 * targets))
    wait_until(lambda: total(get(url), "edgeprop_messages_received_total") >= before + sent,
               what=f"the daemon to take {sent} messages")


def test_live_scrape_passes_promtool_and_has_every_metric_the_dashboard_and_alerts_use(
        broker, tmp_path) -> None:
    cfg, daemon, url, probe = start(tmp_path, broker)
    try:
        probe.publish("site/p1/bearing_temp", json.dumps({"value": 60.0}))   # no inputs yet: skipped
        probe.publish("site/p1/current", "not a number")                   # rejected
        probe.publish("site/p1/current", "NaN")                            # rejected
        wait_until(lambda: total(get(url), "edgeprop_messages_received_total") == 3,
                   what="the daemon to take the first three messages")
        feed(probe, url, bearing_stream(10_000, seed=4), 150)
        saved = cli(cfg, "save-now")
        assert saved.returncode == 0, saved.stdout + saved.stderr
        text = get(url)

        lint = run_promtool("check", "metrics", stdin=text)
        assert lint.returncode == 0 and not (lint.stdout + lint.stderr).strip(), \
            lint.stdout + lint.stderr
        exposed = scraped_names(text)
        for where, names in used_metric_names().items():
            missing = sorted(names - exposed)
            assert not missing, f"{where} uses metrics a running daemon does not expose: {missing}"
        for (name, labels), _v in samples(text).items():
            for label, val in labels:
                assert "/" not in val, f"{name} label {label}={val!r} looks like a topic"

        m1 = {"model": "m1"}
        assert value(text, "edgeprop_samples_total", **m1) == 150
        assert value(text, "edgeprop_predictions_published_total", **m1) == 150 - WARMUP
        assert value(text, "edgeprop_samples_skipped_total", reason="no_data", **m1) == 1
        assert total(text, "edgeprop_messages_rejected_total") == 2
        assert value(text, "edgeprop_checkpoint_last_success_timestamp_seconds", **m1) > 0
        assert value(text, "edgeprop_broker_connected") == 1
        assert value(text, "edgeprop_guard_trips_total", reason="non_finite", **m1) == 0

        msgs = [strict(b) for b in probe.payloads(TOPIC)]
        assert len(msgs) == 150 - WARMUP
        assert all(m["low"] is not None and m["high"] is not None for m in msgs[20:])
    finally:
        probe.close()
        assert daemon.stop() == 0, daemon.log()


def test_live_reload_to_an_absurd_learning_rate_trips_the_guard_and_recovers(broker, tmp_path) -> None:
    cfg, daemon, url, probe = start(tmp_path, broker)
    stream = bearing_stream(10_000, seed=5)
    try:
        feed(probe, url, stream, 300)
        assert cli(cfg, "save-now").returncode == 0          # the last good state
        raw = yaml.safe_load(open(cfg))

        # 1e6 is refused by the config schema (training.learning_rate is at most 10): the
        # running config stays, and the reload is counted as invalid.
        raw["models"][0]["training"]["learning_rate"] = 1e6
        open(cfg, "w").write(yaml.safe_dump(raw))
        daemon.signal(signal.SIGHUP)
        daemon.wait_log("event=reload_refused")
        wait_until(lambda: value(get(url), "edgeprop_config_reloads_total", result="invalid") == 1,
                   what="the invalid reload to be counted")
        assert value(get(url), "edgeprop_learning_rate", model="m1") == 0.02

        # 10, the largest rate the schema allows, is absurd for this network: plain SGD
        # diverges within a few samples.
        raw["models"][0]["training"]["learning_rate"] = 10.0
        open(cfg, "w").write(yaml.safe_dump(raw))
        daemon.signal(signal.SIGHUP)
        daemon.wait_log("event=reloaded")
        feed(probe, url, stream, 400)

        text = get(url)
        trips = total(text, "edgeprop_guard_trips_total")
        assert trips > 0
        assert daemon.log().count("event=guard_tripped") == trips
        assert value(text, "edgeprop_learning_rate", model="m1") <= 10.0 * 0.5 ** trips
        assert daemon.proc.poll() is None, "the daemon died"
        msgs = [strict(b) for b in probe.payloads(TOPIC)]   # nothing non-finite, ever
        assert all(math.isfinite(m["predicted"]) for m in msgs)
        residuals = np.array([m["residual"] for m in msgs[-100:]])
        assert np.sqrt(np.mean(residuals ** 2)) < 5.0, "still diverging at the end"
    finally:
        probe.close()
        assert daemon.stop() == 0, daemon.log()
