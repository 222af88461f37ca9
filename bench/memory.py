"""Resident set size of the daemon with many channels at p = 6, against the same daemon idle.

`PYTHONPATH=daemon python bench/memory.py [--channels 10000] [--readings 2]`

One private Mosquitto and one daemon. VmRSS (/proc/PID/status) is read once the daemon is
connected and idle with 0 channels (the interpreter, numpy, paho and zeroline: the
baseline), then after `readings` readings per channel have all come out corrected (warm-up:
every channel created, its estimator and alert state in use) and a pause. "Per channel" is
the difference over the channel count.
"""

from __future__ import annotations

import argparse
import sys
import time

from common import (
    Counter,
    Daemon,
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

SETTLE_S = 3.0


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--channels", type=int, default=10000)
    parser.add_argument("--readings", type=int, default=2)
    args = parser.parse_args()
    print(machine())
    broker = start_broker()
    directory = temporary_directory("zl-bench-mem-")
    daemon = Daemon(write_config(directory, broker.port, client_id="zl-mem"))
    counter = publisher = None
    try:
        daemon.start()
        time.sleep(SETTLE_S)
        idle = rss_kib(daemon.pid)
        counter = Counter(broker.port, "zeroline/+/corrected")
        publisher = Publisher(broker.port)
        start = time.time() - 86400.0 * 2
        total = args.channels * args.readings
        began = time.perf_counter()
        for i in range(args.readings):
            for j in range(args.channels):
                publisher.publish(f"site/m{j}/gas", payload(start + 60.0 * i, j + i))
        if not wait_until(lambda: counter.count >= total, 600):
            raise RuntimeError(f"only {counter.count} of {total} outputs")
        warm_s = time.perf_counter() - began
        time.sleep(SETTLE_S)
        loaded = rss_kib(daemon.pid)
    finally:
        if publisher is not None:
            publisher.stop()
        if counter is not None:
            counter.stop()
        daemon.stop()
        broker.cleanup()
    per_channel = (loaded - idle) * 1024 / args.channels
    print(
        f"\nVmRSS of the daemon, {args.channels} channels at p = 6, {args.readings} readings "
        f"each (warm-up took {warm_s:.1f} s)"
    )
    print(
        table(
            ["state", "VmRSS MiB", "target"],
            [
                ["idle, 0 channels", f"{idle / 1024:.1f}", ""],
                [f"{args.channels} channels", f"{loaded / 1024:.1f}", "<= 80 MB total"],
                ["per channel", f"{per_channel:,.0f} bytes", "<= 1 KB (1,024 bytes)"],
            ],
        )
    )
    print(machine())
    return 0


if __name__ == "__main__":
    sys.exit(main())
