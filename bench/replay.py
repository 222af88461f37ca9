"""Samples/s of the `zeroline replay` command on one channel, against statsmodels RecursiveLS,
and how much of its time is spent around the model.

`PYTHONPATH=daemon python bench/replay.py [--rows 1000000]`

Generates one invented log (1-min samples: slow drift, a daily cycle, a temperature effect,
seeded noise) as CSV, runs `python -m zeroline.cli replay DATA.csv -c CONFIG --channel
x-gas -o OUT.csv` on it as a subprocess (wall time: start-up, CSV in, the row-by-row
channel pipeline, CSV out), then, in the same run:

- statsmodels `RecursiveLS(y, X).filter()` on the same rows with the same six regressors
  (constant, t/30d, (t/30d)^2, daily sin/cos, T - 20) built with numpy (fit time only: no
  CSV, no forgetting, no alerts). The ratio is zeroline's samples/s over statsmodels'.
- `Channel.process` alone over the same rows, in this process (the samples are built
  before the clock starts): the model's share. CLI minus this is the time around the model.
- the command in this process with `Channel.process` timed from inside each call: the
  same run split into the model and everything around it (the timer's own cost, measured,
  is printed; it counts as "around"). Its CPU time is split pro rata to the wall times.
- the same CLI command with a no-op channel (`--no-op-child`: a subprocess whose `Channel`
  returns one fixed result with 17-digit numbers, so writing a row costs what it costs):
  start-up, CSV in, the loop, building samples and input updates, CSV out — the time
  around the model measured directly, not as a difference of two large numbers.
- the no-op command on a one-row log: start-up alone.

CPU seconds are printed beside wall seconds: on a shared machine they are the steadier
figure (a difference of two wall times of ~100 µs a row each is mostly noise there).
"""

from __future__ import annotations

import argparse
import os
import resource
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import numpy as np

from common import ROOT, machine, table, temporary_directory, write_config

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")  # see RESULTS.md: threads cost 10x here

NO_OP_FLAG = "--no-op-child"


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


def write_log(path: Path, times: np.ndarray, value: np.ndarray, temperature: np.ndarray) -> None:
    with open(path, "w") as handle:
        handle.write("time,value,temperature\n")
        for t, v, c in zip(times.tolist(), value.tolist(), temperature.tolist(), strict=True):
            handle.write(f"{t:.0f},{v!r},{c!r}\n")


def run_no_op_child(replay_arguments: list[str]) -> int:
    """`zeroline replay` with a channel that does nothing (the `--no-op-child` mode)."""
    from zeroline import cli
    from zeroline.channel import Corrected
    from zeroline.commands import replay as replay_command

    fixed = Corrected(
        time=1_793_491_200.0,
        raw=1.5123456789012345,
        corrected=1.3888888898888889,
        baseline=0.12345678901234567,
        uncertainty=0.012345678901234567,
        quality="ok",
        quality_code=1,
        flags=(),
        gain=None,
        drift_rate=None,
        learned=True,
    )

    class NoOpChannel:
        """Stands in for `Channel`: takes every call, returns `fixed` for every reading."""

        def __init__(self, config: Any, name: str) -> None:
            self.config = config
            self.n_terms = config.basis.size

        def set_input(self, name: str, time: float, value: float) -> None:
            pass

        def control(self, event: Any) -> list[Any]:
            return []

        def process(self, sample: Any) -> tuple[Corrected, list[Any]]:
            return fixed, []

    setattr(replay_command, "Channel", NoOpChannel)  # noqa: B010 - a plain assignment fails mypy
    return cli.main(replay_arguments)


def timed_cli(arguments: list[str], env: dict[str, str]) -> tuple[float, float]:
    """(wall seconds, CPU seconds) of one `python ...` subprocess."""
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    began = time.perf_counter()
    subprocess.run([sys.executable, *arguments], check=True, env=env)
    wall = time.perf_counter() - began
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    return wall, cpu


def time_channel_process(config: Path, data: Path) -> tuple[float, float]:
    """(wall, CPU) seconds of `Channel.process` alone over the rows of `data` (the samples
    are built before the clocks start)."""
    from zeroline.channel import Channel, Sample
    from zeroline.config import load_config
    from zeroline.csvdata import read_table

    log = read_table(data)
    rows = zip(
        log.columns["time"].tolist(),
        log.columns["value"].tolist(),
        log.columns["temperature"].tolist(),
        strict=True,
    )
    samples = [Sample(t, v, {"temperature": c}) for t, v, c in rows]
    channel = Channel(load_config(config).channels[0], "x-gas")
    process = channel.process
    began, cpu_began = time.perf_counter(), time.process_time()
    for sample in samples:
        process(sample)
    return time.perf_counter() - began, time.process_time() - cpu_began


def time_cli_in_process(arguments: list[str]) -> tuple[float, float, float, float]:
    """(wall seconds of the whole command, its CPU seconds, wall seconds inside
    `Channel.process`, the timer's own cost a call) of `zeroline replay` run in this
    process: the same run split into the model and everything around it, not a difference
    of two runs. (A CPU clock read costs ~1 µs here, too much to take twice a row.)"""
    from zeroline import cli
    from zeroline.channel import Channel

    original = Channel.process
    inside = 0

    def timed(self: Channel, sample: Any) -> Any:
        nonlocal inside
        began = time.perf_counter_ns()
        result = original(self, sample)
        inside += time.perf_counter_ns() - began
        return result

    def bare(sample: Any) -> None:
        pass

    def wrapped(sample: Any) -> None:  # what `timed` adds around a call, to report it
        nonlocal inside
        began = time.perf_counter_ns()
        bare(sample)
        inside += time.perf_counter_ns() - began

    calls = 200_000
    began_s = time.perf_counter()
    for _ in range(calls):
        bare(None)
    bare_s = time.perf_counter() - began_s
    began_s = time.perf_counter()
    for _ in range(calls):
        wrapped(None)
    timer_cost = max(time.perf_counter() - began_s - bare_s, 0.0) / calls
    inside = 0
    setattr(Channel, "process", timed)  # noqa: B010 - a plain assignment fails mypy
    try:
        began_s, began_cpu = time.perf_counter(), time.process_time()
        code = cli.main(arguments)
        total, total_cpu = time.perf_counter() - began_s, time.process_time() - began_cpu
    finally:
        setattr(Channel, "process", original)  # noqa: B010
    if code != 0:
        raise SystemExit(f"in-process replay: exit {code}")
    return total, total_cpu, inside / 1e9, timer_cost


def main() -> int:
    if len(sys.argv) > 1 and sys.argv[1] == NO_OP_FLAG:
        return run_no_op_child(sys.argv[2:])
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=1_000_000)
    args = parser.parse_args()
    print(machine())
    directory = temporary_directory("zl-bench-replay-")
    times, value, temperature = make_rows(args.rows)
    data, one_row = directory / "data.csv", directory / "one_row.csv"
    write_log(data, times, value, temperature)
    write_log(one_row, times[:1], value[:1], temperature[:1])
    config = write_config(directory, 1883)
    env = {**os.environ, "PYTHONPATH": str(ROOT / "daemon")}

    def replay_arguments(log: Path, name: str) -> list[str]:
        return [
            "replay",
            str(log),
            "-c",
            str(config),
            "--channel",
            "x-gas",
            "-o",
            str(directory / f"{name}.csv"),
            "--alerts",
            str(directory / f"{name}.alerts.jsonl"),
        ]

    zeroline_s, zeroline_cpu = timed_cli(
        ["-m", "zeroline.cli", *replay_arguments(data, "out")], env
    )
    with open(directory / "out.csv") as handle:
        written = sum(1 for _ in handle) - 1
    script = str(Path(__file__).resolve())
    no_op_s, no_op_cpu = timed_cli([script, NO_OP_FLAG, *replay_arguments(data, "no_op")], env)
    start_s, start_cpu = timed_cli([script, NO_OP_FLAG, *replay_arguments(one_row, "one_row")], env)
    process_s, process_cpu = time_channel_process(config, data)
    in_process = time_cli_in_process(replay_arguments(data, "in_process"))
    whole_s, whole_cpu, model_s, timer_cost = in_process
    # CPU around the model, pro rata: on a busy machine waiting for a core stretches the
    # wall time inside and outside Channel.process alike
    around_same_cpu = whole_cpu * (whole_s - model_s) / whole_s

    from statsmodels.regression.recursive_ls import RecursiveLS

    design = regressors(times, temperature)
    began = time.perf_counter()
    fit = RecursiveLS(value, design).filter()
    statsmodels_s = time.perf_counter() - began
    assert np.all(np.isfinite(fit.params))
    n = args.rows
    zl_rate, sm_rate = n / zeroline_s, n / statsmodels_s
    around_s, around_cpu = zeroline_s - process_s, zeroline_cpu - process_cpu

    def line(path: str, seconds: float, cpu: float | None, rate: bool = True) -> list[str]:
        return [
            path,
            f"{seconds:.2f}",
            "" if cpu is None else f"{cpu:.2f}",
            f"{n / seconds:,.0f}" if rate else "",
            f"{seconds / n * 1e6:.2f}",
            "" if cpu is None else f"{cpu / n * 1e6:.2f}",
        ]

    print(f"\n{n:,} rows, one channel at p = 6 ({written:,} rows written)")
    print(
        table(
            ["path", "wall s", "CPU s", "samples/s", "µs a row", "CPU µs a row"],
            [
                line("zeroline replay (CLI, CSV in and out)", zeroline_s, zeroline_cpu),
                line("statsmodels RecursiveLS(y, X).filter()", statsmodels_s, None),
                line("Channel.process alone, same rows", process_s, process_cpu),
                line("around the model: CLI − Channel.process", around_s, around_cpu, False),
                line("CLI in this process (no start-up)", whole_s, whole_cpu),
                line(
                    "… of which inside Channel.process", model_s, whole_cpu - around_same_cpu, False
                ),
                line("… of which around it (same run)", whole_s - model_s, around_same_cpu, False),
                line("CLI with a no-op channel (all but the model)", no_op_s, no_op_cpu),
                line("… of which start-up (no-op CLI, 1-row log)", start_s, start_cpu, False),
            ],
        )
    )
    print(f"zeroline / statsmodels: {zl_rate / sm_rate:.3f}x")
    print(
        f"around the model: {(whole_s - model_s) / n * 1e6:.2f} µs a row in the same run "
        f"({around_same_cpu / n * 1e6:.2f} µs of CPU pro rata; the timer adds "
        f"{timer_cost * 1e6:.2f} µs a row), "
        f"{around_s / n * 1e6:.2f} µs a row by difference of two runs "
        f"({around_cpu / n * 1e6:.2f} µs of CPU), "
        f"{no_op_s / n * 1e6:.2f} µs a row with a no-op channel "
        f"({no_op_cpu / n * 1e6:.2f} µs of CPU; target ≤ 10), "
        f"{(no_op_s - start_s) / n * 1e6:.2f} µs without its start-up"
    )
    print(machine())
    return 0


if __name__ == "__main__":
    sys.exit(main())
