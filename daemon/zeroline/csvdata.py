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
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path

import numpy as np
import numpy.typing as npt

from zeroline.errors import InputError

Array = npt.NDArray[np.float64]
TIME_COLUMN = "time"


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
    """Read a CSV log; InputError (one line, with file:line) for anything malformed."""
    name = str(path)
    try:
        handle = open(path, newline="", encoding="utf-8-sig")  # noqa: SIM115 - closed below
    except OSError as error:
        raise InputError(f"{name}: cannot open ({error.strerror}); check the path") from None
    with handle:
        try:
            reader = csv.reader(handle)
            header = next(reader, None)
            if header is None:
                raise InputError(f"{name}: the file is empty; expected a header row of names")
            names = [h.strip() for h in header]
            _check_header(name, names)
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
