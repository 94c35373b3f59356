"""`replay` reproduces `run`: a live run through a real broker, recorded, replays to the same bytes."""
from __future__ import annotations

import json
import math
import re
import os
import pty
import subprocess
import sys
import threading
import time

import numpy as np
import pytest
import yaml

from daemon.capture import CaptureWriter
from daemon.config import load_config, parse_config
from daemon.control import request
from daemon.record import record
from daemon.replay import bad_line_kind, replay, score_messages
from daemon_proc import ROOT, Daemon, Probe, model_config, wait_until, write_config

T0 = 1_765_000_000.0


def readings(n: int, seed: int = 0):
    """(topic, payload) of a known nonlinear relation (invented): every payload carries its sensor time."""
    rng = np.random.default_rng(seed)
    for i in range(n):
        t = T0 + 10.0 * i
        speed = 1000 + 400 * math.sin(i / 40) + 50 * rng.normal()
        current = 10 + 0.02 * (speed - 1000) + 2 * math.cos(i / 23)
        temp = 40 + 15 * math.tanh((speed - 1000) / 300) + 0.05 * current ** 2 + 0.2 * rng.normal()
        for topic, v in (("site/p1/speed", speed), ("site/p1/current", current),
                         ("site/p1/bearing_temp", temp)):
            yield topic, json.dumps({"value": v, "ts": t}).encode()


def timed_model() -> dict:
    """daemon_proc's model, with sensor times on every topic, a lag, and a drift response."""
    m = model_config(warmup=40, drift={"detector": "page_hinkley", "on_drift": "boost_lr",
                                       "threshold": 5.0})
    m["target"]["time_field"] = "ts"
    m["inputs"] = [{"name": "speed", "topic": "site/p1/speed", "field": "value", "time_field": "ts"},
                   {"name": "current", "topic": "site/p1/current", "field": "value",
                    "time_field": "ts", "lags_s": [0, 20]}]
    return m


def write_capture(path, items, t_start: float = T0) -> None:
    with CaptureWriter(str(path)) as w:
        for k, (topic, payload) in enumerate(items):
            w.write(t_start + 0.01 * k, topic, payload)


def offline_settings(tmp_path):
    return parse_config({"node": "testnode", "models": [timed_model()],
                         "state_dir": str(tmp_path / "state")})


class RecorderThread:
    def __init__(self, settings, out: str, count: int | None = None) -> None:
        self.started, self.stop, self.result = threading.Event(), threading.Event(), []
        self.count = count

        def log(level, event, **fields):
            if event == "record_started":
                self.started.set()

        def target():
            try:
                self.result.append(record(settings, out, None, count, log, self.stop))
            except Exception as e:      # handed to the test thread
                self.result.append(e)
            self.started.set()
        self.thread = threading.Thread(target=target, daemon=True)
        self.thread.start()

    def finish(self) -> int:
        """Stop and return the lines written; with a ``count``, first let it reach that count.

        The recorder is a subscriber of its own and may lag the daemon it runs beside.
        """
        self.thread.join(20 if self.count is not None else 0)
        self.stop.set()
        self.thread.join(10)
        assert not self.thread.is_alive() and isinstance(self.result[0], int), self.result
        return self.result[0]


def _status(config: str) -> dict:
    reply = request(load_config(config).control_socket, {"cmd": "status"})
    assert reply["ok"], reply
    return reply["result"]


def _wait(pred, timeout: float, what: str) -> None:
    wait_until(pred, timeout, what)


@pytest.mark.integration
def test_live_run_replays_to_the_same_bytes(broker, tmp_path):
    n = 300
    config = write_config(tmp_path, broker, [timed_model()], checkpoints={"every_s": 86400, "keep": 5})
    capture = str(tmp_path / "live.jsonl")
    daemon = Daemon(config)
    probe = rec = None
    try:
        daemon.wait_ready()
        probe = Probe(broker, "edgeprop/testnode/m1")
        rec = RecorderThread(load_config(config), capture, count=3 * n + 2)
        assert rec.started.wait(10) and not rec.result, rec.result
        # Sync: once the daemon has counted this garbage payload, it is subscribed. The
        # recorder captures it too, so replay must reject it the same way.
        probe.publish("site/p1/current", b"not a number")
        _wait(lambda: _status(config)["rejects"].get("undecodable") == 1, 10, "the sync reject")
        for topic, payload in readings(n):
            probe.client.publish(topic, payload, qos=1)
        probe.publish("site/p1/speed", json.dumps({"value": 1.0, "ts": T0 - 1}))  # flushes; too late: rejected
        _wait(lambda: _status(config)["messages"] == 3 * n + 2, 30, "the daemon to take every reading")
        assert rec.finish() == 3 * n + 2
        rec = None
        replayed: list[dict] = []
        summary, _ = replay(load_config(config), capture, replayed.append)
        assert summary.rejects == {"undecodable": 1, "late": 1} and not summary.bad_lines
        assert len(replayed) >= n - 60         # warm-up 40, plus lag-20 s needs two readings
        _wait(lambda: len(probe.payloads("edgeprop/testnode/m1")) >= len(replayed), 10, "live predictions")
        time.sleep(0.3)                        # nothing more may arrive
        live = probe.payloads("edgeprop/testnode/m1")
        assert daemon.stop() == 0
    finally:
        if rec is not None:
            rec.stop.set()
        if probe is not None:
            probe.close()
        daemon.kill()
    # Exactly the same messages, in the same order, byte for byte: predictions equal to the
    # last bit (json.dumps writes the shortest repr that round-trips a float exactly).
    assert [json.dumps(m, separators=(",", ":")).encode() for m in replayed] == live
    assert all(m["checkpoint"] is None for m in replayed)


def test_garbage_lines_are_counted_and_replay_goes_on(tmp_path):
    items = list(readings(120))
    clean, dirty = tmp_path / "clean.jsonl", tmp_path / "dirty.jsonl"
    write_capture(clean, items)
    good = clean.read_bytes().splitlines(keepends=True)
    junk = [b"this is not json\n", b'{"t": "noon", "topic": "site/p1/speed", "payload": "1"}\n',
            b'{"t": 1, "topic": "site/p1/speed", "payload_b64": "%%%"}\n', b"[1, 2]\n",
            b"\xff\xfe\n", b"\n"]
    mixed = []
    for k, line in enumerate(good):
        mixed.append(line)
        if k % 50 == 7:
            mixed.append(junk[(k // 50) % len(junk)])
    mixed.append(b'{"t": 1765000099, "topic": "site/p1/sp')        # cut short, no newline
    dirty.write_bytes(b"".join(mixed))
    settings = offline_settings(tmp_path)
    want: list[dict] = []
    replay(settings, str(clean), want.append)
    got: list[dict] = []
    summary, _ = replay(settings, str(dirty), got.append)
    assert got == want and len(got) > 0
    assert summary.lines == len(good)
    assert sum(summary.bad_lines.values()) == 8          # 7 junk lines (blank ones are skipped) + 1 cut
    assert summary.bad_lines["not JSON"] == 2
    assert summary.bad_lines["truncated last line"] == 1
    assert summary.first_bad.startswith("line 9: not JSON")
    assert "skipped 8 bad capture lines" in summary.text()


def test_bad_line_kind_drops_the_line_specific_detail():
    assert bad_line_kind("not JSON (Expecting value: line 1 column 1 (char 0))") == "not JSON"
    assert bad_line_kind("'t' must be a finite number of epoch seconds, got 'noon'") == \
        "'t' must be a finite number of epoch seconds"


def test_deterministic_and_scores_match_scikit_learn(tmp_path):
    from sklearn.metrics import mean_squared_error
    cap = tmp_path / "cap.jsonl"
    write_capture(cap, list(readings(400, seed=3)))
    settings = offline_settings(tmp_path)
    a: list[dict] = []
    b: list[dict] = []
    summary, engine = replay(settings, str(cap), a.append)
    replay(settings, str(cap), b.append)
    assert a == b
    scores = score_messages(a, engine)["m1"]
    y = [m["measured"] for m in a]
    p = [m["predicted"] for m in a]
    # prequential RMSE against scikit-learn's mean_squared_error on the same pairs
    assert scores["rmse"] == pytest.approx(math.sqrt(mean_squared_error(y, p)), rel=1e-12)
    half = len(y) // 2
    assert scores["rmse_second_half"] == pytest.approx(math.sqrt(mean_squared_error(y[half:], p[half:])), rel=1e-12)
    inside = [m["low"] <= m["measured"] <= m["high"] for m in a if m["low"] is not None]
    assert scores["coverage"] == pytest.approx(np.mean(inside))
    assert summary.lines == 1200 and summary.published == len(a)


def test_cli_replay_writes_messages_summary_and_report(tmp_path):
    cap = tmp_path / "cap.jsonl"
    extra = [("site/p1/speed", b'{"value": NaN, "ts": 1765100000}'), ("site/p9/x", b"1")]
    write_capture(cap, list(readings(300, seed=1)) + extra)
    cfg = tmp_path / "c.yaml"
    cfg.write_text(yaml.safe_dump({"node": "testnode", "models": [timed_model()]}))
    out = tmp_path / "out.jsonl"
    proc = subprocess.run([sys.executable, "-m", "daemon.cli", "replay", "-c", str(cfg), "--capture",
                           str(cap), "--out", str(out), "--report", str(tmp_path / "rep")],
                          capture_output=True, text=True, timeout=60, env={**os.environ, "PYTHONPATH": ROOT})
    assert proc.returncode == 0, proc.stderr
    lines = out.read_text().splitlines()
    want: list[dict] = []
    replay(load_config(str(cfg)), str(cap), want.append)
    assert [json.loads(x) for x in lines] == want
    text = proc.stdout
    assert f"published {len(want)} predictions" in text and "msg/s" in text
    assert "rejected payloads: non_finite=1, unknown_topic=1" in text
    assert "interval coverage" in text and "RMSE" in text
    assert "\r" not in proc.stderr                      # no progress bar without a terminal
    with open(tmp_path / "rep" / "report.png", "rb") as f:
        assert f.read(8) == b"\x89PNG\r\n\x1a\n"          # PNG signature (PNG spec, RFC 2083)


def test_progress_bar_on_a_terminal(tmp_path):
    cap = tmp_path / "cap.jsonl"
    write_capture(cap, list(readings(1400)))              # 4200 lines: two updates and the end
    cfg = tmp_path / "c.yaml"
    cfg.write_text(yaml.safe_dump({"node": "testnode", "models": [timed_model()]}))
    master, slave = pty.openpty()
    proc = subprocess.Popen([sys.executable, "-m", "daemon.cli", "replay", "-c", str(cfg), "--capture",
                             str(cap), "--out", str(tmp_path / "o.jsonl")], stdout=subprocess.DEVNULL,
                            stderr=slave, env={**os.environ, "PYTHONPATH": ROOT})
    os.close(slave)
    seen = b""
    while True:
        try:
            chunk = os.read(master, 4096)
        except OSError:         # EIO: the child closed the terminal
            break
        if not chunk:
            break
        seen += chunk
    os.close(master)
    assert proc.wait(60) == 0
    text = seen.decode()
    assert "\r[" in text and "100%" in text and "4,200 / 4,200 lines" in text


def run_replay_cli(tmp_path, cfg: dict, cap, *extra: str) -> subprocess.CompletedProcess:
    path = tmp_path / "c.yaml"
    path.write_text(yaml.safe_dump(cfg))
    return subprocess.run([sys.executable, "-m", "daemon.cli", "replay", "-c", str(path), "--capture",
                           str(cap), "--out", str(tmp_path / "out.jsonl"), *extra],
                          capture_output=True, text=True, timeout=60, env={**os.environ, "PYTHONPATH": ROOT})


def test_capture_too_short_for_lag_and_warm_up_says_why(tmp_path):
    # 30 targets 10 s apart; lag 20 s: the first two have no current reading 20 s before them
    # (stale), the other 28 are learned during the 40-sample warm-up; one target lacks its field
    cap = tmp_path / "short.jsonl"
    write_capture(cap, list(readings(30)) + [("site/p1/bearing_temp", b'{"ts": 1765000300}')])
    proc = run_replay_cli(tmp_path, {"node": "testnode", "models": [timed_model()]}, cap)
    assert proc.returncode == 0, proc.stderr
    text = proc.stdout
    assert "m1: 0 predictions" in text and "nan" not in text
    why = next(line for line in text.splitlines() if "why:" in line)
    assert "30 target readings" in why and "28 in warm-up" in why and "after 40 learned samples" in why
    assert "2 skipped as stale" in why and "(lag 20 s) has no reading at or before t - 20 s" in why
    assert "payloads rejected on its topics: missing_field=1" in why


def test_model_with_enough_predictions_has_no_why_line(tmp_path):
    cap = tmp_path / "cap.jsonl"
    write_capture(cap, list(readings(300)))
    proc = run_replay_cli(tmp_path, {"node": "testnode", "models": [timed_model()]}, cap)
    assert proc.returncode == 0, proc.stderr
    assert "why:" not in proc.stdout and "RMSE" in proc.stdout


def binary_model() -> dict:
    """A binary model on site/p1/high: whether the speed is above 1000 rpm (with noise)."""
    return {"name": "high", "task": "binary",
            "target": {"topic": "site/p1/high", "field": "value", "time_field": "ts"},
            "inputs": [{"name": "speed", "topic": "site/p1/speed", "field": "value", "time_field": "ts"}],
            "align": {"max_age_s": 30}, "net": {"hidden": [8], "seed": 2},
            "training": {"learning_rate": 0.05, "warmup_samples": 20}}


def with_binary_target(items, seed: int = 0):
    """``readings`` with a 0/1 reading on site/p1/high after each speed, flipped 10 % of the time."""
    rng = np.random.default_rng(seed)
    for topic, payload in items:
        yield topic, payload
        if topic == "site/p1/speed":
            body = json.loads(payload)
            high = int((body["value"] > 1000) != (rng.random() < 0.1))
            yield "site/p1/high", json.dumps({"value": high, "ts": body["ts"]}).encode()


def test_binary_model_reports_accuracy_and_log_loss_in_report_txt(tmp_path):
    from sklearn.metrics import accuracy_score, log_loss
    cap = tmp_path / "cap.jsonl"
    write_capture(cap, list(with_binary_target(readings(300))))
    proc = run_replay_cli(tmp_path, {"node": "testnode", "models": [timed_model(), binary_model()]},
                          cap, "--report", str(tmp_path / "rep"))
    assert proc.returncode == 0, proc.stderr
    msgs = [json.loads(x) for x in (tmp_path / "out.jsonl").read_text().splitlines()]
    high = [m for m in msgs if m["model"] == "high"]
    y, p = [m["measured"] for m in high], [m["predicted"] for m in high]
    assert len(high) > 200
    acc, ll = accuracy_score(y, [int(v >= 0.5) for v in p]), log_loss(y, p, labels=[0, 1])
    assert f"high: {len(high)} predictions, accuracy {acc:.4f}, log-loss {ll:.4g}" in proc.stdout
    text = (tmp_path / "rep" / "report.txt").read_text()
    block = text.split("model high")[1].split("\n\n")[0]
    assert re.search(rf"accuracy all\s+{acc:.4f}\b", block) and re.search(rf"log-loss all\s+{ll:.4g}\b", block)
    half = len(y) // 2
    assert re.search(rf"log-loss last half\s+{log_loss(y[half:], p[half:], labels=[0, 1]):.4g}\b", block)
    assert "RMSE" not in block and "interval" not in block and "nan" not in block
    assert "RMSE all" in text.split("model m1")[1]           # the regression model keeps its figures
