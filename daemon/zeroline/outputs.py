"""The daemon's extra outputs: the time-series database and the status page's view.

Both are `service.OutputSink`s, called on the worker thread for every live corrected
reading and alert event:

- `TimeseriesOutput` turns them into points of the documented schema (`zeroline.tsdb`) and
  hands them to the spooled sink; its `commit()` flushes the spool to disk, and the service
  calls it before acknowledging the messages, so a point is on disk before its reading is
  acknowledged: nothing is lost while the database is away, or across a daemon crash.
- `StatusBoard` keeps each channel's last result and a short history for the status page,
  and implements `status.StatusSource` for the HTTP layer (health, readiness, channel views,
  metrics). The HTTP threads read it under a lock; channel models are read without stopping
  the worker, so one page may mix two consecutive readings' coefficients.
"""

from __future__ import annotations

import math
import threading
import time
from collections.abc import Callable, Iterable, Mapping, Sequence
from pathlib import Path
from typing import Any

from zeroline import tsdb
from zeroline.alerts import AlertEvent
from zeroline.channel import Channel, Corrected
from zeroline.config import Config
from zeroline.metrics import channel_gauges
from zeroline.status import (
    HISTORY_CHANNELS,
    ChannelStatus,
    History,
    LastResults,
    Metric,
    channel_status,
)

HEALTH_EVERY_S = 10.0
PRUNE_EVERY_S = 60.0


def timeseries_config(config: Config) -> tsdb.TimeseriesConfig | None:
    """The sink's settings from the `timeseries:` section, or None when there is none."""
    section = config.timeseries
    if section is None:
        return None
    token_file = section.get("token_file")
    token_env = section.get("token_env")
    return tsdb.TimeseriesConfig(
        url=str(section["url"]),
        org=str(section["org"]),
        bucket=str(section["bucket"]),
        spool_dir=Path(str(section["spool_dir"])),
        token_file=Path(str(token_file)) if token_file else None,
        token_env=str(token_env) if token_env else None,
        spool_max_bytes=int(section["spool_max_bytes"]),
        batch_size=int(section["batch_size"]),
        flush_interval_s=float(section["flush_every"]),
    )


class TimeseriesOutput:
    """Corrected readings and alert events as time-series points, through the spool."""

    def __init__(
        self, sink: tsdb.TimeseriesSink, client_id: str, counters: Callable[[], Mapping[str, int]]
    ) -> None:
        self.sink = sink
        self.client_id = client_id
        self._counters = counters
        self._last_health = 0.0

    def corrected(self, channel: Channel, result: Corrected) -> None:
        point = tsdb.reading_point(
            channel.name,
            _ns(result.time),
            raw=result.raw,
            corrected=result.corrected,
            baseline=result.baseline,
            uncertainty=result.uncertainty,
            drift_rate=result.drift_rate,
            quality=result.quality_code,
            labels=channel.config.labels,
        )
        self.sink.submit([point])

    def alert(self, channel: Channel, event: AlertEvent) -> None:
        point = tsdb.alert_point(
            channel.name,
            _ns(event.time),
            rule=event.rule,
            severity=event.severity,
            active=event.state == "raised",
            value=event.value,
            limit=event.limit,
            labels=channel.config.labels,
        )
        self.sink.submit([point])

    def commit(self) -> None:
        now = time.monotonic()
        if now - self._last_health >= HEALTH_EVERY_S:
            self._last_health = now
            counters: dict[str, float | int | None] = dict(self._counters())
            counters.update({f"tsdb_{k}": v for k, v in self.sink.stats().items()})
            self.sink.submit([tsdb.health_point(self.client_id, time.time_ns(), counters)])
        self.sink.flush()

    def close(self) -> None:
        self.sink.close()


def _ns(seconds: float) -> int:
    """Epoch seconds as integer nanoseconds, rounded to the microsecond.

    `seconds * 1e9` would be rounded to a double near 1.8e18, whose spacing is 256 ns, so
    an exact 12:00:00.125 could become ...124999936 ns and the database, which cuts to
    milliseconds, would store .124. A double epoch time carries only ~0.24 µs anyway, so
    the fraction is rounded to whole microseconds: a time written as a decimal millisecond
    ("…613.123") then lands exactly on that millisecond.

    >>> _ns(1_796_081_613.125), _ns(1_796_081_613.123)
    (1796081613125000000, 1796081613123000000)
    """
    whole = math.floor(seconds)
    micros = round((seconds - whole) * 1e6)  # the subtraction is exact
    return whole * 1_000_000_000 + micros * 1000


class StatusBoard:
    """Last results and history per channel, and the `StatusSource` the HTTP layer reads."""

    def __init__(
        self,
        names: Callable[[], Iterable[str]],
        lookup: Callable[[str], Channel | None],
        counters: Callable[[], Mapping[str, int]],
        ready: Callable[[], bool],
        extra: Callable[[], Mapping[str, float]] = dict,
        history_channels: int = HISTORY_CHANNELS,
    ) -> None:
        self._names = names
        self._history_channels = history_channels
        self._lookup = lookup
        self._counters = counters
        self._ready = ready
        self._extra = extra
        self._lock = threading.Lock()
        self._last = LastResults()  # numbers, not the Corrected objects: ~90 B a channel
        self._history: dict[str, History] = {}
        self._last_prune = -math.inf
        self._started = time.time()

    # --- OutputSink ---------------------------------------------------------------------

    def corrected(self, channel: Channel, result: Corrected) -> None:
        with self._lock:
            self._last.put(channel.name, result)
            history = self._history.get(channel.name)
            if history is None:  # not setdefault: that would build a History every call
                if len(self._history) >= self._history_channels and not self._pruned():
                    return  # no chart for this one (see zeroline.status)
                history = self._history[channel.name] = History()
            history.add(result)

    def _pruned(self) -> bool:
        """Drop the rings of channels that no longer exist (a reload removed them); True if
        that made room. At most once a minute: the full list of names costs a pass over
        every channel, and past the cap this is asked on every reading of an unkept one."""
        now = time.monotonic()
        if now - self._last_prune < PRUNE_EVERY_S:
            return False
        self._last_prune = now
        existing = set(self._names())
        for name in [n for n in self._history if n not in existing]:
            del self._history[name]
            self._last.discard(name)
        return len(self._history) < self._history_channels

    def alert(self, channel: Channel, event: AlertEvent) -> None:
        """Alert state is read from the channel itself (`alerts.active()`)."""

    def commit(self) -> None:
        """Nothing to make durable: the view is rebuilt from the model after a restart."""

    def close(self) -> None:
        """Nothing to release."""

    # --- StatusSource -------------------------------------------------------------------

    def health(self) -> dict[str, Any]:
        # No "status" key: the HTTP layer says {"status": "ok"} and a key here would override it.
        return {"uptime_s": round(time.time() - self._started, 3)}

    def readiness(self) -> tuple[bool, dict[str, Any]]:
        ready = self._ready()
        return ready, {"broker_connected": ready, "state_loaded": True}

    def channel_names(self) -> Sequence[str]:
        return sorted(set(self._names()))  # a channel being unparked may show up twice

    def channel_status(self, name: str) -> ChannelStatus | None:
        channel = self._lookup(name)
        if channel is None:
            return None
        with self._lock:
            last = self._last.get(name)
            history = self._history.get(name)
            kept = history is not None or len(self._history) < self._history_channels
            return channel_status(channel, last, history, kept=kept)

    def metrics(self) -> Sequence[Metric]:
        found: list[Metric] = []
        for key, value in self._counters().items():
            name, _, reason = key.partition(".")
            labels = {"reason": reason} if reason else {}
            found.append(
                Metric(
                    f"zeroline_{name}", f"daemon counter {name}", "counter", float(value), labels
                )
            )
        for gauge, level in self._extra().items():
            found.append(Metric(f"zeroline_{gauge}", f"daemon gauge {gauge}", "gauge", level))
        for name in self.channel_names():
            status = self.channel_status(name)
            if status is not None:
                found += channel_gauges(status)
        return found
