"""Benchmark of the per-reading cost of `Channel.process` (issue 10: "the model must be free").

Run from the repository root:

    PYTHONPATH=daemon python bench/channel.py              # 20,000 readings, 7 rounds
    PYTHONPATH=daemon python bench/channel.py --quick      # 2,000 readings, 3 rounds
    PYTHONPATH=daemon python bench/channel.py --profile    # and a cProfile of one round

The channel is the end-to-end benchmarks' p = 6 one (`common.BASIS_P6`: constant,
(t/30d, (t/30d)²), daily sin/cos, temperature − 20; the temperature a field of the reading),
learn mode `all`, default alerts; 100 channels fed round-robin at 1-min spacing per
channel, so the model is established after the first 12 readings of each.

Printed side by side, measured in interleaved rounds (the order alternating) because
timings on a shared machine move by tens of percent from one second to the next; each
loop is timed in CPU seconds of this process (`time.process_time`: the loops are
single-threaded, OpenBLAS runs one thread), so time the scheduler gives to other jobs on
the cores is not counted, their cache and memory traffic still is:
1. µs per reading of `Channel.process` (input lookup, basis row and slope, learning,
   correction with its uncertainty, drift at the inputs' means, quality, alert rules);
2. the same-run baselines over the very same design rows, one estimator per channel:
   zeroline's bare `RecursiveEstimator.update`, and a plain numpy textbook RLS update
   (k = Pφ/(λ + φᵀPφ); θ += k·e; P ← (P − kφᵀP)/λ);
3. the ratios channel / update and channel / textbook: the best of each side, and the
   median of the per-round ratios (a round sees about the same load on both sides).

The target of issue 10 is a channel at least 2.5× cheaper than before this work; compare
the ratio to the textbook with the one in bench/RESULTS.md ("Channel hot path"), which
also gives this script's figures for the code before the change.
"""

from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")  # every matrix here is at most 7 wide

import argparse
import cProfile
import json
import pstats
import time
from collections.abc import Callable

import numpy as np

from common import BASIS_P6, machine, payload
from estimator import Textbook  # bench/estimator.py: the same textbook update as there
from zeroline.channel import Channel, Sample
from zeroline.config import ChannelConfig, parse_config
from zeroline.estimator import RecursiveEstimator

CHANNELS = 100
SPACING = 60.0  # seconds between two readings of one channel
START = 1.7e9
HALF_LIFE = 7 * 86400.0  # the channel's default memory

CONFIG = f"""
broker: {{host: 127.0.0.1}}
channels:
  - name: "{{1}}-gas"
    topic: site/+/gas
    basis: {BASIS_P6}
    inputs: {{temperature: {{field: temperature}}}}
"""


def readings(n: int) -> list[tuple[int, Sample]]:
    """(channel index, reading) round-robin, decoded from the benchmarks' JSON payloads."""
    out = []
    for k in range(n):
        channel = k % CHANNELS
        data = json.loads(payload(START + SPACING * (k // CHANNELS), channel))
        out.append(
            (channel, Sample(data["time"], data["value"], {"temperature": data["temperature"]}))
        )
    return out


def design_rows(config: ChannelConfig, stream: list[tuple[int, Sample]]) -> list[np.ndarray]:
    """The row φ each reading is learnt with (the first reading of a channel is its epoch)."""
    epochs: dict[int, float] = {}
    rows = []
    for channel, sample in stream:
        epoch = epochs.setdefault(channel, sample.time)
        basis = config.basis.with_epoch(epoch)
        rows.append(basis.row(sample.time - epoch, dict(sample.fields)))
    return rows


def time_channels(config: ChannelConfig, stream: list[tuple[int, Sample]]) -> float:
    """Seconds of feeding the stream to fresh channels (making them is not counted)."""
    channels = [Channel(config, f"s{i}-gas") for i in range(CHANNELS)]
    work = [(channels[i].process, sample) for i, sample in stream]
    start = time.process_time()
    for process, sample in work:
        process(sample)
    return time.process_time() - start


def time_updates(
    stream: list[tuple[int, Sample]], rows: list[np.ndarray], epochs: list[float]
) -> float:
    """Seconds of the bare estimator updates over the same rows, one estimator a channel."""
    estimators = [RecursiveEstimator(6, half_life=HALF_LIFE) for _ in range(CHANNELS)]
    work = [
        (estimators[i].update, row, sample.value, sample.time - epoch)
        for (i, sample), row, epoch in zip(stream, rows, epochs, strict=True)
    ]
    start = time.process_time()
    for update, row, value, t in work:
        update(row, value, 1.0, t)
    return time.process_time() - start


def time_textbook(stream: list[tuple[int, Sample]], rows: list[np.ndarray]) -> float:
    """Seconds of the textbook covariance-form update over the same rows."""
    filters = [Textbook(6, 2.0 ** (-SPACING / HALF_LIFE)) for _ in range(CHANNELS)]
    work = [
        (filters[i].update, row, sample.value)
        for (i, sample), row in zip(stream, rows, strict=True)
    ]
    start = time.process_time()
    for update, row, value in work:
        update(row, value)
    return time.process_time() - start


def interleaved(rounds: int, sides: list[Callable[[], float]]) -> np.ndarray:
    """Each side's seconds in each round, shape (rounds, sides); the order alternates."""
    table = np.empty((rounds, len(sides)))
    for r in range(rounds):
        order = range(len(sides)) if r % 2 == 0 else reversed(range(len(sides)))
        for index in order:
            table[r, index] = sides[index]()
    return table


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="2,000 readings, 3 rounds")
    parser.add_argument("--readings", type=int, default=20_000)
    parser.add_argument("--rounds", type=int, default=7)
    parser.add_argument("--profile", action="store_true", help="cProfile one channel round")
    args = parser.parse_args()
    n, rounds = (2_000, 3) if args.quick else (args.readings, args.rounds)
    config = parse_config(CONFIG).channels[0]
    stream = readings(n)
    rows = design_rows(config, stream)
    first: dict[int, float] = {}
    epochs = [first.setdefault(i, sample.time) for i, sample in stream]
    sides: list[Callable[[], float]] = [
        lambda: time_channels(config, stream),
        lambda: time_updates(stream, rows, epochs),
        lambda: time_textbook(stream, rows),
    ]
    interleaved(1, sides)  # warm-up: imports, caches, allocator
    micro = interleaved(rounds, sides) / n * 1e6
    print(f"machine: {machine()}, OPENBLAS_NUM_THREADS={os.environ['OPENBLAS_NUM_THREADS']}")
    print(f"{n} readings over {CHANNELS} channels at p = 6, {rounds} interleaved rounds")
    print(f"  {'':27} {'µs/reading best':>15} {'median':>7}")
    names = ["Channel.process", "RecursiveEstimator.update", "textbook RLS update"]
    for index, name in enumerate(names):
        print(f"  {name:27} {micro[:, index].min():>15.1f} {np.median(micro[:, index]):>7.1f}")
    for index, name in ((1, "update"), (2, "textbook")):
        best = micro[:, 0].min() / micro[:, index].min()
        median = float(np.median(micro[:, 0] / micro[:, index]))
        print(
            f"  channel / {name:9} ratio of bests {best:5.2f}, median of round ratios {median:5.2f}"
        )
    if args.profile:
        profile = cProfile.Profile()
        profile.runcall(time_channels, config, stream)
        pstats.Stats(profile).sort_stats("tottime").print_stats(25)


if __name__ == "__main__":
    main()
