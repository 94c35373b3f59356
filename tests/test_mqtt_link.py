"""BrokerLink against a real broker process: status + will, subscriptions, reconnects, auth, TLS."""
from __future__ import annotations

import os
import random
import queue
import shutil
import socket
import subprocess
import sys
import tempfile
import threading
import time
import uuid

import paho.mqtt.client as mqtt
import pytest
from paho.mqtt.enums import CallbackAPIVersion

from broker_fixture import make_test_pki
from daemon.errors import ConfigError
from daemon.inbound import Inbound, InboundQueue
from daemon.mqtt_frames import publish_packet
from daemon.broker_access import read_password_file, tls_context
from daemon.mqtt_link import BrokerLink
from daemon.settings import BrokerSettings, TlsSettings

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
FAST_RETRY = {"reconnect_min_s": 0.1, "reconnect_max_s": 0.4}


class Watcher:
    """A plain paho client standing in for the plant's other MQTT users."""

    def __init__(self, port: int, topics: list[str]) -> None:
        self.messages: queue.Queue = queue.Queue()
        self.client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=f"watcher-{uuid.uuid4().hex[:8]}")
        self.client.on_message = lambda c, u, m: self.messages.put((m.topic, m.payload, m.retain))
        subscribed = threading.Event()
        self.client.on_subscribe = lambda *args: subscribed.set()
        self.client.connect("127.0.0.1", port, 10)
        self.client.loop_start()
        if topics:
            self.client.subscribe([(t, 1) for t in topics])
            assert subscribed.wait(5), "watcher subscription not acknowledged"

    def expect(self, topic: str, payload: bytes, timeout: float = 5.0) -> bool:
        """Wait for ``payload`` on ``topic``; return its retain flag."""
        seen = []
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            try:
                got = self.messages.get(timeout=max(0.0, deadline - time.monotonic()))
            except queue.Empty:
                break
            if got[:2] == (topic, payload):
                return got[2]
            seen.append(got)
        raise AssertionError(f"no {payload!r} on {topic} within {timeout} s; saw {seen}")

    def publish(self, topic: str, payload: bytes) -> None:
        self.client.publish(topic, payload, qos=1).wait_for_publish(5)

    def close(self) -> None:
        self.client.disconnect()
        self.client.loop_stop()


class Recorder:
    """Collects log calls so tests can read what an operator would see."""

    def __init__(self) -> None:
        self.lines: list[tuple[str, str, dict]] = []

    def __call__(self, level: str, event: str, **fields: object) -> None:
        self.lines.append((level, event, {**fields, "_at": time.monotonic()}))

    def events(self, name: str) -> list[dict]:
        return [fields for _, event, fields in self.lines if event == name]


def make_link(port: int, subscriptions: list[str], sink: InboundQueue | None = None,
              log: Recorder | None = None, node: str = "station-7", **settings: object) -> BrokerLink:
    sink = sink if sink is not None else InboundQueue(100)
    return BrokerLink(BrokerSettings(port=port, **settings), node, subscriptions,
                      lambda topic, payload, t: sink.put(Inbound(topic, payload, t)),
                      log=log or Recorder(), rng=random.Random(7))


def wait_until(predicate, timeout: float) -> bool:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if predicate():
            return True
        time.sleep(0.02)
    return predicate()


@pytest.mark.parametrize("protocol", ["3.1.1", "5"])
def test_online_subscribe_publish_then_offline_on_clean_stop(broker, protocol):
    if protocol == "5" and broker.kind == "amqtt":
        pytest.skip("amqtt speaks MQTT 3.1.1 only")
    watcher = Watcher(broker.port, ["edgeprop/station-7/#"])
    sink = InboundQueue(100)
    link = BrokerLink(BrokerSettings(port=broker.port, protocol=protocol), "station-7",
                      ["site/p1/#"], lambda topic, payload, t: sink.put(Inbound(topic, payload, t)),
                      clock=lambda: 1733000000.5, log=Recorder())
    try:
        link.start()
        assert link.wait_connected(5)
        watcher.expect("edgeprop/station-7/status", b"online")
        # Nagle off on the live socket (FIELD-NOTES: otherwise ~40 ms stalls on small messages)
        assert link._client.socket().getsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY) != 0

        watcher.publish("site/p1/speed", b"1480.0")
        item = sink.get(5.0)
        assert item == Inbound("site/p1/speed", b"1480.0", 1733000000.5)

        assert link.publish("edgeprop/station-7/bearing_temp", b'{"predicted": 61.2}', qos=1)
        watcher.expect("edgeprop/station-7/bearing_temp", b'{"predicted": 61.2}')
    finally:
        link.stop()
        watcher.close()
    assert not link.connected
    late = Watcher(broker.port, ["edgeprop/station-7/status"])   # joins after: sees the retained copy
    try:
        assert late.expect("edgeprop/station-7/status", b"offline") is True
    finally:
        late.close()


def test_last_will_says_offline_when_the_process_is_killed(broker):
    code = (
        "from daemon.mqtt_link import BrokerLink\n"
        "from daemon.settings import BrokerSettings\n"
        "import time\n"
        f"link = BrokerLink(BrokerSettings(port={broker.port}, keepalive_s=2), 'pump-1', [], lambda *a: None)\n"
        "link.start()\n"
        "print('ready' if link.wait_connected(10) else 'timeout', flush=True)\n"
        "time.sleep(60)\n")
    watcher = Watcher(broker.port, ["edgeprop/pump-1/status"])
    proc = subprocess.Popen([sys.executable, "-c", code], stdout=subprocess.PIPE, text=True,
                            env={**os.environ, "PYTHONPATH": ROOT})
    try:
        assert proc.stdout.readline().strip() == "ready"
        watcher.expect("edgeprop/pump-1/status", b"online")
        proc.kill()                                # no chance to publish a goodbye itself
        proc.wait(5)
        watcher.expect("edgeprop/pump-1/status", b"offline", timeout=8.0)   # keepalive 2 s bounds it
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait(5)
        proc.stdout.close()
        watcher.close()
    late = Watcher(broker.port, ["edgeprop/pump-1/status"])
    try:
        assert late.expect("edgeprop/pump-1/status", b"offline") is True   # the will was retained
    finally:
        late.close()


def test_reconnects_and_resubscribes_after_broker_restart(broker):
    log = Recorder()
    sink = InboundQueue(100)
    link = make_link(broker.port, ["site/p1/flow"], sink, log, **FAST_RETRY)
    try:
        link.start()
        assert link.wait_connected(5)
        broker.kill()
        assert wait_until(lambda: not link.connected, 5)
        assert not link.publish("edgeprop/station-7/x", b"1")        # refused while offline, counted
        assert link.publish_dropped == 1
        time.sleep(0.5)                                            # a few failed attempts
        broker.start()                                             # same port, fresh broker: no sessions
        assert link.wait_connected(5)
        assert link.reconnects == 1
        watcher = Watcher(broker.port, ["edgeprop/station-7/status"])
        try:
            watcher.expect("edgeprop/station-7/status", b"online")   # re-announced to the new broker
            watcher.publish("site/p1/flow", b"42.5")
            assert sink.get(5.0).payload == b"42.5"                   # the subscription was renewed
        finally:
            watcher.close()
    finally:
        link.stop()
    assert link.connect_failures >= 1
    lost = log.events("broker_connection_lost")
    failed = log.events("broker_connect_failed")
    assert len(lost) == 1 and len(failed) == link.connect_failures
    for fields in lost + failed:      # every attempt: one line, a reason, a delay within the bounds
        assert fields["reason"]
        assert FAST_RETRY["reconnect_min_s"] - 0.01 <= fields["retry_in_s"] <= FAST_RETRY["reconnect_max_s"] + 0.01


def test_start_returns_while_the_broker_is_down_and_connects_later(broker):
    broker.stop()
    log = Recorder()
    link = make_link(broker.port, [], log=log, **FAST_RETRY)
    try:
        link.start()
        assert not link.connected
        assert wait_until(lambda: link.connect_failures >= 2, 5)
        assert "refused" in log.events("broker_connect_failed")[0]["reason"].lower()
        broker.start()
        assert link.wait_connected(5)
        assert link.reconnects == 0                  # the first success is not a reconnect
    finally:
        link.stop()
    failed = log.events("broker_connect_failed")
    for this, following in zip(failed, failed[1:]):  # the announced delay really passed
        assert following["_at"] - this["_at"] >= this["retry_in_s"] - 0.02


def test_publish_is_bounded_when_the_broker_stops_acknowledging(broker):
    link = make_link(broker.port, [])
    link.max_pending = 5
    try:
        link.start()
        assert link.wait_connected(5)
        broker.pause()                               # socket open, no PUBACKs come back
        results = [link.publish("edgeprop/station-7/m", b"%d" % i, qos=1) for i in range(8)]
        assert results == [True] * 5 + [False] * 3
        assert link.publish_dropped == 3
        broker.resume()
        assert wait_until(lambda: link.publish("edgeprop/station-7/m", b"again", qos=1), 5)
    finally:
        broker.resume()
        link.stop()


def test_unsent_qos0_backlog_is_bounded_and_cleared_by_a_reconnect(broker):
    link = make_link(broker.port, [], **FAST_RETRY)
    link.max_pending = 3
    big = b"x" * 2_000_000          # fills the loopback socket buffers in a few messages
    try:
        link.start()
        assert link.wait_connected(5)
        broker.pause()
        accepted = 0
        for _ in range(20):
            if not link.publish("edgeprop/station-7/m", big):
                break
            accepted += 1
        assert 3 <= accepted < 20 and link.publish_dropped == 1   # refused, not piled up
        broker.kill()                # the stuck messages die with the connection ...
        assert wait_until(lambda: not link.connected, 5)
        broker.start()
        assert link.wait_connected(5)
        assert link.publish("edgeprop/station-7/m", b"1")          # ... and free their places
    finally:
        link.stop()


def test_a_failing_message_callback_does_not_stop_delivery(broker):
    seen: list[bytes] = []

    def on_message(topic: str, payload: bytes, t: float) -> None:
        if payload == b"bad":
            raise RuntimeError("decoder bug")
        seen.append(payload)

    log = Recorder()
    link = BrokerLink(BrokerSettings(port=broker.port), "station-7", ["site/#"], on_message, log=log)
    watcher = Watcher(broker.port, [])
    try:
        link.start()
        assert link.wait_connected(5)
        watcher.publish("site/a", b"bad")
        watcher.publish("site/a", b"good")
        assert wait_until(lambda: seen == [b"good"], 5)
        assert link.callback_errors == 1 and link.connected
        assert "decoder bug" in log.events("inbound_callback_failed")[0]["error"]
    finally:
        link.stop()
        watcher.close()


@pytest.mark.parametrize("protocol", ["3.1.1", "5"])
def test_readings_bypass_paho_in_order_whatever_their_size_and_properties(broker, protocol):
    # Inbound QoS 0 publishes are read by daemon.mqtt_frames; paho's message path (which
    # calls on_message) only gets a packet cut by the end of a socket read, as the large one
    # is. Whichever way: every reading, exact and in order, MQTT 5 properties included.
    if protocol == "5" and broker.kind == "amqtt":
        pytest.skip("amqtt speaks MQTT 3.1.1 only")
    sink = InboundQueue(10_000, 10**9)
    link = make_link(broker.port, ["site/p1/#"], sink, protocol=protocol)
    by_paho = []
    paho_path = link._client.on_message

    def counting(client, userdata, message):
        by_paho.append(message.topic)
        paho_path(client, userdata, message)
    link._client.on_message = counting
    v5 = protocol == "5"
    sender = mqtt.Client(CallbackAPIVersion.VERSION2, client_id="sender",
                         protocol=mqtt.MQTTv5 if v5 else mqtt.MQTTv311)
    props = None
    if v5:
        from paho.mqtt.packettypes import PacketTypes
        from paho.mqtt.properties import Properties
        props = Properties(PacketTypes.PUBLISH)
        props.ContentType = "application/json"
        props.UserProperty = [("unit", "degC")]
    sent = [(f"site/p1/s{i % 5}", str(i).encode() * (1 + i % 3)) for i in range(500)]
    sent.insert(250, ("site/p1/spectrum", random.Random(3).randbytes(300_000)))
    try:
        link.start()
        assert link.wait_connected(5)
        sender.connect("127.0.0.1", broker.port)
        sender.loop_start()
        for topic, payload in sent:
            info = sender.publish(topic, payload, qos=0, properties=props)
        info.wait_for_publish(10)
        got = []
        while len(got) < len(sent):
            item = sink.get(5.0)
            assert item is not None, f"only {len(got)} of {len(sent)} readings arrived"
            got.append((item.topic, item.payload))
        assert got == sent
        assert link.callback_errors == 0
        assert "site/p1/spectrum" in by_paho and len(by_paho) < 50, by_paho
    finally:
        sender.loop_stop()
        sender.disconnect()
        link.stop()


class CountingSocket:
    """Stands in for paho's wake-up socket: counts the wake-ups that really went out."""

    def __init__(self, sock) -> None:
        self.sock, self.sent = sock, 0

    def send(self, data: bytes) -> int:
        self.sent += 1
        return self.sock.send(data)

    def close(self) -> None:
        self.sock.close()


def count_wakes(link: BrokerLink) -> CountingSocket:
    """Count the wake-ups of paho's thread from now on."""
    wake = link._client._sockpairW
    wake.sock = counting = CountingSocket(wake.sock)
    return counting


def start_settled(link: BrokerLink, watcher: Watcher) -> CountingSocket:
    """Start ``link`` and let paho's thread finish with the "online" status and its
    acknowledgement: while it reads or writes, a batch is left to it by design. Then count
    its wake-ups."""
    link.start()
    assert link.wait_connected(5)
    watcher.expect("edgeprop/station-7/status", b"online")
    assert wait_until(lambda: not link._pending, 5)
    time.sleep(0.2)
    return count_wakes(link)


def test_a_batch_of_predictions_is_written_by_the_thread_that_queued_it(broker):
    watcher = Watcher(broker.port, ["edgeprop/station-7/#"])
    link = make_link(broker.port, [])
    try:
        counting = start_settled(link, watcher)
        link.publish_batch([(f"edgeprop/station-7/m/{i}", str(i).encode(), 0, False) for i in range(3)])
        # nothing left for paho's thread: it was not woken (its select() waits up to 1 s)
        assert counting.sent == 0 and not link._client._out_packet
        for i in range(3):
            watcher.expect(f"edgeprop/station-7/m/{i}", str(i).encode())
        # far more than the socket takes at once: the rest is left to paho's thread, woken for it
        link._client.socket().setsockopt(socket.SOL_SOCKET, socket.SO_SNDBUF, 4096)
        big = [(f"edgeprop/station-7/m/big{i}", bytes([i]) * 300_000, 0, False) for i in range(20)]
        link.publish_batch(big)
        assert counting.sent == 1
        for topic, payload, _q, _r in big:
            watcher.expect(topic, payload, timeout=10)
    finally:
        link.stop()
        watcher.close()


def test_over_tls_paho_thread_writes_the_batch(broker_factory, pki):
    # one TLS connection must not be read and written by two threads: paho's thread is woken
    server = broker_factory(tls=pki)
    link = make_link(server.port, [], tls=TlsSettings(pki.ca_file))
    try:
        link.start()
        assert link.wait_connected(5)
        counting = count_wakes(link)
        link.publish_batch([("edgeprop/station-7/m", b"1", 0, False), ("edgeprop/station-7/m", b"2", 0, False)])
        assert counting.sent == 1
        assert wait_until(lambda: not link._client._out_packet, 5)
    finally:
        link.stop()


def _packets(messages: list[tuple[str, bytes]], v5: bool = False, retain: bool = False) -> tuple[int, bytes]:
    return len(messages), b"".join(publish_packet(t.encode(), p, retain, v5) for t, p in messages)


def _collect(watcher: Watcher, n: int, timeout: float = 10.0) -> list[tuple[str, bytes]]:
    got = []
    deadline = time.monotonic() + timeout
    while len(got) < n and time.monotonic() < deadline:
        try:
            topic, payload, _retain = watcher.messages.get(timeout=max(0.0, deadline - time.monotonic()))
        except queue.Empty:
            break
        if not topic.endswith("/status"):
            got.append((topic, payload))
    return got


@pytest.mark.parametrize("protocol", ["3.1.1", "5"])
def test_ready_made_packets_go_out_in_order_with_paho_publishes(broker, protocol):
    if protocol == "5" and broker.kind == "amqtt":
        pytest.skip("amqtt speaks MQTT 3.1.1 only")
    watcher = Watcher(broker.port, ["edgeprop/station-7/#"])
    link = make_link(broker.port, [], protocol=protocol)
    v5 = protocol == "5"
    try:
        counting = start_settled(link, watcher)
        first = [("edgeprop/station-7/m/a", b"1"), ("edgeprop/station-7/m/b", b"2")]
        before = link._client._last_msg_out
        link.publish_batch([_packets(first, v5)])
        # nothing queued before them and the socket free: written here, paho's thread not woken
        assert counting.sent == 0 and not link._client._out_packet
        assert link._client._last_msg_out > before      # paho's keepalive knows we just sent
        link.publish_batch([_packets([("edgeprop/station-7/m/c", b"3")], v5),
                            ("edgeprop/station-7/m/info", b"i", 1, True),
                            _packets([("edgeprop/station-7/m/d", b"4")], v5, retain=True)])
        assert _collect(watcher, 5) == [*first, ("edgeprop/station-7/m/c", b"3"),
                                        ("edgeprop/station-7/m/info", b"i"),
                                        ("edgeprop/station-7/m/d", b"4")]
        late = Watcher(broker.port, ["edgeprop/station-7/m/d"])
        try:
            assert late.expect("edgeprop/station-7/m/d", b"4") is True
        finally:
            late.close()
        # far more than the socket takes at once: the rest waits on paho's queue, in order
        link._client.socket().setsockopt(socket.SOL_SOCKET, socket.SO_SNDBUF, 4096)
        big = [(f"edgeprop/station-7/m/big{i}", bytes([i]) * 300_000) for i in range(12)]
        before = counting.sent
        link.publish_batch([_packets(big[:6], v5), _packets(big[6:], v5)])
        assert counting.sent > before
        assert _collect(watcher, 12, timeout=20) == big
        assert link.publish_dropped == 0
    finally:
        link.stop()
        watcher.close()


def test_ready_made_packets_offline_or_over_the_bound_are_counted_dropped(broker):
    link = make_link(broker.port, [], **FAST_RETRY)
    link.max_pending = 3
    try:
        assert link.publish_packets(*_packets([("edgeprop/station-7/m", b"1")] * 4)) is False
        assert link.publish_dropped == 4                     # not connected yet: all four
        link.start()
        assert link.wait_connected(5)
        assert wait_until(lambda: not link._pending, 5)     # "online" is out and acknowledged
        broker.pause()                                       # the broker reads nothing more
        big = _packets([("edgeprop/station-7/m", b"x" * 2_000_000)])
        accepted = 0
        for _ in range(20):
            if not link.publish_packets(*big):
                break
            accepted += 1
        # the kernel's buffers take a few; then at most max_pending wait on paho's queue
        assert 1 <= accepted < 20 and link.publish_dropped == 5   # refused, not piled up
        assert len(link._client._out_packet) <= 3
    finally:
        broker.resume()
        link.stop()


def test_over_tls_ready_made_packets_are_written_by_paho_thread(broker_factory, pki):
    server = broker_factory(tls=pki)
    sender = make_link(server.port, [], tls=TlsSettings(pki.ca_file))
    received = InboundQueue(10)
    reader = make_link(server.port, ["edgeprop/station-7/m"], sink=received, node="reader",
                       tls=TlsSettings(pki.ca_file))
    try:
        reader.start()
        sender.start()
        assert reader.wait_connected(5) and sender.wait_connected(5)
        time.sleep(0.3)                                      # the reader's subscription settles
        counting = count_wakes(sender)
        sender.publish_batch([_packets([("edgeprop/station-7/m", b"1"), ("edgeprop/station-7/m", b"2")])])
        assert counting.sent >= 1
        got = received.get_many(10, timeout=5)
        while len(got) < 2:
            more = received.get_many(10, timeout=5)
            assert more, f"only {got} arrived"
            got += more
        assert [(i.topic, i.payload) for i in got] == [("edgeprop/station-7/m", b"1"), ("edgeprop/station-7/m", b"2")]
    finally:
        sender.stop()
        reader.stop()


# ---- credentials --------------------------------------------------------------------------

def write_secret(directory, text: str, mode: int) -> str:
    path = os.path.join(str(directory), "broker.pass")
    with open(path, "w") as fh:
        fh.write(text)
    os.chmod(path, mode)
    return path


def test_password_file_readable_by_others_is_refused(tmp_path):
    path = write_secret(tmp_path, "s3cret\n", 0o644)
    with pytest.raises(ConfigError) as err:
        BrokerLink(BrokerSettings(username="edge", password_file=path), "n", [], lambda *a: None)
    assert path in str(err.value) and "chmod 600" in str(err.value) and "0644" in str(err.value)
    assert "s3cret" not in str(err.value)


def test_password_file_strips_one_trailing_newline_and_refuses_more_lines(tmp_path):
    assert read_password_file(write_secret(tmp_path, "pa ss\n", 0o600)) == "pa ss"
    assert read_password_file(write_secret(tmp_path, "crlf\r\n", 0o600)) == "crlf"
    # a blank line after it: the broker would only say "not authorized"
    for text in ("pa ss\n\n", "one\ntwo\n"):
        with pytest.raises(ConfigError, match="holds more than one line; write the broker "
                                              "password alone on its first line"):
            read_password_file(write_secret(tmp_path, text, 0o600))


def test_bad_settings_are_config_errors(tmp_path):
    with pytest.raises(ConfigError, match="broker.protocol"):
        BrokerLink(BrokerSettings(protocol="4"), "n", [], lambda *a: None)
    with pytest.raises(ConfigError, match="broker.username"):
        BrokerLink(BrokerSettings(password_file=write_secret(tmp_path, "x", 0o600)), "n", [], lambda *a: None)
    with pytest.raises(ConfigError, match="broker.password_file.*cannot open"):
        BrokerLink(BrokerSettings(username="u", password_file=str(tmp_path / "missing")), "n", [], lambda *a: None)


def test_password_login_and_wrong_password_backs_off(broker_factory, tmp_path):
    server = broker_factory(users={"edge": "pump-station-7"})
    good = make_link(server.port, ["site/#"], username="edge",
                     password_file=write_secret(tmp_path, "pump-station-7\n", 0o600))
    try:
        good.start()
        assert good.wait_connected(5)
    finally:
        good.stop()

    log = Recorder()
    wrong = make_link(server.port, [], log=log, username="edge",
                      password_file=write_secret(tmp_path, "guess\n", 0o600), **FAST_RETRY)
    try:
        wrong.start()
        assert wait_until(lambda: wrong.connect_failures >= 3, 5)
        assert not wrong.connected
    finally:
        wrong.stop()
    failed = log.events("broker_connect_failed")
    assert failed and all(f["reason"] == "Not authorized" for f in failed)
    assert all(f["hint"] == "check broker.username and the password in broker.password_file"
               for f in failed)
    assert all(f["retry_in_s"] >= FAST_RETRY["reconnect_min_s"] - 0.01 for f in failed)
    assert not any("guess" in repr(line) for line in log.lines)        # the password is never logged


# ---- TLS ----------------------------------------------------------------------------------

def test_tls_context_verifies_host_names_and_refuses_old_tls(pki):
    context = tls_context(TlsSettings(pki.ca_file))
    assert context.check_hostname is True
    assert context.minimum_version.name == "TLSv1_2"
    with pytest.raises(ConfigError, match="broker.tls.ca_file"):
        tls_context(TlsSettings("/nonexistent/ca.pem"))


def test_tls_with_client_certificate(broker_factory, pki):
    server = broker_factory(tls=pki, require_certificate=True)
    tls = TlsSettings(pki.ca_file, pki.client_cert, pki.client_key)
    link = make_link(server.port, [], tls=tls)
    try:
        link.start()
        assert link.wait_connected(5)
        assert link.publish("edgeprop/station-7/m", b"1", qos=1)
    finally:
        link.stop()

    no_cert = make_link(server.port, [], tls=TlsSettings(pki.ca_file), **FAST_RETRY)
    try:
        no_cert.start()
        assert wait_until(lambda: no_cert.connect_failures >= 1, 5)
        assert not no_cert.connected
    finally:
        no_cert.stop()


def test_tls_refuses_a_certificate_for_another_host(broker_factory):
    directory = tempfile.mkdtemp(prefix="edgeprop-pki-")
    try:
        other = make_test_pki(directory, server_san="DNS:broker.example.net")
        server = broker_factory(tls=other)
        log = Recorder()
        link = make_link(server.port, [], log=log, tls=TlsSettings(other.ca_file), **FAST_RETRY)
        try:
            link.start()
            assert wait_until(lambda: link.connect_failures >= 1, 5)
            assert not link.connected
        finally:
            link.stop()
        assert "mismatch" in log.events("broker_connect_failed")[0]["reason"]
    finally:
        shutil.rmtree(directory, ignore_errors=True)
