"""The parked-rows store: rows come back bit for bit, with the prior kept once per template."""

from __future__ import annotations

import numpy as np
import pytest

from zeroline.channel import blank_packed
from zeroline.config import parse_config
from zeroline.parked import CHUNK_ROWS, FIRST_CHUNK_ROWS, ParkedRows, shared_columns
from zeroline.state_layout import PackedChannels

CONFIG = parse_config("""
channels:
  - name: "{1}-gas"
    topic: site/+/gas
    basis: [constant, {polynomial: {of: t, degree: 2, scale: 1d}}]
""").channels[0]


def rows_like(template: PackedChannels, count: int, seed: int = 3) -> np.ndarray:
    """`count` rows with the template's prior and random values (NaN, -0.0 among them)
    everywhere else."""
    rng = np.random.default_rng(seed)
    rows = np.repeat(template.rows, count, axis=0)
    shared = shared_columns(template.layout)
    mask = np.ones(rows.shape[1], dtype=bool)
    mask[shared] = False
    rows[:, mask] = rng.normal(size=(count, int(mask.sum())))
    rows[0, np.flatnonzero(mask)[:2]] = [np.nan, -0.0]
    return rows


def packed(template: PackedChannels, rows: np.ndarray) -> PackedChannels:
    return PackedChannels(template.model, template.layout, rows, [None] * len(rows))


def test_rows_come_back_bit_for_bit_and_the_prior_is_kept_once() -> None:
    template = blank_packed(CONFIG)
    store = ParkedRows(template)
    rows = rows_like(template, 5)
    shared = shared_columns(template.layout)
    assert shared.stop - shared.start == 3 * 3  # three fields of p = 3 values
    rows[1, shared.start] += 1.0  # a re-zeroed channel: its own prior
    rows[2, shared.stop - 1] = 7.0  # ... in the last shared column
    rows[3, shared.start : shared.start + 1] = np.copysign(0.0, -1.0)  # -0.0 is not 0.0
    names = [f"c{i}" for i in range(5)]
    slots = store.put(names, packed(template, rows))
    assert sorted(store._own_shared) == sorted(slots[i] for i in (1, 2, 3))
    got = store.rows(slots)
    assert got.rows.tobytes() == rows.tobytes()
    assert got.layout is template.layout and got.model == template.model
    assert store.rows([slots[3]]).rows.tobytes() == rows[3:4].tobytes()


def test_a_few_channels_hold_a_few_rows() -> None:
    """The first array is small and each further one doubles: 5 channels hold 8 rows."""
    template = blank_packed(CONFIG)
    store = ParkedRows(template)
    store.put(list("abcde"), packed(template, rows_like(template, 5)))
    assert store.capacity == FIRST_CHUNK_ROWS == 8 and len(store) == 5


def test_freed_slots_are_reused_and_the_store_grows_by_doubling_arrays() -> None:
    template = blank_packed(CONFIG)
    store = ParkedRows(template)
    rows = rows_like(template, 2 * CHUNK_ROWS + 1)  # 8 + 16 + … + 128 + 256 + 256 slots
    slots = store.put([f"c{i}" for i in range(len(rows))], packed(template, rows))
    assert [len(chunk) for chunk in store._chunks] == [8, 16, 32, 64, 128, 256, 256]
    assert store.capacity == 760 and len(store) == len(rows)
    for slot in slots[:10]:
        store.release(slot)
    again = store.put([f"d{i}" for i in range(10)], packed(template, rows[:10][::-1]))
    assert sorted(again) == sorted(slots[:10]) and store.capacity == 760
    assert store.rows(again).rows.tobytes() == rows[:10][::-1].tobytes()
    names, held = store.held()
    assert len(names) == len(rows) and held == sorted(held)
    assert store.rows(slots[10:]).rows.tobytes() == rows[10:].tobytes()
    store.release(slots[10])
    with pytest.raises(ValueError, match="holds no row"):
        store.release(slots[10])


def test_side_entries_follow_their_slot() -> None:
    template = blank_packed(CONFIG)
    store = ParkedRows(template)
    rows = rows_like(template, 3)
    sides = [None, {"alerts": {"drift": {"message": "m"}}}, None]
    slots = store.put(["a", "b", "c"], PackedChannels(template.model, template.layout, rows, sides))
    assert store.rows(slots).sides == sides
    store.release(slots[1])
    [slot] = store.put(["d"], packed(template, rows[1:2]))
    assert slot == slots[1] and store.rows([slot]).sides == [None]


def test_rows_of_another_layout_or_model_or_count_are_refused_before_any_slot_is_taken() -> None:
    template = blank_packed(CONFIG)
    store = ParkedRows(template)
    other_model = PackedChannels("another model", template.layout, template.rows, [None])
    with pytest.raises(ValueError, match="own model and layout"):
        store.put(["a"], other_model)
    layout = [*template.layout[:-1], (template.layout[-1][0], template.layout[-1][1] + 1)]
    other_layout = PackedChannels(template.model, layout, template.rows, [None])
    with pytest.raises(ValueError, match="own model and layout"):
        store.put(["a"], other_layout)
    with pytest.raises(ValueError, match="one row and one side per name"):
        store.put(["a", "b"], template)
    assert len(store) == 0 and store.held() == ([], [])


def test_a_layout_without_prior_fields_keeps_every_column() -> None:
    layout = [("channel", 3), ("squared", 2)]
    assert shared_columns(layout) == slice(0, 0)
    template = PackedChannels("m", layout, np.zeros((1, 5)), [None])
    store = ParkedRows(template)
    rows = np.arange(10.0).reshape(2, 5)
    slots = store.put(["a", "b"], PackedChannels("m", layout, rows, [None, None]))
    assert store.rows(slots).rows.tobytes() == rows.tobytes()
