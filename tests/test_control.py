"""Control socket over a real Unix socket, with a worker thread answering between messages."""
from __future__ import annotations

import json
import os
import shutil
import socket
import stat
import tempfile
import threading

import pytest

from daemon.control import (BUSY, ControlServer, DaemonNotRunning, daemon_running, request)
from daemon.errors import CheckpointError, ControlError


@pytest.fixture
def sock_path():
    # Unix socket paths are limited to ~108 bytes; pytest's tmp_path can be longer.
    d = tempfile.mkdtemp(prefix="ep", dir="/tmp")
    yield os.path.join(d, "control.sock")
    shutil.rmtree(d, ignore_errors=True)


class Worker:
    """Stands in for the service loop: sleeps on its queue, drains control requests on wake."""

    def __init__(self, server: ControlServer) -> None:
        self.server = server
        self.woken = threading.Event()
        self.stop = threading.Event()
        self.seen: list[tuple[dict, int]] = []
        server.wake = self.woken.set
        self.thread = threading.Thread(target=self.run, daemon=True)
        self.thread.start()

    def run(self) -> None:
        while not self.stop.is_set():
            if self.woken.wait(0.05):
                self.woken.clear()
                self.server.drain(self.handle)

    def handle(self, payload: dict):
        self.seen.append((payload, threading.get_ident()))
        if payload["cmd"] == "status":
            return {"models": {"bearing_temp": {"samples": 12, "checkpoint": "20261201T101500Z-000042"}}}
        if payload["cmd"] == "rollback":
            if payload["to"] != "20261201T101500Z-000042":
                raise CheckpointError(f"no checkpoint {payload['to']!r}")
            return {"model": payload["model"], "restored": payload["to"]}
        if payload["cmd"] == "save-now":
            raise RuntimeError("disk on fire")
        return None

    def close(self) -> None:
        self.stop.set()
        self.thread.join(2)


@pytest.fixture
def served(sock_path):
    server = ControlServer(sock_path, reply_timeout=2.0, log=lambda *a, **k: None)
    worker = Worker(server)
    yield server, worker
    worker.close()
    server.close()


def raw_exchange(path: str, data: bytes) -> dict:
    with socket.socket(socket.AF_UNIX, socket.SOCK_STREAM) as s:
        s.settimeout(5)
        s.connect(path)
        s.sendall(data)
        buf = b""
        while not buf.endswith(b"\n"):
            chunk = s.recv(4096)
            if not chunk:
                break
            buf += chunk
    return json.loads(buf)


def test_requests_are_answered_by_the_worker_thread(served, sock_path):
    server, worker = served
    reply = request(sock_path, {"cmd": "status"})
    assert reply == {"ok": True, "result": {"models": {"bearing_temp": {
        "samples": 12, "checkpoint": "20261201T101500Z-000042"}}}}
    ok = request(sock_path, {"cmd": "rollback", "model": "bearing_temp",
                             "to": "20261201T101500Z-000042"})
    assert ok == {"ok": True, "result": {"model": "bearing_temp",
                                         "restored": "20261201T101500Z-000042"}}
    bad = request(sock_path, {"cmd": "rollback", "model": "bearing_temp", "to": "nope"})
    assert bad == {"ok": False, "error": "no checkpoint 'nope'"}
    crash = request(sock_path, {"cmd": "save-now", "model": None})
    assert crash["ok"] is False and "RuntimeError: disk on fire" in crash["error"]
    assert request(sock_path, {"cmd": "pin", "model": "m", "id": "x"}) == {"ok": True, "result": None}
    assert {tid for _, tid in worker.seen} == {worker.thread.ident}
    assert [p["cmd"] for p, _ in worker.seen] == ["status", "rollback", "rollback", "save-now", "pin"]


def test_socket_is_owner_only_and_removed_on_close(sock_path):
    before = os.umask(0o022)
    try:
        server = ControlServer(sock_path, log=lambda *a, **k: None)
        assert os.umask(0o022) == 0o022                  # umask restored after bind
    finally:
        os.umask(before)
    st = os.stat(sock_path)
    assert stat.S_ISSOCK(st.st_mode) and stat.S_IMODE(st.st_mode) == 0o600
    assert daemon_running(sock_path)
    server.close()
    assert not os.path.exists(sock_path)
    assert not daemon_running(sock_path)


def test_stale_socket_is_replaced(sock_path):
    dead = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    dead.bind(sock_path)                                 # a daemon that died without cleanup
    dead.close()
    assert os.path.exists(sock_path) and not daemon_running(sock_path)
    with pytest.raises(DaemonNotRunning, match="does not answer"):
        request(sock_path, {"cmd": "status"})
    server = ControlServer(sock_path, log=lambda *a, **k: None)
    worker = Worker(server)
    try:
        assert request(sock_path, {"cmd": "status"})["ok"] is True
    finally:
        worker.close()
        server.close()


def test_second_server_is_refused_while_first_is_alive(served, sock_path):
    with pytest.raises(ControlError, match=f"another edgeprop is running on {sock_path}"):
        ControlServer(sock_path, log=lambda *a, **k: None)
    assert request(sock_path, {"cmd": "status"})["ok"] is True   # first one unharmed


def test_non_socket_path_is_not_replaced(sock_path):
    with open(sock_path, "w") as f:
        f.write("keep me")
    with pytest.raises(ControlError, match="not a socket"):
        ControlServer(sock_path, log=lambda *a, **k: None)
    with open(sock_path) as f:
        assert f.read() == "keep me"


def test_bad_requests_get_error_replies(served, sock_path):
    server, worker = served
    big = raw_exchange(sock_path, b'{"cmd": "status", "pad": "' + b"x" * 70_000 + b'"}\n')
    assert big == {"ok": False, "error": "request larger than 65536 bytes"}
    junk = raw_exchange(sock_path, b"{status\n")
    assert junk["ok"] is False and junk["error"].startswith("request is not valid JSON")
    unknown = request(sock_path, {"cmd": "format-disk"})
    assert unknown["ok"] is False and "unknown cmd 'format-disk'" in unknown["error"]
    missing = request(sock_path, {"cmd": "rollback", "model": "bearing_temp"})
    assert missing == {"ok": False, "error": "rollback needs a non-empty string 'to'"}
    assert raw_exchange(sock_path, b"[1, 2]\n")["error"] == "request must be a JSON object"
    assert worker.seen == []                             # none of these reached the worker
    assert request(sock_path, {"cmd": "status"})["ok"] is True


def test_busy_worker_gets_busy_reply_and_never_runs_it(sock_path):
    server = ControlServer(sock_path, reply_timeout=0.2, log=lambda *a, **k: None)
    try:
        reply = request(sock_path, {"cmd": "rollback", "model": "m", "to": "x"})
        assert reply == {"ok": False, "error": BUSY}
        ran = []
        assert server.drain(ran.append) == 0 and ran == []   # expired: not acted on later
    finally:
        server.close()


def test_client_reports_missing_daemon(sock_path):
    with pytest.raises(DaemonNotRunning, match=f"daemon not running \\(no socket at {sock_path}\\)"):
        request(sock_path, {"cmd": "status"})
    assert not daemon_running(sock_path)
