"""The daemon speaks systemd's notify protocol: a test-bound datagram socket plays systemd.

The protocol itself (one datagram per call, abstract sockets, no-op without a socket) is
unit-tested in tests/test_sdnotify.py; here a real ``edgeprop run`` subprocess must send the
right states at the right moments across start, reload and stop.
"""
from __future__ import annotations

import signal
import time

import pytest

from daemon_proc import Daemon, NotifyListener, write_config

WATCHDOG_USEC = 2_000_000       # as systemd would set for WatchdogSec=2


@pytest.fixture
def listener():
    sock = NotifyListener()
    try:
        yield sock
    finally:
        sock.close()


def _states(lines: list[str]) -> list[str]:
    """The state assignments in order, without STATUS/MONOTONIC_USEC detail."""
    return [x for x in lines if x.split("=", 1)[0] in ("READY", "RELOADING", "STOPPING", "WATCHDOG")]


def _collapse(states: list[str]) -> list[str]:
    """Drop repeats of the line before (watchdog pings come many times)."""
    out: list[str] = []
    for s in states:
        if not out or out[-1] != s:
            out.append(s)
    return out


def test_ready_watchdog_reloading_ready_stopping_in_order(broker, tmp_path, listener):
    cfg = write_config(tmp_path, broker)
    d = Daemon(cfg, env=listener.env(WATCHDOG_USEC))
    try:
        listener.collect(lambda n: "WATCHDOG=1" in n.lines(), what="READY=1 and a first ping")
        text = d.wait_ready()
        # restored (fresh here) and connected before READY
        assert text.index("event=model_fresh") < text.index("event=broker_connected") < text.index("event=ready")
        ready = next(text for _t, text in listener.datagrams if "READY=1" in text)
        assert "STATUS=connected to broker" in ready

        # pings keep coming from the worker while it idles: at least two more
        listener.collect(lambda n: n.lines().count("WATCHDOG=1") >= 3, timeout=10,
                         what="watchdog pings")

        d.signal(signal.SIGHUP)
        listener.collect(lambda n: "READY=1" in n.lines()[n.lines().index("RELOADING=1") + 1:]
                         if "RELOADING=1" in n.lines() else False, what="RELOADING=1 then READY=1")
        reloading = next(text for _t, text in listener.datagrams if "RELOADING=1" in text)
        assert "MONOTONIC_USEC=" in reloading      # systemd's Type=notify-reload asks for it
        pings = listener.lines().count("WATCHDOG=1")
        listener.collect(lambda n: n.lines().count("WATCHDOG=1") > pings, timeout=5,
                         what="a ping after the reload")

        d.signal(signal.SIGTERM)
        listener.collect(lambda n: "STOPPING=1" in n.lines(), what="STOPPING=1")
        assert d.proc.wait(10) == 0
        quiet = time.monotonic() + 0.3
        listener.collect(lambda n: time.monotonic() > quiet)     # all it sent on the way out
    finally:
        d.kill()

    states = _states(listener.lines())
    assert _collapse([s for s in states if s != "WATCHDOG=1"]) == \
        ["READY=1", "RELOADING=1", "READY=1", "STOPPING=1"], states
    assert states.index("WATCHDOG=1") > states.index("READY=1")
    assert states[-1] == "STOPPING=1"
    # never a silence as long as WatchdogSec while running: systemd would have killed us
    ping_times = [t for t, text in listener.datagrams if "WATCHDOG=1" in text]
    gaps = [b - a for a, b in zip(ping_times, ping_times[1:])]
    assert gaps and max(gaps) < WATCHDOG_USEC / 1e6, gaps


def test_ready_waits_for_the_broker(broker, tmp_path, listener):
    cfg = write_config(tmp_path, broker)
    broker.stop()
    d = Daemon(cfg, env=listener.env())
    try:
        d.wait_log("event=started")
        deadline = time.monotonic() + 2.0
        listener.collect(lambda n: time.monotonic() > deadline, what="2 s of silence")
        assert "READY=1" not in listener.lines()       # restored, but no broker yet
        broker.start()
        listener.collect(lambda n: "READY=1" in n.lines(), what="READY=1 after the broker came up")
        assert "STATUS=connected to broker" in listener.lines()
        assert d.stop() == 0
    finally:
        d.kill()
