"""Drift alerts on simulated channels with known truth: they fire and clear at the right
times, do not flap on noise (events are counted), and survive a state round trip."""

from __future__ import annotations

import json
import math

import numpy as np

from support.scenarios import channel_config, run_channel
from zeroline.channel import Channel
from zeroline.simulate import DAY, START

LINEAR = """
name: probe
topic: site/probe
basis:
  - constant
  - polynomial: {of: t, degree: 1, scale: 1d}
learn: {mode: all, nominal: 0}
memory: {half_life: 10d}
alerts:
  drift_limit: 10
  rate_limit: 0.4/d
  horizon: 14d
  dwell: 2h
"""


def _linear(
    days: float, rate_per_day: float, noise: float = 0.3, seed: int = 1, step: float = 900.0
) -> dict[str, np.ndarray]:
    rng = np.random.default_rng(seed)
    time = START + np.arange(0, days * DAY, step)
    drift = 1.0 + rate_per_day * (time - START) / DAY
    return {"time": time, "value": drift + rng.normal(0, noise, time.size), "drift": drift}


def test_linear_drift_raises_rate_forecast_and_limit_once_each() -> None:
    """Drift 1 + 0.5/day (limit 10 is crossed at day 18; rate 0.5/d > 0.4/d; the forecast
    sees the crossing within 14 days from day 4). Each rule raises once, at about the right
    time, and nothing flaps: exactly three drift events over 25 days.

    The residual CUSUM (h = 8) may give a rare false alarm on the noise: measured when set,
    0.4 per 25-day run over 20 seeds (in-control ARL ≈ 5,900 samples here; 9,700 for ideal
    N(0,1) residuals), so this test counts the drift rules only, and no more than two
    residual alarms."""
    run = run_channel(channel_config(LINEAR), _linear(25, 0.5))
    residual = [e for e in run.events if e.rule == "residual_change" and e.state == "raised"]
    assert len(residual) <= 2
    run.events = [e for e in run.events if e.rule != "residual_change"]
    states = [(e.rule, e.state) for e in run.events]
    assert states == [
        ("rate_limit", "raised"),
        ("forecast", "raised"),
        ("drift_limit", "raised"),
    ], states
    rate, forecast, limit = run.events
    # once the rate is significantly (2 standard uncertainties) beyond the limit: the true
    # rate is 0.5/d against 0.4/d; measured when set: day 1.8
    assert rate.time - START < 3 * DAY
    assert abs((forecast.time - START) / DAY - 4.0) < 1.0
    assert abs((limit.time - START) / DAY - 18.0) < 0.5
    assert "will reach the drift limit" in forecast.message


def test_noise_alone_raises_nothing() -> None:
    """30 days of noise around a constant offset: no drift, rate or forecast alert, and at
    most one residual-change alarm (two-sided CUSUM k = 0.5, h = 8)."""
    run = run_channel(channel_config(LINEAR), _linear(30, 0.0, seed=4))
    rules = [e.rule for e in run.events if e.state == "raised"]
    assert [r for r in rules if r != "residual_change"] == [], run.events
    assert rules.count("residual_change") <= 1


def test_forecast_crossing_time_is_within_its_stated_interval() -> None:
    """On a linear drift of known rate (crossing the limit at day 18) the predicted crossing
    time, forecast at day 10, lies within its stated 95 % interval in about 95 % of
    independent runs, and its error matches the stated spread.

    Judged across runs (seeds), since forecasts on consecutive days of one run share their
    errors. Measured when set (30 runs): 3.3 % outside, RMS standardised error 0.97.
    """
    true_crossing = START + (10 - 1.0) / 0.5 * DAY
    standardised, outside = [], 0
    for seed in range(40, 64):
        data = _linear(10, 0.5, seed=seed, step=1800.0)
        channel = Channel(channel_config(LINEAR))
        run_channel(channel.config, data, channel=channel)
        crossing = channel.forecast(horizon=30 * DAY)
        assert crossing is not None and crossing.late is not None
        assert crossing.early <= crossing.earliest <= crossing.late
        outside += not (crossing.early <= true_crossing <= crossing.late)
        half_width = (crossing.late - crossing.early) / 2
        standardised.append((crossing.earliest - true_crossing) / (half_width / 1.96))
    rms = math.sqrt(float(np.mean(np.square(standardised))))
    assert outside <= 3, outside  # 24 runs at 95 %: 1.2 expected; P(> 3) ≈ 3 %
    assert 0.6 <= rms <= 1.4, rms


def test_sudden_change_is_caught_by_the_residual_cusum() -> None:
    """A +1.5 step (5 noise SDs) that the drift model does not contain — a knock or fouling
    — raises residual_change within 10 samples."""
    data = _linear(10, 0.1)
    step_at = START + 6 * DAY
    data["value"][data["time"] >= step_at] += 1.5
    run = run_channel(channel_config(LINEAR), data)
    changes = [e for e in run.events if e.rule == "residual_change" and e.state == "raised"]
    assert changes, run.events
    assert 0 <= changes[0].time - step_at <= 10 * 900.0


CHECKS = """
name: cell
topic: site/cell
basis: [constant]
inputs:
  reference: {field: check_value}
learn: {mode: reference, input: reference}
memory: {half_life: 30d}
alerts:
  check: {limit: 1.0, consecutive: 3, hard_limit: 4.0}
  residual_change: false
"""


def test_check_failures_raise_on_consecutive_or_hard_limit() -> None:
    """Daily reference checks. From day 10 the sensor fails in a way the model cannot follow
    (its error against the reference jumps by 2, beyond the 1.0 limit): the alert raises on
    the third consecutive failing check, not before."""
    rng = np.random.default_rng(2)
    time = START + np.arange(0, 20 * DAY, 3600.0)
    value = 5.0 + rng.normal(0, 0.1, time.size)
    check = np.where((time - START) % DAY == 0, 0.0, np.nan)
    # the check sample sees the sensor offset; after day 10 the sensor reads 2 high only
    # at check time (e.g. a fouled inlet that the zero gas reveals)
    failing = (time >= START + 10 * DAY) & ~np.isnan(check)
    value[failing] += 2.0
    data = {"time": time, "value": value, "check_value": check}
    run = run_channel(channel_config(CHECKS), data, fields=("check_value",))
    raised = [e for e in run.events if e.rule == "check_failures" and e.state == "raised"]
    assert len(raised) == 1
    assert raised[0].time == START + 12 * DAY  # checks at days 10, 11, 12


CAP = """
name: cell
topic: site/cell
basis:
  - constant
  - polynomial: {of: t, degree: 1, scale: 1d}
learn: {mode: all, nominal: 0}
memory: {half_life: 5d}
correction: {cap: 4}
alerts: {dwell: 0s}
"""


def test_correction_at_its_cap_is_flagged_and_alerted() -> None:
    """The drift grows past the cap of 4: the correction stops at 4 (corrected = raw − 4),
    the reading carries the 'capped' flag (QARTOD suspect) and correction_cap raises once."""
    run = run_channel(channel_config(CAP), _linear(12, 0.5))
    last = run.results[-1]
    assert last.corrected == last.raw - 4.0
    assert "capped" in last.flags and last.quality_code == 3
    raised = [e for e in run.events if e.rule == "correction_cap" and e.state == "raised"]
    assert len(raised) == 1
    assert abs((raised[0].time - START) / DAY - 6.0) < 0.5  # drift 1 + 0.5·t reaches 4 at 6 d


STALE = """
name: cell
topic: site/cell
basis:
  - constant
  - polynomial: {of: temperature, degree: 1, center: 20}
inputs:
  temperature: {topic: site/temp, max_age: 30m}
learn: {mode: all, nominal: 0}
memory: {half_life: 5d}
alerts: {dwell: 1h}
"""


def test_model_health_raises_on_a_stale_input_and_clears_when_it_returns() -> None:
    rng = np.random.default_rng(3)
    time = START + np.arange(0, 6 * DAY, 600.0)
    temperature = 20 + rng.normal(0, 2, time.size)
    value = 0.5 * (temperature - 20) + rng.normal(0, 0.1, time.size)
    outage = (time >= START + 3 * DAY) & (time < START + 4 * DAY)
    temperature[outage] = np.nan
    data = {"time": time, "value": value, "temperature": temperature}
    run = run_channel(channel_config(STALE), data, inputs_from_topics=("temperature",))
    health = [e for e in run.events if e.rule == "model_health"]
    assert [e.state for e in health] == ["raised", "cleared"], health
    assert "input_stale" in health[0].message
    assert START + 3 * DAY < health[0].time <= START + 3 * DAY + 2 * 3600
    assert START + 4 * DAY <= health[1].time <= START + 4 * DAY + 2 * 3600


def test_state_round_trip_mid_stream_gives_identical_results() -> None:
    """Snapshot a channel (through JSON) half-way, restore it into a new Channel and carry
    on: every later corrected value, uncertainty and alert event is identical to an
    uninterrupted run."""
    data = _linear(25, 0.5)
    config = channel_config(LINEAR)
    whole = run_channel(config, data)
    half = len(data["time"]) // 2
    first = Channel(config)
    run_channel(config, {k: v[:half] for k, v in data.items()}, channel=first)
    restored = Channel(config)
    restored.load_state(json.loads(json.dumps(first.to_state())))
    rest = run_channel(config, {k: v[half:] for k, v in data.items()}, channel=restored)
    for a, b in zip(whole.results[half:], rest.results, strict=True):
        assert (a.corrected, a.uncertainty, a.quality) == (b.corrected, b.uncertainty, b.quality)
    assert [e for e in whole.events if e.time >= data["time"][half]] == rest.events


QUIET_REFERENCE = """
name: cell
topic: site/cell
basis: [constant]
inputs:
  reference: {topic: site/ref, max_age: 0s}
learn: {mode: reference, input: reference, max_gap: 2d}
memory: {half_life: 10d}
alerts: {dwell: 0s}
"""


def test_model_health_reports_no_useful_sample_after_max_gap() -> None:
    """Reference checks every 6 h for 4 days, then none: once the last check is older than
    max_gap (2 d) readings are 'extrapolating' and model_health raises naming
    no_useful_sample."""
    rng = np.random.default_rng(6)
    time = START + np.arange(0, 9 * DAY, 1800.0)
    value = 3.0 + rng.normal(0, 0.1, time.size)
    reference = np.where(((time - START) % (6 * 3600) == 0) & (time < START + 4 * DAY), 0.0, np.nan)
    data = {"time": time, "value": value, "reference": reference}
    run = run_channel(channel_config(QUIET_REFERENCE), data, inputs_from_topics=("reference",))
    health = [e for e in run.events if e.rule == "model_health" and e.state == "raised"]
    assert len(health) == 1 and "no_useful_sample" in health[0].message
    last_check = START + 4 * DAY - 6 * 3600
    assert last_check + 2 * DAY < health[0].time <= last_check + 2 * DAY + 1800
    assert run.results[-1].quality == "extrapolating"
