"""What the status page, /api and /metrics show: a read-only view of the daemon's channels.

The HTTP layer never touches a `Channel` directly; the daemon implements `StatusSource`
and the HTTP layer asks it for plain data (`ChannelStatus`, counters). That keeps the
network thread away from the model and lets the HTTP tests use a fake source.

Recent samples are kept per channel in a small ring (`History`) of numbers only, and only
for the first `HISTORY_CHANNELS` channels: a ring is 4.8 KB, a third of all the memory a
channel costs, and a page of more charts than that is not something anyone reads (a large
site's history is in the time-series database and its dashboard). The other channels show
their current values and say that no chart is kept (`recent_kept: false`).
"""

from __future__ import annotations

import array
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, Protocol

import numpy as np
import numpy.typing as npt

from zeroline.channel import Channel, Corrected

Array = npt.NDArray[np.float64]
HISTORY_LENGTH = 120
HISTORY_CHANNELS = 200  # channels with a chart on the status page: at most ~1 MB of rings
HISTORY_FIELDS = ("time", "raw", "corrected", "baseline", "uncertainty")
_WIDTH = len(HISTORY_FIELDS)


class History:
    """The last `length` corrected readings of a channel, as numbers (NaN for missing).

    An `array.array` of float64 rather than a numpy array: `add` runs for every reading on
    the worker, and five item stores into an array are a third of the cost of one numpy
    row assignment (~0.6 against ~1.5 µs on a slow machine); the HTTP thread, which reads
    it rarely, makes the numpy view.
    """

    def __init__(self, length: int = HISTORY_LENGTH) -> None:
        self.length = length
        self._values = array.array("d", [math.nan]) * (length * _WIDTH)
        self._next = 0
        self._count = 0

    def add(self, result: Corrected) -> None:
        values, at = self._values, self._next * _WIDTH
        corrected, baseline, uncertainty = result.corrected, result.baseline, result.uncertainty
        values[at] = result.time
        values[at + 1] = result.raw
        values[at + 2] = math.nan if corrected is None else corrected
        values[at + 3] = math.nan if baseline is None else baseline
        values[at + 4] = math.nan if uncertainty is None else uncertainty
        self._next = (self._next + 1) % self.length
        self._count = min(self._count + 1, self.length)

    def rows(self) -> Array:
        """Oldest first, shape (n, 5): time, raw, corrected, baseline, uncertainty."""
        table = np.frombuffer(self._values, dtype=np.float64).reshape(self.length, _WIDTH)
        ordered: Array = (
            table[: self._count].copy()
            if self._count < self.length
            else np.concatenate([table[self._next :], table[: self._next]])
        )
        return ordered

    def as_dicts(self) -> list[dict[str, float | None]]:
        return [
            {
                name: (None if math.isnan(v) else float(v))
                for name, v in zip(HISTORY_FIELDS, row, strict=True)
            }
            for row in self.rows()
        ]


#: The numbers `LastResults` keeps of a result, in this order, then its code, learned flag,
#: quality word and flag set (those two as indices into the distinct ones seen).
_LAST_NUMBERS = ("time", "raw", "corrected", "baseline", "uncertainty", "gain", "drift_rate")
_LAST_WIDTH = len(_LAST_NUMBERS) + 4


class LastResults:
    """The last result of every channel, as numbers in one array: 11 float64s a channel.

    Keeping each channel's `Corrected` object cost about 750 bytes a channel (its dict,
    its coefficient array, its flag tuple, a dozen float objects; tracemalloc in the
    daemon), most of what a parked channel costs. This costs 88 bytes and the name's dict
    entry. A quality word and a flag set are stored as indices into lists of the distinct
    ones seen, of which a daemon meets a handful. None is stored as NaN and read back as
    NaN; every reader shows both as null. `get` rebuilds a `Corrected` without
    coefficients (the status page reads those from the channel's estimator).
    """

    def __init__(self) -> None:
        self._slots: dict[str, int] = {}
        self._free: list[int] = []
        self._values = array.array("d")
        self._words: list[str] = []
        self._flag_sets: list[tuple[str, ...]] = []
        self._word_index: dict[str, int] = {}
        self._flags_index: dict[tuple[str, ...], int] = {}

    def __len__(self) -> int:
        return len(self._slots)

    def put(self, name: str, result: Corrected) -> None:
        slot = self._slots.get(name)
        if slot is None:
            slot = self._new_slot(name)
        nan = math.nan
        corrected, baseline, uncertainty = result.corrected, result.baseline, result.uncertainty
        gain, drift_rate = result.gain, result.drift_rate
        at = slot * _LAST_WIDTH
        self._values[at : at + _LAST_WIDTH] = array.array(  # one store: put runs per reading
            "d",
            (
                result.time,
                result.raw,
                nan if corrected is None else corrected,
                nan if baseline is None else baseline,
                nan if uncertainty is None else uncertainty,
                nan if gain is None else gain,
                nan if drift_rate is None else drift_rate,
                result.quality_code,
                1.0 if result.learned else 0.0,
                _index_of(result.quality, self._word_index, self._words),
                _index_of(result.flags, self._flags_index, self._flag_sets),
            ),
        )

    def get(self, name: str) -> Corrected | None:
        slot = self._slots.get(name)
        if slot is None:
            return None
        at = slot * _LAST_WIDTH
        row = self._values[at : at + _LAST_WIDTH]
        time, raw, corrected, baseline, uncertainty, gain, drift_rate = row[: len(_LAST_NUMBERS)]
        code, learned, word, flags = row[len(_LAST_NUMBERS) :]
        return Corrected(
            time=time,
            raw=raw,
            corrected=corrected,
            baseline=baseline,
            uncertainty=uncertainty,
            quality=self._words[int(word)],
            quality_code=int(code),
            flags=self._flag_sets[int(flags)],
            gain=gain,
            drift_rate=drift_rate,
            learned=learned == 1.0,
        )

    def discard(self, name: str) -> None:
        slot = self._slots.pop(name, None)
        if slot is not None:
            self._free.append(slot)

    def _new_slot(self, name: str) -> int:
        if self._free:
            slot = self._free.pop()
        else:
            slot = len(self._values) // _LAST_WIDTH
            self._values.extend(_BLANK_LAST)
        self._slots[name] = slot
        return slot


_BLANK_LAST = array.array("d", [math.nan]) * _LAST_WIDTH


def _index_of(value: Any, index: dict[Any, int], values: list[Any]) -> int:
    """`value`'s position in `values`, appended the first time it is seen."""
    found = index.get(value)
    if found is None:
        found = index[value] = len(values)
        values.append(value)
    return found


@dataclass(frozen=True)
class ChannelStatus:
    """One channel as the status page and /api/channels/<name> show it."""

    name: str
    topic: str
    learn_mode: str
    terms: tuple[str, ...]
    coefficients: tuple[float, ...]
    coefficient_uncertainties: tuple[float, ...]
    last_time: float | None
    raw: float | None
    corrected: float | None
    baseline: float | None
    uncertainty: float | None
    drift_rate: float | None
    drift: float | None
    quality: str
    quality_code: int
    flags: tuple[str, ...]
    drift_limit: float | None
    rate_limit: float | None
    active_alerts: tuple[Mapping[str, Any], ...]
    recent: tuple[Mapping[str, float | None], ...] = field(default=())
    recent_kept: bool = True  # False: beyond HISTORY_CHANNELS, no chart is kept

    def to_json(self, *, with_recent: bool = True) -> dict[str, Any]:
        data: dict[str, Any] = {
            "name": self.name,
            "topic": self.topic,
            "learn_mode": self.learn_mode,
            "terms": list(self.terms),
            "coefficients": [_finite(c) for c in self.coefficients],
            "coefficient_uncertainties": [_finite(c) for c in self.coefficient_uncertainties],
            "last_time": self.last_time,
            "raw": _finite(self.raw),
            "corrected": _finite(self.corrected),
            "baseline": _finite(self.baseline),
            "uncertainty": _finite(self.uncertainty),
            "drift_rate": _finite(self.drift_rate),
            "drift": _finite(self.drift),
            "quality": self.quality,
            "quality_code": self.quality_code,
            "flags": list(self.flags),
            "drift_limit": self.drift_limit,
            "rate_limit": self.rate_limit,
            "active_alerts": [dict(a) for a in self.active_alerts],
        }
        if with_recent:
            data["recent"] = [dict(r) for r in self.recent]
            data["recent_kept"] = self.recent_kept
        return data


def _finite(value: float | None) -> float | None:
    return float(value) if value is not None and math.isfinite(value) else None


def channel_status(
    channel: Channel, last: Corrected | None, history: History | None, *, kept: bool = True
) -> ChannelStatus:
    """Build the view of one channel from its model, its last result and its history
    (`kept` False: the channel has no history because the board keeps no more rings)."""
    config = channel.config
    gain_names = tuple(f"gain:{n}" for n in config.gain.names) if config.gain else ()
    names = gain_names + config.basis.names
    estimator = channel.estimator
    sd = estimator.residual_sd
    spread = np.sqrt(np.clip(np.diag(estimator.covariance), 0.0, None)) * sd
    return ChannelStatus(
        name=channel.name,
        topic=config.topic,
        learn_mode=config.learn.mode,
        terms=names,
        coefficients=tuple(float(c) for c in estimator.coefficients),
        coefficient_uncertainties=tuple(float(u) for u in spread),
        last_time=last.time if last else None,
        raw=last.raw if last else None,
        corrected=last.corrected if last else None,
        baseline=last.baseline if last else None,
        uncertainty=last.uncertainty if last else None,
        drift_rate=last.drift_rate if last else None,
        drift=channel.last_drift,
        quality=last.quality if last else "learning",
        quality_code=last.quality_code if last else 2,
        flags=last.flags if last else (),
        drift_limit=config.alerts.drift_limit,
        rate_limit=config.alerts.rate_limit,
        active_alerts=tuple(e.to_json() for e in channel.alerts.active().values()),
        recent=tuple(history.as_dicts()) if history else (),
        recent_kept=kept,
    )


@dataclass(frozen=True)
class Metric:
    """One sample for /metrics: name, help text, kind (counter|gauge), labels, value."""

    name: str
    help: str
    kind: str
    value: float
    labels: Mapping[str, str] = field(default_factory=dict)


class StatusSource(Protocol):
    """What the daemon offers the HTTP layer (all methods are thread-safe and cheap)."""

    def health(self) -> dict[str, Any]:
        """Liveness details: always answerable while the process runs."""
        ...

    def readiness(self) -> tuple[bool, dict[str, Any]]:
        """(ready, details): connected to the broker and state loaded."""
        ...

    def channel_names(self) -> Sequence[str]: ...

    def channel_status(self, name: str) -> ChannelStatus | None: ...

    def metrics(self) -> Sequence[Metric]:
        """Daemon counters and per-channel gauges (bounded label sets)."""
        ...
