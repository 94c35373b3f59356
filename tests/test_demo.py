"""`edgeprop demo`: broker, simulated station and the real daemon in one command, headless in CI."""
from __future__ import annotations

import io
import os
import re
import signal
import socket
import subprocess
import sys
import threading
import time

import numpy as np
import pytest

from daemon.config import load_config
from daemon.demo import (View, parse_broker, require, scenario_times, start_daemon,  # View, scenario_times
                         wait_daemon_ready, write_demo_config)                   # are re-exported
from daemon.errors import ConfigError, EdgepropError
from daemon_proc import ROOT

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"       # PNG spec (RFC 2083), section 3.1


def demo(out, *extra: str) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-m", "daemon.cli", "demo", "--out", str(out), *extra],
                            stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True,
                            env={**os.environ, "PYTHONPATH": ROOT}, cwd=str(out.parent))


def check_report(out) -> str:
    import matplotlib.image
    png = out / "report.png"
    with open(png, "rb") as f:
        assert f.read(8) == PNG_SIGNATURE
    img = matplotlib.image.imread(str(png))
    assert img.shape[0] > 200 and img.shape[1] > 200 and np.ptp(img[..., :3]) > 0
    return (out / "report.txt").read_text()


@pytest.mark.integration
def test_headless_demo_runs_and_writes_a_readable_plot(tmp_path):
    out = tmp_path / "demo"
    proc = demo(out, "--duration", "20", "--speed", "3600")
    try:
        stdout, _ = proc.communicate(timeout=90)
    finally:
        proc.kill()
    assert proc.returncode == 0, stdout
    assert stdout.count("advisory") == 1                        # the caution, once
    plain = [line for line in stdout.splitlines() if line.startswith("edgeprop demo")]
    assert len(plain) >= 4 and "\x1b[" not in stdout            # plain lines, no cursor codes
    assert re.search(r"samples \d+ predictions [1-9]\d* ", stdout)
    assert f"plot: {out / 'report.png'}" in stdout and f"summary: {out / 'report.txt'}" in stdout
    summary = check_report(out)
    assert "model bearing_temp" in summary and "RMSE all" in summary and "bearing wear from" in summary
    # stopped in order: the daemon saved on SIGTERM and said so; the embedded broker is gone
    log = (out / "daemon.log").read_text()
    assert "reason=shutdown" in log and "event=stopped exit_code=0" in log
    port = int(re.search(r"broker 127\.0\.0\.1:(\d+) \(embedded amqtt\)", stdout).group(1))
    with pytest.raises(OSError):
        socket.create_connection(("127.0.0.1", port), timeout=1).close()


@pytest.mark.integration
def test_ctrl_c_stops_cleanly_and_still_reports(broker, tmp_path):
    out = tmp_path / "demo"
    proc = demo(out, "--duration", "120", "--speed", "3600", "--broker", f"{broker.host}:{broker.port}")
    lines: list[str] = []
    try:
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline:
            line = proc.stdout.readline()
            assert line, "demo ended early:\n" + "".join(lines)
            lines.append(line)
            if re.search(r"predictions [1-9]\d* ", line):
                break
        started = time.monotonic()
        proc.send_signal(signal.SIGINT)
        rest, _ = proc.communicate(timeout=30)
        took = time.monotonic() - started
    finally:
        proc.kill()
    text = "".join(lines) + rest
    assert proc.returncode == 0, text
    assert "(external)" in text and "stopping on request" in text and took < 20
    assert "model bearing_temp" in check_report(out)
    assert "reason=shutdown" in (out / "daemon.log").read_text()
    assert broker.running                                       # someone else's broker is left alone


def test_missing_optional_package_names_the_extra():
    with pytest.raises(EdgepropError, match=r"pip install 'edgeprop\[demo\]'"):
        require("no_such_module_for_edgeprop", "the demo's plot")


def test_broker_option_is_checked():
    assert parse_broker("broker.local:1883") == ("broker.local", 1883)
    assert parse_broker("[::1]:1884") == ("::1", 1884)
    for bad in ("broker.local", ":1883", "host:0", "host:port"):
        with pytest.raises(ConfigError, match="--broker"):
            parse_broker(bad)


def test_scenario_keeps_proportions_on_short_runs():
    assert scenario_times(4 * 86400) == (1.25 * 86400, 2 * 86400)      # as tuned: day 1.25, day 2
    season, fault = scenario_times(20 * 3600)
    assert season / (20 * 3600) == pytest.approx(1.25 / 3) and fault / (20 * 3600) == pytest.approx(2 / 3)


def test_generated_config_aligns_on_sensor_time(tmp_path):
    path = write_demo_config(str(tmp_path), "127.0.0.1", 18830, str(tmp_path / "c.sock"))
    s = load_config(path)
    m = s.models[0]
    assert (s.broker.host, s.broker.port) == ("127.0.0.1", 18830)
    assert s.state_dir == str(tmp_path / "state") and s.metrics.listen == "127.0.0.1:0"
    assert s.control_socket == str(tmp_path / "c.sock")
    assert m.target.time_field == "ts" and all(i.time_field == "ts" for i in m.inputs)


def test_view_plain_lines_and_in_place_redraw():
    status = {"rejects": {}, "models": {"bearing_temp": {
        "samples": 500, "recent_loss": 0.05, "drift_active": False, "learning_rate": 0.01,
        "configured_learning_rate": 0.01}}}
    msgs = [{"t": 1748736000.0 + 3600 * 10, "measured": 41.5, "predicted": 40.9, "residual": 0.6}]
    buf = io.StringIO()
    plain = View(False, buf.write, 90, 90 * 3600)
    plain.show(12, status, msgs)
    line = buf.getvalue()
    assert line.count("\n") == 1 and "simulated 10.0 h" in line and "RMSE last 200: 0.60 degC" in line
    assert "measured 41.50 degC predicted 40.90 degC" in line
    buf = io.StringIO()
    tty = View(True, buf.write, 90, 90 * 3600)
    tty.show(1, status, [])
    tty.show(2, status, msgs)
    first, second = buf.getvalue().split("\x1b[5F")              # back up over the 5 lines drawn
    assert "warm-up" in first and "\x1b[K" in second and "measured 41.50" in second
    # a learning-rate change between two polls becomes an event at the latest sim time
    tty.note_status(status, msgs)
    status["models"]["bearing_temp"]["learning_rate"] = 0.03
    tty.note_status(status, msgs)
    assert tty.events == [{"t": msgs[-1]["t"], "kind": "learning_rate", "value": "0.03",
                           "model": "bearing_temp"}]


@pytest.mark.integration
def test_broker_refusing_anonymous_clients_fails_at_once_with_its_reason(broker_factory, tmp_path):
    server = broker_factory(users={"edge": "pump-station-7"})
    out = tmp_path / "demo"
    started = time.monotonic()
    proc = demo(out, "--duration", "20", "--broker", f"{server.host}:{server.port}")
    try:
        stdout, _ = proc.communicate(timeout=60)
    finally:
        proc.kill()
    took = time.monotonic() - started
    assert proc.returncode == 1, stdout
    assert re.search(r"refused the daemon's login: .*event=broker_connect_failed reason=\"Not authorized\"",
                     stdout)
    assert "accept anonymous clients" in stdout and took < 20          # not the 30 s wait
    assert "event=stopped" in (out / "daemon.log").read_text()           # the daemon was still stopped


class ClosingListener:
    """A TCP port that accepts connections and closes them at once: no MQTT broker behind it."""

    def __init__(self) -> None:
        self.sock = socket.socket()
        self.sock.bind(("127.0.0.1", 0))
        self.sock.listen(8)
        self.sock.settimeout(0.2)
        self.port = self.sock.getsockname()[1]
        self.done = threading.Event()
        self.thread = threading.Thread(target=self._serve, daemon=True)
        self.thread.start()

    def _serve(self) -> None:
        while not self.done.is_set():
            try:
                conn, _ = self.sock.accept()
            except OSError:
                continue
            conn.close()

    def close(self) -> None:
        self.done.set()
        self.thread.join(5)
        self.sock.close()


def test_daemon_that_never_connects_names_its_last_connection_error(tmp_path):
    listener = ClosingListener()
    config = write_demo_config(str(tmp_path), "127.0.0.1", listener.port, str(tmp_path / "c.sock"))
    daemon = start_daemon(config, str(tmp_path))
    try:
        with pytest.raises(EdgepropError) as caught:
            wait_daemon_ready(daemon, str(tmp_path / "c.sock"), threading.Event(), timeout=4.0)
    finally:
        daemon.stop()
        listener.close()
    text = str(caught.value)
    assert "did not connect within 4 s; its last connection error: level=warning event=broker_" in text
    assert "reason=" in text and str(tmp_path / "daemon.log") in text and "anonymous" in text
