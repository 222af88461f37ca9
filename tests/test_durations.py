"""Durations (`30s`, `15min`, `36h`, `7d`) and rates (`2/d`) as users write them.

Source: design §2 and §5 (the duration and rate forms the config uses). The unit lengths
are SI / civil time (minute 60 s, hour 3600 s, day 86400 s, week 7 d; the year is the
Julian year of 365.25 d, IAU convention). A duration or rate must be a finite number: an
infinite half-life or NaN rate limit is nonsense, not a setting (common practice, no
source).
"""

from __future__ import annotations

import pytest

from zeroline.durations import UNIT_SECONDS, parse_duration, parse_rate
from zeroline.errors import ConfigError


@pytest.mark.parametrize(
    ("text", "seconds"),
    [
        ("30s", 30.0),
        ("15min", 900.0),
        ("36h", 129600.0),
        ("7d", 604800.0),
        ("2w", 1209600.0),
        ("1y", 31557600.0),
        ("250ms", 0.25),
        ("10sec", 10.0),
        ("1.5h", 5400.0),
        ("2.h", 7200.0),
        ("1e3s", 1000.0),
        (" 7 d ", 604800.0),
        ("0s", 0.0),
    ],
)
def test_durations_in_seconds(text: str, seconds: float) -> None:
    assert parse_duration(text) == pytest.approx(seconds, rel=1e-15)


def test_every_unit_is_listed_in_the_hint() -> None:
    """The error hint lists every accepted unit, so the message says what would be right."""
    with pytest.raises(ConfigError) as caught:
        parse_duration("7 days")
    assert all(unit in str(caught.value) for unit in UNIT_SECONDS)
    assert "e.g. 30s, 15min, 36h, 7d" in str(caught.value)


@pytest.mark.parametrize(
    "text",
    ["7", "d", "7 days", "7m", "-3h", "+3h", "7D", "3h30min", "", "  ", "h7", "1,5h", "∞s",
     "1e400s", "1e999d", "nan s", "infs"],
)  # fmt: skip
def test_bad_durations_are_refused(text: str) -> None:
    """Not a number with a known unit, or not finite: a ConfigError saying the form."""
    with pytest.raises(ConfigError) as caught:
        parse_duration(text)
    assert "\n" not in str(caught.value)


@pytest.mark.parametrize("value", [7, 7.0, None, True, ["7d"], {"d": 7}])
def test_non_strings_are_refused(value: object) -> None:
    with pytest.raises(ConfigError, match="expected a duration string"):
        parse_duration(value)


def test_zero_can_be_forbidden() -> None:
    with pytest.raises(ConfigError, match="longer than zero"):
        parse_duration("0h", allow_zero=False)
    assert parse_duration("1ms", allow_zero=False) == pytest.approx(1e-3)


@pytest.mark.parametrize(
    ("text", "per_second"),
    [
        ("2/d", 2 / 86400),
        ("0.5/h", 0.5 / 3600),
        ("3/min", 3 / 60),
        ("1/7d", 1 / 604800),
        ("-2/d", -2 / 86400),
        (" 2 / d ", 2 / 86400),
        (1.5, 1.5),
        (2, 2.0),
    ],
)
def test_rates(text: object, per_second: float) -> None:
    """Units per unit of time, in units per second; a bare number is per second."""
    assert parse_rate(text) == pytest.approx(per_second, rel=1e-15)


@pytest.mark.parametrize(
    "text", ["2", "2/", "/d", "x/d", "2/0d", "2/days", True, None, "nan/d", "inf/d",
             float("nan"), float("inf")],
)  # fmt: skip
def test_bad_rates_are_refused(text: object) -> None:
    """Missing amount or unit, a zero or unknown time unit, or a non-finite amount."""
    with pytest.raises(ConfigError) as caught:
        parse_rate(text)
    assert "\n" not in str(caught.value)
