"""The network-thread-to-worker queue: order, bound and back-pressure under two threads."""

from __future__ import annotations

import queue
import threading
import time

import pytest

from zeroline.handoff import Handoff


def test_order_and_nothing_lost_with_a_producer_faster_than_the_consumer() -> None:
    handoff: Handoff[int] = Handoff(maxsize=8)
    count = 20_000
    high_water = 0

    def produce() -> None:
        nonlocal high_water
        for i in range(count):
            handoff.put(i, timeout=10.0)
            high_water = max(high_water, handoff.qsize())

    producer = threading.Thread(target=produce)
    producer.start()
    taken = []
    while len(taken) < count:
        taken.append(handoff.get(timeout=10.0))
        if len(taken) % 1000 == 0:
            time.sleep(0.001)  # let it fill up to the bound now and then
    producer.join()
    assert taken == list(range(count))
    assert high_water <= 8  # never more than maxsize waiting
    assert handoff.empty() and handoff.qsize() == 0


def test_a_full_queue_refuses_then_waits_for_room() -> None:
    handoff: Handoff[str] = Handoff(maxsize=2)
    handoff.put_nowait("a")
    handoff.put_nowait("b")
    with pytest.raises(queue.Full):
        handoff.put_nowait("c")
    with pytest.raises(queue.Full):
        handoff.put("c", timeout=0.01)
    threading.Timer(0.05, handoff.get_nowait).start()
    began = time.monotonic()
    handoff.put("c", timeout=5.0)  # room once the consumer took "a"
    assert time.monotonic() - began >= 0.04
    assert [handoff.get_nowait(), handoff.get_nowait()] == ["b", "c"]


def test_get_times_out_empty_and_bad_sizes_are_refused() -> None:
    handoff: Handoff[int] = Handoff(maxsize=1)
    with pytest.raises(queue.Empty):
        handoff.get(timeout=0.01)
    with pytest.raises(queue.Empty):
        handoff.get_nowait()
    with pytest.raises(ValueError, match="maxsize must be at least 1"):
        Handoff(maxsize=0)
