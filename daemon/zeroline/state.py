"""Durable state of the daemon: a snapshot of every channel plus a journal of what came after.

Why two files. A reading is acknowledged to the broker only once its effect on the model is
on disk (see `zeroline.service`), so durability sits on the per-message path. Writing a full
snapshot for every batch of acknowledgements costs O(channels) bytes each time (about 840 B
per channel at p = 6): with a thousand channels that is most of a megabyte per batch, far
too much for a gateway's flash. Instead:

- `journal.jsonl` gets one short JSON line per state-changing message (the decoded reading,
  input or control event, ~150 bytes), appended in batches with one `fsync` per batch. That
  is the commit point that allows the acknowledgement.
- `snapshot.bin` holds every channel's estimator, inputs and alert state as of journal
  sequence number `journal_seq`. It is written every `state.snapshot_every`, on SIGTERM,
  after a reload and when the journal grows long, atomically: write `snapshot.bin.tmp`,
  fsync, rename over `snapshot.bin`, fsync the directory. After a snapshot the journal is
  emptied; if power fails between the two, the records up to `journal_seq` are skipped on
  replay because the snapshot already holds them.

The snapshot file (version 2), all integers little-endian:

    MAGIC (18 bytes: "zeroline-snapshot" and a newline)
    version u32 | CRC-32 (zlib) of everything after this prefix u32 | header bytes u64 |
    payload bytes u64
    header: UTF-8 JSON, padded with spaces so the payload starts at a multiple of 8
    payload: one block of float64 per group, `rows × width` values, row-major

The header holds `format`, `version`, `journal_seq`, `saved_at`, `latest_inputs` and one
entry per group of channels of one template: `template`, `model` (the config's model key),
`layout` (field names and sizes, see `zeroline.state_layout`), `names`, `wildcards`, the
block's `offset` and `rows` in the payload, and `sides` (channel index → JSON side entry,
only for the few channels that have one). Numbers are stored as their float64 bytes, so a
restored channel continues bit for bit, and the file itself costs little: for 10,000
channels (8.4 MB) encoding and the durable write took ~25 ms, reading and checking ~10 ms
(bench/snapshot.py; packing and rebuilding the channels is the rest).

At start the daemon loads the snapshot and replays the journal records after it through the
same code that processed them the first time (without publishing again), so the restored
state equals the state before the crash, record for record.

Upgrade. A daemon of the JSON era left `snapshot.json` (version 1, every channel's state as
JSON). When there is no `snapshot.bin` it is read as before, so an upgraded daemon keeps
its models; the first binary snapshot then replaces it (the JSON file is removed).

Damage is never fatal. A snapshot that is short, fails its CRC, is not a zeroline snapshot
or of an unknown version is renamed to `<name>.corrupt-<UTC time>` with one clear log line
and the daemon starts from empty models; a journal whose last line was cut off by a power
cut ends at its last complete line; an unreadable line in the middle ends the replay there,
again with a log line. Channels whose saved model no longer matches the config are the
service's business (it starts them fresh and says so).

>>> import tempfile
>>> import numpy as np
>>> from zeroline.state_layout import PackedChannels
>>> with tempfile.TemporaryDirectory() as directory:
...     store = StateStore(directory)
...     store.append_journal([{"s": 1, "t": "r"}])
...     packed = PackedChannels("m", [("x", 2)], np.array([[1.5, -0.0]]), [None])
...     group = SnapshotGroup("t", ["a"], [("a",)], packed)
...     size = store.save_snapshot([group], {"journal_seq": 1})
...     snapshot = store.load_snapshot()
...     snapshot.groups[0].packed.rows.tolist(), list(store.read_journal(after=1))
([[1.5, -0.0]], [])
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import json
import logging
import os
import struct
import time
import zlib
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import orjson

from zeroline.errors import InputError
from zeroline.state_layout import PackedChannels, collector_paused

_log = logging.getLogger(__name__)

SNAPSHOT_FORMAT = "zeroline-snapshot"
SNAPSHOT_VERSION = 2
SNAPSHOT_NAME = "snapshot.bin"
#: The JSON snapshot of version 1, still read when there is no binary one (upgrades).
LEGACY_SNAPSHOT_NAME = "snapshot.json"
LEGACY_SNAPSHOT_VERSION = 1
JOURNAL_NAME = "journal.jsonl"
MAGIC = b"zeroline-snapshot\n"
_PREFIX = struct.Struct("<IIQQ")  # version, CRC-32 of the rest, header bytes, payload bytes
_FLOAT = np.dtype("<f8")


@dataclass(frozen=True)
class SnapshotGroup:
    """Channels of one template in a snapshot: their names, wildcards and packed state."""

    template: str
    names: list[str]
    wildcards: list[tuple[str, ...]]
    packed: PackedChannels


@dataclass(frozen=True)
class Snapshot:
    """A loaded snapshot: `meta` (journal_seq, saved_at, latest_inputs) and the groups;
    `legacy_channels` holds the per-channel JSON entries of a version-1 snapshot."""

    meta: dict[str, Any]
    groups: list[SnapshotGroup] = field(default_factory=list)
    legacy_channels: dict[str, Any] = field(default_factory=dict)


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
        self.legacy_snapshot_path = self.directory / LEGACY_SNAPSHOT_NAME
        self.journal_path = self.directory / JOURNAL_NAME
        # Unbuffered, so a failed write leaves nothing pending that could land later.
        self._journal = open(self.journal_path, "ab", buffering=0)  # noqa: SIM115 - kept open
        self.last_snapshot_s: float | None = None  # duration of the last save, for metrics

    # --- snapshot -------------------------------------------------------------------------

    def save_snapshot(self, groups: Sequence[SnapshotGroup], meta: Mapping[str, Any]) -> int:
        """Write a snapshot atomically (format in the module docstring). Returns the bytes
        written. Raises OSError if the disk refuses (the caller logs and retries)."""
        started = time.perf_counter()
        data = encode_snapshot(groups, meta)
        temporary = self.snapshot_path.with_name(SNAPSHOT_NAME + ".tmp")
        with open(temporary, "wb") as handle:
            for part in data:
                handle.write(part)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(temporary, self.snapshot_path)
        _fsync_directory(self.directory)
        # The binary snapshot is now the durable one; an old JSON one would only mislead
        # (a later damaged snapshot.bin must not bring back a stale model).
        with contextlib.suppress(FileNotFoundError):
            self.legacy_snapshot_path.unlink()
        self.last_snapshot_s = time.perf_counter() - started
        return sum(len(part) for part in data)

    def load_snapshot(self) -> Snapshot | None:
        """The saved snapshot, or None if there is none or it had to be set aside."""
        try:
            data = self.snapshot_path.read_bytes()
        except FileNotFoundError:
            return self._load_legacy()
        except OSError as error:
            self._set_aside(self.snapshot_path, f"cannot be read ({error.strerror})")
            return None
        try:
            return decode_snapshot(data)
        except SnapshotError as error:
            self._set_aside(self.snapshot_path, str(error))
            return None

    def _load_legacy(self) -> Snapshot | None:
        """A version-1 JSON snapshot (from before the binary format), if there is one."""
        path = self.legacy_snapshot_path
        try:
            text = path.read_bytes()
        except FileNotFoundError:
            return None
        except OSError as error:
            self._set_aside(path, f"cannot be read ({error.strerror})")
            return None
        try:
            document = json.loads(text)
        except (ValueError, RecursionError):
            self._set_aside(path, "is not valid JSON (a torn or damaged file)")
            return None
        problem = _legacy_problem(document)
        if problem:
            self._set_aside(path, problem)
            return None
        channels = document.pop("channels")
        return Snapshot(meta=document, legacy_channels=channels)

    def _set_aside(self, path: Path, problem: str) -> None:
        stamp = _dt.datetime.now(_dt.timezone.utc).strftime("%Y%m%dT%H%M%SZ")
        target = path.with_name(f"{path.name}.corrupt-{stamp}")
        try:
            os.replace(path, target)
        except OSError as error:
            _log.error(
                "state snapshot %s %s and cannot be moved aside (%s); starting from empty models",
                path,
                problem,
                error.strerror,
            )
            return
        _log.error(
            "state snapshot %s %s; moved it to %s and starting from empty models",
            path,
            problem,
            target.name,
        )

    # --- journal --------------------------------------------------------------------------

    def append_journal(self, records: list[dict[str, Any]]) -> None:
        """Append records and fsync: when this returns they survive a power cut."""
        if not records:
            return
        # orjson: 0.6 against 6.6 µs a record for the json module, once per reading. It
        # writes a NaN as null, which would not read back as a number: records hold only
        # numbers the decoders and the control parser have checked to be finite.
        dumps, newline = orjson.dumps, orjson.OPT_APPEND_NEWLINE
        data = b"".join([dumps(record, option=newline) for record in records])
        start = self._journal.seek(0, os.SEEK_END)
        try:
            view = memoryview(data)
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


class SnapshotError(ValueError):
    """Why bytes are not a readable snapshot (becomes the set-aside log line)."""


def encode_snapshot(groups: Sequence[SnapshotGroup], meta: Mapping[str, Any]) -> list[bytes]:
    """The snapshot file's bytes, as parts to write one after the other."""
    blocks: list[bytes] = []
    entries = []
    offset = 0
    for group in groups:
        packed = group.packed
        block = np.ascontiguousarray(packed.rows, dtype=_FLOAT).tobytes()
        entries.append(
            {
                "template": group.template,
                "model": packed.model,
                "layout": [[name, size] for name, size in packed.layout],
                "names": list(group.names),
                "wildcards": [list(w) for w in group.wildcards],
                "offset": offset,
                "rows": int(packed.rows.shape[0]),
                "sides": {str(i): side for i, side in enumerate(packed.sides) if side},
            }
        )
        blocks.append(block)
        offset += len(block)
    header = {"format": SNAPSHOT_FORMAT, "version": SNAPSHOT_VERSION, **meta, "groups": entries}
    text = json.dumps(header, separators=(",", ":")).encode()
    start = len(MAGIC) + _PREFIX.size
    text += b" " * (-(start + len(text)) % 8)  # the payload starts 8-byte aligned
    crc = zlib.crc32(text)
    for block in blocks:
        crc = zlib.crc32(block, crc)
    prefix = MAGIC + _PREFIX.pack(SNAPSHOT_VERSION, crc, len(text), offset)
    return [prefix, text, *blocks]


def decode_snapshot(data: bytes) -> Snapshot:
    """Parse and check a snapshot file's bytes; SnapshotError says what is wrong."""
    with collector_paused():  # the header holds every channel's name and wildcards
        return _decoded(data)


def _decoded(data: bytes) -> Snapshot:
    start = len(MAGIC) + _PREFIX.size
    if not data.startswith(MAGIC):
        raise SnapshotError("is not a zeroline snapshot")
    if len(data) < start:
        raise SnapshotError("is cut short (a torn or damaged file)")
    version, crc, header_size, payload_size = _PREFIX.unpack_from(data, len(MAGIC))
    if version != SNAPSHOT_VERSION:
        raise SnapshotError(
            f"has version {version!r}; this zeroline reads version {SNAPSHOT_VERSION} "
            f"(and {LEGACY_SNAPSHOT_VERSION} as {LEGACY_SNAPSHOT_NAME})"
        )
    if len(data) != start + header_size + payload_size:
        raise SnapshotError(
            f"has {len(data)} bytes, its prefix says {start + header_size + payload_size} "
            "(a torn or damaged file)"
        )
    body = memoryview(data)[start:]
    if zlib.crc32(body) != crc:
        raise SnapshotError("fails its CRC-32 check (a damaged file)")
    try:
        header = json.loads(bytes(body[:header_size]))
    except (ValueError, RecursionError):
        raise SnapshotError("has a header that is not valid JSON") from None
    payload = body[header_size:]
    if not isinstance(header, dict) or header.get("format") != SNAPSHOT_FORMAT:
        raise SnapshotError("is not a zeroline snapshot")
    if not isinstance(header.get("journal_seq", 0), int):
        raise SnapshotError("has no valid journal_seq")
    entries = header.pop("groups", None)
    if not isinstance(entries, list):
        raise SnapshotError("has no channel groups")
    groups = [_group(entry, payload) for entry in entries]
    return Snapshot(meta=header, groups=groups)


def _group(entry: Any, payload: memoryview) -> SnapshotGroup:
    try:
        layout = [(str(name), int(size)) for name, size in entry["layout"]]
        names = [str(name) for name in entry["names"]]
        wildcards = [tuple(str(w) for w in ws) for ws in entry["wildcards"]]
        rows, offset = int(entry["rows"]), int(entry["offset"])
        width = sum(size for _, size in layout)
        end = offset + 8 * rows * width
        if len(names) != rows or len(wildcards) != rows or offset < 0 or end > len(payload):
            raise ValueError("sizes do not agree")
        block = np.frombuffer(payload[offset:end], dtype=_FLOAT).reshape(rows, width)
        sides: list[dict[str, Any] | None] = [None] * rows
        for index, side in entry["sides"].items():
            if not isinstance(side, dict):
                raise ValueError(f"side entry {index} is not an object")
            sides[int(index)] = side
        packed = PackedChannels(str(entry["model"]), layout, block, sides)
        return SnapshotGroup(str(entry["template"]), names, wildcards, packed)
    except (KeyError, TypeError, ValueError, IndexError, AttributeError) as error:
        raise SnapshotError(f"has a damaged channel group ({error})") from None


def _legacy_problem(document: Any) -> str | None:
    if not isinstance(document, dict) or document.get("format") != SNAPSHOT_FORMAT:
        return "is not a zeroline snapshot"
    if document.get("version") != LEGACY_SNAPSHOT_VERSION:
        return (
            f"has version {document.get('version')!r}; this zeroline reads version "
            f"{LEGACY_SNAPSHOT_VERSION} as JSON"
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
