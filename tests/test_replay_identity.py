"""`zeroline replay` writes what the row-by-row replay it replaced wrote.

Two references: `tests/refdata/replay/expected.json` (row counts, a sample of the rows, column
sums, alert events and stderr of every case; see the README there), first checked against
the replay of commit 93325f2 before it was sped up, compared within `REL_TOL` (the last bit
of a float differs between CPUs, whose numpy and OpenBLAS kernels differ); and a slow replay
written out plainly below (the cell-by-cell CSV reader, one `Channel.process` a row,
`csv.writer` with `repr` of every number), which the fast one must equal byte for byte on
the same machine, and keeps holding if the model's numbers change.
Cases: the example logs in `config/examples/` and an invented awkward log (gaps, blank
value and input cells, repeated and older times, ISO 8601 times, quoted cells, blank lines,
control events, alerts).
"""

from __future__ import annotations

import contextlib
import csv
import importlib.util
import io
import json
import math
import re
from pathlib import Path
from types import ModuleType
from unittest import mock

import numpy as np
import pytest

from zeroline import cli, csvdata
from zeroline import replay as replay_module
from zeroline.channel import Channel, Sample
from zeroline.commands import replay as replay_command
from zeroline.config import load_config
from zeroline.csvdata import read_table_cell_by_cell
from zeroline.replay import read_events, resolve_channel

FIXTURES = Path(__file__).resolve().parent / "refdata" / "replay"
ROOT = FIXTURES.parent.parent.parent


def _fixture_module() -> ModuleType:
    spec = importlib.util.spec_from_file_location("make_expected", FIXTURES / "make_expected.py")
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


MAKE_EXPECTED = _fixture_module()
CASES: dict[str, tuple[str, str, str, list[str]]] = MAKE_EXPECTED.CASES
EXPECTED = json.loads((FIXTURES / "expected.json").read_text())


def _replay(case: str, directory: Path) -> tuple[bytes, bytes, str]:
    """(output CSV, alerts file, stderr) of `zeroline replay` on one case."""
    log, config, channel, extra = CASES[case]
    extra = [str(ROOT / e) if e.startswith("tests/") else e for e in extra]
    out, alerts = directory / "out.csv", directory / "alerts.jsonl"
    arguments = ["replay", str(ROOT / log), "-c", str(ROOT / config), "--channel", channel]
    stderr = io.StringIO()
    with contextlib.redirect_stderr(stderr):
        code = cli.main([*arguments, "-o", str(out), "--alerts", str(alerts), *extra])
    assert code == 0, stderr.getvalue()
    return out.read_bytes(), alerts.read_bytes(), stderr.getvalue()


def _reference_replay(case: str) -> tuple[bytes, bytes, str]:
    """The same case replayed the slow, plain way (what the command did before)."""
    log, config_path, name, extra = CASES[case]
    coefficients = "--coefficients" in extra
    events = (
        read_events(str(ROOT / extra[extra.index("--events") + 1])) if "--events" in extra else []
    )
    channel_config, name = resolve_channel(load_config(ROOT / config_path), name)
    channel = Channel(channel_config, name)
    table = read_table_cell_by_cell(ROOT / log)
    out, alerts = io.StringIO(), io.StringIO()
    writer = csv.writer(out)
    header = ["time", "raw", "baseline", "corrected", "uncertainty", "quality"]
    writer.writerow(header + ([f"c{j}" for j in range(channel.n_terms)] if coefficients else []))
    cell = lambda v: "" if v is None else repr(float(v))  # noqa: E731
    last, not_newer, blank = -math.inf, 0, 0
    for row in range(table.rows):
        time = float(table.columns["time"][row])
        while events and events[0].time <= time:
            for event in channel.control(events.pop(0)):
                alerts.write(json.dumps(event.to_json()) + "\n")
        fields = {}
        for input_name, spec in channel_config.inputs.items():
            value = float(table.columns[input_name][row])
            if math.isnan(value):
                continue
            if spec.field is not None:
                fields[spec.field] = value
            else:
                channel.set_input(input_name, time, value)
        raw = float(table.columns["value"][row])
        if math.isnan(raw):
            blank += 1
            continue
        if time <= last:
            not_newer += 1
            continue
        last = time
        result, alert_events = channel.process(Sample(time, raw, fields))
        for event in alert_events:
            alerts.write(json.dumps(event.to_json()) + "\n")
        line = [repr(result.time), repr(result.raw), cell(result.baseline)]
        line += [cell(result.corrected), cell(result.uncertainty), result.quality]
        if coefficients:
            line += (
                [repr(float(c)) for c in result.coefficients]
                if result.coefficients is not None
                else [""] * channel.n_terms
            )
        writer.writerow(line)
    stderr = (
        f"zeroline: replay skipped {not_newer} rows not newer than the one before and "
        f"{blank} rows with a blank value\n"
        if not_newer + blank
        else ""
    )
    return out.getvalue().encode(), alerts.getvalue().encode(), stderr


REL_TOL = 1e-9  # the estimator's own equivalence tolerance (issue of the recursive estimator)
_NUMBER = re.compile(r"-?\d+(?:\.\d+)?(?:e[-+]?\d+)?")


def _close(got: float, want: float, scale: float) -> bool:
    if math.isnan(want):
        return math.isnan(got)
    return abs(got - want) <= REL_TOL * max(abs(want), scale)


def _assert_rows_match(summary: dict[str, object], output: str, where: str) -> None:
    """Text cells exactly, number cells within REL_TOL of the larger of the value and its
    column's largest sampled magnitude (a corrected value near 0 is judged at its column's
    scale)."""
    header, *rows = list(csv.reader(io.StringIO(output)))
    assert header == summary["header"], where
    assert len(rows) == summary["rows"], where
    sample: list[list[object]] = summary["sample"]
    scales = [0.0] * len(header)
    for _, cells in sample:
        for j, cell in enumerate(cells):
            value = MAKE_EXPECTED.numeric(cell)
            if value is not None and math.isfinite(value):
                scales[j] = max(scales[j], abs(value))
    for index, cells in sample:
        got = rows[index]
        assert len(got) == len(cells), f"{where} row {index}"
        for j, (cell, want) in enumerate(zip(got, cells, strict=True)):
            number, wanted = MAKE_EXPECTED.numeric(cell), MAKE_EXPECTED.numeric(want)
            if wanted is None:
                assert cell == want, f"{where} row {index} column {header[j]}"
            else:
                assert number is not None, f"{where} row {index} column {header[j]}: {cell!r}"
                assert _close(number, wanted, scales[j]), (
                    f"{where} row {index} column {header[j]}: {number!r} != {wanted!r}"
                )
    got_sums = MAKE_EXPECTED.summary(output, "", "")["sums"]
    for j, (got_sum, want_sum) in enumerate(zip(got_sums, summary["sums"], strict=True)):
        assert _close(got_sum, want_sum, scales[j] * len(rows)), f"{where} sum of {header[j]}"


def _assert_alerts_match(want: list[dict[str, object]], alerts: str, where: str) -> None:
    """Alert events: every field exactly but numbers, which are within REL_TOL; the numbers
    printed inside a message within one unit of their last printed digit."""
    got = [json.loads(line) for line in alerts.splitlines()]
    assert len(got) == len(want), where
    for k, (event, expected) in enumerate(zip(got, want, strict=True)):
        assert event.keys() == expected.keys(), f"{where} alert {k}"
        for key, value in expected.items():
            if key == "message":
                _assert_message_matches(event[key], str(value), f"{where} alert {k}")
            elif isinstance(value, float):
                assert _close(event[key], value, 0.0), f"{where} alert {k} {key}"
            else:
                assert event[key] == value, f"{where} alert {k} {key}"


def _assert_message_matches(got: str, want: str, where: str) -> None:
    assert _NUMBER.sub("#", got) == _NUMBER.sub("#", want), where
    for g, w in zip(_NUMBER.findall(got), _NUMBER.findall(want), strict=True):
        digits = len(w.split("e")[0].partition(".")[2])
        unit = 10.0 ** (-digits) * (10.0 ** int(w.split("e")[1]) if "e" in w else 1.0)
        assert abs(float(g) - float(w)) <= 1.01 * unit, f"{where}: {g} != {w} in {got!r}"


@pytest.mark.parametrize("case", sorted(CASES))
def test_replay_writes_what_it_wrote_before_the_speed_up(case: str, tmp_path: Path) -> None:
    """Rows, column sums, alerts and stderr match `expected.json` on any machine."""
    output, alerts, stderr = _replay(case, tmp_path)
    _assert_rows_match(EXPECTED[case], output.decode(), case)
    _assert_alerts_match(EXPECTED[case]["alerts"], alerts.decode(), case)
    assert stderr == EXPECTED[case]["stderr"]


def test_the_comparison_notices_a_changed_number(tmp_path: Path) -> None:
    """It can fail: a corrected value off by 1e-7 relative, or a message's number off by
    two in its last digit, is caught; the unchanged output passes."""
    output, alerts, _ = _replay("awkward", tmp_path)
    summary = EXPECTED["awkward"]
    _assert_rows_match(summary, output.decode(), "unchanged")
    header, *rows = list(csv.reader(io.StringIO(output.decode())))
    index = summary["sample"][-1][0]
    column = header.index("corrected")
    rows[index][column] = repr(float(rows[index][column]) * (1 + 1e-7))
    text = io.StringIO()
    csv.writer(text).writerows([header, *rows])
    with pytest.raises(AssertionError, match="column corrected"):
        _assert_rows_match(summary, text.getvalue(), "moved")
    events = summary["alerts"]
    message = next(str(e["message"]) for e in events if _NUMBER.search(str(e["message"])))
    number = _NUMBER.search(message)
    assert number is not None
    digits = len(number.group().partition(".")[2])
    bumped = float(number.group()) + 2 * 10.0 ** (-digits)
    changed = message.replace(number.group(), f"{bumped:.{digits}f}", 1)
    with pytest.raises(AssertionError):
        _assert_message_matches(changed, message, "bumped")
    _assert_alerts_match(events, alerts.decode(), "unchanged")


@pytest.mark.parametrize("case", ["awkward", "awkward_fields", "local_gateway_fields"])
def test_replay_equals_the_slow_reference_replay(case: str, tmp_path: Path) -> None:
    """Byte for byte the plain row-by-row replay above, with the same Channel code."""
    output, alerts, stderr = _replay(case, tmp_path)
    expected_output, expected_alerts, expected_stderr = _reference_replay(case)
    assert output.decode().splitlines() == expected_output.decode().splitlines()  # readable diff
    assert output == expected_output
    assert alerts == expected_alerts
    assert stderr == expected_stderr


def test_the_awkward_log_has_what_it_is_meant_to_test() -> None:
    """The awkward fixture really holds gaps, blanks, repeats, ISO times and alerts."""
    text = (FIXTURES / "awkward_log.csv").read_text()
    assert "Z," in text and "+02:00," in text and '"' in text and "\n\n" in text
    table = read_table_cell_by_cell(FIXTURES / "awkward_log.csv")
    assert np.isnan(table.columns["temperature"]).any()  # blank input cells
    assert np.diff(table.columns["time"]).max() > 86400  # gaps of a day and more
    output, alerts, stderr = _reference_replay("awkward")
    assert "skipped 10 rows not newer" in stderr and "16 rows with a blank value" in stderr
    rows = output.decode().splitlines()
    assert any(",,,," in r for r in rows)  # uncorrectable rows: no baseline yet
    assert {"input_stale", "extrapolating", "learning", "ok"} <= {r.split(",")[5] for r in rows[1:]}
    states = {(e["rule"], e["state"]) for e in map(json.loads, alerts.decode().splitlines())}
    assert ("drift_limit", "raised") in states and ("drift_limit", "cleared") in states


@pytest.mark.parametrize("case", ["awkward", "local_gateway_fields"])
def test_chunk_and_block_sizes_do_not_change_a_byte(case: str, tmp_path: Path) -> None:
    """Rows taken 7 at a time, the CSV read 5 at a time and written 3 at a time: the same
    bytes as the usual sizes on this machine (events, skipped rows and blank cells fall on
    the chunks' edges)."""
    usual = _replay(case, tmp_path)
    with (
        mock.patch.object(replay_module, "CHUNK_ROWS", 7),
        mock.patch.object(csvdata, "BLOCK_ROWS", 5),
        mock.patch.object(replay_command._RowWriter, "BLOCK", 3),
    ):
        small = _replay(case, tmp_path)
    assert small == usual
