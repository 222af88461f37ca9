"""Alert building blocks: the event, the hysteresis latch, the CUSUM and the crossing time.

Every drift alert in zeroline is one of a few numbers (a drift, a rate, a time to a limit, a
CUSUM statistic, a count of failed checks) compared with a limit. Compared naively, a number
that hovers around its limit raises and clears an alert on every sample. So every rule feeds
its number through a `Latch`:

- *hysteresis*: it raises beyond `raise_level` but clears only back inside a stricter
  `clear_level` (for "above" rules clear_level ≤ raise_level), so noise around the raise
  level cannot toggle it;
- *minimum dwell*: the level must stay beyond the raise level for `raise_dwell` seconds (and
  back inside for `clear_dwell` seconds) before the state changes. Dwell is measured in
  sample time, never wall time, so a replayed log raises exactly what the live daemon did,
  and irregular sampling is fine.

The other two primitives are the maths of two rules, kept pure so they can be checked alone:

- `TabularCusum`: two-sided tabular CUSUM on standardised values z,
  C⁺ ← max(0, C⁺ + z − k), C⁻ ← max(0, C⁻ − z − k), signal when either exceeds h.
  `cusum_step` is the same update on numpy arrays (many runs at once).
- `crossing_time`: the earliest time a predicted drift (mean and standard deviation on a
  grid of future times) reaches ±limit, with a confidence interval: the first times the
  outer and the inner edge of the band mean ± z·sd reach the limit. Where the band is
  monotone this inverts a pointwise confidence band of the drift into an interval for the
  crossing time (inverse estimation, as in calibration).

Everything here is deterministic and holds its state in JSON-able dicts (`to_state`,
`from_state`), because alert state is part of the channel snapshot that survives restarts.
The rules themselves live in `zeroline.alert_rules`, the per-channel `AlertBook` in
`zeroline.alert_book`.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
import numpy.typing as npt

from zeroline.errors import ConfigError
from zeroline.objects import shallow_copy

FloatArray = npt.NDArray[np.float64]

#: The rule names of the alert contract (design §4), in the order they are documented.
RULE_NAMES: tuple[str, ...] = (
    "drift_limit",
    "rate_limit",
    "forecast",
    "residual_change",
    "check_failures",
    "correction_cap",
    "model_health",
)

#: Severities a rule may be configured with, least to most urgent.
SEVERITIES: tuple[str, ...] = ("info", "warning", "critical")

State = Literal["raised", "cleared"]


def finite_or_none(value: float | None) -> float | None:
    """`value` as a float, or None when it is missing or not finite (JSON has no inf/NaN)."""
    if value is None or not math.isfinite(value):
        return None
    return float(value)


@dataclass(frozen=True)
class AlertEvent:
    """One raise or clear of one rule on one channel (the alert contract of design §4).

    >>> event = AlertEvent(time=1.5e9, channel="a-no2", rule="drift_limit", state="raised",
    ...                    value=16.0, limit=15.0, severity="warning", message="drift 16")
    >>> AlertEvent.from_json(event.to_json()) == event
    True
    """

    time: float
    channel: str
    rule: str
    state: State
    value: float | None
    limit: float | None
    severity: str
    message: str

    def __post_init__(self) -> None:
        if self.rule not in RULE_NAMES:
            raise ValueError(f"alert rule {self.rule!r} is unknown; use one of {RULE_NAMES}")
        if self.state not in ("raised", "cleared"):
            raise ValueError(f"alert state {self.state!r} is neither 'raised' nor 'cleared'")
        if self.severity not in SEVERITIES:
            raise ValueError(f"severity {self.severity!r} is unknown; use one of {SEVERITIES}")
        if not math.isfinite(self.time):
            raise ValueError(f"alert time {self.time!r} is not a finite epoch time")
        # Non-finite numbers cannot travel as JSON: store them as "no value".
        object.__setattr__(self, "value", finite_or_none(self.value))
        object.__setattr__(self, "limit", finite_or_none(self.limit))

    def to_json(self) -> dict[str, Any]:
        """The event as a JSON-able dict with exactly the contract's keys."""
        return {
            "time": float(self.time),
            "channel": self.channel,
            "rule": self.rule,
            "state": self.state,
            "value": self.value,
            "limit": self.limit,
            "severity": self.severity,
            "message": self.message,
        }

    @classmethod
    def from_json(cls, data: dict[str, Any]) -> AlertEvent:
        """Rebuild an event written by `to_json` (e.g. from a snapshot)."""
        return cls(
            time=float(data["time"]),
            channel=str(data["channel"]),
            rule=str(data["rule"]),
            state=data["state"],
            value=None if data["value"] is None else float(data["value"]),
            limit=None if data["limit"] is None else float(data["limit"]),
            severity=str(data["severity"]),
            message=str(data["message"]),
        )


class Latch:
    """Hysteresis and minimum-dwell state machine shared by every rule.

    `update(time, level)` returns "raised" or "cleared" on the sample where the state
    changes, else None. For direction "above" the level is *beyond* a threshold when it is
    greater (or, with `inclusive`, equal); for "below" when it is smaller. Raising needs
    the level beyond `raise_level` on every sample for at least `raise_dwell` seconds,
    counted from the first such sample; clearing needs it not beyond `clear_level` for
    `clear_dwell` seconds. A NaN level carries no information and is ignored.

    >>> latch = Latch(raise_level=10.0, clear_level=8.0, raise_dwell=60.0)
    >>> [latch.update(t, x) for t, x in [(0, 11), (30, 12), (60, 11), (90, 9), (120, 7)]]
    [None, None, 'raised', None, 'cleared']
    """

    __slots__ = (
        "_last_time",
        "_pending_since",
        "_raised",
        "_sign",
        "clear_dwell",
        "clear_level",
        "direction",
        "inclusive",
        "raise_dwell",
        "raise_level",
    )

    def __init__(
        self,
        raise_level: float,
        clear_level: float,
        raise_dwell: float = 0.0,
        clear_dwell: float = 0.0,
        direction: Literal["above", "below"] = "above",
        inclusive: bool = False,
    ) -> None:
        if direction not in ("above", "below"):
            raise ConfigError(f"latch direction {direction!r} must be 'above' or 'below'")
        sign = 1.0 if direction == "above" else -1.0
        if not (math.isfinite(raise_level) and math.isfinite(clear_level)):
            raise ConfigError("latch levels must be finite numbers")
        if sign * clear_level > sign * raise_level:
            relation = "at or below" if direction == "above" else "at or above"
            raise ConfigError(
                f"clear level {clear_level} must be {relation} the raise level {raise_level}"
            )
        if not (raise_dwell >= 0 and clear_dwell >= 0):
            raise ConfigError("dwell times must be zero or positive seconds")
        self.raise_level = float(raise_level)
        self.clear_level = float(clear_level)
        self.raise_dwell = float(raise_dwell)
        self.clear_dwell = float(clear_dwell)
        self.direction: Literal["above", "below"] = direction
        self.inclusive = inclusive
        self._sign = sign
        self._raised = False
        self._pending_since: float | None = None  # first sample of the current candidate change
        self._last_time: float | None = None

    @property
    def raised(self) -> bool:
        """True while the latch is in the raised state."""
        return self._raised

    def beyond(self, level: float, threshold: float) -> bool:
        """True when `level` lies beyond `threshold` in this latch's direction."""
        a, b = self._sign * level, self._sign * threshold
        return a >= b if self.inclusive else a > b

    def update(self, time: float, level: float) -> State | None:
        """Feed one sample; return the new state if it changed on this sample."""
        if self._last_time is not None and time < self._last_time:
            raise ValueError(
                f"sample time {time} is earlier than the previous one {self._last_time}; "
                "feed samples in time order"
            )
        self._last_time = time
        if math.isnan(level):
            return None
        # `beyond`, inlined: this runs for every reading of every rule
        signed = self._sign * level
        if self._raised:
            threshold = self._sign * self.clear_level
            moving = not (signed >= threshold if self.inclusive else signed > threshold)
            dwell = self.clear_dwell
        else:
            threshold = self._sign * self.raise_level
            moving = signed >= threshold if self.inclusive else signed > threshold
            dwell = self.raise_dwell
        if not moving:
            self._pending_since = None
            return None
        if self._pending_since is None:
            self._pending_since = time
        if time - self._pending_since < dwell:
            return None
        self._raised = not self._raised
        self._pending_since = None
        return "raised" if self._raised else "cleared"

    def clear(self) -> bool:
        """Force the cleared state (e.g. after a recalibration); True if it was raised."""
        was_raised = self._raised
        self._raised = False
        self._pending_since = None
        return was_raised

    def to_state(self) -> dict[str, Any]:
        """Settings and learned state as JSON-able values."""
        return {
            "raise_level": self.raise_level,
            "clear_level": self.clear_level,
            "raise_dwell": self.raise_dwell,
            "clear_dwell": self.clear_dwell,
            "direction": self.direction,
            "inclusive": self.inclusive,
            "raised": self._raised,
            "pending_since": self._pending_since,
            "last_time": self._last_time,
        }

    #: Values of `pack`, in order (None is stored as NaN).
    PACKED = ("raised", "pending_since", "last_time")

    def pack(self) -> tuple[float, float, float]:
        """The learned state as float64 values (`PACKED`); settings come from the config."""
        pending, last = self._pending_since, self._last_time
        return (
            1.0 if self._raised else 0.0,
            math.nan if pending is None else pending,
            math.nan if last is None else last,
        )

    def unpack(self, values: Sequence[float]) -> None:
        """Restore the learned state written by `pack`."""
        raised, pending, last = values
        self._raised = raised == 1.0
        self._pending_since = None if math.isnan(pending) else pending
        self._last_time = None if math.isnan(last) else last

    def blank_copy(self) -> Latch:
        """The same settings, cleared and never fed (cheaper than the constructor)."""
        new = shallow_copy(self)
        new._raised, new._pending_since, new._last_time = False, None, None
        return new

    @classmethod
    def from_state(cls, state: dict[str, Any]) -> Latch:
        """Rebuild a latch from `to_state` output."""
        latch = cls(
            raise_level=state["raise_level"],
            clear_level=state["clear_level"],
            raise_dwell=state["raise_dwell"],
            clear_dwell=state["clear_dwell"],
            direction=state["direction"],
            inclusive=bool(state["inclusive"]),
        )
        latch._raised = bool(state["raised"])
        latch._pending_since = state["pending_since"]
        latch._last_time = state["last_time"]
        return latch


def cusum_step(
    upper: FloatArray, lower: FloatArray, z: FloatArray, k: float
) -> tuple[FloatArray, FloatArray]:
    """One tabular CUSUM update on arrays of parallel runs.

    (C⁺, C⁻) ← (max(0, C⁺ + z − k), max(0, C⁻ − z − k)), elementwise.
    """
    return np.maximum(0.0, upper + z - k), np.maximum(0.0, lower - z - k)


class TabularCusum:
    """Two-sided tabular CUSUM on standardised values (reference value k, decision interval h).

    `update(z)` returns True when C⁺ or C⁻ exceeds h. The statistics are not reset by a
    signal; the caller decides (`reset()`), as a control-chart user would.

    >>> cusum = TabularCusum(k=0.5, h=5.0)
    >>> [cusum.update(1.5) for _ in range(6)]
    [False, False, False, False, False, True]
    """

    __slots__ = ("_lower", "_upper", "h", "k")

    def __init__(self, k: float = 0.5, h: float = 5.0) -> None:
        if not (math.isfinite(k) and k >= 0):
            raise ConfigError(f"CUSUM reference value k={k} must be a finite number >= 0")
        if not (math.isfinite(h) and h > 0):
            raise ConfigError(f"CUSUM decision interval h={h} must be a finite number > 0")
        self.k = float(k)
        self.h = float(h)
        self._upper = 0.0
        self._lower = 0.0

    @property
    def upper(self) -> float:
        """C⁺, the evidence for an upward shift."""
        return self._upper

    @property
    def lower(self) -> float:
        """C⁻, the evidence for a downward shift."""
        return self._lower

    @property
    def statistic(self) -> float:
        """max(C⁺, C⁻), the value compared with h."""
        return max(self._upper, self._lower)

    def update(self, z: float) -> bool:
        """Add one standardised value; True when either side exceeds h."""
        # Plain floats on the hot path; `cusum_step` is the same formula for arrays.
        # max(0.0, x) spelt as a comparison (what the builtin returns, NaN included: 0.0),
        # because calling the builtin costs more than the rest of this method.
        upper = self._upper + z - self.k
        lower = self._lower - z - self.k
        upper = self._upper = upper if upper > 0.0 else 0.0
        lower = self._lower = lower if lower > 0.0 else 0.0
        return upper > self.h or lower > self.h  # `signalling`, inlined

    @property
    def signalling(self) -> bool:
        """True while either side exceeds h."""
        return self._upper > self.h or self._lower > self.h

    def reset(self) -> None:
        """Restart both sides from zero."""
        self._upper = 0.0
        self._lower = 0.0

    def to_state(self) -> dict[str, Any]:
        """Settings and learned state as JSON-able values."""
        return {"k": self.k, "h": self.h, "upper": self._upper, "lower": self._lower}

    def pack(self) -> tuple[float, float]:
        """C⁺ and C⁻ as float64 values (k and h come from the config)."""
        return (self._upper, self._lower)

    def unpack(self, values: Sequence[float]) -> None:
        self._upper, self._lower = values

    def blank_copy(self) -> TabularCusum:
        """The same k and h, both sides at zero."""
        new = shallow_copy(self)
        new._upper = new._lower = 0.0
        return new

    @classmethod
    def from_state(cls, state: dict[str, Any]) -> TabularCusum:
        """Rebuild a CUSUM from `to_state` output."""
        cusum = cls(k=state["k"], h=state["h"])
        cusum._upper = float(state["upper"])
        cusum._lower = float(state["lower"])
        return cusum


@dataclass(frozen=True)
class Crossing:
    """When a predicted drift first reaches ±limit, with a confidence interval.

    `earliest` is where the mean reaches the limit; `early` where the outer band edge
    (|mean| + z·sd) does; `late` where the inner edge (mean − z·sd on the side the mean
    crosses) does, or None when that happens after the last grid time. early ≤ earliest,
    and earliest ≤ late when late is known. `side` is +1 for the upper limit, −1 for the lower.
    """

    earliest: float
    early: float
    late: float | None
    side: int


def _first_reach(times: FloatArray, excess: FloatArray) -> float | None:
    """First time the piecewise-linear `excess` reaches 0 from below; None if it never does."""
    hits = np.flatnonzero(excess >= 0.0)
    if hits.size == 0:
        return None
    i = int(hits[0])
    if i == 0:
        return float(times[0])
    # Linear interpolation between the last grid point below and the first at or above.
    before, after = float(excess[i - 1]), float(excess[i])
    fraction = -before / (after - before)
    return float(times[i - 1] + fraction * (times[i] - times[i - 1]))


def crossing_time(
    times: npt.ArrayLike,
    mean: npt.ArrayLike,
    sd: npt.ArrayLike,
    limit: float,
    z: float,
) -> Crossing | None:
    """Earliest time the predicted drift `mean` reaches ±`limit`, with its interval.

    `times` must be increasing; `mean` and `sd` are the prediction and its standard
    deviation at those times; between grid points all three are taken as linear. If the
    mean is already beyond the limit at times[0], the crossing is times[0]. Returns None
    when the mean stays inside ±limit over the whole grid.

    >>> c = crossing_time([0.0, 10.0], [0.0, 20.0], [0.0, 0.0], limit=15.0, z=1.96)
    >>> (c.earliest, c.early, c.late, c.side)
    (7.5, 7.5, 7.5, 1)
    """
    t = np.asarray(times, dtype=np.float64)
    m = np.asarray(mean, dtype=np.float64)
    s = np.asarray(sd, dtype=np.float64)
    if t.ndim != 1 or t.size == 0 or m.shape != t.shape or s.shape != t.shape:
        raise ValueError("times, mean and sd must be one-dimensional arrays of the same length")
    if not (np.all(np.isfinite(t)) and np.all(np.isfinite(m)) and np.all(np.isfinite(s))):
        raise ValueError("times, mean and sd must be finite")
    if np.any(np.diff(t) <= 0):
        raise ValueError("forecast times must be strictly increasing")
    if np.any(s < 0):
        raise ValueError("forecast standard deviations must not be negative")
    if not (math.isfinite(limit) and limit > 0):
        raise ValueError(f"drift limit {limit} must be a finite number > 0")
    if not (math.isfinite(z) and z >= 0):
        raise ValueError(f"band width z={z} must be a finite number >= 0")

    up = _first_reach(t, m - limit)
    down = _first_reach(t, -m - limit)
    if up is None and down is None:
        return None
    side = 1 if down is None or (up is not None and up <= down) else -1
    earliest = up if side == 1 else down
    assert earliest is not None
    # The outer edge can reach either limit first; the inner edge only matters on `side`.
    early_candidates = [
        c
        for c in (_first_reach(t, m + z * s - limit), _first_reach(t, -m + z * s - limit))
        if c is not None
    ]
    early = min(early_candidates)  # never empty: the outer edge reaches wherever the mean does
    late = _first_reach(t, side * m - z * s - limit)
    return Crossing(earliest=earliest, early=early, late=late, side=side)


_DURATION_UNITS: tuple[tuple[str, float], ...] = (
    ("d", 86400.0),
    ("h", 3600.0),
    ("min", 60.0),
    ("s", 1.0),
)


def format_duration(seconds: float) -> str:
    """A duration for a message in the largest unit it fills, e.g. '9.2 d', '45 min'.

    >>> format_duration(9.2 * 86400), format_duration(2700), format_duration(0.4)
    ('9.2 d', '45 min', '0.4 s')
    """
    for unit, size in _DURATION_UNITS:
        if abs(seconds) >= size or unit == "s":
            return f"{seconds / size:.3g} {unit}"
    raise AssertionError("unreachable: the loop ends with seconds")


def format_interval(early: float, late: float | None, known_until: float) -> str:
    """'between 8.1 and 10.6 d', or 'between 8.1 d and more than 17.5 d' without a late end.

    >>> format_interval(8.1 * 86400, 10.6 * 86400, 20 * 86400)
    'between 8.1 and 10.6 d'
    """
    first = format_duration(early)
    if late is None:
        return f"between {first} and more than {format_duration(known_until)}"
    second = format_duration(late)
    first_number, first_unit = first.split(" ")
    if second.endswith(" " + first_unit):
        return f"between {first_number} and {second}"
    return f"between {first} and {second}"


def format_rate(per_second: float, reference: float) -> str:
    """A rate per the smallest of s, min, h, d in which `reference` reads ≥ 0.1, e.g. '2/d'.

    >>> format_rate(3.0 / 86400, 2.0 / 86400), format_rate(0.5, 1.0)
    ('3/d', '0.5/s')
    """
    for unit, size in reversed(_DURATION_UNITS):
        if abs(reference) * size >= 0.1 or unit == "d":
            return f"{per_second * size:.3g}/{unit}"
    raise AssertionError("unreachable: the loop ends with days")
