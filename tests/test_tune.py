"""`tune`: one replay per candidate in parallel processes, ranked; a rate far too large ranks last."""
from __future__ import annotations

import dataclasses
import json
import math
import os
import re
import subprocess
import sys

import numpy as np
import pytest
import yaml

from daemon.capture import CaptureWriter
from daemon.config import load_config
from daemon.demo import config_path
from daemon.errors import ConfigError
from daemon.replay import replay
from daemon.simulator import PumpStation, reading_messages, write_capture
from daemon.tune import Candidate, parse_list, with_training, worst_window
from daemon_proc import ROOT

# A binary soft sensor beside the demo's regression one, as in deploy/example.yaml:
# is the pump on high load (motor current above 5.5 A, the median of the capture), from speed and flow.
HIGH_LOAD = {"name": "high_load", "task": "binary",
             "target": {"topic": "site/p1/high_load", "field": "value", "time_field": "ts"},
             "inputs": [{"name": "speed", "topic": "site/p1/speed", "field": "value", "time_field": "ts"},
                        {"name": "flow", "topic": "site/p1/flow", "field": "value", "time_field": "ts"}],
             "align": {"max_age_s": 120}, "net": {"hidden": [8], "seed": 1},
             "training": {"warmup_samples": 32}}


def run_cli(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "daemon.cli", *args], capture_output=True, text=True,
                          timeout=120, env={**os.environ, "PYTHONPATH": ROOT})


@pytest.fixture(scope="module")
def station_capture(tmp_path_factory) -> str:
    """Twelve simulated hours of the demo's pump station, one reading per signal per minute."""
    path = str(tmp_path_factory.mktemp("tune") / "station.jsonl")
    write_capture(path, PumpStation(2, dt_s=60.0), 12 * 3600.0)
    return path


def table(stdout: str) -> list[list[str]]:
    rows = [line.split() for line in stdout.splitlines()]
    return [r for r in rows if r and r[0].isdigit()]


def test_too_large_learning_rate_ranks_last(station_capture):
    proc = run_cli("tune", "-c", config_path(), "--capture", station_capture,
                   "--learning-rates", "0.003,8,0.01", "--jobs", "2")
    assert proc.returncode == 0, proc.stderr
    rows = table(proc.stdout)
    assert [r[0] for r in rows] == ["1", "2", "3"]
    assert {r[1] for r in rows} == {"0.003", "0.01", "8"}
    last = rows[-1]
    assert last[1] == "8" and int(last[5]) > 0          # ranked last, with divergences counted
    assert all(int(r[5]) == 0 for r in rows[:2])
    errors = [float(r[3]) for r in rows[:2]]
    assert errors[0] <= errors[1] and all(np.isfinite(errors))
    winner = rows[0][1]
    assert re.search(rf"^\s+learning_rate: {re.escape(winner)}$", proc.stdout, re.M)
    assert "RuntimeWarning" not in proc.stderr


def test_batch_sizes_multiply_the_grid(station_capture):
    proc = run_cli("tune", "-c", config_path(), "--capture", station_capture,
                   "--learning-rates", "0.01", "--batch-sizes", "8,32")
    assert proc.returncode == 0, proc.stderr
    rows = table(proc.stdout)
    assert sorted(r[2] for r in rows) == ["32", "8"]
    assert f"batch_size: {rows[0][2]}" in proc.stdout


def test_bad_option_and_missing_capture_are_clear_errors(tmp_path):
    bad = run_cli("tune", "-c", config_path(), "--capture", "x", "--learning-rates", "0.01,fast")
    assert bad.returncode == 2 and "--learning-rates" in bad.stderr and "'0.01,fast'" in bad.stderr
    missing = run_cli("tune", "-c", config_path(), "--capture", str(tmp_path / "none.jsonl"),
                      "--learning-rates", "0.01")
    assert missing.returncode == 1 and "no such file" in missing.stderr


def test_capture_without_matching_topics_is_an_error(tmp_path):
    cap = tmp_path / "other.jsonl"
    write_capture(str(cap), PumpStation(1, dt_s=60.0), 3600.0, node_prefix="site/p9")
    proc = run_cli("tune", "-c", config_path(), "--capture", str(cap), "--learning-rates", "0.01")
    assert proc.returncode == 1 and "no candidate published" in proc.stderr
    assert "bearing_temp: why: no target reading on site/p1/bearing_temp reached the model" in proc.stderr


def write_mixed(directory, steps: int) -> tuple[str, str]:
    """The demo config plus HIGH_LOAD, and a capture of ``steps`` simulated minutes for both."""
    cfg = yaml.safe_load(open(config_path(), encoding="utf-8"))
    cfg["models"].append(HIGH_LOAD)
    config = directory / "mixed.yaml"
    config.write_text(yaml.safe_dump(cfg, sort_keys=False))
    capture = str(directory / f"mixed-{steps}.jsonl")
    station, rng = PumpStation(2, dt_s=60.0), np.random.default_rng(7)
    with CaptureWriter(capture) as w:
        for _ in range(steps):
            r = station.step()
            for topic, payload in reading_messages(r, "site/p1"):
                w.write(r["t"], topic, payload)
            high = int((r["current_a"] > 5.5) != (rng.random() < 0.1))      # 10 % of labels flipped
            w.write(r["t"], "site/p1/high_load", json.dumps({"value": high, "ts": round(r["t"], 3)}).encode())
    return str(config), capture


@pytest.fixture(scope="module")
def mixed(tmp_path_factory) -> tuple[str, str]:
    return write_mixed(tmp_path_factory.mktemp("mixed"), 12 * 60)


def sections(stdout: str) -> dict[str, str]:
    """Tune's output per model, keyed by model name."""
    parts = re.split(r"^model (\w+) ", stdout, flags=re.M)
    return dict(zip(parts[1::2], parts[2::2]))


def replayed_scores(config: str, capture: str, rate: float, name: str) -> list[dict]:
    settings = with_training(load_config(config), rate, None)
    messages: list[dict] = []
    with np.errstate(over="ignore", invalid="ignore"):
        replay(settings, capture, messages.append, log=lambda *a, **k: None)
    return [m for m in messages if m["model"] == name and m["measured"] is not None]


def test_mixed_config_ranks_each_model_on_its_own_score(mixed):
    from sklearn.metrics import log_loss, mean_squared_error
    config, capture = mixed
    rates = ["0.003", "0.01", "0.03"]
    proc = run_cli("tune", "-c", config, "--capture", capture, "--learning-rates", ",".join(rates),
                   "--jobs", "2")
    assert proc.returncode == 0, proc.stderr
    parts = sections(proc.stdout)
    assert sorted(parts) == ["bearing_temp", "high_load"]
    assert parts["bearing_temp"].startswith("(regression)") and parts["high_load"].startswith("(binary)")
    for name, binary in (("bearing_temp", False), ("high_load", True)):
        rows = table(parts[name])
        assert sorted(r[1] for r in rows) == rates
        for r in rows:      # each figure, worked out again from a replay at that rate
            scored = replayed_scores(config, capture, float(r[1]), name)
            y, p = [m["measured"] for m in scored], [m["predicted"] for m in scored]
            y, p = y[len(y) // 2:], p[len(p) // 2:]
            want = log_loss(y, p, labels=[0, 1]) if binary else math.sqrt(mean_squared_error(y, p))
            assert float(r[3]) == pytest.approx(want, rel=1e-4) and int(r[6]) == len(scored)
        best = min((r for r in rows if int(r[5]) == 0), key=lambda r: float(r[3]))
        assert rows[0] == best
        assert re.search(rf"^Paste under {name}'s `training:`.*\n\s+learning_rate: {best[1]}$",
                         parts[name], re.M)
    assert "each model's" not in proc.stdout


def test_models_in_one_replay_do_not_affect_each_other(mixed):
    """Why one replay per candidate can score every model: each model's messages are its own."""
    config, capture = mixed
    settings = load_config(config)
    both: list[dict] = []
    alone: list[dict] = []
    replay(settings, capture, both.append)
    replay(dataclasses.replace(settings, models=settings.models[:1]), capture, alone.append)
    assert len(alone) > 100 and [m for m in both if m["model"] == "bearing_temp"] == alone


def test_model_with_too_few_predictions_gets_no_recommendation_and_a_reason(tmp_path):
    # 85 minutes: bearing_temp loses 5 targets to its 300 s lag and 64 to warm-up (16 left, 20
    # needed); high_load, with warm-up 32 and no lag, has enough
    config, capture = write_mixed(tmp_path, 85)
    proc = run_cli("tune", "-c", config, "--capture", capture, "--learning-rates", "0.01,0.03")
    assert proc.returncode == 0, proc.stderr
    parts = sections(proc.stdout)
    bearing = parts["bearing_temp"]
    assert "No recommendation for bearing_temp: 16 scored predictions, 20 needed to rank" in bearing
    assert "64 in warm-up" in bearing and "5 skipped as stale" in bearing and "(lag 300 s)" in bearing
    assert "Paste under" not in bearing
    assert re.search(r"^Paste under high_load's `training:`", parts["high_load"], re.M)


def test_worst_window_is_the_largest_moving_mean():
    rng = np.random.default_rng(0)
    err = rng.exponential(size=97)
    brute = max(float(np.mean(err[i:i + 9])) for i in range(len(err) - 8))   # every start, by hand
    assert worst_window(err, 9) == pytest.approx(brute, rel=1e-12)
    assert worst_window(np.array([1.0, np.inf, 1.0]), 2) == np.inf


def test_parse_list_and_ranking_order():
    assert parse_list("0.001, 0.01,", float, "--learning-rates") == [0.001, 0.01]
    for text in ("0.01,-1", "a,b", ","):
        with pytest.raises(ConfigError, match="--learning-rates"):
            parse_list(text, float, "--learning-rates")
    diverged = Candidate(0.5, None, error_second_half=0.1, divergences=2)
    steady = Candidate(0.01, None, error_second_half=0.9, divergences=0)
    broken = Candidate(0.02, None, error_second_half=float("nan"), divergences=0)
    assert sorted([diverged, broken, steady], key=Candidate.rank_key) == [steady, broken, diverged]


def test_with_training_changes_every_model_only_there():
    s = load_config(config_path())
    t = with_training(s, 0.123, 7)
    assert all(m.training.learning_rate == 0.123 and m.training.batch_size == 7 for m in t.models)
    assert t.models[0].net == s.models[0].net and t.broker == s.broker
    assert with_training(s, 0.5, None).models[0].training.batch_size == s.models[0].training.batch_size
