"""A real VictoriaMetrics for tests: own port on 127.0.0.1, own storage dir, SIGTERM on stop.

VictoriaMetrics accepts influxdb-client's `/api/v2/write`, names series
`<measurement>_<field>` with the tags as labels, and keeps time to the millisecond. It is
started without `-dedup.minScrapeInterval`, so a point written twice shows up twice in the
export: tests can see duplicates.
"""

from __future__ import annotations

import json
import signal
import socket
import subprocess
import time
import urllib.parse
import urllib.request
from dataclasses import dataclass
from pathlib import Path


def free_port() -> int:
    """A TCP port on 127.0.0.1 that nothing listens on right now."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind(("127.0.0.1", 0))
        port: int = probe.getsockname()[1]
        return port


@dataclass(frozen=True)
class Series:
    """One exported series: its name, labels, and (timestamp ms, value) samples."""

    name: str
    labels: dict[str, str]
    samples: list[tuple[int, float]]


class VictoriaMetrics:
    """Start, stop and query one VictoriaMetrics process."""

    def __init__(self, binary: str, storage: Path, port: int | None = None) -> None:
        self.binary = binary
        self.storage = storage
        self.port = port or free_port()
        self.log_path = storage.parent / f"victoria-{self.port}.log"
        self._process: subprocess.Popen[bytes] | None = None

    @property
    def url(self) -> str:
        return f"http://127.0.0.1:{self.port}"

    def start(self, timeout: float = 15.0) -> None:
        """Start the server and wait until /health says OK."""
        self.storage.mkdir(parents=True, exist_ok=True)
        log = open(self.log_path, "ab")  # noqa: SIM115  (owned by the child process)
        self._process = subprocess.Popen(
            [
                self.binary,
                f"-httpListenAddr=127.0.0.1:{self.port}",
                f"-storageDataPath={self.storage}",
                "-retentionPeriod=100y",
                "-search.latencyOffset=0s",
            ],
            stdout=log,
            stderr=subprocess.STDOUT,
        )
        log.close()
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if self._process.poll() is not None:
                raise RuntimeError(f"victoria-metrics exited: {self.log_tail()}")
            try:
                if self._get("/health").strip() == "OK":
                    return
            except OSError:
                pass
            time.sleep(0.05)
        raise RuntimeError(f"victoria-metrics not healthy after {timeout} s: {self.log_tail()}")

    def stop(self, timeout: float = 30.0) -> None:
        """SIGTERM (VictoriaMetrics flushes on it) and wait for the exit."""
        if self._process is None:
            return
        if self._process.poll() is None:
            self._process.send_signal(signal.SIGTERM)
            try:
                self._process.wait(timeout)
            except subprocess.TimeoutExpired:
                self._process.kill()
                self._process.wait()
        self._process = None

    @property
    def running(self) -> bool:
        return self._process is not None and self._process.poll() is None

    def force_flush(self) -> None:
        """Make recently written points searchable now instead of in ~10 s."""
        self._get("/internal/force_flush")

    def export(self, match: str) -> list[Series]:
        """Raw samples of every series matching the selector, e.g. '{__name__=~"m_.*"}'."""
        query = urllib.parse.urlencode({"match[]": match})
        text = self._get(f"/api/v1/export?{query}")
        result = []
        for line in text.splitlines():
            if not line.strip():
                continue
            record = json.loads(line)
            labels = dict(record["metric"])
            name = labels.pop("__name__")
            samples = sorted(zip(record["timestamps"], record["values"], strict=True))
            result.append(Series(name, labels, [(int(t), float(v)) for t, v in samples]))
        return sorted(result, key=lambda series: (series.name, sorted(series.labels.items())))

    def export_after_flush(
        self, match: str, settle_s: float = 1.0, timeout_s: float = 20.0
    ) -> list[Series]:
        """force_flush and export until two exports `settle_s` apart agree and are not empty:
        on a loaded machine the search index can take several seconds to show every series."""
        deadline = time.monotonic() + timeout_s
        previous: list[Series] | None = None
        while True:
            self.force_flush()
            time.sleep(settle_s)
            current = self.export(match)
            if current and current == previous:
                return current
            if time.monotonic() > deadline:
                return current
            previous = current

    def log_tail(self, chars: int = 2000) -> str:
        try:
            return self.log_path.read_text(errors="replace")[-chars:]
        except OSError:
            return "(no log)"

    def _get(self, path: str) -> str:
        with urllib.request.urlopen(self.url + path, timeout=10) as response:
            body: bytes = response.read()
            return body.decode("utf-8")
