"""``edgeprop record``: capture the live traffic a config listens to, for replay and tuning.

A recording made on the plant lets an engineer try learning rates, windows or
drift settings offline against the exact traffic the daemon saw. The MQTT
network thread only timestamps and enqueues; the calling thread writes, so
a slow disk never stalls the broker connection.
"""
from __future__ import annotations

import os
import queue
import threading
import time
from typing import Callable, Optional, Protocol

import paho.mqtt.client as mqtt

from .broker_access import read_password_file, tls_context
from .capture import CaptureWriter
from .errors import EdgepropError
from .settings import BrokerSettings, Settings

LogFn = Callable[..., None]


class StopFlag(Protocol):
    def is_set(self) -> bool: ...


def recorded_topics(settings: Settings) -> list[str]:
    """Every target and input topic of every model, first use first, without repeats."""
    topics: list[str] = []
    for model in settings.models:
        for topic in [model.target.topic, *(i.topic for i in model.inputs)]:
            if topic not in topics:
                topics.append(topic)
    return topics


def _make_client(settings: Settings) -> mqtt.Client:
    b: BrokerSettings = settings.broker
    # Its own client id: reusing the daemon's would make the broker drop the running daemon.
    client_id = f"{b.client_id or 'edgeprop-' + settings.node}-record-{os.getpid()}"
    protocol = mqtt.MQTTv5 if b.protocol == "5" else mqtt.MQTTv311
    client = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=client_id, protocol=protocol)
    if b.username is not None:     # read as run reads it, so record sends what run would send
        client.username_pw_set(b.username, read_password_file(b.password_file) if b.password_file else None)
    if b.tls is not None:
        # the daemon's own context (TLS 1.2 or newer, host name checked): record connects
        # under the same rules as run, so a capture proves the daemon's connection would work
        client.tls_set_context(tls_context(b.tls))
    client.reconnect_delay_set(max(1, round(b.reconnect_min_s)), max(1, round(b.reconnect_max_s)))
    return client


def _open_writer(out_path: str, overwrite: bool) -> CaptureWriter:
    try:
        return CaptureWriter(out_path, overwrite=overwrite)
    except FileExistsError as e:
        raise EdgepropError(f"capture file {out_path} already exists; choose another --out "
                            "or remove it (nothing was written)") from e
    except OSError as e:
        raise EdgepropError(f"cannot create capture file {out_path}: {e.strerror}") from e


def _wait_ready(ready: threading.Event, stop_event: StopFlag, timeout_s: float) -> bool:
    """True once subscribed (or refused), or when asked to stop; False on timeout."""
    deadline = time.monotonic() + timeout_s
    while not ready.wait(0.1):
        if stop_event.is_set():
            return True
        if time.monotonic() >= deadline:
            return False
    return True


def _remove_quietly(path: str) -> None:
    try:
        os.remove(path)
    except OSError:
        pass


def record(settings: Settings, out_path: str, duration_s: Optional[float], count: Optional[int],
           log: LogFn, stop_event: StopFlag, clock: Callable[[], float] = time.time,
           connect_timeout_s: float = 10.0, overwrite: bool = False) -> int:
    """Write every message on the config's topics to ``out_path`` until duration, count or stop; return lines."""
    topics = recorded_topics(settings)
    b = settings.broker
    inbox: queue.Queue = queue.Queue(maxsize=b.queue_size)
    ready, failure = threading.Event(), []
    dropped = [0]

    def on_connect(client, userdata, flags, reason_code, properties):
        if reason_code.is_failure:
            failure.append(f"broker refused the connection: {reason_code}")
            log("warning", "broker_refused", reason=str(reason_code))
            ready.set()
            return
        client.subscribe([(t, 1) for t in topics])

    def on_subscribe(client, userdata, mid, reason_codes, properties):
        bad = [f"{t} ({rc})" for t, rc in zip(topics, reason_codes) if rc.is_failure]
        if bad:
            failure.append("broker refused subscriptions: " + ", ".join(bad))
        ready.set()

    def on_message(client, userdata, msg):
        try:
            inbox.put_nowait((clock(), msg.topic, bytes(msg.payload)))
        except queue.Full:
            dropped[0] += 1

    def on_disconnect(client, userdata, flags, reason_code, properties):
        if reason_code.is_failure:
            log("warning", "broker_disconnected", reason=str(reason_code))

    try:
        client = _make_client(settings)
    except (OSError, ValueError) as e:     # ssl.SSLError is an OSError
        raise EdgepropError(f"cannot set up the broker connection (broker.tls / credentials): {e}") from e
    writer = _open_writer(out_path, overwrite)
    client.on_connect, client.on_subscribe = on_connect, on_subscribe
    client.on_message, client.on_disconnect = on_message, on_disconnect
    written, ok = 0, False
    try:
        try:
            client.connect(b.host, b.port, keepalive=b.keepalive_s)
        except (OSError, ValueError) as e:
            raise EdgepropError(f"cannot reach broker {b.host}:{b.port}: {e}") from e
        client.loop_start()
        if not _wait_ready(ready, stop_event, connect_timeout_s):
            raise EdgepropError(f"broker {b.host}:{b.port} did not confirm the subscriptions "
                                f"within {connect_timeout_s:g} s")
        if failure:
            raise EdgepropError(failure[0])
        log("info", "record_started", out=out_path, topics=len(topics))
        written = _drain(inbox, writer, duration_s, count, stop_event)
        ok = True
    finally:
        client.disconnect()
        client.loop_stop()
        writer.close()
        if not ok and writer.lines == 0:
            _remove_quietly(out_path)      # a failed start leaves no empty file in the way of a retry
    if dropped[0]:
        log("warning", "record_dropped", messages=dropped[0], reason="inbound queue full")
    log("info", "record_finished", out=out_path, lines=written)
    return written


def _drain(inbox: queue.Queue, writer: CaptureWriter, duration_s: Optional[float],
           count: Optional[int], stop_event: StopFlag) -> int:
    """Write queued messages until a limit is hit; what arrived before the stop is still written."""
    deadline = None if duration_s is None else time.monotonic() + duration_s
    written = 0

    def room() -> bool:
        return count is None or written < count

    while room():
        if stop_event.is_set() or (deadline is not None and time.monotonic() >= deadline):
            for _ in range(inbox.qsize()):      # the backlog at the stop, not what keeps coming
                if not room():
                    break
                writer.write(*inbox.get_nowait())
                written += 1
            break
        wait = 0.2 if deadline is None else max(0.0, min(0.2, deadline - time.monotonic()))
        try:
            item = inbox.get(timeout=wait)
        except queue.Empty:
            continue
        writer.write(*item)
        written += 1
    return written
