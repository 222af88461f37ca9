"""StatusSource implementations for the HTTP tests: a scripted fake and real channels.

`FakeSource` returns exactly what a test sets (readiness, statuses, metrics, failures), so
each endpoint's mapping can be checked value by value. `ChannelsSource` holds real
`zeroline.channel.Channel` objects fed with the simulated sensors of `zeroline.simulate`
(invented data of our own), the same way the daemon will: each processed reading goes into
the channel's `History` and the daemon-like counters, and `channel_status` builds the view.
"""

from __future__ import annotations

import math
import threading
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from zeroline import simulate
from zeroline.channel import Channel, Corrected, Sample
from zeroline.config import parse_config
from zeroline.metrics import channel_gauges
from zeroline.status import ChannelStatus, History, Metric, channel_status

EXAMPLES = Path(__file__).resolve().parents[2] / "config" / "examples"


def make_status(name: str, **overrides: Any) -> ChannelStatus:
    """A hand-written ChannelStatus with plausible values; `overrides` replace fields."""
    recent = tuple(
        {
            "time": 1_800_000_000.0 + 600.0 * i,
            "raw": 20.0 + 0.1 * i,
            "corrected": 20.0,
            "baseline": 0.1 * i,
            "uncertainty": 0.05,
        }
        for i in range(10)
    )
    values: dict[str, Any] = {
        "name": name,
        "topic": f"site/{name}/raw",
        "learn_mode": "all",
        "terms": ("1", "t/30d"),
        "coefficients": (0.5, 1.25),
        "coefficient_uncertainties": (0.01, 0.02),
        "last_time": recent[-1]["time"],
        "raw": recent[-1]["raw"],
        "corrected": 20.0,
        "baseline": 0.9,
        "uncertainty": 0.05,
        "drift_rate": 0.1 / 600.0,
        "drift": 0.8,
        "quality": "ok",
        "quality_code": 1,
        "flags": (),
        "drift_limit": 5.0,
        "rate_limit": 2.0 / 86400.0,
        "active_alerts": (),
        "recent": recent,
    }
    values.update(overrides)
    return ChannelStatus(**values)


@dataclass
class FakeSource:
    """A StatusSource whose every answer is set by the test."""

    statuses: dict[str, ChannelStatus] = field(default_factory=dict)
    ready: bool = True
    extra_metrics: list[Metric] = field(default_factory=list)
    fail_channels: bool = False
    calls: int = 0

    def health(self) -> dict[str, Any]:
        return {"uptime_s": 12.5}

    def readiness(self) -> tuple[bool, dict[str, Any]]:
        return self.ready, {"broker": "connected" if self.ready else "connecting"}

    def channel_names(self) -> Sequence[str]:
        return list(self.statuses)

    def channel_status(self, name: str) -> ChannelStatus | None:
        self.calls += 1
        if self.fail_channels:
            raise RuntimeError("simulated bug in the daemon's status view")
        return self.statuses.get(name)

    def metrics(self) -> Sequence[Metric]:
        gauges = [m for s in self.statuses.values() for m in channel_gauges(s)]
        return [*self.extra_metrics, *gauges]


@dataclass
class _Fed:
    channel: Channel
    history: History
    last: Corrected | None = None


class ChannelsSource:
    """Real channels from the example configs, fed simulated readings (thread-safe)."""

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self._fed: dict[str, _Fed] = {}
        self.readings_in = 0
        self.readings_out = 0
        self.alert_events = 0
        self.decode_errors: dict[str, int] = {"not_json": 0, "missing_value": 0}

    def add(
        self, config_file: str, name: str | None = None, edit: tuple[str, str] = ("", "")
    ) -> Channel:
        """A channel from an example config's first channel; `edit` replaces text in it."""
        text = (EXAMPLES / config_file).read_text()
        if edit[0]:
            assert edit[0] in text, f"{config_file} no longer contains {edit[0]!r}"
            text = text.replace(*edit)
        channel = Channel(parse_config(text, config_file).channels[0], name=name)
        self._fed[channel.name] = _Fed(channel, History())
        return channel

    def feed(
        self,
        name: str,
        data: Mapping[str, np.ndarray],
        *,
        inputs: tuple[str, ...] = (),
        fields: tuple[str, ...] = (),
    ) -> None:
        """Process every row of `data` (time, value, inputs) through channel `name`."""
        fed = self._fed[name]
        for i, time in enumerate(data["time"]):
            with self._lock:
                for input_name in inputs:
                    value = float(data[input_name][i])
                    if not math.isnan(value):
                        fed.channel.set_input(input_name, float(time), value)
                payload = {f: float(data[f][i]) for f in fields if not math.isnan(data[f][i])}
                result, events = fed.channel.process(
                    Sample(float(time), float(data["value"][i]), payload)
                )
                fed.history.add(result)
                fed.last = result
                self.readings_in += 1
                self.readings_out += result.corrected is not None
                self.alert_events += len(events)

    def health(self) -> dict[str, Any]:
        return {"channels": len(self._fed)}

    def readiness(self) -> tuple[bool, dict[str, Any]]:
        return True, {"broker": "connected", "state": "loaded"}

    def channel_names(self) -> Sequence[str]:
        return list(self._fed)

    def channel_status(self, name: str) -> ChannelStatus | None:
        with self._lock:
            fed = self._fed.get(name)
            return channel_status(fed.channel, fed.last, fed.history) if fed else None

    def metrics(self) -> Sequence[Metric]:
        with self._lock:
            counters = [
                Metric(
                    "zeroline_readings_in_total", "Readings received.", "counter", self.readings_in
                ),
                Metric(
                    "zeroline_readings_out_total",
                    "Corrected readings published.",
                    "counter",
                    self.readings_out,
                ),
                Metric(
                    "zeroline_alert_events_total",
                    "Alert raise/clear events.",
                    "counter",
                    self.alert_events,
                ),
                Metric("zeroline_queue_depth", "Readings waiting for the worker.", "gauge", 0),
                Metric("zeroline_spool_bytes", "Size of the TSDB spool on disk.", "gauge", 0),
            ]
            counters += [
                Metric(
                    "zeroline_decode_errors_total",
                    "Payloads that failed to decode.",
                    "counter",
                    n,
                    {"reason": reason},
                )
                for reason, n in self.decode_errors.items()
            ]
        statuses = [self.channel_status(name) for name in self.channel_names()]
        return counters + [m for s in statuses if s is not None for m in channel_gauges(s)]


def demo_gateway(days: float = 15.0) -> ChannelsSource:
    """Three simulated field sensors run through the example configs for `days` days.

    The load cell runs against a deliberately tight drift limit (example config, limit
    tightened here) so that the page and /metrics have a raised alert to show.
    """
    source = ChannelsSource()
    cell = source.add("load_cell.yaml", edit=("drift_limit: 25", "drift_limit: 2"))
    source.add("no2_station.yaml", name="north-no2")
    source.add("ph_river.yaml")
    source.feed(cell.name, simulate.load_cell(days=days), inputs=("temperature",))
    source.feed("north-no2", simulate.no2_station(days=days), inputs=("temperature", "reference"))
    source.feed(
        "river-ph", simulate.ph_river(days=days), inputs=("temperature",), fields=("check_value",)
    )
    return source
