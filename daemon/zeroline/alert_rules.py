"""The seven drift-alert rules of one channel, and the `AlertBook` that holds them.

For each processed reading the channel hands numbers to its `AlertBook`: the drift
(baseline − reference level), its analytic rate, a forecast of the drift, the standardised
residual, a reference-check error, the applied correction and the model's named problems.
The book routes each number to the rule that watches it and returns the events that came
out: `AlertEvent`s that say "raised" or "cleared" (design §4).

- `drift_limit`: abs(drift) beyond the limit for `dwell` s; clears within
  clear_fraction·limit for `clear_dwell` s.
- `rate_limit`: abs(d baseline/dt), likewise.
- `forecast`: predicted time to ±drift limit within the horizon; clears when the
  crossing moves beyond clear_factor·horizon.
- `residual_change`: two-sided CUSUM of the standardised residuals over h; clears after
  `clear_samples` samples without a new signal.
- `check_failures`: `consecutive` reference checks in a row beyond the limit, or one beyond
  the hard limit; clears on one check within the clear limit.
- `correction_cap`: abs(correction) at or over its cap; clears below clear_fraction·cap.
- `model_health`: any named model problem for `dwell` s; clears when none remains.

Every rule can also be cleared explicitly (`clear(time, reason)`, e.g. when a technician
recalibrates the sensor), which also forgets what it had accumulated. The rules do no I/O
and keep their settings and learned state in one JSON-able dict (`to_state`,
`from_state`), so a snapshot restores a channel's alerts exactly: a run interrupted by a
restart emits the same events as an uninterrupted one.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterable, Sequence
from statistics import NormalDist
from typing import Any, ClassVar

import numpy as np
import numpy.typing as npt

from zeroline.alerts import (
    SEVERITIES,
    AlertEvent,
    FloatArray,
    Latch,
    State,
    TabularCusum,
    crossing_time,
    format_duration,
    format_interval,
    format_rate,
)
from zeroline.errors import ConfigError
from zeroline.objects import shallow_copy

#: A forecast of the drift: absolute future times → (predicted drift, its standard deviation).
Predictor = Callable[[FloatArray], tuple[npt.ArrayLike, npt.ArrayLike]]


def _positive(name: str, value: float) -> float:
    if not (math.isfinite(value) and value > 0):
        raise ConfigError(f"alert setting {name}={value} must be a finite number > 0")
    return float(value)


def _fraction(name: str, value: float) -> float:
    if not (0 < value <= 1):
        raise ConfigError(f"alert setting {name}={value} must lie in (0, 1]")
    return float(value)


class AlertRule:
    """What every rule shares: its name, channel, severity, active event and state dict."""

    __slots__ = ("_active", "channel", "severity")

    name: ClassVar[str]

    def __init__(self, *, channel: str, severity: str) -> None:
        if severity not in SEVERITIES:
            raise ConfigError(f"alert severity {severity!r} is unknown; use one of {SEVERITIES}")
        self.channel = channel
        self.severity = severity
        self._active: AlertEvent | None = None

    @property
    def active(self) -> AlertEvent | None:
        """The raise event in force, or None while the rule is clear."""
        return self._active

    def _emit(
        self, time: float, state: State, value: float | None, limit: float | None, message: str
    ) -> AlertEvent:
        event = AlertEvent(
            time=float(time),
            channel=self.channel,
            rule=self.name,
            state=state,
            value=value,
            limit=limit,
            severity=self.severity,
            message=message,
        )
        self._active = event if state == "raised" else None
        return event

    def clear(self, time: float, reason: str = "cleared on request") -> list[AlertEvent]:
        """Clear now and forget accumulated evidence; the clear event if it was raised."""
        was_active = self._active
        self._forget()
        if was_active is None:
            return []
        return [self._emit(time, "cleared", None, was_active.limit, f"{self.name}: {reason}")]

    # Subclasses fill these in.
    def _forget(self) -> None:
        raise NotImplementedError

    def _settings(self) -> dict[str, Any]:
        raise NotImplementedError

    def _learned(self) -> dict[str, Any]:
        raise NotImplementedError

    def _load(self, learned: dict[str, Any]) -> None:
        raise NotImplementedError

    def to_state(self) -> dict[str, Any]:
        """Settings, learned state and active event as JSON-able values."""
        return {
            "rule": self.name,
            "channel": self.channel,
            "settings": {"severity": self.severity, **self._settings()},
            "learned": self._learned(),
            "active": None if self._active is None else self._active.to_json(),
        }

    #: Number of float64 values of `pack` (the learned state; the active event, which holds
    #: free text, travels as JSON beside them: `AlertEvent.to_json`).
    PACKED_WIDTH: ClassVar[int]

    def pack(self) -> Sequence[float]:
        """The learned state as float64 values; settings come from the config."""
        raise NotImplementedError

    def unpack(self, values: Sequence[float]) -> None:
        """Restore the learned state written by `pack` (the active event is set apart)."""
        raise NotImplementedError

    def blank_copy(self, channel: str) -> AlertRule:
        """The same settings for `channel`, clear and never fed: much cheaper than the
        constructor, so a channel template builds its rules once and copies them."""
        new = shallow_copy(self)
        new.channel = channel
        new._active = None
        new._blank_learned()
        return new

    def _blank_learned(self) -> None:
        """Give a copy its own, empty learned state (called by `blank_copy`)."""
        raise NotImplementedError

    @classmethod
    def from_state(cls, state: dict[str, Any]) -> AlertRule:
        """Rebuild the rule named in `state` (any rule class can be asked)."""
        rule_class = RULE_CLASSES.get(state.get("rule", ""))
        if rule_class is None:
            raise ConfigError(f"alert state names unknown rule {state.get('rule')!r}")
        rule = rule_class(channel=state["channel"], **state["settings"])
        rule._load(state["learned"])
        active = state["active"]
        rule._active = None if active is None else AlertEvent.from_json(active)
        return rule


class _LatchedRule(AlertRule):
    """A rule whose whole memory is one `Latch`."""

    __slots__ = ("_latch",)

    def __init__(self, *, channel: str, severity: str, latch: Latch) -> None:
        super().__init__(channel=channel, severity=severity)
        self._latch = latch

    def _forget(self) -> None:
        self._latch.clear()

    def _learned(self) -> dict[str, Any]:
        return self._latch.to_state()

    def _load(self, learned: dict[str, Any]) -> None:
        self._latch = Latch.from_state(learned)

    PACKED_WIDTH = len(Latch.PACKED)

    def pack(self) -> Sequence[float]:
        return self._latch.pack()

    def unpack(self, values: Sequence[float]) -> None:
        self._latch.unpack(values)

    def _blank_learned(self) -> None:
        self._latch = self._latch.blank_copy()


class DriftLimitRule(_LatchedRule):
    """abs(drift) beyond `limit`; drift is baseline − reference level, passed by the caller.

    >>> rule = DriftLimitRule(channel="a", limit=15.0)
    >>> [e.state for t, d in [(0, 10), (1, -16), (2, 13), (3, 11)] for e in rule.observe(t, d)]
    ['raised', 'cleared']
    """

    __slots__ = ("clear_dwell", "clear_fraction", "dwell", "limit")

    name = "drift_limit"

    def __init__(
        self,
        *,
        channel: str,
        limit: float,
        clear_fraction: float = 0.8,
        dwell: float = 0.0,
        clear_dwell: float | None = None,
        severity: str = "warning",
    ) -> None:
        self.limit = _positive("drift_limit", limit)
        self.clear_fraction = _fraction("clear_fraction", clear_fraction)
        self.dwell = dwell
        self.clear_dwell = dwell if clear_dwell is None else clear_dwell
        latch = Latch(self.limit, self.limit * self.clear_fraction, dwell, self.clear_dwell)
        super().__init__(channel=channel, severity=severity, latch=latch)

    def _settings(self) -> dict[str, Any]:
        return {
            "limit": self.limit,
            "clear_fraction": self.clear_fraction,
            "dwell": self.dwell,
            "clear_dwell": self.clear_dwell,
        }

    def observe(self, time: float, drift: float) -> list[AlertEvent]:
        """Feed the drift at `time`; the raise or clear event it causes, if any."""
        change = self._latch.update(time, abs(drift))
        if change is None:
            return []
        if change == "raised":
            message = f"drift {drift:+.4g} is beyond the limit ±{self.limit:.4g}"
        else:
            message = f"drift {drift:+.4g} is back within ±{self._latch.clear_level:.4g}"
        return [self._emit(time, change, drift, self.limit, message)]


class RateLimitRule(_LatchedRule):
    """abs(d baseline/dt) beyond `limit_per_s` (the caller passes the analytic derivative)."""

    __slots__ = ("clear_dwell", "clear_fraction", "dwell", "limit_per_s")

    name = "rate_limit"

    def __init__(
        self,
        *,
        channel: str,
        limit_per_s: float,
        clear_fraction: float = 0.8,
        dwell: float = 0.0,
        clear_dwell: float | None = None,
        severity: str = "warning",
    ) -> None:
        self.limit_per_s = _positive("rate_limit", limit_per_s)
        self.clear_fraction = _fraction("clear_fraction", clear_fraction)
        self.dwell = dwell
        self.clear_dwell = dwell if clear_dwell is None else clear_dwell
        latch = Latch(
            self.limit_per_s, self.limit_per_s * self.clear_fraction, dwell, self.clear_dwell
        )
        super().__init__(channel=channel, severity=severity, latch=latch)

    def _settings(self) -> dict[str, Any]:
        return {
            "limit_per_s": self.limit_per_s,
            "clear_fraction": self.clear_fraction,
            "dwell": self.dwell,
            "clear_dwell": self.clear_dwell,
        }

    def observe(self, time: float, rate_per_s: float) -> list[AlertEvent]:
        """Feed the drift rate (units per second) at `time`."""
        change = self._latch.update(time, abs(rate_per_s))
        if change is None:
            return []
        rate = format_rate(rate_per_s, self.limit_per_s)
        if change == "raised":
            limit = format_rate(self.limit_per_s, self.limit_per_s)
            message = f"drift rate {rate} is beyond the limit ±{limit}"
        else:
            limit = format_rate(self._latch.clear_level, self.limit_per_s)
            message = f"drift rate {rate} is back within ±{limit}"
        return [self._emit(time, change, rate_per_s, self.limit_per_s, message)]


class ForecastRule(_LatchedRule):
    """Raised while the drift forecast reaches ±`drift_limit` within `horizon_s`.

    The forecast is evaluated on `grid_points` times over [now, now + clear_factor·horizon];
    the alert clears once the predicted crossing lies beyond clear_factor·horizon (or there
    is none). value = predicted seconds to the crossing, limit = horizon.
    """

    __slots__ = (
        "_last_evaluated",
        "_z",
        "clear_dwell",
        "clear_factor",
        "confidence",
        "drift_limit",
        "dwell",
        "grid_points",
        "horizon_s",
        "min_interval",
    )

    name = "forecast"

    def __init__(
        self,
        *,
        channel: str,
        drift_limit: float,
        horizon_s: float,
        confidence: float = 0.95,
        clear_factor: float = 1.25,
        grid_points: int = 200,
        dwell: float = 0.0,
        clear_dwell: float | None = None,
        min_interval: float = 0.0,
        severity: str = "warning",
    ) -> None:
        self.drift_limit = _positive("drift_limit", drift_limit)
        self.horizon_s = _positive("horizon", horizon_s)
        if not (0 < confidence < 1):
            raise ConfigError(f"forecast confidence={confidence} must lie in (0, 1), e.g. 0.95")
        if not (math.isfinite(clear_factor) and clear_factor >= 1):
            raise ConfigError(f"forecast clear_factor={clear_factor} must be a number >= 1")
        if grid_points < 2:
            raise ConfigError(f"forecast grid_points={grid_points} must be at least 2")
        self.confidence = float(confidence)
        self.clear_factor = float(clear_factor)
        self.grid_points = int(grid_points)
        self.dwell = dwell
        self.clear_dwell = dwell if clear_dwell is None else clear_dwell
        self.min_interval = float(min_interval)
        self._z = NormalDist().inv_cdf(0.5 + confidence / 2)  # two-sided band
        self._last_evaluated: float | None = None
        latch = Latch(
            self.horizon_s,
            self.horizon_s * self.clear_factor,
            dwell,
            self.clear_dwell,
            direction="below",
            inclusive=True,
        )
        super().__init__(channel=channel, severity=severity, latch=latch)

    def _settings(self) -> dict[str, Any]:
        return {
            "drift_limit": self.drift_limit,
            "horizon_s": self.horizon_s,
            "confidence": self.confidence,
            "clear_factor": self.clear_factor,
            "grid_points": self.grid_points,
            "dwell": self.dwell,
            "clear_dwell": self.clear_dwell,
            "min_interval": self.min_interval,
        }

    def _learned(self) -> dict[str, Any]:
        return {"latch": self._latch.to_state(), "last_evaluated": self._last_evaluated}

    def _load(self, learned: dict[str, Any]) -> None:
        self._latch = Latch.from_state(learned["latch"])
        self._last_evaluated = learned["last_evaluated"]

    PACKED_WIDTH = len(Latch.PACKED) + 1

    def pack(self) -> Sequence[float]:
        last = self._last_evaluated
        return (*self._latch.pack(), math.nan if last is None else last)

    def unpack(self, values: Sequence[float]) -> None:
        self._latch.unpack(values[:-1])
        last = values[-1]
        self._last_evaluated = None if math.isnan(last) else last

    def _blank_learned(self) -> None:
        self._latch = self._latch.blank_copy()
        self._last_evaluated = None

    def observe(self, time: float, predict: Predictor) -> list[AlertEvent]:
        """Evaluate `predict` on this rule's grid of future times and feed the result."""
        if self._last_evaluated is not None and time - self._last_evaluated < self.min_interval:
            return []  # forecasts are costly and change slowly: evaluate at most this often
        times = np.linspace(time, time + self.horizon_s * self.clear_factor, self.grid_points)
        mean, sd = predict(times)
        return self.observe_grid(time, times, mean, sd)

    def observe_grid(
        self, time: float, times: npt.ArrayLike, mean: npt.ArrayLike, sd: npt.ArrayLike
    ) -> list[AlertEvent]:
        """Feed a forecast given on the caller's grid (it should reach clear_factor·horizon).

        A forecast with non-finite numbers (e.g. from a model that has lost its footing,
        which model_health reports) carries no information and is skipped.
        """
        self._last_evaluated = time
        grid = np.asarray(times, dtype=np.float64)
        predicted = np.asarray(mean, dtype=np.float64)
        spread = np.asarray(sd, dtype=np.float64)
        if not (np.all(np.isfinite(predicted)) and np.all(np.isfinite(spread))):
            return []
        crossing = crossing_time(grid, predicted, spread, self.drift_limit, self._z)
        to_crossing = math.inf if crossing is None else crossing.earliest - time
        change = self._latch.update(time, to_crossing)
        if change is None:
            return []
        if change == "cleared":
            grid_end = format_duration(float(grid[-1]) - time)
            message = f"drift forecast stays within ±{self.drift_limit:.4g} for {grid_end}"
            if crossing is not None:
                message = (
                    f"drift forecast reaches ±{self.drift_limit:.4g} only in about "
                    f"{format_duration(to_crossing)}, beyond the horizon"
                )
            return [self._emit(time, change, to_crossing, self.horizon_s, message)]
        assert crossing is not None  # raised means a crossing within the horizon
        if to_crossing <= 0:
            message = f"drift forecast is at the drift limit ±{self.drift_limit:.4g} now"
        else:
            early = max(crossing.early - time, 0.0)
            late = None if crossing.late is None else crossing.late - time
            interval = format_interval(early, late, float(grid[-1]) - time)
            message = (
                f"will reach the drift limit ±{self.drift_limit:.4g} in about "
                f"{format_duration(to_crossing)} ({interval}, {self.confidence * 100:.3g} %)"
            )
        return [self._emit(time, change, to_crossing, self.horizon_s, message)]


class ResidualChangeRule(AlertRule):
    """A shift in the standardised residuals, found by a two-sided tabular CUSUM (k, h).

    On a signal the rule raises and restarts the CUSUM: without the restart a long shift
    would pile up C⁺ far beyond h and keep the alert up long after the shift ended. While
    raised, every new signal restarts the count; `clear_samples` samples in a row without a
    signal clear it. Non-finite z carry no information and are skipped.
    """

    __slots__ = ("_calm", "_cusum", "clear_samples")

    name = "residual_change"

    def __init__(
        self,
        *,
        channel: str,
        k: float = 0.5,
        h: float = 5.0,
        clear_samples: int = 50,
        severity: str = "warning",
    ) -> None:
        super().__init__(channel=channel, severity=severity)
        if clear_samples < 1:
            raise ConfigError(f"residual_change clear_samples={clear_samples} must be >= 1")
        self.clear_samples = int(clear_samples)
        self._cusum = TabularCusum(k=k, h=h)
        self._calm = 0  # samples since the last signal, while raised

    def _settings(self) -> dict[str, Any]:
        return {"k": self._cusum.k, "h": self._cusum.h, "clear_samples": self.clear_samples}

    def _learned(self) -> dict[str, Any]:
        return {"cusum": self._cusum.to_state(), "calm": self._calm}

    def _load(self, learned: dict[str, Any]) -> None:
        self._cusum = TabularCusum.from_state(learned["cusum"])
        self._calm = int(learned["calm"])

    PACKED_WIDTH = 3

    def pack(self) -> Sequence[float]:
        return (*self._cusum.pack(), float(self._calm))

    def unpack(self, values: Sequence[float]) -> None:
        upper, lower, calm = values
        self._cusum.unpack((upper, lower))
        self._calm = int(calm)

    def _blank_learned(self) -> None:
        self._cusum = self._cusum.blank_copy()
        self._calm = 0

    def _forget(self) -> None:
        self._cusum.reset()
        self._calm = 0

    def observe(self, time: float, z: float) -> list[AlertEvent]:
        """Feed one standardised residual (residual / its standard deviation)."""
        if not math.isfinite(z):
            return []
        cusum = self._cusum
        signal = cusum.update(z)
        if signal:
            upward = cusum.upper > cusum.h
            statistic = cusum.upper if upward else cusum.lower
            cusum.reset()
            self._calm = 0
            if self._active is not None:
                return []
            side, label = ("upward", "C+") if upward else ("downward", "C-")
            message = (
                f"residuals shifted {side} ({label} = {statistic:.3g} > h = {cusum.h:.3g}): "
                "the model no longer explains the readings"
            )
            return [self._emit(time, "raised", statistic, cusum.h, message)]
        if self._active is None:
            return []
        self._calm += 1
        if self._calm < self.clear_samples:
            return []
        self._forget()
        message = f"residuals in control again for {self.clear_samples} samples"
        return [self._emit(time, "cleared", cusum.statistic, cusum.h, message)]


class CheckFailureRule(AlertRule):
    """Failed reference checks: `consecutive` in a row beyond `limit`, or one beyond `hard_limit`.

    "Beyond" means abs(error) > limit. Cleared by the next check with abs(error) ≤
    `clear_limit` (default: `limit`). This is the shape of the daily-drift out-of-control
    rule for continuous emission monitors
    (US 40 CFR 60 Appendix F: twice the drift specification on five consecutive days, or
    four times on any one day; back in control when a check is within the specification).

    >>> rule = CheckFailureRule(channel="a", limit=25, consecutive=3, hard_limit=50)
    >>> [e.state for day, err in enumerate([30, 30, 30, 20]) for e in rule.observe(day, err)]
    ['raised', 'cleared']
    """

    __slots__ = ("_run", "clear_limit", "consecutive", "hard_limit", "limit")

    name = "check_failures"

    def __init__(
        self,
        *,
        channel: str,
        limit: float,
        consecutive: int = 5,
        hard_limit: float | None = None,
        clear_limit: float | None = None,
        severity: str = "critical",
    ) -> None:
        super().__init__(channel=channel, severity=severity)
        self.limit = _positive("check limit", limit)
        if consecutive < 1:
            raise ConfigError(f"check_failures consecutive={consecutive} must be >= 1")
        self.consecutive = int(consecutive)
        if hard_limit is not None and not hard_limit >= self.limit:
            raise ConfigError(f"check hard_limit={hard_limit} must be at least limit={limit}")
        self.hard_limit = None if hard_limit is None else float(hard_limit)
        clear = self.limit if clear_limit is None else _positive("check clear_limit", clear_limit)
        if clear > self.limit:
            raise ConfigError(f"check clear_limit={clear_limit} must not exceed limit={limit}")
        self.clear_limit = clear
        self._run = 0  # checks in a row beyond the limit

    def _settings(self) -> dict[str, Any]:
        return {
            "limit": self.limit,
            "consecutive": self.consecutive,
            "hard_limit": self.hard_limit,
            "clear_limit": self.clear_limit,
        }

    def _learned(self) -> dict[str, Any]:
        return {"run": self._run}

    def _load(self, learned: dict[str, Any]) -> None:
        self._run = int(learned["run"])

    PACKED_WIDTH = 1

    def pack(self) -> Sequence[float]:
        return (float(self._run),)

    def unpack(self, values: Sequence[float]) -> None:
        self._run = int(values[0])

    def _blank_learned(self) -> None:
        self._run = 0

    def _forget(self) -> None:
        self._run = 0

    def observe(self, time: float, check_error: float) -> list[AlertEvent]:
        """Feed the error of one reference (zero/span) check."""
        if math.isnan(check_error):
            return []
        size = abs(check_error)
        self._run = self._run + 1 if size > self.limit else 0
        if self._active is not None:
            if size > self.clear_limit:
                return []
            self._forget()
            message = f"check error {check_error:+.4g} is within ±{self.clear_limit:.4g} again"
            return [self._emit(time, "cleared", check_error, self.clear_limit, message)]
        if self.hard_limit is not None and size > self.hard_limit:
            message = (
                f"check error {check_error:+.4g} is beyond the hard limit ±{self.hard_limit:.4g}"
            )
            return [self._emit(time, "raised", check_error, self.hard_limit, message)]
        if self._run >= self.consecutive:
            message = (
                f"{self._run} checks in a row beyond ±{self.limit:.4g} (last {check_error:+.4g})"
            )
            return [self._emit(time, "raised", check_error, self.limit, message)]
        return []


class CorrectionCapRule(_LatchedRule):
    """The correction is at or over its cap: the sensor needs recalibration or replacement."""

    __slots__ = ("cap", "clear_dwell", "clear_fraction", "dwell")

    name = "correction_cap"

    def __init__(
        self,
        *,
        channel: str,
        cap: float,
        clear_fraction: float = 0.9,
        dwell: float = 0.0,
        clear_dwell: float | None = None,
        severity: str = "critical",
    ) -> None:
        self.cap = _positive("correction cap", cap)
        self.clear_fraction = _fraction("clear_fraction", clear_fraction)
        self.dwell = dwell
        self.clear_dwell = dwell if clear_dwell is None else clear_dwell
        latch = Latch(
            self.cap, self.cap * self.clear_fraction, dwell, self.clear_dwell, inclusive=True
        )
        super().__init__(channel=channel, severity=severity, latch=latch)

    def _settings(self) -> dict[str, Any]:
        return {
            "cap": self.cap,
            "clear_fraction": self.clear_fraction,
            "dwell": self.dwell,
            "clear_dwell": self.clear_dwell,
        }

    def observe(self, time: float, correction: float) -> list[AlertEvent]:
        """Feed the correction applied at `time`."""
        change = self._latch.update(time, abs(correction))
        if change is None:
            return []
        if change == "raised":
            message = (
                f"correction {correction:+.4g} is at its cap ±{self.cap:.4g}: "
                "recalibrate or replace the sensor"
            )
        else:
            message = f"correction {correction:+.4g} is back below ±{self._latch.clear_level:.4g}"
        return [self._emit(time, change, correction, self.cap, message)]


class ModelHealthRule(_LatchedRule):
    """Any named model problem (e.g. wind_up, ill_conditioned, input_stale) for `dwell` s.

    While raised, a changed set of problems repeats the raised event with the new names, so
    the retained alert always says what is wrong now. value = number of problems.
    """

    __slots__ = ("clear_dwell", "dwell")

    name = "model_health"

    def __init__(
        self,
        *,
        channel: str,
        dwell: float = 0.0,
        clear_dwell: float | None = None,
        severity: str = "warning",
    ) -> None:
        self.dwell = dwell
        self.clear_dwell = dwell if clear_dwell is None else clear_dwell
        # Level = number of problems: raised at one or more, clear at none.
        latch = Latch(1.0, 1.0, dwell, self.clear_dwell, inclusive=True)
        super().__init__(channel=channel, severity=severity, latch=latch)

    def _settings(self) -> dict[str, Any]:
        return {"dwell": self.dwell, "clear_dwell": self.clear_dwell}

    def observe(self, time: float, problems: Iterable[str]) -> list[AlertEvent]:
        """Feed the set of problem names the model reports now (empty: healthy)."""
        names = sorted(set(problems)) if problems else []
        was_active = self._active
        change = self._latch.update(time, float(len(names)))
        if change == "cleared":
            return [self._emit(time, "cleared", 0.0, None, "model healthy again")]
        if change is None and (was_active is None or not names):
            return []  # nothing changed (the usual reading): no message to compare
        message = _problem_message(names)
        # The active event's message names the problems it was raised for (and survives a
        # snapshot with it), so comparing messages tells whether the set has changed.
        changed = was_active is not None and bool(names) and was_active.message != message
        if change == "raised" or changed:
            return [self._emit(time, "raised", float(len(names)), None, message)]
        return []


def _problem_message(names: list[str]) -> str:
    return "model problems: " + ", ".join(names)


RULE_CLASSES: dict[str, type[AlertRule]] = {
    rule.name: rule
    for rule in (
        DriftLimitRule,
        RateLimitRule,
        ForecastRule,
        ResidualChangeRule,
        CheckFailureRule,
        CorrectionCapRule,
        ModelHealthRule,
    )
}
