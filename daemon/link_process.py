"""The worker's side of the broker connection, which lives in a child process (daemon.link_child).

To the service this looks like the connection and the inbound queue in one object:
``receive`` hands the worker the next batch of readings, ``publish`` sends a prediction,
``wake`` interrupts a ``receive`` (signals, control requests), and ``connected``,
``reconnects``, ``publish_dropped``, ``depth`` and ``dropped`` are the child's figures as of
its last report (at most ``link_child.IDLE_STATE_S`` old).

If the child dies, ``receive`` raises ``LinkProcessLost``: the service then saves its models
and exits 1, and systemd's ``Restart=on-failure`` starts a fresh daemon. A half-working daemon
that learns nothing would be worse than a restart that is logged.
"""
from __future__ import annotations

import os
import select
import socket
import subprocess
import sys
import time
from multiprocessing.connection import Connection

from .errors import ConfigError, EdgepropError
from .link_child import LinkState
from .logs import LogFn
from .mqtt_frames import publish_packet
from .payloads import MessageDecoder
from .broker_access import check_link_settings
from .settings import BrokerSettings

START_TIMEOUT_S = 30.0       # a small ARM box can take seconds to import paho in the child
OUTBOX_MAX = 64              # publishes queued before a flush is forced
OUTBOX_HOLD_S = 0.005        # under load, a prediction waits at most this long for company
PROMPT_BATCH = 4             # batches of readings up to this size publish each prediction at once


class LinkProcessLost(EdgepropError):
    """The broker connection's process ended without being asked to."""


class LinkProcess:
    """Start, feed and stop the child process that holds the one broker connection."""

    def __init__(self, settings: BrokerSettings, node: str, topics: list[str], log: LogFn,
                 log_level: str = "info", decoder: MessageDecoder | None = None) -> None:
        check_link_settings(settings)          # bad password file or certificate: exit 2 now
        self.settings = settings
        self._setup = ("setup", settings, node, list(topics), log_level,
                       settings.queue_size, settings.queue_bytes, decoder)
        self.log = log
        self.state = LinkState()
        self.lost_publishes = 0      # publishes that could not reach the child (it had died)
        self._proc: subprocess.Popen | None = None
        self._conn: Connection | None = None
        self._wake_r, self._wake_w = os.pipe()
        os.set_blocking(self._wake_r, False)
        os.set_blocking(self._wake_w, False)
        self._stopped = False
        self._outbox: list[tuple] = []  # (topic, payload, qos, retain) or (count, QoS 0 packets)
        self._packets: list[bytes] = []  # QoS 0 packets after the last outbox entry
        self._outbox_since = 0.0     # monotonic time of the oldest publish in the outbox
        self._v5 = settings.protocol == "5"
        self._topics: dict[str, bytes] = {}
        self._readable = select.poll()
        self._batch_size = 0         # readings in the batch the worker is handling

    def __repr__(self) -> str:
        pid = self._proc.pid if self._proc else None
        return f"LinkProcess(pid={pid}, {self.state})"

    # -- the child's figures ---------------------------------------------------------------
    @property
    def pid(self) -> int | None:
        """The child's process id (in ``status``: an operator's ``ps`` shows two processes)."""
        return self._proc.pid if self._proc else None

    @property
    def connected(self) -> bool:
        return self.state.connected

    @property
    def reconnects(self) -> int:
        return self.state.reconnects

    @property
    def publish_dropped(self) -> int:
        return self.state.publish_dropped + self.lost_publishes

    @property
    def depth(self) -> int:
        return self.state.queue_depth

    @property
    def dropped(self) -> int:
        return self.state.queue_dropped

    # -- life cycle ---------------------------------------------------------------------------
    def start(self) -> None:
        """Start the child and hand it the settings; raises ConfigError if it refuses them."""
        ours, theirs = socket.socketpair(socket.AF_UNIX, socket.SOCK_STREAM)
        env = {**os.environ, "PYTHONPATH": os.pathsep.join(filter(None, [
            os.path.dirname(os.path.dirname(os.path.abspath(__file__))), os.environ.get("PYTHONPATH")]))}
        with ours, theirs:
            self._proc = subprocess.Popen(
                [sys.executable, "-m", "daemon.link_child", str(theirs.fileno())],
                pass_fds=(theirs.fileno(),), stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL,
                env=env, start_new_session=False)
            self._conn = Connection(os.dup(ours.fileno()))
        self._readable.register(self._conn.fileno(), select.POLLIN)
        self._conn.send(self._setup)
        if not self._conn.poll(START_TIMEOUT_S):
            self._kill()
            raise LinkProcessLost(f"the broker connection process did not start within {START_TIMEOUT_S:.0f} s")
        reply = self._recv_or_lost()
        if reply[0] == "fatal":
            self._proc.wait(timeout=5)
            raise ConfigError(list(reply[1]))
        self.log("debug", "link_process_started", pid=self._proc.pid)

    def stop(self, timeout: float = 2.0) -> None:
        """Ask the child to publish ``offline`` and disconnect; wait for it, kill it if it hangs."""
        if self._conn is None or self._stopped:
            return
        self._stopped = True
        self.flush()
        try:
            self._conn.send(("stop", timeout))
            deadline = time.monotonic() + timeout + 2.0
            while time.monotonic() < deadline and self._conn.poll(max(0.0, deadline - time.monotonic())):
                message = self._conn.recv()
                if message[0] == "stopped":
                    self.state = LinkState(*message[1])
                    break
        except (EOFError, OSError):
            pass
        try:
            self._proc.wait(timeout=2.0)
        except subprocess.TimeoutExpired:
            self._kill()
        self._conn.close()
        # -1 first: a late signal's wake() must not write into a reused descriptor number
        wake_r, wake_w, self._wake_r, self._wake_w = self._wake_r, self._wake_w, -1, -1
        os.close(wake_r)
        os.close(wake_w)

    def _kill(self) -> None:
        if self._proc is not None and self._proc.poll() is None:
            self._proc.kill()
            self._proc.wait(timeout=5)

    # -- traffic ----------------------------------------------------------------------------------
    def publish(self, topic: str, payload: bytes | str, qos: int = 0, retain: bool = False) -> bool:
        """Queue one message for the child; ``flush`` hands the queued ones over in one write.

        Under load, one write per many predictions instead of one per prediction: each write
        wakes the child, and those wake-ups cost the worker a fifth of its time. A QoS 0
        message travels as its finished MQTT packet, which the child writes as it is.
        """
        if not self._outbox and not self._packets:
            self._outbox_since = time.monotonic()
        if isinstance(payload, str):
            payload = payload.encode()
        packet = self._packet(topic, payload, retain) if qos == 0 else None
        if packet is not None:
            self._packets.append(packet)
        else:
            self._close_packet_run()
            self._outbox.append((topic, payload, qos, retain))
        # A reading that came alone, with nothing waiting behind it, is no load: its
        # prediction leaves at once, not after the learning step that follows it.
        if self._waiting() >= OUTBOX_MAX:
            self.flush()
        elif self._batch_size <= PROMPT_BATCH and not self._more_to_read():
            self.flush()
            # The write woke the child's reader on this CPU (a Unix socket wakes its reader
            # where the writer runs, expecting the writer to sleep); without the yield it
            # would wait for the learning step to finish (bench trace: 0.12 ms at p50).
            os.sched_yield()
        return True

    def _packet(self, topic: str, payload: bytes, retain: bool) -> bytes | None:
        """The QoS 0 PUBLISH packet, or None for one MQTT cannot carry (paho's publish in the
        child then refuses it with its own message)."""
        name = self._topics.get(topic)
        if name is None:
            if len(self._topics) > 1000:        # topics come from the config: a handful
                self._topics.clear()
            name = self._topics[topic] = topic.encode()
        try:
            return publish_packet(name, payload, retain, self._v5)
        except ValueError:
            return None

    def _close_packet_run(self) -> None:
        if self._packets:
            self._outbox.append((len(self._packets), b"".join(self._packets)))
            self._packets = []

    def _waiting(self) -> int:
        return len(self._outbox) + len(self._packets)

    def flush_unless_busy(self) -> None:
        """``flush``, unless more readings wait and the outbox is young and small.

        Called after each batch of readings: while readings keep coming, predictions
        gather for up to OUTBOX_HOLD_S or OUTBOX_MAX of them, then go in one write.
        """
        if self._waiting() and (self._waiting() >= OUTBOX_MAX or not self._more_to_read()
                                or time.monotonic() - self._outbox_since >= OUTBOX_HOLD_S):
            self.flush()

    def _more_to_read(self) -> bool:
        return bool(self._readable.poll(0))

    def flush(self) -> None:
        """Send what ``publish`` queued; the child publishes it or counts it dropped."""
        self._close_packet_run()
        if not self._outbox:
            return
        batch, self._outbox = self._outbox, []
        try:
            self._conn.send(("pubs", batch))
        except (OSError, ValueError):
            self.lost_publishes += sum(item[0] if len(item) == 2 else 1 for item in batch)

    def set_log_level(self, level: str) -> None:
        """The child logs its own events (connects, losses); keep its level with the daemon's."""
        try:
            self._conn.send(("level", level))
        except (OSError, ValueError):
            pass

    def receive(self, timeout: float) -> list[tuple[str, bytes, float, tuple | None]]:
        """The next batch of readings as (topic, payload, arrival_t, outcomes), as they crossed the
        socket (no object per reading); empty after ``timeout`` s, on ``wake()`` or a state report."""
        ready = select.select([self._conn.fileno(), self._wake_r], [], [], timeout)[0]
        if self._wake_r in ready:
            self._drain_wake()
            return []
        if not ready:
            return []
        message = self._recv_or_lost()
        self.state = LinkState(*message[-1])
        if message[0] == "batch":
            self._batch_size = len(message[1])
            return message[1]
        self._batch_size = 0
        return []

    def wake(self) -> None:
        """Make a waiting (or the next) ``receive`` return at once; safe from a signal handler."""
        if self._wake_w < 0:
            return              # stopped
        try:
            os.write(self._wake_w, b"!")
        except (BlockingIOError, OSError):
            pass        # the pipe is full of wake-ups already, or we are shutting down

    def _drain_wake(self) -> None:
        try:
            while os.read(self._wake_r, 512):
                pass
        except (BlockingIOError, OSError):
            pass

    def _recv_or_lost(self) -> tuple:
        try:
            return self._conn.recv()
        except (EOFError, OSError) as exc:
            code = self._proc.poll() if self._proc else None
            raise LinkProcessLost(f"the broker connection process ended (exit code {code})") from exc
