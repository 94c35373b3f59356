"""QoS 0 PUBLISH packets read straight from the bytes the broker sent, and built for the
predictions we send (MQTT 3.1.1 and 5).

Why: paho builds a message object, logs, matches topic filters and takes two locks for
every packet; for the readings we subscribe to (QoS 0, one callback for all topics) that
was most of the link process's time per reading. Everything else the broker sends
(CONNACK, SUBACK, PINGRESP, PUBACK, anything unusual or malformed) is left to paho, which
reads it from the same buffer as before. On the way out, a QoS 0 prediction needs no packet
id and no acknowledgement; the worker builds its packet, and the link process writes it
without paho's message objects (daemon.mqtt_client.LinkClient.write_packets).

Packet layout (MQTT 3.1.1 sections 2.2 and 3.3; MQTT 5.0 sections 2.1, 3.3):
  byte 0        0x30 (PUBLISH, QoS 0, DUP 0) | RETAIN bit 0x01
  1-4 bytes     remaining length: 7 bits per byte, least significant first, 0x80 = more
  2 bytes       topic length (big-endian), then the topic (UTF-8)
  MQTT 5 only   property length (same 7-bit encoding), then the properties
  the rest      the payload
"""
from __future__ import annotations

from typing import Callable

PUBLISH_QOS0 = 0x30
_KIND_MASK = 0xFE            # all but RETAIN: packet type, DUP and QoS must read 0x30


MAX_TOPIC_BYTES = 65535      # the topic's length field is two bytes
MAX_REMAINING = 268435455    # four 7-bit digits: the largest remaining length


def write_varint(value: int) -> bytes:
    """A variable byte integer (7 bits per byte, least significant first, 0x80 = more)."""
    out = bytearray()
    while True:
        value, digit = value >> 7, value & 0x7F
        out.append(digit | 0x80 if value else digit)
        if not value:
            return bytes(out)


def publish_packet(topic: bytes, payload: bytes, retain: bool, v5: bool) -> bytes:
    """One QoS 0 PUBLISH packet (MQTT 5: with an empty property list); ValueError when the
    topic or the packet is longer than the protocol can carry."""
    if len(topic) > MAX_TOPIC_BYTES:
        raise ValueError(f"topic of {len(topic)} bytes; MQTT allows {MAX_TOPIC_BYTES}")
    length = 2 + len(topic) + v5 + len(payload)
    if length > MAX_REMAINING:
        raise ValueError(f"a publish of {length} bytes; MQTT allows {MAX_REMAINING}")
    head = bytes((PUBLISH_QOS0 | retain,)) + write_varint(length) + len(topic).to_bytes(2, "big")
    return b"".join((head, topic, b"\x00", payload) if v5 else (head, topic, payload))


def read_varint(buf: bytes, pos: int, end: int) -> tuple[int, int] | None:
    """(value, position after it) of a variable byte integer; None if cut off or over 4 bytes."""
    value, shift = 0, 0
    while pos < end:
        byte = buf[pos]
        pos += 1
        value |= (byte & 0x7F) << shift
        if not byte & 0x80:
            return value, pos
        shift += 7
        if shift > 21:
            return None
    return None


def take_publishes(buf: bytes, pos: int, v5: bool, deliver: Callable[[str, bytes], None]) -> int:
    """Hand every whole QoS 0 PUBLISH from ``pos`` on to ``deliver``; return where they end.

    Stops at the first packet that is not one (or is cut off by the end of ``buf``, or is
    anything this reader does not vouch for: an empty topic, as topic aliases use, or a
    topic that is not UTF-8), so that paho reads it with its own checks.
    """
    end = len(buf)
    while pos + 1 < end and buf[pos] & _KIND_MASK == PUBLISH_QOS0:
        head = read_varint(buf, pos + 1, end)
        if head is None:
            return pos
        length, start = head
        stop = start + length
        if stop > end or length < 2:
            return pos
        topic_end = start + 2 + ((buf[start] << 8) | buf[start + 1])
        if topic_end == start + 2 or topic_end > stop:
            return pos
        payload_at = topic_end
        if v5:
            props = read_varint(buf, topic_end, stop)
            if props is None or props[1] + props[0] > stop:
                return pos
            payload_at = props[1] + props[0]
        try:
            topic = buf[start + 2:topic_end].decode("utf-8")
        except UnicodeDecodeError:
            return pos
        deliver(topic, buf[payload_at:stop])
        pos = stop
    return pos
