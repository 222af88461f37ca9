"""Tests of the recursive estimator against independent references.

References: the project's batch fit `zeroline.lsq.fit_least_squares` (pivoted Householder QR
with iterative refinement, itself checked against the NIST StRD certified values) over the
same rows with weights w·2^(−age/half_life) and the prior as pseudo-observations; and
statsmodels `RecursiveLS` (a Kalman-filter implementation of recursive least squares,
statsmodels 0.14+) for the recursive coefficients and recursive residuals without
forgetting. All data are invented here from seeded generators.
"""

from __future__ import annotations

import copy
import json
import math
from collections.abc import Callable

import numpy as np
import pytest
from statsmodels.regression.recursive_ls import RecursiveLS

from zeroline.errors import InputError
from zeroline.estimator import (
    PRIOR_TOP_UP,
    SEQUENTIAL_BELOW,
    RecursiveEstimator,
    dot,
    replay_batch,
    sequential_dot,
)
from zeroline.lsq import fit_least_squares

MINUTE, HOUR, DAY = 60.0, 3600.0, 86400.0
TEN_YEARS = 10 * 365.25 * DAY
NEGLIGIBLE = 2.0**-60  # rows weighted below this change a fit by < 1e-18 in all: left out


def batch_fit(
    phi: np.ndarray,
    y: np.ndarray,
    weights: np.ndarray,
    est: RecursiveEstimator,
) -> np.ndarray:
    """Coefficients of the batch weighted fit over `phi, y` plus the estimator's prior rows."""
    keep = weights > NEGLIGIBLE
    p = est.n_terms
    design = np.vstack([phi[keep], np.eye(p)])
    target = np.concatenate([y[keep], est.prior_mean])
    prior = est.prior_weight / est.prior_sd**2
    return fit_least_squares(design, target, np.concatenate([weights[keep], prior])).coefficients


def relative(a: np.ndarray, b: np.ndarray) -> float:
    """max |a − b| / max |b|: relative error of a vector (or of fitted values) as a whole."""
    return float(np.max(np.abs(np.asarray(a) - b)) / np.max(np.abs(b)))


def irregular_times(
    rng: np.random.Generator, n: int, mean_gap: float, start: float = 0.0
) -> np.ndarray:
    """Loggers sample irregularly: exponential gaps, some repeated times, a few long outages."""
    gaps = rng.exponential(mean_gap, n)
    gaps[rng.random(n) < 0.02] = 0.0
    gaps[rng.random(n) < 0.0005] *= 2000.0
    return start + np.cumsum(gaps)


def scaled_basis(t: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """A well-scaled basis: 1, daily sin/cos, a temperature-like input, a weekly ramp."""
    days = t / DAY
    temperature = np.sin(2 * np.pi * days + 1.0) + 0.3 * rng.standard_normal(len(t))
    return np.column_stack(
        [
            np.ones(len(t)),
            np.sin(2 * np.pi * days),
            np.cos(2 * np.pi * days),
            temperature,
            (days % 7.0) / 7.0,
        ]
    )


class TestEquivalenceWithBatchFit:
    def test_forgetting_equals_weighted_batch_fit_over_100k_updates(self) -> None:
        """At 20 checkpoints over 100,000 irregular, weighted updates with a 3-hour half-life,
        the coefficients equal the batch fit (weights w·2^(−age/h) + prior) to 1e-9."""
        rng = np.random.default_rng(1)
        n = 100_000
        t = irregular_times(rng, n, MINUTE)
        phi = scaled_basis(t, rng)
        y = phi @ [2.0, 0.3, -0.2, 0.05, 0.4] + 0.02 * rng.standard_normal(n)
        w = rng.uniform(0.1, 3.0, n)
        w[rng.random(n) < 0.05] = 0.0  # samples that do not teach the baseline
        est = RecursiveEstimator(5, half_life=3 * HOUR)
        checkpoints = set(np.linspace(n // 20, n, 20, dtype=int) - 1)
        worst = 0.0
        for i in range(n):
            est.update(phi[i], y[i], w[i], t[i])
            if i in checkpoints:
                decayed = w[: i + 1] * 2.0 ** (-(t[i] - t[: i + 1]) / (3 * HOUR))
                reference = batch_fit(phi[: i + 1], y[: i + 1], decayed, est)
                worst = max(worst, relative(est.coefficients, reference))
        assert worst < 1e-9

    def test_raw_time_quadratic_baseline_equals_batch_after_ten_years(self) -> None:
        """[1, t, t²] in raw seconds ten years after the epoch: coefficients are ill-determined
        in any method, but the fitted baseline equals the batch fit's to 1e-9."""
        rng = np.random.default_rng(2)
        n = 20_000
        t = irregular_times(rng, n, MINUTE, start=TEN_YEARS)
        phi = np.column_stack([np.ones(n), t, t * t])
        drift = 5.0 + 0.3 * (t - t[0]) / DAY + 0.01 * ((t - t[0]) / DAY) ** 2
        y = drift + 0.05 * rng.standard_normal(n)
        est = RecursiveEstimator(3, half_life=7 * DAY)
        worst = 0.0
        for i in range(n):
            est.update(phi[i], y[i], 1.0, t[i])
            if (i + 1) % 4000 == 0:
                decayed = 2.0 ** (-(t[i] - t[: i + 1]) / (7 * DAY))
                reference = batch_fit(phi[: i + 1], y[: i + 1], decayed, est)
                recent = phi[max(0, i - 1000) : i + 1]
                worst = max(worst, relative(recent @ est.coefficients, recent @ reference))
        assert worst < 1e-9

    def test_window_equals_batch_fit_on_the_window(self) -> None:
        """An exact 1-day window over 30,000 irregular weighted samples (several front
        rebuilds): at every checkpoint the fit equals the batch fit of the window's rows."""
        rng = np.random.default_rng(3)
        n = 30_000
        t = irregular_times(rng, n, 30.0)
        phi = scaled_basis(t, rng)
        y = phi @ [1.0, 0.5, 0.1, -0.3, 0.2] + 0.01 * rng.standard_normal(n)
        w = rng.uniform(0.5, 2.0, n)
        est = RecursiveEstimator(5, window=DAY)
        worst = 0.0
        for i in range(n):
            est.update(phi[i], y[i], w[i], t[i])
            if (i + 1) % 1500 == 0:
                inside = (t[: i + 1] > t[i] - DAY).astype(float)
                reference = batch_fit(phi[: i + 1], y[: i + 1], w[: i + 1] * inside, est)
                worst = max(worst, relative(est.coefficients, reference))
                assert est.effective_n == pytest.approx(float(np.count_nonzero(inside)))
        assert worst < 1e-9

    def test_residual_sd_equals_batch_residual_sd(self) -> None:
        """σ̂² = Σ w·2^(−age/h)·r² / (Σ 2^(−age/h) − p) at the batch coefficients."""
        rng = np.random.default_rng(4)
        n = 5000
        t = irregular_times(rng, n, MINUTE)
        phi = scaled_basis(t, rng)
        y = phi @ [1.0, 0.2, 0.2, 0.1, 0.0] + 0.03 * rng.standard_normal(n)
        w = rng.uniform(0.5, 1.5, n)
        est = RecursiveEstimator(5, half_life=HOUR * 12)
        for i in range(n):
            est.update(phi[i], y[i], w[i], t[i])
        decay = 2.0 ** (-(t[-1] - t) / (HOUR * 12))
        theta = batch_fit(phi, y, w * decay, est)
        rss = np.sum(w * decay * (y - phi @ theta) ** 2)
        expected = math.sqrt(rss / (np.sum(decay) - 5))
        assert est.residual_sd == pytest.approx(expected, rel=1e-9)
        assert est.effective_n == pytest.approx(np.sum(decay), rel=1e-12)
        assert est.information_count == pytest.approx(np.sum(w * decay), rel=1e-12)

    def test_hundreds_of_half_lives_equal_the_batch_fit(self) -> None:
        """Over 250 half-lives the pending forgetting g (F = g·G) is multiplied into the
        stored factor several times; after it the coefficients still equal the batch fit
        (weights 2^(−age/h) + prior) to 1e-9, and φᵀPφ equals the batch covariance's."""
        rng = np.random.default_rng(11)
        n, gap, half_life = 15_000, 10.0, 600.0
        t = np.arange(n) * gap
        phi = np.column_stack([np.ones(n), rng.standard_normal(n), np.sin(t / 900.0)])
        y = phi @ [4.0, -1.0, 0.5] + 0.01 * rng.standard_normal(n)
        est = RecursiveEstimator(3, half_life=half_life)
        for i in range(n):
            est.update(phi[i], y[i], 1.0, t[i])
        assert t[-1] / half_life > 3 * 64  # g fell below 2^-64 at least three times
        decayed = 2.0 ** (-(t[-1] - t) / half_life)
        reference = batch_fit(phi, y, decayed, est)
        assert relative(est.coefficients, reference) < 1e-9
        keep = decayed > NEGLIGIBLE
        information = (phi[keep].T * decayed[keep]) @ phi[keep] + np.diag(
            est.prior_weight / est.prior_sd**2
        )
        expected = float(phi[-1] @ np.linalg.solve(information, phi[-1]))
        assert est.variance(phi[-1]) == pytest.approx(expected, rel=1e-9)

    def test_cached_solution_follows_every_change(self) -> None:
        """θ is solved once per change of the factor: it follows every update (prior top-ups
        included: the batch fit agrees to 1e-10), a shift, a restore and a reset."""
        rng = np.random.default_rng(12)
        n = 3000
        t = np.arange(n) * MINUTE
        phi = np.column_stack([np.ones(n), rng.standard_normal(n)])
        y = phi @ [1.0, 2.0] + 0.01 * rng.standard_normal(n)
        est = RecursiveEstimator(2, half_life=6 * HOUR)
        for i in range(n):
            before = est.coefficients
            est.update(phi[i], y[i], 1.0, t[i])
            if i in (0, 1, 500, n - 1):
                assert not np.array_equal(est.coefficients, before)
        decayed = 2.0 ** (-(t[-1] - t) / (6 * HOUR))
        assert relative(est.coefficients, batch_fit(phi, y, decayed, est)) < 1e-10
        est.shift(0, 0.5)
        assert est.coefficients[0] == pytest.approx(1.5, abs=1e-3)
        assert est.predict([1.0, 0.0]) == pytest.approx(est.coefficients[0], rel=1e-14)
        copy = RecursiveEstimator.from_state(json.loads(json.dumps(est.to_state())))
        assert relative(copy.coefficients, est.coefficients) < 1e-14
        est.reset()  # back to the prior, whose mean the shift moved
        assert np.array_equal(est.coefficients, [0.5, 0.0])
        returned = est.coefficients
        returned[0] = 99.0  # a caller's array: changing it must not change the estimator
        assert est.coefficients[0] == 0.5


class TestAgainstStatsmodels:
    def test_recursive_coefficients_and_residuals_match_recursive_ls(self) -> None:
        """Without forgetting and with a vague prior (sd 1e7), the coefficients after every
        row from the 2p-th on match RecursiveLS's filtered states to 1e-7 relative, and the
        recursive residuals e⁻/√(1 + φᵀPφ) match `resid_recursive` to 1e-7 (absolute, on
        residuals of size ~1). statsmodels' diffuse start differs from our prior by
        ~(1e-7)²·(information): the tolerance covers that, not rounding."""
        rng = np.random.default_rng(5)
        n, p = 3000, 4
        phi = np.column_stack([np.ones(n), rng.standard_normal((n, p - 1))])
        y = phi @ [1.0, -2.0, 0.5, 3.0] + rng.standard_normal(n)
        est = RecursiveEstimator(p, prior_sd=1e7)
        coefficients = np.empty((n, p))
        recursive = np.empty(n)
        for i in range(n):
            innovation = est.update(phi[i], y[i])
            coefficients[i] = est.coefficients
            recursive[i] = innovation.residual / math.sqrt(1.0 + innovation.baseline_variance)
        result = RecursiveLS(y, phi).filter()
        states = np.asarray(result.recursive_coefficients.filtered).T
        first = 2 * p
        assert relative(coefficients[first:], states[first:]) < 1e-7
        theirs = np.asarray(result.resid_recursive)
        assert np.max(np.abs(recursive[first:] - theirs[first:])) < 1e-7


class TestWindUp:
    def test_month_without_excitation_keeps_variance_bounded_and_fit_correct(self) -> None:
        """A month of 1-min samples at λ = 0.99 per sample (half-life 69 min) in which the
        third term (a step that never happens) is always 0: its variance stays ≤ its prior
        variance, everything stays finite, and the other coefficients equal the batch fit.
        The textbook update P ← (P − kφᵀP)/λ on one day of the same rows winds up by
        0.99^−1440 ≈ 2e6 in that direction (the growth the issue measured)."""
        rng = np.random.default_rng(6)
        n = 30 * 24 * 60
        t = np.arange(n) * MINUTE
        days = t / DAY
        phi = np.column_stack([np.ones(n), np.sin(2 * np.pi * days), np.zeros(n)])
        y = 1.5 + 0.2 * phi[:, 1] + 0.01 * rng.standard_normal(n)
        decay = 0.99
        half_life = MINUTE * math.log(2) / -math.log(decay)
        est = RecursiveEstimator(3, half_life=half_life, prior_sd=100.0)
        unexcited = np.empty(n)
        for i in range(n):
            est.update(phi[i], y[i], 1.0, t[i])
            unexcited[i] = est.variance([0.0, 0.0, 1.0])
        assert np.all(np.isfinite(est.coefficients)) and np.all(np.isfinite(unexcited))
        assert np.max(unexcited) <= 100.0**2
        assert est.variance([0.0, 0.0, 1.0]) >= 100.0**2 / (1 + PRIOR_TOP_UP) * (1 - 1e-12)
        decayed = 2.0 ** (-(t[-1] - t) / half_life)
        reference = batch_fit(phi, y, decayed, est)
        assert relative(est.coefficients[:2], reference[:2]) < 1e-9
        assert est.coefficients[:2] == pytest.approx([1.5, 0.2], abs=1e-2)
        cov = np.eye(3) * 100.0**2
        for row in phi[:1440]:
            gain = cov @ row / (decay + row @ cov @ row)
            cov = (cov - np.outer(gain, row @ cov)) / decay
        assert cov[2, 2] > 1e6 * 100.0**2  # the textbook form has wound up

    def test_weeks_long_gap_is_sound(self) -> None:
        """Three weeks with no sample, then data again: bounded variance, finite state, and a
        fresh fit equal to the batch fit."""
        rng = np.random.default_rng(7)
        t = np.concatenate([np.arange(2000) * MINUTE, 21 * DAY + np.arange(2000) * MINUTE])
        phi = scaled_basis(t, rng)[:, :4]
        y = phi @ [1.0, 0.1, 0.1, 0.1] + 0.01 * rng.standard_normal(len(t))
        est = RecursiveEstimator(4, half_life=HOUR)
        for i in range(2000):
            est.update(phi[i], y[i], 1.0, t[i])
        est.update(phi[2000], y[2000], 0.0, t[2000])  # the clock jumps 3 weeks
        assert np.all(np.diag(est.covariance) <= est.prior_sd**2)
        assert est.effective_n < 1e-100
        for i in range(2000, len(t)):
            est.update(phi[i], y[i], 1.0, t[i])
        decayed = 2.0 ** (-(t[-1] - t) / HOUR)
        decayed[2000] = 0.0  # that row had weight 0
        assert relative(est.coefficients, batch_fit(phi, y, decayed, est)) < 1e-9

    def test_ten_years_after_the_epoch_loses_nothing(self) -> None:
        """The same rows ten years later give the same estimate (decay uses differences)."""
        rng = np.random.default_rng(8)
        t = irregular_times(rng, 3000, MINUTE)
        phi = scaled_basis(t, rng)
        y = phi @ [1.0, 0.1, 0.2, 0.3, 0.4] + 0.01 * rng.standard_normal(len(t))
        early, late = RecursiveEstimator(5, half_life=DAY), RecursiveEstimator(5, half_life=DAY)
        for i in range(len(t)):
            early.update(phi[i], y[i], 1.0, t[i])
            late.update(phi[i], y[i], 1.0, t[i] + TEN_YEARS)
        assert relative(late.coefficients, early.coefficients) < 1e-12
        assert late.variance(phi[-1]) == pytest.approx(early.variance(phi[-1]), rel=1e-12)


class TestReplay:
    @pytest.mark.usefixtures("replay_path")
    @pytest.mark.parametrize("half_life", [6 * HOUR, None])
    def test_fast_path_equals_per_sample_path(self, half_life: float | None) -> None:
        """replay_batch gives every row's coefficients, baseline, variance, σ̂ and innovation
        as the per-sample path does, within 1e-9 relative, and ends in the same state (both
        of its paths: the compiled kernel and the numpy blocks)."""
        rng = np.random.default_rng(9)
        n = 12_000
        t = irregular_times(rng, n, MINUTE)
        phi = scaled_basis(t, rng)
        y = phi @ [1.0, 0.5, -0.5, 0.2, 0.1] + 0.05 * rng.standard_normal(n)
        w = rng.uniform(0.0, 2.0, n)
        w[rng.random(n) < 0.1] = 0.0
        slow = RecursiveEstimator(5, half_life=half_life)
        fast = RecursiveEstimator(5, half_life=half_life)
        fast_out = replay_batch(fast, phi, y, w, t)
        coefficients, baseline, variance = np.empty((n, 5)), np.empty(n), np.empty(n)
        sd, residual = np.empty(n), np.empty(n)
        for i in range(n):
            residual[i] = slow.update(phi[i], y[i], w[i], t[i]).residual
            coefficients[i], baseline[i] = slow.coefficients, slow.predict(phi[i])
            variance[i], sd[i] = slow.variance(phi[i]), slow.residual_sd
        assert (
            np.max(
                np.abs(fast_out.coefficients - coefficients)
                / np.abs(coefficients).max(axis=1, keepdims=True)
            )
            < 1e-9
        )
        assert relative(fast_out.baseline, baseline) < 1e-9
        assert np.max(np.abs(fast_out.variance / variance - 1)) < 1e-9
        defined = np.isfinite(sd)
        assert np.array_equal(defined, np.isfinite(fast_out.residual_sd))
        assert np.max(np.abs(fast_out.residual_sd[defined] / sd[defined] - 1)) < 1e-9
        assert relative(fast_out.residual, residual) < 1e-9
        assert relative(fast.coefficients, slow.coefficients) < 1e-12
        assert fast.prior_weight == pytest.approx(slow.prior_weight, rel=1e-12)
        assert fast.effective_n == pytest.approx(slow.effective_n, rel=1e-12)

    def test_window_replay_equals_per_sample(self) -> None:
        """With a window the replay runs per sample: same results as calling update."""
        rng = np.random.default_rng(10)
        t = irregular_times(rng, 2000, MINUTE)
        phi = scaled_basis(t, rng)
        y = phi @ [1.0, 0.5, -0.5, 0.2, 0.1] + 0.05 * rng.standard_normal(len(t))
        fast, slow = RecursiveEstimator(5, window=6 * HOUR), RecursiveEstimator(5, window=6 * HOUR)
        out = replay_batch(fast, phi, y, None, t)
        for i in range(len(t)):
            slow.update(phi[i], y[i], 1.0, t[i])
        assert relative(out.coefficients[-1], slow.coefficients) == 0.0

    def test_replay_rejects_bad_arrays(self) -> None:
        """Shapes, NaN, negative weights and decreasing times are refused with a clear message."""
        est = RecursiveEstimator(2)
        phi, y = np.ones((3, 2)), np.ones(3)
        with pytest.raises(InputError, match="shape"):
            replay_batch(est, np.ones((3, 3)), y)
        with pytest.raises(InputError, match="finite"):
            replay_batch(est, phi, np.array([1.0, math.nan, 1.0]))
        with pytest.raises(InputError, match=">= 0"):
            replay_batch(est, phi, y, weights=[1.0, -1.0, 1.0])
        with pytest.raises(InputError, match="decrease"):
            replay_batch(est, phi, y, times=[0.0, 2.0, 1.0])


class TestInterface:
    def test_first_sample_is_usable_thanks_to_the_prior(self) -> None:
        """One sample already gives a finite estimate and bounded variance."""
        est = RecursiveEstimator(2, half_life=DAY)
        est.update([1.0, 0.5], 3.0, time=0.0)
        assert np.all(np.isfinite(est.coefficients))
        assert est.predict([1.0, 0.5]) == pytest.approx(3.0, rel=1e-6)
        assert math.isnan(est.residual_sd)  # not defined until more rows than terms

    def test_innovation_is_before_the_update(self) -> None:
        """The returned residual is y minus the prediction of the estimate before learning."""
        rng = np.random.default_rng(11)
        est = RecursiveEstimator(2)
        for i in range(50):
            est.update([1.0, i / 50], 1.0 + i / 50 + 0.01 * rng.standard_normal())
        before = est.predict([1.0, 1.0])
        innovation = est.update([1.0, 1.0], 5.0)
        assert innovation.prediction == pytest.approx(before, rel=1e-12)
        assert innovation.residual == pytest.approx(5.0 - before, rel=1e-12)
        expected = innovation.residual / math.sqrt(innovation.variance)
        assert innovation.standardised == pytest.approx(expected)
        assert innovation.standardised > 50  # a gross outlier against σ̂ ≈ 0.01

    def test_state_round_trip_is_compact_and_exact(self) -> None:
        """to_state → JSON → from_state continues exactly; about 1 KB at p = 6."""
        rng = np.random.default_rng(12)
        est = RecursiveEstimator(6, half_life=DAY, column_scale=[1, 2, 4, 8, 16, 32])
        phi = rng.standard_normal((500, 6))
        y = phi @ np.arange(6.0) + 0.1 * rng.standard_normal(500)
        for i in range(400):
            est.update(phi[i], y[i], 1.0, i * MINUTE)
        text = json.dumps(est.to_state())
        assert len(text) < 1200
        copy = RecursiveEstimator.from_state(json.loads(text))
        for i in range(400, 500):
            a = est.update(phi[i], y[i], 1.0, i * MINUTE)
            b = copy.update(phi[i], y[i], 1.0, i * MINUTE)
            assert a == b
        assert np.array_equal(est.coefficients, copy.coefficients)

    def test_window_state_round_trip(self) -> None:
        """A window's state holds its rows and restores the same fit."""
        rng = np.random.default_rng(13)
        est = RecursiveEstimator(3, window=HOUR)
        for i in range(300):
            est.update(rng.standard_normal(3), rng.standard_normal(), 1.0, i * MINUTE)
        copy = RecursiveEstimator.from_state(json.loads(json.dumps(est.to_state())))
        assert relative(copy.coefficients, est.coefficients) < 1e-12
        assert copy.effective_n == est.effective_n == 60

    def test_bad_state_is_refused(self) -> None:
        """A dict that is not a saved state gives InputError, not a traceback."""
        with pytest.raises(InputError, match="not a saved estimator state"):
            RecursiveEstimator.from_state({"version": 1})
        state = RecursiveEstimator(2).to_state()
        state["version"] = 99
        with pytest.raises(InputError, match="version"):
            RecursiveEstimator.from_state(state)

    def test_reset_returns_to_the_prior(self) -> None:
        """After reset() the estimate is the prior mean and the variance the prior's."""
        est = RecursiveEstimator(2, half_life=DAY, prior_mean=[1.0, 2.0], prior_sd=[10.0, 5.0])
        for i in range(100):
            est.update([1.0, i / 100], 7.0, 1.0, i * MINUTE)
        est.reset()
        assert est.coefficients == pytest.approx([1.0, 2.0])
        assert est.variance([1.0, 0.0]) == pytest.approx(100.0)
        assert est.effective_n == 0.0

    def test_shift_moves_one_coefficient_only(self) -> None:
        """shift(term, δ) adds δ to that coefficient and keeps the others and P."""
        rng = np.random.default_rng(14)
        est = RecursiveEstimator(3, half_life=DAY)
        for i in range(300):
            phi = [1.0, rng.standard_normal(), rng.standard_normal()]
            est.update(phi, 2 + phi[1] - phi[2] + 0.01 * rng.standard_normal(), 1.0, i * MINUTE)
        before, cov = est.coefficients, est.covariance
        est.shift(0, -2.0)
        assert est.coefficients == pytest.approx(before - [2.0, 0.0, 0.0], abs=1e-12)
        assert np.allclose(est.covariance, cov, rtol=1e-12, atol=0)

    def test_condition_number_flags_colliding_terms(self) -> None:
        """Two proportional columns give a huge condition number; independent ones a small."""
        rng = np.random.default_rng(15)
        good, bad = RecursiveEstimator(2), RecursiveEstimator(2)
        for _ in range(200):
            x = rng.standard_normal()
            good.update([1.0, x], x)
            bad.update([x, 2 * x], x)
        assert good.condition_number() < 10
        assert bad.condition_number() > 1e4

    @pytest.mark.parametrize(
        ("call", "message"),
        [
            (lambda e: e.update([1.0], 1.0), "phi must hold 2"),
            (lambda e: e.update([1.0, math.nan], 1.0), "finite"),
            (lambda e: e.update([1.0, 1.0], math.inf), "y must be"),
            (lambda e: e.update([1.0, 1.0], 1.0, weight=-1.0), "weight"),
            (
                lambda e: (e.update([1.0, 1.0], 1.0, time=10.0), e.update([1, 1], 1, time=5.0)),
                "before the last update",
            ),
        ],
    )
    def test_bad_input_gives_one_clear_error(
        self, call: Callable[[RecursiveEstimator], object], message: str
    ) -> None:
        """Each user mistake raises InputError saying what is wrong."""
        with pytest.raises(InputError, match=message):
            call(RecursiveEstimator(2, half_life=DAY))

    def test_bad_settings_are_refused(self) -> None:
        """Both memories, non-positive half-life, wrong prior length: InputError."""
        with pytest.raises(InputError, match="either half_life or window"):
            RecursiveEstimator(2, half_life=1.0, window=1.0)
        with pytest.raises(InputError, match="half_life"):
            RecursiveEstimator(2, half_life=0.0)
        with pytest.raises(InputError, match="prior_sd"):
            RecursiveEstimator(2, prior_sd=[1.0, 2.0, 3.0])
        with pytest.raises(InputError, match="n_terms"):
            RecursiveEstimator(0)


class TestSpread:
    """`spread` (two triangular solves) against P formed explicitly from the factor."""

    @pytest.mark.parametrize("column_scale", [None, [1.0, 2.0**10, 3.0]])
    def test_spread_equals_the_explicit_covariance(self, column_scale: list[float] | None) -> None:
        """φᵀPφ and P·φ to 1e-12 relative, with forgetting pending (g ≠ 1) and settled."""
        rng = np.random.default_rng(5)
        est = RecursiveEstimator(3, half_life=2 * DAY, column_scale=column_scale)
        for k in range(500):
            t = k * 10 * MINUTE
            est.update([1.0, t / DAY, math.sin(t / DAY)], 1.0 + rng.normal(0, 0.1), time=t)
        phi = np.array([1.0, 3.2, -0.4])
        for pending in (True, False):
            assert (est._g != 1.0) == pending  # forgetting not yet multiplied in, then settled
            covariance = copy.deepcopy(est).covariance  # reading P settles the copy only
            quadratic, solved = est.spread(phi)
            np.testing.assert_allclose(solved, covariance @ phi, rtol=1e-12)
            assert quadratic == pytest.approx(float(phi @ covariance @ phi), rel=1e-12)
            assert quadratic == pytest.approx(est.variance(phi), rel=1e-12)
            est.settle()

    def test_settle_changes_no_result(self) -> None:
        """Multiplying the pending forgetting in is a uniform scaling: θ, σ̂ and φᵀPφ stay."""
        est = RecursiveEstimator(2, half_life=DAY)
        for k in range(100):
            est.update([1.0, k / 100], 2.0 + 0.01 * (k % 7), time=k * HOUR)
        phi = np.array([1.0, 0.5])
        before = (est.coefficients, est.residual_sd, est.spread(phi)[0])
        est.settle()
        np.testing.assert_allclose(est.coefficients, before[0], rtol=1e-14)
        assert est.residual_sd == pytest.approx(before[1], rel=1e-14)
        assert est.spread(phi)[0] == pytest.approx(before[2], rel=1e-14)
        theta, sd = est.solution()
        np.testing.assert_array_equal(theta, est.coefficients)
        assert sd == est.residual_sd


def test_rezero_of_a_window_equals_learning_the_shifted_targets() -> None:
    """shift() on a sliding window rebuilds it from its rows: they must be intact after the
    window's suffix sweep (LAPACK overwrites what it absorbs), mid-block included."""
    rng = np.random.default_rng(5)
    window, delta = 100 * 60.0, 0.75
    shifted = RecursiveEstimator(3, window=window, prior_mean=[0.0, 0.0, 0.0])
    reference = RecursiveEstimator(3, window=window, prior_mean=[delta, 0.0, 0.0])
    rows = []
    for i in range(450):  # several flips of the two stacks, the head mid-block at the end
        t = 60.0 * i
        phi = np.array([1.0, math.sin(t / 3000.0), rng.normal()])
        y = 2.0 + 0.5 * phi[1] - 0.2 * phi[2] + rng.normal(0.0, 0.1)
        rows.append((t, phi, y))
        shifted.update(phi, y, 1.0, t)
    for t, phi, y in rows:
        reference.update(phi, y + delta, 1.0, t)
    shifted.shift(0, delta)
    assert np.allclose(shifted.coefficients, reference.coefficients, rtol=1e-9, atol=1e-12)
    for i in range(450, 600):  # and the window keeps sliding correctly afterwards
        t = 60.0 * i
        phi = np.array([1.0, math.sin(t / 3000.0), rng.normal()])
        y = 2.0 + 0.5 * phi[1] - 0.2 * phi[2] + rng.normal(0.0, 0.1)
        shifted.update(phi, y + delta, 1.0, t)
        reference.update(phi, y + delta, 1.0, t)
    assert np.allclose(shifted.coefficients, reference.coefficients, rtol=1e-9, atol=1e-12)


@pytest.mark.parametrize("n", range(1, SEQUENTIAL_BELOW + 4))
def test_dot_and_the_sequential_sum_are_accurate_dot_products(n: int) -> None:
    """BLAS ddot (`dot`) and, below SEQUENTIAL_BELOW numbers, the left-to-right Python sum
    (`sequential_dot`) that the per-sample path uses where it used `ndarray.dot` are within
    the classical bound of a floating-point dot product, |error| <= γ_n·Σ|xᵢyᵢ| with
    γ_n = n·u/(1 − n·u) and u the unit roundoff (Higham, Accuracy and Stability of Numerical
    Algorithms, 2nd ed., §3.1; from memory), against the exactly rounded sum of the exact
    products (fractions). Not bit-equality with numpy's dot: the order in which a BLAS adds
    a short vector is its own choice and differs between CPUs."""
    from fractions import Fraction

    unit = 2.0**-53
    gamma = (n + 1) * unit / (1 - (n + 1) * unit)  # n + 1: the products are rounded too
    rng = np.random.default_rng(n)
    for _ in range(500):
        x = rng.standard_normal(n) * 10.0 ** rng.uniform(-30, 30, n)
        y = rng.standard_normal(n) * 10.0 ** rng.uniform(-30, 30, n)
        x[rng.random(n) < 0.15] = 0.0
        exact = float(sum(Fraction(a) * Fraction(b) for a, b in zip(x, y, strict=True)))
        bound = gamma * float(np.abs(x * y).sum()) + 1e-300
        assert abs(dot(x, y) - exact) <= bound
        assert abs(float(x.dot(y)) - exact) <= bound
        if n < SEQUENTIAL_BELOW:
            assert abs(sequential_dot(x.tolist(), y.tolist()) - exact) <= bound


def test_the_shared_scratch_row_is_each_threads_own() -> None:
    """Estimators of one size share the scratch row LAPACK absorbs into their factor (each
    refills it before use), but per thread: estimators updated in two threads never
    write into the same array, and the row has the layout dtpqrt needs."""
    import threading

    from zeroline.estimator import _scratch_row

    here = _scratch_row(4)
    there: list[tuple[np.ndarray, np.ndarray]] = []
    thread = threading.Thread(target=lambda: there.append(_scratch_row(4)))
    thread.start()
    thread.join()
    assert _scratch_row(4)[0] is here[0]  # one per thread and size, made once
    assert not np.shares_memory(here[0], there[0][0])
    row, row_x = here
    assert row.shape == (1, 5) and row.flags.f_contiguous and np.shares_memory(row, row_x)
    assert row_x.shape == (4,) and row_x.flags.c_contiguous
