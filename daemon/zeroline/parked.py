"""Parked channels' state: the packed rows of one template's channels, in one growing store.

A parked channel (restored from a snapshot and not asked for since, or pushed out by the
resident bound) is nothing but its row of `zeroline.state_layout`. Kept as numbered slots
of a few arrays rather than as one small array per parking, a row costs its values and
its slot number: no block object, no (block, row) pair, no dead rows left in old blocks.
Freed slots are reused first, so the store's size follows the most channels parked at
once (it never shrinks: at most `limits.max_channels` rows). The arrays double from
`FIRST_CHUNK_ROWS` up to `CHUNK_ROWS` rows, so a template with a handful of channels holds
a handful of rows, not a whole large array.

The prior's columns ("estimator.prior_mean", "prior_column", "prior_center": 3p values)
are the template's for every channel that has never been re-zeroed, so the store keeps
them once for the template and only the rows that differ keep their own (compared bit
for bit, so 0.0 and -0.0 differ). At p = 6 that is 18 of 102 values a row.

Reads return copies (`rows`) and run under the store's lock, as do `put` and `release`:
the status page reads parked channels from its own thread while the worker parks and
unparks them.
"""

from __future__ import annotations

import bisect
import itertools
import threading
from collections.abc import Sequence
from typing import Any

import numpy as np
import numpy.typing as npt

from zeroline.state_layout import Layout, PackedChannels

Array = npt.NDArray[np.float64]

#: Rows of the store's first array; each further one doubles, up to `CHUNK_ROWS`.
FIRST_CHUNK_ROWS = 8
#: Rows of the store's largest arrays: 256 rows of ~84 values are ~170 KB, above glibc's
#: mmap threshold as `zeroline.heap` sets it, so each is a mapping of its own and leaves
#: no hole in the heap when the store goes (a config reload).
CHUNK_ROWS = 256

#: The layout fields kept once per template while a row's are the template's (see above).
SHARED_FIELDS = ("estimator.prior_mean", "estimator.prior_column", "estimator.prior_center")


def shared_columns(layout: Layout) -> slice:
    """The columns of `SHARED_FIELDS` in `layout` (they follow one another), or an empty
    slice if the layout has none of them."""
    sizes = dict(layout)
    offsets = itertools.accumulate((size for _, size in layout), initial=0)
    starts = dict(zip(sizes, offsets, strict=False))
    present = [name for name in SHARED_FIELDS if name in sizes]
    if not present:
        return slice(0, 0)
    first, last = starts[present[0]], starts[present[-1]] + sizes[present[-1]]
    if last - first != sum(sizes[name] for name in present):
        raise ValueError(f"the fields {present} do not follow one another in the layout")
    return slice(first, last)


class ParkedRows:
    """The rows of one template's parked channels, by slot; `template` is a never-fed
    channel's packed row (`zeroline.channel.blank_packed`), whose model, layout and prior
    every row put here must share."""

    def __init__(self, template: PackedChannels) -> None:
        self.model = template.model
        self.layout = template.layout
        width = template.rows.shape[1]
        shared = shared_columns(template.layout)
        self._shared = shared
        # A kept row is the row without the shared columns: [0, start) then [stop, width).
        self._kept_width = width - (shared.stop - shared.start)
        self._template_shared = template.rows[0, shared].copy()
        self._template_bits = self._template_shared.view(np.uint64)
        self._width = width
        self._chunks: list[Array] = []
        self._starts: list[int] = []  # the first slot of each array
        self._names: list[str | None] = []  # by slot; None when free
        self._free: list[int] = []
        self._own_shared: dict[int, Array] = {}  # slot → its prior, where not the template's
        self._sides: dict[int, dict[str, Any]] = {}  # slot → side entry, where not None
        self.lock = threading.Lock()

    def __len__(self) -> int:
        """How many slots hold a row."""
        return len(self._names) - len(self._free)

    @property
    def capacity(self) -> int:
        """Slots allocated (held or free)."""
        return self._starts[-1] + len(self._chunks[-1]) if self._chunks else 0

    def put(self, names: Sequence[str], packed: PackedChannels) -> list[int]:
        """Store `packed`'s rows (channel `names[i]` in row i); returns their slots.
        The caller holds `lock`."""
        if packed.model != self.model or packed.layout != self.layout:
            raise ValueError("ParkedRows.put takes rows of the store's own model and layout")
        rows = packed.rows
        if rows.shape != (len(names), self._width) or len(packed.sides) != len(names):
            raise ValueError(f"ParkedRows.put takes one row and one side per name ({len(names)})")
        slots = [self._take_slot(name) for name in names]  # nothing can fail from here on
        shared = rows[:, self._shared]
        own = np.flatnonzero((shared.view(np.uint64) != self._template_bits).any(axis=1))
        start, stop = self._shared.start, self._shared.stop
        for i, slot in enumerate(slots):
            chunk, offset = self._place(slot)
            chunk[offset, :start] = rows[i, :start]
            chunk[offset, start:] = rows[i, stop:]
        for i in own.tolist():
            self._own_shared[slots[i]] = shared[i].copy()
        for slot, side in zip(slots, packed.sides, strict=True):
            if side is not None:
                self._sides[slot] = side
        return slots

    def rows(self, slots: Sequence[int]) -> PackedChannels:
        """The rows at `slots`, in that order, whole (the shared columns put back): copies.
        The caller holds `lock`."""
        result = np.empty((len(slots), self._width))
        values = np.empty((len(slots), self._kept_width))
        if len(slots) == 1:
            chunk, offset = self._place(slots[0])
            values[0] = chunk[offset]
        else:  # a snapshot's many rows: one gather per array, none joined
            wanted = np.asarray(slots, dtype=np.intp)
            which = np.searchsorted(self._starts, wanted, side="right") - 1
            for index, (first, chunk) in enumerate(zip(self._starts, self._chunks, strict=True)):
                mine = np.flatnonzero(which == index)
                if len(mine):
                    values[mine] = chunk[wanted[mine] - first]
        start, stop = self._shared.start, self._shared.stop
        result[:, :start] = values[:, :start]
        result[:, stop:] = values[:, start:]
        result[:, self._shared] = self._template_shared
        sides: list[dict[str, Any] | None] = []
        for i, slot in enumerate(slots):
            own = self._own_shared.get(slot)
            if own is not None:
                result[i, self._shared] = own
            sides.append(self._sides.get(slot))
        return PackedChannels(self.model, self.layout, result, sides)

    def held(self) -> tuple[list[str], list[int]]:
        """The names and slots of every row held, by slot. The caller holds `lock`."""
        names: list[str] = []
        slots: list[int] = []
        for slot, name in enumerate(self._names):
            if name is not None:
                names.append(name)
                slots.append(slot)
        return names, slots

    def release(self, slot: int) -> None:
        """Free `slot` for a later row. The caller holds `lock`."""
        if self._names[slot] is None:
            raise ValueError(f"slot {slot} holds no row")
        self._names[slot] = None
        self._own_shared.pop(slot, None)
        self._sides.pop(slot, None)
        self._free.append(slot)

    def _place(self, slot: int) -> tuple[Array, int]:
        """The array holding `slot` and the slot's row in it."""
        index = bisect.bisect_right(self._starts, slot) - 1
        return self._chunks[index], slot - self._starts[index]

    def _take_slot(self, name: str) -> int:
        if self._free:
            slot = self._free.pop()
            self._names[slot] = name
            return slot
        slot = len(self._names)
        if slot == self.capacity:
            size = min(CHUNK_ROWS, 2 * len(self._chunks[-1])) if self._chunks else FIRST_CHUNK_ROWS
            self._starts.append(slot)
            self._chunks.append(np.empty((size, self._kept_width)))
        self._names.append(name)
        return slot
