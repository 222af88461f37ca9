"""The network thread's whole job: turn one MQTT message into a `Work` item for the worker.

`decode(message, routes)` looks the topic up in `Routes` and runs the decoder its route
names; the result is a tuple of parts, one per thing the topic is (a topic may be a
reading of one channel template and an input of another):

- `ReadingPart`: decoded readings for channel `name` (created by the worker if new);
- `InputPart`: the latest value of an input topic;
- `ControlPart`: a parsed control event for a channel;
- `ErrorPart`: why the payload (or the topic) is not usable, with a stable `reason`.

No model code runs here and nothing here blocks, so a slow model never delays the MQTT
keep-alive. Every failure becomes an `ErrorPart`; this function raises nothing.

>>> from zeroline.config import parse_config
>>> from zeroline.mqtt import Message
>>> from zeroline.router import Routes
>>> routes = Routes(parse_config("channels: [{name: a, topic: s/a, basis: [constant]}]"))
>>> work = decode(Message("s/a", b'{"time": 1e9, "value": 2.5}', 1e9 + 1), routes)
>>> work.parts[0].readings[0].value
2.5
>>> decode(Message("s/a", b"{oops", 1e9), routes).parts[0].reason
'malformed_json'
"""

from __future__ import annotations

import json
from dataclasses import dataclass

from zeroline.channel import ControlEvent
from zeroline.codecs import Reading
from zeroline.errors import DecodeError, InputError
from zeroline.mqtt import Message
from zeroline.router import ControlMatch, InputMatch, ReadingMatch, Routes


@dataclass(frozen=True)
class ReadingPart:
    template: str
    name: str
    wildcards: tuple[str, ...]
    readings: tuple[Reading, ...]


@dataclass(frozen=True)
class InputPart:
    template: str
    input_name: str
    topic: str
    time: float
    value: float


@dataclass(frozen=True)
class ControlPart:
    channel: str
    event: ControlEvent


@dataclass(frozen=True)
class ErrorPart:
    reason: str
    detail: str


Part = ReadingPart | InputPart | ControlPart | ErrorPart


@dataclass(frozen=True)
class Work:
    """One message and what it means; acknowledged once every part's effect is durable."""

    message: Message
    parts: tuple[Part, ...]


def decode(message: Message, routes: Routes) -> Work:
    """The `Work` for `message` under `routes` (never raises)."""
    matches = routes.match(message.topic)
    if not matches:
        detail = (
            f"no channel, input or control topic of the config matches {message.topic!r}; "
            "check the channel topics"
        )
        return Work(message, (ErrorPart("unknown_topic", detail),))
    parts: list[Part] = []
    for match in matches:
        if isinstance(match, ReadingMatch):
            parts.append(_reading(message, match))
        elif isinstance(match, InputMatch):
            parts.append(_input(message, match))
        else:
            parts.append(_control(message, match, routes.limits.max_bytes))
    return Work(message, tuple(parts))


def _reading(message: Message, match: ReadingMatch) -> Part:
    try:
        readings = match.decoder.decode(message.payload, message.arrival)
    except DecodeError as error:
        return ErrorPart(error.reason, error.detail)
    if match.senml_name is not None:
        readings = [r for r in readings if r.name == match.senml_name]
        if not readings:
            return ErrorPart(
                "no_matching_record",
                f"no SenML record is named {match.senml_name!r} (the channel's senml_name); "
                "check the sensor's record names",
            )
    return ReadingPart(match.template, match.name, match.wildcards, tuple(readings))


def _input(message: Message, match: InputMatch) -> Part:
    try:
        readings = match.decoder.decode(message.payload, message.arrival)
    except DecodeError as error:
        return ErrorPart(error.reason, error.detail)
    valued = [r for r in readings if r.value is not None]
    if not valued:
        return ErrorPart(
            "missing_value",
            f"input {match.input_name!r} payload carries no value; send a number",
        )
    latest = max(valued, key=lambda r: r.time)
    assert latest.value is not None
    return InputPart(match.template, match.input_name, message.topic, latest.time, latest.value)


def _control(message: Message, match: ControlMatch, max_bytes: int) -> Part:
    hint = 'send {"event": "recalibrated"|"cleaned"|"replaced", "mode": ..., "time": ...}'
    if len(message.payload) > max_bytes:
        return ErrorPart("payload_too_large", f"control payload is too large; {hint}")
    try:
        data = json.loads(message.payload)
    except (ValueError, RecursionError):
        return ErrorPart("malformed_json", f"control payload is not valid JSON; {hint}")
    if not isinstance(data, dict):
        return ErrorPart("not_an_object", f"control payload is not a JSON object; {hint}")
    try:
        event = ControlEvent.parse(data, message.arrival)
    except InputError as error:
        return ErrorPart("bad_control", str(error))
    return ControlPart(match.channel, event)
