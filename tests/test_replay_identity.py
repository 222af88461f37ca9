"""`zeroline replay` writes the same bytes as the row-by-row replay it replaced.

Two references: the SHA-256 digests in `tests/refdata/replay/expected.json`, made by the
replay of commit 93325f2 before it was sped up (see the README there), and a slow replay
written out plainly below (the cell-by-cell CSV reader, one `Channel.process` a row,
`csv.writer` with `repr` of every number), which keeps holding if the model's numbers change.
Cases: the example logs in `config/examples/` and an invented awkward log (gaps, blank
value and input cells, repeated and older times, ISO 8601 times, quoted cells, blank lines,
control events, alerts).
"""

from __future__ import annotations

import contextlib
import csv
import hashlib
import importlib.util
import io
import json
import math
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


@pytest.mark.parametrize("case", sorted(CASES))
def test_replay_writes_the_bytes_it_wrote_before_the_speed_up(case: str, tmp_path: Path) -> None:
    """Output, alerts and stderr hash to the digests made by the replay of commit 93325f2."""
    output, alerts, stderr = _replay(case, tmp_path)
    assert hashlib.sha256(output).hexdigest() == EXPECTED[case]["output"]
    assert hashlib.sha256(alerts).hexdigest() == EXPECTED[case]["alerts"]
    assert stderr == EXPECTED[case]["stderr"]


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
    bytes (events, skipped rows and blank cells fall on the chunks' edges)."""
    with (
        mock.patch.object(replay_module, "CHUNK_ROWS", 7),
        mock.patch.object(csvdata, "BLOCK_ROWS", 5),
        mock.patch.object(replay_command._RowWriter, "BLOCK", 3),
    ):
        output, alerts, stderr = _replay(case, tmp_path)
    assert hashlib.sha256(output).hexdigest() == EXPECTED[case]["output"]
    assert hashlib.sha256(alerts).hexdigest() == EXPECTED[case]["alerts"]
    assert stderr == EXPECTED[case]["stderr"]
