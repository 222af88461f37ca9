"""Shared pieces of the end-to-end benchmarks: a private Mosquitto, the daemon as a
subprocess, a fast QoS 1 publisher, a counting subscriber, RSS and machine facts.

Everything binds to 127.0.0.1 on a free port and is stopped by the script that started it.
The broker helper is the test suite's (`tests/support/broker.py`), imported by path so the
benchmarks and the integration tests start Mosquitto the same way (`max_queued_messages 0`,
which lossless QoS 1 needs: see deploy/mosquitto-notes.md).

A channel at p = 6 is `constant + (t/30d, (t/30d)^2) + daily sin/cos + (T - 20)` with the
temperature as a field of the reading's own JSON payload.
"""

from __future__ import annotations

import json
import os
import platform
import shutil
import subprocess
import sys
import tempfile
import threading
import time
from collections.abc import Callable, Iterable
from pathlib import Path
from typing import Any

import paho.mqtt.client as mqtt
from paho.mqtt.enums import CallbackAPIVersion

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "tests"))
sys.path.insert(0, str(ROOT / "daemon"))

# tests/support has no py.typed marker: its helpers are typed but not a package for mypy
from support.broker import Mosquitto, free_port, wait_until  # type: ignore[import-untyped]  # noqa: E402

__all__ = [
    "BASIS_P6",
    "ROOT",
    "Counter",
    "Daemon",
    "Mosquitto",
    "Publisher",
    "cpu_seconds",
    "free_port",
    "machine",
    "payload",
    "rss_kib",
    "start_broker",
    "wait_until",
    "write_config",
]

BASIS_P6 = (
    "[constant, {polynomial: {of: t, degree: 2, scale: 30d}}, "
    "{periodic: {of: t, period: 24h}}, {polynomial: {of: temperature, degree: 1, center: 20}}]"
)


def start_broker(*, persistent: bool = False, inflight: int = 1000) -> Mosquitto:
    """A private Mosquitto. With `persistent`, sessions survive a clean restart (saved at
    shutdown) without the test suite's save-on-every-change, which caps throughput."""
    executable = shutil.which("mosquitto") or "/usr/sbin/mosquitto"
    broker = Mosquitto(executable, persistent=persistent, max_inflight=inflight)
    if persistent:
        text = broker.config_path.read_text()
        text = text.replace("autosave_on_changes true\n", "").replace(
            "autosave_interval 1", "autosave_interval 600"
        )
        broker.config_path.write_text(text)
    broker.start()
    return broker


def write_config(
    directory: Path,
    port: int,
    *,
    topic: str = "site/+/gas",
    client_id: str = "zl-bench",
    inflight: int = 100,
    queue: int | None = None,
    snapshot_every: str = "60s",
    resident: int | None = None,
) -> Path:
    """A daemon config with one wildcard template: one channel per site at p = 6
    (`resident`, `queue`: limits.resident_channels and limits.queue, the daemon's defaults
    if None)."""
    path = directory / "zeroline.yaml"
    bound = "" if resident is None else f", resident_channels: {resident}"
    bound += "" if queue is None else f", queue: {queue}"
    path.write_text(f"""
broker:
  host: 127.0.0.1
  port: {port}
  client_id: {client_id}
  inflight: {inflight}
state: {{dir: {directory / "state"}, snapshot_every: {snapshot_every}}}
http: {{listen: "127.0.0.1:0"}}
limits: {{max_channels: 20000{bound}}}
logging: {{level: info}}
channels:
  - name: "{{1}}-gas"
    topic: {topic}
    basis: {BASIS_P6}
    inputs: {{temperature: {{field: temperature}}}}
""")
    return path


def payload(time_s: float, index: int) -> bytes:
    """One invented reading: slow drift, a temperature effect, a little deterministic wiggle."""
    temperature = 20.0 + 5.0 * ((index * 7919) % 100) / 100.0
    value = 1.5 + 2e-7 * (time_s % 1e6) + 0.03 * (temperature - 20.0) + 0.01 * ((index % 13) - 6)
    return json.dumps({"time": time_s, "value": value, "temperature": temperature}).encode()


class Daemon:
    """`python -m zeroline.cli run -c CONFIG` with its log in a file next to the config."""

    def __init__(self, config: Path) -> None:
        self.config = config
        self.log = config.parent / "daemon.log"
        self.process: subprocess.Popen[bytes] | None = None

    def start(self, extra_args: Iterable[str] = ()) -> None:
        env = {**os.environ, "PYTHONPATH": str(ROOT / "daemon")}
        with open(self.log, "ab") as log:
            self.process = subprocess.Popen(
                [*extra_args, sys.executable, "-m", "zeroline.cli", "run", "-c", str(self.config)],
                stdout=log,
                stderr=log,
                env=env,
            )
        if not wait_until(lambda: "connected to the broker" in self.log.read_text(), 30):
            raise RuntimeError(f"daemon did not connect: {self.log.read_text()[-2000:]}")

    @property
    def pid(self) -> int:
        assert self.process is not None
        return self.process.pid

    def stop(self) -> int:
        if self.process is None:
            return 0
        if self.process.poll() is None:
            self.process.terminate()
        try:
            return self.process.wait(60)
        except subprocess.TimeoutExpired:
            self.process.kill()
            return self.process.wait(10)


class Counter:
    """A paho subscriber that counts messages per topic filter and keeps arrival times of
    each (topic, payload time) for latency. Persistent session when `client_id` is given."""

    def __init__(self, port: int, topic: str, *, client_id: str | None = None) -> None:
        self.count = 0
        self.keys: set[tuple[str, float]] = set()
        self.arrivals: dict[tuple[str, float], float] = {}
        self.last_arrival = 0.0
        self.payloads: dict[str, Any] = {}
        self.lock = threading.Lock()
        self._subscribed = threading.Event()
        persistent = client_id is not None
        self.client = mqtt.Client(
            CallbackAPIVersion.VERSION2,
            client_id=client_id or "",
            clean_session=not persistent,
        )
        self.client.max_inflight_messages_set(1000)
        self.topic = topic
        self.client.on_connect = self._on_connect
        self.client.on_subscribe = lambda *a: self._subscribed.set()
        self.client.on_message = self._on_message
        self.client.reconnect_delay_set(1, 2)
        self.client.connect("127.0.0.1", port)
        self.client.loop_start()
        if not self._subscribed.wait(10):
            raise RuntimeError("counter did not subscribe")

    def _on_connect(self, client: mqtt.Client, *args: Any) -> None:
        client.subscribe(self.topic, qos=1)

    def _on_message(self, client: mqtt.Client, userdata: Any, message: mqtt.MQTTMessage) -> None:
        now = time.perf_counter()
        with self.lock:
            self.count += 1
            self.last_arrival = now
            if message.retain:
                self.payloads[message.topic] = message.payload
                return
            key = (message.topic.split("/")[1], json.loads(message.payload)["time"])
            self.keys.add(key)
            self.arrivals.setdefault(key, now)

    def stop(self) -> None:
        self.client.loop_stop()
        self.client.disconnect()


class Publisher:
    """One paho client publishing at QoS 1 with a wide in-flight window; `sent` records the
    perf_counter time of each (site, time) for latency."""

    def __init__(self, port: int, *, client_id: str = "", inflight: int = 1000) -> None:
        self.client = mqtt.Client(
            CallbackAPIVersion.VERSION2, client_id=client_id, clean_session=not client_id
        )
        self.client.max_inflight_messages_set(inflight)
        self.client.max_queued_messages_set(0)
        self.client.reconnect_delay_set(1, 2)
        self.acked = 0
        self.client.on_publish = self._on_publish
        connected = threading.Event()
        self.client.on_connect = lambda *a: connected.set()
        self.client.connect("127.0.0.1", port)
        self.client.loop_start()
        if not connected.wait(10):
            raise RuntimeError("publisher did not connect")

    def _on_publish(self, *args: Any) -> None:
        self.acked += 1

    def publish(self, topic: str, data: bytes) -> None:
        self.client.publish(topic, data, qos=1)

    def wait_acked(self, count: int, timeout: float) -> bool:
        return bool(wait_until(lambda: self.acked >= count, timeout, 0.005))

    def stop(self) -> None:
        self.client.loop_stop()
        self.client.disconnect()


def rss_kib(pid: int) -> int:
    """VmRSS of a process, KiB (from /proc/PID/status)."""
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1])
    raise RuntimeError(f"no VmRSS for {pid}")


def cpu_seconds(pid: int) -> float:
    """User + system CPU time of a process so far (from /proc/PID/stat), seconds."""
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def machine() -> str:
    """nproc, CPU model, Python version and the load average, for the results file."""
    model = "unknown"
    for line in Path("/proc/cpuinfo").read_text().splitlines():
        if line.startswith("model name"):
            model = line.split(":", 1)[1].strip()
            break
    load = " ".join(f"{x:.2f}" for x in os.getloadavg())
    return (
        f"nproc={os.cpu_count()}, CPU {model!r}, Python {platform.python_version()}, "
        f"load average {load}"
    )


def temporary_directory(prefix: str) -> Path:
    return Path(tempfile.mkdtemp(prefix=prefix))


def table(headers: list[str], rows: list[list[Any]]) -> str:
    """A plain Markdown table (what RESULTS.md takes as is)."""
    text = [[str(c) for c in row] for row in rows]
    widths = [max(len(h), *(len(r[i]) for r in text)) for i, h in enumerate(headers)]
    line: Callable[[list[str]], str] = lambda cells: (  # noqa: E731
        "| " + " | ".join(c.ljust(w) for c, w in zip(cells, widths, strict=True)) + " |"
    )
    return "\n".join(
        [line(headers), "|" + "|".join("-" * (w + 2) for w in widths) + "|", *map(line, text)]
    )
