"""The hand-off between paho's network thread and the worker: a bounded drop-oldest queue.

The network thread must never wait on the worker: a stalled socket reader makes the
broker queue (and then silently drop) messages for us, and stops keepalive pings.
So ``put`` never blocks; when the worker falls behind, the oldest readings go first,
because a fresh reading is worth more to an online learner than a stale one.
"""
from __future__ import annotations

import threading
from collections import deque
from dataclasses import dataclass
from typing import Iterable


@dataclass(slots=True)
class Inbound:
    """One message as it arrived: topic, raw payload, arrival time (epoch seconds), and
    what ``MessageDecoder`` made of the payload (None: not decoded here)."""

    topic: str
    payload: bytes
    arrival_t: float
    outcomes: tuple | None = None


class InboundQueue:
    """Thread-safe FIFO of at most ``capacity`` items (and ``max_bytes`` of payload); drops oldest."""

    def __init__(self, capacity: int, max_bytes: int | None = None) -> None:
        if not isinstance(capacity, int) or isinstance(capacity, bool) or capacity < 1:
            raise ValueError(f"inbound queue capacity must be an integer >= 1, got {capacity!r}")
        if max_bytes is not None and max_bytes < 1:
            raise ValueError(f"inbound queue max_bytes must be >= 1 or None, got {max_bytes!r}")
        self.capacity = capacity
        # A count alone does not bound memory: 10,000 payloads of 60 kB each are 600 MB.
        self.max_bytes = max_bytes
        self.bytes = 0            # payload bytes waiting now
        self.dropped = 0          # items discarded because the queue was full (read by metrics)
        self._items: deque[Inbound] = deque()
        self._cond = threading.Condition(threading.Lock())
        self._woken = False

    def __repr__(self) -> str:
        return f"InboundQueue(depth={self.depth}, capacity={self.capacity}, dropped={self.dropped})"

    @property
    def depth(self) -> int:
        """Items waiting for the worker now."""
        return len(self._items)

    def put(self, item: Inbound) -> None:
        """Append ``item``; if over either bound, discard the oldest items. Never blocks on the consumer."""
        self.put_many((item,))

    def put_many(self, items: Iterable[Inbound]) -> None:
        """``put`` for several items in order, under one lock."""
        with self._cond:
            for item in items:
                self._items.append(item)
                self.bytes += len(item.payload)
                while len(self._items) > self.capacity or (
                        self.max_bytes is not None and self.bytes > self.max_bytes and len(self._items) > 1):
                    self.bytes -= len(self._items.popleft().payload)
                    self.dropped += 1
            self._cond.notify()

    def get(self, timeout: float) -> Inbound | None:
        """Oldest item, or None after ``timeout`` seconds or when ``wake()`` is called."""
        with self._cond:
            if not self._wait_locked(timeout):
                return None
            item = self._items.popleft()
            self.bytes -= len(item.payload)
            return item

    def get_many(self, max_items: int, timeout: float) -> list[Inbound]:
        """Up to ``max_items`` oldest items taken under one lock; empty on timeout or ``wake()``."""
        if max_items < 1:
            raise ValueError(f"max_items must be >= 1, got {max_items!r}")
        with self._cond:
            if not self._wait_locked(timeout):
                return []
            n = min(max_items, len(self._items))
            items = [self._items.popleft() for _ in range(n)]
            self.bytes -= sum(len(item.payload) for item in items)
            return items

    def wait(self, timeout: float) -> bool:
        """Wait until an item is queued, taking none; False on timeout or ``wake()``."""
        with self._cond:
            return self._wait_locked(timeout)

    def wake(self) -> None:
        """Make a waiting (or the next) ``get``/``get_many`` return at once, e.g. on a signal."""
        with self._cond:
            self._woken = True
            self._cond.notify_all()

    def _wait_locked(self, timeout: float) -> bool:
        """Wait (lock held) until an item is queued; False on timeout or wake-up."""
        if not self._items:
            self._cond.wait_for(lambda: self._items or self._woken, timeout=max(0.0, timeout))
        if self._woken:
            self._woken = False
            return False
        return bool(self._items)
