"""`tune`: one replay per candidate in parallel processes, ranked; a rate far too large ranks last."""
from __future__ import annotations

import os
import re
import subprocess
import sys

import numpy as np
import pytest

from daemon.config import load_config
from daemon.demo import config_path
from daemon.errors import ConfigError
from daemon.simulator import PumpStation, write_capture
from daemon.tune import Candidate, parse_list, with_training, worst_window
from daemon_proc import ROOT


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
