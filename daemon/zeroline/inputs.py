"""The latest value of each named input (covariates and reference values) of a channel.

Inputs arrive on their own topics (or as fields of the channel's own payload) at their own
pace. A reading uses an input's latest value only if it is fresh: not older than the input's
`max_age` at the reading's time (`max_age: 0s` means "taken at the same instant"). A value
stamped later than the reading is not used for it either: the model must not see the future.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any, NamedTuple

#: One value of an input and its time, (time, value): a plain tuple, because one is made
#: per arriving value (a named tuple costs ten times as much to make).
InputValue = tuple[float, float]


class Lookup(NamedTuple):
    """What a reading gets for one input: the value to use, and whether it was fresh."""

    value: float | None
    fresh: bool


_NEVER_SEEN = Lookup(None, False)


class InputCache:
    """Latest value per input name; bounded by the number of declared inputs."""

    __slots__ = ("_latest", "max_ages")

    def __init__(self, max_ages: dict[str, float]) -> None:
        self.max_ages = dict(max_ages)
        self._latest: dict[str, InputValue] = {}

    def put(self, name: str, time: float, value: float) -> None:
        """Record a value unless a newer one is already known (redeliveries, reordering)."""
        current = self._latest.get(name)
        if current is None or time >= current[0]:
            self._latest[name] = (time, value)

    def lookup(self, name: str, at: float) -> Lookup:
        """The value of `name` for a reading at time `at`."""
        latest = self._latest.get(name)
        if latest is None:
            return _NEVER_SEEN
        age = at - latest[0]
        return Lookup(latest[1], 0.0 <= age <= self.max_ages[name])

    def values(self, names: tuple[str, ...], at: float) -> tuple[dict[str, float], bool] | None:
        """`lookup` for several names at once (once per reading): their values and whether
        any is stale, or None if one was never seen."""
        values: dict[str, float] = {}
        stale = False
        latest, max_ages = self._latest, self.max_ages
        for name in names:
            known = latest.get(name)
            if known is None:
                return None
            values[name] = known[1]
            age = at - known[0]
            stale = stale or not 0.0 <= age <= max_ages[name]
        return values, stale

    def to_state(self) -> dict[str, Any]:
        return {name: [time, value] for name, (time, value) in self._latest.items()}

    def load_state(self, state: dict[str, Any]) -> None:
        self._latest = {
            name: (float(t), float(v)) for name, (t, v) in state.items() if name in self.max_ages
        }

    def blank_copy(self) -> InputCache:
        """The same inputs, no values yet (the ages are shared: nothing changes them)."""
        new = object.__new__(InputCache)
        new.max_ages = self.max_ages
        new._latest = {}
        return new

    def pack(self, names: Sequence[str]) -> list[float]:
        """(known, time, value) per name in `names` order, as float64 values (an unknown
        input is (0, NaN, NaN))."""
        values: list[float] = []
        latest = self._latest
        for name in names:
            known = latest.get(name)
            values += (0.0, math.nan, math.nan) if known is None else (1.0, *known)
        return values

    def unpack(self, names: Sequence[str], values: Sequence[float]) -> None:
        """Restore what `pack(names)` wrote."""
        latest: dict[str, InputValue] = {}
        for index, name in enumerate(names):
            if values[3 * index] == 1.0 and name in self.max_ages:
                latest[name] = (values[3 * index + 1], values[3 * index + 2])
        self._latest = latest
