"""systemd notify protocol against real AF_UNIX datagram sockets bound by the test."""
from __future__ import annotations

import os
import shutil
import socket
import tempfile
import uuid

import pytest

from daemon.sdnotify import notify, watchdog_interval_s


@pytest.fixture
def notify_socket():
    """A datagram socket where systemd's would be; a short path (sun_path holds 107 bytes)."""
    directory = tempfile.mkdtemp(prefix="sdn-")
    path = os.path.join(directory, "notify")
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    sock.bind(path)
    sock.settimeout(2.0)
    try:
        yield path, sock
    finally:
        sock.close()
        shutil.rmtree(directory, ignore_errors=True)


def test_ready_arrives_exactly(notify_socket):
    path, sock = notify_socket
    assert notify("READY=1", {"NOTIFY_SOCKET": path}) is True
    assert sock.recv(4096) == b"READY=1"


def test_each_call_is_one_datagram(notify_socket):
    path, sock = notify_socket
    env = {"NOTIFY_SOCKET": path}
    assert notify("STATUS=learning, 3 models\nWATCHDOG=1", env)
    assert notify("STOPPING=1", env)
    assert sock.recv(4096) == b"STATUS=learning, 3 models\nWATCHDOG=1"
    assert sock.recv(4096) == b"STOPPING=1"


def test_abstract_namespace_socket():
    name = f"edgeprop-test-{uuid.uuid4().hex}"
    with socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM) as sock:
        sock.bind("\0" + name)
        sock.settimeout(2.0)
        assert notify("READY=1", {"NOTIFY_SOCKET": "@" + name})
        assert sock.recv(4096) == b"READY=1"


def test_no_socket_is_a_quiet_no_op():
    assert notify("READY=1", {}) is False
    assert notify("READY=1", {"NOTIFY_SOCKET": ""}) is False


def test_send_failure_returns_false_instead_of_raising(tmp_path):
    assert notify("READY=1", {"NOTIFY_SOCKET": str(tmp_path / "nobody-listens")}) is False
    assert notify("READY=1", {"NOTIFY_SOCKET": "vsock:2:1234"}) is False


def test_watchdog_interval():
    me = str(os.getpid())
    assert watchdog_interval_s({"WATCHDOG_USEC": "5000000"}) == 5.0
    assert watchdog_interval_s({"WATCHDOG_USEC": "250000", "WATCHDOG_PID": me}) == 0.25
    assert watchdog_interval_s({"WATCHDOG_USEC": "5000000", "WATCHDOG_PID": str(os.getpid() + 1)}) is None
    assert watchdog_interval_s({}) is None
    assert watchdog_interval_s({"WATCHDOG_USEC": "soon"}) is None
    assert watchdog_interval_s({"WATCHDOG_USEC": "0"}) is None
