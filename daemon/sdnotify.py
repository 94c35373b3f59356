"""Tell systemd how the service is doing (READY=1, STOPPING=1, WATCHDOG=1, STATUS=...).

The notify protocol is one datagram to the AF_UNIX socket named in $NOTIFY_SOCKET, so it
is spoken here directly instead of pulling in a systemd library. Outside systemd (tests,
a shell) there is no socket and every call is a quiet no-op: status reporting must never
be the reason the daemon stops.
"""
from __future__ import annotations

import os
import socket
from typing import Mapping


def _socket_address(name: str) -> str | None:
    """$NOTIFY_SOCKET as a connect() address: '@name' is Linux's abstract namespace."""
    if name.startswith("@"):
        return "\0" + name[1:]
    if name.startswith("/"):
        return name
    return None          # other transports (e.g. vsock:) are not used on our targets


def notify(state: str, env: Mapping[str, str] | None = None) -> bool:
    """Send ``state`` (e.g. "READY=1") to systemd; False when not under systemd or on any failure."""
    env = os.environ if env is None else env
    address = _socket_address(env.get("NOTIFY_SOCKET", ""))
    if address is None:
        return False
    try:
        with socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM | socket.SOCK_CLOEXEC) as sock:
            sock.settimeout(1.0)       # a full receive queue must not stall the worker for long
            sock.connect(address)
            sent = sock.send(state.encode("utf-8"))
    except (OSError, UnicodeError):
        return False
    return sent == len(state.encode("utf-8"))


def watchdog_interval_s(env: Mapping[str, str] | None = None) -> float | None:
    """The WatchdogSec= systemd set for this process, in seconds; None when there is none.

    Send "WATCHDOG=1" at least every half of this (the advice in systemd's sd_watchdog_enabled(3)
    man page; quoted from memory, the page is not installed here).
    """
    env = os.environ if env is None else env
    pid = env.get("WATCHDOG_PID")
    if pid is not None and pid.strip() != str(os.getpid()):
        return None      # the variable was meant for another process (e.g. our parent)
    try:
        usec = int(env.get("WATCHDOG_USEC", ""))
    except ValueError:
        return None
    return usec / 1e6 if usec > 0 else None
