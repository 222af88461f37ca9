"""End-to-end throughput at QoS 1: zeroline against a naive relay on the same broker.

`PYTHONPATH=daemon python bench/throughput.py [--channels 1000] [--per-channel 20]
[--rounds 2] [--profile DIR] [--inflight N] [--resident N]`

One private Mosquitto serves every round. Rounds interleave relay, daemon, relay, daemon
(these machines are noisy: the ratio is taken within the run). In each round, with a fresh
topic root and fresh site names so no round sees another's messages or sessions:

1. the side under test is started (the relay: `--relay` mode of this script, a separate
   process like the daemon: paho subscribe -> json.loads -> json.dumps -> publish, QoS 1,
   paho's defaults; zeroline: `python -m zeroline.cli run` with one wildcard template);
2. warm-up: one reading per channel, wait for every output (channels are created here);
3. timed: `channels * per_channel` readings from one paho publisher (QoS 1, 1,000 in
   flight), as fast as the broker acknowledges them; a paho subscriber counts the outputs.

The publisher and the counting subscriber run in two processes (this script and a child):
in one, their two paho loops shared one interpreter lock and that process, not the side
under test, set the pace (~500 µs of CPU a reading, ~2,000 readings/s on a slow 2-core
machine, measured with both sides within 10 % of each other's CPU).

`in/s` is readings over the time to the last PUBACK, `out/s` readings over the time from
the first publish to the last output; loss is readings minus distinct outputs.
`--profile DIR` runs the daemon rounds under `py-spy record -f raw` (collapsed stacks in DIR,
one line per stack and its sample count: `flamegraph.pl` draws them).
"""

from __future__ import annotations

import argparse
import json
import multiprocessing
import statistics
import subprocess
import sys
import time
from multiprocessing.connection import Connection
from pathlib import Path
from typing import Any

from common import (
    Counter,
    Daemon,
    Mosquitto,
    Publisher,
    cpu_seconds,
    machine,
    payload,
    start_broker,
    table,
    temporary_directory,
    wait_until,
    write_config,
)

DRAIN_TIMEOUT_S = 120.0


def relay_main(port: int, root: str) -> None:
    """The naive relay: no model, paho's defaults, decode and re-encode every reading."""
    import paho.mqtt.client as mqtt
    from paho.mqtt.enums import CallbackAPIVersion

    client = mqtt.Client(CallbackAPIVersion.VERSION2)

    def on_connect(c: mqtt.Client, *args: Any) -> None:
        c.subscribe(f"{root}/+/gas", qos=1)

    def on_message(c: mqtt.Client, userdata: Any, message: mqtt.MQTTMessage) -> None:
        data = json.loads(message.payload)
        site = message.topic.split("/")[1]
        c.publish(f"relay-{root}/{site}/out", json.dumps(data), qos=1)

    client.on_connect = on_connect
    client.on_message = on_message
    client.connect("127.0.0.1", port)
    print("relay ready", flush=True)
    client.loop_forever()


def counter_main(port: int, topic: str, link: Connection) -> None:
    """The counting subscriber, in a process of its own: answers every request on `link`
    with (outputs, distinct (site, time) keys, perf_counter of the last arrival)."""
    counter = Counter(port, topic)
    link.send("ready")
    while True:
        request = link.recv()
        with counter.lock:
            link.send((counter.count, len(counter.keys), counter.last_arrival))
        if request == "stop":
            counter.stop()
            return


class RemoteCounter:
    """`Counter` in a child process (see the module docstring); perf_counter is the
    system's monotonic clock, so its arrival times compare with this process's."""

    def __init__(self, port: int, topic: str) -> None:
        context = multiprocessing.get_context("spawn")  # no threads of this one forked
        self._link, child = context.Pipe()
        self._process = context.Process(target=counter_main, args=(port, topic, child))
        self._process.start()
        if not self._link.poll(30) or self._link.recv() != "ready":
            raise RuntimeError("the counter process did not subscribe")
        self.count, self.distinct, self.last_arrival = 0, 0, 0.0

    def refresh(self) -> int:
        self._ask("status")
        return int(self.count)

    def stop(self) -> None:
        self._ask("stop")
        self._process.join(10)

    def _ask(self, request: str) -> None:
        self._link.send(request)
        self.count, self.distinct, self.last_arrival = self._link.recv()


class Relay:
    def __init__(self, port: int, root: str) -> None:
        self.process = subprocess.Popen(
            [sys.executable, __file__, "--relay", str(port), root],
            stdout=subprocess.PIPE,
            text=True,
        )
        assert self.process.stdout is not None
        self.process.stdout.readline()
        time.sleep(0.3)  # let the SUBSCRIBE land

    @property
    def pid(self) -> int:
        return self.process.pid

    def stop(self) -> None:
        self.process.terminate()
        self.process.wait(10)


def run_round(
    broker: Mosquitto, side: str, index: int, args: argparse.Namespace
) -> dict[str, float]:
    root = f"site{index}"
    spy: subprocess.Popen[bytes] | None = None
    sites = [f"r{index}s{j}" for j in range(args.channels)]
    if side == "relay":
        out_filter = f"relay-{root}/+/out"
        process: Any = Relay(broker.port, root)
    else:
        out_filter = "zeroline/+/corrected"
        directory = temporary_directory("zl-bench-tp-")
        config = write_config(
            directory,
            broker.port,
            topic=f"{root}/+/gas",
            client_id=f"zl-bench-{index}",
            inflight=args.inflight,
            resident=args.resident,
        )
        process = Daemon(config)
        process.start()
        if args.profile:
            Path(args.profile).mkdir(parents=True, exist_ok=True)
            spy = subprocess.Popen(
                [
                    "py-spy",
                    "record",
                    "-r",
                    "100",
                    "-f",
                    "raw",
                    "--pid",
                    str(process.pid),
                    "-o",
                    f"{args.profile}/daemon-round{index}.txt",
                ],
                stdout=subprocess.DEVNULL,
                stderr=subprocess.DEVNULL,
            )
    counter = RemoteCounter(broker.port, out_filter)
    publisher = Publisher(broker.port)
    start = time.time() - 86400.0 * 2
    try:
        for j, site in enumerate(sites):  # warm-up: one reading per channel
            publisher.publish(f"{root}/{site}/gas", payload(start, j))
        if not wait_until(lambda: counter.refresh() >= len(sites), DRAIN_TIMEOUT_S):
            raise RuntimeError(f"{side}: warm-up got {counter.count} of {len(sites)} outputs")
        warm = counter.count
        total = args.channels * args.per_channel
        pid = process.pid
        cpu_began = cpu_seconds(pid)
        began = time.perf_counter()
        for i in range(1, args.per_channel + 1):
            t = start + 60.0 * i
            for j, site in enumerate(sites):
                publisher.publish(f"{root}/{site}/gas", payload(t, i * 7 + j))
        publisher.wait_acked(len(sites) + total, DRAIN_TIMEOUT_S)
        acked_at = time.perf_counter()
        wait_until(lambda: counter.refresh() >= warm + total, DRAIN_TIMEOUT_S, 0.005)
        cpu_used = cpu_seconds(pid) - cpu_began
        time.sleep(0.5)  # any late duplicates or extras
        counter.refresh()
        done = counter.last_arrival
    finally:
        publisher.stop()
        counter.stop()
        process.stop()
        if spy is not None:
            spy.wait(60)
    distinct = counter.distinct - len(sites)
    return {
        "in": total / (acked_at - began),
        "out": min(distinct, total) / (done - began),
        "lost": total - distinct,
        "extra": counter.count - warm - total - 0,
        "seconds": done - began,
        "cpu_us": 1e6 * cpu_used / total,
    }


def main() -> int:
    if len(sys.argv) == 4 and sys.argv[1] == "--relay":
        relay_main(int(sys.argv[2]), sys.argv[3])
        return 0
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--channels", type=int, default=1000)
    parser.add_argument("--per-channel", type=int, default=20)
    parser.add_argument("--rounds", type=int, default=2)
    parser.add_argument("--profile", metavar="DIR")
    parser.add_argument("--inflight", type=int, default=100, help="the daemon's broker.inflight")
    parser.add_argument(
        "--resident",
        type=int,
        help="the daemon's limits.resident_channels (default: its own); below --channels "
        "every reading of a round-robin unpacks its channel, the cost of a tight bound",
    )
    args = parser.parse_args()
    print(machine())
    broker = start_broker()
    results: dict[str, list[dict[str, float]]] = {"relay": [], "zeroline": []}
    try:
        index = 0
        for _ in range(args.rounds):
            for side in ("relay", "zeroline"):
                index += 1
                result = run_round(broker, side, index, args)
                results[side].append(result)
                print(
                    f"round {index} {side}: "
                    + ", ".join(f"{k}={v:.0f}" for k, v in result.items()),
                    flush=True,
                )
    finally:
        broker.cleanup()
    rows = []
    for side, runs in results.items():
        rows.append(
            [
                side,
                " / ".join(f"{r['in']:,.0f}" for r in runs),
                " / ".join(f"{r['out']:,.0f}" for r in runs),
                " / ".join(f"{r['lost']:.0f}" for r in runs),
                " / ".join(f"{r['cpu_us']:.0f}" for r in runs),
            ]
        )
    ratios = [
        z["out"] / r["out"] for r, z in zip(results["relay"], results["zeroline"], strict=True)
    ]
    print(
        f"\n{args.channels} channels at p = 6, {args.per_channel} readings each per round, "
        f"QoS 1, {args.rounds} interleaved rounds"
    )
    headers = ["side", "in/s per round", "out/s per round", "lost per round", "CPU µs/reading"]
    print(table(headers, rows))
    print(
        f"zeroline / relay out/s per round: {', '.join(f'{x:.2f}' for x in ratios)} "
        f"(median {statistics.median(ratios):.2f}; target >= 1.0 with zero loss)"
    )
    print(machine())
    return 0


if __name__ == "__main__":
    sys.exit(main())
