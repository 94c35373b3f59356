"""`record` against a real broker: what arrives on the config's topics lands in the capture file."""
from __future__ import annotations

import os
import threading
import time

import paho.mqtt.client as mqtt
import pytest

from daemon.capture import CaptureLine, read_capture
from daemon.errors import EdgepropError
from daemon.record import record, recorded_topics
from daemon.settings import BrokerSettings, InputSettings, ModelSettings, Settings, SourceSettings


def make_settings(host: str, port: int, **broker: object) -> Settings:
    bearing = ModelSettings(
        name="bearing_temp", target=SourceSettings("site/p1/bearing_temp", "value", "ts"),
        inputs=(InputSettings("speed", "site/p1/speed"), InputSettings("raw", "site/p1/raw")))
    flow = ModelSettings(   # shares the speed topic: subscribed once
        name="flow_est", target=SourceSettings("site/p1/flow"),
        inputs=(InputSettings("speed", "site/p1/speed"),))
    return Settings(models=(bearing, flow), node="rec-test",
                    broker=BrokerSettings(host=host, port=port, **broker))


class Recorder:
    """Runs record() in a thread; ``started`` is set once subscriptions are confirmed."""

    def __init__(self, settings: Settings, out: str, duration_s=None, count=None) -> None:
        self.started, self.stop = threading.Event(), threading.Event()
        self.events: list[tuple[str, str, dict]] = []
        self.result: list = []

        def log(level: str, event: str, **fields: object) -> None:
            self.events.append((level, event, fields))
            if event == "record_started":
                self.started.set()

        def target() -> None:
            try:
                self.result.append(record(settings, out, duration_s, count, log, self.stop))
            except Exception as e:     # handed to the test thread
                self.result.append(e)
            self.started.set()

        self.thread = threading.Thread(target=target, daemon=True)
        self.thread.start()

    def join(self, timeout: float = 10.0):
        self.thread.join(timeout)
        assert not self.thread.is_alive(), "record() did not return"
        return self.result[0]


def publisher(host: str, port: int) -> mqtt.Client:
    c = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="rec-test-pub")
    c.connect(host, port)
    c.loop_start()
    return c


def test_recorded_topics_deduplicated():
    s = make_settings("127.0.0.1", 1)
    assert recorded_topics(s) == ["site/p1/bearing_temp", "site/p1/speed", "site/p1/raw", "site/p1/flow"]


def test_records_bare_json_and_binary_payloads(broker, tmp_path):
    out = str(tmp_path / "cap.jsonl")
    rec = Recorder(make_settings(broker.host, broker.port), out, count=4)
    assert rec.started.wait(10) and not rec.result, rec.result
    before = time.time()
    pub = publisher(broker.host, broker.port)
    sent = [("site/p2/other", b"9"),                                     # not in the config
            ("site/p1/speed", b"2950.5"),
            ("site/p1/bearing_temp", b'{"value": 61.2, "ts": 1733000000}'),
            ("site/p1/raw", b"\xff\x00\x01\x80"),
            ("site/p1/flow", "12,5 m³/h".encode())]
    for topic, payload in sent:
        pub.publish(topic, payload, qos=1).wait_for_publish(5)
    assert rec.join() == 4
    after = time.time()
    pub.disconnect()
    pub.loop_stop()
    lines = list(read_capture(out))
    assert all(isinstance(x, CaptureLine) for x in lines)
    assert [(x.topic, x.payload) for x in lines] == sent[1:]
    assert all(before <= x.t <= after for x in lines)
    raw = open(out, encoding="utf-8").read().splitlines()
    assert '"payload_b64"' in raw[2] and '"payload": "12,5 m³/h"' in raw[3]
    assert [e[1] for e in rec.events][-1] == "record_finished"


def test_duration_and_stop_event_end_a_quiet_recording(broker, tmp_path):
    out = str(tmp_path / "quiet.jsonl")
    t0 = time.monotonic()
    assert Recorder(make_settings(broker.host, broker.port), out, duration_s=0.5).join() == 0
    assert 0.5 <= time.monotonic() - t0 < 5.0
    assert os.path.getsize(out) == 0
    rec = Recorder(make_settings(broker.host, broker.port), str(tmp_path / "stopped.jsonl"))
    assert rec.started.wait(10)
    rec.stop.set()
    assert rec.join(5) == 0


def test_password_from_file(broker_factory, tmp_path):
    b = broker_factory(users={"recorder": "s3cret"})
    good = tmp_path / "good.pw"
    good.write_text("s3cret\n")
    bad = tmp_path / "bad.pw"
    bad.write_text("wrong\n")
    for p in (good, bad):
        os.chmod(p, 0o600)
    rec = Recorder(make_settings(b.host, b.port, username="recorder", password_file=str(good)),
                   str(tmp_path / "a.jsonl"), count=1)
    assert rec.started.wait(10) and not rec.result, rec.result
    pub = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="rec-test-pub")
    pub.username_pw_set("recorder", "s3cret")
    pub.connect(b.host, b.port)
    pub.loop_start()
    pub.publish("site/p1/speed", b"1500", qos=1).wait_for_publish(5)
    assert rec.join() == 1
    pub.disconnect()
    pub.loop_stop()
    refused = Recorder(make_settings(b.host, b.port, username="recorder", password_file=str(bad)),
                       str(tmp_path / "b.jsonl"), count=1).join()
    assert isinstance(refused, EdgepropError) and "refused" in str(refused)
    assert not (tmp_path / "b.jsonl").exists()


def test_empty_password_file_is_refused_before_connecting(tmp_path):
    empty = tmp_path / "empty.pw"
    empty.write_text("\n")
    os.chmod(empty, 0o600)
    out = tmp_path / "a.jsonl"
    # port 1: were it to connect, the error would be an unreachable broker instead
    err = Recorder(make_settings("127.0.0.1", 1, username="recorder", password_file=str(empty)),
                   str(out), count=1).join()
    assert isinstance(err, EdgepropError)
    assert str(err).endswith(f"broker.password_file: {str(empty)!r} is empty; write the broker "
                             f"password into it")
    assert not out.exists()


def test_existing_capture_is_not_overwritten(tmp_path):
    out = tmp_path / "cap.jsonl"
    out.write_text("days of plant traffic\n")
    err = Recorder(make_settings("127.0.0.1", 1), str(out), count=1).join()
    assert isinstance(err, EdgepropError) and "already exists" in str(err)
    assert out.read_text() == "days of plant traffic\n"


def test_unreachable_broker_is_a_clear_error(tmp_path):
    from broker_fixture import free_port
    port = free_port()
    err = Recorder(make_settings("127.0.0.1", port), str(tmp_path / "c.jsonl"), count=1).join()
    assert isinstance(err, EdgepropError) and f"127.0.0.1:{port}" in str(err)
    assert not (tmp_path / "c.jsonl").exists()          # no empty file left to block a retry


def test_tls_with_client_certificate(broker_factory, tmp_path):
    from broker_fixture import make_test_pki
    from daemon.settings import TlsSettings
    pki = make_test_pki(str(tmp_path))
    b = broker_factory(tls=pki, require_certificate=True)
    tls = TlsSettings(ca_file=pki.ca_file, cert_file=pki.client_cert, key_file=pki.client_key)
    rec = Recorder(make_settings(b.host, b.port, tls=tls), str(tmp_path / "tls.jsonl"), count=1)
    assert rec.started.wait(10) and not rec.result, rec.result
    pub = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="rec-test-pub")
    pub.tls_set(ca_certs=pki.ca_file, certfile=pki.client_cert, keyfile=pki.client_key)
    pub.connect(b.host, b.port)
    pub.loop_start()
    pub.publish("site/p1/raw", b"\x00", qos=1).wait_for_publish(5)
    assert rec.join() == 1
    pub.disconnect()
    pub.loop_stop()
    assert [(x.topic, x.payload) for x in read_capture(str(tmp_path / "tls.jsonl"))] == [("site/p1/raw", b"\x00")]


def test_records_the_simulated_station(broker, tmp_path):
    import json
    from daemon.simulator import PumpStation, publish_loop
    out = str(tmp_path / "sim.jsonl")
    rec = Recorder(make_settings(broker.host, broker.port), out, count=6)
    assert rec.started.wait(10) and not rec.result, rec.result
    pub = publisher(broker.host, broker.port)
    infos = []
    steps = publish_loop(lambda t, p: infos.append(pub.publish(t, p, qos=1)), PumpStation(3, dt_s=30),
                         "site/p1", 1e6, 60.0, time.monotonic, time.sleep, None)
    for info in infos:
        info.wait_for_publish(5)
    # 2 steps x (speed, flow, bearing_temp); current and ambient are not in this config
    assert steps == 2 and rec.join() == 6
    pub.disconnect()
    pub.loop_stop()
    lines = list(read_capture(out))
    got = [x.topic.rsplit("/", 1)[1] for x in lines]
    assert got.count("speed") == 2 and got.count("flow") == 2 and got.count("bearing_temp") == 2
    bodies = [json.loads(x.payload) for x in lines if x.topic.endswith("bearing_temp")]
    assert all(set(b) == {"value", "ts"} for b in bodies)


def test_silent_broker_times_out_with_a_clear_error(tmp_path):
    import socket
    with socket.socket() as server:            # accepts TCP but never answers CONNECT
        server.bind(("127.0.0.1", 0))
        server.listen(1)
        port = server.getsockname()[1]
        s = make_settings("127.0.0.1", port)
        with pytest.raises(EdgepropError, match="did not confirm the subscriptions within 0.5 s"):
            record(s, str(tmp_path / "d.jsonl"), None, 1, lambda *a, **k: None, threading.Event(),
                   connect_timeout_s=0.5)
    assert not (tmp_path / "d.jsonl").exists()


def test_missing_tls_file_is_a_clear_error(tmp_path):
    from daemon.settings import TlsSettings
    s = make_settings("127.0.0.1", 1, tls=TlsSettings(ca_file=str(tmp_path / "nope.pem")))
    with pytest.raises(EdgepropError, match="broker.tls"):
        record(s, str(tmp_path / "e.jsonl"), None, 1, lambda *a, **k: None, threading.Event())
    assert not (tmp_path / "e.jsonl").exists()
