"""Benchmark of the per-reading cost of `Channel.process` (issue 10: "the model must be free").

Run from the repository root:

    PYTHONPATH=daemon python bench/channel.py              # 1,000 channels, 7 rounds
    PYTHONPATH=daemon python bench/channel.py --quick      # 100 channels, 3 rounds
    PYTHONPATH=daemon python bench/channel.py --profile    # and a cProfile of one round
    PYTHONPATH=daemon python bench/channel.py --against ../main   # this tree against another

The channel is the end-to-end benchmarks' p = 6 one (`common.BASIS_P6`: constant,
(t/30d, (t/30d)²), daily sin/cos, temperature − 20; the temperature a field of the reading),
learn mode `all`, default alerts; 1,000 channels fed round-robin at 1-min spacing per
channel. Each channel first gets `--warm-up` readings (20: the model is established after
12), untimed, then `--per-channel` timed readings (50), so what is timed is the daemon's
steady state: established models, learning from every reading.

Measured in interleaved rounds (the order alternating) because timings on a shared machine
move by tens of percent from one second to the next; each loop is timed in CPU seconds of
this process (`time.process_time`: the loops are single-threaded, OpenBLAS runs one
thread), so time the scheduler gives to other jobs on the cores is not counted, their cache
and memory traffic still is. Printed, best of the rounds and their median:
1. µs per reading of `Channel.process` (input lookup, basis row and slope, learning,
   correction with its uncertainty, drift at the inputs' means, quality, alert rules);
2. the same-run baselines over the very same design rows, one estimator per channel:
   zeroline's bare `RecursiveEstimator.update`, and a plain numpy textbook RLS update
   (k = Pφ/(λ + φᵀPφ); θ += k·e; P ← (P − kφᵀP)/λ);
3. the ratios channel / update and channel / textbook: the best of each side, and the
   median of the per-round ratios (a round sees about the same load on both sides).

With `--against TREE` the rounds alternate between two processes, one with this tree's
`daemon/` and one with TREE's first on the path, and the two channels' µs per reading are
printed side by side with the ratio of bests and the median of the per-round ratios: a
before/after comparison under the same load. bench/RESULTS.md ("Channel hot path") has
this script's figures.
"""

from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")  # every matrix here is at most 7 wide

import argparse
import cProfile
import json
import pstats
import subprocess
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from common import BASIS_P6, machine, payload

_TREE = os.environ.get("ZEROLINE_BENCH_TREE")  # a child of --against: import that tree's code
if _TREE:
    sys.path.insert(0, str(Path(_TREE) / "daemon"))

from estimator import Textbook  # noqa: E402  # bench/estimator.py: the same textbook update
from zeroline.channel import Channel, Sample  # noqa: E402
from zeroline.config import ChannelConfig, parse_config  # noqa: E402
from zeroline.estimator import RecursiveEstimator  # noqa: E402

SPACING = 60.0  # seconds between two readings of one channel
START = 1.7e9
HALF_LIFE = 7 * 86400.0  # the channel's default memory
SIDES = ("Channel.process", "RecursiveEstimator.update", "textbook RLS update")

CONFIG = f"""
broker: {{host: 127.0.0.1}}
channels:
  - name: "{{1}}-gas"
    topic: site/+/gas
    basis: {BASIS_P6}
    inputs: {{temperature: {{field: temperature}}}}
"""


@dataclass(frozen=True)
class Workload:
    """The readings of every channel, round-robin: the first `warm` of each untimed."""

    channels: int
    warm: int
    timed: int
    stream: list[tuple[int, Sample]]  # (channel index, reading)
    rows: list[np.ndarray]  # the design row each reading is learnt with
    epochs: list[float]  # its channel's epoch (the channel's first reading)

    @property
    def split(self) -> int:
        """Index of the first timed reading in `stream`."""
        return self.channels * self.warm


def workload(config: ChannelConfig, channels: int, warm: int, timed: int) -> Workload:
    """Readings decoded from the benchmarks' JSON payloads, with their design rows."""
    stream = []
    for k in range(channels * (warm + timed)):
        channel = k % channels
        data = json.loads(payload(START + SPACING * (k // channels), channel))
        reading = Sample(data["time"], data["value"], {"temperature": data["temperature"]})
        stream.append((channel, reading))
    first: dict[int, float] = {}
    epochs = [first.setdefault(i, sample.time) for i, sample in stream]
    rows = []
    for (_, sample), epoch in zip(stream, epochs, strict=True):
        basis = config.basis.with_epoch(epoch)
        rows.append(basis.row(sample.time - epoch, dict(sample.fields)))
    return Workload(channels, warm, timed, stream, rows, epochs)


def _timed(work: list[tuple[Callable[..., object], tuple[object, ...]]], split: int) -> float:
    """CPU seconds of the calls in `work` from `split` on (those before it warm up)."""
    for call, arguments in work[:split]:
        call(*arguments)
    start = time.process_time()
    for call, arguments in work[split:]:
        call(*arguments)
    return time.process_time() - start


def time_channels(config: ChannelConfig, load: Workload) -> float:
    """Seconds of feeding the timed readings to channels (making and warming them is not
    counted)."""
    channels = [Channel(config, f"s{i}-gas") for i in range(load.channels)]
    work = [(channels[i].process, (sample,)) for i, sample in load.stream]
    return _timed(work, load.split)


def time_updates(load: Workload) -> float:
    """Seconds of the bare estimator updates over the same rows, one estimator a channel."""
    estimators = [RecursiveEstimator(6, half_life=HALF_LIFE) for _ in range(load.channels)]
    work = [
        (estimators[i].update, (row, sample.value, 1.0, sample.time - epoch))
        for (i, sample), row, epoch in zip(load.stream, load.rows, load.epochs, strict=True)
    ]
    return _timed(work, load.split)


def time_textbook(load: Workload) -> float:
    """Seconds of the textbook covariance-form update over the same rows."""
    filters = [Textbook(6, 2.0 ** (-SPACING / HALF_LIFE)) for _ in range(load.channels)]
    work = [
        (filters[i].update, (row, sample.value))
        for (i, sample), row in zip(load.stream, load.rows, strict=True)
    ]
    return _timed(work, load.split)


def interleaved(rounds: int, sides: list[Callable[[], float]]) -> np.ndarray:
    """Each side's seconds in each round, shape (rounds, sides); the order alternates."""
    table = np.empty((rounds, len(sides)))
    for r in range(rounds):
        order = range(len(sides)) if r % 2 == 0 else reversed(range(len(sides)))
        for index in order:
            table[r, index] = sides[index]()
    return table


def _sides(args: argparse.Namespace) -> tuple[ChannelConfig, Workload, list[Callable[[], float]]]:
    """The channel config, its workload and one timing function per side of `SIDES`."""
    config = parse_config(CONFIG).channels[0]
    load = workload(config, args.channels, args.warm_up, args.per_channel)
    sides: list[Callable[[], float]] = [
        lambda: time_channels(config, load),
        lambda: time_updates(load),
        lambda: time_textbook(load),
    ]
    return config, load, sides


def measure(args: argparse.Namespace, rounds: int) -> np.ndarray:
    """µs per timed reading of each of `SIDES` in each round, shape (rounds, 3)."""
    config, load, sides = _sides(args)
    interleaved(1, sides)  # warm-up: imports, caches, allocator
    table: np.ndarray = interleaved(rounds, sides) / (load.channels * load.timed) * 1e6
    if args.profile:
        profile = cProfile.Profile()
        profile.runcall(time_channels, config, load)
        pstats.Stats(profile).sort_stats("tottime").print_stats(25)
    return table


def report(micro: np.ndarray, args: argparse.Namespace) -> None:
    n = args.channels * args.per_channel
    print(f"machine: {machine()}, OPENBLAS_NUM_THREADS={os.environ['OPENBLAS_NUM_THREADS']}")
    print(
        f"{n} timed readings over {args.channels} channels at p = 6 (after {args.warm_up} "
        f"warm-up readings each), {micro.shape[0]} interleaved rounds"
    )
    print(f"  {'':27} {'µs/reading best':>15} {'median':>7}")
    for index, name in enumerate(SIDES):
        print(f"  {name:27} {micro[:, index].min():>15.1f} {np.median(micro[:, index]):>7.1f}")
    for index, name in ((1, "update"), (2, "textbook")):
        best = micro[:, 0].min() / micro[:, index].min()
        median = float(np.median(micro[:, 0] / micro[:, index]))
        print(
            f"  channel / {name:9} ratio of bests {best:5.2f}, median of round ratios {median:5.2f}"
        )


def serve(args: argparse.Namespace) -> None:
    """A child of --against: one round per line read from stdin, µs per reading of each
    side as a JSON line (the workload is made once)."""
    _, load, sides = _sides(args)
    for _ in sys.stdin:
        micro = interleaved(1, sides)[0] / (load.channels * load.timed) * 1e6
        print(json.dumps(micro.tolist()), flush=True)


def against(other: Path, args: argparse.Namespace) -> None:
    """This tree against `other`: a process per tree, kept for every round (each round
    makes its channels anew), the order alternating; one untimed round each first."""
    here = Path(__file__).resolve().parent.parent
    trees = [("this tree", here), (f"{other}", other)]
    command = [sys.executable, __file__, "--serve", "--channels", str(args.channels)]
    command += ["--warm-up", str(args.warm_up), "--per-channel", str(args.per_channel)]
    children = [
        subprocess.Popen(
            command,
            env={**os.environ, "ZEROLINE_BENCH_TREE": str(tree)},
            stdin=subprocess.PIPE,
            stdout=subprocess.PIPE,
            text=True,
        )
        for _, tree in trees
    ]

    def round_of(child: subprocess.Popen[str]) -> list[float]:
        assert child.stdin is not None and child.stdout is not None
        child.stdin.write("round\n")
        child.stdin.flush()
        values: list[float] = json.loads(child.stdout.readline())
        return values

    table = np.empty((args.rounds, 2, len(SIDES)))
    try:
        for child in children:
            round_of(child)  # warm-up: imports, caches, allocator
        for r in range(args.rounds):
            for index in (0, 1) if r % 2 == 0 else (1, 0):
                table[r, index] = round_of(children[index])
    finally:
        for child in children:
            assert child.stdin is not None
            child.stdin.close()
            child.wait(60)
    print(f"machine: {machine()}, OPENBLAS_NUM_THREADS={os.environ['OPENBLAS_NUM_THREADS']}")
    print(
        f"{args.channels * args.per_channel} timed readings over {args.channels} channels "
        f"(after {args.warm_up} warm-up readings each), {args.rounds} rounds alternating "
        "between two processes"
    )
    print(f"  {'µs/reading, best / median':33} {'process':>15} {'update':>13} {'textbook':>13}")
    for index, (name, _) in enumerate(trees):
        cells = [
            f"{table[:, index, s].min():6.1f} / {np.median(table[:, index, s]):5.1f}"
            for s in range(len(SIDES))
        ]
        print(f"  {name[-33:]:33} {cells[0]:>15} {cells[1]:>13} {cells[2]:>13}")
    ratios = table[:, 1, 0] / table[:, 0, 0]
    best = table[:, 1, 0].min() / table[:, 0, 0].min()
    print(
        f"  Channel.process, other / this: ratio of bests {best:.2f}, median of round "
        f"ratios {float(np.median(ratios)):.2f} (rounds: {', '.join(f'{x:.2f}' for x in ratios)})"
    )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="100 channels, 3 rounds")
    parser.add_argument("--channels", type=int, default=1000)
    parser.add_argument("--warm-up", type=int, default=20, help="untimed readings a channel")
    parser.add_argument("--per-channel", type=int, default=50, help="timed readings a channel")
    parser.add_argument("--rounds", type=int, default=7)
    parser.add_argument("--profile", action="store_true", help="cProfile one channel round")
    parser.add_argument("--against", type=Path, metavar="TREE", help="another checkout to compare")
    parser.add_argument("--serve", action="store_true", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.quick:
        args.channels, args.rounds = 100, 3
    if args.against is not None:
        against(args.against.resolve(), args)
        return
    if args.serve:
        serve(args)
        return
    report(measure(args, args.rounds), args)


if __name__ == "__main__":
    main()
