"""The alert rules of one channel, built from its `alerts:` config and fed by the channel.

`Channel` calls `observe` once per processed reading with what it computed (drift, drift
rate, the forecast function, the standardised residual, the error at a reference check, the
correction, model-health problems); this module maps those onto the rules of
`zeroline.alert_book` and keeps their state in the channel snapshot.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np
import numpy.typing as npt

from zeroline.alert_book import AlertBook
from zeroline.alert_rules import (
    AlertRule,
    CheckFailureRule,
    CorrectionCapRule,
    DriftLimitRule,
    ForecastRule,
    ModelHealthRule,
    RateLimitRule,
    ResidualChangeRule,
)
from zeroline.alerts import AlertEvent
from zeroline.config import AlertConfig
from zeroline.objects import shallow_copy

Array = npt.NDArray[np.float64]
Forecaster = Callable[[Array], tuple[Array, Array]]

#: Forecasts are recomputed at most once per this fraction of the horizon (and at most
#: hourly), in sample time: the baseline changes slowly and a 200-point forecast on every
#: reading would dominate the per-reading cost.
FORECAST_FRACTION = 1.0 / 200.0
FORECAST_AT_MOST_EVERY = 3600.0


def build_rules(channel: str, config: AlertConfig, *, cap: float | None) -> list[AlertRule]:
    """The enabled rules of a channel, with its severities, dwell and hysteresis."""
    severity = config.severity
    dwell = config.dwell
    rules: list[AlertRule] = []
    if config.drift_limit is not None:
        rules.append(
            DriftLimitRule(
                limit=config.drift_limit,
                clear_fraction=config.clear_fraction,
                severity=severity["drift_limit"],
                channel=channel,
                dwell=dwell,
            )
        )
        if config.horizon is not None:
            rules.append(
                ForecastRule(
                    drift_limit=config.drift_limit,
                    horizon_s=config.horizon,
                    min_interval=max(FORECAST_AT_MOST_EVERY, FORECAST_FRACTION * config.horizon),
                    severity=severity["forecast"],
                    channel=channel,
                    dwell=dwell,
                )
            )
    if config.rate_limit is not None:
        rules.append(
            RateLimitRule(
                limit_per_s=config.rate_limit,
                clear_fraction=config.clear_fraction,
                severity=severity["rate_limit"],
                channel=channel,
                dwell=dwell,
            )
        )
    if config.residual_change:
        rules.append(
            ResidualChangeRule(
                channel=channel,
                k=config.cusum_k,
                h=config.cusum_h,
                severity=severity["residual_change"],
            )
        )
    if config.check is not None:
        rules.append(
            CheckFailureRule(
                channel=channel,
                limit=config.check.limit,
                consecutive=config.check.consecutive,
                hard_limit=config.check.hard_limit,
                clear_limit=config.check.clear_limit,
                severity=severity["check_failures"],
            )
        )
    if cap is not None:
        rules.append(
            CorrectionCapRule(
                cap=cap, severity=severity["correction_cap"], channel=channel, dwell=dwell
            )
        )
    rules.append(ModelHealthRule(severity=severity["model_health"], channel=channel, dwell=dwell))
    return rules


#: Rules built once per alert config (and cap), copied for each channel: building and
#: validating them costs more than the rest of a new channel. Keyed by identity, with the
#: config kept alive beside its book so an id cannot be reused; bounded for many reloads.
_PROTOTYPES: dict[tuple[int, float | None], tuple[AlertConfig, AlertBook]] = {}
_MAX_PROTOTYPES = 256


def _prototype_book(config: AlertConfig, cap: float | None) -> AlertBook:
    key = (id(config), cap)
    known = _PROTOTYPES.get(key)
    if known is not None and known[0] is config:
        return known[1]
    book = AlertBook("", build_rules("", config, cap=cap))
    if len(_PROTOTYPES) >= _MAX_PROTOTYPES:
        _PROTOTYPES.pop(next(iter(_PROTOTYPES)))
    _PROTOTYPES[key] = (config, book)
    return book


class ChannelAlerts:
    """A channel's alert book plus the glue from corrected readings to rule inputs."""

    __slots__ = ("book",)

    def __init__(self, channel: str, config: AlertConfig, *, cap: float | None) -> None:
        self.book = _prototype_book(config, cap).blank_copy(channel)

    def observe(
        self,
        result: Any,
        drift: float | None,
        rate: float | None,
        z: float | None,
        check_error: float | None,
        forecast: Forecaster | None,
        health: list[str],
    ) -> list[AlertEvent]:
        """Events caused by one corrected reading (`zeroline.channel.Corrected`); the
        channel passes the arguments by position (once per reading: keywords cost more)."""
        corrected = result.corrected
        return self.book.observe(
            result.time,
            drift,
            rate,
            forecast,
            z,
            abs(check_error) if check_error is not None else None,
            None if corrected is None else result.raw - corrected,
            health,
        )

    def on_missing(self, time: float, problems: list[str]) -> list[AlertEvent]:
        """A reading that could not be corrected still counts for model health."""
        return self.book.observe(time, problems=problems)

    def reset(self, time: float, reason: str) -> list[AlertEvent]:
        """Clear every rule, e.g. after a recalibration."""
        return self.book.clear_all(time, reason)

    def active(self) -> dict[str, AlertEvent]:
        return self.book.active()

    def to_state(self) -> dict[str, Any]:
        return self.book.to_state()

    def blank_copy(self, channel: str) -> ChannelAlerts:
        """The same rules for `channel`, all clear (see `AlertBook.blank_copy`)."""
        new = shallow_copy(self)
        new.book = self.book.blank_copy(channel)
        return new

    def packed_layout(self) -> list[tuple[str, int]]:
        return self.book.packed_layout()

    def pack(self) -> list[float]:
        return self.book.pack()

    def active_json(self) -> dict[str, Any] | None:
        return self.book.active_json()

    def unpack(self, values: list[float], active: dict[str, Any] | None) -> None:
        self.book.unpack(values, active)

    def load_state(self, state: dict[str, Any]) -> None:
        self.book = AlertBook.from_state(state)
