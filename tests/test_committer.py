"""`zeroline.committer`: batches written and acknowledged in order, tasks run among them."""

from __future__ import annotations

import threading
from typing import Any

import pytest

from zeroline.committer import Batch, Committer


class Recorder:
    """The committer's four seams, recording what happens in order; `gate` holds writes."""

    def __init__(self) -> None:
        self.events: list[str] = []
        self.gate = threading.Event()
        self.gate.set()

    def append(self, records: list[dict[str, Any]]) -> None:
        self.gate.wait(5)
        self.events.append(f"write {[r['s'] for r in records]}")

    def ack(self, token: Any) -> None:
        self.events.append(f"ack {token}")

    def count(self, key: str, amount: int) -> None:
        pass

    def flush(self) -> None:
        pass

    def committer(self) -> Committer:
        return Committer(self.append, self.ack, self.count, self.flush)


def test_a_task_runs_after_the_batches_before_it_and_before_those_after() -> None:
    seen = Recorder()
    committer = seen.committer()
    seen.gate.clear()  # the first write waits: everything below queues up behind it
    committer.start()
    committer.submit(Batch([{"s": 1}, {"s": 2}], ["m1", "m2"]))
    committer.run_in_order(lambda: seen.events.append("task"))
    committer.submit(Batch([{"s": 3}], ["m3"]))
    assert not committer.wait_drained(0.05)  # held at the first write
    assert committer.pending() == 3
    seen.gate.set()
    assert committer.wait_drained(5)
    assert seen.events == ["write [1, 2]", "ack m1", "ack m2", "task", "write [3]", "ack m3"]
    assert committer.pending() == 0
    committer.stop(1)


def test_waiting_for_the_committer_includes_its_tasks() -> None:
    seen = Recorder()
    committer = seen.committer()
    committer.start()
    release = threading.Event()
    committer.run_in_order(lambda: release.wait(5))
    assert committer.pending() == 0  # a task is no message
    assert not committer.wait_drained(0.05)
    release.set()
    assert committer.wait_drained(5)
    committer.stop(1)


def test_a_failing_task_is_logged_and_the_batches_go_on(caplog: pytest.LogCaptureFixture) -> None:
    seen = Recorder()
    committer = seen.committer()
    committer.start()

    def broken() -> None:
        raise RuntimeError("a bug")

    committer.run_in_order(broken)
    committer.submit(Batch([{"s": 1}], ["m1"]))
    assert committer.wait_drained(5)
    assert seen.events == ["write [1]", "ack m1"]
    assert "a task on the committer thread failed" in caplog.text
    committer.stop(1)
