"""`zeroline replay`: the contract output, equivalence with batch least squares, the pH
electrode example against the Nernst slope, and one-line errors."""

from __future__ import annotations

import csv
import json
import math
from pathlib import Path

import numpy as np
import pytest

from zeroline import cli, simulate
from zeroline.lsq import fit_least_squares

EXAMPLES = Path(__file__).resolve().parent.parent / "config" / "examples"

CONFIG_ALL = """
channels:
  - name: gauge
    topic: site/gauge
    basis:
      - constant
      - polynomial: {of: t, degree: 2, scale: 10d}
      - periodic: {of: t, period: 24h}
    learn: {mode: all, nominal: 0}
    memory: {half_life: 3d, prior_sd: 1.0e+9}
"""


def _write_log(path: Path, time: np.ndarray, value: np.ndarray, **columns: np.ndarray) -> None:
    with path.open("w", newline="") as handle:
        writer = csv.writer(handle)
        writer.writerow(["time", "value", *columns])
        for i in range(time.size):
            extra = ["" if math.isnan(c[i]) else repr(float(c[i])) for c in columns.values()]
            writer.writerow([repr(float(time[i])), repr(float(value[i])), *extra])


def _read_output(path: Path) -> list[dict[str, str]]:
    with path.open(newline="") as handle:
        return list(csv.DictReader(handle))


def _replay(tmp_path: Path, config: str, log: Path, *extra: str) -> list[dict[str, str]]:
    config_path = tmp_path / "config.yaml"
    config_path.write_text(config)
    out = tmp_path / "out.csv"
    code = cli.main(
        ["replay", str(log), "-c", str(config_path), "--channel", "gauge", "-o", str(out), *extra]
    )
    assert code == 0
    return _read_output(out)


def test_replay_equals_weighted_batch_least_squares_row_by_row(tmp_path: Path) -> None:
    """With `learn: all` and a half-life, every row's baseline equals the weighted batch
    least-squares fit (zeroline.lsq, weights 2^(−age/half_life)) over the rows so far.

    Irregular sampling (gaps of 5 min to 3 h). The prior is made negligible (prior_sd 1e9
    residual SDs) so the batch fit needs no prior rows. Tolerance: 1e-9 relative to the
    baseline's scale; measured when set: worst 4.5e-15.
    """
    rng = np.random.default_rng(17)
    steps = rng.uniform(300, 3 * 3600, 1500)
    time = simulate.START + np.cumsum(steps)
    t = time - time[0]
    value = 2 + 0.5 * t / 86400 + 0.3 * np.sin(2 * math.pi * t / 86400) + rng.normal(0, 0.1, t.size)
    log = tmp_path / "log.csv"
    _write_log(log, time, value)
    rows = _replay(tmp_path, CONFIG_ALL, log)
    assert len(rows) == time.size
    baseline = np.array([float(r["baseline"]) for r in rows])
    half_life = 3 * 86400.0
    u = t / (10 * 86400.0)
    phase = 2 * math.pi * (np.fmod(time[0], 86400.0) + t) / 86400.0
    design = np.column_stack([np.ones_like(t), u, u**2, np.sin(phase), np.cos(phase)])
    worst = 0.0
    for k in range(20, time.size, 37):
        weights = 2.0 ** (-(t[k] - t[: k + 1]) / half_life)
        fit = fit_least_squares(design[: k + 1], value[: k + 1], weights)
        expected = float(design[k] @ fit.coefficients)
        worst = max(worst, abs(baseline[k] - expected) / max(1.0, abs(expected)))
    assert worst < 1e-9, worst


def test_output_columns_are_the_contract(tmp_path: Path) -> None:
    """OUT has time, raw, baseline, corrected, uncertainty, quality (+ c0…c{p−1})."""
    time = simulate.START + np.arange(50) * 600.0
    log = tmp_path / "log.csv"
    _write_log(log, time, np.linspace(0, 1, 50))
    rows = _replay(tmp_path, CONFIG_ALL, log, "--coefficients")
    assert list(rows[0]) == [
        "time",
        "raw",
        "baseline",
        "corrected",
        "uncertainty",
        "quality",
        "c0",
        "c1",
        "c2",
        "c3",
        "c4",
    ]
    assert float(rows[3]["raw"]) == pytest.approx(3 / 49)
    assert rows[0]["quality"] == "learning" and rows[-1]["quality"] == "ok"


def test_ph_electrode_gain_loss_matches_the_nernst_slope(tmp_path: Path) -> None:
    """The pH example (config/examples/ph_river.yaml): an electrode at 92 % of the Nernst
    slope, checked weekly in pH 7 and pH 4 buffers, is corrected to pH and its fitted slope
    at 25 °C is 0.92 × (−59.16 mV/pH) within 0.5 %.

    Source: the Nernst slope 1000·R·T·ln(10)/F = 59.16 mV per pH unit at 25 °C, from the
    Nernst equation with the CODATA 2018 exact values of R and F.
    """
    assert simulate.nernst_slope_mv(25.0) == pytest.approx(59.16, abs=0.005)
    data = simulate.ph_river(efficiency=(0.92, 0.92))
    data["check"] = data.pop("check_value")
    log = tmp_path / "ph.csv"
    simulate.write_csv(log, data, ["time", "value", "temperature", "check"])
    out = tmp_path / "out.csv"
    code = cli.main(
        [
            "replay",
            str(log),
            "-c",
            str(EXAMPLES / "ph_river.yaml"),
            "--channel",
            "river-ph",
            "-o",
            str(out),
            "--coefficients",
        ]
    )
    assert code == 0
    rows = _read_output(out)
    slope = float(rows[-1]["c0"])  # the gain term: slope at 25 °C in mV/pH
    assert slope == pytest.approx(-0.92 * simulate.nernst_slope_mv(25.0), rel=0.005)
    corrected = np.array([float(r["corrected"]) for r in rows])
    later = slice(len(rows) // 4, None)
    error = corrected[later] - data["truth_value"][later]
    assert math.sqrt(float(np.mean(error**2))) < 0.05  # pH units; raw static calibration: 0.9


def test_alerts_go_to_a_file_as_contract_json_lines(tmp_path: Path) -> None:
    """--alerts FILE: one JSON object a line with exactly the contract keys."""
    out = tmp_path / "out.csv"
    alerts = tmp_path / "alerts.jsonl"
    code = cli.main(
        [
            "replay",
            str(EXAMPLES / "no2_station_log.csv"),
            "-c",
            str(EXAMPLES / "no2_station.yaml"),
            "--channel",
            "north-no2",
            "-o",
            str(out),
            "--alerts",
            str(alerts),
        ]
    )
    assert code == 0
    events = [json.loads(line) for line in alerts.read_text().splitlines()]
    assert events
    for event in events:
        assert list(event) == [
            "time",
            "channel",
            "rule",
            "state",
            "value",
            "limit",
            "severity",
            "message",
        ]
        assert event["channel"] == "north-no2"
        assert event["state"] in ("raised", "cleared")


def test_events_file_applies_control_events(tmp_path: Path) -> None:
    """--events: a `replaced` event resets the model, so the channel is learning again."""
    time = simulate.START + np.arange(200) * 600.0
    log = tmp_path / "log.csv"
    _write_log(log, time, np.full(200, 3.0))
    events = tmp_path / "events.csv"
    events.write_text(f"time,event,mode\n{time[100]:.0f},replaced,\n")
    rows = _replay(tmp_path, CONFIG_ALL, log, "--events", str(events))
    assert rows[99]["quality"] == "ok"
    assert rows[100]["quality"] == "learning"


@pytest.mark.parametrize(
    ("log_text", "extra", "expected"),
    [
        ("time,value\n1,2\n", ["--channel", "nope"], "no channel 'nope'"),
        ("time,valu\n1,2\n", [], "no column 'value'"),
        ("time,value\nsoon,2\n", [], "'soon' is not epoch seconds"),
        ("time,value\n1,2\n", ["--events", "/nonexistent/events.csv"], "cannot open"),
    ],
)
def test_bad_input_is_one_line_and_exit_2(
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
    log_text: str,
    extra: list[str],
    expected: str,
) -> None:
    """Bad replay input: exit 2 and one line on stderr naming the problem."""
    config = tmp_path / "config.yaml"
    config.write_text(CONFIG_ALL)
    log = tmp_path / "log.csv"
    log.write_text(log_text)
    args = ["replay", str(log), "-c", str(config), "-o", str(tmp_path / "o.csv")]
    if "--channel" not in extra:
        args += ["--channel", "gauge"]
    assert cli.main(args + extra) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and expected in err[0] and "Traceback" not in err[0]


def test_no_progress_line_when_not_a_terminal(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """Output that is not a terminal gets no progress line (nothing on stderr at all)."""
    time = simulate.START + np.arange(100) * 600.0
    log = tmp_path / "log.csv"
    _write_log(log, time, np.zeros(100))
    _replay(tmp_path, CONFIG_ALL, log, "--alerts", str(tmp_path / "a.jsonl"))
    assert capsys.readouterr().err == ""


def test_progress_line_on_a_terminal(tmp_path: Path) -> None:
    """On a terminal, replay shows a progress line with rows/s and the time left."""
    import os
    import pty
    import subprocess
    import sys

    time = simulate.START + np.arange(3000) * 600.0
    log = tmp_path / "log.csv"
    _write_log(log, time, np.zeros(3000))
    config = tmp_path / "config.yaml"
    config.write_text(CONFIG_ALL)
    controller, terminal = pty.openpty()
    daemon_dir = Path(__file__).resolve().parent.parent / "daemon"
    env = {**os.environ, "PYTHONPATH": str(daemon_dir)}
    process = subprocess.run(
        [
            sys.executable,
            "-m",
            "zeroline.cli",
            "replay",
            str(log),
            "-c",
            str(config),
            "--channel",
            "gauge",
            "-o",
            str(tmp_path / "o.csv"),
            "--alerts",
            str(tmp_path / "a"),
        ],
        stderr=terminal,
        env=env,
        timeout=120,
        check=False,
    )
    os.close(terminal)
    shown = b""
    while True:
        try:
            chunk = os.read(controller, 4096)
        except OSError:
            break
        if not chunk:
            break
        shown += chunk
    os.close(controller)
    assert process.returncode == 0
    text = shown.decode()
    assert "rows/s" in text and "3000/3000 rows in" in text
