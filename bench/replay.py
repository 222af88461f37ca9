"""Samples/s of the `zeroline replay` command on one channel, against statsmodels RecursiveLS.

`PYTHONPATH=daemon python bench/replay.py [--rows 1000000]`

Generates one invented log (1-min samples: slow drift, a daily cycle, a temperature effect,
seeded noise) as CSV, runs `python -m zeroline.cli replay DATA.csv -c CONFIG --channel
x-gas -o OUT.csv` on it as a subprocess (wall time: start-up, CSV in, the row-by-row
channel pipeline, CSV out), then, in the same run, statsmodels `RecursiveLS(y, X).filter()`
.filter()` on the same rows with the same six regressors (constant, t/30d, (t/30d)^2, daily sin/cos,
T - 20) built with numpy (fit time only: no CSV, no forgetting, no alerts). The ratio is
zeroline's samples/s over statsmodels'.
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import time

import numpy as np

from common import ROOT, machine, table, temporary_directory, write_config

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")  # see RESULTS.md: threads cost 10x here


def make_rows(n: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    rng = np.random.default_rng(7)
    start = float(int(time.time()) - 60 * n - 86400)
    times = start + 60.0 * np.arange(n)
    days = (times - start) / 86400.0
    temperature = 20.0 + 6.0 * np.sin(2 * np.pi * days) + rng.normal(0.0, 0.5, n)
    value = (
        1.5
        + 0.01 * days
        + 0.2 * np.sin(2 * np.pi * days + 0.3)
        + 0.03 * (temperature - 20.0)
        + rng.normal(0.0, 0.05, n)
    )
    return times, value, temperature


def regressors(times: np.ndarray, temperature: np.ndarray) -> np.ndarray:
    t = times - times[0]
    scaled = t / (30 * 86400.0)
    angle = 2 * np.pi * t / 86400.0
    return np.column_stack(
        [np.ones_like(t), scaled, scaled**2, np.sin(angle), np.cos(angle), temperature - 20.0]
    )


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=1_000_000)
    args = parser.parse_args()
    print(machine())
    directory = temporary_directory("zl-bench-replay-")
    times, value, temperature = make_rows(args.rows)
    data = directory / "data.csv"
    with open(data, "w") as handle:
        handle.write("time,value,temperature\n")
        for t, v, c in zip(times.tolist(), value.tolist(), temperature.tolist(), strict=True):
            handle.write(f"{t:.0f},{v!r},{c!r}\n")
    config = write_config(directory, 1883)
    env = {**os.environ, "PYTHONPATH": str(ROOT / "daemon")}
    began = time.perf_counter()
    subprocess.run(
        [
            sys.executable,
            "-m",
            "zeroline.cli",
            "replay",
            str(data),
            "-c",
            str(config),
            "--channel",
            "x-gas",
            "-o",
            str(directory / "out.csv"),
            "--alerts",
            str(directory / "alerts.jsonl"),
        ],
        check=True,
        env=env,
    )
    zeroline_s = time.perf_counter() - began
    with open(directory / "out.csv") as handle:
        written = sum(1 for _ in handle) - 1

    from statsmodels.regression.recursive_ls import RecursiveLS

    design = regressors(times, temperature)
    began = time.perf_counter()
    fit = RecursiveLS(value, design).filter()
    statsmodels_s = time.perf_counter() - began
    assert np.all(np.isfinite(fit.params))
    zl_rate, sm_rate = args.rows / zeroline_s, args.rows / statsmodels_s
    print(f"\n{args.rows:,} rows, one channel at p = 6 ({written:,} rows written)")
    print(
        table(
            ["path", "seconds", "samples/s"],
            [
                ["zeroline replay (CLI, CSV in and out)", f"{zeroline_s:.1f}", f"{zl_rate:,.0f}"],
                [
                    "statsmodels RecursiveLS(y, X).filter()",
                    f"{statsmodels_s:.1f}",
                    f"{sm_rate:,.0f}",
                ],
            ],
        )
    )
    print(f"zeroline / statsmodels: {zl_rate / sm_rate:.2f}x")
    print(machine())
    return 0


if __name__ == "__main__":
    sys.exit(main())
