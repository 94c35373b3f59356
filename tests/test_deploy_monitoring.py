"""deploy/ monitoring files: promtool accepts them and they only use metrics the daemon exposes."""
from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
from pathlib import Path

import pytest
import yaml
from prometheus_client import generate_latest

from daemon.metrics import (Metrics, dashboard_exprs, metric_names_in, rule_exprs,
                            scraped_names)

DEPLOY = Path(__file__).resolve().parent.parent / "deploy"
IN_CI = os.environ.get("CI", "").lower() in ("1", "true", "yes")


def promtool() -> str:
    """Path to promtool; a missing one fails under CI and skips elsewhere."""
    path = shutil.which("promtool")
    if path is None:
        if IN_CI:
            pytest.fail("promtool is missing; CI installs Debian's 'prometheus' package for it")
        pytest.skip("promtool not installed (Debian package 'prometheus')")
    return path


def run_promtool(*args: str, stdin: str | None = None) -> subprocess.CompletedProcess:
    return subprocess.run([promtool(), *args], input=stdin, capture_output=True, text=True,
                          timeout=60)


def populated_scrape() -> str:
    """A scrape of a Metrics object after every kind of update the daemon makes."""
    m = Metrics(node="station-7", queue_capacity=10000)
    reg = m.register_model("bearing_temp", "4-32x32-1 tanh", ["speed", "current"], coverage=0.9)
    binary = m.register_model("seal_leak", "3-16-1 relu", ["flow"], task="binary")
    for i in range(40):
        m.message_received()
        m.observe_processing(1e-4 * (1 + i % 7))
        reg.published(61.0 + 0.01 * i, 59.5, 62.5)
        reg.outcome(61.5, 61.0 + 0.01 * i, 0.2, 59.5, 62.5)
        binary.published(0.8, None, None)
        binary.outcome(1.0, 0.8, 0.22)
        reg.trained(1, 0.01, 4.0, 0.3)
        binary.trained(1, 0.02, 2.0, 0.1)
    m.message_rejected("undecodable")
    m.inbound_dropped()
    m.publish_dropped()
    m.queue_depth(3)
    m.broker_connected(True)
    m.broker_reconnected()
    m.config_reloaded("applied")
    for mm, inp in ((reg, "speed"), (binary, "flow")):
        mm.skipped("stale_input")
        mm.guard_tripped("blowup")
        mm.loss_drift(0.4)
        mm.loss_drift_event()
        mm.input_shift(inp, 2.5)
        mm.input_shift_event(inp)
        mm.drift_active(False)
        mm.checkpoint_saved("20261201T101500Z-000042", 1_733_000_000.0)
        mm.checkpoint_failed()
        mm.checkpoint_restored("20261201T101500Z-000042")
        mm.checkpoint_skipped_corrupt()
        mm.rolled_back("operator", "20261201T100000Z-000041")
    return generate_latest(m.registry).decode()


def load_dashboard() -> dict:
    return json.loads((DEPLOY / "dashboard.json").read_text())


def load_rules() -> dict:
    return yaml.safe_load((DEPLOY / "alerts.yml").read_text())


def names_used() -> dict[str, set[str]]:
    return {"dashboard.json": set().union(*map(metric_names_in, dashboard_exprs(load_dashboard()))),
            "alerts.yml": set().union(*map(metric_names_in, rule_exprs(load_rules())))}


def test_alert_rules_pass_promtool() -> None:
    out = run_promtool("check", "rules", str(DEPLOY / "alerts.yml"))
    assert out.returncode == 0, out.stdout + out.stderr
    assert "SUCCESS" in out.stdout


def test_scrape_config_passes_promtool() -> None:
    out = run_promtool("check", "config", str(DEPLOY / "prometheus.yml"))
    assert out.returncode == 0, out.stdout + out.stderr
    cfg = yaml.safe_load((DEPLOY / "prometheus.yml").read_text())
    job = [j for j in cfg["scrape_configs"] if j["job_name"] == "edgeprop"]
    assert job and job[0]["static_configs"][0]["targets"] == ["127.0.0.1:9740"]
    assert cfg["rule_files"] == ["alerts.yml"]


def test_scrape_passes_promtool_check_metrics() -> None:
    out = run_promtool("check", "metrics", stdin=populated_scrape())
    # promtool prints one line per lint finding and exits non-zero on any.
    assert out.returncode == 0 and not (out.stdout + out.stderr).strip(), out.stdout + out.stderr


def test_promtool_check_metrics_can_fail() -> None:
    out = run_promtool("check", "metrics", stdin="# HELP x_seconds t\n# TYPE x_seconds counter\n"
                                                 "x_seconds 1\n")
    assert out.returncode != 0 and "_total" in out.stdout + out.stderr


def test_every_metric_in_dashboard_and_alerts_is_exposed() -> None:
    exposed = scraped_names(populated_scrape())
    used = names_used()
    assert len(used["dashboard.json"]) >= 25 and len(used["alerts.yml"]) >= 8
    for where, names in used.items():
        missing = sorted(names - exposed)
        assert not missing, f"{where} uses metrics the daemon does not expose: {missing}"


def test_name_helpers_read_promql_as_prometheus_does() -> None:
    expr = ('histogram_quantile(0.99, sum by (le) (rate(edgeprop_message_processing_seconds_bucket'
            '{job="edgeprop_old"}[5m]))) / edgeprop_inbound_queue_capacity'
            ' and on(instance) up{job="edgeprop"} unless my_edgeprop_thing')
    assert metric_names_in(expr) == {"edgeprop_message_processing_seconds_bucket",
                                     "edgeprop_inbound_queue_capacity"}
    exposed = scraped_names(populated_scrape())
    assert {"edgeprop_message_processing_seconds_bucket", "edgeprop_samples_total",
            "edgeprop_model_info", "edgeprop_build_info"} <= exposed
    assert "edgeprop_samples" not in exposed and "edgeprop_rmse_total" not in exposed


def test_dashboard_queries_are_valid_promql(tmp_path: Path) -> None:
    # promtool has no offline query checker, so each panel query becomes a recording rule.
    grafana_vars = {"$__rate_interval": "1m", "$instance": ".*", "$model": ".*"}
    rules = []
    for i, expr in enumerate(e for e in dashboard_exprs(load_dashboard())
                             if not e.startswith("label_values(")):
        for var, sub in grafana_vars.items():
            expr = expr.replace(var, sub)
        assert "$" not in expr, expr
        rules.append({"record": f"dashboard:query_{i}", "expr": expr})
    assert len(rules) >= 30
    path = tmp_path / "dashboard_queries.yml"
    path.write_text(yaml.safe_dump({"groups": [{"name": "dashboard", "rules": rules}]}))
    out = run_promtool("check", "rules", str(path))
    assert out.returncode == 0, out.stdout + out.stderr


def _panel_using(dashboard: dict, *names: str) -> dict:
    for p in dashboard["panels"]:
        used = set().union(set(), *(metric_names_in(t["expr"]) for t in p.get("targets", [])))
        if set(names) <= used:
            return p
    raise AssertionError(f"no panel shows {names}")


def test_dashboard_has_the_panels_an_engineer_needs() -> None:
    d = load_dashboard()
    band = _panel_using(d, "edgeprop_last_measured", "edgeprop_last_predicted",
                        "edgeprop_last_interval_low", "edgeprop_last_interval_high")
    assert band["title"].startswith("Measured vs predicted (with band)")
    assert any(p["id"] == "custom.fillBelowTo" for o in band["fieldConfig"]["overrides"]
               for p in o["properties"])
    for names in (("edgeprop_prequential_loss",), ("edgeprop_rmse",),
                  ("edgeprop_residual_percentile",), ("edgeprop_loss_drift_events_total",
                                                      "edgeprop_input_shift_events_total"),
                  ("edgeprop_learning_rate",), ("edgeprop_messages_received_total",
                                                "edgeprop_samples_total"),
                  ("edgeprop_messages_rejected_total",),
                  ("edgeprop_checkpoint_last_success_timestamp_seconds",),
                  ("edgeprop_broker_connected",)):
        _panel_using(d, *names)
    rejects = _panel_using(d, "edgeprop_messages_rejected_total")
    assert rejects["title"] == "Rejected readings by reason"
    assert "by (reason)" in json.dumps(rejects["targets"])


def test_dashboard_imports_cleanly() -> None:
    d = load_dashboard()
    ids = [p["id"] for p in d["panels"]]
    assert len(ids) == len(set(ids))
    variables = {v["name"]: v for v in d["templating"]["list"]}
    assert variables["datasource"]["type"] == "datasource"
    assert variables["datasource"]["query"] == "prometheus"
    assert "label_values(edgeprop_samples_total" in variables["model"]["definition"]
    occupied: set[tuple[int, int]] = set()
    for p in d["panels"]:
        g = p["gridPos"]
        assert g["x"] >= 0 and g["w"] > 0 and g["x"] + g["w"] <= 24, p["title"]
        cells = {(x, y) for x in range(g["x"], g["x"] + g["w"])
                 for y in range(g["y"], g["y"] + g["h"])}
        assert not cells & occupied, f"panel {p['title']!r} overlaps another"
        occupied |= cells
        for t in p.get("targets", []):
            assert t["datasource"]["uid"] == "${datasource}" and t["refId"] and t["expr"]


def test_alerts_cover_each_failure_and_say_predictions_are_advisory() -> None:
    rules = {r["alert"]: r for g in load_rules()["groups"] for r in g["rules"]}
    wanted = {"EdgepropDaemonDown": "up", "EdgepropBrokerDown": "edgeprop_broker_connected",
              "EdgepropDriftDetected": "edgeprop_loss_drift_events_total",
              "EdgepropInputShift": "edgeprop_input_shift_events_total",
              "EdgepropModelDiverging": "edgeprop_guard_trips_total",
              "EdgepropCheckpointStale": "edgeprop_checkpoint_last_success_timestamp_seconds",
              "EdgepropRejectRateHigh": "edgeprop_messages_rejected_total"}
    for alert, metric in wanted.items():
        assert re.search(rf"\b{metric}\b", rules[alert]["expr"]), alert
    assert 'job="edgeprop"' in rules["EdgepropDaemonDown"]["expr"]
    assert rules["EdgepropBrokerDown"]["for"] == "2m"
    for name, rule in rules.items():
        notes = rule["annotations"]
        assert notes["summary"].strip(), name
        assert "advisory" in notes["description"], name
