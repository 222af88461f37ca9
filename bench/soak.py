"""Soak: a steady stream through the daemon with periodic broker restarts, watched over time.

`PYTHONPATH=daemon python bench/soak.py [--minutes 2] [--rate 1000] [--channels 1000]
[--restart-every 60] [--report-every 30]`

One private Mosquitto with persistence (sessions and queued messages survive a clean
restart: SIGTERM saves them), the daemon with one wildcard template (`channels` channels at
p = 6), a paced paho publisher (QoS 1, persistent session, so what was in flight when the
broker went away is sent again) and paho subscribers with persistent sessions for the
corrected outputs, the retained `zeroline/stats` and the alerts. Every `restart_every`
seconds the broker is stopped and started again on the same port.

Every `report_every` seconds one row: daemon VmRSS, readings published and acknowledged,
distinct corrected outputs, backlog (published - distinct outputs), duplicate outputs
(at-least-once after restarts), the daemon's own counters from `zeroline/stats`
(received, processed, skipped as not newer, errors, queue) and distinct alert messages
so far (retained alerts come again after each resubscription: counted once). At
the end, after a drain of up to 60 s, the readings never corrected are the loss.
"""

from __future__ import annotations

import argparse
import json
import sys
import threading
import time
from typing import Any

import paho.mqtt.client as mqtt
from paho.mqtt.enums import CallbackAPIVersion

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

DRAIN_S = 60.0


class Watcher:
    """Latest retained `zeroline/stats` and the distinct alert messages (persistent session)."""

    def __init__(self, port: int) -> None:
        self.stats: dict[str, Any] = {}
        self.alert_messages: set[tuple[str, bytes]] = set()
        self._lock = threading.Lock()
        self.client = mqtt.Client(
            CallbackAPIVersion.VERSION2, client_id="zl-soak-watch", clean_session=False
        )
        self.client.on_connect = lambda c, *a: c.subscribe(
            [("zeroline/stats", 1), ("zeroline/+/alert", 1)]
        )
        self.client.on_message = self._on_message
        self.client.reconnect_delay_set(1, 2)
        self.client.connect("127.0.0.1", port)
        self.client.loop_start()

    def _on_message(self, client: mqtt.Client, userdata: Any, message: mqtt.MQTTMessage) -> None:
        with self._lock:
            if message.topic == "zeroline/stats":
                self.stats = json.loads(message.payload)
            elif message.payload:  # distinct: a resubscription resends the retained ones
                self.alert_messages.add((message.topic, bytes(message.payload)))

    @property
    def alerts(self) -> int:
        with self._lock:
            return len(self.alert_messages)

    def alerts_by_rule(self) -> dict[str, int]:
        """Distinct alert events per "rule state" (what the alert count is made of)."""
        tally: dict[str, int] = {}
        with self._lock:
            for _, payload in self.alert_messages:
                event = json.loads(payload)
                key = f"{event.get('rule')} {event.get('state')}"
                tally[key] = tally.get(key, 0) + 1
        return dict(sorted(tally.items()))

    def stop(self) -> None:
        self.client.loop_stop()
        self.client.disconnect()


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--minutes", type=float, default=2.0)
    parser.add_argument("--rate", type=float, default=1000.0)
    parser.add_argument("--channels", type=int, default=1000)
    parser.add_argument("--restart-every", type=float, default=60.0)
    parser.add_argument("--report-every", type=float, default=30.0)
    args = parser.parse_args()
    print(machine())
    broker = start_broker(persistent=True)
    directory = temporary_directory("zl-bench-soak-")
    daemon = Daemon(write_config(directory, broker.port, client_id="zl-soak", snapshot_every="30s"))
    daemon.start()
    counter = Counter(broker.port, "zeroline/+/corrected", client_id="zl-soak-count")
    watcher = Watcher(broker.port)
    publisher = Publisher(broker.port, client_id="zl-soak-pub")
    sites = [f"k{j}" for j in range(args.channels)]
    start = time.time() - 86400.0 * 2
    rows: list[list[Any]] = []
    restarts, published = 0, 0
    rss_start = rss_kib(daemon.pid)

    def report(elapsed: float) -> None:
        stats = dict(watcher.stats)
        distinct = len(counter.keys)
        errors = sum(v for k, v in stats.items() if k.startswith("errors") and "." not in k)
        row = [
            f"{elapsed:.0f}",
            f"{rss_kib(daemon.pid) / 1024:.1f}",
            published,
            publisher.acked,
            distinct,
            published - distinct,
            counter.count - distinct,
            stats.get("received", "-"),
            stats.get("processed", "-"),
            stats.get("skipped_not_newer", 0),
            errors,
            stats.get("queue", "-"),
            watcher.alerts,
            restarts,
        ]
        rows.append(row)
        print(" ".join(str(c) for c in row), flush=True)

    try:
        began = time.perf_counter()
        duration = args.minutes * 60.0
        next_restart, next_report = args.restart_every, args.report_every
        while (elapsed := time.perf_counter() - began) < duration:
            due = began + published / args.rate
            delay = due - time.perf_counter()
            if delay > 0:
                time.sleep(delay)
            j = published % len(sites)
            t = start + 60.0 * (published // len(sites))
            publisher.publish(f"site/{sites[j]}/gas", payload(t, published))
            published += 1
            if elapsed >= next_report:
                report(elapsed)
                next_report += args.report_every
            if elapsed >= next_restart:
                broker.stop()  # SIGTERM: Mosquitto saves sessions and queues
                broker.start()
                restarts += 1
                next_restart += args.restart_every
        wait_until(lambda: len(counter.keys) >= published, DRAIN_S, 0.1)
        time.sleep(2.0)  # a last stats message
        report(time.perf_counter() - began)
    finally:
        publisher.stop()
        counter.stop()
        watcher.stop()
        code = daemon.stop()
        broker.cleanup()
    lost = published - len(counter.keys)
    expected = {
        (f"{sites[i % len(sites)]}-gas", start + 60.0 * (i // len(sites))) for i in range(published)
    }
    missing = sorted(expected - set(counter.keys))
    if missing:  # which readings, and when they were published relative to the restarts
        when = [f"{n} at +{(t - start) / 60.0 * len(sites) / args.rate:.1f} s" for n, t in missing]
        print(f"readings never corrected: {', '.join(when[:10])}")
    print(
        f"\nsoak: {args.minutes:g} min at {args.rate:.0f} readings/s over {args.channels} "
        f"channels, broker restarted every {args.restart_every:.0f} s; daemon exit {code}"
    )
    print(
        table(
            [
                "s",
                "RSS MiB",
                "published",
                "acked",
                "outputs",
                "backlog",
                "dup outputs",
                "received",
                "processed",
                "skipped",
                "errors",
                "queue",
                "alerts",
                "restarts",
            ],
            rows,
        )
    )
    print(f"RSS at start {rss_start / 1024:.1f} MiB; readings never corrected: {lost}")
    print(f"distinct alert events by rule and state: {watcher.alerts_by_rule()}")
    print(machine())
    return 0


if __name__ == "__main__":
    sys.exit(main())
