"""Helpers for channel scenario tests: build a channel from YAML and run it over arrays."""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from zeroline.alerts import AlertEvent
from zeroline.channel import Channel, ControlEvent, Corrected, Sample
from zeroline.config import ChannelConfig, parse_config

Array = npt.NDArray[np.float64]


def channel_config(channel_yaml: str) -> ChannelConfig:
    """Parse one channel (YAML text of a list item's body) inside a minimal config."""
    indented = "\n".join("    " + line for line in channel_yaml.strip().splitlines())
    config = parse_config("channels:\n  -\n" + indented + "\n", "<test>")
    return config.channels[0]


@dataclass
class Run:
    results: list[Corrected]
    events: list[AlertEvent]

    def column(self, name: str) -> Array:
        return np.array(
            [math.nan if getattr(r, name) is None else getattr(r, name) for r in self.results]
        )

    def rule_events(self, rule: str) -> list[AlertEvent]:
        return [e for e in self.events if e.rule == rule]


def run_channel(
    config: ChannelConfig,
    data: Mapping[str, Array],
    *,
    inputs_from_topics: tuple[str, ...] = (),
    fields: tuple[str, ...] = (),
    controls: list[ControlEvent] | None = None,
    channel: Channel | None = None,
) -> Run:
    """Feed rows of `data` (time, value, inputs) to a channel, as the daemon would."""
    channel = channel or Channel(config)
    pending = sorted(controls or [], key=lambda e: e.time)
    results: list[Corrected] = []
    events: list[AlertEvent] = []
    for i, time in enumerate(data["time"]):
        while pending and pending[0].time <= time:
            events += channel.control(pending.pop(0))
        for name in inputs_from_topics:
            value = data[name][i]
            if not math.isnan(value):
                channel.set_input(name, float(time), float(value))
        payload_fields = {
            name: float(data[name][i]) for name in fields if not math.isnan(data[name][i])
        }
        result, new_events = channel.process(
            Sample(float(time), float(data["value"][i]), payload_fields)
        )
        results.append(result)
        events += new_events
    return Run(results, events)
