"""Durable state of the daemon: a snapshot of every channel plus a journal of what came after.

Why two files. A reading is acknowledged to the broker only once its effect on the model is
on disk (see `zeroline.service`), so durability sits on the per-message path. Writing a full
snapshot for every batch of acknowledgements costs O(channels) bytes each time (about 3 KB
per channel): with a thousand channels that is megabytes per batch, far too much for a
gateway's flash. Instead:

- `journal.jsonl` gets one short JSON line per state-changing message (the decoded reading,
  input or control event, ~150 bytes), appended in batches with one `fsync` per batch. That
  is the commit point that allows the acknowledgement.
- `snapshot.json` holds every channel's estimator, inputs and alert state as of journal
  sequence number `journal_seq`. It is written every `state.snapshot_every`, on SIGTERM,
  after a reload and when the journal grows long, atomically: write `snapshot.json.tmp`,
  fsync, rename over `snapshot.json`, fsync the directory. After a snapshot the journal is
  emptied; if power fails between the two, the records up to `journal_seq` are skipped on
  replay because the snapshot already holds them.

At start the daemon loads the snapshot and replays the journal records after it through the
same code that processed them the first time (without publishing again), so the restored
state equals the state before the crash, record for record.

Damage is never fatal. A snapshot that is not valid JSON, not a zeroline snapshot or of an
unknown version is renamed to `snapshot.json.corrupt-<UTC time>` with one clear log line
and the daemon starts from empty models; a journal whose last line was cut off by a power
cut ends at its last complete line; an unreadable line in the middle ends the replay there,
again with a log line. Channels whose saved model no longer matches the config are the
service's business (it starts them fresh and says so).

>>> import tempfile
>>> with tempfile.TemporaryDirectory() as directory:
...     store = StateStore(directory)
...     store.append_journal([{"s": 1, "t": "r"}])
...     size = store.save_snapshot({"a": '{"state": 1}'}, {"journal_seq": 1})
...     store.load_snapshot()["channels"]["a"], list(store.read_journal(after=1))
({'state': 1}, [])
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import json
import logging
import os
import time
from collections.abc import Iterator, Mapping
from pathlib import Path
from typing import Any

from zeroline.errors import InputError

_log = logging.getLogger(__name__)

SNAPSHOT_FORMAT = "zeroline-snapshot"
SNAPSHOT_VERSION = 1
SNAPSHOT_NAME = "snapshot.json"
JOURNAL_NAME = "journal.jsonl"


class StateStore:
    """The state directory: `save_snapshot`/`load_snapshot` and an append-only journal."""

    def __init__(self, directory: str | os.PathLike[str]) -> None:
        self.directory = Path(directory)
        try:
            self.directory.mkdir(parents=True, exist_ok=True)
        except OSError as error:
            raise InputError(
                f"state.dir {str(self.directory)!r}: cannot create ({error.strerror}); "
                "give a writable directory"
            ) from None
        if not os.access(self.directory, os.W_OK | os.X_OK):
            raise InputError(
                f"state.dir {str(self.directory)!r} is not writable by this user; "
                "give a writable directory"
            )
        self.snapshot_path = self.directory / SNAPSHOT_NAME
        self.journal_path = self.directory / JOURNAL_NAME
        # Unbuffered, so a failed write leaves nothing pending that could land later.
        self._journal = open(self.journal_path, "ab", buffering=0)  # noqa: SIM115 - kept open
        self.last_snapshot_s: float | None = None  # duration of the last save, for metrics

    # --- snapshot -------------------------------------------------------------------------

    def save_snapshot(self, channels: Mapping[str, str], meta: Mapping[str, Any]) -> int:
        """Write a snapshot atomically; `channels` maps names to ready JSON text. Returns
        the bytes written. Raises OSError if the disk refuses (the caller logs and retries)."""
        started = time.perf_counter()
        header = {"format": SNAPSHOT_FORMAT, "version": SNAPSHOT_VERSION, **meta}
        head = json.dumps(header)[:-1]  # reopen the object to append the channels
        body = ",".join(f"{json.dumps(name)}:{text}" for name, text in channels.items())
        data = f'{head}, "channels": {{{body}}}}}\n'.encode()
        temporary = self.snapshot_path.with_name(SNAPSHOT_NAME + ".tmp")
        with open(temporary, "wb") as handle:
            handle.write(data)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(temporary, self.snapshot_path)
        _fsync_directory(self.directory)
        self.last_snapshot_s = time.perf_counter() - started
        return len(data)

    def load_snapshot(self) -> dict[str, Any] | None:
        """The saved snapshot, or None if there is none or it had to be set aside."""
        try:
            text = self.snapshot_path.read_bytes()
        except FileNotFoundError:
            return None
        except OSError as error:
            self._set_aside(f"cannot be read ({error.strerror})")
            return None
        try:
            document = json.loads(text)
        except (ValueError, RecursionError):
            self._set_aside("is not valid JSON (a torn or damaged file)")
            return None
        problem = _snapshot_problem(document)
        if problem:
            self._set_aside(problem)
            return None
        result: dict[str, Any] = document
        return result

    def _set_aside(self, problem: str) -> None:
        stamp = _dt.datetime.now(_dt.timezone.utc).strftime("%Y%m%dT%H%M%SZ")
        target = self.snapshot_path.with_name(f"{SNAPSHOT_NAME}.corrupt-{stamp}")
        try:
            os.replace(self.snapshot_path, target)
        except OSError as error:
            _log.error(
                "state snapshot %s %s and cannot be moved aside (%s); starting from empty models",
                self.snapshot_path,
                problem,
                error.strerror,
            )
            return
        _log.error(
            "state snapshot %s %s; moved it to %s and starting from empty models",
            self.snapshot_path,
            problem,
            target.name,
        )

    # --- journal --------------------------------------------------------------------------

    def append_journal(self, records: list[dict[str, Any]]) -> None:
        """Append records and fsync: when this returns they survive a power cut."""
        if not records:
            return
        data = "".join(json.dumps(record, separators=(",", ":")) + "\n" for record in records)
        start = self._journal.seek(0, os.SEEK_END)
        try:
            view = memoryview(data.encode())
            while view:  # unbuffered: a raw write may be partial
                written = self._journal.write(view) or 0
                view = view[written:]
            os.fsync(self._journal.fileno())
        except OSError:
            # Leave no partial batch behind: the caller retries the same records later.
            with contextlib.suppress(OSError):
                self._journal.truncate(start)
            raise

    def read_journal(self, after: int) -> Iterator[dict[str, Any]]:
        """Journal records with sequence number `s` above `after`, oldest first."""
        try:
            data = self.journal_path.read_bytes()
        except FileNotFoundError:
            return
        lines = data.split(b"\n")
        if lines and lines[-1]:
            _log.warning(
                "state journal ends in a partial line (%d bytes, a write cut short); ignoring it",
                len(lines[-1]),
            )
        for number, line in enumerate(lines[:-1], start=1):
            try:
                record = json.loads(line)
                sequence = int(record["s"])
            except (ValueError, KeyError, TypeError):
                _log.error(
                    "state journal line %d is damaged; replay stops there (later records are lost)",
                    number,
                )
                return
            if sequence > after:
                after = sequence  # a record is never applied twice
                yield record

    def reset_journal(self) -> None:
        """Empty the journal (after a snapshot that holds everything in it)."""
        self._journal.truncate(0)
        os.fsync(self._journal.fileno())

    def close(self) -> None:
        self._journal.close()


def _snapshot_problem(document: Any) -> str | None:
    if not isinstance(document, dict) or document.get("format") != SNAPSHOT_FORMAT:
        return "is not a zeroline snapshot"
    if document.get("version") != SNAPSHOT_VERSION:
        return (
            f"has version {document.get('version')!r}; this zeroline reads version "
            f"{SNAPSHOT_VERSION}"
        )
    if not isinstance(document.get("channels"), dict):
        return "has no channel table"
    if not isinstance(document.get("journal_seq", 0), int):
        return "has no valid journal_seq"
    return None


def _fsync_directory(directory: Path) -> None:
    """Make a rename durable (POSIX needs the directory itself synced)."""
    fd = os.open(directory, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)
