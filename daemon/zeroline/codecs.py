"""Payload decoders: raw MQTT payload bytes in, `Reading`s out, or one `DecodeError`.

The MQTT callback hands every payload, with its arrival time, to the decoder its channel
was configured with. A decoder either returns the readings the payload carries or raises
`zeroline.errors.DecodeError(reason, detail)`; it never raises anything else, whatever
the bytes (the fuzz tests hold it to that). `reason` is a stable counter key, `detail` a
sentence saying what is wrong and what would be right, quoting at most ~60 characters of
the offending text.

Three payload kinds:

- ``json``: an object ``{"time": ..., "value": ...}`` (field names configurable) or an
  array of such objects (a batch). Other top-level finite numbers go into
  `Reading.fields` (a zero check's ``check_value``, the probe's ``temp``); strings,
  booleans, nulls, NaN/Infinity and nested containers among them are ignored quietly,
  because a logger's auxiliary fields are none of the decoder's business until a channel
  asks for one. ``"value": null`` reads as "no value" (like an absent value): allowed
  when a numeric field is present, ``missing_value`` otherwise. Time is epoch seconds,
  epoch milliseconds or an RFC 3339 string; absent means the arrival time. A batch is
  decoded all or nothing, so a broken record never leaves half a batch behind; an empty
  batch is ``missing_value``.
- ``senml``: RFC 8428 JSON SenML. Base fields (bn, bt, bu, bv) apply to their own record
  and every later one until replaced (§4.1); name = bn + n, time = bt + t, value = bv + v,
  unit = u or else bu; a resolved time below 2**28 is relative to the arrival time
  (§4.5.3). Only records with a numeric ``v`` become readings: records carrying vs, vb, vd
  or only a sum are skipped, and so is a record with a ``bv`` but no ``v`` (the base value
  "is added to the value found in an entry", so it is no value of its own; reading it as
  one would feed phantom samples to the baseline fit). A pack without a single numeric
  record is ``no_numeric_records``. Every record's resolved name is checked (§4.5.1), a
  bver above 10 is refused, and so is an unknown field ending in ``_`` ("must
  understand", §4.4); other unknown fields are ignored. One deliberate relaxation: a
  record without any name (no bn, no n) is accepted with ``name=None``, because the MQTT
  topic already names the channel. RFC 8428 section numbers here are cited from memory.
- ``number``: a bare number as ASCII text (``b"21.5"``, ``b" 3e-2\\n"``); time = arrival.

Reasons (the stable keys of `REASONS`, also the error counters' labels):

=================== ==========================================================
reason              meaning
=================== ==========================================================
payload_too_large   payload longer than DecodeLimits.max_bytes
not_utf8            payload bytes are not valid UTF-8
malformed_json      payload is not valid JSON (or nested absurdly deep)
not_an_object       json: payload (or a batch record) is not a JSON object
missing_value       json: neither a value nor any numeric field
value_not_number    json: the value is not a JSON number (bool is not a number)
non_finite          the value is NaN, infinite, or too large for a float
bad_time            time is not epoch seconds/ms or an RFC 3339 string
time_in_future      time more than max_future_s after arrival
time_too_old        time more than max_past_s before arrival
too_many_records    batch or SenML pack longer than max_records
malformed_senml     senml: not an array of records, wrong field type, bad bver
bad_senml_name      senml: resolved name breaks RFC 8428 §4.5.1
no_numeric_records  senml: no record carries a numeric value
not_a_number        number: payload is not a plain decimal number
=================== ==========================================================

Speed: everything that depends on the configuration (field names, time unit, limits) is
decided once in `make_decoder`, which builds a decoder specialised for it; the per-message
path is one JSON parse plus a flat loop with exact type checks (``type(x) is float``: the
JSON parser only ever produces exact built-in types). The stdlib `json` parser is used.
"""

from __future__ import annotations

import datetime as _dt
import json
import math
import re
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from types import MappingProxyType
from typing import Protocol

import orjson

from zeroline.errors import ConfigError, DecodeError

__all__ = [
    "REASONS",
    "DecodeLimits",
    "Decoder",
    "Reading",
    "make_decoder",
    "parse_rfc3339",
]

#: Every reason a decoder may raise, with its one-line meaning (see the module docstring).
REASONS: Mapping[str, str] = MappingProxyType(
    {
        "payload_too_large": "payload longer than DecodeLimits.max_bytes",
        "not_utf8": "payload bytes are not valid UTF-8",
        "malformed_json": "payload is not valid JSON (or nested absurdly deep)",
        "not_an_object": "json: payload (or a batch record) is not a JSON object",
        "missing_value": "json: neither a value nor any numeric field",
        "value_not_number": "json: the value is not a JSON number (bool is not a number)",
        "non_finite": "the value is NaN, infinite, or too large for a float",
        "bad_time": "time is not epoch seconds/ms or an RFC 3339 string",
        "time_in_future": "time more than max_future_s after arrival",
        "time_too_old": "time more than max_past_s before arrival",
        "too_many_records": "batch or SenML pack longer than max_records",
        "malformed_senml": "senml: not an array of records, wrong field type, bad bver",
        "bad_senml_name": "senml: resolved name breaks RFC 8428 §4.5.1",
        "no_numeric_records": "senml: no record carries a numeric value",
        "not_a_number": "number: payload is not a plain decimal number",
    }
)

KINDS = ("json", "senml", "number")
TIME_UNITS = ("auto", "s", "ms")

#: In `time_unit: auto`, numbers above this are epoch milliseconds. Safe because the two
#: ranges cannot meet in practice: 1e11 seconds after the epoch is the year 5138, and
#: 1e11 milliseconds is 1973-03-03, so every seconds timestamp before 5138 is below it and
#: every milliseconds timestamp after March 1973 is above it. Either mistake would land
#: centuries away from the arrival time, so it is rejected by the time window, never
#: silently misread.
MS_THRESHOLD = 1e11

#: RFC 8428 §4.5.3: resolved times below 2**28 s (1978-07-04) are relative to "now".
SENML_RELATIVE_LIMIT = 2.0**28
#: RFC 8428 §4.1/§4.4: the SenML version this decoder understands (bver defaults to 10).
SENML_VERSION = 10

_QUOTE_CHARS = 60
_NO_FIELDS: Mapping[str, float] = MappingProxyType({})


@dataclass(frozen=True, slots=True)
class Reading:
    """One decoded sample: UTC epoch time, main value, other numeric fields, SenML name/unit.

    >>> Reading(time=1714564800.0, value=21.5, fields={}).value
    21.5
    """

    time: float
    value: float | None
    fields: Mapping[str, float]
    name: str | None = None
    unit: str | None = None


@dataclass(frozen=True)
class DecodeLimits:
    """Bounds that keep one hostile or broken payload from costing more than it is worth."""

    max_bytes: int = 65536
    max_future_s: float = 86400.0
    max_past_s: float = 10 * 365.25 * 86400
    max_records: int = 1000


class Decoder(Protocol):
    """Turns one payload into readings, or raises DecodeError (and nothing else)."""

    def decode(self, payload: bytes, arrival: float) -> list[Reading]: ...


# --------------------------------------------------------------------------- helpers


def _quote(text: str) -> str:
    """`text` quoted for a message, cut to ~60 characters."""
    if len(text) <= _QUOTE_CHARS:
        return repr(text)
    return repr(text[:_QUOTE_CHARS]) + "…"


def _describe(value: object) -> str:
    """A short, safe description of a parsed JSON value (never repr a deep container)."""
    if value is None:
        return "null"
    if value is True or value is False:
        return "true" if value else "false"
    if isinstance(value, str):
        return "the string " + _quote(value)
    if isinstance(value, dict):
        return "an object"
    if isinstance(value, list):
        return "an array"
    text = repr(value)
    return text if len(text) <= _QUOTE_CHARS else text[:_QUOTE_CHARS] + "…"


def _as_float(number: int | float) -> float:
    """`number` as a float; an int too large for a float becomes inf (caught as non-finite)."""
    try:
        return float(number)
    except OverflowError:
        return math.inf


def _iso(epoch: float) -> str:
    """`epoch` as an RFC 3339 UTC string for messages, or as seconds if out of range."""
    try:
        moment = _dt.datetime.fromtimestamp(epoch, tz=_dt.timezone.utc)
    except (OverflowError, ValueError, OSError):
        return f"{epoch!r} s"
    return moment.isoformat().replace("+00:00", "Z")


_JSON = json.JSONDecoder()


def _parse_json(payload: bytes, max_bytes: int) -> object:
    """Size check, UTF-8 check and JSON parse: the common front of json and senml."""
    if len(payload) > max_bytes:
        raise DecodeError(
            "payload_too_large",
            f"payload is {len(payload)} bytes; at most {max_bytes} are accepted "
            "(raise limits.max_bytes or send smaller messages)",
        )
    try:
        # orjson first (0.6 against 3.1 µs a reading, on the per-reading path). It refuses
        # what it cannot represent exactly as the json module does (NaN and Infinity
        # literals, numbers beyond a double, lone surrogates) and all malformed input: the
        # json module below then decides, and words the error. The one difference, an
        # integer beyond 64 bits arriving as a float, changes nothing: numbers become
        # floats anyway (`_as_float`).
        return orjson.loads(payload)
    except orjson.JSONDecodeError:
        pass
    try:
        text = payload.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise DecodeError(
            "not_utf8",
            f"byte 0x{payload[exc.start]:02x} at offset {exc.start} is not valid UTF-8; "
            "send UTF-8 encoded JSON",
        ) from None
    try:
        return _JSON.decode(text)
    except json.JSONDecodeError as exc:
        near = text[max(exc.pos - 20, 0) : exc.pos + 20]
        raise DecodeError(
            "malformed_json",
            f"{exc.msg} at line {exc.lineno} column {exc.colno} near {_quote(near)}; "
            "send valid JSON",
        ) from None
    except (ValueError, RecursionError) as exc:
        # ValueError: an integer literal beyond Python's digit limit; RecursionError: a
        # document nested deeper than the parser's recursion allows. Neither is a reading.
        raise DecodeError(
            "malformed_json",
            f"JSON cannot be parsed ({type(exc).__name__}: {_quote(str(exc))}); "
            "send flat JSON with numbers of ordinary size",
        ) from None


# --------------------------------------------------------------------------- time


_RFC3339 = re.compile(
    r"([0-9]{4})-([0-9]{2})-([0-9]{2})[Tt ]([0-9]{2}):([0-9]{2}):([0-9]{2})(\.[0-9]+)?"
    r"(?:([Zz])|([+-])([0-9]{2}):([0-9]{2}))"
)
_EPOCH_ORDINAL = _dt.date(1970, 1, 1).toordinal()
_RFC3339_HINT = "write RFC 3339 such as '2026-05-01T12:00:00Z' or '2026-05-01T14:00:00.250+02:00'"


def parse_rfc3339(text: str) -> float:
    """Return the UTC epoch seconds of RFC 3339 date-time `text`, or raise DecodeError.

    A space may replace the 'T' (RFC 3339 §5.6 note); second 60 (a leap second) counts as
    the first second of the next minute, as POSIX time has no leap seconds.

    >>> parse_rfc3339("2026-05-01T12:00:00Z")
    1777636800.0
    >>> parse_rfc3339("2026-05-01T14:00:00.250+02:00")
    1777636800.25
    """
    match = _RFC3339.fullmatch(text)
    if match is None:
        raise DecodeError(
            "bad_time", f"time {_quote(text)} is not an RFC 3339 date-time; {_RFC3339_HINT}"
        )
    year, month, day, hour, minute, second, fraction, zulu, sign, off_hour, off_minute = (
        match.groups()
    )
    try:
        days = _dt.date(int(year), int(month), int(day)).toordinal() - _EPOCH_ORDINAL
    except ValueError:
        raise DecodeError(
            "bad_time", f"time {_quote(text)} names no calendar date; {_RFC3339_HINT}"
        ) from None
    # Two-digit fields compare as strings: cheaper than int() and exact for "00".."99".
    if zulu is None:
        if off_hour > "23" or off_minute > "59":
            raise DecodeError(
                "bad_time", f"time {_quote(text)} has an offset out of range; {_RFC3339_HINT}"
            )
        offset = int(off_hour) * 3600 + int(off_minute) * 60
        if sign == "-":
            offset = -offset
    else:
        offset = 0
    if hour > "23" or minute > "59" or second > "60":
        raise DecodeError(
            "bad_time",
            f"time {_quote(text)} has an hour, minute or second out of range; {_RFC3339_HINT}",
        )
    whole = days * 86400 + int(hour) * 3600 + int(minute) * 60 + int(second) - offset
    return whole + float(fraction) if fraction else float(whole)


def _number_time(raw: object) -> float:
    """`raw` as a finite float if it is a JSON number, else raise bad_time."""
    if type(raw) is float or type(raw) is int:
        value = _as_float(raw)
        if math.isfinite(value):
            return value
    raise DecodeError(
        "bad_time",
        f"time is {_describe(raw)}; send epoch seconds, epoch "
        f"milliseconds or RFC 3339 text ({_RFC3339_HINT})",
    )


def _time_auto(raw: object) -> float:
    if type(raw) is str:
        return parse_rfc3339(raw)
    seconds = _number_time(raw)
    return seconds / 1000.0 if seconds > MS_THRESHOLD else seconds


def _time_seconds(raw: object) -> float:
    if type(raw) is str:
        return parse_rfc3339(raw)
    return _number_time(raw)


def _time_milliseconds(raw: object) -> float:
    if type(raw) is str:
        return parse_rfc3339(raw)
    return _number_time(raw) / 1000.0


_TIME_CONVERTERS: dict[str, Callable[[object], float]] = {
    "auto": _time_auto,
    "s": _time_seconds,
    "ms": _time_milliseconds,
}


def _check_window(time: float, arrival: float, limits: DecodeLimits) -> None:
    """Reject a time implausibly far ahead of or behind the arrival time."""
    ahead = time - arrival
    if ahead > limits.max_future_s:
        hint = (
            " (it looks like milliseconds: set time_unit to ms or auto)"
            if (time > MS_THRESHOLD)
            else ""
        )
        raise DecodeError(
            "time_in_future",
            f"time {_iso(time)} is {ahead:.0f} s after arrival "
            f"{_iso(arrival)}; at most {limits.max_future_s:g} s is accepted"
            f"{hint}; check the logger's clock",
        )
    if -ahead > limits.max_past_s:
        raise DecodeError(
            "time_too_old",
            f"time {_iso(time)} is {-ahead:.0f} s before arrival "
            f"{_iso(arrival)}; at most {limits.max_past_s:g} s is accepted; "
            "check the logger's clock and time unit",
        )


# --------------------------------------------------------------------------- json


_MISSING = object()  # "no time field", distinct from an explicit null
_JSON_HINT = 'send an object such as {"time": ..., "value": 21.5} or an array of them'


class _JsonDecoder:
    """``{"time": ..., "value": ...}`` objects, alone or in a batch array."""

    __slots__ = ("_limits", "_time_field", "_to_epoch", "_value_field")

    def __init__(
        self, time_field: str, value_field: str, time_unit: str, limits: DecodeLimits
    ) -> None:
        self._time_field = time_field
        self._value_field = value_field
        self._to_epoch = _TIME_CONVERTERS[time_unit]
        self._limits = limits

    def __repr__(self) -> str:
        return (
            f"make_decoder('json', time_field={self._time_field!r}, "
            f"value_field={self._value_field!r}, limits={self._limits!r})"
        )

    def decode(self, payload: bytes, arrival: float) -> list[Reading]:
        doc = _parse_json(payload, self._limits.max_bytes)
        if type(doc) is dict:
            return [self._reading(doc, arrival)]
        if type(doc) is not list:
            raise DecodeError("not_an_object", f"payload is {_describe(doc)}; {_JSON_HINT}")
        if not doc:
            raise DecodeError("missing_value", f"payload is an empty array; {_JSON_HINT}")
        if len(doc) > self._limits.max_records:
            raise DecodeError(
                "too_many_records",
                f"batch has {len(doc)} records; at most "
                f"{self._limits.max_records} are accepted per message",
            )
        readings = []
        for index, record in enumerate(doc):
            if type(record) is not dict:
                raise DecodeError(
                    "not_an_object",
                    f"batch record {index} is {_describe(record)}; every record must be an object",
                )
            try:
                readings.append(self._reading(record, arrival))
            except DecodeError as exc:
                raise DecodeError(exc.reason, f"batch record {index}: {exc.detail}") from None
        return readings

    def _reading(self, record: dict[str, object], arrival: float) -> Reading:
        time_field, value_field = self._time_field, self._value_field
        raw_time = record.get(time_field, _MISSING)
        if raw_time is _MISSING:
            time = arrival
        else:
            time = self._to_epoch(raw_time)
            _check_window(time, arrival, self._limits)

        raw_value = record.get(value_field)
        value: float | None
        if raw_value is None:
            value = None
        elif type(raw_value) is float or type(raw_value) is int:
            value = _as_float(raw_value)
            if not math.isfinite(value):
                raise DecodeError(
                    "non_finite",
                    f"{value_field!r} is {_describe(raw_value)}; "
                    "send a finite number (a missing reading: omit the field)",
                )
        else:
            raise DecodeError(
                "value_not_number",
                f"{value_field!r} is {_describe(raw_value)}; "
                "send a JSON number such as 21.5 (not a string, bool or object)",
            )

        fields: dict[str, float] = {}
        for key, item in record.items():
            # `x - x == 0.0` is the finiteness test without a call (inf - inf and NaN are NaN).
            if type(item) is float:
                if item - item == 0.0:
                    fields[key] = item
            elif type(item) is int:
                number = _as_float(item)
                if number - number == 0.0:
                    fields[key] = number
        if fields:  # cheaper than comparing every key with the two configured names
            fields.pop(time_field, None)
            fields.pop(value_field, None)
        if value is None and not fields:
            raise DecodeError(
                "missing_value", f"no {value_field!r} and no other numeric field; {_JSON_HINT}"
            )
        return Reading(time, value, MappingProxyType(fields) if fields else _NO_FIELDS)


# --------------------------------------------------------------------------- senml


#: RFC 8428 JSON labels (§4.1, §4.2) and the exact JSON type each may hold (§5).
_NUMBER_TYPES = (int, float)
_SENML_TYPES: dict[str, tuple[type, ...]] = {
    "bn": (str,),
    "bt": _NUMBER_TYPES,
    "bu": (str,),
    "bv": _NUMBER_TYPES,
    "bs": _NUMBER_TYPES,
    "bver": _NUMBER_TYPES,
    "n": (str,),
    "u": (str,),
    "v": _NUMBER_TYPES,
    "vs": (str,),
    "vb": (bool,),
    "vd": (str,),
    "s": _NUMBER_TYPES,
    "t": _NUMBER_TYPES,
    "ut": _NUMBER_TYPES,
}
_TYPE_WORDS: dict[tuple[type, ...], str] = {
    (str,): "a string",
    _NUMBER_TYPES: "a number",
    (bool,): "true or false",
}
_VALUE_LABELS = ("v", "vs", "vb", "vd")
#: RFC 8428 §4.5.1: first character alphanumeric, then alphanumerics and - : . / _
_SENML_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9:./_-]*")
_SENML_HINT = 'send an array of records such as [{"n": "temp", "u": "Cel", "v": 21.5}]'


def _check_senml_record(record: dict[str, object]) -> None:
    """Field types, "must understand" labels, bver and the one-value rule of one record."""
    for label, item in record.items():
        allowed = _SENML_TYPES.get(label)
        if allowed is None:
            if label.endswith("_"):
                raise DecodeError(
                    "malformed_senml",
                    f"field {_quote(label)} ends in '_', so "
                    "it must be understood (RFC 8428 §4.4) and zeroline does "
                    "not know it; drop it or send plain RFC 8428 SenML",
                )
        elif type(item) not in allowed:
            raise DecodeError(
                "malformed_senml",
                f"field {label!r} is {_describe(item)}; it "
                f"must be {_TYPE_WORDS[allowed]} (RFC 8428 §5)",
            )
    if "bver" in record:
        _check_version(record["bver"])
    if ("vs" in record or "vb" in record or "vd" in record) and sum(
        label in record for label in _VALUE_LABELS
    ) > 1:
        raise DecodeError(
            "malformed_senml",
            "record holds more than one of v, vs, vb, vd; send one value per record",
        )


def _check_version(version: object) -> None:
    """bver must be a whole number this decoder understands (RFC 8428 §4.4)."""
    if (
        (type(version) is int or type(version) is float)
        and _as_float(version).is_integer()
        and 1 <= version <= SENML_VERSION
    ):
        return
    raise DecodeError(
        "malformed_senml",
        f"bver is {_describe(version)}; zeroline "
        f"understands SenML versions 1 to {SENML_VERSION} (whole numbers)",
    )


def _senml_name(name: str) -> str | None:
    """The validated resolved name, or None when the pack names nothing."""
    if not name:
        return None
    if _SENML_NAME.fullmatch(name) is None:
        raise DecodeError(
            "bad_senml_name",
            f"name {_quote(name)} is not a SenML name; use "
            "letters, digits and - : . / _ only, starting with a letter or digit "
            "(RFC 8428 §4.5.1)",
        )
    return name


def _senml_unit(unit: str | None) -> str | None:
    if not unit:
        return None
    try:
        unit.encode("utf-8")
    except UnicodeEncodeError:  # a lone surrogate escape such as "\\ud800"
        raise DecodeError(
            "malformed_senml",
            f"unit {_quote(unit)} is not valid Unicode text; send a unit such as 'Cel'",
        ) from None
    return unit


class _SenmlDecoder:
    """RFC 8428 JSON SenML packs, resolved into readings with name, time, value and unit."""

    __slots__ = ("_limits",)

    def __init__(self, limits: DecodeLimits) -> None:
        self._limits = limits

    def __repr__(self) -> str:
        return f"make_decoder('senml', limits={self._limits!r})"

    def decode(self, payload: bytes, arrival: float) -> list[Reading]:
        pack = _parse_json(payload, self._limits.max_bytes)
        if type(pack) is not list:
            raise DecodeError("malformed_senml", f"payload is {_describe(pack)}; {_SENML_HINT}")
        if len(pack) > self._limits.max_records:
            raise DecodeError(
                "too_many_records",
                f"pack has {len(pack)} records; at most "
                f"{self._limits.max_records} are accepted per message",
            )
        readings: list[Reading] = []
        base_name, base_time, base_value = "", 0.0, 0.0
        base_unit: str | None = None
        for index, record in enumerate(pack):
            if type(record) is not dict:
                raise DecodeError(
                    "malformed_senml", f"record {index} is {_describe(record)}; {_SENML_HINT}"
                )
            try:
                _check_senml_record(record)
                # Base fields apply from their own record onwards (RFC 8428 §4.1).
                if "bn" in record:
                    base_name = record["bn"]
                if "bt" in record:
                    base_time = _senml_time(record["bt"], "bt")
                if "bu" in record:
                    base_unit = record["bu"]
                if "bv" in record:
                    base_value = _as_float(record["bv"])
                name = _senml_name(base_name + record.get("n", ""))
                if "v" not in record:
                    continue  # a string/bool/data value or a sum: nothing for a baseline fit
                value = base_value + _as_float(record["v"])
                if not math.isfinite(value):
                    raise DecodeError(
                        "non_finite", f"resolved value bv + v is {value!r}; send finite numbers"
                    )
                time = base_time + _senml_time(record.get("t", 0.0), "t")
                if time < SENML_RELATIVE_LIMIT:  # relative to now (RFC 8428 §4.5.3)
                    time += arrival
                _check_window(time, arrival, self._limits)
                unit = _senml_unit(record.get("u", base_unit))
            except DecodeError as exc:
                raise DecodeError(exc.reason, f"record {index}: {exc.detail}") from None
            readings.append(Reading(time, value, _NO_FIELDS, name, unit))
        if not readings:
            raise DecodeError(
                "no_numeric_records",
                f"none of the {len(pack)} records carries a "
                "numeric 'v'; send at least one record with a number in 'v'",
            )
        return readings


def _senml_time(raw: int | float, label: str) -> float:
    """A SenML time field as finite seconds (its type was checked by _check_senml_record)."""
    time = _as_float(raw)
    if not math.isfinite(time):
        raise DecodeError("bad_time", f"{label} is {_describe(raw)}; send finite seconds")
    return time


# --------------------------------------------------------------------------- number


_PLAIN_NUMBER = re.compile(rb"\s*[+-]?(?:[0-9]+(?:\.[0-9]*)?|\.[0-9]+)(?:[eE][+-]?[0-9]+)?\s*")
_NON_FINITE_WORDS = frozenset({b"nan", b"inf", b"infinity"})


class _NumberDecoder:
    """A bare decimal number as ASCII text; time is the arrival time."""

    __slots__ = ("_max_bytes",)

    def __init__(self, limits: DecodeLimits) -> None:
        self._max_bytes = limits.max_bytes

    def __repr__(self) -> str:
        return f"make_decoder('number', limits=DecodeLimits(max_bytes={self._max_bytes}))"

    def decode(self, payload: bytes, arrival: float) -> list[Reading]:
        if len(payload) > self._max_bytes:
            raise DecodeError(
                "payload_too_large",
                f"payload is {len(payload)} bytes; at most {self._max_bytes} are accepted",
            )
        if _PLAIN_NUMBER.fullmatch(payload) is None:
            raise _not_a_number(payload)
        value = float(payload)
        if not math.isfinite(value):
            raise DecodeError(
                "non_finite",
                f"{_quote(payload.decode('ascii'))} is too large for a float; send a finite number",
            )
        return [Reading(arrival, value, _NO_FIELDS)]


def _not_a_number(payload: bytes) -> DecodeError:
    """The error for a payload that is not a plain number (only built on the error path)."""
    try:
        text = payload.decode("utf-8")
    except UnicodeDecodeError as exc:
        return DecodeError(
            "not_utf8",
            f"byte 0x{payload[exc.start]:02x} at offset {exc.start} "
            "is not valid UTF-8; send the number as ASCII text such as 21.5",
        )
    if text.strip().lower().lstrip("+-").encode("utf-8") in _NON_FINITE_WORDS:
        return DecodeError(
            "non_finite",
            f"{_quote(text)} is not a finite number; send a finite "
            "number such as 21.5 (a missing reading: send nothing)",
        )
    return DecodeError(
        "not_a_number",
        f"payload {_quote(text)} is not a plain number; send ASCII text such as 21.5 or 3e-2",
    )


# --------------------------------------------------------------------------- factory


def make_decoder(
    kind: str,
    *,
    time_field: str = "time",
    value_field: str = "value",
    time_unit: str = "auto",
    limits: DecodeLimits = DecodeLimits(),
) -> Decoder:
    """Build the decoder for one channel's payload `kind`, specialised for its settings.

    `time_field`, `value_field` and `time_unit` only apply to ``json``: SenML times are
    always seconds (RFC 8428) and a bare number carries no time, so setting them for
    another kind is a ConfigError rather than a silently ignored option.

    >>> decoder = make_decoder("json", value_field="no2")
    >>> payload = b'{"time": 1777636800000, "no2": 12.5, "temp": 21}'
    >>> [reading] = decoder.decode(payload, arrival=1777636801.0)
    >>> reading.time, reading.value, dict(reading.fields)
    (1777636800.0, 12.5, {'temp': 21.0})
    >>> make_decoder("number").decode(b" 3e-2\\n", arrival=1777636800.0)[0].value
    0.03
    """
    _check_limits(limits)
    if kind == "json":
        _check_field_names(time_field, value_field)
        if time_unit not in TIME_UNITS:
            raise ConfigError(f"time_unit {time_unit!r} is not one of {', '.join(TIME_UNITS)}")
        return _JsonDecoder(time_field, value_field, time_unit, limits)
    if kind in ("senml", "number"):
        for option, given, default in (
            ("time_field", time_field, "time"),
            ("value_field", value_field, "value"),
            ("time_unit", time_unit, "auto"),
        ):
            if given != default:
                raise ConfigError(
                    f"{option} only applies to payload 'json', not {kind!r}; remove it"
                )
        return _SenmlDecoder(limits) if kind == "senml" else _NumberDecoder(limits)
    raise ConfigError(f"payload kind {kind!r} is unknown; use one of {', '.join(KINDS)}")


def _check_field_names(time_field: str, value_field: str) -> None:
    for option, name in (("time_field", time_field), ("value_field", value_field)):
        if not isinstance(name, str) or not name:
            raise ConfigError(f"{option} must be a non-empty field name, got {name!r}")
    if time_field == value_field:
        raise ConfigError(
            f"time_field and value_field are both {time_field!r}; they must name different fields"
        )


def _check_limits(limits: DecodeLimits) -> None:
    checks = (
        ("max_bytes", limits.max_bytes, isinstance(limits.max_bytes, int) and limits.max_bytes > 0),
        (
            "max_records",
            limits.max_records,
            isinstance(limits.max_records, int) and limits.max_records > 0,
        ),
        ("max_future_s", limits.max_future_s, limits.max_future_s >= 0),
        ("max_past_s", limits.max_past_s, limits.max_past_s > 0),
    )
    for name, given, ok in checks:
        if not ok:
            raise ConfigError(f"limits.{name} is {given!r}; it must be a positive number")
