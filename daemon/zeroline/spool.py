"""A durable, bounded, ordered on-disk queue of text lines (the time-series spool).

Why: the time-series database may be down for minutes or days (a gateway on a mobile link,
a database upgrade). Points must not be lost meanwhile, and must arrive in the order they
were produced, so they go to disk first and the sender reads them back from there.

Layout of the spool directory:

- segment files `000000000007.seg`, each a run of complete `\\n`-terminated lines, written
  only at their end. The highest-numbered segment is the one being appended to; a new one
  is started when it reaches `segment_bytes` (a large flush is split across segments, one
  fsync each, so that dropping a segment never drops much more than `segment_bytes`).
- `cursor.json`: the committed read position `{"segment": 7, "offset": 12345}`, i.e. every
  byte before it has been delivered. It is replaced atomically (write temp, fsync, rename,
  fsync the directory), so after a crash it is either the old or the new position.

Flash-friendly writes: `append` only buffers in memory; the buffer goes to disk in one
`write` + one `fsync` when it holds `flush_lines` lines, when it is older than
`flush_interval_s` (see `flush_if_due`), or on `flush()`/`close()`. A power cut loses at
most the unflushed buffer. Acks write the small cursor file once per delivered batch.

Delivery is at least once: a batch that was sent but not acked before a crash is read again
after the restart. For time-series data a resend is harmless where the database keeps one
sample per series and timestamp (InfluxDB overwrites; VictoriaMetrics does so when started
with `-dedup.minScrapeInterval=1ms`, see deploy/timeseries.md).

Torn tail: if power fails in the middle of a flush, the last segment may end in a partial
line (or a run of NUL bytes on some file systems). Opening the spool cuts the segment back
to its last complete line and logs how many bytes were discarded.

Bound (policy `drop_oldest`): when the segment files together exceed `max_bytes`, whole
segments are deleted oldest first and their undelivered lines are counted in
`dropped_lines`. Dropping the oldest data keeps the most recent state of the site, which is
what an operator looks at first after an outage. A batch that is being sent while its
segment is dropped counts as dropped only if it is then not acked, so every line ends up
counted once: delivered or dropped.

>>> import tempfile
>>> with tempfile.TemporaryDirectory() as directory:
...     spool = Spool(directory, max_bytes=1 << 20)
...     spool.append(["a f=1 1", "a f=2 2"])
...     spool.flush()
...     batch = spool.peek(10)
...     spool.ack(batch)
...     spool.close()
...     batch.lines
['a f=1 1', 'a f=2 2']
"""

from __future__ import annotations

import json
import logging
import os
import threading
import time
from collections.abc import Callable, Iterable
from dataclasses import dataclass
from pathlib import Path

from zeroline.errors import InputError
from zeroline.logs import RateLimitedLogger as RateLimitedLogger  # re-exported for tsdb

_log = logging.getLogger(__name__)

SEGMENT_SUFFIX = ".seg"
CURSOR_NAME = "cursor.json"
DROP_POLICY = "drop_oldest"
_MAX_BUFFER_FLUSHES = 10  # lines kept in memory while the disk fails, in flushes


@dataclass(frozen=True, order=True)
class Position:
    """A place in the spool: byte `offset` inside segment number `segment`."""

    segment: int
    offset: int


@dataclass(frozen=True)
class Batch:
    """Lines read by `Spool.peek`, oldest first; `end` is the position just after them."""

    lines: list[str]
    start: Position
    end: Position

    def __len__(self) -> int:
        return len(self.lines)


def _default_segment_bytes(max_bytes: int) -> int:
    # Sixteen segments per bound: dropping one loses about 6 % of the spool, and each
    # segment stays small enough to count its lines quickly when it is dropped.
    return max(4096, min(8 << 20, max_bytes // 16))


class Spool:
    """Durable FIFO of text lines in `directory`; see the module docstring for the design.

    Thread-safe: producers may `append` while one consumer does `peek`/`ack`.
    """

    def __init__(
        self,
        directory: str | os.PathLike[str],
        max_bytes: int,
        *,
        segment_bytes: int | None = None,
        flush_lines: int = 1000,
        flush_interval_s: float = 1.0,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        if max_bytes < 4096:
            raise InputError(f"spool max_bytes is {max_bytes}; use at least 4096 bytes")
        if flush_lines < 1:
            raise InputError(f"spool flush_lines is {flush_lines}; use 1 or more")
        self.directory = Path(directory)
        self.max_bytes = max_bytes
        self.segment_bytes = min(segment_bytes or _default_segment_bytes(max_bytes), max_bytes)
        self.flush_lines = flush_lines
        self.flush_interval_s = flush_interval_s
        self.dropped_lines = 0
        self.torn_bytes_discarded = 0
        self._clock = clock
        self._lock = threading.Lock()
        self._buffer: list[str] = []
        self._buffer_since = 0.0
        self._sizes: dict[int, int] = {}  # segment number -> bytes on disk
        self._write_fd: int | None = None
        self._in_flight: Batch | None = None  # the last batch peeked and not yet acked
        self._in_flight_dropped = 0  # its lines whose segment was dropped meanwhile
        self._closed = False
        self._drop_log = RateLimitedLogger(_log)
        self.directory.mkdir(parents=True, exist_ok=True)
        self._open_existing()

    # -- opening -----------------------------------------------------------------------

    def _open_existing(self) -> None:
        for path in self.directory.glob("*" + SEGMENT_SUFFIX):
            number = _segment_number(path)
            if number is not None:
                self._sizes[number] = path.stat().st_size
        if self._sizes:
            # Only the newest segment can be torn: a segment is complete before the next
            # one is created, and a reopened spool repairs before appending.
            newest = max(self._sizes)
            self._sizes[newest] = self._repair_tail(self._segment_path(newest))
        self._cursor = self._read_cursor()
        first = min(self._sizes, default=self._cursor.segment)
        if self._cursor.segment < first or self._cursor.segment not in self._sizes:
            # The cursor's segment is gone (dropped, or fully acked before a crash).
            self._cursor = Position(max(first, self._cursor.segment), 0)
        size = self._sizes.get(self._cursor.segment, 0)
        if self._cursor.offset > size:
            self._cursor = Position(self._cursor.segment, size)
        self._delete_segments_before(self._cursor.segment)
        self._next_segment = max(self._sizes, default=self._cursor.segment - 1) + 1
        with self._lock:
            self._enforce_bound_locked()

    def _repair_tail(self, path: Path) -> int:
        """Cut `path` back to its last complete line; return its size afterwards."""
        data = path.read_bytes()
        keep = data.rfind(b"\n") + 1
        # NUL bytes are what some file systems leave where an unfinished write was.
        while keep > 0:
            line_start = data.rfind(b"\n", 0, keep - 1) + 1
            if b"\x00" not in data[line_start:keep]:
                break
            keep = line_start
        if keep < len(data):
            self.torn_bytes_discarded += len(data) - keep
            _log.warning(
                "spool segment %s ended in an incomplete line (power cut during a write?); "
                "discarded its last %d bytes",
                path.name,
                len(data) - keep,
            )
            with open(path, "r+b") as handle:
                handle.truncate(keep)
                handle.flush()
                os.fsync(handle.fileno())
        return keep

    def _read_cursor(self) -> Position:
        path = self.directory / CURSOR_NAME
        try:
            raw = json.loads(path.read_text(encoding="utf-8"))
            return Position(int(raw["segment"]), int(raw["offset"]))
        except FileNotFoundError:
            return Position(min(self._sizes, default=0), 0)
        except (ValueError, KeyError, TypeError) as error:
            # Cannot happen with atomic replacement; if it does, resend rather than lose.
            _log.warning(
                "spool cursor %s is unreadable (%s); starting from the oldest data", path, error
            )
            return Position(min(self._sizes, default=0), 0)

    # -- writing -----------------------------------------------------------------------

    def append(self, lines: Iterable[str]) -> None:
        """Queue `lines` (no newlines inside); written to disk by the next flush."""
        new = list(lines)
        for line in new:
            if "\n" in line or "\r" in line:
                raise InputError(
                    f"spool line contains a line break: {line[:60]!r}; "
                    "escape or remove it before spooling"
                )
        with self._lock:
            self._check_open()
            if not self._buffer:
                self._buffer_since = self._clock()
            self._buffer.extend(new)
            if len(self._buffer) >= self.flush_lines:
                self._flush_locked()

    def flush_if_due(self) -> bool:
        """Flush when the buffer is older than `flush_interval_s`; True if it flushed."""
        with self._lock:
            if not self._buffer or self._closed:
                return False
            if self._clock() - self._buffer_since < self.flush_interval_s:
                return False
            self._flush_locked()
            return True

    def flush(self) -> None:
        """Write the buffered lines to disk now (one write, one fsync)."""
        with self._lock:
            self._check_open()
            self._flush_locked()

    def _flush_locked(self) -> None:
        pending = self._buffer
        self._buffer = []
        while pending:
            fd = self._writable_segment_fd()
            number = self._next_segment - 1
            chunk, pending = _split_to_fit(pending, self.segment_bytes - self._sizes[number])
            data = ("\n".join(chunk) + "\n").encode("utf-8")
            try:
                _write_all(fd, data)
                os.fsync(fd)
            except OSError:
                self._undo_failed_write(fd, number, chunk + pending)
                raise
            self._sizes[number] += len(data)
            if self._sizes[number] >= self.segment_bytes:
                os.close(fd)
                self._write_fd = None
            # after every segment written, not once per flush: a large flush must not
            # take the spool past its bound while it is being written
            self._enforce_bound_locked()

    def _undo_failed_write(self, fd: int, number: int, pending: list[str]) -> None:
        """Cut a half-written flush off the segment and keep its lines for the next try."""
        try:
            os.ftruncate(fd, self._sizes[number])
        except OSError:
            _log.warning("spool segment %d could not be truncated after a failed write", number)
        self._buffer = pending + self._buffer
        excess = len(self._buffer) - _MAX_BUFFER_FLUSHES * self.flush_lines
        if excess > 0:  # the disk keeps failing: bound memory, oldest first as on disk
            del self._buffer[:excess]
            self.dropped_lines += excess

    def _writable_segment_fd(self) -> int:
        if self._write_fd is not None:
            return self._write_fd
        last = self._next_segment - 1
        if last in self._sizes and self._sizes[last] < self.segment_bytes:
            path = self._segment_path(last)
            self._write_fd = os.open(path, os.O_WRONLY | os.O_APPEND)
            return self._write_fd
        number = self._next_segment
        self._next_segment += 1
        path = self._segment_path(number)
        self._write_fd = os.open(path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o640)
        self._sizes[number] = 0
        _fsync_directory(self.directory)  # make the new file's name durable too
        return self._write_fd

    # -- bound -------------------------------------------------------------------------

    def _enforce_bound_locked(self) -> None:
        active = self._next_segment - 1 if self._write_fd is not None else None
        while self._disk_bytes_locked() > self.max_bytes:
            candidates = [number for number in sorted(self._sizes) if number != active]
            if not candidates:
                return
            self._drop_segment_locked(candidates[0])

    def _drop_segment_locked(self, number: int) -> None:
        path = self._segment_path(number)
        offset = self._cursor.offset if number == self._cursor.segment else 0
        undelivered = b""
        if number >= self._cursor.segment:
            with open(path, "rb") as handle:
                handle.seek(offset)
                undelivered = handle.read()
        path.unlink()
        del self._sizes[number]
        in_flight = self._in_flight_bytes(number, offset, len(undelivered))
        self._in_flight_dropped += undelivered[:in_flight].count(b"\n")
        lines = undelivered[in_flight:].count(b"\n")
        self.dropped_lines += lines
        if number >= self._cursor.segment:
            self._cursor = Position(number + 1, 0)
            self._write_cursor(self._cursor)
        if lines:
            self._drop_log.warning(
                "spool-full",
                f"spool {self.directory} is over its bound of {self.max_bytes} bytes; "
                f"policy {DROP_POLICY}: dropped {lines} undelivered lines "
                f"({self.dropped_lines} in total so far)",
            )

    def _in_flight_bytes(self, number: int, offset: int, available: int) -> int:
        """How many bytes after `offset` in segment `number` belong to the peeked batch.

        Those lines may be stored by the database at this very moment: they count as
        dropped only if the batch is not acked (see `peek` and `ack`), so that every line
        is counted exactly once, as delivered or as dropped.
        """
        batch = self._in_flight
        if batch is None or not batch.start.segment <= number <= batch.end.segment:
            return 0
        end = batch.end.offset if batch.end.segment == number else offset + available
        return max(0, min(available, end - offset))

    # -- reading -----------------------------------------------------------------------

    def peek(self, max_lines: int) -> Batch:
        """Return up to `max_lines` of the oldest unacked lines on disk (maybe none)."""
        with self._lock:
            self._check_open()
            # A new peek means the previous batch was not delivered: settle its drops.
            self.dropped_lines += self._in_flight_dropped
            self._in_flight_dropped = 0
            lines: list[str] = []
            start = self._cursor
            position = start
            for number in sorted(n for n in self._sizes if n >= start.segment):
                offset = position.offset if number == position.segment else 0
                taken, offset = self._read_lines(number, offset, max_lines - len(lines))
                lines.extend(taken)
                position = Position(number, offset)
                if len(lines) >= max_lines or offset < self._sizes[number]:
                    break
            batch = Batch(lines, start, position)
            self._in_flight = batch if lines else None
            return batch

    def _read_lines(self, number: int, offset: int, limit: int) -> tuple[list[str], int]:
        lines: list[str] = []
        end = self._sizes[number]
        with open(self._segment_path(number), "rb") as handle:
            handle.seek(offset)
            while len(lines) < limit and offset < end:
                raw = handle.readline()
                if not raw.endswith(b"\n"):
                    break  # cannot happen: only complete lines are counted in `end`
                offset += len(raw)
                text = raw[:-1].decode("utf-8", errors="replace")
                if text and "\x00" not in text:
                    lines.append(text)
        return lines, offset

    def ack(self, batch: Batch) -> None:
        """Mark `batch` as delivered: commit the cursor and delete finished segments."""
        with self._lock:
            self._check_open()
            if batch is self._in_flight:
                self._in_flight = None
                self._in_flight_dropped = 0  # delivered after all: not dropped
            if batch.end <= self._cursor:
                return  # its data was dropped by the bound meanwhile, or acked already
            cursor = batch.end
            later = [n for n in self._sizes if n > cursor.segment]
            if later and cursor.offset >= self._sizes.get(cursor.segment, 0):
                cursor = Position(min(later), 0)
            self._cursor = cursor
            self._write_cursor(cursor)
            self._delete_segments_before(cursor.segment)

    def _delete_segments_before(self, number: int) -> None:
        for old in [n for n in self._sizes if n < number]:
            self._segment_path(old).unlink(missing_ok=True)
            del self._sizes[old]

    def _write_cursor(self, cursor: Position) -> None:
        text = json.dumps({"segment": cursor.segment, "offset": cursor.offset})
        _write_atomically(self.directory / CURSOR_NAME, text.encode("utf-8"))

    # -- state -------------------------------------------------------------------------

    @property
    def disk_bytes(self) -> int:
        """Bytes in segment files (delivered lines of the oldest segment included)."""
        with self._lock:
            return self._disk_bytes_locked()

    def _disk_bytes_locked(self) -> int:
        return sum(self._sizes.values())

    @property
    def buffered_lines(self) -> int:
        """Lines appended but not yet flushed to disk."""
        return len(self._buffer)

    def is_empty(self) -> bool:
        """True when nothing is buffered and every line on disk has been acked."""
        with self._lock:
            if self._buffer:
                return False
            return all(
                size <= (self._cursor.offset if number == self._cursor.segment else 0)
                for number, size in self._sizes.items()
                if number >= self._cursor.segment
            )

    def close(self) -> None:
        """Flush the buffer and release the file; the directory keeps everything unacked."""
        with self._lock:
            if self._closed:
                return
            self._flush_locked()
            self.dropped_lines += self._in_flight_dropped  # never acked: not delivered
            self._in_flight_dropped = 0
            if self._write_fd is not None:
                os.close(self._write_fd)
                self._write_fd = None
            self._closed = True

    def _check_open(self) -> None:
        if self._closed:
            raise RuntimeError(f"spool {self.directory} is closed")

    def _segment_path(self, number: int) -> Path:
        return self.directory / f"{number:012d}{SEGMENT_SUFFIX}"


def _segment_number(path: Path) -> int | None:
    stem = path.name[: -len(SEGMENT_SUFFIX)]
    return int(stem) if stem.isdigit() else None


def _split_to_fit(lines: list[str], room: int) -> tuple[list[str], list[str]]:
    """Split off the head of `lines` that fits in `room` bytes (always at least one line)."""
    used = 0
    for index, line in enumerate(lines):
        used += len(line.encode("utf-8")) + 1
        if used >= room:
            return lines[: index + 1], lines[index + 1 :]
    return lines, []


def _write_all(fd: int, data: bytes) -> None:
    view = memoryview(data)
    while view:
        written = os.write(fd, view)
        view = view[written:]


def _fsync_directory(directory: Path) -> None:
    fd = os.open(directory, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _write_atomically(path: Path, data: bytes) -> None:
    """Replace `path` with `data` so that a crash leaves either the old or the new file."""
    temporary = path.with_name(path.name + ".tmp")
    fd = os.open(temporary, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o640)
    try:
        _write_all(fd, data)
        os.fsync(fd)
    finally:
        os.close(fd)
    os.replace(temporary, path)
    _fsync_directory(path.parent)
