"""Regenerate the replay fixtures in this folder: an invented awkward log and the outputs.

PYTHONPATH=daemon .venv/bin/python tests/refdata/replay/make_expected.py [--new-log] [KEEP_DIR]

Runs `zeroline replay` on every case of `CASES` and stores in `expected.json`, per case,
what the output must be on any machine: the row count and header, a sample of the rows
(the first and last `EDGE` and every `EVERY`-th), the sum of every numeric column over all
rows, the alert events and what was printed on stderr. `tests/test_replay_identity.py`
compares numbers within 1e-9 relative and text exactly. Not digests of the bytes: the last
bit of a float differs between CPUs (numpy's and OpenBLAS's kernels are chosen per CPU),
so bytes are compared only between two runs on the same machine (in the test).

`--new-log` also rewrites `awkward_log.csv`, `awkward_events.csv` and `awkward.yaml`
(seeded, our own invention: gaps, blank value and input cells, repeated and older times,
ISO 8601 times, quoted cells, blank lines, control events, alerts); without it the
committed ones are used (their last digits, too, would differ from machine to machine).
The values were first checked against the row-by-row replay of commit 93325f2, before the
replay speed-up. KEEP_DIR keeps the output files.
"""

from __future__ import annotations

import contextlib
import csv
import io
import json
import math
import sys
import tempfile
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent.parent.parent
EXAMPLES = ROOT / "config" / "examples"

# name: (log, config, channel, extra arguments); paths relative to the repository root
CASES: dict[str, tuple[str, str, str, list[str]]] = {
    "load_cell": ("config/examples/load_cell_log.csv", "config/examples/load_cell.yaml",
                  "silo-ref-cell", ["--coefficients"]),
    "no2_station": ("config/examples/no2_station_log.csv", "config/examples/no2_station.yaml",
                    "north-no2", []),
    "no2_station_coefficients": ("config/examples/no2_station_log.csv",
                                 "config/examples/no2_station.yaml", "north-no2",
                                 ["--coefficients"]),
    "local_gateway_fields": ("config/examples/no2_station_log.csv",
                             "config/examples/local_gateway.yaml", "site7-no2", ["--coefficients"]),
    "ph_river": ("config/examples/ph_river_log.csv", "config/examples/ph_river.yaml", "river-ph",
                 ["--coefficients"]),
    "awkward": ("tests/refdata/replay/awkward_log.csv", "tests/refdata/replay/awkward.yaml",
                "gauge", ["--coefficients", "--events", "tests/refdata/replay/awkward_events.csv"]),
    "awkward_fields": ("tests/refdata/replay/awkward_log.csv", "tests/refdata/replay/awkward.yaml",
                       "east-gas", ["--events", "tests/refdata/replay/awkward_events.csv"]),
}  # fmt: skip

AWKWARD_CONFIG = """\
# For the replay fixtures only: one channel with a topic input and a reference, one
# wildcard channel whose inputs are fields of its own payload.
channels:
  - name: gauge
    topic: site/gauge
    payload: number
    basis:
      - constant
      - polynomial: {of: t, degree: 1, scale: 10d}
      - exponential: {of: t, tau: 1d}
      - polynomial: {of: temperature, degree: 1, center: 20}
    inputs:
      temperature: {topic: site/temp, max_age: 30m}
      reference: {topic: site/reference, max_age: 5m}
    learn: {mode: reference, input: reference, robust: true, max_gap: 1d}
    memory: {half_life: 5d}
    correction: {cap: 6}
    alerts: {drift_limit: 1.5, rate_limit: 0.5/d, horizon: 3d, dwell: 30m}
  - name: "{1}-gas"
    topic: gas/+/raw
    basis:
      - constant
      - polynomial: {of: t, degree: 2, scale: 10d}
      - polynomial: {of: temperature, degree: 1, center: 20}
    inputs:
      temperature: {field: temp}
    learn: {mode: all, nominal: 0}
    memory: {window: 2d}
    alerts: {drift_limit: 2, rate_limit: 1/d, horizon: 2d}
"""

START = 1793491200.0  # 2026-11-01T00:00:00Z


def _iso(epoch: float, offset_hours: int) -> str:
    from datetime import datetime, timedelta, timezone

    zone = timezone(timedelta(hours=offset_hours))
    text = datetime.fromtimestamp(epoch, zone).isoformat()
    return text.replace("+00:00", "Z") if offset_hours == 0 else text


def write_awkward_log(path: Path) -> np.ndarray:
    """3,000 rows of 10-min samples with everything a real log has gone through."""
    rng = np.random.default_rng(2026)
    n = 3000
    steps = np.full(n, 600.0)
    steps[rng.choice(n, 12, replace=False)] = rng.uniform(3600, 2 * 86400, 12)  # gaps
    time = START + np.cumsum(steps)
    days = (time - START) / 86400.0
    temperature = 15 + 6 * np.sin(2 * math.pi * days) + rng.normal(0, 0.3, n)
    drift = 0.4 * days + 2 * np.exp(-days) + 0.08 * (temperature - 20)
    value = 10 + drift + rng.normal(0, 0.05, n)
    lines = ["time,value,temperature,reference"]
    for i in range(n):
        t = f"{time[i]:.0f}"
        if i % 97 == 5:
            t = _iso(time[i], 0)
        elif i % 131 == 7:
            t = _iso(time[i], 2)
        elif i % 151 == 9:
            t = f"{time[i]:.3f}"
        v = repr(float(value[i]))
        if i % 211 == 3:
            v = ""  # blank value: skipped and counted
        elif i % 173 == 1:
            v = f"{value[i]:.3e}"
        elif i % 59 == 2:
            v = f'"{value[i]:.4f}"'  # quoted
        elif i % 401 == 11:
            v = f" {value[i]:.5f} "  # spaces around
        temp = f"{temperature[i]:.6g}"
        if i < 4 or 400 <= i < 430 or i % 37 == 4:
            temp = ""  # no input yet: uncorrectable; later: stale
        reference = f"{10.0 + 0.05 * rng.normal():.4f}" if i % 6 == 0 else ""
        lines.append(f"{t},{v},{temp},{reference}")
        if i % 503 == 17:
            lines.append(f"{t},{v},{temp},{reference}")  # repeated: not newer
        if i % 617 == 19:
            lines.append(f"{time[i] - 1800:.0f},{v},{temp},")  # older: not newer
        if i % 709 == 23:
            lines.append("")  # blank line
    lines.append(f"{time[-1] + 600:.0f},2_0.5,1_5,")  # Python float() accepts underscores
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return time


def write_awkward_events(path: Path, times: np.ndarray) -> None:
    lines = ["time,event,mode", f"{START - 60:.0f},cleaned,"]  # before the first row
    lines.append(f"{times[900]:.0f},recalibrated,")  # rezero, at a row's time
    lines.append(f"{times[1500] + 1:.0f},cleaned,reset")  # between rows
    lines.append(f"{times[2100]:.0f},replaced,")
    lines.append(f"{times[2600]:.0f},recalibrated,reset")
    lines.append(f"{times[-1] + 3600:.0f},cleaned,")  # after the last row: never applied
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")


EDGE = 20  # rows kept at each end of an output
EVERY = 199  # and every EVERY-th row in between


def numeric(cell: str) -> float | None:
    """A number cell's value; None for a text or blank cell."""
    try:
        return float(cell)
    except ValueError:
        return None


def summary(output: str, alerts: str, stderr: str) -> dict[str, object]:
    """What `expected.json` keeps of one replay (see the module docstring)."""
    header, *rows = list(csv.reader(io.StringIO(output)))
    sums = [0.0] * len(header)
    for row in rows:
        for j, cell in enumerate(row):
            value = numeric(cell)
            if value is not None and math.isfinite(value):
                sums[j] += value
    kept = [i for i in range(len(rows)) if i < EDGE or i >= len(rows) - EDGE or i % EVERY == 0]
    return {
        "rows": len(rows),
        "header": header,
        "sample": [[i, rows[i]] for i in kept],
        "sums": sums,
        "alerts": [json.loads(line) for line in alerts.splitlines()],
        "stderr": stderr,
    }


def run_case(case: str, directory: Path) -> tuple[str, str, str]:
    """Replay one case into `directory`: its output, alerts and stderr texts."""
    from zeroline import cli

    log, config, channel, extra = CASES[case]
    extra = [str(ROOT / e) if e.startswith("tests/") else e for e in extra]
    out, alerts = directory / f"{case}.csv", directory / f"{case}.alerts.jsonl"
    arguments = ["replay", str(ROOT / log), "-c", str(ROOT / config), "--channel", channel]
    arguments += ["-o", str(out), "--alerts", str(alerts), *extra]
    stderr = io.StringIO()
    with contextlib.redirect_stderr(stderr):
        code = cli.main(arguments)
    if code != 0:
        raise SystemExit(f"{case}: exit {code}: {stderr.getvalue()}")
    return out.read_text(), alerts.read_text(), stderr.getvalue()


def main() -> int:
    arguments = sys.argv[1:]
    if "--new-log" in arguments:
        arguments.remove("--new-log")
        (HERE / "awkward.yaml").write_text(AWKWARD_CONFIG, encoding="utf-8")
        times = write_awkward_log(HERE / "awkward_log.csv")
        write_awkward_events(HERE / "awkward_events.csv", times)
    keep = Path(arguments[0]) if arguments else None
    with tempfile.TemporaryDirectory() as scratch:
        directory = keep or Path(scratch)
        directory.mkdir(exist_ok=True)
        expected = {case: summary(*run_case(case, directory)) for case in CASES}
    text = json.dumps(expected, indent=1, separators=(",", ":"))
    (HERE / "expected.json").write_text(text + "\n", encoding="utf-8")
    print(f"{len(expected)} cases, {len(text):,} bytes in expected.json")
    return 0


if __name__ == "__main__":
    sys.exit(main())
