"""`zeroline replay DATA.csv -c CONFIG --channel NAME -o OUT.csv [--coefficients]`.

Runs one channel's streaming pipeline over a recorded log (see `zeroline.replay`) and
writes `time, raw, baseline, corrected, uncertainty, quality` (+ `c0…` with
`--coefficients`) per processed row; alert events go to stderr, or to `--alerts FILE`, one
JSON object a line. `--plot FILE.png` also draws the run (`zeroline.plot`, optional
matplotlib). On a terminal a progress line shows rows/s and the time left.
"""

from __future__ import annotations

import argparse
import csv
import io
import json
import sys
import time
from typing import IO, Any

from zeroline.channel import Channel, Corrected
from zeroline.config import load_config
from zeroline.csvdata import read_table
from zeroline.errors import InputError
from zeroline.plot import Trace, check_plot_path, draw_trace, require_matplotlib
from zeroline.replay import ReplayCounts, Step, read_events, replay_rows, resolve_channel

PROGRESS_EVERY = 0.5  # seconds between progress-line updates


def add_parser(commands: Any) -> None:
    parser = commands.add_parser("replay", help="run one channel's pipeline over a recorded log")
    parser.add_argument("data", metavar="DATA.csv", help="log with time, value and input columns")
    parser.add_argument("-c", "--config", required=True, metavar="CONFIG", help="config file")
    parser.add_argument("--channel", required=True, metavar="NAME", help="channel to replay")
    parser.add_argument("-o", "--output", required=True, metavar="OUT.csv", help="output CSV")
    parser.add_argument("--coefficients", action="store_true", help="add columns c0…c{p-1}")
    parser.add_argument(
        "--alerts", metavar="FILE", help="alert events as JSON lines (default: stderr)"
    )
    parser.add_argument("--events", metavar="FILE", help="control events CSV: time,event[,mode]")
    parser.add_argument(
        "--plot", metavar="FILE.png", help="also draw the replay (needs matplotlib)"
    )
    parser.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    if args.plot:
        require_matplotlib()  # before the replay, not after minutes of work
        check_plot_path(args.plot)
    config = load_config(args.config)
    channel_config, name = resolve_channel(config, args.channel)
    table = read_table(args.data)
    events = read_events(args.events) if args.events else []
    channel = Channel(channel_config, name)
    counts = ReplayCounts()
    header = ["time", "raw", "baseline", "corrected", "uncertainty", "quality"]
    if args.coefficients:
        header += [f"c{j}" for j in range(channel.n_terms)]
    try:
        output = open(args.output, "w", newline="", encoding="utf-8")  # noqa: SIM115
    except OSError as error:
        raise InputError(f"{args.output}: cannot write ({error.strerror})") from None
    alerts_out: IO[str] = sys.stderr
    if args.alerts:
        try:
            alerts_out = open(args.alerts, "w", encoding="utf-8")  # noqa: SIM115
        except OSError as error:
            raise InputError(f"{args.alerts}: cannot write ({error.strerror})") from None
    progress = _Progress(table.rows) if sys.stderr.isatty() else None
    trace = Trace(learn_mode=channel_config.learn.mode) if args.plot else None
    rows = _RowWriter(output, channel.n_terms if args.coefficients else None)
    with output:
        csv.writer(output).writerow(header)
        try:
            for row, result, alert_events in replay_rows(table, channel, events, counts):
                for event in alert_events:
                    alerts_out.write(json.dumps(event.to_json()) + "\n")
                if trace is not None:
                    trace.add(Step(row, result, alert_events))
                if result is None:
                    continue
                rows.add(result)
                if progress is not None:
                    progress.update(row + 1)  # rows read so far, this one included
        finally:
            rows.flush()
    if progress is not None:
        progress.finish(counts.rows)
    if alerts_out is not sys.stderr:
        alerts_out.close()
    if trace is not None:
        draw_trace(args.plot, name, trace)
    _summary(counts)
    return 0


class _RowWriter:
    """Output rows as CSV text, written a block at a time.

    Each number is `repr` of a Python float, the shortest text that reads back to the same
    bits, so a replay and the daemon agree to the last bit. Such text never needs CSV
    quoting, and a missing value is an empty cell; the quality word goes through the csv
    module once per distinct word, so the file is what `csv.writer` writes (CRLF line ends).
    """

    BLOCK = 4096  # rows per write

    def __init__(self, output: IO[str], n_coefficients: int | None) -> None:
        self._output = output
        self._n_coefficients = n_coefficients
        self._no_coefficients = "," * n_coefficients if n_coefficients else ""
        self._lines: list[str] = []
        self._quality_cells: dict[str, str] = {}

    def add(self, result: Corrected) -> None:
        quality = self._quality_cells.get(result.quality)
        if quality is None:
            quality = self._quality_cells[result.quality] = _csv_cell(result.quality)
        baseline, corrected, uncertainty = result.baseline, result.corrected, result.uncertainty
        line = (
            f"{result.time!r},{result.raw!r},"
            f"{'' if baseline is None else repr(float(baseline))},"
            f"{'' if corrected is None else repr(float(corrected))},"
            f"{'' if uncertainty is None else repr(float(uncertainty))},"
            f"{quality}"
        )
        if self._n_coefficients is not None:
            coefficients = result.coefficients
            if coefficients is None:
                line += self._no_coefficients
            else:
                line += "," + ",".join(map(repr, coefficients.tolist()))
        self._lines.append(line)
        if len(self._lines) >= self.BLOCK:
            self.flush()

    def flush(self) -> None:
        if self._lines:
            self._lines.append("")  # for the CRLF after the last line
            self._output.write("\r\n".join(self._lines))
            self._lines.clear()


def _csv_cell(text: str) -> str:
    """`text` as the csv module writes it within a row (quoted only if it must be)."""
    buffer = io.StringIO()
    csv.writer(buffer).writerow([text, ""])
    return buffer.getvalue()[: -len(",\r\n")]


def _summary(counts: ReplayCounts) -> None:
    skipped = counts.skipped_not_newer + counts.skipped_blank_value
    if skipped:
        print(
            f"zeroline: replay skipped {counts.skipped_not_newer} rows not newer than the one "
            f"before and {counts.skipped_blank_value} rows with a blank value",
            file=sys.stderr,
        )


class _Progress:
    """A single self-overwriting line on stderr: rows done, rows/s, time left."""

    def __init__(self, total: int) -> None:
        self.total = total
        self.start = time.monotonic()
        self.last = 0.0

    def update(self, done: int) -> None:
        now = time.monotonic()
        if now - self.last < PROGRESS_EVERY:
            return
        self.last = now
        rate = done / max(now - self.start, 1e-9)
        left = (self.total - done) / rate if rate > 0 else float("inf")
        sys.stderr.write(f"\r{done}/{self.total} rows  {rate:,.0f} rows/s  {left:,.0f} s left ")
        sys.stderr.flush()

    def finish(self, done: int) -> None:
        elapsed = time.monotonic() - self.start
        sys.stderr.write(f"\r{done}/{self.total} rows in {elapsed:.1f} s{' ' * 20}\n")
