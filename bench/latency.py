"""Latency from publish to corrected publish at a steady rate, zeroline and the naive relay.

`PYTHONPATH=daemon python bench/latency.py [--channels 1000] [--rate 1000] [--seconds 20]
[--inflight 100]`

One private Mosquitto; the relay (from `throughput.py`) and then the daemon, each after a
warm-up of one reading per channel. A paced paho publisher sends `rate` readings/s round
robin over the channels (QoS 1); a paho subscriber in the same process notes when each
output arrives, so latency = arrival - publish call on one clock (perf_counter), and it
includes both broker hops. Readings of the first second are left out (start-up transient).

The daemon acknowledges a reading only after its journal's fsync, so a disk whose fsync
now and then takes a few hundred milliseconds (virtual disks, SD cards) holds the broker
back once `broker.inflight` readings wait (`--inflight`, the daemon's default 100): at 1,000
readings/s a stall beyond 100 ms shows in the daemon's p99, not the relay's (it
acknowledges at once). So the script first times 300 fsyncs of small appends in the
directory the daemon's state goes to, and prints their p50/p99/max beside the latencies.
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from typing import Any

import numpy as np

from common import (
    Counter,
    Daemon,
    Publisher,
    machine,
    payload,
    start_broker,
    table,
    temporary_directory,
    wait_until,
    write_config,
)
from throughput import Relay

SKIP_S = 1.0
FSYNC_PROBES = 300


def fsync_ms(directory: str) -> tuple[float, float, float]:
    """p50, p99 and max of `FSYNC_PROBES` fsyncs of 2 KB appends in `directory`, ms (5 ms
    apart, as a journal's batches come)."""
    times = []
    with tempfile.NamedTemporaryFile(dir=directory) as handle:
        for _ in range(FSYNC_PROBES):
            handle.write(b"x" * 2048)
            handle.flush()
            began = time.perf_counter()
            os.fsync(handle.fileno())
            times.append(1e3 * (time.perf_counter() - began))
            time.sleep(0.005)
    values = np.array(times)
    return (
        float(np.percentile(values, 50)),
        float(np.percentile(values, 99)),
        float(values.max()),
    )


def measure(port: int, side: str, index: int, args: argparse.Namespace) -> dict[str, float]:
    root = f"lat{index}"
    sites = [f"l{index}s{j}" for j in range(args.channels)]
    if side == "relay":
        out_filter, suffix = f"relay-{root}/+/out", ""
        process: Any = Relay(port, root)
    else:
        out_filter, suffix = "zeroline/+/corrected", "-gas"
        directory = temporary_directory("zl-bench-lat-")
        process = Daemon(
            write_config(
                directory,
                port,
                topic=f"{root}/+/gas",
                client_id=f"zl-lat-{index}",
                inflight=args.inflight,
            )
        )
        process.start()
    counter = Counter(port, out_filter)
    publisher = Publisher(port)
    start = time.time() - 86400.0 * 2
    sent: dict[tuple[str, float], float] = {}
    try:
        for j, site in enumerate(sites):
            publisher.publish(f"{root}/{site}/gas", payload(start, j))
        wait_until(lambda: counter.count >= len(sites), 60)
        total = int(args.rate * args.seconds)
        began = time.perf_counter()
        for k in range(total):
            due = began + k / args.rate
            delay = due - time.perf_counter()
            if delay > 0:
                time.sleep(delay)
            j = k % len(sites)
            t = start + 60.0 * (1 + k // len(sites))
            sent[(sites[j] + suffix, t)] = time.perf_counter()
            publisher.publish(f"{root}/{sites[j]}/gas", payload(t, k))
        achieved = total / (time.perf_counter() - began)
        wait_until(lambda: counter.count >= len(sites) + total, 60)
    finally:
        publisher.stop()
        counter.stop()
        process.stop()
    latencies = [
        (counter.arrivals[key] - at) * 1e3
        for key, at in sent.items()
        if key in counter.arrivals and at - began >= SKIP_S
    ]
    lost = sum(1 for key in sent if key not in counter.arrivals)
    values = np.array(latencies)
    return {
        "rate": achieved,
        "p50": float(np.percentile(values, 50)),
        "p90": float(np.percentile(values, 90)),
        "p99": float(np.percentile(values, 99)),
        "max": float(values.max()),
        "lost": lost,
    }


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--channels", type=int, default=1000)
    parser.add_argument("--rate", type=float, default=1000.0)
    parser.add_argument("--seconds", type=float, default=20.0)
    parser.add_argument("--inflight", type=int, default=100, help="the daemon's broker.inflight")
    args = parser.parse_args()
    print(machine())
    disk = fsync_ms(tempfile.gettempdir())
    broker = start_broker()
    rows = []
    try:
        for index, side in enumerate(("relay", "zeroline"), start=1):
            r = measure(broker.port, side, index, args)
            rows.append(
                [
                    side,
                    f"{r['rate']:,.0f}",
                    f"{r['p50']:.2f}",
                    f"{r['p90']:.2f}",
                    f"{r['p99']:.2f}",
                    f"{r['max']:.1f}",
                    f"{r['lost']:.0f}",
                ]
            )
            print(f"{side}: {r}", flush=True)
    finally:
        broker.cleanup()
    print(
        f"\n{args.channels} channels at p = 6, {args.rate:.0f} readings/s for "
        f"{args.seconds:.0f} s, QoS 1, publish -> output (ms; first {SKIP_S:.0f} s left out), "
        f"daemon broker.inflight {args.inflight}"
    )
    print(table(["side", "achieved/s", "p50 ms", "p90 ms", "p99 ms", "max ms", "lost"], rows))
    print("target: zeroline p99 <= 5 ms")
    print(
        f"fsync of the state directory's disk ({tempfile.gettempdir()}), {FSYNC_PROBES} "
        f"appends: p50 {disk[0]:.2f} ms, p99 {disk[1]:.2f} ms, max {disk[2]:.1f} ms"
    )
    print(machine())
    return 0


if __name__ == "__main__":
    sys.exit(main())
