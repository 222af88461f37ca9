"""Replay fast path: learn recorded rows as `RecursiveEstimator.update` would, vectorised.

`replay_batch(estimator, phi, y, weights, times)` gives every row's coefficients, baseline,
variance, σ̂ and innovation, equal to n calls of `update` (within rounding), and leaves the
estimator in the state those calls would.

Approach
--------
Rows are processed in chunks. In the coordinates u = R₀(θ − θ₀) of a chunk's exact starting
factor R₀ the start state is the identity, so the normal equations of every row inside the
chunk, *preconditioned by R₀*, are well conditioned as long as the chunk is short enough
(≤ 1 half-life, bounded added information; condition ≤ 2·(2 + _CHUNK_TRACE)). Each row's
estimate then comes from prefix sums over the chunk (one cumulative sum per quantity) and a
batched Cholesky solve over packed triangles. The state at the chunk's end is recomputed
exactly by one structured QR (`dtpqrt`) of all the chunk's rows under the decayed starting
factor, so rounding never accumulates from chunk to chunk.

Cost per row (p = 6, bench/RESULTS.md): about 30 cumulative sums (~4 ns per element each:
numpy's accumulate runs the summed axis innermost whatever the layout, and blocked sums by
products with a triangle of ones measured only 15 % faster) and the batched Cholesky with its
solves (reciprocal diagonals, so a column costs one division and the rest are products) make
up about two thirds; chunks of 8,000–16,000 rows are fastest (smaller ones pay Python's
per-call cost, larger ones fall out of the 2 MB L2 cache: measured), so chunks longer than a
half-life would not gain anything.

An exact window replays per sample (its rows leave one by one; no vectorised form is exact),
and so does the very first row (it sets the clock) and any run too short to vectorise.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike
from scipy.linalg import lapack

from zeroline.errors import InputError
from zeroline.estimator import PRIOR_TOP_UP, FloatArray, RecursiveEstimator, _absorb

_CHUNK_ROWS = 16384  # most rows in one vectorised chunk
_CHUNK_MIN = 16  # below this a chunk is not worth it; use the per-sample path
_CHUNK_TRACE = 16.0  # most information a chunk may add, relative to its start


@dataclass(frozen=True, slots=True)
class ReplayResult:
    """Per-row results of `replay_batch`, each after that row was learnt.

    `coefficients` (n, p) in the user's units, `baseline` φᵢᵀθᵢ, `variance` φᵢᵀPᵢφᵢ,
    `residual_sd` σ̂ᵢ; `prediction` and `residual` are the innovation before the row.
    """

    coefficients: FloatArray
    baseline: FloatArray
    variance: FloatArray
    residual_sd: FloatArray
    prediction: FloatArray
    residual: FloatArray


def replay_batch(
    estimator: RecursiveEstimator,
    phi: ArrayLike,
    y: ArrayLike,
    weights: ArrayLike | None = None,
    times: ArrayLike | None = None,
) -> ReplayResult:
    """Learn rows phi (n, p), y (n) with fixed weights at times (n), as n calls of `update`.

    The estimator ends in the same state as after the per-sample calls and the returned
    per-row arrays equal theirs (measured ≤ 5e-12 relative on well-conditioned bases). With
    forgetting or none the work is vectorised in chunks; an exact window replays per sample.
    `coefficients` is column-major (each term's series contiguous; index it as usual).

    >>> import numpy as np
    >>> t = 60.0 * np.arange(1000)
    >>> phi = np.column_stack([np.ones(1000), t / 86400.0])
    >>> est = RecursiveEstimator(2, half_life=86400.0)
    >>> out = replay_batch(est, phi, 2.0 + 0.5 * t / 86400.0, None, t)
    >>> [round(float(c), 6) for c in out.coefficients[-1]]
    [2.0, 0.5]
    """
    p = estimator.n_terms
    phi_array, y_array, weight_array, time_array = _validated_rows(
        estimator, phi, y, weights, times
    )
    n = len(y_array)
    # Coefficients column-major: each term's series is contiguous, as the chunks write it.
    out = ReplayResult(
        np.empty((p, n)).T, np.empty(n), np.empty(n), np.empty(n), np.empty(n), np.empty(n)
    )
    # Internal units; without a column scale φ itself (a division would be a pass per row).
    x = phi_array if estimator.column_scale is None else phi_array / estimator._scale
    start = 0
    while start < n:
        if estimator.window is not None or estimator._time is None:
            stop = n if estimator.window is not None else start + 1
            _replay_per_sample(
                estimator, phi_array, y_array, weight_array, time_array, start, stop, out
            )
            start = stop
            continue
        chunk = _plan_chunk(estimator, x, weight_array, time_array, start)
        if chunk.stop - chunk.start < _CHUNK_MIN:
            stop = min(n, start + _CHUNK_MIN)
            _replay_per_sample(
                estimator, phi_array, y_array, weight_array, time_array, start, stop, out
            )
        else:
            stop = chunk.stop
            _replay_chunk(estimator, x, y_array, weight_array, chunk, time_array, out)
        start = stop
    return out


def _validated_rows(
    est: RecursiveEstimator,
    phi: ArrayLike,
    y: ArrayLike,
    weights: ArrayLike | None,
    times: ArrayLike | None,
) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray]:
    phi_array = np.asarray(phi, dtype=float)
    y_array = np.asarray(y, dtype=float)
    n = len(y_array)
    if y_array.shape != (n,) or phi_array.shape != (n, est.n_terms):
        raise InputError(
            f"replay needs phi of shape (n, {est.n_terms}) and y of shape (n,), "
            f"got {phi_array.shape} and {y_array.shape}"
        )
    weight_array = np.ones(n) if weights is None else np.asarray(weights, dtype=float)
    last = 0.0 if est.time is None else est.time
    time_array = np.full(n, last) if times is None else np.asarray(times, dtype=float)
    if weight_array.shape != (n,) or time_array.shape != (n,):
        raise InputError(f"replay needs weights and times of shape ({n},)")
    for name, array in (
        ("phi", phi_array),
        ("y", y_array),
        ("weights", weight_array),
        ("times", time_array),
    ):
        if not np.all(np.isfinite(array)):
            raise InputError(f"replay {name} must be finite numbers (found NaN or infinity)")
    if np.any(weight_array < 0):
        raise InputError("replay weights must be >= 0")
    if n and (
        np.any(np.diff(time_array) < 0) or (est.time is not None and time_array[0] < est.time)
    ):
        raise InputError("replay times must not decrease (nor start before the last update)")
    return phi_array, y_array, weight_array, time_array


def _replay_per_sample(
    est: RecursiveEstimator,
    phi: FloatArray,
    y: FloatArray,
    weights: FloatArray,
    times: FloatArray,
    start: int,
    stop: int,
    out: ReplayResult,
) -> None:
    for i in range(start, stop):
        innovation = est.update(phi[i], y[i], weights[i], times[i])
        out.coefficients[i] = est.coefficients
        out.baseline[i] = phi[i] @ out.coefficients[i]
        out.variance[i] = est.variance(phi[i])
        out.residual_sd[i] = est.residual_sd
        out.prediction[i] = innovation.prediction
        out.residual[i] = innovation.residual


def _decay(est: RecursiveEstimator, times: FloatArray) -> FloatArray:
    """2^(−(t − t_start)/h) for the rows of a chunk (ones without forgetting)."""
    assert est._time is not None
    if est.half_life is None:
        return np.ones(len(times))
    return np.asarray(np.exp2(-(times - est._time) / est.half_life))


@dataclass(frozen=True, slots=True)
class _Chunk:
    """Rows start..stop−1 of a replay and what their planning already computed."""

    start: int
    stop: int
    alpha: FloatArray  # decay 2^(−(t − t₀)/h) from the chunk's start state
    psi: FloatArray  # ψ = R₀⁻ᵀφ, shape (p, m), R₀ the start state's factor
    inverse: FloatArray  # R₀⁻¹


def _plan_chunk(
    est: RecursiveEstimator, x: FloatArray, weights: FloatArray, times: FloatArray, start: int
) -> _Chunk:
    """The longest run of rows from `start` that keeps the chunk's equations well conditioned.

    In u = R₀(θ − θ₀) the start state is the identity; a chunk may span at most one half-life
    (decay ≥ 1/2) and add information of trace at most _CHUNK_TRACE, so the condition number
    of every row's matrix stays below 2·(2 + _CHUNK_TRACE).
    """
    assert est._time is not None
    stop = min(len(times), start + _CHUNK_ROWS)
    if est.half_life is not None:
        stop = start + int(np.searchsorted(times[start:stop], est._time + est.half_life, "right"))
    p = est.n_terms
    alpha = _decay(est, times[start:stop])
    est._settle()  # G = F, so ψ = R₀⁻ᵀφ
    # ψ by a product with R₀⁻¹, in rows of m (the layout every later step runs along):
    # OpenBLAS's triangular solve with thousands of right-hand sides of size p measured
    # ~35 ns per row against ~5 ns for the product, and the replay's results and end state
    # agreed with the solve's to the last digits on raw-time [1, t, t²] and on columns
    # scaled 1e-4..1e4 (measured).
    inverse = lapack.dtrtri(est._factor[:p, :p])[0]
    psi = inverse.T @ x[start:stop].T
    added = np.cumsum(weights[start:stop] / alpha * np.einsum("im,im->m", psi, psi))
    rows = int(np.searchsorted(added, _CHUNK_TRACE, "right"))
    return _Chunk(start, start + rows, alpha[:rows], psi[:, :rows], inverse)


def _first_top_up(times: FloatArray, low: int, ref_time: float, threshold: float) -> int:
    """First index ≥ low with times[i] − ref_time > threshold (len if none), `_advance`'s test.

    The test is monotone in i (times do not decrease), so a binary search finds it; the
    two loops settle rounding at the boundary, so the answer is exactly `_advance`'s.
    """
    index = low + int(np.searchsorted(times[low:], ref_time + threshold, "right"))
    while index > low and times[index - 1] - ref_time > threshold:
        index -= 1
    while index < len(times) and not times[index] - ref_time > threshold:
        index += 1
    return index


def _prior_schedule(
    est: RecursiveEstimator, times: FloatArray, alpha: FloatArray
) -> tuple[FloatArray, list[int], list[float], float, float | None]:
    """Prior weight a after each row, and the top-ups as `_advance` does them.

    Returns a, the rows r of the top-ups and δ_r/α_r (δ the weight each adds; then
    a = α·(a₀ + Σ_{r ≤ i} δ_r/α_r)), and the reference weight and time at the end.
    """
    weight = np.empty(len(times))
    tops: list[int] = []
    amounts: list[float] = []
    ref_weight, ref_time = est._prior_ref_weight, est._prior_ref_time
    start_time = est._time  # α is measured from here
    assert ref_time is not None and start_time is not None
    index = 0
    while index < len(times):
        top_up = _first_top_up(times, index, ref_time, est._top_up_threshold(ref_weight))
        if est.half_life is not None:  # a·2^(−(t − t_ref)/h) = a·2^(−(t₀ − t_ref)/h)·α
            at_start = ref_weight * 2.0 ** (-(start_time - ref_time) / est.half_life)
            np.multiply(alpha[index:top_up], at_start, out=weight[index:top_up])
        else:
            weight[index:top_up] = ref_weight
        if top_up == len(times):
            break
        assert est.half_life is not None
        current = ref_weight * 2.0 ** (-(times[top_up] - ref_time) / est.half_life)
        tops.append(top_up)
        amounts.append((1.0 + PRIOR_TOP_UP - current) / alpha[top_up])
        ref_weight, ref_time = 1.0 + PRIOR_TOP_UP, float(times[top_up])
        weight[top_up] = ref_weight
        index = top_up + 1
    return weight, tops, amounts, ref_weight, ref_time


def _packed(row: int, column: int) -> int:
    """Position of the lower-triangle entry (row ≥ column) in row-major packed order."""
    return row * (row + 1) // 2 + column


def _packed_indices(p: int) -> tuple[FloatArray, FloatArray]:
    """Row and column of each lower-triangle entry, in row-major packed order."""
    pairs = [(row, column) for row in range(p) for column in range(row + 1)]
    return np.array([r for r, _ in pairs]), np.array([c for _, c in pairs])


def _replay_chunk(
    est: RecursiveEstimator,
    x: FloatArray,
    y: FloatArray,
    weights: FloatArray,
    chunk: _Chunk,
    times: FloatArray,
    out: ReplayResult,
) -> None:
    """A chunk's rows at once, in coordinates u = R₀(θ − θ₀) of the chunk's start state.

    With d = w/α, e = y − φᵀθ₀, L = Λ R₀⁻¹ the prior rows and r their residual at θ₀, the
    normal equations of row i, divided by αᵢ, are

        (I + Cᵢ·LᵀL + Σⱼ≤ᵢ dⱼψⱼψⱼᵀ) uᵢ = Cᵢ·Lᵀr + Σⱼ≤ᵢ dⱼψⱼeⱼ

    (Cᵢ = Σ_{r ≤ i} δ_r/α_r over the prior's top-ups) and the minimum of the objective is
    αᵢ·(ρ₀² + Cᵢ·‖r‖² + Σ dⱼeⱼ² − bᵢᵀuᵢ). Every prefix sum is one cumulative sum over a row
    of `sums`: the start values (I, ρ₀², counts) and the top-ups are added to their rows'
    entries before it, so no prefix needs a pass of its own.
    """
    p = est.n_terms
    start, stop, alpha, psi = chunk.start, chunk.stop, chunk.alpha, chunk.psi
    m = stop - start
    rows, w, t, target = x[start:stop], weights[start:stop], times[start:stop], y[start:stop]
    prior, tops, amounts, ref_weight, ref_time = _prior_schedule(est, t, alpha)
    factor = est._factor
    x0 = est._solution()  # θ₀ (internal units)
    fitted = rows @ x0
    e = target - fitted
    d = w / alpha
    prior_root, prior_center = est._prior_root, est._prior_center
    inverse = chunk.inverse
    lift = prior_root[:, None] * inverse  # L = Λ R₀⁻¹
    prior_rhs = prior_root * (prior_center - x0)
    # Rows of `sums`: the packed lower triangle of each row's matrix, then the pairs
    # (bₖ, ψₖ) for the solve, then Σ d e², the count and the information.
    n_matrix = p * (p + 1) // 2
    sums = np.empty((n_matrix + 2 * p + 3, m))
    weighted = psi * d
    for i in range(p):  # row i of the packed triangle, dᵢψᵢψ[:i+1], in one product
        begin = _packed(i, 0)
        np.multiply(weighted[i], psi[: i + 1], out=sums[begin : begin + i + 1])
        sums[_packed(i, i), 0] += 1.0  # the start state's I
    rhs = sums[n_matrix : n_matrix + 2 * p].reshape(p, 2, m)
    np.multiply(weighted, e, out=rhs[:, 0])
    rhs[:, 1] = psi
    total, count, information = sums[n_matrix + 2 * p :]
    np.multiply(d, e * e, out=total)
    np.divide(w > 0, alpha, out=count)
    information[:] = d
    total[0] += factor[p, p] ** 2
    count[0] += est._count
    information[0] += est._information
    if tops:
        below, right = _packed_indices(p)
        gram = (lift.T @ lift)[below, right]  # LᵀL, packed
        refills = np.asarray(amounts)
        sums[:n_matrix, tops] += np.outer(gram, refills)
        rhs[:, 0, tops] += np.outer(lift.T @ prior_rhs, refills)
        total[tops] += refills * float(prior_rhs @ prior_rhs)
    np.cumsum(sums[:n_matrix], axis=1, out=sums[:n_matrix])
    np.cumsum(rhs[:, 0], axis=1, out=rhs[:, 0])
    np.cumsum(sums[n_matrix + 2 * p :], axis=1, out=sums[n_matrix + 2 * p :])
    quadratic = _solve_packed_in_place(sums[:n_matrix], rhs, p)  # bᵀM⁻¹b, ψᵀM⁻¹ψ
    variance = np.divide(quadratic[1], alpha, out=out.variance[start:stop])  # φᵀPφ = ψᵀM̃⁻¹ψ
    objective = alpha * (total - quadratic[0])
    u = rhs[:, 0]
    # θ = θ₀ + R₀⁻¹u in the (p, m) layout of u, one matrix product; the offset from the
    # prior mean is x0 − μ plus it, so the penalty needs no pass of its own for θ₀.
    step = inverse @ u
    offset = step + (x0 - prior_center)[:, None]
    step += x0[:, None]
    if est.column_scale is not None:
        step /= est._scale[:, None]
    out.coefficients[start:stop].T[...] = step  # contiguous rows: (n, p) is column-major
    offset *= prior_root[:, None]
    penalty = np.einsum("im,im->m", offset, offset)  # ‖Λ(θ − μ)‖²
    rss = np.maximum(objective - prior * penalty, 0.0)
    count *= alpha
    sd = out.residual_sd[start:stop]
    with np.errstate(invalid="ignore", divide="ignore"):
        np.sqrt(rss / (count - p), out=sd)
    sd[count <= p] = math.nan
    baseline = out.baseline[start:stop]
    np.einsum("im,im->m", psi, u, out=baseline)  # φᵀθ = φᵀθ₀ + ψᵀu
    baseline += fitted
    before = out.residual[start:stop]
    np.subtract(target, baseline, out=before)
    before /= 1.0 - w * variance  # e⁻ = e⁺ / (1 − w·φᵀPφ)
    np.subtract(target, before, out=out.prediction[start:stop])
    # Exact state at the chunk's end: the start factor, decayed, absorbs every row (and the
    # prior's top-ups) in one structured QR.
    end = alpha[-1]
    stacked = np.empty((m + (p if tops else 0), p + 1), order="F")
    scale = np.sqrt(end * d)
    np.multiply(rows.T, scale, out=stacked[:m, :p].T)  # in the order of the output
    np.multiply(target, scale, out=stacked[:m, p])
    if tops:
        stacked[m:] = math.sqrt(end * float(np.sum(amounts))) * est._prior_rows
    top = np.asfortranarray(math.sqrt(end) * factor)
    est._time = float(t[-1])  # first: the factor is set as the one at the current time
    est._factor = _absorb(top, stacked)
    est._prior_ref_weight, est._prior_ref_time = ref_weight, ref_time
    est._count, est._information = float(count[-1]), float(end * information[-1])


def _solve_packed_in_place(matrix: FloatArray, rhs: FloatArray, p: int) -> FloatArray:
    """For a batch of SPD M given by its packed lower triangle (p(p+1)/2, m) and rhs (p, 2, m)
    holding [b, ψ]: overwrite rhs[:, 0] with M⁻¹b and return (bᵀM⁻¹b, ψᵀM⁻¹ψ), shape (2, m).

    Cholesky M = LLᵀ entry by entry, each operation vectorised over the batch (numpy's
    batched solve calls LAPACK once per matrix, measured ~5× slower at p = 6). In row-major
    packed order each row's L[i, :j] is one contiguous block, so every inner product of the
    factorisation and of the forward solve is one einsum. M is destroyed.
    """
    m = matrix.shape[1]
    dot = np.empty((2, m))
    scratch = np.empty((p, m))

    def row(i: int, stop: int) -> FloatArray:  # L[i, :stop]
        begin = _packed(i, 0)
        return matrix[begin : begin + stop]

    reciprocal = np.empty((p, m))  # 1/L[j, j]: one division per column, products after
    for i in range(p):  # L[i, j] = (M[i, j] − L[i, :j]·L[j, :j]) / L[j, j]
        for j in range(i + 1):
            entry = matrix[_packed(i, j)]
            if j:
                np.einsum("km,km->m", row(i, j), row(j, j), out=dot[0])
                np.subtract(entry, dot[0], out=entry)
            if j == i:
                np.sqrt(entry, out=entry)
                np.divide(1.0, entry, out=reciprocal[i])
            else:
                np.multiply(entry, reciprocal[j], out=entry)
    for j in range(p):  # L Y = [b, ψ]
        if j:
            np.einsum("km,kcm->cm", row(j, j), rhs[:j], out=dot)
            np.subtract(rhs[j], dot, out=rhs[j])
        np.multiply(rhs[j], reciprocal[j], out=rhs[j])
    quadratic = np.einsum("ikm,ikm->km", rhs, rhs)  # ‖L⁻¹b‖² = bᵀM⁻¹b, and for ψ
    solution = rhs[:, 0]
    for i in range(p - 1, -1, -1):  # Lᵀ u = y, for b only, row by row of L
        np.multiply(solution[i], reciprocal[i], out=solution[i])
        if i:
            np.multiply(row(i, i), solution[i], out=scratch[:i])
            np.subtract(solution[:i], scratch[:i], out=solution[:i])
    return np.asarray(quadratic)


__all__: Sequence[str] = ["ReplayResult", "replay_batch"]
