"""Reading recorded logs: numbers, ISO 8601 times, blanks, and one-line errors.

Sources: RFC 4180 (CSV: header row, quoted fields, CRLF or LF line ends), RFC 3339 /
ISO 8601 (times with a zone offset), and design §3/§5 (a blank cell means "no value"). That
an Excel-saved "CSV UTF-8" file starts with a byte-order mark, which must not become part
of the first column's name, is common practice, no source.
"""

from __future__ import annotations

import math
import tempfile
from collections.abc import Callable
from pathlib import Path
from unittest import mock

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from zeroline import csvdata
from zeroline.csvdata import Table, parse_time_cell, read_table, read_table_cell_by_cell
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


# --- the whole-column fast path against the cell-by-cell reader -------------------------

_NUMBERS = st.one_of(
    st.floats(allow_nan=False, allow_infinity=False).map(repr),
    st.integers(-(10**20), 10**20).map(str),
    st.sampled_from(["1_000", " 2.5 ", "+3", "-0", ".5", "5.", "1e-7", "0x10", "\u0661\u0662"]),
)
_BAD = st.sampled_from(["nan", "inf", "-Infinity", "1e999", "abc", "1,5", "--1"])
_TIMES = st.one_of(
    st.integers(0, 4 * 10**9).map(str),
    st.sampled_from(["2026-05-01T00:00:00Z", "2026-05-01T02:00:00+02:00", "2026-05-01 10:00"]),
)


@st.composite
def _logs(draw: st.DrawFn) -> str:
    """A small CSV log, mostly well formed, sometimes not in one of the ways logs are not."""
    width = draw(st.integers(1, 3))
    names = ["time", "y", "x"][:width]
    lines = [",".join(names)]
    for _ in range(draw(st.integers(0, 12))):
        shape = draw(st.sampled_from(["row"] * 8 + ["blank", "blanks", "short", "quoted"]))
        if shape == "blank":
            lines.append(draw(st.sampled_from(["", " "])))
        elif shape == "blanks":
            lines.append("," * (width - 1))
        elif shape == "short":
            lines.append(",".join(["1"] * (width + draw(st.sampled_from([-1, 1])))))
        else:
            cells = [draw(_TIMES)] + [draw(_NUMBERS) for _ in names[1:]]
            for j in range(width):
                if draw(st.integers(0, 9)) == 0:
                    cells[j] = draw(st.one_of(st.just(""), _BAD))
            if shape == "quoted":
                j = draw(st.integers(0, width - 1))
                cells[j] = '"' + cells[j] + draw(st.sampled_from(["", "\n", ","])) + '"'
            lines.append(",".join(cells))
    return draw(st.sampled_from(["\n", "\r\n"])).join(lines) + draw(st.sampled_from(["", "\n"]))


def _outcome(read: Callable[[Path], Table], path: Path) -> tuple[object, ...]:
    try:
        table = read(path)
    except InputError as error:
        return ("error", str(error))
    columns = tuple((name, values.tobytes()) for name, values in table.columns.items())
    return ("table", columns, table.lines.tolist(), table.lines.dtype.str)


@settings(max_examples=300, derandomize=True, deadline=None, database=None)
@given(text=_logs(), block_rows=st.sampled_from([1, 2, 3, 65536]))
def test_whole_columns_read_the_same_as_cell_by_cell(text: str, block_rows: int) -> None:
    """The same columns to the last bit, the same line numbers, or the same error line,
    whatever the block size (blank lines, rows of blank cells, quoted cells spanning lines,
    short rows, bad numbers, ISO times)."""
    with tempfile.TemporaryDirectory() as directory:
        path = Path(directory) / "log.csv"
        path.write_bytes(text.encode("utf-8"))
        with mock.patch.object(csvdata, "BLOCK_ROWS", block_rows):
            fast = _outcome(read_table, path)
        assert fast == _outcome(read_table_cell_by_cell, path)


def test_the_first_problem_is_reported_even_behind_a_later_one(tmp_path: Path) -> None:
    """A bad number on line 3 is named, not the short row on line 5 (file order)."""
    path = write(tmp_path, "y,x\n1,2\n3,abc\n5,6\n7\n")
    with mock.patch.object(csvdata, "BLOCK_ROWS", 2), pytest.raises(InputError) as caught:
        read_table(path)
    assert (
        str(caught.value)
        == f"{path}:3: column 'x': 'abc' is not a finite number (leave the cell blank for no value)"
    )


def test_quoted_cell_over_two_lines_keeps_the_line_numbers(tmp_path: Path) -> None:
    """A row with a quoted cell spanning lines is numbered by its last line (as it always
    was: the csv reader's count after the row); the rows after it keep their own lines."""
    table = read_table(write(tmp_path, 'y,x\n1,"2\n"\n3,4\n'))
    assert table.lines.tolist() == [3, 4]
    np.testing.assert_array_equal(table.columns["y"], [1.0, 3.0])


def test_rows_of_blank_cells_are_blank_lines(tmp_path: Path) -> None:
    """`,` alone (every cell blank) is skipped like an empty line; one blank cell is NaN."""
    table = read_table(write(tmp_path, "y,x\n1,2\n,\n\n3,\n"))
    assert table.lines.tolist() == [2, 5]
    assert math.isnan(table.columns["x"][1])


def test_numbers_are_what_python_float_reads(tmp_path: Path) -> None:
    """Digit separators and non-ASCII digits read as Python's float reads them (as before)."""
    table = read_table(write(tmp_path, "y,x\n1_000,\u0661\u0662\n 0.1 ,1e-7\n"))
    assert table.columns["y"].tolist() == [1000.0, 0.1]
    assert table.columns["x"].tolist() == [12.0, 1e-7]


def test_ordinary_logs_take_the_fast_path(tmp_path: Path) -> None:
    """Blank input cells, blank lines, quoted cells, CRLF and ISO times need no second
    reading of the file (the cell-by-cell reader is only for problems and line-spanning
    quotes), so a change that quietly sent every file there would fail here."""
    text = 'time,y,x\n2026-05-01T00:00:00Z,1,\n\n1777593660,"2",3\n1777593720, 4 ,5\n'
    path = write(tmp_path, text, newline="\r\n")
    with mock.patch.object(csvdata, "read_table_cell_by_cell", side_effect=AssertionError):
        table = read_table(path)
    assert table.lines.tolist() == [2, 4, 5]
    np.testing.assert_array_equal(table.columns["y"], [1.0, 2.0, 4.0])
