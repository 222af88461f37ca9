"""Tests for zeroline.spool: the durable, bounded, ordered on-disk queue."""

from __future__ import annotations

import logging
import os
import random
import threading
from pathlib import Path

import pytest

from zeroline.errors import InputError
from zeroline.spool import Batch, Spool


def make_lines(count: int, start: int = 0) -> list[str]:
    """Distinct line-protocol-like lines whose order is visible in their text."""
    return [
        f"zeroline_reading,channel=c{i % 7} raw={i}.5 {1_700_000_000_000 + i}"
        for i in range(start, start + count)
    ]


def drain(spool: Spool, batch_size: int) -> list[str]:
    """Read and ack everything on disk, `batch_size` lines at a time."""
    out: list[str] = []
    while True:
        batch = spool.peek(batch_size)
        if not batch.lines:
            return out
        out.extend(batch.lines)
        spool.ack(batch)


def segment_files(directory: Path) -> list[Path]:
    return sorted(directory.glob("*.seg"))


class TestOrderAndAck:
    """Lines come back oldest first, across segments, and only acks move the cursor."""

    def test_order_kept_across_many_segments(self, tmp_path: Path) -> None:
        """2,000 lines over tiny segments come back exactly as appended."""
        spool = Spool(tmp_path, max_bytes=1 << 20, segment_bytes=4096, flush_lines=100)
        lines = make_lines(2000)
        for chunk_start in range(0, len(lines), 37):
            spool.append(lines[chunk_start : chunk_start + 37])
        spool.flush()
        assert len(segment_files(tmp_path)) > 10
        assert drain(spool, batch_size=137) == lines
        spool.close()

    def test_peek_without_ack_returns_the_same_lines(self, tmp_path: Path) -> None:
        """An unacked batch is read again; an acked one never."""
        spool = Spool(tmp_path, max_bytes=1 << 20)
        lines = make_lines(50)
        spool.append(lines)
        spool.flush()
        first = spool.peek(20)
        assert spool.peek(20).lines == first.lines == lines[:20]
        spool.ack(first)
        second = spool.peek(20)
        assert second.lines == lines[20:40]
        spool.ack(second)
        spool.ack(second)  # a repeated ack changes nothing
        assert spool.peek(100).lines == lines[40:]
        spool.close()

    def test_acked_segments_are_deleted_and_empty_is_reported(self, tmp_path: Path) -> None:
        """Fully delivered segments leave the disk; only the one being written may stay."""
        spool = Spool(tmp_path, max_bytes=1 << 20, segment_bytes=4096)
        spool.append(make_lines(1000))
        spool.flush()
        assert len(segment_files(tmp_path)) > 5
        assert not spool.is_empty()
        drain(spool, batch_size=300)
        assert spool.is_empty()
        assert len(segment_files(tmp_path)) <= 1
        spool.close()

    def test_unflushed_lines_are_not_readable_yet(self, tmp_path: Path) -> None:
        """Only durable lines are handed to the sender."""
        spool = Spool(tmp_path, max_bytes=1 << 20, flush_lines=1000)
        spool.append(make_lines(5))
        assert spool.peek(10).lines == []
        assert spool.buffered_lines == 5
        assert not spool.is_empty()
        spool.flush()
        assert spool.peek(10).lines == make_lines(5)
        spool.close()

    def test_time_based_flush(self, tmp_path: Path) -> None:
        """`flush_if_due` writes a buffer only once it is older than flush_interval_s."""
        now = [100.0]
        spool = Spool(tmp_path, max_bytes=1 << 20, flush_interval_s=2.0, clock=lambda: now[0])
        spool.append(make_lines(3))
        now[0] = 101.0
        assert not spool.flush_if_due()
        now[0] = 102.5
        assert spool.flush_if_due()
        assert spool.peek(10).lines == make_lines(3)
        spool.close()

    def test_line_break_inside_a_line_is_rejected(self, tmp_path: Path) -> None:
        """A newline would split one point into two lines; it is refused with a reason."""
        spool = Spool(tmp_path, max_bytes=1 << 20)
        with pytest.raises(InputError, match="line break"):
            spool.append(["m f=1 1\nm f=2 2"])
        spool.close()

    def test_concurrent_producer_and_consumer_keep_order(self, tmp_path: Path) -> None:
        """A producer thread appending while a consumer acks loses and reorders nothing."""
        spool = Spool(tmp_path, max_bytes=1 << 22, segment_bytes=8192, flush_lines=64)
        lines = make_lines(5000)
        received: list[str] = []

        def produce() -> None:
            rng = random.Random(7)
            index = 0
            while index < len(lines):
                step = rng.randint(1, 50)
                spool.append(lines[index : index + step])
                index += step
            spool.flush()

        producer = threading.Thread(target=produce)
        producer.start()
        while len(received) < len(lines):
            batch = spool.peek(200)
            received.extend(batch.lines)
            spool.ack(batch)
        producer.join()
        assert received == lines
        spool.close()


class TestRestart:
    """Reopening the directory continues exactly where the last ack left off."""

    def test_reopen_resumes_after_last_ack(self, tmp_path: Path) -> None:
        """Acked lines are never resent; the sent-but-unacked batch is sent again."""
        lines = make_lines(1000)
        spool = Spool(tmp_path, max_bytes=1 << 20, segment_bytes=4096)
        spool.append(lines)
        spool.flush()
        spool.ack(spool.peek(300))
        in_flight = spool.peek(200)  # "sent", then the gateway loses power
        assert in_flight.lines == lines[300:500]
        spool.close()

        reopened = Spool(tmp_path, max_bytes=1 << 20, segment_bytes=4096)
        assert drain(reopened, batch_size=128) == lines[300:]
        reopened.close()

    def test_reopen_without_close_keeps_flushed_lines(self, tmp_path: Path) -> None:
        """A crash (no close) keeps every flushed line; later appends follow them in order."""
        lines = make_lines(600)
        crashed = Spool(tmp_path, max_bytes=1 << 20, segment_bytes=4096)
        crashed.append(lines[:400])
        crashed.flush()
        crashed.ack(crashed.peek(150))
        # No close(): the object is simply abandoned, as in a power cut.

        reopened = Spool(tmp_path, max_bytes=1 << 20, segment_bytes=4096)
        reopened.append(lines[400:])
        reopened.flush()
        assert drain(reopened, batch_size=99) == lines[150:]
        reopened.close()

    def test_reopen_after_everything_acked_starts_clean(self, tmp_path: Path) -> None:
        """An empty spool reopened stays empty and accepts new lines."""
        spool = Spool(tmp_path, max_bytes=1 << 20)
        spool.append(make_lines(10))
        spool.flush()
        drain(spool, batch_size=4)
        spool.close()
        reopened = Spool(tmp_path, max_bytes=1 << 20)
        assert reopened.is_empty()
        reopened.append(make_lines(3, start=10))
        reopened.flush()
        assert drain(reopened, batch_size=10) == make_lines(3, start=10)
        reopened.close()


class TestTornTail:
    """A partial last line left by a power cut is discarded with a log line."""

    @pytest.mark.parametrize("tail", [b"zeroline_reading,channel=c1 raw=4", b"\x00" * 300])
    def test_torn_tail_is_discarded(
        self, tmp_path: Path, tail: bytes, caplog: pytest.LogCaptureFixture
    ) -> None:
        """Complete lines survive, the fragment is cut off, and appending works after it."""
        lines = make_lines(100)
        spool = Spool(tmp_path, max_bytes=1 << 20)
        spool.append(lines)
        spool.close()
        with open(segment_files(tmp_path)[-1], "ab") as handle:
            handle.write(tail)

        with caplog.at_level(logging.WARNING, logger="zeroline.spool"):
            reopened = Spool(tmp_path, max_bytes=1 << 20)
        assert reopened.torn_bytes_discarded == len(tail)
        assert "incomplete line" in caplog.text
        reopened.append(make_lines(5, start=100))
        reopened.flush()
        assert drain(reopened, batch_size=1000) == make_lines(105)
        reopened.close()

    def test_nul_filled_last_line_is_discarded(self, tmp_path: Path) -> None:
        """A 'complete' line made of NUL bytes (unwritten blocks) is not delivered."""
        spool = Spool(tmp_path, max_bytes=1 << 20)
        spool.append(make_lines(10))
        spool.close()
        with open(segment_files(tmp_path)[-1], "ab") as handle:
            handle.write(b"\x00" * 40 + b"\n")
        reopened = Spool(tmp_path, max_bytes=1 << 20)
        assert reopened.torn_bytes_discarded == 41
        assert drain(reopened, batch_size=100) == make_lines(10)
        reopened.close()


class TestBound:
    """Over max_bytes the oldest whole segments go, and the dropped lines are counted."""

    def test_bound_holds_and_drops_are_counted(
        self, tmp_path: Path, caplog: pytest.LogCaptureFixture
    ) -> None:
        """After every flush the segments fit the bound; what remains is the newest data."""
        max_bytes = 64 * 1024
        spool = Spool(tmp_path, max_bytes=max_bytes, segment_bytes=4096, flush_lines=50)
        lines = make_lines(10_000)
        with caplog.at_level(logging.WARNING, logger="zeroline.spool"):
            for index in range(0, len(lines), 50):
                spool.append(lines[index : index + 50])
                on_disk = sum(path.stat().st_size for path in segment_files(tmp_path))
                assert on_disk <= max_bytes
                assert spool.disk_bytes == on_disk
        remaining = drain(spool, batch_size=500)
        assert spool.dropped_lines > 0
        assert spool.dropped_lines + len(remaining) == len(lines)
        assert remaining == lines[-len(remaining) :]
        assert "drop_oldest" in caplog.text
        # Rate limited: a flood of drops is logged once, not once per segment.
        assert caplog.text.count("drop_oldest") == 1
        spool.close()

    @pytest.mark.parametrize("delivered", [True, False])
    def test_batch_in_flight_while_its_segment_is_dropped(
        self, tmp_path: Path, delivered: bool
    ) -> None:
        """Each line is counted once: as delivered if its batch is acked, else as dropped."""
        spool = Spool(tmp_path, max_bytes=16 * 1024, segment_bytes=4096, flush_lines=10)
        lines = make_lines(2000)
        spool.append(lines[:50])
        spool.flush()
        in_flight = spool.peek(20)
        for index in range(50, len(lines), 10):  # meanwhile the bound drops its segment
            spool.append(lines[index : index + 10])
        spool.flush()
        if delivered:
            spool.ack(in_flight)  # must not skip the newer data
        remaining = drain(spool, batch_size=100)
        assert remaining == lines[-len(remaining) :]
        acked = len(in_flight) if delivered else 0
        assert spool.dropped_lines + acked + len(remaining) == len(lines)
        spool.close()

    def test_shrunk_bound_is_applied_on_open(self, tmp_path: Path) -> None:
        """Reopening with a smaller max_bytes trims the old data at once."""
        spool = Spool(tmp_path, max_bytes=1 << 20, segment_bytes=4096)
        spool.append(make_lines(3000))
        spool.close()
        smaller = Spool(tmp_path, max_bytes=32 * 1024, segment_bytes=4096)
        assert smaller.disk_bytes <= 32 * 1024
        assert smaller.dropped_lines > 0
        assert smaller.dropped_lines + len(drain(smaller, 1000)) == 3000
        smaller.close()


class TestFlashFriendliness:
    """Appends are batched: few fsyncs per many points."""

    def test_fsyncs_per_10000_points(self, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
        """10,000 single-point appends cost about one fsync per flush_lines points."""
        calls: list[int] = []
        real_fsync = os.fsync

        def counting_fsync(fd: int) -> None:
            calls.append(fd)
            real_fsync(fd)

        spool = Spool(tmp_path, max_bytes=256 << 20, flush_lines=1000)
        monkeypatch.setattr(os, "fsync", counting_fsync)
        for line in make_lines(10_000):
            spool.append([line])
        spool.flush()
        monkeypatch.undo()
        # 10 flushes, plus one directory fsync for the segment file's creation.
        assert 10 <= len(calls) <= 12, len(calls)
        assert drain(spool, batch_size=5000) == make_lines(10_000)
        spool.close()

    def test_failed_write_leaves_no_fragment_and_keeps_lines(
        self, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
    ) -> None:
        """A flush that fails (disk error) is undone and its lines are written next time."""
        spool = Spool(tmp_path, max_bytes=1 << 20, flush_lines=1000)
        spool.append(make_lines(10))
        spool.flush()
        real_fsync = os.fsync

        def failing_fsync(fd: int) -> None:
            raise OSError(28, "No space left on device")

        spool.append(make_lines(10, start=10))
        monkeypatch.setattr(os, "fsync", failing_fsync)
        with pytest.raises(OSError):
            spool.flush()
        monkeypatch.setattr(os, "fsync", real_fsync)
        assert spool.buffered_lines == 10
        spool.flush()
        assert drain(spool, batch_size=100) == make_lines(20)
        spool.close()


def test_batch_reports_its_length(tmp_path: Path) -> None:
    """len(batch) is its number of lines."""
    spool = Spool(tmp_path, max_bytes=1 << 20)
    spool.append(make_lines(7))
    spool.flush()
    batch = spool.peek(5)
    assert isinstance(batch, Batch)
    assert len(batch) == 5
    spool.close()
