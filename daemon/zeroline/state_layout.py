"""The packed form of channel state: one row of float64 values per channel, fields by name.

A snapshot of 10,000 channels must be written and read back in a fraction of a second, so a
channel's learned state is not a tree of JSON objects but a row of float64 numbers in a
fixed order that depends only on the channel's config (its model, its named inputs, its
alert rules). The channels of one template share that order, their rows form one 2-D array,
and the snapshot file stores the array's bytes as they are (`zeroline.state`): numbers
round-trip bit for bit, with no text conversion at all.

`layout` names the fields of a row in order as (name, number of values), e.g.
``("inputs.temperature", 3)``: the file is self-describing, and a row saved before an
alert rule or an input was added to the config can still be read (`rearranged`). What has
no fixed size per channel (the free-text messages of active alert events, an exact sliding
window's queue of rows) travels beside the array as one small JSON-able "side" entry per
channel, None for most. "No value" (an input never seen, a time not yet set) is NaN.

The fields themselves are defined next to the state they hold: `Channel._pack_scalars`,
`InputCache.pack`, `AlertBook.pack`, `zeroline.estimator.pack_estimators`.
"""

from __future__ import annotations

import contextlib
import functools
import gc
import math
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import numpy.typing as npt

from zeroline.errors import InputError

Array = npt.NDArray[np.float64]
Layout = list[tuple[str, int]]

#: Fields a config change may add or remove without changing the model (matched by name,
#: missing ones start as a new channel's do). Every other field must be present as saved.
OPTIONAL_FIELDS = ("alerts.", "inputs.", "means.")


@dataclass(frozen=True)
class PackedChannels:
    """The state of some channels of one config: `rows[i]` and `sides[i]` are channel i's.

    `model` is the config's `model_key()` when they were packed: state is only restored
    into the same model.
    """

    model: str
    layout: Layout
    rows: Array
    sides: list[dict[str, Any] | None]

    def take(self, indices: Sequence[int]) -> PackedChannels:
        """The channels at `indices`, in that order (their rows copied)."""
        return PackedChannels(
            self.model,
            self.layout,
            self.rows[np.asarray(indices, dtype=np.intp)],
            [self.sides[i] for i in indices],
        )


def concatenated(parts: Sequence[PackedChannels]) -> PackedChannels:
    """One block of the channels of `parts`, which share a model and a layout."""
    first = parts[0]
    if any(part.model != first.model or part.layout != first.layout for part in parts):
        raise ValueError("concatenated takes packed channels of one model and layout")
    if len(parts) == 1:
        return first
    sides = [side for part in parts for side in part.sides]
    return PackedChannels(first.model, first.layout, np.vstack([p.rows for p in parts]), sides)


@functools.lru_cache(maxsize=64)
def upper_triangle(size: int) -> tuple[npt.NDArray[np.intp], npt.NDArray[np.intp]]:
    """`np.triu_indices(size)`, made once per size: a channel unpacked on its own (the
    daemon unpacks a restored channel at its first reading) would otherwise spend a
    third of its time rebuilding them. Read-only: the same arrays serve every caller."""
    rows, columns = np.triu_indices(size)
    rows.setflags(write=False)
    columns.setflags(write=False)
    return rows, columns


def number(value: float | None) -> float:
    """A stored value: None as NaN."""
    return math.nan if value is None else value


def optional(value: float) -> float | None:
    """A value read back: NaN as None."""
    return None if math.isnan(value) else value


def width(layout: Sequence[tuple[str, int]]) -> int:
    return sum(size for _, size in layout)


def rearranged(rows: Array, saved: Layout, wanted: Layout, blank: Array) -> Array:
    """`rows` (in layout `saved`) in layout `wanted`: fields found by name and size; an
    optional field that is missing takes its value from `blank` (a new channel's row).

    InputError when a model field is missing or has another size: that state cannot be
    this model's.
    """
    where: dict[str, tuple[int, int]] = {}
    start = 0
    for name, size in saved:
        where[name] = (start, size)
        start += size
    if start != rows.shape[1]:
        raise InputError(f"packed rows hold {rows.shape[1]} values, their layout {start}")
    result = np.empty((rows.shape[0], width(wanted)))
    start = 0
    for name, size in wanted:
        found = where.get(name)
        if found is not None and found[1] == size:
            result[:, start : start + size] = rows[:, found[0] : found[0] + size]
        elif name.startswith(OPTIONAL_FIELDS):
            result[:, start : start + size] = blank[start : start + size]
        else:
            raise InputError(f"packed state has no field {name!r} of {size} values")
        start += size
    return result


@contextlib.contextmanager
def collector_paused() -> Iterator[None]:
    """Pause Python's cyclic garbage collector while a snapshot is packed or unpacked.

    Restoring 10,000 channels makes a few hundred thousand objects that all stay alive
    (and packing or reading the header tens of thousands); each makes the collector pass
    over the whole heap again and again. Measured in bench/snapshot.py, those passes took
    about as long as the work itself. Nothing made here is garbage, so nothing is freed
    late; the collector runs as usual afterwards.
    """
    enabled = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if enabled:
            gc.enable()
