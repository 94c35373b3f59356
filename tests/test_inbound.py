"""The bounded hand-off queue: drop-oldest under overflow, counted; never blocks the producer."""
from __future__ import annotations

import threading
import time

import pytest

from daemon.inbound import Inbound, InboundQueue


def reading(i: int) -> Inbound:
    return Inbound("site/p1/flow", str(i).encode(), float(i))


def test_fifo_order_and_depth():
    q = InboundQueue(10)
    for i in range(3):
        q.put(reading(i))
    assert q.depth == 3
    assert [q.get(0.1).arrival_t for _ in range(3)] == [0.0, 1.0, 2.0]
    assert q.depth == 0 and q.dropped == 0


def test_overflow_drops_the_oldest_and_counts_them():
    q = InboundQueue(3)
    for i in range(5):
        q.put(reading(i))
    assert q.dropped == 2
    assert q.depth == 3
    assert [item.payload for item in q.get_many(10, 0.1)] == [b"2", b"3", b"4"]


def test_get_many_takes_at_most_n_oldest():
    q = InboundQueue(100)
    for i in range(7):
        q.put(reading(i))
    first = q.get_many(5, 0.1)
    assert [r.arrival_t for r in first] == [0.0, 1.0, 2.0, 3.0, 4.0]
    assert [r.arrival_t for r in q.get_many(5, 0.1)] == [5.0, 6.0]
    with pytest.raises(ValueError, match="max_items"):
        q.get_many(0, 0.1)


def test_empty_queue_times_out_with_nothing():
    q = InboundQueue(4)
    t0 = time.monotonic()
    assert q.get(0.05) is None
    assert q.get_many(4, 0.05) == []
    assert 0.09 <= time.monotonic() - t0 < 1.0


def test_wake_releases_a_waiting_worker_at_once():
    q = InboundQueue(4)
    result = {}

    def worker() -> None:
        t0 = time.monotonic()
        result["item"] = q.get(10.0)
        result["waited"] = time.monotonic() - t0

    thread = threading.Thread(target=worker)
    thread.start()
    time.sleep(0.05)
    q.wake()
    thread.join(5.0)
    assert not thread.is_alive()
    assert result["item"] is None and result["waited"] < 5.0


def test_wake_before_get_is_not_lost_and_items_survive_it():
    q = InboundQueue(4)
    q.put(reading(1))
    q.wake()                                   # e.g. SIGHUP arrived while the worker was busy
    assert q.get_many(4, 1.0) == []            # the worker sees the wake-up first ...
    assert q.get(1.0).arrival_t == 1.0         # ... and the reading is still there


def test_producer_never_waits_for_a_slow_consumer_and_nothing_is_lost_unaccounted():
    q = InboundQueue(50)
    n = 20_000
    received: list[float] = []
    done = threading.Event()

    def consumer() -> None:
        while not done.is_set() or q.depth:
            batch = q.get_many(16, 0.01)
            received.extend(r.arrival_t for r in batch)
            time.sleep(0.0005)                 # slower than the producer on purpose

    thread = threading.Thread(target=consumer)
    thread.start()
    for i in range(n):
        q.put(reading(i))
    done.set()
    thread.join(10.0)
    assert not thread.is_alive()
    assert q.dropped > 0                       # the consumer really fell behind
    assert len(received) + q.dropped == n      # every reading is either delivered or counted
    assert received == sorted(received)        # dropping the oldest keeps arrival order


@pytest.mark.parametrize("bad", [0, -1, 2.5, True])
def test_capacity_must_be_a_positive_integer(bad):
    with pytest.raises(ValueError, match="capacity"):
        InboundQueue(bad)


def test_byte_bound_drops_oldest_payloads_and_keeps_the_newest():
    # 10 payloads of 100 bytes against a 350-byte budget: only the newest 3 fit
    q = InboundQueue(1000, max_bytes=350)
    for i in range(10):
        q.put(Inbound("site/p1/flow", bytes([48 + i]) * 100, float(i)))
    assert q.depth == 3 and q.bytes == 300 and q.dropped == 7
    got = q.get_many(10, timeout=0.1)
    assert [m.arrival_t for m in got] == [7.0, 8.0, 9.0]
    assert q.bytes == 0


def test_one_payload_over_the_byte_bound_is_still_kept_alone():
    q = InboundQueue(10, max_bytes=50)
    q.put(Inbound("site/p1/flow", b"x" * 80, 1.0))
    assert q.depth == 1 and q.dropped == 0
