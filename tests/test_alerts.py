"""Tests for the alert primitives (zeroline.alerts), rules (alert_rules) and book (alert_book)."""

from __future__ import annotations

import json
import math
from collections.abc import Callable
from typing import Any

import numpy as np
import pytest

from zeroline.alert_book import AlertBook
from zeroline.alert_rules import (
    AlertRule,
    CheckFailureRule,
    CorrectionCapRule,
    DriftLimitRule,
    ForecastRule,
    ModelHealthRule,
    RateLimitRule,
    ResidualChangeRule,
)
from zeroline.alerts import (
    RULE_NAMES,
    AlertEvent,
    FloatArray,
    Latch,
    TabularCusum,
    crossing_time,
    cusum_step,
)
from zeroline.errors import ConfigError

DAY = 86400.0


def json_round_trip(state: dict[str, Any]) -> dict[str, Any]:
    """What a snapshot on disk gives back: strict JSON, no NaN or infinity."""
    loaded: dict[str, Any] = json.loads(json.dumps(state, allow_nan=False))
    return loaded


# --- AlertEvent -----------------------------------------------------------------------------


class TestAlertEvent:
    def test_json_has_exactly_the_contract_keys(self) -> None:
        """The event carries the design §4 contract keys and nothing else."""
        event = AlertEvent(1.7e9, "a", "forecast", "raised", 3.0, 4.0, "info", "m")
        assert list(event.to_json()) == [
            "time", "channel", "rule", "state", "value", "limit", "severity", "message",
        ]  # fmt: skip
        assert AlertEvent.from_json(json_round_trip(event.to_json())) == event

    def test_rule_names_are_the_contract_names(self) -> None:
        """RULE_NAMES lists the seven rule names of design §4."""
        assert set(RULE_NAMES) == {
            "drift_limit", "rate_limit", "forecast", "residual_change",
            "check_failures", "correction_cap", "model_health",
        }  # fmt: skip

    def test_non_finite_numbers_become_none(self) -> None:
        """JSON cannot carry infinity, so an infinite value is stored as no value."""
        event = AlertEvent(0.0, "a", "drift_limit", "raised", math.inf, math.nan, "warning", "")
        assert event.value is None and event.limit is None

    @pytest.mark.parametrize(
        ("rule", "state", "severity"),
        [("drift", "raised", "info"), ("forecast", "up", "info"), ("forecast", "raised", "loud")],
    )
    def test_unknown_names_are_refused(self, rule: str, state: str, severity: str) -> None:
        """Only contract rule names, raised/cleared and known severities are accepted."""
        with pytest.raises(ValueError):
            AlertEvent(0.0, "a", rule, state, None, None, severity, "")  # type: ignore[arg-type]


# --- Latch ----------------------------------------------------------------------------------


def run_latch(latch: Latch, times: FloatArray, levels: FloatArray) -> list[tuple[float, str]]:
    """Feed a whole series; the (time, new state) of every change."""
    changes: list[tuple[float, str]] = []
    for t, x in zip(times, levels, strict=True):
        change = latch.update(float(t), float(x))
        if change is not None:
            changes.append((float(t), change))
    return changes


class TestLatch:
    def test_hysteresis_stops_flapping_on_noise(self) -> None:
        """Noise (sd 0.4) around raise level 10: one raise with clear level 8; flapping without."""
        rng = np.random.default_rng(20260501)
        times = np.arange(10_000, dtype=float)
        levels = 10.0 + 0.4 * rng.standard_normal(times.size)
        with_gap = run_latch(Latch(raise_level=10.0, clear_level=8.0), times, levels)
        assert [state for _, state in with_gap] == ["raised"]
        # Control: without hysteresis the same series toggles thousands of times.
        without_gap = run_latch(Latch(raise_level=10.0, clear_level=10.0), times, levels)
        assert len(without_gap) > 1000

    def test_dwell_on_noise_needs_a_sustained_excursion(self) -> None:
        """Noise centred 2 sd below the level never stays above it 30 s long (P per try ~1e-40)."""
        rng = np.random.default_rng(7)
        times = np.cumsum(rng.exponential(1.0, 20_000))
        levels = 8.0 + rng.standard_normal(times.size)
        assert run_latch(Latch(10.0, 8.0, raise_dwell=30.0), times, levels) == []
        assert len(run_latch(Latch(10.0, 8.0), times, levels)) > 0  # control: no dwell

    def test_dwell_is_counted_in_sample_time_on_irregular_stamps(self) -> None:
        """The raise comes on the first sample at least `raise_dwell` after the excursion began."""
        rng = np.random.default_rng(11)
        times = np.cumsum(rng.exponential(37.0, 400))
        start = 100
        levels = np.where(np.arange(times.size) >= start, 12.0, 5.0)
        levels[start + 3] = 9.0  # a dip restarts the dwell
        dwell = 600.0
        changes = run_latch(Latch(10.0, 8.0, raise_dwell=dwell), times, levels)
        restart = times[start + 4]
        expected = times[np.flatnonzero(times - restart >= dwell)[0]]
        assert changes == [(float(expected), "raised")]

    def test_clear_dwell_and_explicit_clear(self) -> None:
        """Clearing needs clear_dwell inside; clear() reports whether it was raised."""
        latch = Latch(10.0, 8.0, clear_dwell=60.0)
        assert latch.update(0.0, 11.0) == "raised"
        assert latch.update(10.0, 7.0) is None
        assert latch.update(69.0, 7.0) is None
        assert latch.update(70.0, 7.0) == "cleared"
        assert latch.update(80.0, 11.0) == "raised"
        assert latch.clear() is True
        assert latch.clear() is False
        assert not latch.raised

    def test_below_direction_and_nan(self) -> None:
        """A 'below' latch raises under its level; NaN levels are ignored."""
        latch = Latch(raise_level=5.0, clear_level=7.0, direction="below")
        assert latch.update(0.0, math.nan) is None
        assert latch.update(1.0, 4.0) == "raised"
        assert latch.update(2.0, 6.0) is None
        assert latch.update(3.0, 8.0) == "cleared"

    def test_state_round_trip_mid_stream_changes_nothing(self) -> None:
        """Snapshot and restore at every sample: the same changes as one uninterrupted run."""
        rng = np.random.default_rng(3)
        times = np.cumsum(rng.exponential(5.0, 600))
        levels = 9.0 + 2.0 * np.sin(times / 60.0) + 0.5 * rng.standard_normal(times.size)

        def make() -> Latch:
            return Latch(10.0, 8.5, raise_dwell=40.0, clear_dwell=25.0)

        uninterrupted = run_latch(make(), times, levels)
        assert len(uninterrupted) > 10
        for cut in range(1, times.size):  # every cut, so some fall inside a pending dwell
            first = make()
            before = run_latch(first, times[:cut], levels[:cut])
            second = Latch.from_state(json_round_trip(first.to_state()))
            assert before + run_latch(second, times[cut:], levels[cut:]) == uninterrupted

    def test_time_going_backwards_is_refused(self) -> None:
        """Samples must come in time order, or dwell would be meaningless."""
        latch = Latch(10.0, 8.0)
        latch.update(5.0, 0.0)
        with pytest.raises(ValueError, match="earlier"):
            latch.update(4.0, 0.0)

    def test_impossible_settings_are_config_errors(self) -> None:
        """A clear level beyond the raise level or a negative dwell is refused."""
        with pytest.raises(ConfigError):
            Latch(10.0, 11.0)
        with pytest.raises(ConfigError):
            Latch(10.0, 8.0, raise_dwell=-1.0)


# --- CUSUM ----------------------------------------------------------------------------------


def simulate_run_lengths(
    rng: np.random.Generator, runs: int, shift: float, k: float, h: float
) -> FloatArray:
    """Run lengths of many independent two-sided CUSUMs on N(shift, 1), via `cusum_step`."""
    run_length = np.zeros(runs)
    alive = np.arange(runs)
    upper = np.zeros(runs)
    lower = np.zeros(runs)
    steps_done = 0
    chunk = 128
    while alive.size:
        z = rng.standard_normal((chunk, alive.size)) + shift
        first_signal = np.full(alive.size, -1)
        for step in range(chunk):
            upper, lower = cusum_step(upper, lower, z[step], k)
            fresh = ((upper > h) | (lower > h)) & (first_signal < 0)
            first_signal[fresh] = step
        done = first_signal >= 0
        run_length[alive[done]] = steps_done + first_signal[done] + 1
        alive, upper, lower = alive[~done], upper[~done], lower[~done]
        steps_done += chunk
    return run_length


class TestTabularCusum:
    def test_in_control_average_run_length(self) -> None:
        """Two-sided tabular CUSUM, k = 0.5, h = 5, in control: ARL ≈ 465.

        Source: ARL table of the tabular CUSUM with k = 1/2, h = 5 in Montgomery,
        "Introduction to Statistical Quality Control" (from memory).
        """
        lengths = simulate_run_lengths(np.random.default_rng(465), 10_000, 0.0, 0.5, 5.0)
        arl, se = lengths.mean(), lengths.std(ddof=1) / math.sqrt(lengths.size)
        assert se / arl <= 0.02
        assert abs(arl - 465.0) <= 3 * se, (arl, se)

    def test_one_sigma_shift_average_run_length(self) -> None:
        """Same CUSUM after a 1σ mean shift: ARL ≈ 10.4 (tabled to 0.1).

        Source: ARL table of the tabular CUSUM with k = 1/2, h = 5 in Montgomery,
        "Introduction to Statistical Quality Control" (from memory). Tolerance: three
        standard errors plus half the table's last digit.
        """
        lengths = simulate_run_lengths(np.random.default_rng(104), 10_000, 1.0, 0.5, 5.0)
        arl, se = lengths.mean(), lengths.std(ddof=1) / math.sqrt(lengths.size)
        assert abs(arl - 10.4) <= 3 * se + 0.05, (arl, se)

    def test_class_matches_vectorised_step(self) -> None:
        """TabularCusum and cusum_step give the same statistics and signals."""
        rng = np.random.default_rng(5)
        z = rng.standard_normal(2000) * 1.3 + 0.2
        cusum = TabularCusum(k=0.5, h=5.0)
        upper, lower = np.zeros(1), np.zeros(1)
        for value in z:
            signal = cusum.update(float(value))
            upper, lower = cusum_step(upper, lower, np.array([value]), 0.5)
            assert (cusum.upper, cusum.lower) == (upper[0], lower[0])
            assert signal == bool(upper[0] > 5.0 or lower[0] > 5.0)

    def test_signal_needs_to_exceed_h(self) -> None:
        """Exactly h is not a signal; just above is (Montgomery's rule: C > H)."""
        cusum = TabularCusum(k=0.5, h=5.0)
        assert [cusum.update(1.5) for _ in range(5)] == [False] * 5
        assert cusum.upper == 5.0
        assert cusum.update(0.5 + 1e-9)

    def test_downward_side_and_reset(self) -> None:
        """A downward shift grows C⁻ only; reset() zeroes both."""
        cusum = TabularCusum(k=0.5, h=5.0)
        signals = [cusum.update(-2.0) for _ in range(4)]
        assert signals == [False, False, False, True]
        assert (cusum.upper, cusum.lower) == (0.0, 6.0)
        cusum.reset()
        assert cusum.statistic == 0.0


# --- crossing_time --------------------------------------------------------------------------


class TestCrossingTime:
    def test_noise_free_linear_drift_is_exact(self) -> None:
        """Linear mean and linear sd: all three crossings equal their closed forms to 1e-9.

        Reference: the algebra of a straight line (d0 + r·t = L ⇒ t = (L − d0)/r).
        """
        d0, rate, growth, limit, z = 1.0, 1.5 / DAY, 0.2 / DAY, 15.0, 1.96
        times = np.linspace(0.0, 30 * DAY, 101)
        crossing = crossing_time(times, d0 + rate * times, growth * times, limit, z)
        assert crossing is not None and crossing.side == 1
        scale = 30 * DAY
        assert abs(crossing.earliest - (limit - d0) / rate) <= 1e-9 * scale
        assert abs(crossing.early - (limit - d0) / (rate + z * growth)) <= 1e-9 * scale
        assert crossing.late is not None
        assert abs(crossing.late - (limit - d0) / (rate - z * growth)) <= 1e-9 * scale

    def test_downward_drift_at_epoch_times(self) -> None:
        """A falling drift crosses −limit; absolute epoch times keep their precision."""
        now = 1.75e9
        times = now + np.linspace(0.0, 20 * DAY, 57)
        mean = -2.0 - 1.0 / DAY * (times - now)
        crossing = crossing_time(times, mean, np.zeros_like(times), 10.0, 2.0)
        assert crossing is not None and crossing.side == -1
        assert abs((crossing.earliest - now) - 8 * DAY) <= 1e-9 * 8 * DAY
        assert crossing.early == crossing.earliest == crossing.late

    def test_no_crossing_and_already_beyond(self) -> None:
        """None when the mean stays inside; times[0] when it is already beyond."""
        times = np.linspace(0.0, 10.0, 11)
        assert crossing_time(times, np.full(11, 3.0), np.ones(11), 5.0, 1.96) is None
        crossing = crossing_time(times, np.full(11, 6.0), np.zeros(11), 5.0, 1.96)
        assert crossing is not None and crossing.earliest == 0.0

    def test_true_crossing_lies_in_the_interval_95_percent_of_the_time(self) -> None:
        """Fit a line to noisy drift, forecast with its pointwise 95 % band: coverage ≈ 0.95.

        Source: inverting a pointwise confidence band of a monotone regression function
        gives a confidence interval for where it reaches a level (inverse estimation /
        calibration intervals; e.g. Draper & Smith, "Applied Regression Analysis", from
        memory). Straight-line fit and its covariance from numpy.polyfit, an independent
        general-purpose library.
        """
        rng = np.random.default_rng(2026)
        t_obs = np.linspace(-30 * DAY, 0.0, 200)
        intercept, slope, noise, limit = 3.0, 0.8 / DAY, 0.6, 15.0
        true_crossing = (limit - intercept) / slope
        grid = np.linspace(0.0, 40 * DAY, 400)
        design = np.column_stack([grid, np.ones_like(grid)])
        reps, covered = 2000, 0
        for _ in range(reps):
            y = intercept + slope * t_obs + noise * rng.standard_normal(t_obs.size)
            coef, cov = np.polyfit(t_obs, y, 1, cov="unscaled")
            cov = cov * noise**2  # known noise level, so the band is exactly normal
            mean = design @ coef
            sd = np.sqrt(np.einsum("ij,jk,ik->i", design, cov, design))
            crossing = crossing_time(grid, mean, sd, limit, 1.959964)
            assert crossing is not None and crossing.late is not None
            assert crossing.early <= crossing.earliest <= crossing.late
            covered += crossing.early <= true_crossing <= crossing.late
        coverage = covered / reps
        assert abs(coverage - 0.95) <= 3 * math.sqrt(0.95 * 0.05 / reps), coverage

    def test_bad_grids_are_refused(self) -> None:
        """Unsorted times or negative sd are a caller's mistake, reported as such."""
        with pytest.raises(ValueError, match="increasing"):
            crossing_time([0.0, 2.0, 1.0], [0, 0, 0], [0, 0, 0], 1.0, 1.0)
        with pytest.raises(ValueError, match="negative"):
            crossing_time([0.0, 1.0], [0, 0], [0, -1], 1.0, 1.0)


# --- Rules ----------------------------------------------------------------------------------


class TestCheckFailureRule:
    """Daily drift checks of a 500 ppm span analyser with a 2.5 % drift spec (12.5 ppm).

    Source: US 40 CFR 60 Appendix F (Procedure 1, §4.3), as restated in state regulations
    (e.g. Maine 06-096 CMR ch. 117): out of control when the calibration drift exceeds
    twice the specification on five consecutive daily checks or four times on any one;
    back in control after a check within the allowable drift limit.
    """

    SPEC = 0.025 * 500.0

    def make(self) -> CheckFailureRule:
        return CheckFailureRule(
            channel="stack-so2",
            limit=2 * self.SPEC,
            consecutive=5,
            hard_limit=4 * self.SPEC,
            clear_limit=self.SPEC,
        )

    def feed(self, rule: CheckFailureRule, drifts: list[float]) -> list[tuple[int, str]]:
        return [(day, e.state) for day, d in enumerate(drifts) for e in rule.observe(day * DAY, d)]

    def test_out_of_control_on_fifth_consecutive_day(self) -> None:
        """Four days above 25 ppm are not enough; the fifth raises."""
        rule = self.make()
        assert self.feed(rule, [26.0, -27.0, 30.0, 28.0]) == []
        assert rule.observe(4 * DAY, 26.0)[0].state == "raised"

    def test_one_day_above_four_times_spec(self) -> None:
        """One check above 50 ppm raises at once, with the hard limit as the event's limit."""
        rule = self.make()
        assert rule.observe(0.0, 10.0) == []
        (event,) = rule.observe(DAY, -51.0)
        assert (event.state, event.value, event.limit) == ("raised", -51.0, 50.0)

    def test_run_broken_by_a_good_day_and_exact_limit(self) -> None:
        """A day at or below 25 ppm restarts the count ("exceeds" is strict)."""
        rule = self.make()
        assert self.feed(rule, [26, 26, 26, 26, 20, 26, 26, 26, 26]) == []
        assert self.feed(self.make(), [25.0] * 10) == []

    def test_cleared_by_an_in_spec_check(self) -> None:
        """Once out of control, 20 ppm (within 2×, not within spec) keeps it; 10 ppm clears."""
        rule = self.make()
        events = self.feed(rule, [26, 26, 26, 26, 26, 20, 10, 26])
        assert events == [(4, "raised"), (6, "cleared")]
        assert rule.active is None


class TestLevelRules:
    def test_drift_limit_hysteresis_and_message(self) -> None:
        """Raised beyond ±15, kept until within 0.8·15, value is the signed drift."""
        rule = DriftLimitRule(channel="a", limit=15.0)
        (raised,) = rule.observe(0.0, -15.5)
        assert (raised.value, raised.limit, raised.severity) == (-15.5, 15.0, "warning")
        assert raised.message == "drift -15.5 is beyond the limit ±15"
        assert rule.observe(1.0, -12.5) == []
        assert rule.observe(2.0, -11.0)[0].state == "cleared"

    def test_rate_limit_reads_per_day(self) -> None:
        """A 2/d limit is written back in units per day."""
        rule = RateLimitRule(channel="a", limit_per_s=2.0 / DAY, severity="critical")
        (event,) = rule.observe(0.0, 3.0 / DAY)
        assert event.message == "drift rate 3/d is beyond the limit ±2/d"
        assert event.severity == "critical"

    def test_correction_cap_is_inclusive(self) -> None:
        """At the cap exactly the rule raises and asks for recalibration."""
        rule = CorrectionCapRule(channel="a", cap=20.0)
        (event,) = rule.observe(0.0, -20.0)
        assert "recalibrate or replace" in event.message
        assert rule.observe(1.0, 18.5) == []
        assert rule.observe(2.0, 17.9)[0].state == "cleared"

    def test_model_health_names_problems_and_follows_changes(self) -> None:
        """Raised after the dwell, re-raised when the set changes, cleared when empty."""
        rule = ModelHealthRule(channel="a", dwell=60.0)
        assert rule.observe(0.0, {"wind_up"}) == []
        (first,) = rule.observe(60.0, ["wind_up"])
        assert first.message == "model problems: wind_up"
        assert rule.observe(70.0, {"wind_up"}) == []
        (second,) = rule.observe(80.0, {"input_stale", "wind_up"})
        assert (second.state, second.message) == ("raised", "model problems: input_stale, wind_up")
        assert rule.observe(90.0, set()) == []
        assert rule.observe(150.0, ())[0].state == "cleared"

    def test_explicit_clear_reports_and_forgets(self) -> None:
        """clear() emits a clear event only when raised, and restarts any pending dwell."""
        rule = DriftLimitRule(channel="a", limit=15.0, dwell=100.0)
        assert rule.clear(0.0, "sensor recalibrated") == []
        rule.observe(0.0, 20.0)
        rule.observe(100.0, 20.0)
        (event,) = rule.clear(101.0, "sensor recalibrated")
        assert (event.state, event.message) == ("cleared", "drift_limit: sensor recalibrated")
        assert rule.observe(150.0, 20.0) == []  # the dwell starts again

    def test_bad_settings_are_config_errors(self) -> None:
        """Impossible settings say what would be right."""
        with pytest.raises(ConfigError, match="> 0"):
            DriftLimitRule(channel="a", limit=0.0)
        with pytest.raises(ConfigError, match="severity"):
            CorrectionCapRule(channel="a", cap=1.0, severity="urgent")
        with pytest.raises(ConfigError, match="hard_limit"):
            CheckFailureRule(channel="a", limit=10.0, hard_limit=5.0)


class TestResidualChangeRule:
    def test_shift_raises_once_and_clears_after_it_ends(self) -> None:
        """A 2σ shift raises within a few samples, stays raised, clears once it is gone."""
        rng = np.random.default_rng(17)
        z = np.concatenate([rng.standard_normal(300), rng.standard_normal(300) + 2.0,
                            rng.standard_normal(300)])  # fmt: skip
        rule = ResidualChangeRule(channel="a", clear_samples=50)
        events = [(i, e) for i, value in enumerate(z) for e in rule.observe(float(i), value)]
        states = [e.state for _, e in events]
        assert states == ["raised", "cleared"], states
        raised_at, raised = events[0]
        assert 300 <= raised_at < 320 and "upward" in raised.message
        # Cleared 50 quiet samples after the last re-signal, which comes near the shift's end.
        assert 600 + 10 <= events[1][0] < 700

    def test_explicit_clear_resets_the_cusum(self) -> None:
        """After clear() the statistics start from zero."""
        rule = ResidualChangeRule(channel="a")
        for i in range(3):
            rule.observe(float(i), 2.0)
        rule.clear(3.0)
        assert rule.observe(4.0, 2.0) == []
        assert rule.to_state()["learned"]["cusum"]["upper"] == 1.5


class TestForecastRule:
    @staticmethod
    def linear(now: float, rate: float, sd_growth: float) -> Callable[[FloatArray], Any]:
        def predict(times: FloatArray) -> tuple[FloatArray, FloatArray]:
            ahead = times - now
            return rate * ahead, sd_growth * ahead

        return predict

    def test_message_value_and_clear(self) -> None:
        """Raised with time to the crossing and its 95 % interval; cleared when it recedes."""
        limit, horizon = 15.0, 14 * DAY
        # Choose rate and band so the interval is 8.1 d to 10.6 d.
        outer, inner = limit / (8.1 * DAY), limit / (10.6 * DAY)
        rate, growth = (outer + inner) / 2, (outer - inner) / (2 * 1.959964)
        rule = ForecastRule(channel="a", drift_limit=limit, horizon_s=horizon)
        (event,) = rule.observe(0.0, self.linear(0.0, rate, growth))
        assert event.message == (
            "will reach the drift limit ±15 in about 9.18 d (between 8.1 and 10.6 d, 95 %)"
        )
        assert event.value is not None and abs(event.value - limit / rate) < 1e-6 * DAY
        assert event.limit == horizon
        # 16 days away: beyond the horizon but inside the hysteresis band, still raised.
        assert rule.observe(DAY, self.linear(DAY, limit / (16 * DAY), 0.0)) == []
        (cleared,) = rule.observe(2 * DAY, self.linear(2 * DAY, limit / (30 * DAY), 0.0))
        assert cleared.state == "cleared" and cleared.value is None

    def test_non_finite_forecast_is_skipped(self) -> None:
        """A forecast with NaN in it changes nothing and raises no error."""
        rule = ForecastRule(channel="a", drift_limit=1.0, horizon_s=DAY)
        assert rule.observe(0.0, lambda t: (np.full_like(t, np.nan), np.zeros_like(t))) == []
        assert rule.observe(1.0, lambda t: (np.full_like(t, 2.0), np.zeros_like(t)))[0].value == 0

    def test_min_interval_skips_evaluation(self) -> None:
        """Within min_interval of the last evaluation the predictor is not called."""
        calls: list[float] = []

        def predict(times: FloatArray) -> tuple[FloatArray, FloatArray]:
            calls.append(float(times[0]))
            return np.zeros_like(times), np.zeros_like(times)

        rule = ForecastRule(channel="a", drift_limit=1.0, horizon_s=DAY, min_interval=600.0)
        for t in (0.0, 300.0, 600.0):
            rule.observe(t, predict)
        restored = AlertRule.from_state(json_round_trip(rule.to_state()))
        assert isinstance(restored, ForecastRule)
        for t in (900.0, 1300.0):
            restored.observe(t, predict)
        assert calls == [0.0, 600.0, 1300.0]


# --- AlertBook ------------------------------------------------------------------------------


def full_book() -> AlertBook:
    channel = "site1-no2"
    return AlertBook(
        channel,
        [
            DriftLimitRule(channel=channel, limit=15.0, dwell=1800.0),
            RateLimitRule(channel=channel, limit_per_s=0.8 / DAY, dwell=3600.0),
            ForecastRule(channel=channel, drift_limit=15.0, horizon_s=7 * DAY, min_interval=3600.0),
            ResidualChangeRule(channel=channel),
            CheckFailureRule(channel=channel, limit=2.0, consecutive=3, hard_limit=6.0),
            CorrectionCapRule(channel=channel, cap=18.0),
            ModelHealthRule(channel=channel, dwell=900.0),
        ],
    )


def scenario_inputs(seed: int, samples: int) -> list[tuple[float, dict[str, Any]]]:
    """A made-up sensor whose drift rises and falls, with a residual shift and bad checks."""
    rng = np.random.default_rng(seed)
    times = np.cumsum(rng.exponential(600.0, samples))
    inputs = []
    for i, t in enumerate(times):
        drift = 20.0 * math.sin(t / (20 * DAY)) + rng.normal(0, 0.3)
        rate = 20.0 / (20 * DAY) * math.cos(t / (20 * DAY))

        def forecast(grid: FloatArray, d: float = drift, r: float = rate, now: float = t) -> Any:
            return d + r * (grid - now), 0.5 + 1e-6 * (grid - now)

        z = rng.standard_normal() + (1.5 if 2000 <= i < 2300 else 0.0)
        item: dict[str, Any] = {"drift": drift, "rate_per_s": rate, "forecast": forecast,
                                "residual_z": z, "correction": -drift}  # fmt: skip
        if i % 144 == 0:
            item["check_error"] = rng.normal(0, 3.0)
        if 3000 <= i < 3100:
            item["problems"] = {"input_stale"}
        elif i % 10 == 0:
            item["problems"] = set()
        inputs.append((float(t), item))
    return inputs


def run_book(book: AlertBook, inputs: list[tuple[float, dict[str, Any]]]) -> list[AlertEvent]:
    events: list[AlertEvent] = []
    for t, item in inputs:
        events += book.observe(t, **item)
    return events


class TestAlertBook:
    def test_snapshot_mid_stream_gives_the_same_events(self) -> None:
        """Every rule, restored from a JSON snapshot mid-stream, emits what an unbroken run does."""
        inputs = scenario_inputs(seed=99, samples=4000)
        unbroken_book = full_book()
        uninterrupted = run_book(unbroken_book, inputs)
        assert {e.rule for e in uninterrupted} == set(RULE_NAMES)
        # Cuts inside a check run, a residual shift, the quiet spell after it, a health dwell.
        for cut in (300, 2150, 2360, 3050):
            book = full_book()
            before = run_book(book, inputs[:cut])
            restored = AlertBook.from_state(json_round_trip(book.to_state()))
            assert restored.active() == book.active()
            assert before + run_book(restored, inputs[cut:]) == uninterrupted
            assert restored.to_state() == unbroken_book.to_state()

    def test_active_and_clear_all(self) -> None:
        """active() lists raised rules; clear_all() clears them with the reason given."""
        book = AlertBook.for_limits("a", drift_limit=10.0, correction_cap=12.0)
        book.observe(0.0, drift=13.0, correction=-13.0, problems={"wind_up"})
        assert sorted(book.active()) == ["correction_cap", "drift_limit", "model_health"]
        events = book.clear_all(1.0, "sensor recalibrated")
        assert [e.rule for e in events] == ["drift_limit", "correction_cap", "model_health"]
        assert all(e.state == "cleared" for e in events) and book.active() == {}

    def test_inputs_for_disabled_rules_are_ignored(self) -> None:
        """A rate without a rate rule does nothing; None inputs are skipped."""
        book = AlertBook.for_limits("a", drift_limit=10.0)
        assert book.observe(0.0, rate_per_s=1.0, drift=None) == []

    def test_configuration_mistakes(self) -> None:
        """A horizon without a drift limit, duplicates and foreign rules are refused."""
        with pytest.raises(ConfigError, match="drift_limit"):
            AlertBook.for_limits("a", horizon_s=DAY)
        with pytest.raises(ConfigError, match="twice"):
            AlertBook("a", [ModelHealthRule(channel="a"), ModelHealthRule(channel="a")])
        with pytest.raises(ConfigError, match="belongs"):
            AlertBook("a", [ModelHealthRule(channel="b")])
        with pytest.raises(ConfigError, match="unknown rule"):
            AlertRule.from_state({"rule": "nope"})
