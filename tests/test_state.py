"""Atomic snapshots, the journal, and setting aside damaged state."""

from __future__ import annotations

import json
import logging
import os
from pathlib import Path

import pytest

from zeroline.errors import InputError
from zeroline.state import SNAPSHOT_NAME, StateStore


def corrupt_files(directory: Path) -> list[str]:
    return sorted(p.name for p in directory.iterdir() if ".corrupt-" in p.name)


class TestSnapshot:
    def test_round_trip_and_no_temporary_left(self, tmp_path: Path) -> None:
        """A saved snapshot loads back; the temporary file is renamed away."""
        store = StateStore(tmp_path)
        store.save_snapshot({"a": json.dumps({"x": [1.5, -1e300]})}, {"journal_seq": 7})
        document = store.load_snapshot()
        assert document is not None
        assert document["channels"] == {"a": {"x": [1.5, -1e300]}}
        assert document["journal_seq"] == 7
        assert not (tmp_path / (SNAPSHOT_NAME + ".tmp")).exists()

    def test_a_crash_before_rename_keeps_the_old_snapshot(self, tmp_path: Path) -> None:
        """A torn temporary file (power cut mid-write) is never read: the old one counts."""
        store = StateStore(tmp_path)
        store.save_snapshot({"a": "1"}, {"journal_seq": 1})
        (tmp_path / (SNAPSHOT_NAME + ".tmp")).write_bytes(b'{"format": "zerol')
        document = store.load_snapshot()
        assert document is not None and document["channels"] == {"a": 1}

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
    def test_damaged_snapshot_is_set_aside_with_a_clear_line(
        self, tmp_path: Path, caplog: pytest.LogCaptureFixture, content: bytes, why: str
    ) -> None:
        """Corrupt or incompatible: renamed to snapshot.json.corrupt-<time>, None, no crash."""
        (tmp_path / SNAPSHOT_NAME).write_bytes(content)
        store = StateStore(tmp_path)
        with caplog.at_level(logging.ERROR):
            assert store.load_snapshot() is None
        assert not (tmp_path / SNAPSHOT_NAME).exists()
        [aside] = corrupt_files(tmp_path)
        assert (tmp_path / aside).read_bytes() == content
        [record] = caplog.records
        assert why in record.getMessage() and "starting from empty models" in record.getMessage()

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
