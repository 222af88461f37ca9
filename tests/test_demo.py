"""`zeroline demo` end to end: no broker running, so it starts its embedded one, plays the
simulated river station into the real daemon and reports how corrected values compare with
the simulated truth."""

from __future__ import annotations

import json
import os
import socket
import subprocess
import sys
from pathlib import Path

DAEMON_DIR = Path(__file__).resolve().parent.parent / "daemon"


def _free_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return int(probe.getsockname()[1])


def test_demo_runs_with_no_broker_and_corrects_towards_the_truth() -> None:
    """With nothing listening on the chosen port the demo starts an embedded broker, exits
    0 after 20 s, shows corrected output and at least one alert, and every channel's
    corrected readings are closer to the simulated truth than its raw readings."""
    env = {**os.environ, "PYTHONPATH": str(DAEMON_DIR)}
    process = subprocess.run(
        [
            sys.executable,
            "-m",
            "zeroline.cli",
            "demo",
            "--duration",
            "20",
            "--broker",
            f"127.0.0.1:{_free_port()}",
        ],
        capture_output=True,
        text=True,
        timeout=180,
        env=env,
        check=False,
    )
    assert process.returncode == 0, process.stdout[-2000:] + process.stderr[-2000:]
    assert "starting an embedded one" in process.stdout
    assert "mosquitto_sub" in process.stdout and "config:" in process.stdout
    summary_line = next(
        line for line in process.stdout.splitlines() if line.startswith("summary: ")
    )
    summary = json.loads(summary_line.removeprefix("summary: "))
    assert summary["corrected"] > 1000
    assert summary["alerts"] >= 1
    assert set(summary["channels"]) == {
        "river-ph",
        "river-conductivity",
        "river-oxygen",
        "roadside-no2",
    }
    for name, numbers in summary["channels"].items():
        assert numbers["corrected_rms"] < numbers["raw_rms"], name
    assert "Traceback" not in process.stderr
