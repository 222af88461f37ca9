"""A small declarative schema: one definition drives validation, defaults and the JSON Schema.

Each config section is a tuple of `Key`s. `read_section` checks a YAML mapping against it —
unknown keys (with a did-you-mean), wrong types, bad durations, out-of-range numbers — and
collects *every* problem instead of stopping at the first, because `zeroline check` must list
them all. `json_schema` turns the same definitions into a JSON Schema for editors, so the
two cannot drift apart.
"""

from __future__ import annotations

import difflib
import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any

from zeroline.durations import UNIT_SECONDS, parse_duration, parse_rate
from zeroline.errors import ConfigError


@dataclass(frozen=True)
class Problem:
    """One thing wrong with a config, at a key path."""

    path: str
    message: str


class Problems:
    """Collects problems while a config is read."""

    def __init__(self) -> None:
        self.items: list[Problem] = []

    def add(self, path: str, message: str) -> None:
        self.items.append(Problem(path, message))

    def __bool__(self) -> bool:
        return bool(self.items)


@dataclass(frozen=True)
class Key:
    """One key of a section: its kind decides how the value is checked and converted.

    kinds: str, int, number, bool, duration, rate, enum, section, list, any, string_map,
    number_or_duration.
    """

    name: str
    kind: str
    doc: str
    required: bool = False
    default: Any = None
    choices: tuple[str, ...] = ()
    minimum: float | None = None
    maximum: float | None = None
    keys: tuple[Key, ...] = ()  # for kind == "section"
    items: Key | None = None  # for kind == "list"
    positive: bool = False
    extra: dict[str, Any] = field(default_factory=dict)  # extra JSON Schema for "any"


def read_section(data: Any, keys: tuple[Key, ...], path: str, problems: Problems) -> dict[str, Any]:
    """Validate a mapping against `keys`; returns converted values (defaults filled in)."""
    result: dict[str, Any] = {}
    if data is None:
        data = {}
    if not isinstance(data, Mapping):
        problems.add(path, f"expected a mapping of keys, got {_shown(data)}")
        # The keys inside are unknown, not missing: report no required key on top of this.
        return {key.name: _default(key, _join(path, key.name), problems) for key in keys}
    names = [key.name for key in keys]
    for given in data:
        if given not in names:
            close = difflib.get_close_matches(str(given), names, n=1, cutoff=0.6)
            hint = f"did you mean {close[0]!r}?" if close else f"known keys: {', '.join(names)}"
            problems.add(_join(path, str(given)), f"unknown key {given!r}; {hint}")
    for key in keys:
        child = _join(path, key.name)
        if key.name not in data or data[key.name] is None:
            if key.required:
                problems.add(child, f"missing required key; add `{key.name}:` ({key.doc})")
            result[key.name] = _default(key, child, problems)
            continue
        result[key.name] = read_value(data[key.name], key, child, problems)
    return result


def read_value(value: Any, key: Key, path: str, problems: Problems) -> Any:
    """Check and convert one value; on a problem records it and returns the default."""
    try:
        return _CONVERTERS[key.kind](value, key, path, problems)
    except ConfigError as error:
        problems.add(path, error.message)
        return key.default


def _default(key: Key, path: str, problems: Problems) -> Any:
    """The value of an absent key: sections get their own defaults; defaults are written in
    the user's form (e.g. "7d") and converted like a given value."""
    if key.kind == "section":
        return read_section({}, key.keys, path, problems) if not key.required else None
    if key.default is None:
        return None
    return _CONVERTERS[key.kind](key.default, key, path, problems)


def _join(path: str, name: str) -> str:
    return f"{path}.{name}" if path else name


def _shown(value: Any) -> str:
    """A value as the user wrote it in YAML (true, not Python's True), shortened."""
    if isinstance(value, bool) or value is None:
        return {True: "true", False: "false", None: "null"}[value]
    text = repr(value)
    return text if len(text) <= 40 else text[:37] + "..."


def _str(value: Any, key: Key, path: str, problems: Problems) -> str:
    if not isinstance(value, str) or not value.strip():
        raise ConfigError(f"expected a non-empty string, got {_shown(value)}")
    return value.strip()


def _number(value: Any, key: Key, path: str, problems: Problems) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise ConfigError(f"expected a number, got {_shown(value)}{_unquote_hint(value)}")
    _range(float(value), key)
    return float(value)


def _int(value: Any, key: Key, path: str, problems: Problems) -> int:
    if isinstance(value, bool) or not isinstance(value, int):
        raise ConfigError(f"expected a whole number, got {_shown(value)}{_unquote_hint(value)}")
    _range(value, key)
    return value


def _unquote_hint(value: Any) -> str:
    """A number written in quotes is text in YAML; say so instead of just "not a number"."""
    if isinstance(value, str):
        try:
            float(value)
        except ValueError:
            return ""
        return f"; remove the quotes: {value.strip()}"
    return ""


def _range(value: float, key: Key, shown: str = "") -> None:
    """Check the bounds; `shown` is the value as the user wrote it (e.g. 2/d), if not a plain
    number."""
    shown = shown or f"{value:g}"
    if key.positive and value <= 0:
        raise ConfigError(f"must be greater than zero, got {shown}")
    if key.minimum is not None and value < key.minimum:
        raise ConfigError(f"must be at least {key.minimum:g}, got {shown}")
    if key.maximum is not None and value > key.maximum:
        raise ConfigError(f"must be at most {key.maximum:g}, got {shown}")


def _bool(value: Any, key: Key, path: str, problems: Problems) -> bool:
    if not isinstance(value, bool):
        raise ConfigError(f"expected true or false, got {_shown(value)}")
    return value


def _duration(value: Any, key: Key, path: str, problems: Problems) -> float:
    if isinstance(value, str) and value.strip().startswith("-"):
        raise ConfigError(
            f"{value!r}: a duration cannot be negative; write e.g. {value.strip()[1:]}"
        )
    seconds = parse_duration(value)
    _range(seconds, key, repr(value))
    return seconds


def _number_or_duration(value: Any, key: Key, path: str, problems: Problems) -> float:
    if isinstance(value, str):
        return _duration(value, key, path, problems)
    return _number(value, key, path, problems)


def _rate(value: Any, key: Key, path: str, problems: Problems) -> float:
    try:
        rate = parse_rate(value)
    except ConfigError:
        # parse_rate's messages quote the unit it tried ("1fortnight"); quote what was written.
        units = ", ".join(UNIT_SECONDS)
        raise ConfigError(
            f"{_shown(value)} is not a rate; write an amount per unit of time, "
            f"e.g. 2/d or 0.5/h (units: {units})"
        ) from None
    _range(rate, key, _shown(value))
    return rate


def _enum(value: Any, key: Key, path: str, problems: Problems) -> str:
    text = str(value).strip() if isinstance(value, (str, int, float)) else None
    if text is None or text not in key.choices:
        close = difflib.get_close_matches(str(value), key.choices, n=1)
        hint = f"did you mean {close[0]!r}?" if close else f"one of: {', '.join(key.choices)}"
        raise ConfigError(f"{_shown(value)} is not allowed; {hint}")
    return text


def _section(value: Any, key: Key, path: str, problems: Problems) -> dict[str, Any]:
    return read_section(value, key.keys, path, problems)


def _list(value: Any, key: Key, path: str, problems: Problems) -> list[Any]:
    if not isinstance(value, list):
        raise ConfigError(f"expected a list, got {_shown(value)}")
    assert key.items is not None
    return [read_value(item, key.items, f"{path}[{i}]", problems) for i, item in enumerate(value)]


def _any(value: Any, key: Key, path: str, problems: Problems) -> Any:
    return value


def _string_map(value: Any, key: Key, path: str, problems: Problems) -> dict[str, str]:
    if not isinstance(value, Mapping):
        raise ConfigError(f"expected a mapping of names to text, got {_shown(value)}")
    result: dict[str, str] = {}
    for name, text in value.items():
        if not isinstance(text, (str, int, float)) or isinstance(text, bool):
            problems.add(f"{path}.{name}", f"expected text, got {_shown(text)}")
            continue
        result[str(name)] = str(text)
    return result


_CONVERTERS: dict[str, Callable[[Any, Key, str, Problems], Any]] = {
    "str": _str,
    "number": _number,
    "int": _int,
    "bool": _bool,
    "duration": _duration,
    "number_or_duration": _number_or_duration,
    "rate": _rate,
    "enum": _enum,
    "section": _section,
    "list": _list,
    "any": _any,
    "string_map": _string_map,
}

# --- JSON Schema ----------------------------------------------------------------------------

_UNITS = "|".join(UNIT_SECONDS)  # the loader's unit words, so the two cannot disagree
_AMOUNT = r"[0-9]+(\.[0-9]*)?([eE][+-]?[0-9]+)?"
DURATION_PATTERN = rf"^\s*{_AMOUNT}\s*({_UNITS})\s*$"
RATE_PATTERN = rf"^\s*[-+]?{_AMOUNT}\s*/\s*({_AMOUNT})?\s*({_UNITS})\s*$"


def _enum_values(choices: tuple[str, ...]) -> list[str | int | float]:
    """The choices, plus the number YAML makes of a numeric one (`protocol: 5` is the int 5,
    which the loader accepts as "5")."""
    values: list[str | int | float] = []
    for choice in choices:
        values.append(choice)
        try:
            number: int | float = int(choice)
        except ValueError:
            try:
                number = float(choice)
            except ValueError:
                continue
        if str(number) == choice:
            values.append(number)
    return values


def json_schema_of(key: Key) -> dict[str, Any]:
    """The JSON Schema fragment for one key."""
    schema: dict[str, Any] = {"description": key.doc}
    kind = key.kind
    if kind == "str":
        schema.update(type="string", minLength=1)
    elif kind in {"number", "int"}:
        schema["type"] = "number" if kind == "number" else "integer"
        if key.minimum is not None:
            schema["minimum"] = key.minimum
        if key.maximum is not None:
            schema["maximum"] = key.maximum
        if key.positive:
            schema["exclusiveMinimum"] = 0
    elif kind == "bool":
        schema["type"] = "boolean"
    elif kind == "duration":
        schema.update(type="string", pattern=DURATION_PATTERN)
    elif kind == "number_or_duration":
        schema["anyOf"] = [{"type": "number"}, {"type": "string", "pattern": DURATION_PATTERN}]
    elif kind == "rate":
        schema["anyOf"] = [{"type": "number"}, {"type": "string", "pattern": RATE_PATTERN}]
    elif kind == "enum":
        schema["enum"] = _enum_values(key.choices)
    elif kind == "section":
        schema.update(section_schema(key.keys))
    elif kind == "list":
        assert key.items is not None
        schema.update(type="array", items=json_schema_of(key.items))
    elif kind == "string_map":
        schema.update(type="object", additionalProperties={"type": ["string", "number"]})
    elif kind == "any":
        schema.update(key.extra)
    if key.default is not None and kind not in {"section", "list"}:
        schema["default"] = key.default
    return schema


def section_schema(keys: tuple[Key, ...]) -> dict[str, Any]:
    """JSON Schema of a section: an object with exactly these keys."""
    return {
        "type": "object",
        "additionalProperties": False,
        "properties": {key.name: json_schema_of(key) for key in keys},
        "required": [key.name for key in keys if key.required],
    }
