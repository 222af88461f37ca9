"""The daemon's `StatusBoard`: last result and chart history per channel, history bounded.

Readings are invented demo values on a constant basis (no outside reference applies: the
board only keeps and hands back what the channels produced).
"""

from __future__ import annotations

from collections.abc import Callable

import pytest

from zeroline import outputs
from zeroline.channel import Channel, Sample
from zeroline.config import parse_config
from zeroline.outputs import StatusBoard
from zeroline.status import HISTORY_LENGTH

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
