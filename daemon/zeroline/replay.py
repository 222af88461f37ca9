"""Run one channel's streaming pipeline over a recorded log, row by row.

The same `Channel` class the daemon uses processes every row in time order, so a replay is
a faithful rehearsal: each named input is read from the CSV column of the same name (a
blank cell: no value at that time), control events (recalibrated, cleaned, replaced) come
from an optional events file, and a row whose time is not newer than the previous one is
skipped and counted, exactly as the daemon skips a redelivered reading.
"""

from __future__ import annotations

import csv
import math
import re
from collections.abc import Iterator
from dataclasses import dataclass, field

from zeroline.alerts import AlertEvent
from zeroline.channel import Channel, ControlEvent, Corrected, Sample
from zeroline.config import ChannelConfig, Config
from zeroline.csvdata import TIME_COLUMN, Array, Table, parse_time_cell
from zeroline.errors import InputError

VALUE_COLUMN = "value"
CHUNK_ROWS = 65536  # rows turned into Python floats at a time


@dataclass
class ReplayCounts:
    rows: int = 0
    processed: int = 0
    skipped_not_newer: int = 0
    skipped_blank_value: int = 0
    alerts: int = 0


@dataclass(frozen=True)
class Step:
    """The outcome of one processed row, or (result None) alert clears of a control event."""

    row: int
    result: Corrected | None
    events: list[AlertEvent] = field(default_factory=list)


def resolve_channel(config: Config, name: str) -> tuple[ChannelConfig, str]:
    """The channel config for `name`: an exact name, or a concrete name matching a template
    such as "{1}-no2" (so `--channel site7-no2` works for a wildcard channel)."""
    for channel in config.channels:
        if channel.name == name:
            return channel, name
    for channel in config.channels:
        pattern = re.escape(channel.name)
        pattern = re.sub(r"\\\{\d+\\\}", r"[^/]+", pattern)
        if "{" in channel.name and re.fullmatch(pattern, name):
            return channel, name
    config.channel(name)  # raises with the list of names and a suggestion
    raise AssertionError("unreachable")


def read_events(path: str) -> list[ControlEvent]:
    """Control events from a CSV file with columns time, event and optionally mode."""
    events: list[ControlEvent] = []
    try:
        with open(path, newline="", encoding="utf-8") as handle:
            reader = csv.DictReader(handle)
            if reader.fieldnames is None or not {"time", "event"} <= set(reader.fieldnames):
                raise InputError(
                    f"{path}: the events file needs columns time and event (mode optional)"
                )
            for row in reader:
                line = reader.line_num
                try:
                    time = parse_time_cell((row.get("time") or "").strip())
                except ValueError:
                    raise InputError(
                        f"{path}:{line}: time {row.get('time')!r} is not epoch "
                        "seconds or an ISO 8601 time with a zone"
                    ) from None
                data = {
                    "time": time,
                    "event": (row.get("event") or "").strip(),
                    "mode": (row.get("mode") or "").strip() or None,
                }
                try:
                    events.append(ControlEvent.parse(data, time))
                except InputError as error:
                    raise InputError(f"{path}:{line}: {error}") from None
    except OSError as error:
        raise InputError(f"{path}: cannot open ({error.strerror})") from None
    return sorted(events, key=lambda e: e.time)


def replay(
    table: Table, channel: Channel, events: list[ControlEvent], counts: ReplayCounts
) -> Iterator[Step]:
    """Feed every row of `table` to `channel`; yields one Step per processed row."""
    for row, result, alert_events in replay_rows(table, channel, events, counts):
        yield Step(row, result, alert_events)


def replay_rows(
    table: Table, channel: Channel, events: list[ControlEvent], counts: ReplayCounts
) -> Iterator[tuple[int, Corrected | None, list[AlertEvent]]]:
    """`replay` as plain (row, result, events) tuples, for callers that need no Step.

    The columns are turned into lists of Python floats a chunk at a time (indexing a list
    is cheaper than a numpy scalar, and a chunk bounds the memory this costs); NaN, a blank
    cell, is the one value not equal to itself.
    """
    all_times = table.require_complete(TIME_COLUMN, purpose="replay (the time of each row)")
    all_values = table.column(VALUE_COLUMN, purpose="replay (the raw reading)")
    field_inputs, topic_inputs = _split_inputs(table, channel.config)
    pending = list(events)
    next_event = pending[0].time if pending else math.inf
    last = -math.inf
    process, set_input = channel.process, channel.set_input
    for start in range(0, table.rows, CHUNK_ROWS):
        chunk = slice(start, start + CHUNK_ROWS)
        times, values = all_times[chunk].tolist(), all_values[chunk].tolist()
        topics = [(name, column[chunk].tolist()) for name, column in topic_inputs]
        fields_of = [(name, column[chunk].tolist()) for name, column in field_inputs]
        for offset, time in enumerate(times):
            row = start + offset
            counts.rows += 1
            while time >= next_event:
                cleared = channel.control(pending.pop(0))
                next_event = pending[0].time if pending else math.inf
                counts.alerts += len(cleared)
                yield row, None, cleared
            for name, column in topics:
                value = column[offset]
                if value == value:  # not blank
                    set_input(name, time, value)
            fields: dict[str, float] = {}
            for field_name, column in fields_of:
                value = column[offset]
                if value == value:
                    fields[field_name] = value
            raw = values[offset]
            if raw != raw:
                counts.skipped_blank_value += 1
                continue
            if time <= last:
                counts.skipped_not_newer += 1
                continue
            last = time
            result, alert_events = process(Sample(time, raw, fields))
            counts.processed += 1
            if alert_events:
                counts.alerts += len(alert_events)
            yield row, result, alert_events


def _split_inputs(
    table: Table, config: ChannelConfig
) -> tuple[list[tuple[str, Array]], list[tuple[str, Array]]]:
    """(payload field, column) of the inputs read from the reading's own payload, and
    (input name, column) of those that arrive on their own topics, in config order."""
    field_inputs, topic_inputs = [], []
    for name, column in _input_columns(table, config).items():
        spec = config.inputs[name]
        if spec.field is not None:
            field_inputs.append((spec.field, column))
        else:
            topic_inputs.append((name, column))
    return field_inputs, topic_inputs


def _input_columns(table: Table, config: ChannelConfig) -> dict[str, Array]:
    columns = {}
    for name in config.inputs:
        if name not in table.columns:
            listed = ", ".join(table.columns)
            raise InputError(
                f"{table.path}: the channel's input {name!r} needs a column of that "
                f"name (blank cells for no value); columns: {listed}"
            )
        columns[name] = table.columns[name]
    return columns
