"""Packed channel state: snapshot → restore → continue equals never stopping, bit for bit.

Every scenario runs a channel over simulated readings twice: once without a break, once
packed half-way (`pack_channels`, through the snapshot file's bytes), unpacked into new
channels and carried on. Every later output (corrected value, uncertainty, flags, gain,
drift rate, coefficients) and alert event must be *equal*, not close: float64 state is
stored as its bytes. Scenarios cover every learn mode, a fitted gain, Huber weights, the
exact sliding window, control events and alert rules caught mid-dwell or raised.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import pytest

from support.scenarios import channel_config, run_channel
from zeroline.channel import (
    Channel,
    ControlEvent,
    Corrected,
    Sample,
    pack_channels,
    unpack_channels,
)
from zeroline.config import ChannelConfig
from zeroline.errors import InputError
from zeroline.estimator import RecursiveEstimator, pack_estimators, unpack_estimators
from zeroline.objects import _slot_names
from zeroline.simulate import DAY, START
from zeroline.state import SnapshotGroup, decode_snapshot, encode_snapshot

Array = np.ndarray

TEMPERATURE = """
name: probe
topic: site/probe
basis:
  - constant
  - polynomial: {of: t, degree: 2, scale: 30d}
  - periodic: {of: t, period: 24h}
  - polynomial: {of: temperature, degree: 1, center: 20}
inputs: {temperature: {field: temperature}}
learn: {mode: all, robust: true}
memory: {half_life: 5d}
alerts: {drift_limit: 1.2, rate_limit: 0.3/d, horizon: 10d, dwell: 6h}
correction: {cap: 1.5}
"""

ENVELOPE = """
name: plume
topic: site/plume
basis:
  - constant
  - polynomial: {of: t, degree: 1, scale: 30d}
learn: {mode: envelope}
memory: {half_life: 10d}
alerts: {drift_limit: 0.8, dwell: 12h}
"""

GAIN = """
name: analyser
topic: site/analyser
basis:
  - constant
  - polynomial: {of: t, degree: 1, scale: 30d}
gain:
  - constant
  - polynomial: {of: t, degree: 1, scale: 30d}
inputs:
  reference: {topic: site/reference, max_age: 0s}
learn: {mode: reference, input: reference}
memory: {half_life: 3d}
alerts:
  check: {limit: 0.3, consecutive: 2, hard_limit: 2.0}
"""

WINDOW = """
name: window
topic: site/window
basis:
  - constant
  - polynomial: {of: t, degree: 1, scale: 1d}
learn: {mode: all}
memory: {window: 2d}
alerts: {drift_limit: 2.0, dwell: 2h}
"""

RESIDUAL = """
name: shift
topic: site/shift
basis: [constant]
learn: {mode: all, min_samples: 20}
memory: {half_life: 20d}
alerts: {residual_change: true, cusum: {h: 4}}
"""


@dataclass
class Scenario:
    config: ChannelConfig
    data: dict[str, Array]
    topics: tuple[str, ...] = ()
    fields: tuple[str, ...] = ()
    controls: list[ControlEvent] = field(default_factory=list)


def _rows(days: float, step: float, seed: int) -> tuple[Array, np.random.Generator]:
    rng = np.random.default_rng(seed)
    return START + np.arange(0.0, days * DAY, step), rng


def temperature_scenario() -> Scenario:
    time, rng = _rows(12, 1200.0, 1)
    age = (time - START) / DAY
    temperature = 20 + 6 * np.sin(2 * math.pi * age) + rng.normal(0, 0.3, time.size)
    value = 0.15 * age + 0.04 * (temperature - 20) + rng.normal(0, 0.05, time.size)
    value[::97] += 3.0  # outliers for the Huber weights
    temperature[200:230] = np.nan  # the input goes missing for a while
    data = {"time": time, "value": value, "temperature": temperature}
    controls = [
        ControlEvent(START + 4.5 * DAY, "recalibrated", "rezero"),
        ControlEvent(START + 7.2 * DAY, "cleaned", "reset"),
        ControlEvent(START + 9.1 * DAY, "replaced", "reset"),
    ]
    return Scenario(channel_config(TEMPERATURE), data, fields=("temperature",), controls=controls)


def envelope_scenario() -> Scenario:
    time, rng = _rows(10, 900.0, 2)
    value = 0.12 * (time - START) / DAY + rng.normal(0, 0.05, time.size)
    events = rng.random(time.size) < 0.1  # sparse positive events (plumes)
    value[events] += rng.uniform(1, 4, int(np.sum(events)))
    return Scenario(channel_config(ENVELOPE), {"time": time, "value": value})


def gain_scenario() -> Scenario:
    time, rng = _rows(10, 900.0, 3)
    age = (time - START) / DAY
    truth = 10 + 3 * np.sin(2 * math.pi * age / 3)
    value = (1.0 - 0.02 * age) * truth + 0.05 * age + rng.normal(0, 0.1, time.size)
    reference = np.where((time % 3600) == 0, truth, np.nan)
    reference[600:] = np.where(np.isnan(reference[600:]), np.nan, reference[600:] + 1.0)
    data = {"time": time, "value": value, "reference": reference}
    return Scenario(channel_config(GAIN), data, topics=("reference",))


def window_scenario() -> Scenario:
    time, rng = _rows(6, 600.0, 4)
    value = 0.5 * np.sin((time - START) / DAY) + rng.normal(0, 0.05, time.size)
    controls = [ControlEvent(START + 3.3 * DAY, "recalibrated", "rezero")]
    return Scenario(channel_config(WINDOW), {"time": time, "value": value}, controls=controls)


def residual_scenario() -> Scenario:
    time, rng = _rows(4, 600.0, 5)
    value = rng.normal(0, 0.1, time.size)
    value[300:] += 0.6  # a shift the CUSUM signals; the alert stays up for a while
    return Scenario(channel_config(RESIDUAL), {"time": time, "value": value})


SCENARIOS = {
    "all+robust+periodic+controls": temperature_scenario,
    "envelope": envelope_scenario,
    "reference+gain+check": gain_scenario,
    "window": window_scenario,
    "residual_change": residual_scenario,
}


def _part(scenario: Scenario, start: int, stop: int) -> dict[str, Array]:
    return {name: column[start:stop] for name, column in scenario.data.items()}


def _controls(scenario: Scenario, start: int, stop: int) -> list[ControlEvent]:
    times = scenario.data["time"]
    low = -math.inf if start == 0 else times[start - 1]
    high = math.inf if stop >= len(times) else times[stop - 1]
    return [c for c in scenario.controls if low < c.time <= high]


def _run(scenario: Scenario, channel: Channel, start: int, stop: int) -> tuple[list, list]:
    run = run_channel(
        scenario.config,
        _part(scenario, start, stop),
        inputs_from_topics=scenario.topics,
        fields=scenario.fields,
        controls=_controls(scenario, start, stop),
        channel=channel,
    )
    return run.results, run.events


def _through_file(channels: list[Channel], names: list[str]) -> list[Channel]:
    """Pack, write the snapshot's bytes, read them back, unpack."""
    group = SnapshotGroup("probe", names, [(n,) for n in names], pack_channels(channels))
    data = b"".join(encode_snapshot([group], {"journal_seq": 3}))
    [loaded] = decode_snapshot(data).groups
    return unpack_channels(channels[0].config, loaded.names, loaded.packed)


def _same(a: Corrected, b: Corrected) -> bool:
    return (
        a.to_json() == b.to_json()
        and a.learned == b.learned
        and (
            (a.coefficients is None and b.coefficients is None)
            or np.array_equal(a.coefficients, b.coefficients)  # type: ignore[arg-type]
        )
    )


def _alert_pending(channel: Channel) -> bool:
    """True when some rule is mid-dwell, raised, or counting (the states worth a test)."""
    for rule in channel.alerts.book.rules.values():
        latch = getattr(rule, "_latch", None)
        if latch is not None and (latch._pending_since is not None or latch.raised):
            return True
        if rule.active is not None or getattr(rule, "_run", 0) > 0:
            return True
    return False


def _split_points(scenario: Scenario) -> list[int]:
    """A third of the way, half-way, and the first reading after which an alert rule is
    mid-dwell or raised (there must be one: that is the state hardest to carry over)."""
    n = len(scenario.data["time"])
    probe = Channel(scenario.config)
    pending = None
    for i in range(n // 10, n - 10):
        _run(scenario, probe, i if i > n // 10 else 0, i + 1)
        if _alert_pending(probe):
            pending = i + 1
            break
    assert pending is not None, "the scenario never catches an alert rule mid-way"
    return sorted({n // 3, n // 2, pending})


@pytest.mark.parametrize("name", sorted(SCENARIOS))
def test_restored_channel_continues_exactly(name: str) -> None:
    """Outputs and events after a snapshot + restore equal an unbroken run exactly, at
    several split points including one with an alert rule mid-dwell or raised."""
    scenario = SCENARIOS[name]()
    n = len(scenario.data["time"])
    whole = Channel(scenario.config, "x")
    results, events = _run(scenario, whole, 0, n)
    for split in _split_points(scenario):
        first = Channel(scenario.config, "x")
        _run(scenario, first, 0, split)
        [restored] = _through_file([first], ["x"])
        later, later_events = _run(scenario, restored, split, n)
        assert all(_same(a, b) for a, b in zip(results[split:], later, strict=True)), split
        split_time = scenario.data["time"][split - 1]
        assert later_events == [e for e in events if e.time > split_time], split
        assert np.array_equal(
            pack_channels([restored]).rows, pack_channels([whole]).rows, equal_nan=True
        )
    assert events, "the scenario should raise some alert"


def test_packing_changes_nothing() -> None:
    """Packing a channel after every reading leaves its outputs exactly as without."""
    scenario = temperature_scenario()
    n = len(scenario.data["time"]) // 3
    plain, packed = Channel(scenario.config), Channel(scenario.config)
    expected, _ = _run(scenario, plain, 0, n)
    got = []
    for i in range(n):
        got += _run(scenario, packed, i, i + 1)[0]
        pack_channels([packed])
    assert all(_same(a, b) for a, b in zip(expected, got, strict=True))


def test_restored_state_equals_the_saved_state_to_the_bit() -> None:
    """Every float64 of every channel comes back identical, including the JSON view."""
    scenario = gain_scenario()
    channels = [Channel(scenario.config, f"c{i}") for i in range(5)]
    for i, channel in enumerate(channels):
        _run(scenario, channel, 0, 100 + 150 * i)
    restored = _through_file(channels, [c.name for c in channels])
    assert [c.name for c in restored] == [c.name for c in channels]
    assert np.array_equal(
        pack_channels(restored).rows, pack_channels(channels).rows, equal_nan=True
    )
    for before, after in zip(channels, restored, strict=True):
        assert before.to_state() == after.to_state()
        assert np.array_equal(before.estimator.covariance, after.estimator.covariance)


def test_channels_of_one_template_share_no_learned_state() -> None:
    """Cheap construction shares settings only: channels made by the constructor or by a
    restore, fed interleaved, give exactly what each gives alone."""
    scenario = temperature_scenario()
    n = len(scenario.data["time"]) // 2
    alone = [Channel(scenario.config, "a"), Channel(scenario.config, "b")]
    _run(scenario, alone[0], 0, n)
    restored = _through_file([alone[0], Channel(scenario.config, "b")], ["a", "b"])
    expected = _run(scenario, alone[0], n, n + 200)[0]
    mixed = [Channel(scenario.config, "c"), restored[0], restored[1]]
    got: list[Corrected] = []
    for i in range(n, n + 200):
        for index, channel in enumerate(mixed):
            out = _run(scenario, channel, i, i + 1)[0]
            if index == 1:
                got += out
    assert all(_same(a, b) for a, b in zip(expected, got, strict=True))


def fields(thing: object) -> dict[str, object]:
    """Every attribute an object holds, in its __dict__ or its slots."""
    found = dict(getattr(thing, "__dict__", {}))
    for name in _slot_names(type(thing)):
        if hasattr(thing, name):
            found[name] = getattr(thing, name)
    return found


def test_restored_channels_have_the_constructors_attributes() -> None:
    """A restored channel (and its estimator) has exactly the attributes the constructor
    gives, and shares with a sibling only settings that nothing changes in place."""
    scenario = temperature_scenario()
    made = Channel(scenario.config, "a")
    _run(scenario, made, 0, 50)
    first, second = _through_file([made, made], ["a", "b"])
    assert set(fields(first)) == set(fields(made))
    assert set(fields(first.estimator)) == set(fields(made.estimator))
    settings = {"config", "learn", "_parts", "_offset_size", "_gain_size", "_min_samples"}
    settings |= {"_basis", "_gain", "_epoch", "last_drift", "_condition"}  # immutable values
    settings |= {"_payload_inputs", "_needed"}  # tuples derived from the config
    settings |= {"_offset_dot"}  # the function for φ·θ chosen by the number of terms
    for name, value in fields(first).items():
        if value is fields(second)[name] and not isinstance(value, (int, float, str)):
            assert name in settings or value is None, name
    estimator_settings = {"prior_sd", "column_scale", "_scale", "_prior_root", "_scale_outer"}
    estimator_settings |= {"_shape", "half_life", "window", "n_terms", "_top_up_after"}
    shared_prior = {"prior_mean", "_prior_rows", "_prior_center"}  # replaced, never changed
    for name, value in fields(first.estimator).items():
        if value is fields(second.estimator)[name] and isinstance(value, (np.ndarray, list)):
            assert name in estimator_settings | shared_prior, name
            if name in shared_prior:
                assert isinstance(value, np.ndarray) and not value.flags.writeable, name


def test_a_rezero_gives_the_channel_its_own_prior_and_leaves_its_siblings_alone() -> None:
    """Channels of one template share the prior's arrays (restored ones too); a re-zero of
    one replaces its arrays, so the others keep theirs, bit for bit, and a channel
    restored after the re-zero gets the moved prior back."""
    scenario = temperature_scenario()
    made = Channel(scenario.config, "a")
    _run(scenario, made, 0, 50)
    first, second = _through_file([made, made], ["a", "b"])
    before = {n: np.array(getattr(second.estimator, n)) for n in ("prior_mean", "_prior_center")}
    rows_before = np.array(second.estimator._prior_rows)
    first.estimator.shift(0, 0.25)
    assert first.estimator._prior_rows is not second.estimator._prior_rows
    assert first.estimator.prior_mean[0] == before["prior_mean"][0] + 0.25
    for name, value in before.items():
        assert np.array_equal(getattr(second.estimator, name), value), name
    assert np.array_equal(second.estimator._prior_rows, rows_before)
    [again] = _through_file([first], ["a"])
    assert np.array_equal(again.estimator.prior_mean, first.estimator.prior_mean)
    assert np.array_equal(again.estimator._prior_rows, first.estimator._prior_rows)
    assert again.estimator._prior_rows is not second.estimator._prior_rows


def test_a_changed_model_is_refused() -> None:
    """State packed for one model does not go into another (InputError names it)."""
    scenario = envelope_scenario()
    channel = Channel(scenario.config)
    _run(scenario, channel, 0, 40)
    other = channel_config(ENVELOPE.replace("degree: 1", "degree: 2"))
    with pytest.raises(InputError, match="different model"):
        unpack_channels(other, ["plume"], pack_channels([channel]))


def test_added_and_removed_alert_rules_keep_the_model() -> None:
    """A config change of the alerts only (not the model): the model's state and the
    rules in both configs carry over, a new rule starts clear, a removed one is dropped."""
    scenario = envelope_scenario()
    channel = Channel(scenario.config)
    _run(scenario, channel, 0, 300)
    changed = channel_config(
        ENVELOPE.replace("alerts: {drift_limit: 0.8, dwell: 12h}", "alerts: {rate_limit: 1/d}")
    )
    [moved] = unpack_channels(changed, ["plume"], pack_channels([channel]))
    assert np.array_equal(moved.estimator.coefficients, channel.estimator.coefficients)
    assert set(moved.alerts.book.rules) == {"rate_limit", "residual_change", "model_health"}
    raised, pending, last = moved.alerts.book.rules["rate_limit"].pack()
    assert raised == 0.0 and math.isnan(pending) and math.isnan(last)
    kept = channel.alerts.book.rules["residual_change"].pack()
    assert tuple(moved.alerts.book.rules["residual_change"].pack()) == tuple(kept)
    sample = Sample(float(scenario.data["time"][300]), float(scenario.data["value"][300]))
    assert moved.process(sample)[0].corrected == channel.process(sample)[0].corrected


def test_copied_estimator_equals_a_constructed_one() -> None:
    """A channel's estimator is a copy of its template's pristine one: it gives exactly
    what an estimator made by the constructor (`Channel._new_estimator`) gives."""
    scenario = temperature_scenario()
    copied, constructed = Channel(scenario.config), Channel(scenario.config)
    constructed._estimator = constructed._new_estimator()
    first = _run(scenario, copied, 0, 300)[0]
    second = _run(scenario, constructed, 0, 300)[0]
    assert all(_same(a, b) for a, b in zip(first, second, strict=True))


def test_estimator_with_pending_forgetting_continues_exactly() -> None:
    """The estimator keeps F = g·G with the forgetting g apart (and θ cached): both are
    packed as they are, so an estimator packed between updates, never read in between,
    continues bit for bit (a channel always settles g, so this needs the estimator alone)."""
    rng = np.random.default_rng(8)
    rows = np.column_stack([np.ones(400), rng.normal(size=400), rng.normal(size=400)])
    ys = rows @ [1.0, 0.5, -2.0] + rng.normal(0, 0.1, 400)
    times = np.cumsum(rng.uniform(10, 900, 400))

    def fresh() -> RecursiveEstimator:
        return RecursiveEstimator(3, half_life=86400.0, prior_mean=[0.5, 0.0, 0.0])

    def feed_and_shift(estimator: RecursiveEstimator) -> None:
        for r, y, t in zip(rows[:250], ys[:250], times[:250], strict=True):
            estimator.update(r, y, 1.0, t)
            if t == times[199]:
                estimator.shift(0, 0.25)  # a re-zero: the prior rows move
        estimator.predict(rows[250])  # caches θ, leaves g apart

    first, unbroken = fresh(), fresh()
    feed_and_shift(first)
    feed_and_shift(unbroken)
    assert first._g != 1.0 and first._theta is not None  # the state this test is about
    block, sides = pack_estimators([first])
    [restored] = unpack_estimators(fresh(), block, sides)
    assert np.array_equal(pack_estimators([restored])[0], block, equal_nan=True)
    later = [
        restored.update(r, y, 1.0, t)
        for r, y, t in zip(rows[250:], ys[250:], times[250:], strict=True)
    ]
    again = [
        unbroken.update(r, y, 1.0, t)
        for r, y, t in zip(rows[250:], ys[250:], times[250:], strict=True)
    ]
    assert later == again
    assert np.array_equal(restored.coefficients, unbroken.coefficients)
