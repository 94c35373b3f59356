"""Capture files: round trip of text and binary payloads; bad lines reported, never raised."""
from __future__ import annotations

import base64
import json

import pytest

from daemon.capture import BadLine, CaptureLine, CaptureWriter, read_capture


def test_round_trip_text_and_binary(tmp_path):
    path = str(tmp_path / "cap.jsonl")
    messages = [
        (1733000000.25, "site/p1/speed", b"2950.5"),
        (1733000000.5, "site/p1/bearing_temp", b'{"value": 61.2, "ts": 1733000000}'),
        (1733000001.0, "site/p1/note", "Lager läuft heiß °C\nzweite Zeile".encode("utf-8")),
        (1733000002.0, "site/p1/raw", bytes([0xFF, 0x00, 0x80, 0x0A, 0x0D])),
        (1733000003.0, "site/p1/empty", b""),
    ]
    with CaptureWriter(path) as w:
        for m in messages:
            w.write(*m)
        assert w.lines == 5
    got = list(read_capture(path))
    assert got == [CaptureLine(i + 1, t, topic, p) for i, (t, topic, p) in enumerate(messages)]
    raw = open(path, "rb").read().split(b"\n")
    assert len(raw) == 6 and raw[-1] == b""                 # one line each, newline-terminated
    texts = [json.loads(r) for r in raw[:-1]]
    assert texts[2]["payload"] == "Lager läuft heiß °C\nzweite Zeile"
    assert "payload" not in texts[3] and base64.b64decode(texts[3]["payload_b64"]) == messages[3][2]


def test_every_line_is_flushed_before_close(tmp_path):
    path = str(tmp_path / "cap.jsonl")
    w = CaptureWriter(path)
    w.write(1.0, "a", b"1")
    w.write(2.0, "b", b"2")
    # Read through a separate handle while the writer is still open (as after a kill).
    assert [x.topic for x in read_capture(path)] == ["a", "b"]
    w.close()
    with pytest.raises(ValueError, match="closed"):
        w.write(3.0, "c", b"3")


def test_refuses_to_overwrite_unless_asked(tmp_path):
    path = tmp_path / "cap.jsonl"
    path.write_text("precious\n")
    with pytest.raises(FileExistsError):
        CaptureWriter(str(path))
    assert path.read_text() == "precious\n"
    CaptureWriter(str(path), overwrite=True).close()
    assert path.read_text() == ""


def test_garbage_lines_become_badlines_with_numbers(tmp_path):
    good = json.dumps({"t": 5.0, "topic": "x", "payload": "1"})
    lines = [
        good,                                                    # 1 ok
        "not json at all",                                       # 2
        json.dumps([1, 2]),                                      # 3 not an object
        json.dumps({"topic": "x", "payload": "1"}),              # 4 missing t
        json.dumps({"t": "5", "topic": "x", "payload": "1"}),    # 5 t not a number
        json.dumps({"t": True, "topic": "x", "payload": "1"}),   # 6 bool is not a time
        json.dumps({"t": 5, "topic": "", "payload": "1"}),       # 7 empty topic
        json.dumps({"t": 5, "topic": "x"}),                      # 8 no payload
        json.dumps({"t": 5, "topic": "x", "payload": "1", "payload_b64": "MQ=="}),  # 9 both
        json.dumps({"t": 5, "topic": "x", "payload_b64": "%%%"}),  # 10 bad base64
        json.dumps({"t": 5, "topic": "x", "payload": 12}),       # 11 payload not a string
        '{"t": NaN, "topic": "x", "payload": "1"}',              # 12 non-finite time
        "",                                                      # 13 blank: skipped
        json.dumps({"t": 6, "topic": "y", "payload_b64": "/wA="}),  # 14 ok
    ]
    path = tmp_path / "cap.jsonl"
    path.write_bytes(("\n".join(lines) + "\n").encode() + b"\xff\xfe garbage\n")   # 15 not UTF-8
    got = list(read_capture(str(path)))
    assert [type(g).__name__ for g in got] == ["CaptureLine"] + ["BadLine"] * 11 + ["CaptureLine", "BadLine"]
    bad = {g.line_no: g.reason for g in got if isinstance(g, BadLine)}
    assert sorted(bad) == [2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12, 15]
    assert "not JSON" in bad[2] and "'t'" in bad[4] and "'t'" in bad[6] and "'topic'" in bad[7]
    assert "exactly one" in bad[8] and "exactly one" in bad[9] and "base64" in bad[10]
    assert "UTF-8" in bad[15]
    assert got[-2] == CaptureLine(14, 6.0, "y", b"\xff\x00")


def test_truncated_last_line(tmp_path):
    path = tmp_path / "cap.jsonl"
    with CaptureWriter(str(path)) as w:
        w.write(1.0, "a", b"1")
        w.write(2.0, "b", b"22")
    data = path.read_bytes()
    path.write_bytes(data[:-9])                  # cut inside the last record, as a kill might
    got = list(read_capture(str(path)))
    assert got[0] == CaptureLine(1, 1.0, "a", b"1")
    assert isinstance(got[1], BadLine) and got[1].line_no == 2 and "truncated" in got[1].reason
    # A complete record that only lacks its newline is still good.
    path.write_bytes(data[:-1])
    assert list(read_capture(str(path)))[1] == CaptureLine(2, 2.0, "b", b"22")
