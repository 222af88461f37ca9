"""Reading recorded logs (CSV) into named numeric columns, with one-line errors.

A log has a header row; every other row is one sample. Cells are numbers; a `time` column
may instead hold ISO 8601 / RFC 3339 times (with a zone) or epoch seconds. A blank cell means
"no value at this time" and is kept as NaN so that callers can decide (a fit refuses it in a
column it uses; a replay treats it as a missing input). Text, `nan` and `inf` are refused with
the file, line and column, because a silently dropped or mis-parsed cell is a wrong baseline.
"""

from __future__ import annotations

import csv
import math
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from datetime import datetime
from itertools import islice
from operator import itemgetter
from pathlib import Path
from typing import Any, TextIO

import numpy as np
import numpy.typing as npt

from zeroline.errors import InputError

Array = npt.NDArray[np.float64]
TIME_COLUMN = "time"
BLOCK_ROWS = 65536  # rows converted at once: big enough for numpy, small next to the file


@dataclass(frozen=True)
class Table:
    """Columns of a CSV file by header name; `lines[i]` is the file line of row i."""

    path: str
    columns: dict[str, Array]
    lines: npt.NDArray[np.int64]

    @property
    def rows(self) -> int:
        return int(self.lines.shape[0])

    def column(self, name: str, *, purpose: str) -> Array:
        """A column by name, or InputError listing the columns there are."""
        if name not in self.columns:
            listed = ", ".join(self.columns)
            raise InputError(f"{self.path}: no column {name!r} (for {purpose}); columns: {listed}")
        return self.columns[name]

    def require_complete(self, name: str, *, purpose: str) -> Array:
        """A column with no blank cells, or InputError naming the first blank one."""
        values = self.column(name, purpose=purpose)
        blank = np.isnan(values)
        if blank.any():
            line = int(self.lines[int(np.argmax(blank))])
            raise InputError(
                f"{self.path}:{line}: column {name!r} is blank; {purpose} needs a number in "
                "every row (remove the row or fill the cell)"
            )
        return values


def parse_time_cell(text: str) -> float:
    """Epoch seconds from a cell: a number, or an ISO 8601 time with a zone. ValueError if not."""
    try:
        value = float(text)
    except ValueError:
        parsed = datetime.fromisoformat(text.replace("Z", "+00:00").replace("z", "+00:00"))
        if parsed.tzinfo is None:
            raise ValueError("no time zone") from None
        return parsed.timestamp()
    if not math.isfinite(value):
        raise ValueError("not finite")
    return value


def _parse_number(text: str) -> float:
    value = float(text)
    if not math.isfinite(value):
        raise ValueError("not finite")
    return value


def read_table(path: str | Path) -> Table:
    """Read a CSV log; InputError (one line, with file:line) for anything malformed.

    Whole columns are converted at once (numpy, which parses each cell with Python's own
    `float`, so the numbers are the same to the last bit). Whatever that fast path cannot
    decide without doubt (a row of the wrong length, a cell that is not a finite number, an
    ISO 8601 time that does not parse, a decoding or CSV error) sends the file to the
    cell-by-cell reader, which reads it again from the start and so reports the first
    problem exactly as it always has.
    """
    name = str(path)
    handle = _open(path)
    with handle:
        try:
            reader = csv.reader(handle)
            names = _read_header(name, reader)
            table = _read_rows_fast(name, names, reader)
        except (UnicodeDecodeError, csv.Error):
            table = None  # the cell-by-cell reader words these errors
    return table if table is not None else read_table_cell_by_cell(path)


def read_table_cell_by_cell(path: str | Path) -> Table:
    """`read_table` one cell at a time: slower, and the reference for its every error."""
    name = str(path)
    handle = _open(path)
    with handle:
        try:
            reader = csv.reader(handle)
            names = _read_header(name, reader)
            cells: list[list[float]] = []
            lines: list[int] = []
            for row in reader:
                if not any(cell.strip() for cell in row):
                    continue  # blank line
                line = reader.line_num
                if len(row) != len(names):
                    raise InputError(
                        f"{name}:{line}: {len(row)} cells, but the header has {len(names)} columns"
                    )
                cells.append(
                    [_cell(name, line, col, cell) for col, cell in zip(names, row, strict=True)]
                )
                lines.append(line)
        except UnicodeDecodeError:
            raise InputError(f"{name}: not UTF-8 text; save the log as UTF-8 CSV") from None
        except csv.Error as error:
            raise InputError(f"{name}: malformed CSV ({error})") from None
    if not cells:
        raise InputError(f"{name}: no data rows after the header")
    matrix = np.array(cells, dtype=np.float64)
    columns = {col: matrix[:, j].copy() for j, col in enumerate(names)}
    return Table(name, columns, np.array(lines, dtype=np.int64))


def _open(path: str | Path) -> TextIO:
    try:
        return open(path, newline="", encoding="utf-8-sig")  # the callers close it
    except OSError as error:
        raise InputError(f"{path}: cannot open ({error.strerror}); check the path") from None


def _read_header(path: str, reader: Iterator[list[str]]) -> list[str]:
    try:
        header = next(reader, None)
    except UnicodeDecodeError:
        raise InputError(f"{path}: not UTF-8 text; save the log as UTF-8 CSV") from None
    except csv.Error as error:
        raise InputError(f"{path}: malformed CSV ({error})") from None
    if header is None:
        raise InputError(f"{path}: the file is empty; expected a header row of names")
    names = [h.strip() for h in header]
    _check_header(path, names)
    return names


def _read_rows_fast(path: str, names: list[str], reader: Any) -> Table | None:
    """The rows after the header, converted a block at a time; None if in any doubt.

    The csv reader yields one row per line it reads (a blank line: a row of no cells) unless
    a quoted cell spans lines, so while its line count grows by the rows of a block, row i
    of the block is line `last_line + 1 + i`; a file where it does not goes to the reference.
    """
    width = len(names)
    parsers: list[Callable[[str], float]] = [
        parse_time_cell if col == TIME_COLUMN else _parse_number for col in names
    ]
    blocks: list[list[Array]] = [[] for _ in names]
    line_blocks: list[npt.NDArray[np.int64]] = []
    last_line = reader.line_num  # the header's (last) line
    while block := list(islice(reader, BLOCK_ROWS)):
        if reader.line_num - last_line != len(block):
            return None  # a quoted cell spanned lines: the reference reader numbers them
        lines = np.arange(last_line + 1, reader.line_num + 1, dtype=np.int64)
        last_line = reader.line_num
        line_blocks.append(lines)
        if set(map(len, block)) != {width}:
            if any(len(row) != width and any(c.strip() for c in row) for row in block):
                return None  # a row of the wrong length: let the reference reader word it
            keep = [i for i, row in enumerate(block) if len(row) == width]  # no blank lines
            block, lines = [block[i] for i in keep], lines[keep]
            line_blocks[-1] = lines
        if not _convert_block(block, parsers, blocks):
            return None
    return _assemble(path, names, blocks, line_blocks)


def _assemble(
    path: str,
    names: list[str],
    blocks: list[list[Array]],
    line_blocks: list[npt.NDArray[np.int64]],
) -> Table | None:
    """One Table from the converted blocks, rows of blank cells left out (blank lines)."""
    columns = [np.concatenate(parts) if parts else np.empty(0) for parts in blocks]
    lines = np.concatenate(line_blocks) if line_blocks else np.empty(0, np.int64)
    # No NaN but a blank cell survives the conversion (a cell reading "nan" sends the file
    # to the reference reader), so the all-NaN rows are the rows of blank cells.
    blank_rows = np.logical_and.reduce([np.isnan(c) for c in columns])
    if blank_rows.any():
        keep = ~blank_rows
        columns = [c[keep] for c in columns]
        lines = lines[keep]
    if lines.size == 0:
        return None  # no data rows: the reference reader says so
    table_columns = {col: np.ascontiguousarray(c) for col, c in zip(names, columns, strict=True)}
    return Table(path, table_columns, np.ascontiguousarray(lines))


def _convert_block(
    block: list[list[str]], parsers: list[Callable[[str], float]], blocks: list[list[Array]]
) -> bool:
    """Append each column of `block` to `blocks`; False if a cell is not plainly valid."""
    for j, parse in enumerate(parsers):
        cells = list(map(itemgetter(j), block))
        values = _column_at_once(cells)
        if values is None:
            values = _column_cell_by_cell(cells, parse)
            if values is None:
                return False
        blocks[j].append(values)
    return True


def _column_at_once(cells: list[str]) -> Array | None:
    """All cells as numbers in one numpy call (Python `float` per cell), or None."""
    try:
        values = np.array(cells, dtype=np.float64)
    except ValueError:
        return None  # a blank cell, an ISO time or text: cell by cell
    # "nan" or "inf" in a cell: cell by cell, which refuses it
    return values if bool(np.isfinite(values).all()) else None


def _column_cell_by_cell(cells: list[str], parse: Callable[[str], float]) -> Array | None:
    """Blank cells as NaN, the others by `parse`; None at the first cell it refuses."""
    values = []
    for text in cells:
        text = text.strip()
        if not text:
            values.append(math.nan)
            continue
        try:
            values.append(parse(text))
        except ValueError:
            return None
    return np.array(values, dtype=np.float64)


def _check_header(path: str, names: list[str]) -> None:
    for position, column in enumerate(names, start=1):
        if not column:
            raise InputError(f"{path}:1: column {position} has no name; name every column")
    seen: set[str] = set()
    for column in names:
        if column in seen:
            raise InputError(f"{path}:1: column {column!r} appears twice; names must be unique")
        seen.add(column)


def _cell(path: str, line: int, column: str, text: str) -> float:
    text = text.strip()
    if not text:
        return math.nan
    try:
        return parse_time_cell(text) if column == TIME_COLUMN else _parse_number(text)
    except ValueError:
        shown = text if len(text) <= 40 else text[:37] + "..."
        expected = (
            "epoch seconds or an ISO 8601 time with a zone, e.g. 2026-05-01T12:00:00Z"
            if column == TIME_COLUMN
            else "a finite number (leave the cell blank for no value)"
        )
        raise InputError(f"{path}:{line}: column {column!r}: {shown!r} is not {expected}") from None
