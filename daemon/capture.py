"""Capture files: recorded MQTT traffic, one JSON object per line, for replay and tuning.

Each line is ``{"t": <arrival epoch s>, "topic": "...", "payload": "<utf-8 text>"}``,
or ``"payload_b64"`` instead of ``"payload"`` when the bytes are not UTF-8.
Lines are flushed as they are written, so killing the recorder loses at most
the line being written. Reading never raises on a bad line: a capture from
the field may be cut short or hand-edited, and the good lines are still worth
replaying, so each bad one comes back as a ``BadLine`` the caller can count.
"""
from __future__ import annotations

import base64
import binascii
import json
import math
from dataclasses import dataclass
from typing import IO, Iterator, Optional, Union


@dataclass(frozen=True)
class CaptureLine:
    """One recorded message: arrival time, topic, raw payload bytes."""

    line_no: int
    t: float
    topic: str
    payload: bytes


@dataclass(frozen=True)
class BadLine:
    """A line that could not be used, with its 1-based number and why."""

    line_no: int
    reason: str


class CaptureWriter:
    """Appends messages to a capture file, one flushed line each."""

    def __init__(self, path: str, overwrite: bool = False) -> None:
        # Refuse to clobber by default: a capture may hold days of plant traffic.
        self.path = path
        mode = "w" if overwrite else "x"
        self._file: Optional[IO[str]] = open(path, mode, encoding="utf-8", newline="\n")
        self.lines = 0

    def __repr__(self) -> str:
        return f"CaptureWriter({self.path!r}, lines={self.lines})"

    def write(self, t: float, topic: str, payload: bytes) -> None:
        """Write one message; text payloads stay readable, other bytes go as base64."""
        if self._file is None:
            raise ValueError(f"capture file {self.path} is already closed")
        record: dict[str, object] = {"t": t, "topic": topic}
        try:
            record["payload"] = bytes(payload).decode("utf-8")
        except UnicodeDecodeError:
            record["payload_b64"] = base64.b64encode(payload).decode("ascii")
        self._file.write(json.dumps(record, ensure_ascii=False, allow_nan=False) + "\n")
        self._file.flush()
        self.lines += 1

    def close(self) -> None:
        """Flush and close; further writes raise."""
        if self._file is not None:
            self._file.close()
            self._file = None

    def __enter__(self) -> "CaptureWriter":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def _parse(line_no: int, raw: bytes) -> Union[CaptureLine, BadLine]:
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as e:
        return BadLine(line_no, f"not UTF-8 text ({e.reason} at byte {e.start})")
    try:
        obj = json.loads(text)
    except ValueError as e:
        return BadLine(line_no, f"not JSON ({e})")
    if not isinstance(obj, dict):
        return BadLine(line_no, f"expected a JSON object, got {type(obj).__name__}")
    t = obj.get("t")
    if isinstance(t, bool) or not isinstance(t, (int, float)) or not math.isfinite(t):
        return BadLine(line_no, f"'t' must be a finite number of epoch seconds, got {t!r}")
    topic = obj.get("topic")
    if not isinstance(topic, str) or not topic:
        return BadLine(line_no, f"'topic' must be a non-empty string, got {topic!r}")
    has_text, has_b64 = "payload" in obj, "payload_b64" in obj
    if has_text == has_b64:
        return BadLine(line_no, "needs exactly one of 'payload' and 'payload_b64'")
    value = obj["payload" if has_text else "payload_b64"]
    if not isinstance(value, str):
        key = "payload" if has_text else "payload_b64"
        return BadLine(line_no, f"'{key}' must be a string, got {type(value).__name__}")
    if has_text:
        try:
            payload = value.encode("utf-8")
        except UnicodeEncodeError:
            return BadLine(line_no, "'payload' holds a lone surrogate escape; use 'payload_b64'")
    else:
        try:
            payload = base64.b64decode(value, validate=True)
        except (binascii.Error, ValueError) as e:
            return BadLine(line_no, f"'payload_b64' is not valid base64 ({e})")
    return CaptureLine(line_no, float(t), topic, payload)


def read_capture(path: str) -> Iterator[Union[CaptureLine, BadLine]]:
    """Yield each line of a capture file in order, parsed or as a BadLine; blank lines are skipped."""
    with open(path, "rb") as f:
        for line_no, raw in enumerate(f, start=1):
            complete = raw.endswith(b"\n")
            raw = raw.rstrip(b"\r\n")
            if not raw.strip():
                continue
            item = _parse(line_no, raw)
            if isinstance(item, BadLine) and not complete:
                item = BadLine(line_no, f"truncated last line ({item.reason})")
            yield item
