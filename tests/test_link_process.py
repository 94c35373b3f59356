"""The broker connection's own process, with a real mosquitto and real signals.

The daemon is two processes: the worker (``edgeprop run``) and its child that holds the
MQTT connection (daemon.link_child). These tests check the two live and die together the
way an operator and systemd expect: a stray SIGTERM to the child does not cut the link, a
dead child makes the daemon save and exit 1 (so systemd restarts it), and a dead parent
takes its child and the broker connection with it, so the broker says "offline".
"""
from __future__ import annotations

import os
import select
import signal
import socket
import threading
import time
from multiprocessing.connection import Connection
from types import SimpleNamespace

import pytest

from daemon.inbound import Inbound, InboundQueue
from daemon.link_child import DECODE_HERE_MAX, DIRECT_MAX, Forwarder
from daemon.link_process import OUTBOX_HOLD_S, OUTBOX_MAX, PROMPT_BATCH, LinkProcess
from daemon.mqtt_frames import take_publishes
from daemon.payloads import MessageDecoder
from daemon.settings import BrokerSettings, SourceSettings
from daemon_proc import Daemon, Probe, child_pids, model_config, retained, wait_until, write_config


STATUS = "edgeprop/testnode/status"
TOPIC = "edgeprop/testnode/m1"


def _alive(pid: int) -> bool:
    """True while ``pid`` runs (a zombie, dead but not yet reaped, counts as gone)."""
    try:
        with open(f"/proc/{pid}/stat") as f:
            return f.read().rsplit(")", 1)[1].split()[0] != "Z"
    except FileNotFoundError:
        return False


def _feed(probe: Probe, n: int, start: int = 0) -> None:
    """``n`` steps of speed, current and bearing temperature (arrival times)."""
    items = []
    for i in range(start, start + n):
        speed = 1000 + 10 * (i % 40)
        items += [("site/p1/speed", f'{{"value": {speed}}}'), ("site/p1/current", "12.5"),
                  ("site/p1/bearing_temp", f'{{"value": {40 + 0.01 * speed}}}')]
    probe.publish_many(items, qos=1)


@pytest.fixture
def running(tmp_path, broker):
    config = write_config(tmp_path, broker, [model_config(warmup=5)])
    daemon = Daemon(config)
    probe = Probe(broker)
    try:
        daemon.wait_ready()
        yield daemon, probe, config
    finally:
        probe.close()
        daemon.kill()


@pytest.mark.integration
def test_status_names_the_link_process_and_it_is_our_child(running):
    daemon, _, _ = running
    link_pid = daemon.status()["link_pid"]
    assert link_pid in child_pids(daemon.proc.pid)
    with open(f"/proc/{link_pid}/cmdline", "rb") as f:
        assert b"daemon.link_child" in f.read()


@pytest.mark.integration
def test_sigterm_to_the_child_alone_does_not_cut_the_link(running, broker):
    daemon, probe, _ = running
    link_pid = daemon.status()["link_pid"]
    os.kill(link_pid, signal.SIGTERM)          # what systemd's control-group kill sends it too
    os.kill(link_pid, signal.SIGINT)           # and a Ctrl-C to the terminal's process group
    time.sleep(0.5)
    assert _alive(link_pid)
    _feed(probe, 30)
    wait_until(lambda: len(probe.predictions(TOPIC)) >= 20, 15, "predictions after SIGTERM to the child")
    assert retained(broker, STATUS) == b"online"
    assert daemon.stop() == 0                  # the parent's SIGTERM still stops both
    assert not _alive(link_pid)
    assert retained(broker, STATUS) == b"offline"


@pytest.mark.integration
def test_a_dead_child_makes_the_daemon_save_and_exit_1(running, broker):
    daemon, probe, _ = running
    _feed(probe, 20)
    wait_until(lambda: daemon.status()["models"]["m1"]["samples"] >= 20, 15, "20 samples learned")
    os.kill(daemon.status()["link_pid"], signal.SIGKILL)
    assert daemon.proc.wait(10) == 1
    log = daemon.log()
    assert "event=link_process_lost" in log
    assert "reason=shutdown" in log            # the models were saved on the way out
    # the connection died without DISCONNECT, so the broker published the last will
    wait_until(lambda: retained(broker, STATUS) == b"offline", 10, "the will: offline")


@pytest.mark.integration
def test_a_killed_daemon_takes_its_link_process_with_it(running, broker):
    daemon, _, _ = running
    link_pid = daemon.status()["link_pid"]
    assert retained(broker, STATUS) == b"online"
    daemon.proc.kill()                         # SIGKILL: no handler runs in the parent
    daemon.proc.wait(5)
    wait_until(lambda: not _alive(link_pid), 10, "the link process to end after its parent")
    wait_until(lambda: retained(broker, STATUS) == b"offline", 10, "status offline")


# ---- the forwarder inside the link process, in-process with a real socket pair ------------------

def _forwarder(capacity: int, decoder=None):
    """A Forwarder on one end of a socket pair, its thread running; the other end for the test."""
    ours, theirs = socket.socketpair()
    queue = InboundQueue(capacity)
    forward = Forwarder(Connection(theirs.detach()), queue, decoder)
    forward.link = SimpleNamespace(connected=True, reconnects=0, publish_dropped=0, last_error=None)
    stopping = threading.Event()
    thread = threading.Thread(target=forward.run, args=(stopping,), daemon=True)
    thread.start()
    return forward, queue, Connection(ours.detach()), stopping, thread


def _readings(conn: Connection, n: int, timeout: float, sizes: list | None = None) -> list[tuple]:
    """Readings from the forwarder until ``n`` came or ``timeout`` s passed (state reports skipped)."""
    got: list[tuple] = []
    deadline = time.monotonic() + timeout
    while len(got) < n and conn.poll(max(0.0, deadline - time.monotonic())):
        message = conn.recv()
        if message[0] == "batch":
            got += message[1]
            if sizes is not None:
                sizes.append(len(message[1]))
    return got


def test_forwarded_readings_keep_their_order_whichever_way_they_go():
    # The reader is slow at first, so early readings queue; later ones find the queue empty
    # and go straight from the "network thread": the two paths must interleave in order.
    forward, queue, parent, stopping, thread = _forwarder(capacity=100_000)
    n = 20_000

    def network_thread():
        for i in range(n):
            forward.on_message("site/p1/speed", str(i).encode(), float(i))
            if i % 7 in (0, 3):
                forward.end_of_read()     # reads of 1, 3 and 4 readings, as paho's thread ends them
            if i % 2000 == 0:
                time.sleep(0.01)          # quiet spells: the queue drains, direct sends resume
        forward.end_of_read()
    producer = threading.Thread(target=network_thread)
    producer.start()
    time.sleep(0.05)
    sizes: list[int] = []
    got = _readings(parent, n, 30, sizes)
    producer.join(10)
    stopping.set()
    thread.join(5)
    assert [int(p) for _t, p, _a, _o in got] == list(range(n))
    assert queue.dropped == 0
    assert 1 in sizes and max(sizes) > 1          # both paths were taken


def test_readings_cross_decoded_by_the_engines_decoder_whichever_way_they_go():
    """Decoding happens in the connection's process; the worker gets the decoder's outcomes.
    A decoder that fails on a bug leaves that payload to the worker instead of ending paho's
    thread."""
    speed = SourceSettings("site/p1/speed", field="value")
    decoder = MessageDecoder({"site/p1/speed": (speed,)}, 100)      # broker.max_payload_bytes
    forward, queue, parent, stopping, thread = _forwarder(capacity=1000, decoder=decoder)
    forward.on_message("site/p1/speed", b'{"value": 1450.5}', 10.0)
    forward.on_message("site/p1/speed", b'{"value": "high"}', 11.0)
    forward.on_message("site/p1/speed", b"9" * 101, 12.0)
    forward.on_message("site/p1/other", b"1", 13.0)
    forward.on_message("site/p1/speed", b" " * DECODE_HERE_MAX + b"1", 13.5)
    forward.end_of_read()
    got = _readings(parent, 5, 5)
    assert [(t, p, a) for t, p, a, _o in got][0] == ("site/p1/speed", b'{"value": 1450.5}', 10.0)
    assert got[0][3] == (((10.0, 1450.5),),)
    assert got[1][3][0].reason == "wrong_type"
    assert got[2][3][0].reason == "oversize"          # over max_payload_bytes, refused here
    assert got[3][3] is None                          # no model reads it: the worker says so
    assert got[4][3] is None                          # large: left to the worker and its queue
    # a queued reading (the parent busy) carries its outcomes as well
    queue.put(Inbound("site/p1/speed", b"x", 1.0))    # something waits: the next read queues
    forward.on_message("site/p1/speed", b'{"value": 7.0}', 14.0)
    forward.end_of_read()
    got = _readings(parent, 2, 5)
    assert [o for _t, _p, _a, o in got] == [None, (((14.0, 7.0),),)]
    forward.decoder = SimpleNamespace(decode_message=lambda *a: 1 / 0)
    forward.on_message("site/p1/speed", b'{"value": 8.0}', 15.0)
    forward.end_of_read()
    assert _readings(parent, 1, 5) == [("site/p1/speed", b'{"value": 8.0}', 15.0, None)]
    stopping.set()
    queue.wake()
    thread.join(5)


def test_the_network_thread_never_waits_for_a_parent_that_does_not_read():
    forward, queue, parent, stopping, thread = _forwarder(capacity=1000)

    def network_thread():
        for i in range(50_000):
            # 50 MB in all, far beyond the socket pair's buffers; a distinct object each time,
            # or pickle would send one payload and 49,999 references to it
            forward.on_message("t", b"x" * 999 + bytes([i % 256]), 0.0)
            if i % 3 == 0:
                forward.end_of_read()
        forward.end_of_read()
    producer = threading.Thread(target=network_thread)
    producer.start()
    producer.join(30)
    assert not producer.is_alive(), "on_message blocked on a full socket"
    dropped = queue.dropped
    assert dropped > 0 and queue.depth == 1000        # the queue overflowed and stayed bounded
    # every reading not counted as dropped still reaches a parent that reads again
    got = _readings(parent, 50_000 - dropped, 60)
    assert len(got) == 50_000 - dropped
    stopping.set()
    queue.wake()
    thread.join(5)
    assert not thread.is_alive()


def test_the_readings_of_one_read_reach_the_parent_as_one_batch():
    forward, queue, parent, stopping, thread = _forwarder(capacity=1000)
    for i in range(5):
        forward.on_message("site/p1/speed", str(i).encode(), float(i))
    assert not parent.poll(0.05), "a reading left before its read ended"
    forward.end_of_read()
    sizes: list[int] = []
    got = _readings(parent, 5, 5, sizes)
    assert [p for _t, p, _a, _o in got] == [b"0", b"1", b"2", b"3", b"4"]
    assert sizes == [5]
    # a read larger than DIRECT_MAX bytes is cut, in order; a reading over it takes the queue
    big = b"y" * (DIRECT_MAX // 3)
    for i in range(7):
        forward.on_message("site/p1/spectrum", big + str(i).encode(), float(i))
    forward.on_message("site/p1/spectrum", b"z" * (DIRECT_MAX + 1), 7.0)
    forward.end_of_read()
    got = _readings(parent, 8, 5)
    assert [p[-1:] for _t, p, _a, _o in got] == [b"0", b"1", b"2", b"3", b"4", b"5", b"6", b"z"]
    stopping.set()
    queue.wake()
    thread.join(5)


def _outbox_under_test():
    """A LinkProcess whose child end is a plain socket pair held by the test."""
    link = LinkProcess(BrokerSettings(), "n1", [], log=lambda *a, **k: None)
    ours, theirs = socket.socketpair()
    link._conn = Connection(ours.detach())
    link._readable.register(link._conn.fileno(), select.POLLIN)
    link._batch_size = 1
    return link, Connection(theirs.detach())


def _pubs(child: Connection) -> list[int]:
    """Messages per write to the child (a run of QoS 0 packets counts as its count)."""
    sizes = []
    while child.poll(0.05):
        message = child.recv()
        assert message[0] == "pubs"
        sizes.append(sum(item[0] if len(item) == 2 else 1 for item in message[1]))
    return sizes


def test_qos0_messages_cross_as_their_packets_and_keep_their_order_with_the_rest():
    link, child = _outbox_under_test()
    link._batch_size = PROMPT_BATCH + 1                 # under load: nothing leaves on its own
    link.publish("edgeprop/n1/m1", b'{"predicted":1.5}')
    link.publish("edgeprop/n1/m1", "text", retain=True)
    link.publish("edgeprop/n1/m1/info", b"{}", qos=1, retain=True)
    link.publish("edgeprop/n1/m2", b"3")
    link.flush()
    kind, items = child.recv()
    assert kind == "pubs" and len(items) == 3
    assert items[1] == ("edgeprop/n1/m1/info", b"{}", 1, True)
    assert items[0][0] == 2 and items[2][0] == 1
    got = []
    assert take_publishes(items[0][1], 0, False, lambda t, p: got.append((t, p))) == len(items[0][1])
    assert got == [("edgeprop/n1/m1", b'{"predicted":1.5}'), ("edgeprop/n1/m1", b"text")]
    assert items[0][1][0] == 0x30 and items[2][1][0] == 0x30   # PUBLISH, QoS 0, no RETAIN
    second = items[0][1][2 + len("edgeprop/n1/m1") + 2 + len(b'{"predicted":1.5}'):]
    assert second[0] == 0x31                            # RETAIN bit on the second packet only


def test_predictions_leave_at_once_when_idle_and_gather_while_readings_wait():
    link, child = _outbox_under_test()
    link.publish("edgeprop/n1/m1", b"1")
    assert _pubs(child) == [1]                       # nothing waiting: out before learning
    child.send(("batch", [], (True, 0, 0, 0, 0)))   # a reading waits for the worker
    link.publish("edgeprop/n1/m1", b"2")
    link.flush_unless_busy()
    link.publish("edgeprop/n1/m1", b"3")
    link.flush_unless_busy()
    assert _pubs(child) == []                        # held: more to read, young, small
    time.sleep(OUTBOX_HOLD_S)
    link.flush_unless_busy()
    assert _pubs(child) == [2]                       # held no longer than OUTBOX_HOLD_S
    for i in range(OUTBOX_MAX):
        link.publish("edgeprop/n1/m1", str(i).encode())
    assert _pubs(child) == [OUTBOX_MAX]              # a full outbox goes at once
