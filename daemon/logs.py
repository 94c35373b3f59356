"""One line per event on stderr: ``level=... model=... event=... key=value``.

journald stores each line as it is and adds its own timestamp, so none is
written here. Values with spaces or quotes are quoted so a line stays
machine-splittable.
"""
from __future__ import annotations

import sys
import threading
import time
from typing import IO, Callable

LEVELS = {"debug": 10, "info": 20, "warning": 30, "error": 40}

LogFn = Callable[..., None]


def _fmt(value: object) -> str:
    text = f"{value:.6g}" if isinstance(value, float) else str(value)
    if not text or any(c in text for c in ' "=\n\t'):
        text = '"' + text.replace("\\", "\\\\").replace('"', '\\"').replace("\n", "\\n") + '"'
    return text


class Log:
    """Callable logger: ``log("warning", "stale_input", model="m", input="speed")``."""

    def __init__(self, level: str = "info", stream: IO[str] | None = None) -> None:
        self.threshold = LEVELS.get(level, 20)
        self.stream = stream
        self._lock = threading.Lock()

    def set_level(self, level: str) -> None:
        self.threshold = LEVELS.get(level, 20)

    def __call__(self, level: str, event: str, **fields: object) -> None:
        if LEVELS.get(level, 20) < self.threshold:
            return
        parts = [f"level={level}"]
        model = fields.pop("model", None)
        if model is not None:
            parts.append(f"model={_fmt(model)}")
        parts.append(f"event={event}")
        parts.extend(f"{k}={_fmt(v)}" for k, v in fields.items() if v is not None)
        line = " ".join(parts) + "\n"
        stream = self.stream or sys.stderr
        with self._lock:
            try:
                stream.write(line)
                stream.flush()
            except (OSError, ValueError):
                pass   # a closed stderr must not stop the worker


class RateLimited:
    """Say an expected, repeating problem at most once per ``every_s``, with a count."""

    def __init__(self, log: LogFn, every_s: float = 60.0, clock: Callable[[], float] = time.monotonic) -> None:
        self.log, self.every_s, self.clock = log, every_s, clock
        self._last: dict[tuple, float] = {}
        self._held: dict[tuple, int] = {}

    def __call__(self, level: str, event: str, key: tuple, **fields: object) -> None:
        now = self.clock()
        last = self._last.get(key)
        if last is not None and now - last < self.every_s:
            self._held[key] = self._held.get(key, 0) + 1
            return
        self._last[key] = now
        suppressed = self._held.pop(key, 0)
        self.log(level, event, **fields, **({"suppressed": suppressed} if suppressed else {}))
