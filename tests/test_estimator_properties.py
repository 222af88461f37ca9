"""Property tests of the recursive estimator (hypothesis), over random bases, weights, gaps and
orders of magnitude.

Reference: the project's batch fit `zeroline.lsq.fit_least_squares` over the same rows with
weights w·2^(−age/half_life) (or the window's rows) plus the prior as pseudo-observations.
Data are drawn by hypothesis from seeded generators; nothing here comes from a product.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from unittest import mock

import numpy as np
import pytest
import scipy.linalg
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from zeroline import estimator_replay
from zeroline.estimator import PRIOR_TOP_UP, RecursiveEstimator, replay_batch
from zeroline.lsq import fit_least_squares

HOUR = 3600.0
NEGLIGIBLE = 2.0**-60  # rows weighted below this change a fit by < 1e-18 in all: left out

PROPERTY = settings(
    max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow], derandomize=True
)


@dataclass(frozen=True)
class Stream:
    """One random channel's rows and settings."""

    phi: np.ndarray
    y: np.ndarray
    w: np.ndarray
    t: np.ndarray
    memory: str
    span: float
    prior_sd: np.ndarray

    def __len__(self) -> int:
        return len(self.y)


@st.composite
def streams(draw: st.DrawFn) -> Stream:
    """A random channel: p terms with column magnitudes from 1e-4 to 1e4, weights (some 0),
    gaps from none to several half-lives, and a memory (half-life, window or none)."""
    p = draw(st.integers(1, 7))
    n = draw(st.integers(p + 2, 160))
    seed = draw(st.integers(0, 2**32 - 1))
    rng = np.random.default_rng(seed)
    magnitudes = 10.0 ** rng.uniform(-4, 4, p)
    phi = rng.standard_normal((n, p)) * magnitudes
    phi[:, 0] = magnitudes[0]  # a constant term, as most bases have
    theta = rng.standard_normal(p) / magnitudes
    noise = 10.0 ** draw(st.floats(-6, 0))
    y = phi @ theta + noise * rng.standard_normal(n)
    weights = rng.uniform(0.05, 5.0, n)
    weights[rng.random(n) < 0.15] = 0.0
    memory = draw(st.sampled_from(["half_life", "window", "none"]))
    span = 10.0 ** draw(st.floats(1, 6))  # half-life or window in seconds
    gaps = rng.exponential(span / 20.0, n)
    gaps[rng.random(n) < 0.1] = 0.0  # repeated times
    gaps[rng.random(n) < 0.03] *= 100.0  # outages of several half-lives
    times = 1e8 + np.cumsum(gaps)  # years after the epoch
    prior_sd = 10.0 ** draw(st.floats(1, 4)) / magnitudes
    return Stream(phi, y, weights, times, memory, span, prior_sd)


def make(stream: Stream) -> RecursiveEstimator:
    return RecursiveEstimator(
        stream.phi.shape[1],
        half_life=stream.span if stream.memory == "half_life" else None,
        window=stream.span if stream.memory == "window" else None,
        prior_sd=stream.prior_sd,
    )


def row_weights(stream: Stream, est: RecursiveEstimator, upto: int) -> np.ndarray:
    """The weight each row 0..upto carries at row `upto` in the batch equivalent."""
    w, t = stream.w[: upto + 1], stream.t[: upto + 1]
    if est.half_life is not None:
        return np.asarray(w * 2.0 ** (-(t[-1] - t) / est.half_life))
    if est.window is not None:
        return np.asarray(w * (t > t[-1] - est.window))
    return w


def batch(stream: Stream, est: RecursiveEstimator, upto: int) -> np.ndarray:
    """Batch weighted fit over rows 0..upto plus the prior rows at the estimator's weight.

    With no more usable rows than terms (the prior alone) `fit_least_squares` refuses, as a
    batch fit should; scipy's lstsq of the √weight-scaled rows stands in there.
    """
    p = est.n_terms
    weights = row_weights(stream, est, upto)
    keep = weights > NEGLIGIBLE
    design = np.vstack([stream.phi[: upto + 1][keep], np.eye(p)])
    target = np.concatenate([stream.y[: upto + 1][keep], est.prior_mean])
    all_weights = np.concatenate([weights[keep], est.prior_weight / est.prior_sd**2])
    if np.count_nonzero(all_weights) > p:
        return fit_least_squares(design, target, all_weights).coefficients
    root = np.sqrt(all_weights)
    return np.asarray(scipy.linalg.lstsq(design * root[:, None], target * root)[0])


def close(a: np.ndarray, b: np.ndarray, tolerance: float, phi: np.ndarray) -> bool:
    """Fitted values φᵀθ agree to `tolerance` relative to their size on these rows."""
    fitted_a, fitted_b = phi @ a, phi @ b
    return bool(
        np.max(np.abs(fitted_a - fitted_b)) <= tolerance * np.max(np.abs(fitted_b)) + 1e-300
    )


@PROPERTY
@given(streams())
def test_estimate_equals_batch_fit_at_every_row(stream: Stream) -> None:
    """After every row, the fitted values equal the batch fit's to 1e-8 relative."""
    est = make(stream)
    phi, y, w, t = stream.phi, stream.y, stream.w, stream.t
    for i in range(len(y)):
        est.update(phi[i], y[i], w[i], t[i])
        if i % 7 == 0 or i == len(y) - 1:
            assert close(est.coefficients, batch(stream, est, i), 1e-8, phi[: i + 1])


@PROPERTY
@given(streams())
def test_variance_never_exceeds_the_prior(stream: Stream) -> None:
    """Whatever the data and gaps, P ≤ diag(prior_sd²): every term's variance is bounded by its
    prior variance, and the prior's weight stays in [1, 1 + PRIOR_TOP_UP]."""
    est = make(stream)
    phi, y, w, t = stream.phi, stream.y, stream.w, stream.t
    for i in range(len(y)):
        est.update(phi[i], y[i], w[i], t[i])
        assert 1.0 - 1e-12 <= est.prior_weight <= 1.0 + PRIOR_TOP_UP + 1e-12
    bound = est.prior_sd**2 * (1 + 1e-9)
    assert np.all(np.diag(est.covariance) <= bound)
    assert np.all(np.isfinite(est.covariance))


@pytest.mark.parametrize("kernel", [True, False], ids=["kernel", "numpy"])
@PROPERTY
@given(stream=streams())
def test_replay_equals_per_sample(kernel: bool, stream: Stream) -> None:
    """replay_batch, by its compiled kernel and by its numpy path, gives the per-sample path's
    coefficients after every row (1e-9 in the fitted values) and the same final state."""
    slow, fast = make(stream), make(stream)
    phi, y, w, t = stream.phi, stream.y, stream.w, stream.t
    with mock.patch.object(estimator_replay, "USE_KERNEL", kernel):
        out = replay_batch(fast, phi, y, w, t)
    if kernel and stream.memory != "window":
        assert estimator_replay._kernel() is not None and not estimator_replay._kernel_failed
    for i in range(len(y)):
        slow.update(phi[i], y[i], w[i], t[i])
        assert close(out.coefficients[i], slow.coefficients, 1e-9, phi[: i + 1])
    assert close(fast.coefficients, slow.coefficients, 1e-9, phi)
    assert abs(fast.effective_n - slow.effective_n) <= 1e-9 * max(1.0, slow.effective_n)


@PROPERTY
@given(streams())
def test_state_round_trip_continues_identically(stream: Stream) -> None:
    """Saving half-way and restoring gives the same estimates for the second half."""
    est = make(stream)
    phi, y, w, t = stream.phi, stream.y, stream.w, stream.t
    half = len(y) // 2
    for i in range(half):
        est.update(phi[i], y[i], w[i], t[i])
    copy = RecursiveEstimator.from_state(json.loads(json.dumps(est.to_state())))
    for i in range(half, len(y)):
        est.update(phi[i], y[i], w[i], t[i])
        copy.update(phi[i], y[i], w[i], t[i])
    assert close(copy.coefficients, est.coefficients, 1e-10, phi)
