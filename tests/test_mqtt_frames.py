"""The QoS 0 PUBLISH reader against paho's own decoder (an implementation outside this project).

Packets are built by hand from the layout in the MQTT 3.1.1 and 5.0 specifications (sections
2.2 / 3.3), MQTT 5 properties by paho's ``Properties.pack``; each one is then read both by
``daemon.mqtt_frames`` and by ``paho.mqtt._packet.decode_publish``, and the two must agree.
"""
from __future__ import annotations

import random

import pytest
from paho.mqtt._packet import decode_publish
from paho.mqtt.enums import MQTTProtocolVersion
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties

from daemon.mqtt_frames import publish_packet, read_varint, take_publishes, write_varint


def varint(n: int) -> bytes:
    """The specification's variable byte integer (MQTT 3.1.1 section 2.2.3), written out."""
    out = bytearray()
    while True:
        byte, n = n % 128, n // 128
        out.append(byte | (0x80 if n else 0))
        if not n:
            return bytes(out)


def publish(topic: bytes, payload: bytes, v5: bool = False, retain: bool = False,
            props: Properties | None = None, qos: int = 0) -> bytes:
    body = len(topic).to_bytes(2, "big") + topic
    if qos:
        body += (7).to_bytes(2, "big")                 # packet identifier
    if v5:
        body += props.pack() if props is not None else b"\x00"
    body += payload
    return bytes([0x30 | (qos << 1) | int(retain)]) + varint(len(body)) + body


def paho_reads(packet: bytes, v5: bool) -> tuple[str, bytes]:
    """paho's view of one packet: skip the fixed header, decode the rest."""
    _length, start = read_varint(packet, 1, len(packet))
    proto = MQTTProtocolVersion.MQTTv5 if v5 else MQTTProtocolVersion.MQTTv311
    result = decode_publish(packet[0], packet[start:], proto)
    return result.topic.decode("utf-8"), result.payload


def ours(buf: bytes, v5: bool, pos: int = 0) -> tuple[list[tuple[str, bytes]], int]:
    got: list[tuple[str, bytes]] = []
    end = take_publishes(buf, pos, v5, lambda t, p: got.append((t, p)))
    return got, end


@pytest.mark.parametrize("n", [0, 1, 127, 128, 16383, 16384, 2_097_151, 2_097_152, 268_435_455])
def test_remaining_length_matches_the_specification_boundaries(n):
    # the boundaries where the encoding grows a byte (MQTT 3.1.1 table 2.4)
    encoded = varint(n)
    assert read_varint(encoded, 0, len(encoded)) == (n, len(encoded))
    assert read_varint(encoded, 0, len(encoded) - 1) is None          # cut off


def test_five_length_bytes_are_refused():
    assert read_varint(b"\xff\xff\xff\xff\x01", 0, 5) is None


@pytest.mark.parametrize("v5", [False, True])
def test_a_stream_of_drawn_packets_reads_as_paho_reads_it(v5):
    rng = random.Random(11)
    packets = []
    for i in range(400):
        topic = "/".join(rng.choice(["site", "p1", "bearing_temp", "ü", "a b", "x" * 40])
                         for _ in range(rng.randint(1, 5))).encode()
        payload = rng.randbytes(rng.choice([0, 1, 5, 90, 127, 128, 300, 20_000]))
        props = None
        if v5 and i % 3 == 0:
            props = Properties(PacketTypes.PUBLISH)
            props.ContentType = "application/json"
            props.UserProperty = [("line", str(i)), ("unit", "degC")]
        packets.append(publish(topic, payload, v5, retain=i % 7 == 0, props=props))
    stream = b"".join(packets)
    got, end = ours(stream, v5)
    assert end == len(stream)
    assert got == [paho_reads(p, v5) for p in packets]


@pytest.mark.parametrize("v5", [False, True])
def test_a_packet_cut_anywhere_is_left_whole_for_later(v5):
    first = publish(b"site/p1/speed", b"1480.5", v5)
    second = publish(b"site/p1/current", b"x" * 200, v5)       # two-byte remaining length
    stream = first + second
    for cut in range(len(first), len(stream)):
        got, end = ours(stream[:cut], v5)
        assert got == [("site/p1/speed", b"1480.5")] and end == len(first), cut


@pytest.mark.parametrize("packet", [
    bytes([0x32, 0x0A]) + b"\x00\x01t\x00\x07" + b"hello",     # QoS 1: paho must acknowledge it
    bytes([0x38, 0x06]) + b"\x00\x01t" + b"abc",                # DUP set on QoS 0: malformed
    b"\xd0\x00",                                                # PINGRESP
    b"\x90\x03\x00\x01\x00",                                    # SUBACK
    publish(b"", b"aliased"),                                   # empty topic (topic alias)
    publish(b"\xff\xfe", b"not UTF-8"),
    bytes([0x30, 0x05]) + b"\x00\x09top" + b"",                 # topic longer than the packet
])
def test_anything_else_is_left_to_paho(packet):
    good = publish(b"site/p1/speed", b"1.0")
    got, end = ours(good + packet + good, v5=False)
    assert got == [("site/p1/speed", b"1.0")] and end == len(good)


def test_mqtt5_properties_longer_than_the_packet_are_left_to_paho():
    body = b"\x00\x01t" + varint(50) + b"\x01\x01"
    packet = bytes([0x30]) + varint(len(body)) + body
    assert ours(packet, v5=True) == ([], 0)


def test_reading_starts_where_asked():
    a, b = publish(b"a", b"1"), publish(b"b", b"2")
    assert ours(a + b, v5=False, pos=len(a)) == ([("b", b"2")], len(a) + len(b))


@pytest.mark.parametrize("n", [0, 1, 127, 128, 16383, 16384, 2_097_151, 2_097_152, 268_435_455])
def test_written_remaining_length_is_the_specifications(n):
    assert write_varint(n) == varint(n)


@pytest.mark.parametrize("v5", [False, True])
def test_built_packets_read_back_by_paho_and_equal_the_hand_built_ones(v5):
    rng = random.Random(11)
    for _ in range(300):
        topic = "edgeprop/" + "".join(rng.choice("abcxyz/_-0é") for _ in range(rng.randint(1, 40)))
        payload = bytes(rng.randrange(256) for _ in range(rng.choice([0, 1, 50, 200, 20_000])))
        retain = rng.random() < 0.3
        packet = publish_packet(topic.encode(), payload, retain, v5)
        assert packet == publish(topic.encode(), payload, v5, retain)
        assert paho_reads(packet, v5) == (topic, payload)
        assert packet[0] & 0x01 == retain


def test_a_topic_mqtt_cannot_carry_is_refused():
    with pytest.raises(ValueError, match="65535"):
        publish_packet(b"t" * 65536, b"1", False, False)
