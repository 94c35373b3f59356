"""The broker connection's own process: reads the broker, forwards readings, sends predictions.

Why a process and not a thread: paho's network thread and the learning worker shared one
interpreter lock, and every numpy call of the worker handed that lock back and forth with
paho's reads. With the connection here, each side runs on its own core, and the worker's
process has no competitor for its lock (tests/bench_daemon.py, DEVELOPERS.md).

Started by ``daemon.link_process.LinkProcess`` as ``python -m daemon.link_child FD``: FD is
one end of a Unix socket pair, framed by ``multiprocessing.connection.Connection``.
Everything that crosses it is built by edgeprop itself (payload bytes travel as opaque
``bytes``), so pickling it is safe.

The payloads are decoded here too (``MessageDecoder``, the engine's own code): this process
and the broker use a fraction of their core, the worker all of its own, so each reading's
JSON costs the worker nothing. The decoded (t, value) pairs, or the refusal, cross with it.

  parent -> child   ("setup", BrokerSettings, node, topics, log_level, queue_size, queue_bytes,
                     decoder)       decoder: a payloads.MessageDecoder, or None
                    ("pubs", [(topic, payload, qos, retain) | (count, qos0_packets), ...])
                    ("level", log_level)
                    ("stop", timeout_s)
  child -> parent   ("hello", pid) | ("fatal", [problem, ...])
                    ("batch", [(topic, payload, arrival_t, outcomes), ...], state)
                                    outcomes: decoder.decode_message's, or None
                    ("state", state)        when idle, so counters and `connected` stay fresh
                    ("stopped", state)      state: the fields of LinkState, as a plain tuple
"""
from __future__ import annotations

import os
import select
import signal
import sys
import threading
from multiprocessing.connection import Connection
from typing import NamedTuple

from .errors import ConfigError
from .inbound import Inbound, InboundQueue
from .logs import Log
from .mqtt_link import BrokerLink
from .payloads import MessageDecoder

FORWARD_BATCH = 512          # readings per message to the parent at most
IDLE_STATE_S = 0.2           # with no readings, send the link's state this often
DIRECT_MAX = 16384           # bytes: a reading up to this size may skip the queue (see Forwarder)
DECODE_HERE_MAX = 1024       # bytes: payloads up to this size are decoded here (see _decode)


class LinkState(NamedTuple):
    """The connection's and the inbound queue's figures, as the parent reports them."""

    connected: bool = False
    reconnects: int = 0
    publish_dropped: int = 0
    queue_depth: int = 0
    queue_dropped: int = 0
    last_error: str = ""         # why the last connection attempt failed or was lost


class Forwarder:
    """Moves readings to the parent in arrival order, never making paho's thread wait.

    paho's thread hands over the readings of one socket read (``on_message`` for each, then
    ``end_of_read``): one read under load holds many readings, and sending them as one
    message to the parent costs one write and one wake-up instead of one per reading. A read
    that finds nothing queued before it and the socket pair with room goes straight from
    paho's thread (no thread hand-off: lower latency at plant rates). Otherwise its readings
    join the bounded queue, and the forwarder thread sends the queue in batches, blocking on
    the parent if it must. Both send under one lock, and the queue is only taken under it,
    so no reading overtakes an older one.
    """

    def __init__(self, conn: Connection, queue: InboundQueue,
                 decoder: MessageDecoder | None = None) -> None:
        self.conn, self.queue, self.decoder = conn, queue, decoder
        self.lock = threading.Lock()
        self.link: BrokerLink | None = None
        self._poll = select.poll()
        self._poll.register(conn.fileno(), select.POLLOUT)
        self._held: list[tuple] = []     # this read's (topic, payload, arrival_t, outcomes), paho's thread only
        self._held_bytes = 0

    def state(self) -> tuple:
        # a plain tuple on the wire: this module runs as __main__ here, so a LinkState would
        # be pickled under a name the parent cannot look up
        link, queue = self.link, self.queue
        return (link.connected, link.reconnects, link.publish_dropped, queue.depth, queue.dropped,
                link.last_error or "")

    def on_message(self, topic: str, payload: bytes, arrival_t: float) -> None:
        """paho's thread: hold the reading until the end of the read (or until enough is held)."""
        size = len(payload)
        if self._held_bytes + size > DIRECT_MAX or len(self._held) >= FORWARD_BATCH:
            self.end_of_read()
        self._held.append((topic, payload, arrival_t, self._decode(topic, payload, arrival_t)))
        self._held_bytes += size

    def _decode(self, topic: str, payload: bytes, arrival_t: float) -> tuple | None:
        """The decoder's outcomes; None leaves the payload to the worker.

        Only small payloads (a sensor reading, a short SenML pack): this runs in paho's
        thread, and a flood of large ones parsed here would slow the reads until the broker
        dropped messages unseen. Left to the worker, they fill the bounded queue, which drops
        the oldest and counts them. A bug in decoding must not end paho's thread either: the
        worker then meets it and counts it as its own.
        """
        if self.decoder is None or len(payload) > DECODE_HERE_MAX:
            return None
        try:
            return self.decoder.decode_message(topic, payload, arrival_t)
        except Exception:       # noqa: BLE001 (the worker reports it)
            return None

    def end_of_read(self) -> None:
        """paho's thread: send what is held now if that cannot block, else queue it (drop-oldest)."""
        held, size = self._held, self._held_bytes
        if not held:
            return
        self._held, self._held_bytes = [], 0
        # (only a single reading over DIRECT_MAX can make size exceed it: it takes the queue)
        if size <= DIRECT_MAX and not self.queue.depth and self.lock.acquire(blocking=False):
            try:
                # A Unix socket polls writable while at most a quarter of its send buffer
                # (>= 200 KiB here) is in use, so DIRECT_MAX bytes go without waiting.
                if not self.queue.depth and self._poll.poll(0):
                    self._send_locked(("batch", held, self.state()))
                    return
            finally:
                self.lock.release()
        self.queue.put_many([Inbound(*reading) for reading in held])

    def send(self, message: tuple) -> bool:
        with self.lock:
            return self._send_locked(message)

    def _send_locked(self, message: tuple) -> bool:
        try:
            self.conn.send(message)
            return True
        except (OSError, ValueError):   # the parent is gone; the main thread sees EOF next
            return False

    def run(self, stopping: threading.Event) -> None:
        """The forwarder thread: queued readings in batches, or the link's state when idle."""
        queue = self.queue
        while not stopping.is_set():
            waiting = queue.wait(IDLE_STATE_S)
            with self.lock:
                items = queue.get_many(FORWARD_BATCH, timeout=0) if waiting else []
                if items:
                    message = ("batch", [(i.topic, i.payload, i.arrival_t, i.outcomes) for i in items],
                               self.state())
                else:
                    message = ("state", self.state())
                if not self._send_locked(message):
                    return


def _serve(conn: Connection, link: BrokerLink, queue: InboundQueue, log: Log, forward: Forwarder) -> None:
    """Carry out the parent's requests until it says stop or goes away."""
    stopping = threading.Event()
    forwarder = threading.Thread(target=forward.run, args=(stopping,),
                                 name="edgeprop-forward", daemon=True)
    forwarder.start()
    timeout = 2.0
    while True:
        try:
            message = conn.recv()
        except (EOFError, OSError):
            log("warning", "link_parent_gone", action="disconnecting")
            break
        kind = message[0]
        if kind == "pubs":
            link.publish_batch(message[1])
        elif kind == "level":
            log.set_level(message[1])
        elif kind == "stop":
            timeout = float(message[1])
            break
    stopping.set()
    queue.wake()
    forwarder.join(timeout=1.0)
    link.stop(timeout=timeout)
    forward.send(("stopped", forward.state()))


def run_child(conn: Connection) -> int:
    """The child's whole life: set up the link from the parent's settings, serve, stop."""
    # The parent decides when to stop: a SIGTERM sent to the whole service (systemd does that)
    # or a Ctrl-C to the terminal's process group must not cut the connection before the
    # parent has published its last predictions and "offline".
    for signum in (signal.SIGTERM, signal.SIGINT, signal.SIGHUP):
        signal.signal(signum, signal.SIG_IGN)
    try:
        _, settings, node, topics, level, queue_size, queue_bytes, decoder = conn.recv()
    except (EOFError, OSError, ValueError):
        return 1
    log = Log(level)
    queue = InboundQueue(queue_size, queue_bytes)
    forward = Forwarder(conn, queue, decoder)
    try:
        # a wake-up makes the forwarder report the new state now, not at its next idle round
        link = BrokerLink(settings, node, topics, log=log, on_state_change=queue.wake,
                          on_message=forward.on_message, on_read_done=forward.end_of_read)
    except ConfigError as exc:
        forward.send(("fatal", list(exc.problems)))
        return 2
    forward.link = link
    forward.send(("hello", os.getpid()))
    link.start()
    _serve(conn, link, queue, log, forward)
    conn.close()
    return 0


def main(argv: list[str] | None = None) -> int:
    args = sys.argv[1:] if argv is None else argv
    if len(args) != 1 or not args[0].isdigit():
        print("usage: python -m daemon.link_child FD (started by edgeprop run, not by hand)",
              file=sys.stderr)
        return 2
    return run_child(Connection(int(args[0])))


if __name__ == "__main__":
    sys.exit(main())
