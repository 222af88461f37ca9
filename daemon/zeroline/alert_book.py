"""`AlertBook`: the alert rules of one channel, fed once per processed reading.

The channel calls `observe(time, drift=…, rate=…, …)` with whatever it knows at that
reading; each number goes to the rule that watches it (a number for a rule that is not
enabled is ignored, and a rule gets nothing when its number is None). The events come back
in the order of `RULE_NAMES`. `active()` is the current raised state per rule, what the
retained `<prefix>/<channel>/alert` topic shows. The book's state is the list of its
rules' states, so the channel snapshot can carry it across a restart.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from typing import Any, TypeVar

from zeroline.alert_rules import (
    AlertRule,
    CheckFailureRule,
    CorrectionCapRule,
    DriftLimitRule,
    ForecastRule,
    ModelHealthRule,
    Predictor,
    RateLimitRule,
    ResidualChangeRule,
)
from zeroline.alerts import RULE_NAMES, AlertEvent
from zeroline.errors import ConfigError
from zeroline.objects import shallow_copy

RuleT = TypeVar("RuleT", bound=AlertRule)


#: The typed handle `_resolve_handles` sets for each rule (`blank_copy` re-points them).
_HANDLE_OF = {
    DriftLimitRule.name: "_drift",
    RateLimitRule.name: "_rate",
    ForecastRule.name: "_forecast",
    ResidualChangeRule.name: "_residual",
    CheckFailureRule.name: "_checks",
    CorrectionCapRule.name: "_correction",
    ModelHealthRule.name: "_health",
}


class AlertBook:
    """The enabled alert rules of one channel.

    >>> book = AlertBook.for_limits("site1-no2", drift_limit=15.0)
    >>> [e.rule for e in book.observe(0.0, drift=16.0)]
    ['drift_limit']
    >>> sorted(book.active())
    ['drift_limit']
    """

    __slots__ = (
        "_checks",
        "_correction",
        "_drift",
        "_forecast",
        "_health",
        "_rate",
        "_residual",
        "channel",
        "rules",
    )

    def __init__(self, channel: str, rules: Iterable[AlertRule]) -> None:
        self.channel = channel
        by_name: dict[str, AlertRule] = {}
        for rule in rules:
            if rule.channel != channel:
                raise ConfigError(
                    f"alert rule {rule.name} belongs to channel {rule.channel!r}, not {channel!r}"
                )
            if rule.name in by_name:
                raise ConfigError(f"alert rule {rule.name} is given twice for channel {channel!r}")
            by_name[rule.name] = rule
        self.rules = {name: by_name[name] for name in RULE_NAMES if name in by_name}
        self._resolve_handles()

    def _resolve_handles(self) -> None:
        # Typed handles, resolved once, so `observe` routes without looking anything up.
        self._drift = self._typed(DriftLimitRule)
        self._rate = self._typed(RateLimitRule)
        self._forecast = self._typed(ForecastRule)
        self._residual = self._typed(ResidualChangeRule)
        self._checks = self._typed(CheckFailureRule)
        self._correction = self._typed(CorrectionCapRule)
        self._health = self._typed(ModelHealthRule)

    def _typed(self, rule_class: type[RuleT]) -> RuleT | None:
        rule = self.rules.get(rule_class.name)
        return rule if isinstance(rule, rule_class) else None

    @classmethod
    def for_limits(
        cls,
        channel: str,
        *,
        drift_limit: float | None = None,
        rate_limit_per_s: float | None = None,
        horizon_s: float | None = None,
        correction_cap: float | None = None,
        dwell: float = 0.0,
    ) -> AlertBook:
        """The usual book from a channel's `alerts:` limits (design §5).

        residual_change and model_health are always on; the others when their limit is
        given. A horizon needs a drift limit (the forecast is of reaching it).
        """
        rules: list[AlertRule] = []
        if drift_limit is not None:
            rules.append(DriftLimitRule(channel=channel, limit=drift_limit, dwell=dwell))
        if rate_limit_per_s is not None:
            rules.append(RateLimitRule(channel=channel, limit_per_s=rate_limit_per_s, dwell=dwell))
        if horizon_s is not None:
            if drift_limit is None:
                raise ConfigError(
                    "alerts.horizon needs alerts.drift_limit: the forecast warns before the "
                    "drift reaches that limit"
                )
            rules.append(
                ForecastRule(
                    channel=channel, drift_limit=drift_limit, horizon_s=horizon_s, dwell=dwell
                )
            )
        rules.append(ResidualChangeRule(channel=channel))
        if correction_cap is not None:
            rules.append(CorrectionCapRule(channel=channel, cap=correction_cap, dwell=dwell))
        rules.append(ModelHealthRule(channel=channel, dwell=dwell))
        return cls(channel, rules)

    def observe(
        self,
        time: float,
        drift: float | None = None,
        rate_per_s: float | None = None,
        forecast: Predictor | None = None,
        residual_z: float | None = None,
        check_error: float | None = None,
        correction: float | None = None,
        problems: Iterable[str] | None = None,
    ) -> list[AlertEvent]:
        """Feed what is known at `time`; the raise and clear events it causes. (The
        channel passes every number by position, in this order, once per reading.)"""
        events: list[AlertEvent] = []
        if drift is not None and self._drift is not None:
            events += self._drift.observe(time, drift)
        if rate_per_s is not None and self._rate is not None:
            events += self._rate.observe(time, rate_per_s)
        if forecast is not None and self._forecast is not None:
            events += self._forecast.observe(time, forecast)
        if residual_z is not None and self._residual is not None:
            events += self._residual.observe(time, residual_z)
        if check_error is not None and self._checks is not None:
            events += self._checks.observe(time, check_error)
        if correction is not None and self._correction is not None:
            events += self._correction.observe(time, correction)
        if problems is not None and self._health is not None:
            events += self._health.observe(time, problems)
        return events

    def clear_all(self, time: float, reason: str = "cleared on request") -> list[AlertEvent]:
        """Clear every rule (e.g. "sensor recalibrated"); the clear events of raised ones."""
        events: list[AlertEvent] = []
        for rule in self.rules.values():
            events += rule.clear(time, reason)
        return events

    def active(self) -> dict[str, AlertEvent]:
        """The raise event in force for each raised rule."""
        return {name: rule.active for name, rule in self.rules.items() if rule.active is not None}

    def to_state(self) -> dict[str, Any]:
        """The book as JSON-able values (settings, learned state, active events)."""
        return {"channel": self.channel, "rules": [r.to_state() for r in self.rules.values()]}

    def blank_copy(self, channel: str) -> AlertBook:
        """The same rules for `channel`, all clear (cheaper than building the rules)."""
        new = shallow_copy(self)
        new.channel = channel
        rules = {name: rule.blank_copy(channel) for name, rule in self.rules.items()}
        new.rules = rules
        for name in rules:  # point the typed handles at the copies
            setattr(new, _HANDLE_OF[name], rules[name])
        return new

    def packed_layout(self) -> list[tuple[str, int]]:
        """Fields (name, number of float64 values) of `pack`, in order."""
        return [(f"alerts.{name}", rule.PACKED_WIDTH) for name, rule in self.rules.items()]

    def pack(self) -> list[float]:
        """Every rule's learned state as float64 values, in `packed_layout` order."""
        values: list[float] = []
        for rule in self.rules.values():
            values += rule.pack()
        return values

    def active_json(self) -> dict[str, Any] | None:
        """The active events as JSON (they hold free text), or None when all are clear."""
        rules = self.rules
        for rule in rules.values():  # a loop, not any(): this runs per channel per snapshot
            if rule.active:
                return {name: r.active.to_json() for name, r in rules.items() if r.active}
        return None  # most channels, most of the time

    def unpack(self, values: Sequence[float], active: dict[str, Any] | None) -> None:
        """Restore `pack`'s values and `active_json`'s events."""
        start = 0
        for rule in self.rules.values():
            end = start + rule.PACKED_WIDTH
            rule.unpack(values[start:end])
            start = end
        for name, event in (active or {}).items():
            if name in self.rules:  # a rule since removed from the config is dropped
                self.rules[name]._active = AlertEvent.from_json(event)

    @classmethod
    def from_state(cls, state: dict[str, Any]) -> AlertBook:
        """Rebuild a book from `to_state` output."""
        return cls(state["channel"], [AlertRule.from_state(r) for r in state["rules"]])
