"""The daemon's `StatusBoard`: last result and chart history per channel, history bounded.

Readings are invented demo values on a constant basis (no outside reference applies: the
board only keeps and hands back what the channels produced).
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Callable

import numpy as np
import pytest

from zeroline import outputs
from zeroline.channel import Channel, Corrected, Sample
from zeroline.config import parse_config
from zeroline.outputs import StatusBoard
from zeroline.status import _BLANK_LAST, HISTORY_LENGTH, LastResults

CONFIG = parse_config("""
channels:
  - name: "{1}-cell"
    topic: site/+/cell
    basis: [constant]
""")


def feed(channels: dict[str, Channel], board: StatusBoard, rows: int, first: int = 0) -> None:
    for i in range(first, first + rows):
        for channel in channels.values():
            result, _ = channel.process(Sample(1_790_000_000.0 + 60.0 * i, 1.0 + 0.01 * i))
            board.corrected(channel, result)


def board_over(channels: dict[str, Channel], cap: int) -> StatusBoard:
    lookup: Callable[[str], Channel | None] = channels.get
    return StatusBoard(
        names=lambda: list(channels),
        lookup=lookup,
        counters=dict,
        ready=lambda: True,
        history_channels=cap,
    )


def make_channels(count: int) -> dict[str, Channel]:
    return {f"s{i}-cell": Channel(CONFIG.channels[0], f"s{i}-cell") for i in range(count)}


def test_history_is_kept_for_the_first_channels_only() -> None:
    channels = make_channels(5)
    board = board_over(channels, cap=3)
    feed(channels, board, rows=4)
    charted = [name for name in channels if board.channel_status(name).recent]  # type: ignore[union-attr]
    assert charted == ["s0-cell", "s1-cell", "s2-cell"]
    for name in channels:
        status = board.channel_status(name)
        assert status is not None
        assert status.raw == pytest.approx(1.03)  # every channel shows its current values
        data = status.to_json(with_recent=True)
        assert data["recent_kept"] is (name in charted)
        assert len(data["recent"]) == (4 if name in charted else 0)


def test_a_channel_waiting_for_its_first_reading_is_still_charted_when_room_is_left() -> None:
    channels = make_channels(2)
    board = board_over(channels, cap=3)
    status = board.channel_status("s0-cell")
    assert status is not None
    assert status.recent == () and status.recent_kept


def test_the_ring_holds_the_last_history_length_outputs() -> None:
    channels = make_channels(1)
    board = board_over(channels, cap=1)
    feed(channels, board, rows=HISTORY_LENGTH + 7)
    status = board.channel_status("s0-cell")
    assert status is not None
    times = [row["time"] for row in status.recent]
    assert len(times) == HISTORY_LENGTH
    assert times[0] == 1_790_000_000.0 + 60.0 * 7 and times[-1] == status.last_time


def test_rings_of_removed_channels_make_room_at_most_once_a_minute(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    clock = [1000.0]
    monkeypatch.setattr(outputs.time, "monotonic", lambda: clock[0])
    channels = make_channels(3)
    board = board_over(channels, cap=2)
    feed(channels, board, rows=1)  # s2 finds no room (and nothing to prune)
    assert not board.channel_status("s2-cell").recent_kept  # type: ignore[union-attr]
    del channels["s0-cell"]  # a reload removed it
    clock[0] += 61.0
    newcomer = Channel(CONFIG.channels[0], "s9-cell")
    channels["s9-cell"] = newcomer
    feed({"s9-cell": newcomer}, board, rows=1)  # prunes s0: room for s9
    assert board.channel_status("s9-cell").recent_kept  # type: ignore[union-attr]
    del channels["s1-cell"]
    late = Channel(CONFIG.channels[0], "s10-cell")
    channels["s10-cell"] = late
    clock[0] += 30.0
    feed({"s10-cell": late}, board, rows=1)  # within the minute: no second pass
    assert not board.channel_status("s10-cell").recent_kept  # type: ignore[union-attr]
    clock[0] += 31.0
    feed({"s10-cell": late}, board, rows=1, first=1)
    assert board.channel_status("s10-cell").recent  # type: ignore[union-attr]


def _result(time: float, **changes: object) -> Corrected:
    fields: dict[str, object] = {
        "time": time,
        "raw": 1.25,
        "corrected": 1.0,
        "baseline": 0.25,
        "uncertainty": 0.01,
        "quality": "good",
        "quality_code": 1,
        "flags": (),
        "gain": None,
        "drift_rate": 1e-9,
        "learned": True,
    }
    fields.update(changes)
    return Corrected(**fields)  # type: ignore[arg-type]


def test_last_results_give_back_every_field_but_the_coefficients() -> None:
    last = LastResults()
    first = _result(1.0, gain=0.5, coefficients=np.ones(3))  # every number present
    odd = _result(
        2.0,
        corrected=None,
        baseline=None,
        uncertainty=None,
        drift_rate=None,
        quality="suspect",
        quality_code=3,
        flags=("stale_input", "out_of_span"),
        learned=False,
        gain=2.5,
    )
    last.put("a", first)
    last.put("b", odd)
    assert last.get("a") == dataclasses.replace(first, coefficients=None)
    back = last.get("b")
    assert back is not None
    assert (back.quality, back.quality_code, back.flags) == ("suspect", 3, odd.flags)
    assert (back.gain, back.learned) == (2.5, False)
    for missing in (back.corrected, back.baseline, back.uncertainty, back.drift_rate):
        assert missing is not None and math.isnan(missing)  # None is kept as NaN
    assert last.get("nobody") is None


def test_last_results_reuse_the_slot_of_a_discarded_channel() -> None:
    last = LastResults()
    for i in range(3):
        last.put(f"c{i}", _result(float(i)))
    last.put("c1", _result(10.0, flags=("late",)))  # an update stays in its slot
    last.discard("c0")
    last.put("new", _result(20.0))
    assert len(last) == 3
    assert last.get("c0") is None
    assert [last.get(n).time for n in ("c1", "c2", "new")] == [10.0, 2.0, 20.0]  # type: ignore[union-attr]
    assert last.get("c1").flags == ("late",)  # type: ignore[union-attr]
    assert len(last._values) == 3 * len(_BLANK_LAST)  # the freed slot was taken again
