"""deploy/ monitoring files: promtool accepts them and they only use metrics the daemon exposes."""
from __future__ import annotations

import json
import re
import subprocess
from pathlib import Path

import yaml
from prometheus_client import generate_latest
from prometheus_client.parser import text_string_to_metric_families

from daemon.metrics import Metrics
from tooling import require_tool

DEPLOY = Path(__file__).resolve().parent.parent / "deploy"


# -- names the deploy/ files use; also for a live-daemon test: ``used_metric_names()`` must be
# -- a subset of ``scraped_names(<text of GET /metrics>)``.

def metric_names_in(promql: str) -> set[str]:
    """edgeprop metric names an expression reads, ignoring quoted label values."""
    bare = re.sub(r'"(?:[^"\\]|\\.)*"|\'(?:[^\'\\]|\\.)*\'', '""', promql)
    return set(re.findall(r"(?<![A-Za-z0-9_:])(edgeprop_[a-z0-9_]+)", bare))


def dashboard_exprs(dashboard: dict) -> list[str]:
    """Every PromQL string in a dashboard model: panel targets, annotations, template queries."""
    found: list[str] = []

    def walk(node: object, key: str = "") -> None:
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
    """Every ``expr`` in a parsed Prometheus rule file."""
    return [r["expr"] for g in rules.get("groups", []) for r in g.get("rules", [])]


def scraped_names(text: str) -> set[str]:
    """Sample names present in a text-format scrape (``_total``, ``_bucket``, ``_info`` ...)."""
    return {s.name for fam in text_string_to_metric_families(text) for s in fam.samples}


def used_metric_names() -> dict[str, set[str]]:
    """edgeprop metric names read by deploy/dashboard.json and deploy/alerts.yml."""
    return {"dashboard.json": set().union(*map(metric_names_in, dashboard_exprs(load_dashboard()))),
            "alerts.yml": set().union(*map(metric_names_in, rule_exprs(load_rules())))}


def run_promtool(*args: str, stdin: str | None = None) -> subprocess.CompletedProcess:
    """Run promtool (Debian package 'prometheus'); missing: a failure under CI, else a skip."""
    return subprocess.run([require_tool("promtool"), *args], input=stdin, capture_output=True,
                          text=True, timeout=60)


def populated_scrape() -> str:
    """A scrape of a Metrics object after every kind of update the daemon makes."""
    m = Metrics(node="station-7", queue_capacity=10000)
    reg = m.register_model("bearing_temp", "4-32x32-1 tanh", ["speed", "current"], coverage=0.9)
    binary = m.register_model("seal_leak", "3-16-1 relu", ["flow"], task="binary")
    for i in range(40):
        m.observe_message(1e-4 * (1 + i % 7))
        m.observe_published("bearing_temp", 61.0 + 0.01 * i, 59.5, 62.5)
        reg.learned(1, 0.01, 0.3)
        reg.outcome(61.5, 61.0 + 0.01 * i)
        m.observe_published("seal_leak", 0.8)
        binary.learned(1, 0.02, 0.1)
        binary.outcome(1.0, 0.8)
    m.rejected("undecodable")
    m.transport(queue_depth=3, queue_dropped=1, connected=True, reconnects=1, publish_dropped=1)
    m.reload("applied")
    for mm, inp in ((reg, "speed"), (binary, "flow")):
        mm.levels(weight_norm=4.0, coverage=0.9, loss_short=0.2, loss_long=0.25, loss_drift=0.4,
                  input_shift={inp: 2.5})
        mm.skipped("stale")
        mm.guard_tripped("loss_blowup")
        mm.drift_event("loss")
        mm.drift_event(inp)
        mm.drift_active(False)
        mm.checkpoint_saved("20261201T101500Z-000042", 1_733_000_000.0)
        mm.checkpoint_failed()
        mm.checkpoint_restored("20261201T101500Z-000042")
        mm.checkpoint_skipped_corrupt(1)
        mm.rolled_back("operator", "20261201T100000Z-000041")
    return generate_latest(m.registry).decode()


def load_dashboard() -> dict:
    return json.loads((DEPLOY / "dashboard.json").read_text())


def load_rules() -> dict:
    return yaml.safe_load((DEPLOY / "alerts.yml").read_text())


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
    used = used_metric_names()
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


def _expected_alert(rules: dict, name: str, labels: dict) -> dict:
    """What Prometheus fires for ``name`` with ``labels``: the rule's labels and its
    annotations with each ``{{ $labels.x }}`` filled in (these rules use nothing else)."""
    rule = rules[name]
    fill = lambda text: re.sub(r"\{\{ \$labels\.(\w+) \}\}", lambda m: labels[m.group(1)], text)  # noqa: E731
    assert "{{" not in "".join(map(fill, rule["annotations"].values())), name
    return {"exp_labels": {**rule["labels"], **labels},
            "exp_annotations": {k: fill(v) for k, v in rule["annotations"].items()}}


def test_an_idle_model_alerts_as_idle_and_only_a_learning_one_as_unsaved(tmp_path: Path) -> None:
    """Evaluated by Prometheus's own rule engine (promtool test rules) on made-up series: a
    model whose target readings stopped (its checkpoint timer rightly saves nothing) must not
    raise the storage alert, which sends the engineer to the disk; it raises EdgepropNoSamples.
    A model that learns but is not saved raises EdgepropCheckpointStale alone."""
    rules = {r["alert"]: r for g in load_rules()["groups"] for r in g["rules"]}
    box = {"job": "edgeprop", "instance": "box:9740"}
    series = [("edgeprop_start_time_seconds", {}, "0+0x180")]
    for model, samples in (("idle", "50+0x180"), ("busy", "0+60x180")):
        series += [("edgeprop_samples_total", {"model": model}, samples),
                   ("edgeprop_checkpoint_last_success_timestamp_seconds", {"model": model}, "0+0x180")]

    def selector(name: str, labels: dict) -> str:
        return name + "{" + ",".join(f'{k}="{v}"' for k, v in {**box, **labels}.items()) + "}"

    checks = [("EdgepropNoSamples", "idle"), ("EdgepropCheckpointStale", "busy")]
    spec = {
        "rule_files": [str(DEPLOY / "alerts.yml")],
        "evaluation_interval": "1m",
        "tests": [{
            "interval": "1m",
            "input_series": [{"series": selector(n, l), "values": v} for n, l, v in series],
            "alert_rule_test": [
                {"eval_time": "150m", "alertname": alert,
                 "exp_alerts": [_expected_alert(rules, alert, {**box, "model": model})]}
                for alert, model in checks],
        }],
    }
    path = tmp_path / "alert-cases.yml"
    path.write_text(yaml.safe_dump(spec, sort_keys=False))
    out = run_promtool("test", "rules", str(path))
    assert out.returncode == 0, out.stdout + out.stderr
