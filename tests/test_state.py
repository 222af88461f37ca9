"""Atomic snapshots, the journal, and setting aside damaged state."""

from __future__ import annotations

import json
import logging
import math
import os
import struct
import zlib
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pytest

from zeroline.errors import InputError
from zeroline.state import (
    LEGACY_SNAPSHOT_NAME,
    MAGIC,
    SNAPSHOT_NAME,
    SnapshotGroup,
    StateStore,
)
from zeroline.state_layout import PackedChannels


def corrupt_files(directory: Path) -> list[str]:
    return sorted(p.name for p in directory.iterdir() if ".corrupt-" in p.name)


def group(rows: list[list[float]], sides: list[dict | None] | None = None) -> SnapshotGroup:
    names = [f"c{i}" for i in range(len(rows))]
    packed = PackedChannels(
        "model-key",
        [("a", 1), ("b", len(rows[0]) - 1)],
        np.array(rows),
        sides or [None] * len(rows),
    )
    return SnapshotGroup("{1}-t", names, [(n,) for n in names], packed)


def saved_bytes(tmp_path: Path) -> bytes:
    store = StateStore(tmp_path / "source")
    store.save_snapshot([group([[1.0, 2.0, 3.0], [4.0, 5.0, 6.0]])], {"journal_seq": 5})
    return (tmp_path / "source" / SNAPSHOT_NAME).read_bytes()


def with_crc(data: bytes) -> bytes:
    """`data` with its CRC (and header size, for an edited header) recomputed, so a test
    reaches the checks behind them."""
    start = len(MAGIC) + 24
    version, _, _, payload = struct.unpack_from("<IIQQ", data, len(MAGIC))
    header = len(data) - start - payload
    prefix = struct.pack("<IIQQ", version, zlib.crc32(data[start:]), header, payload)
    return MAGIC + prefix + data[start:]


class TestSnapshot:
    def test_round_trip_bit_for_bit_and_no_temporary_left(self, tmp_path: Path) -> None:
        """Saved rows load back with every float64 bit (signed zero, subnormal, inf, NaN),
        with names, wildcards, side entries and meta; the temporary file is renamed away."""
        store = StateStore(tmp_path)
        values = [[1.5, -0.0, 5e-324, math.inf], [-1e300, math.nan, 1 / 3, -math.inf]]
        sides = [None, {"alerts": {"drift_limit": {"message": "drift +16 ✓"}}}]
        size = store.save_snapshot(
            [group(values, sides), group([[7.0, 8.0]])],
            {"journal_seq": 7, "latest_inputs": {"site/t": [1.0, 2.0]}},
        )
        assert size == (tmp_path / SNAPSHOT_NAME).stat().st_size
        snapshot = store.load_snapshot()
        assert snapshot is not None
        first, second = snapshot.groups
        assert first.packed.rows.tobytes() == np.array(values).tobytes()
        assert first.packed.sides == sides and first.packed.model == "model-key"
        assert first.names == ["c0", "c1"] and first.wildcards == [("c0",), ("c1",)]
        assert first.packed.layout == [("a", 1), ("b", 3)]
        assert second.packed.rows.tolist() == [[7.0, 8.0]]
        assert snapshot.meta["journal_seq"] == 7
        assert snapshot.meta["latest_inputs"] == {"site/t": [1.0, 2.0]}
        assert not (tmp_path / (SNAPSHOT_NAME + ".tmp")).exists()

    def test_a_crash_before_rename_keeps_the_old_snapshot(self, tmp_path: Path) -> None:
        """A torn temporary file (power cut mid-write) is never read: the old one counts."""
        store = StateStore(tmp_path)
        store.save_snapshot([group([[1.0, 2.0]])], {"journal_seq": 1})
        (tmp_path / (SNAPSHOT_NAME + ".tmp")).write_bytes(MAGIC + b"\x02\x00")
        snapshot = store.load_snapshot()
        assert snapshot is not None and snapshot.groups[0].packed.rows.tolist() == [[1.0, 2.0]]

    @pytest.mark.parametrize(
        ("damage", "why"),
        [
            (lambda d: d[: len(d) // 2], "bytes, its prefix says"),
            (lambda d: d[:30], "cut short"),
            (lambda d: d[:-9] + bytes([d[-9] ^ 1]) + d[-8:], "CRC-32"),
            (lambda d: b"\x00" * 64, "not a zeroline snapshot"),
            (lambda d: b'{"format": "zeroline-snapshot", "version": 1}', "not a zeroline"),
            (
                lambda d: with_crc(d[: len(MAGIC)] + struct.pack("<I", 99) + d[len(MAGIC) + 4 :]),
                "version 99",
            ),
            (lambda d: with_crc(d.replace(b'"groups"', b'"groupz"')), "no channel groups"),
            (lambda d: with_crc(d.replace(b'"rows":2', b'"rows":9')), "damaged channel group"),
            (lambda d: with_crc(d.replace(b'{"format"', b'["format"')), "not valid JSON"),
            (lambda d: with_crc(d.replace(b'"sides":{}', b'"sides":{"0":[]}')), "side entry"),
        ],
    )
    def test_damaged_snapshot_is_set_aside_with_a_clear_line(
        self,
        tmp_path: Path,
        caplog: pytest.LogCaptureFixture,
        damage: Callable[[bytes], bytes],
        why: str,
    ) -> None:
        """Torn, damaged or incompatible: renamed to snapshot.bin.corrupt-<time>, None, one
        log line saying why; no crash."""
        content = damage(saved_bytes(tmp_path))
        (tmp_path / SNAPSHOT_NAME).write_bytes(content)
        store = StateStore(tmp_path)
        with caplog.at_level(logging.ERROR):
            assert store.load_snapshot() is None
        assert not (tmp_path / SNAPSHOT_NAME).exists()
        [aside] = corrupt_files(tmp_path)
        assert aside.startswith(SNAPSHOT_NAME + ".corrupt-")
        assert (tmp_path / aside).read_bytes() == content
        [record] = caplog.records
        assert why in record.getMessage() and "starting from empty models" in record.getMessage()


class TestLegacySnapshot:
    """Version 1 (JSON, `snapshot.json`) is still read, so an upgrade keeps the models."""

    def test_is_read_when_there_is_no_binary_snapshot(self, tmp_path: Path) -> None:
        document = {
            "format": "zeroline-snapshot",
            "version": 1,
            "journal_seq": 4,
            "latest_inputs": {},
            "channels": {"a": {"template": "t", "wildcards": [], "state": {"x": [1.5]}}},
        }
        (tmp_path / LEGACY_SNAPSHOT_NAME).write_text(json.dumps(document))
        snapshot = StateStore(tmp_path).load_snapshot()
        assert snapshot is not None and not snapshot.groups
        assert snapshot.legacy_channels == document["channels"]
        assert snapshot.meta["journal_seq"] == 4

    def test_the_first_binary_snapshot_replaces_it(self, tmp_path: Path) -> None:
        """Once a binary snapshot is durable the JSON one is removed (a later damaged
        binary snapshot must not bring back an older model)."""
        (tmp_path / LEGACY_SNAPSHOT_NAME).write_text('{"format": "zeroline-snapshot"}')
        store = StateStore(tmp_path)
        store.save_snapshot([group([[1.0, 2.0]])], {"journal_seq": 1})
        assert not (tmp_path / LEGACY_SNAPSHOT_NAME).exists()
        snapshot = store.load_snapshot()
        assert snapshot is not None and snapshot.groups

    @pytest.mark.parametrize(
        ("content", "why"),
        [
            (b'{"format": "zeroline-snapshot", "version": 1, "chan', "not valid JSON"),
            (b"\x00" * 64, "not valid JSON"),
            (b'{"some": "other file"}', "not a zeroline snapshot"),
            (b'{"format": "zeroline-snapshot", "version": 99, "channels": {}}', "version 99"),
            (b'{"format": "zeroline-snapshot", "version": 1, "channels": []}', "channel table"),
        ],
    )
    def test_damaged_legacy_snapshot_is_set_aside_with_a_clear_line(
        self, tmp_path: Path, caplog: pytest.LogCaptureFixture, content: bytes, why: str
    ) -> None:
        """Corrupt or incompatible: renamed to snapshot.json.corrupt-<time>, None, no crash."""
        (tmp_path / LEGACY_SNAPSHOT_NAME).write_bytes(content)
        store = StateStore(tmp_path)
        with caplog.at_level(logging.ERROR):
            assert store.load_snapshot() is None
        assert not (tmp_path / LEGACY_SNAPSHOT_NAME).exists()
        [aside] = corrupt_files(tmp_path)
        assert aside.startswith(LEGACY_SNAPSHOT_NAME + ".corrupt-")
        assert (tmp_path / aside).read_bytes() == content
        [record] = caplog.records
        assert why in record.getMessage() and "starting from empty models" in record.getMessage()


class TestStateDirectory:
    def test_unwritable_directory_is_a_user_error(self, tmp_path: Path) -> None:
        """A state dir that cannot be created is refused with a clear message."""
        blocker = tmp_path / "file"
        blocker.write_text("")
        with pytest.raises(InputError, match="cannot create"):
            StateStore(blocker / "state")


class TestJournal:
    def test_records_after_the_snapshot_sequence(self, tmp_path: Path) -> None:
        """read_journal(after=n) yields records with s > n, in order."""
        store = StateStore(tmp_path)
        store.append_journal([{"s": i, "t": "r"} for i in range(1, 6)])
        assert [r["s"] for r in store.read_journal(after=3)] == [4, 5]
        store.reset_journal()
        assert list(store.read_journal(after=0)) == []
        store.append_journal([{"s": 6}])
        assert [r["s"] for r in store.read_journal(after=0)] == [6]

    def test_torn_last_line_is_ignored(
        self, tmp_path: Path, caplog: pytest.LogCaptureFixture
    ) -> None:
        """A power cut mid-append leaves a partial line: replay ends at the last whole one."""
        store = StateStore(tmp_path)
        store.append_journal([{"s": 1}, {"s": 2}])
        store.close()
        with open(tmp_path / "journal.jsonl", "ab") as handle:
            handle.write(b'{"s": 3, "t": "r", "r": [[1.0')
        with caplog.at_level(logging.WARNING):
            records = list(StateStore(tmp_path).read_journal(after=0))
        assert [r["s"] for r in records] == [1, 2]
        assert "partial line" in caplog.text

    def test_damaged_middle_line_stops_the_replay(
        self, tmp_path: Path, caplog: pytest.LogCaptureFixture
    ) -> None:
        """A damaged line in the middle: the records before it, and a log line."""
        (tmp_path / "journal.jsonl").write_bytes(b'{"s": 1}\nnot json\n{"s": 3}\n')
        with caplog.at_level(logging.ERROR):
            records = list(StateStore(tmp_path).read_journal(after=0))
        assert [r["s"] for r in records] == [1]
        assert "line 2 is damaged" in caplog.text

    def test_append_is_durable_before_returning(self, tmp_path: Path) -> None:
        """The bytes are in the file (another reader sees them) when append returns."""
        store = StateStore(tmp_path)
        store.append_journal([{"s": 1, "x": "y"}])
        assert os.path.getsize(tmp_path / "journal.jsonl") > 0
        assert json.loads((tmp_path / "journal.jsonl").read_text()) == {"s": 1, "x": "y"}

    def test_failed_append_leaves_no_partial_batch(
        self, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
    ) -> None:
        """If the fsync fails (disk error) the batch is cut back out of the file."""
        store = StateStore(tmp_path)
        store.append_journal([{"s": 1}])
        size = os.path.getsize(tmp_path / "journal.jsonl")

        def failing_fsync(fd: int) -> None:
            raise OSError(28, "No space left on device")

        monkeypatch.setattr(os, "fsync", failing_fsync)
        with pytest.raises(OSError):
            store.append_journal([{"s": 2}, {"s": 3}])
        monkeypatch.undo()
        assert os.path.getsize(tmp_path / "journal.jsonl") == size

    def test_a_repeated_sequence_number_is_applied_once(self, tmp_path: Path) -> None:
        """Records are yielded in strictly increasing sequence: repeats are skipped."""
        (tmp_path / "journal.jsonl").write_bytes(b'{"s": 1}\n{"s": 2}\n{"s": 2}\n{"s": 3}\n')
        assert [r["s"] for r in StateStore(tmp_path).read_journal(after=0)] == [1, 2, 3]
