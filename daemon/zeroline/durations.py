"""Durations and rates as users write them: `30s`, `15min`, `36h`, `7d`, `2/d`.

Everything inside zeroline works in seconds; these helpers are the only place that knows
the unit words, so messages about a bad duration read the same everywhere.
"""

from __future__ import annotations

import math
import re

from zeroline.errors import ConfigError

#: Unit words accepted after a number, in seconds. `m` is minutes, as in most duration
#: notations of monitoring tools (there is no month: months differ in length).
UNIT_SECONDS: dict[str, float] = {
    "ms": 1e-3,
    "s": 1.0,
    "sec": 1.0,
    "m": 60.0,
    "min": 60.0,
    "h": 3600.0,
    "d": 86400.0,
    "w": 7 * 86400.0,
    "y": 365.25 * 86400.0,  # Julian year
}

_DURATION = re.compile(r"^\s*([0-9]+(?:\.[0-9]*)?(?:[eE][+-]?[0-9]+)?)\s*([a-z]+)\s*$")
_HINT = "a number and a unit, e.g. 30s, 15min, 36h, 7d (units: " + ", ".join(UNIT_SECONDS) + ")"


def parse_duration(text: object, *, allow_zero: bool = True) -> float:
    """Return the duration `text` in seconds, or raise ConfigError saying what is accepted.

    >>> parse_duration("36h")
    129600.0
    >>> parse_duration("15min")
    900.0
    """
    if isinstance(text, bool) or not isinstance(text, str):
        raise ConfigError(f"expected a duration string, got {text!r}; write {_HINT}")
    match = _DURATION.match(text)
    if match is None or match.group(2) not in UNIT_SECONDS:
        raise ConfigError(f"{text!r} is not a duration; write {_HINT}")
    seconds = float(match.group(1)) * UNIT_SECONDS[match.group(2)]
    if not math.isfinite(seconds):
        raise ConfigError(f"{text!r} is too long to be a duration; write {_HINT}")
    if seconds == 0 and not allow_zero:
        raise ConfigError(f"{text!r} must be longer than zero")
    return seconds


def parse_rate(text: object) -> float:
    """Return a rate such as `2/d` (units per day) in units per second.

    A bare number is taken as units per second.

    >>> round(parse_rate("2/d") * 86400, 12)
    2.0
    """
    if isinstance(text, bool):
        raise ConfigError(f"expected a rate such as 2/d, got {text!r}")
    if isinstance(text, (int, float)):
        if not math.isfinite(text):
            raise ConfigError(f"{text!r} is not a finite rate; write e.g. 2/d")
        return float(text)
    if not isinstance(text, str) or "/" not in text:
        raise ConfigError(f"{text!r} is not a rate; write an amount per unit time, e.g. 2/d, 0.5/h")
    amount, _, unit = text.partition("/")
    try:
        value = float(amount)
    except ValueError:
        raise ConfigError(
            f"{text!r} is not a rate; the amount before '/' must be a number"
        ) from None
    if not math.isfinite(value):
        raise ConfigError(f"{text!r} is not a rate; the amount must be a finite number")
    unit = unit.strip()
    per = parse_duration(unit if unit[:1].isdigit() else "1" + unit, allow_zero=False)
    return value / per
