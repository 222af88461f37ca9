"""`replay_batch` (`zeroline.estimator_replay`) against the per-sample path, on both of its
paths: the compiled kernel (`zeroline.estimator_kernel`) and the numpy block recursion.

Reference: n calls of `RecursiveEstimator.update` on the same rows (the square-root
information form, itself checked against batch least squares in test_estimator.py). Every
test compares all six per-row results and the end state. Tolerance 1e-9 relative, as for the
replay's contract. Measured when set, numpy path: worst 3.0e-11 (the raw-time basis's
coefficients, whose t² term is ~1e-10 of the largest) and 1.9e-12 (its variance), at most
4e-13 elsewhere. Kernel: worst 3.3e-10, the coefficients of the second row with the column
scale 1e±4, where the prior still dominates most terms and the per-sample path is itself
3.3e-10 from the exact solution of that row's weighted least-squares problem (solved in
rational arithmetic; the kernel 4e-13 from it); 4.0e-11 and 1.7e-12 on the raw-time basis,
at most 4e-13 elsewhere. All data are invented here from seeded generators.
"""

from __future__ import annotations

import logging
import math
import subprocess
import sys
from dataclasses import dataclass
from pathlib import Path
from types import SimpleNamespace
from typing import Any

import numpy as np
import pytest

import zeroline.estimator_replay as replay
from zeroline.errors import InputError
from zeroline.estimator import (
    RecursiveEstimator,
    pack_estimators,
    replay_batch,
    unpack_estimators,
)

MINUTE, HOUR, DAY = 60.0, 3600.0, 86400.0
TOLERANCE = 1e-9


@dataclass
class Rows:
    phi: np.ndarray
    y: np.ndarray
    weights: np.ndarray
    times: np.ndarray


def random_rows(n: int, gap: float, seed: int, *, zero_weights: bool = True) -> Rows:
    """A constant and five standard-normal inputs, irregular gaps, weights in [0, 2)."""
    rng = np.random.default_rng(seed)
    times = np.cumsum(rng.uniform(0.5 * gap, 1.5 * gap, n))
    phi = np.column_stack([np.ones(n), rng.standard_normal((n, 5))])
    y = phi @ np.linspace(1.0, 2.0, 6) + 0.05 * rng.standard_normal(n)
    weights = rng.uniform(0.0, 2.0, n)
    if zero_weights:
        weights[rng.random(n) < 0.1] = 0.0
    return Rows(phi, y, weights, times)


def raw_time_rows(n: int, seed: int) -> Rows:
    """An ill-scaled drift basis in raw seconds: 1, t, t²/1e7, daily sin/cos (1-min samples)."""
    rng = np.random.default_rng(seed)
    times = np.cumsum(rng.uniform(30.0, 90.0, n))
    days = times / DAY
    phi = np.column_stack(
        [np.ones(n), times, times**2 / 1e7, np.sin(2 * np.pi * days), np.cos(2 * np.pi * days)]
    )
    y = phi @ [3.0, 1e-7, 1e-9, 0.3, 0.1] + 0.05 * rng.standard_normal(n)
    return Rows(phi, y, np.ones(n), times)


def assert_replay_equals_updates(rows: Rows, **settings: object) -> None:
    """replay_batch and n calls of update agree on every row's results and the end state."""
    n, p = rows.phi.shape
    fast = RecursiveEstimator(p, **settings)  # type: ignore[arg-type]
    slow = RecursiveEstimator(p, **settings)  # type: ignore[arg-type]
    out = replay_batch(fast, rows.phi, rows.y, rows.weights, rows.times)
    coefficients, baseline, variance = np.empty((n, p)), np.empty(n), np.empty(n)
    sd, prediction, residual = np.empty(n), np.empty(n), np.empty(n)
    for i in range(n):
        innovation = slow.update(rows.phi[i], rows.y[i], rows.weights[i], rows.times[i])
        prediction[i], residual[i] = innovation.prediction, innovation.residual
        coefficients[i], baseline[i] = slow.coefficients, slow.predict(rows.phi[i])
        variance[i], sd[i] = slow.variance(rows.phi[i]), slow.residual_sd

    def relative(a: np.ndarray, b: np.ndarray) -> float:
        return float(np.max(np.abs(a - b)) / np.max(np.abs(b)))

    # Coefficients row by row, relative to that row's largest (a term can be ~0 on its own;
    # a row of exact zeros, a zero-weight first row under a zero prior mean, stays zero).
    row_scale = np.maximum(np.abs(coefficients).max(axis=1, keepdims=True), 1e-300)
    assert np.max(np.abs(out.coefficients - coefficients) / row_scale) < TOLERANCE
    assert relative(out.baseline, baseline) < TOLERANCE
    assert relative(out.prediction, prediction) < TOLERANCE
    assert relative(out.residual, residual) < TOLERANCE
    assert np.max(np.abs(out.variance / variance - 1.0)) < TOLERANCE
    defined = np.isfinite(sd)
    assert np.array_equal(defined, np.isfinite(out.residual_sd))
    assert np.max(np.abs(out.residual_sd[defined] / sd[defined] - 1.0)) < TOLERANCE
    assert relative(fast.coefficients, slow.coefficients) < TOLERANCE
    assert fast.variance(rows.phi[-1]) == pytest.approx(slow.variance(rows.phi[-1]), rel=1e-9)
    assert fast.residual_sd == pytest.approx(slow.residual_sd, rel=1e-9)
    assert fast.prior_weight == pytest.approx(slow.prior_weight, rel=1e-12)
    assert fast.effective_n == pytest.approx(slow.effective_n, rel=1e-12)
    assert fast.information_count == pytest.approx(slow.information_count, rel=1e-12)
    assert fast.time == slow.time
    assert relative(fast.information_matrix(), slow.information_matrix()) < TOLERANCE
    # ... and the two go on alike: one more row, 1 s after the last
    after = (rows.phi[-1], rows.y[-1] + 1.0, 1.0, rows.times[-1] + 1.0)
    fast_next, slow_next = fast.update(*after), slow.update(*after)
    assert fast_next.residual == pytest.approx(slow_next.residual, rel=TOLERANCE, abs=1e-12)
    assert relative(fast.coefficients, slow.coefficients) < TOLERANCE


@pytest.mark.usefixtures("replay_path")
class TestLongRuns:
    def test_week_half_life_one_minute_samples(self) -> None:
        """60,000 rows (6 weeks) at a 7-day half-life: chunks of two half-lives, blocks of
        32 rows, the prior topped up inside blocks about every 14.6 h."""
        assert_replay_equals_updates(random_rows(60_000, MINUTE, seed=1), half_life=7 * DAY)

    def test_no_forgetting(self) -> None:
        """70,000 rows without forgetting: full chunks, the information keeps growing."""
        assert_replay_equals_updates(random_rows(70_000, MINUTE, seed=2))

    def test_short_half_life(self) -> None:
        """A 3-hour half-life at 1-min samples: short chunks, blocks of one row or a few."""
        assert_replay_equals_updates(random_rows(20_000, MINUTE, seed=3), half_life=3 * HOUR)

    def test_raw_time_terms_are_ill_scaled(self) -> None:
        """Raw-second time terms (t up to 4e6 s, t²/1e7 up to 1.6e6) with forgetting."""
        assert_replay_equals_updates(raw_time_rows(50_000, seed=4), half_life=3 * DAY)

    def test_column_scale(self) -> None:
        """With a column scale the replay works in the same internal units as update."""
        rows = random_rows(30_000, MINUTE, seed=5)
        rows.phi[:, 1] *= 1e4
        rows.phi[:, 2] *= 1e-4
        assert_replay_equals_updates(
            rows, half_life=2 * DAY, column_scale=[1.0, 1e4, 1e-4, 1.0, 1.0, 1.0]
        )

    def test_unit_weights(self) -> None:
        """All weights 1 (the common case) and a prior mean away from zero."""
        rows = random_rows(40_000, MINUTE, seed=6, zero_weights=False)
        rows.weights[:] = 1.0
        assert_replay_equals_updates(rows, half_life=5 * DAY, prior_mean=[1.0, 0, 0, 0, 0, 2.0])

    def test_outage_repeated_times_and_unlearnt_rows(self) -> None:
        """A 40-day outage (20 half-lives, longer than any chunk), 100 rows at one time and
        1,500 rows of weight 0 in a row."""
        rows = random_rows(30_000, MINUTE, seed=11)
        rows.times[15_000:] += 40 * DAY
        rows.times[5_000:5_100] = rows.times[5_000]
        rows.weights[8_000:9_500] = 0.0
        assert_replay_equals_updates(rows, half_life=2 * DAY)

    def test_twelve_terms(self) -> None:
        """p = 12: a constant and eleven standard-normal inputs."""
        rng = np.random.default_rng(13)
        n = 20_000
        times = np.cumsum(rng.uniform(30.0, 90.0, n))
        phi = np.column_stack([np.ones(n), rng.standard_normal((n, 11))])
        y = phi @ np.arange(12.0) + 0.1 * rng.standard_normal(n)
        assert_replay_equals_updates(
            Rows(phi, y, rng.uniform(0.0, 2.0, n), times), half_life=3 * DAY
        )

    def test_regular_samples(self) -> None:
        """Exactly 1 min apart (the kernel then multiplies the forgetting on row by row,
        computing it afresh every 64 rows) for 60,000 rows at a 2-day half-life."""
        rows = random_rows(60_000, MINUTE, seed=20)
        rows.times = MINUTE * np.arange(60_000.0)
        assert_replay_equals_updates(rows, half_life=2 * DAY)

    def test_gap_of_hundreds_of_half_lives(self) -> None:
        """A gap of 200 half-lives: the forgetting g falls below 2⁻⁶⁴ and is multiplied into
        the factor, then the prior is topped up at the same row."""
        rows = random_rows(6_000, MINUTE, seed=12)
        rows.times[3_000:] += 200 * HOUR
        assert_replay_equals_updates(rows, half_life=HOUR)


class TestBlocks:
    """The numpy block path's own edges (the kernel has no blocks)."""

    @pytest.fixture(autouse=True)
    def _numpy_path(self, monkeypatch: pytest.MonkeyPatch) -> None:
        monkeypatch.setattr(replay, "USE_KERNEL", False)

    def test_several_top_ups_inside_one_block(self, monkeypatch: pytest.MonkeyPatch) -> None:
        """With few blocks per chunk, a block of 32 rows holds two or three top-ups (every
        ~12 rows at 10-min samples and a 1-day half-life): each restarts exactly."""
        monkeypatch.setattr(replay, "_BLOCKS", 2)
        assert_replay_equals_updates(random_rows(6_000, 10 * MINUTE, seed=7), half_life=DAY)

    def test_top_up_on_a_block_boundary(self, monkeypatch: pytest.MonkeyPatch) -> None:
        """Regular 1-min samples and blocks of 29 rows, so some top-ups fall on a block's
        first row (they join its start state) and others inside it."""
        monkeypatch.setattr(replay, "_BLOCK_ROWS", 29)
        rows = random_rows(40_000, MINUTE, seed=8)
        rows.times = MINUTE * np.arange(40_000.0)
        assert_replay_equals_updates(rows, half_life=2 * DAY)


class TestContinuing:
    @pytest.mark.usefixtures("replay_path")
    def test_replay_continues_an_estimator(self) -> None:
        """A replay after per-sample updates (and a second replay after it) continues
        exactly where the estimator stood."""
        rows = random_rows(30_000, MINUTE, seed=9)
        fast = RecursiveEstimator(6, half_life=4 * DAY)
        slow = RecursiveEstimator(6, half_life=4 * DAY)
        for i in range(500):
            for est in (fast, slow):
                est.update(rows.phi[i], rows.y[i], rows.weights[i], rows.times[i])
        replay_batch(fast, rows.phi[500:20_000], rows.y[500:20_000], None, rows.times[500:20_000])
        out = replay_batch(
            fast, rows.phi[20_000:], rows.y[20_000:], rows.weights[20_000:], rows.times[20_000:]
        )
        for i in range(500, 30_000):
            weight = 1.0 if i < 20_000 else rows.weights[i]
            slow.update(rows.phi[i], rows.y[i], weight, rows.times[i])
        last = slow.coefficients
        assert np.max(np.abs(out.coefficients[-1] - last)) / np.max(np.abs(last)) < TOLERANCE
        assert fast.residual_sd == pytest.approx(slow.residual_sd, rel=1e-9)

    @pytest.mark.usefixtures("replay_path")
    def test_replay_continues_a_restored_estimator(self) -> None:
        """An estimator restored from the packed snapshot rows (views into shared arrays,
        the forgetting g kept apart) replays as the one it was packed from updates."""
        rows = random_rows(8_000, MINUTE, seed=14)
        slow = RecursiveEstimator(6, half_life=DAY, column_scale=[1.0, 2.0, 4.0, 1.0, 1.0, 8.0])
        for i in range(3_000):
            slow.update(rows.phi[i], rows.y[i], rows.weights[i], rows.times[i])
        block, sides = pack_estimators([slow])
        (fast,) = unpack_estimators(slow.blank_copy(), block, sides)
        out = replay_batch(
            fast, rows.phi[3_000:], rows.y[3_000:], rows.weights[3_000:], rows.times[3_000:]
        )
        for i in range(3_000, 8_000):
            slow.update(rows.phi[i], rows.y[i], rows.weights[i], rows.times[i])
        last = slow.coefficients
        assert np.max(np.abs(out.coefficients[-1] - last)) / np.max(np.abs(last)) < TOLERANCE
        assert fast.residual_sd == pytest.approx(slow.residual_sd, rel=1e-9)
        assert fast.effective_n == pytest.approx(slow.effective_n, rel=1e-12)


@pytest.mark.usefixtures("replay_path")
class TestRefusals:
    """Bad rows anywhere are refused with one clear error before anything is learnt (the
    kernel checks them as it goes, on copies of the state)."""

    @pytest.mark.parametrize(
        ("array", "row", "value", "message"),
        [
            ("phi", 700, math.nan, "phi must be finite"),
            ("phi", 1, math.inf, "phi must be finite"),
            ("y", 2_999, -math.inf, "y must be finite"),
            ("weights", 1_500, -0.5, "weights must be >= 0"),
            ("weights", 10, math.nan, "weights must be finite"),
            ("times", 2_000, 0.0, "times must not decrease"),
            ("times", 0, 0.0, "nor start before the last update"),
        ],
    )
    def test_bad_row_changes_nothing(
        self, array: str, row: int, value: float, message: str
    ) -> None:
        rows = random_rows(4_000, MINUTE, seed=19)
        est = RecursiveEstimator(6, half_life=DAY)
        for i in range(1_000):
            est.update(rows.phi[i], rows.y[i], rows.weights[i], rows.times[i])
        before = pack_estimators([est])[0]
        bad = Rows(
            *(getattr(rows, name)[1_000:].copy() for name in ("phi", "y", "weights", "times"))
        )
        target = getattr(bad, array)
        if array == "phi":
            target[row, 3] = value
        else:
            target[row] = value
        with pytest.raises(InputError, match=message):
            replay_batch(est, bad.phi, bad.y, bad.weights, bad.times)
        assert np.array_equal(pack_estimators([est])[0], before, equal_nan=True)

    def test_fresh_estimator_with_a_bad_first_time_learns_nothing(self) -> None:
        est = RecursiveEstimator(2, half_life=DAY)
        with pytest.raises(InputError, match="times must be finite"):
            replay_batch(est, np.ones((3, 2)), np.ones(3), None, [math.nan, 1.0, 2.0])
        assert est.time is None and est.effective_n == 0.0


class TestKernelFallback:
    """The compiled kernel is optional at run time: without it the numpy path replays."""

    @pytest.fixture
    def fresh_loader(self, monkeypatch: pytest.MonkeyPatch) -> None:
        """The kernel loader as in a new process (not yet tried)."""
        monkeypatch.setattr(replay, "_kernel_module", None)
        monkeypatch.setattr(replay, "_kernel_failed", False)

    @pytest.mark.usefixtures("fresh_loader")
    def test_without_numba_the_numpy_path_replays_with_one_warning(
        self, monkeypatch: pytest.MonkeyPatch, caplog: pytest.LogCaptureFixture
    ) -> None:
        """An import failure is logged once (one line) and the replay still equals updates."""
        monkeypatch.setitem(sys.modules, "numba", None)  # as if not installed
        monkeypatch.delitem(sys.modules, "zeroline.estimator_kernel", raising=False)
        with caplog.at_level(logging.WARNING, logger=replay.__name__):
            assert_replay_equals_updates(random_rows(3_000, MINUTE, seed=15), half_life=DAY)
            assert_replay_equals_updates(random_rows(3_000, MINUTE, seed=16), half_life=DAY)
        warnings = [r.getMessage() for r in caplog.records]
        assert len(warnings) == 1 and "\n" not in warnings[0]
        assert "compiled kernel unavailable (ModuleNotFoundError" in warnings[0]
        assert "numpy block path (install zeroline[replay] for it: numba)" in warnings[0]

    @pytest.mark.usefixtures("fresh_loader")
    def test_a_kernel_that_fails_to_compile_leaves_the_estimator_to_the_numpy_path(
        self, monkeypatch: pytest.MonkeyPatch, caplog: pytest.LogCaptureFixture
    ) -> None:
        """A failure when the kernel is called (numba compiles on the first call for each p)
        happens before any row: the numpy path then replays from the untouched estimator."""
        from zeroline import estimator_kernel

        def broken(*_: Any) -> None:
            raise RuntimeError("no LLVM today")

        fake = SimpleNamespace(**vars(estimator_kernel))
        fake.replay_rows = broken
        monkeypatch.setattr(replay, "_kernel_module", fake)
        with caplog.at_level(logging.WARNING, logger=replay.__name__):
            assert_replay_equals_updates(random_rows(3_000, MINUTE, seed=17), half_life=DAY)
        assert "compiled kernel unavailable (RuntimeError: no LLVM today)" in caplog.text
        assert replay._kernel() is None  # not tried again in this process

    def test_rows_too_large_for_the_per_sample_path_are_refused_on_both_paths(
        self, replay_path: str, monkeypatch: pytest.MonkeyPatch
    ) -> None:
        """φ of 1e160 after a first row of 1 overflows the kernel's squared diagonal; its
        non-finite end state is discarded and the numpy path refuses the rows as `update`
        does."""
        answers: list[bool] = []
        compiled = replay._replay_compiled

        def spy(*args: Any) -> bool:
            answers.append(compiled(*args))
            return answers[-1]

        monkeypatch.setattr(replay, "_replay_compiled", spy)
        rng = np.random.default_rng(18)
        phi = np.column_stack([np.ones(200), 1e160 * rng.standard_normal(200)])
        phi[0, 1] = 1.0  # the first row (the per-sample path's) is fine
        est = RecursiveEstimator(2, half_life=DAY)
        with pytest.raises(InputError, match="not above 1e150"), np.errstate(over="ignore"):
            replay_batch(est, phi, np.ones(200), None, MINUTE * np.arange(200.0))
        assert answers == ([False] if replay_path == "kernel" else [])


def test_the_daemon_does_not_import_numba() -> None:
    """numba is imported by a replay only: the service's import stays as light as before."""
    code = "import sys, zeroline.service, zeroline.estimator; print('numba' in sys.modules)"
    daemon = Path(__file__).resolve().parent.parent / "daemon"
    result = subprocess.run(
        [sys.executable, "-c", code],
        capture_output=True,
        text=True,
        check=True,
        env={"PYTHONPATH": str(daemon), "PATH": ""},
    )
    assert result.stdout.strip() == "False"


@pytest.mark.usefixtures("replay_path")
def test_strided_and_fortran_ordered_input() -> None:
    """Columns of a wider table (strided y, weights, times) and a Fortran-ordered φ replay
    as contiguous copies of them do."""
    rows = random_rows(5_000, MINUTE, seed=21)
    table = np.column_stack([rows.y, rows.weights, rows.times, rows.phi])
    phi = np.asfortranarray(rows.phi)
    strided = replay_batch(
        RecursiveEstimator(6, half_life=DAY), phi, table[:, 0], table[:, 1], table[:, 2]
    )
    plain = replay_batch(
        RecursiveEstimator(6, half_life=DAY), rows.phi, rows.y, rows.weights, rows.times
    )
    assert np.array_equal(strided.coefficients, plain.coefficients)
    assert np.array_equal(strided.residual_sd, plain.residual_sd, equal_nan=True)
