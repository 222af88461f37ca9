"""Resident set size of the daemon with many channels at p = 6, against the same daemon idle.

`PYTHONPATH=daemon python bench/memory.py [--channels 10000] [--readings 2]`

One private Mosquitto; two daemons in turn, each with a fresh topic root:

1. with the default `limits.resident_channels` (2,000): beyond it the least recently used
   channels are kept as packed rows (`zeroline.router.ChannelTable`);
2. with a tight bound (`--tight`, 500), what a gateway short of memory can set: every
   reading of a parked channel then pays its unpacking (~120 µs) in CPU;
3. with every channel resident (`resident_channels` = the channel count), for comparison;
4. with the default bound and only as many channels as it holds (all resident).

From 1, 3 and 4 a capacity model for planning: what each parked channel adds (1 minus 4,
over the channels beyond the bound) and what each resident one adds on top (3 minus 1,
over the same channels), so RSS ≈ idle + parked × that + resident × the sum.

VmRSS (/proc/PID/status) is read once the daemon is connected and idle with 0 channels (the
interpreter, numpy, scipy, paho and zeroline: the baseline), then after `readings` readings
per channel have all come out corrected (warm-up: every channel created, its estimator and
alert state in use) and a pause. "Per channel" is the difference over the channel count.
"""

from __future__ import annotations

import argparse
import sys
import time
from dataclasses import dataclass

from common import (
    Counter,
    Daemon,
    Mosquitto,
    Publisher,
    machine,
    payload,
    rss_kib,
    start_broker,
    table,
    temporary_directory,
    wait_until,
    write_config,
)
from zeroline.config import LIMIT_KEYS

SETTLE_S = 3.0


@dataclass
class Measured:
    idle_kib: int
    loaded_kib: int
    warm_s: float


def measure(broker: Mosquitto, channels: int, readings: int, resident: int | None) -> Measured:
    directory = temporary_directory("zl-bench-mem-")
    tag = f"r{resident or 0}"
    config = write_config(
        directory, broker.port, topic=f"{tag}/+/gas", client_id=f"zl-mem-{tag}", resident=resident
    )
    daemon = Daemon(config)
    counter = publisher = None
    try:
        daemon.start()
        time.sleep(SETTLE_S)
        idle = rss_kib(daemon.pid)
        counter = Counter(broker.port, "zeroline/+/corrected")
        publisher = Publisher(broker.port)
        start = time.time() - 86400.0 * 2
        total = channels * readings
        began = time.perf_counter()
        for i in range(readings):
            for j in range(channels):
                publisher.publish(f"{tag}/m{j}/gas", payload(start + 60.0 * i, j + i))
        if not wait_until(lambda: counter is not None and counter.count >= total, 600):
            raise RuntimeError(f"only {counter.count} of {total} outputs")
        warm_s = time.perf_counter() - began
        time.sleep(SETTLE_S)
        return Measured(idle, rss_kib(daemon.pid), warm_s)
    finally:
        if publisher is not None:
            publisher.stop()
        if counter is not None:
            counter.stop()
        daemon.stop()


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--channels", type=int, default=10000)
    parser.add_argument("--readings", type=int, default=2)
    parser.add_argument("--tight", type=int, default=500, help="the tight resident bound")
    args = parser.parse_args()
    default = int(next(key.default for key in LIMIT_KEYS if key.name == "resident_channels"))
    if args.channels <= default:
        parser.error(f"--channels must exceed the default resident bound ({default:,})")
    print(machine())
    broker = start_broker()
    try:
        runs = [
            measure(broker, args.channels, args.readings, resident)
            for resident in (None, args.tight, args.channels)
        ]
        within_bound = measure(broker, default, args.readings, None)
    finally:
        broker.cleanup()
    print(f"\nVmRSS, {args.channels} channels at p = 6, {args.readings} readings each")
    rows = []
    labels = (
        f"default resident bound ({default:,})",
        f"resident_channels: {args.tight:,}",
        "all resident",
    )
    for label, m in zip(labels, runs, strict=True):
        per_channel = (m.loaded_kib - m.idle_kib) * 1024 / args.channels
        rows.append(
            [
                label,
                f"{m.idle_kib / 1024:.1f}",
                f"{m.loaded_kib / 1024:.1f}",
                f"{per_channel:,.0f}",
                f"{m.warm_s:.1f}",
            ]
        )
    print(
        table(
            ["daemon", "idle MiB", f"{args.channels} ch MiB", "bytes/ch", "warm-up s"],
            rows,
        )
    )
    print("targets: <= 1 KB (1,024 bytes) per channel, <= 80 MB total")
    beyond = args.channels - default
    parked = (runs[0].loaded_kib - within_bound.loaded_kib) * 1024 / beyond
    resident = (runs[2].loaded_kib - runs[0].loaded_kib) * 1024 / beyond
    print(
        f"capacity model: {default:,} channels, all resident: "
        f"{within_bound.loaded_kib / 1024:.1f} MiB (idle {within_bound.idle_kib / 1024:.1f}); "
        f"each channel beyond the bound, parked: +{parked:,.0f} B; "
        f"resident instead: +{resident:,.0f} B more"
    )
    print(machine())
    return 0


if __name__ == "__main__":
    sys.exit(main())
