"""Reading recorded logs: numbers, ISO 8601 times, blanks, and one-line errors.

Sources: RFC 4180 (CSV: header row, quoted fields, CRLF or LF line ends), RFC 3339 /
ISO 8601 (times with a zone offset), and design §3/§5 (a blank cell means "no value"). That
an Excel-saved "CSV UTF-8" file starts with a byte-order mark, which must not become part
of the first column's name, is common practice, no source.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

from zeroline.csvdata import parse_time_cell, read_table
from zeroline.errors import InputError


def write(tmp_path: Path, text: str, name: str = "log.csv", newline: str = "\n") -> Path:
    path = tmp_path / name
    path.write_bytes(text.replace("\n", newline).encode("utf-8"))
    return path


def test_columns_by_header_name_with_file_lines(tmp_path: Path) -> None:
    """Numbers in every cell; `lines` are the file's line numbers (blank lines skipped)."""
    table = read_table(write(tmp_path, "y, x\n1.5,2\n\n-3e2,.25\n"))
    assert list(table.columns) == ["y", "x"]  # names are stripped
    np.testing.assert_array_equal(table.columns["y"], [1.5, -300.0])
    np.testing.assert_array_equal(table.columns["x"], [2.0, 0.25])
    assert list(table.lines) == [2, 4]
    assert table.rows == 2


def test_crlf_and_quoted_fields(tmp_path: Path) -> None:
    """RFC 4180: CRLF line ends and quoted fields read the same as plain ones."""
    table = read_table(write(tmp_path, 'y,"x"\n"1",2\n3,"4"\n', newline="\r\n"))
    np.testing.assert_array_equal(table.columns["x"], [2.0, 4.0])


def test_time_column_iso_8601_and_epoch_seconds(tmp_path: Path) -> None:
    """RFC 3339 times with Z or an offset, and epoch seconds, become epoch seconds."""
    text = "time,y\n2026-05-01T00:00:00Z,1\n2026-05-01T02:00:00+02:00,2\n1777593600.5,3\n"
    table = read_table(write(tmp_path, text))
    np.testing.assert_array_equal(table.columns["time"], [1777593600.0, 1777593600.0,
                                                          1777593600.5])  # fmt: skip


def test_parse_time_cell() -> None:
    assert parse_time_cell("2026-05-01T00:00:00z") == 1777593600.0
    for bad in ("2026-05-01T00:00:00", "yesterday", "inf", "nan"):
        with pytest.raises(ValueError):
            parse_time_cell(bad)


def test_blank_cells_are_nan_until_a_complete_column_is_required(tmp_path: Path) -> None:
    table = read_table(write(tmp_path, "y,temperature\n1,20\n2,\n3,22\n"))
    assert math.isnan(table.columns["temperature"][1])
    with pytest.raises(InputError) as caught:
        table.require_complete("temperature", purpose="basis input 'temperature'")
    assert str(caught.value).endswith(
        "log.csv:3: column 'temperature' is blank; basis input 'temperature' needs a number "
        "in every row (remove the row or fill the cell)"
    )


def test_unknown_column_lists_the_columns(tmp_path: Path) -> None:
    table = read_table(write(tmp_path, "y,x\n1,2\n"))
    with pytest.raises(InputError, match=r"no column 'z' \(for --y\); columns: y, x"):
        table.column("z", purpose="--y")


def test_utf8_byte_order_mark_is_not_part_of_the_first_name(tmp_path: Path) -> None:
    """A spreadsheet's "CSV UTF-8" export starts with U+FEFF; `y` must still be `y`."""
    table = read_table(write(tmp_path, "\ufeffy,x\n1,2\n"))
    assert list(table.columns) == ["y", "x"]


@pytest.mark.parametrize(
    ("text", "says"),
    [
        ("", "the file is empty"),
        ("y,x\n", "no data rows"),
        ("y,x\n\n\n", "no data rows"),
        ("y,\n1,2\n", ":1: column 2 has no name"),
        ("y,y\n1,2\n", ":1: column 'y' appears twice"),
        ("y,x\n1,2\n3\n", ":3: 1 cells, but the header has 2 columns"),
        ("y,x\n1,abc\n", ":2: column 'x': 'abc' is not a finite number"),
        ("y,x\n1,nan\n", ":2: column 'x': 'nan' is not a finite number"),
        ("y,x\n1,NaN\n", "'NaN' is not a finite number"),
        ("y,x\ninf,1\n", ":2: column 'y': 'inf' is not a finite number"),
        ("y,x\n1,-Infinity\n", "'-Infinity' is not a finite number"),
        ("y,x\n1,1e999\n", "'1e999' is not a finite number"),
        ("y,x\n1,0x10\n", "'0x10' is not a finite number"),
        ("y,x\n1," + "9" * 60 + "z\n", "'" + "9" * 37 + "...'"),
        ("time,y\n2026-05-01 10:00,1\n", "column 'time': '2026-05-01 10:00' is not epoch seconds"),
        ("time,y\nyesterday,1\n", "ISO 8601 time with a zone"),
        ('y,x\n"1,2\n', ":2: 1 cells"),  # an unclosed quote swallows the row
    ],
)
def test_malformed_files_are_one_line_errors(tmp_path: Path, text: str, says: str) -> None:
    """Each problem: one InputError line with file (and line) naming what is wrong."""
    path = write(tmp_path, text)
    with pytest.raises(InputError) as caught:
        read_table(path)
    message = str(caught.value)
    assert message.startswith(str(path))
    assert says in message
    assert "\n" not in message


def test_not_utf8_and_missing_file(tmp_path: Path) -> None:
    (tmp_path / "latin1.csv").write_bytes("y,temp\u00e9rature\n1,2\n".encode("latin-1"))
    with pytest.raises(InputError, match="not UTF-8 text"):
        read_table(tmp_path / "latin1.csv")
    with pytest.raises(InputError, match="cannot open"):
        read_table(tmp_path / "nope.csv")
    with pytest.raises(InputError, match="cannot open"):
        read_table(tmp_path)  # a directory
