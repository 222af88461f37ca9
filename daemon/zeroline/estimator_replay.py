"""Replay fast path: learn recorded rows as `RecursiveEstimator.update` would, fast.

`replay_batch(estimator, phi, y, weights, times)` gives every row's coefficients, baseline,
variance, σ̂ and innovation, equal to n calls of `update` (within rounding), and leaves the
estimator in the state those calls would.

Approach
--------
Two paths, chosen once per call:

1. **The compiled kernel** (`zeroline.estimator_kernel`, numba), used whenever it loads: the
   per-sample recursion itself, row by row in machine code (the same forgetting, prior
   top-ups, weights, square-root information factor and residual tracking; its module
   docstring has the details). numba is imported on the first replay, never by the daemon;
   the kernel is compiled once per install and number of terms (numba's disk cache). Measured
   ~100–125 ns per row at p = 6, 4–6× the numpy path below in the same rounds
   (bench/RESULTS.md): numpy's per-call overhead, not the arithmetic, held that path back.
   It checks the rows as it goes and runs on copies of the state; the estimator takes the
   end state over only if every row was valid and the state is finite.
2. **The numpy block path** (the rest of this module), when numba is missing or the kernel
   fails to load or compile (logged once, one line) or `USE_KERNEL` is False; the tests run
   both paths against the per-sample path.

The numpy block path processes rows in chunks. In the coordinates u = R₀(θ − θ₀) of a chunk's
exact starting factor R₀ the start state is the identity, so the normal equations of every
row inside the chunk, *preconditioned by R₀*, are well conditioned as long as the chunk is
short enough (≤ 2 half-lives and added information of trace ≤ _CHUNK_TRACE: every row's
matrix then lies between I and (1 + 4.25 + 32)·I, condition below 40). A chunk's rows are cut
into ~630 blocks of up to 32 rows. Every block starts from its exact state, solved from
prefix sums of the blocks before it (one small sum per block, one batched Cholesky for all
starts), and then runs the covariance recursion (k = Pψ, P ← P − c·k·kᵀ) over its few rows,
all blocks side by side in each numpy call; a prior top-up inside a block restarts it from
its exact state. The state at the chunk's end is recomputed exactly by one structured QR
(`dtpqrt`) of all the chunk's rows under the starting factor, so rounding never accumulates
from chunk to chunk, nor from block to block.

Cost per row of the numpy path (p = 6, 1e6 rows, bench/RESULTS.md; shares from a profile on
a loaded machine): the recursion about 30 % (its Pψ and P update are 36 products each, which
numpy does at ~0.4–0.9 ns), the block starts 18 %, the per-row results 16 %, planning 9 %,
the end QR with its stacked rows 8 %, input checks 5 %. ~630 blocks per chunk balance numpy's
per-call cost (~0.3 µs per ufunc, ~1.5 µs per einsum, paid per step for all blocks at once)
against the start states (paid per block); chunks over ~32k rows measured no faster.

An exact window replays per sample on either path (its rows leave one by one; no vectorised
form is exact). On the numpy path so do the very first row (it sets the clock) and any run
too short to vectorise.
"""

from __future__ import annotations

import importlib
import logging
import math
from collections.abc import Sequence
from dataclasses import dataclass
from types import ModuleType

import numpy as np
from numpy.typing import ArrayLike

from zeroline.errors import InputError
from zeroline.estimator import PRIOR_TOP_UP, FloatArray, RecursiveEstimator, _absorb
from zeroline.fortran import lapack

#: Replay with the compiled kernel (`estimator_kernel`, numba) when it loads; False runs the
#: numpy block path below (the tests run both against the per-sample path).
USE_KERNEL = True
_LOG = logging.getLogger(__name__)
_kernel_module: ModuleType | None = None
_kernel_failed = False

_CHUNK_ROWS = 32768  # most rows in one vectorised chunk
_CHUNK_HALF_LIVES = 2.0  # longest span of a chunk, in half-lives
_CHUNK_MIN = 16  # below this a chunk is not worth it; use the per-sample path
_CHUNK_TRACE = 32.0  # most information a chunk may add, relative to its start
_BLOCK_ROWS = 32  # most rows per block of the short recursion inside a chunk
_BLOCKS = 630  # blocks a chunk is cut into (each numpy call of a step runs along them)


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
    per-row arrays equal theirs (measured ≤ 4e-13 relative on well-conditioned bases, 4e-11
    on raw-second time terms, 3.3e-10 on an early, prior-dominated row where the per-sample
    path itself is that far from the exact solution; tests/test_estimator_replay.py). With
    forgetting or none the compiled kernel (or, without numba, the numpy block path) runs
    the rows; an exact window replays per sample.
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
    rows = _shaped_rows(estimator, phi, y, weights, times)
    n = len(rows[1])
    # Coefficients column-major: each term's series is contiguous, as the chunks write it.
    out = ReplayResult(
        np.empty((p, n)).T, np.empty(n), np.empty(n), np.empty(n), np.empty(n), np.empty(n)
    )
    kernel = _kernel() if USE_KERNEL and estimator.window is None and n else None
    # The kernel checks the values as it goes, on copies of the state: if it refuses a row
    # the estimator is as it was, and `_check_values` below says what is wrong.
    if kernel is not None and _replay_compiled(kernel, estimator, *rows, out):
        return out
    _check_values(estimator, *rows)
    _replay_blocks(estimator, *rows, 0, out)
    return out


def _replay_blocks(
    estimator: RecursiveEstimator,
    phi: FloatArray,
    y: FloatArray,
    weights: FloatArray,
    times: FloatArray,
    start: int,
    out: ReplayResult,
) -> None:
    """Rows start.. by the numpy block recursion (per sample where it cannot vectorise)."""
    n = len(y)
    # Internal units; without a column scale φ itself (a division would be a pass per row).
    x = phi if estimator.column_scale is None else phi / estimator._scale
    while start < n:
        if estimator.window is not None or estimator._time is None:
            stop = n if estimator.window is not None else start + 1
            _replay_per_sample(estimator, phi, y, weights, times, start, stop, out)
            start = stop
            continue
        chunk = _plan_chunk(estimator, x, weights, times, start)
        if chunk.stop - chunk.start < _CHUNK_MIN:
            stop = min(n, start + _CHUNK_MIN)
            _replay_per_sample(estimator, phi, y, weights, times, start, stop, out)
        else:
            stop = chunk.stop
            prepared = _prepare_chunk(estimator, x, y, weights, chunk, times)
            _finish_chunk(estimator, y, prepared, out)
        start = stop


def _shaped_rows(
    est: RecursiveEstimator,
    phi: ArrayLike,
    y: ArrayLike,
    weights: ArrayLike | None,
    times: ArrayLike | None,
) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray]:
    """The rows as float arrays of the right shapes (weights 1 and the last time if None)."""
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
    return phi_array, y_array, weight_array, time_array


def _check_values(
    est: RecursiveEstimator,
    phi: FloatArray,
    y: FloatArray,
    weights: FloatArray,
    times: FloatArray,
) -> None:
    """InputError unless every number is finite, weights >= 0 and times do not decrease."""
    for name, array in (("phi", phi), ("y", y), ("weights", weights), ("times", times)):
        if not np.all(np.isfinite(array)):
            raise InputError(f"replay {name} must be finite numbers (found NaN or infinity)")
    if np.any(weights < 0):
        raise InputError("replay weights must be >= 0")
    if len(times) and (
        np.any(np.diff(times) < 0) or (est.time is not None and times[0] < est.time)
    ):
        raise InputError("replay times must not decrease (nor start before the last update)")


def _kernel() -> ModuleType | None:
    """The compiled kernel's module, imported on first use; None (logged once) if numba is
    missing or fails to load."""
    global _kernel_module, _kernel_failed
    if _kernel_module is None and not _kernel_failed:
        try:
            _kernel_module = importlib.import_module("zeroline.estimator_kernel")
        except Exception as error:  # numba missing, or its own failure to initialise
            missing = isinstance(error, ModuleNotFoundError) and error.name == "numba"
            _disable_kernel(error, "install zeroline[replay] for it: numba" if missing else "")
    return _kernel_module


def _disable_kernel(error: Exception, hint: str = "") -> None:
    global _kernel_module, _kernel_failed
    _kernel_module, _kernel_failed = None, True
    _LOG.warning(
        "replay: compiled kernel unavailable (%s: %s); using the numpy block path%s",
        type(error).__name__,
        error,
        f" ({hint})" if hint else "",
    )


def _replay_compiled(
    kernel: ModuleType,
    est: RecursiveEstimator,
    phi: FloatArray,
    y: FloatArray,
    weights: FloatArray,
    times: FloatArray,
    out: ReplayResult,
) -> bool:
    """All rows by the compiled kernel; False, the estimator untouched, if it could not.

    The kernel works on copies of the state, which are taken over only if it accepted every
    row and its end state is finite (an overflow, for inputs the per-sample path would
    refuse as too large, leaves the rows to the numpy path as before the kernel existed).
    """
    clock, theta = _kernel_clock(kernel, est, float(times[0]))
    factor = np.array(est._f, order="F")
    # Contiguous arrays only (no copy if they are): numba compiles once per memory layout.
    contiguous = np.ascontiguousarray
    try:
        refused = kernel.replay_rows(
            (0,) * est.n_terms,  # its length is the number of terms the kernel unrolls for
            factor,
            contiguous(phi),
            contiguous(y),
            contiguous(weights),
            contiguous(times),
            est._scale,
            est.column_scale is not None,
            contiguous(est._prior_rows),
            contiguous(est._prior_center),
            est._prior_root,
            clock,
            theta,
            out.coefficients,
            out.baseline,
            out.variance,
            out.residual_sd,
            out.prediction,
            out.residual,
            0,
        )
    except Exception as error:  # numba failing to compile or load, before any row ran
        _disable_kernel(error)
        return False
    if refused >= 0:
        return False
    learnt = clock[[kernel.G, kernel.COUNT, kernel.INFORMATION, kernel.PENALTY]]
    if not all(np.all(np.isfinite(a)) for a in (factor, learnt, theta)):
        return False
    _take_over(kernel, est, factor, clock, theta)
    return True


def _kernel_clock(
    kernel: ModuleType, est: RecursiveEstimator, first: float
) -> tuple[FloatArray, FloatArray]:
    """The estimator's scalars as the kernel's `clock` array, and its cached θ (or zeros).

    An estimator that never learnt starts its clocks at the first row's time, as `_advance`
    does for the first update.
    """
    k = kernel
    clock = np.zeros(k.CLOCK_SIZE)
    if est._time is None:
        clock[k.G_TIME] = clock[k.TIME] = clock[k.REF_TIME] = first
    else:
        assert est._g_time is not None and est._prior_ref_time is not None
        clock[k.G_TIME], clock[k.TIME] = est._g_time, est._time
        clock[k.REF_TIME] = est._prior_ref_time
    clock[k.G], clock[k.REF_WEIGHT] = est._g, est._prior_ref_weight
    clock[k.COUNT], clock[k.INFORMATION] = est._count, est._information
    clock[k.HALF_LIFE] = 0.0 if est.half_life is None else est.half_life
    clock[k.TOP_UP_AFTER], clock[k.PRIOR_TOP_UP] = est._top_up_after, PRIOR_TOP_UP
    theta = np.zeros(est.n_terms)
    if est._theta is not None:
        theta[:] = est._theta
        clock[k.SOLVED], clock[k.PENALTY] = 1.0, est._penalty
    return clock, theta


def _take_over(
    kernel: ModuleType,
    est: RecursiveEstimator,
    factor: FloatArray,
    clock: FloatArray,
    theta: FloatArray,
) -> None:
    """Set the estimator to the kernel's end state."""
    k = kernel
    est._time = float(clock[k.TIME])  # first: the factor is set as the one at the current time
    est._factor = factor
    est._g, est._g_time = float(clock[k.G]), float(clock[k.G_TIME])
    est._prior_ref_weight = float(clock[k.REF_WEIGHT])
    est._prior_ref_time = float(clock[k.REF_TIME])
    est._count, est._information = float(clock[k.COUNT]), float(clock[k.INFORMATION])
    est._theta, est._penalty = theta, float(clock[k.PENALTY])


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
    inverse: FloatArray  # R₀⁻¹, R₀ the start state's factor
    block: int  # rows per block of the recursion; divides stop − start


def _plan_chunk(
    est: RecursiveEstimator, x: FloatArray, weights: FloatArray, times: FloatArray, start: int
) -> _Chunk:
    """The longest run of rows from `start` that keeps the chunk's equations well conditioned.

    In u = R₀(θ − θ₀) the start state is the identity; a chunk may span at most
    _CHUNK_HALF_LIVES half-lives (decay ≥ 1/4, so the prior's weight over α stays below
    4·(1 + PRIOR_TOP_UP)) and add information of trace at most _CHUNK_TRACE, so every row's
    matrix lies between I and (1 + 4.25 + _CHUNK_TRACE)·I. Its length is a multiple of the
    block length.
    """
    assert est._time is not None
    stop = min(len(times), start + _CHUNK_ROWS)
    if est.half_life is not None:
        stop = start + int(
            np.searchsorted(
                times[start:stop], est._time + _CHUNK_HALF_LIVES * est.half_life, "right"
            )
        )
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
    block = _block_rows(rows)
    rows -= rows % block
    return _Chunk(start, start + rows, alpha[:rows], inverse, block)


def _block_rows(rows: int) -> int:
    """Rows per block: _BLOCK_ROWS, fewer when the chunk is short (each step of the recursion
    runs along the blocks, so it wants a few hundred of them to pay for its numpy calls)."""
    return max(1, min(_BLOCK_ROWS, rows // _BLOCKS))


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


@dataclass(frozen=True, slots=True)
class _Prepared:
    """A chunk whose end state is already set, with what its rows' results need."""

    chunk: _Chunk
    x0: FloatArray  # θ₀, internal units
    d: FloatArray  # w/α
    psi_steps: FloatArray  # ψ of row b·block + j at [j, :, b]; likewise (block, blocks):
    e_steps: FloatArray  # e = y − φᵀθ₀
    d_steps: FloatArray  # d
    states: FloatArray  # packed start states, a column per block then per restart
    restarts: list[tuple[int, int, int]]  # (step, block, column of `states`)
    prior: FloatArray  # prior weight after each row
    count: FloatArray  # effective n after each row


def _prepare_chunk(
    est: RecursiveEstimator,
    x: FloatArray,
    y: FloatArray,
    weights: FloatArray,
    chunk: _Chunk,
    times: FloatArray,
) -> _Prepared:
    """Everything about a chunk that needs its start state, and then its exact end state.

    In u = R₀(θ − θ₀), with d = w/α, e = y − φᵀθ₀ and the objective divided by α, the chunk
    is a least-squares problem without forgetting whose start is u = 0 with information I
    (plus the prior's top-ups, LᵀL with L = ΛR₀⁻¹, at their rows). Its rows are cut into
    blocks of `chunk.block` rows; the arrays of a block's rows are laid out step by step
    ([j, ..., b] for row b·block + j), so each step of the recursion reads contiguous rows.
    The end state is recomputed exactly by one structured QR of all the chunk's rows under
    the start factor, so rounding never accumulates from chunk to chunk.
    """
    p = est.n_terms
    start, stop, alpha, inverse, block = (
        chunk.start,
        chunk.stop,
        chunk.alpha,
        chunk.inverse,
        chunk.block,
    )
    m = stop - start
    blocks = m // block
    rows, w, t, target = x[start:stop], weights[start:stop], times[start:stop], y[start:stop]
    prior, tops, amounts, ref_weight, ref_time = _prior_schedule(est, t, alpha)
    factor = est._factor
    x0 = est._solution()
    d = w / alpha
    # ψ = R₀⁻ᵀφ and φᵀθ₀ of every row by one product, broadcast over the steps.
    to_steps = np.vstack([inverse.T, x0])
    products = np.matmul(to_steps, rows.reshape(blocks, block, p).transpose(1, 2, 0))
    psi_steps = products[:, :p]  # each step's (p, blocks) is contiguous
    e_steps = np.empty((block, blocks))
    np.subtract(target.reshape(blocks, block).T, products[:, p], out=e_steps)  # e = y − φᵀθ₀
    d_steps = np.ascontiguousarray(d.reshape(blocks, block).T)
    prior_root = est._prior_root
    lift = np.column_stack(  # [L, Λ(μ − θ₀)]: the rows of one unit of top-up
        [prior_root[:, None] * inverse, prior_root * (est._prior_center - x0)]
    )
    states, restarts = _start_states(
        psi_steps, e_steps, d_steps, float(factor[p, p]) ** 2, tops, amounts, lift
    )
    count = np.cumsum(np.divide(w > 0, alpha))
    count += est._count
    count *= alpha
    # The end state: QR([F₀; √d·[φ, y]; top-ups]) in the chunk's units, then decayed by α.
    stacked = np.empty((m + (p if tops else 0), p + 1), order="F")
    root = np.sqrt(d)
    np.multiply(rows.T, root, out=stacked[:m, :p].T)
    np.multiply(target, root, out=stacked[:m, p])
    if tops:
        stacked[m:] = math.sqrt(float(np.sum(amounts))) * est._prior_rows
    end = alpha[-1]
    information = est._information + float(np.sum(d))
    absorbed = _absorb(factor.copy(order="F"), stacked)
    absorbed *= math.sqrt(end)
    est._time = float(t[-1])  # first: the factor is set as the one at the current time
    est._factor = absorbed
    est._prior_ref_weight, est._prior_ref_time = ref_weight, ref_time
    est._count, est._information = float(count[-1]), float(end * information)
    return _Prepared(chunk, x0, d, psi_steps, e_steps, d_steps, states, restarts, prior, count)


def _lower_sums(augmented: FloatArray, out: FloatArray) -> None:
    """out[packed(i, j)] = Σ_steps augmented[:, i]·augmented[:, j] for j ≤ i, per column.

    `augmented` is (steps, q, N); one einsum per row of the triangle (the full q×q einsum
    and a batched matrix product per block both measured over twice as slow).
    """
    q = augmented.shape[1]
    for i in range(q):
        begin = _packed(i, 0)
        row = out[begin : begin + i + 1]
        np.einsum("tjn,tn->jn", augmented[:, : i + 1], augmented[:, i], out=row)


def _start_states(
    psi_steps: FloatArray,
    e_steps: FloatArray,
    d_steps: FloatArray,
    rho_squared: float,
    tops: list[int],
    amounts: list[float],
    lift: FloatArray,
) -> tuple[FloatArray, list[tuple[int, int, int]]]:
    """Exact state before the first row of every block, and before every top-up inside one.

    The normal equations of the augmented rows [ψ, e], packed (lower triangle, row-major:
    M, then b, then Σ d e²), are prefix sums over the blocks of each block's sums, plus the
    start state (I, 0, ρ₀²) and the top-ups. A top-up on a block's first row joins that
    block's start; one inside a block gets a restart of its own: the block's start plus
    the rows before it and the top-ups so far in the block.

    Returns the packed states (entries, N), a column per block then one per restart, and
    the restarts as (step, block, column).
    """
    block, p, blocks = psi_steps.shape
    q = p + 1
    augmented = np.empty((block, q, blocks))  # √d·[ψ, e]
    root = np.sqrt(d_steps)
    np.multiply(psi_steps, root[:, None, :], out=augmented[:, :p])
    np.multiply(e_steps, root, out=augmented[:, p])
    below, right = np.tril_indices(q)
    top_up = (lift.T @ lift)[below, right]
    states = np.empty((len(below), blocks))  # the state at block b is Σ of columns ≤ b
    _lower_sums(augmented[:, :, :-1], states[:, 1:])
    states[:, 0] = 0.0
    states[[_packed(i, i) for i in range(p)], 0] = 1.0
    states[-1, 0] = rho_squared
    inside: list[tuple[int, int, float]] = []  # (block, step, top-ups so far in the block)
    for row, amount in zip(tops, amounts, strict=True):
        index, step = divmod(row, block)
        if step:
            earlier = inside[-1][2] if inside and inside[-1][0] == index else 0.0
            inside.append((index, step, earlier + amount))
        if index + (step > 0) < blocks:
            states[:, index + (step > 0)] += amount * top_up
    np.cumsum(states, axis=1, out=states)
    if not inside:
        return states, []
    index_array = np.array([r[0] for r in inside])
    step_array = np.array([r[1] for r in inside])
    partial = augmented[:, :, index_array] * (np.arange(block)[:, None] < step_array)[:, None, :]
    restarts = np.empty((len(below), len(inside)))
    _lower_sums(partial, restarts)
    restarts += states[:, index_array]
    restarts += top_up[:, None] * np.array([r[2] for r in inside])
    columns = [(r[1], r[0], blocks + k) for k, r in enumerate(inside)]
    return np.concatenate([states, restarts], axis=1), columns


def _solve_states(packed: FloatArray, p: int) -> tuple[FloatArray, FloatArray, FloatArray]:
    """For N systems given as packed lower triangles of [[M, ·], [bᵀ, c]] (columns of
    `packed`, destroyed), return P = M⁻¹ (p, p, N), u = M⁻¹b (p, N) and c − bᵀu (N).

    Cholesky M = CCᵀ entry by entry, each operation vectorised over the N systems (numpy's
    batched inverse calls LAPACK once per matrix, measured ~5× slower at p = 6), then
    W = C⁻¹ and P = WᵀW. In row-major packed order each row's C[i, :j] is one contiguous
    block, so every inner product is one einsum.
    """
    n = packed.shape[1]
    dot = np.empty(n)

    def row(i: int, stop: int) -> FloatArray:  # C[i, :stop]
        begin = _packed(i, 0)
        return packed[begin : begin + stop]

    reciprocal = np.empty((p, n))  # 1/C[j, j]: one division per column, products after
    for i in range(p):  # C[i, j] = (M[i, j] − C[i, :j]·C[j, :j]) / C[j, j]
        for j in range(i + 1):
            entry = packed[_packed(i, j)]
            if j:
                np.einsum("kn,kn->n", row(i, j), row(j, j), out=dot)
                np.subtract(entry, dot, out=entry)
            if j == i:
                np.sqrt(entry, out=entry)
                np.divide(1.0, entry, out=reciprocal[i])
            else:
                np.multiply(entry, reciprocal[j], out=entry)
    inverse_factor = np.zeros((p, p, n))  # W = C⁻¹, lower triangular
    for i in range(p):  # W[i, j] = −C[i, j:i]·W[j:i, j] / C[i, i]
        inverse_factor[i, i] = reciprocal[i]
        for j in range(i):
            np.einsum("kn,kn->n", row(i, i)[j:], inverse_factor[j:i, j], out=dot)
            np.multiply(dot, reciprocal[i], out=dot)
            np.negative(dot, out=inverse_factor[i, j])
    covariance = np.einsum("ijn,iln->jln", inverse_factor, inverse_factor)  # P = WᵀW
    rhs = row(p, p)  # b
    solution = np.einsum("ijn,jn->in", covariance, rhs)
    minimum = packed[_packed(p, p)] - np.einsum("in,in->n", rhs, solution)
    return covariance, solution, minimum


def _finish_chunk(
    est: RecursiveEstimator, y: FloatArray, prepared: _Prepared, out: ReplayResult
) -> None:
    """Solve the start states, run the blocks' recursion and write the chunk's results."""
    covariance, solution, minimum = _solve_states(prepared.states, est.n_terms)
    before, innovation, u, objective = _block_recursion(
        prepared.psi_steps,
        prepared.e_steps,
        prepared.d_steps,
        (covariance, solution, minimum),
        prepared.restarts,
    )
    _write_chunk(est, y, prepared, before, innovation, u, objective, out)


def _block_recursion(
    psi_steps: FloatArray,
    e_steps: FloatArray,
    d_steps: FloatArray,
    states: tuple[FloatArray, FloatArray, FloatArray],
    restarts: list[tuple[int, int, int]],
) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray]:
    """Every block's rows by the covariance recursion from its exact start, blocks side by side.

    Per row, with P and u the block's state before it (normalised units):
    k = Pψ, s = ψᵀk, ε = e − ψᵀu, c = d/(1 + d·s), u ← u + c·k·ε, P ← P − c·k·kᵀ, and the
    minimum objective grows by c·ε². A block is at most _BLOCK_ROWS rows and starts from an
    exact P whose condition is below the chunk's bound, so its rounding stays that of a few
    updates (the textbook form loses definiteness over long runs, not over 16 rows); a top-up
    inside a block replaces that block's state by its exact restart (`restarts`: step,
    block, column of `states`).

    Returns per row (natural order): s (ψᵀPψ before the row), ε (the innovation), u after
    the row (p, m) and the minimum objective after the row.
    """
    block, p, blocks = psi_steps.shape
    covariance_all, solution_all, minimum_all = states
    covariance = np.ascontiguousarray(covariance_all[:, :, :blocks])
    # Per step: (k, u) side by side, so ψᵀk and ψᵀu are one einsum; u and the minimum
    # objective of step j are those of step j − 1 plus the row's change (one pass each).
    pair = np.empty((2, p, blocks))
    gain, solution = pair
    solutions = np.empty((block + 1, p, blocks))  # [j + 1]: u after the row of step j
    solutions[0] = solution_all[:, :blocks]
    objective = np.empty((block + 1, blocks))
    objective[0] = minimum_all[:blocks]
    dots = np.empty((block, 2, blocks))  # ψᵀPψ and ψᵀu before the row
    innovation = np.empty((block, blocks))
    scaled_gain = np.empty((p, blocks))
    change = np.empty((p, blocks))
    outer = np.empty((p, p, blocks))
    c = np.empty(blocks)
    by_step: dict[int, tuple[list[int], list[int]]] = {}  # step: (blocks, columns)
    for restart_step, restart_block, restart_column in restarts:
        entry = by_step.setdefault(restart_step, ([], []))
        entry[0].append(restart_block)
        entry[1].append(restart_column)
    for step in range(block):
        previous_u, previous_objective = solutions[step], objective[step]
        restart = step in by_step
        if restart:  # these rows start afresh from their exact state (a top-up before them)
            index, column = np.array(by_step[step][0]), np.array(by_step[step][1])
            covariance[:, :, index] = covariance_all[:, :, column]
            # The previous row's results are outputs: swap the restart in for this step only.
            kept_u, kept_objective = previous_u[:, index], previous_objective[index]
            previous_u[:, index] = solution_all[:, column]
            previous_objective[index] = minimum_all[column]
        psi = psi_steps[step]
        weight = d_steps[step]
        np.einsum("ijb,jb->ib", covariance, psi, out=gain)  # k = Pψ
        solution[...] = previous_u
        np.einsum("xib,ib->xb", pair, psi, out=dots[step])  # ψᵀPψ, ψᵀu
        s, eps = dots[step, 0], innovation[step]
        np.subtract(e_steps[step], dots[step, 1], out=eps)  # ε = e − ψᵀu
        np.multiply(weight, s, out=c)
        c += 1.0
        np.divide(weight, c, out=c)  # c = d / (1 + d·s)
        np.multiply(gain, c, out=scaled_gain)  # c·k
        np.multiply(c, eps, out=c)  # c·ε
        np.multiply(eps, c, out=objective[step + 1])
        objective[step + 1] += previous_objective  # + c·ε²
        np.multiply(gain, c, out=change)
        np.add(previous_u, change, out=solutions[step + 1])  # u + c·k·ε
        if restart:
            previous_u[:, index], previous_objective[index] = kept_u, kept_objective
        if step + 1 < block:  # P −= c·k·kᵀ (not needed after a block's last row)
            np.einsum("ib,jb->ijb", scaled_gain, gain, out=outer)
            covariance -= outer
    m = block * blocks
    u = np.empty((p, m))
    u.reshape(p, blocks, block)[...] = solutions[1:].transpose(1, 2, 0)
    before = np.ascontiguousarray(dots[:, 0].T).reshape(m)
    return before, innovation.T.reshape(m), u, objective[1:].T.reshape(m)


def _write_chunk(
    est: RecursiveEstimator,
    y: FloatArray,
    prepared: _Prepared,
    before: FloatArray,
    innovation: FloatArray,
    u: FloatArray,
    objective: FloatArray,
    out: ReplayResult,
) -> None:
    """A chunk's per-row results from its recursion's s, ε, u and minimum objective."""
    p = est.n_terms
    chunk, d, alpha = prepared.chunk, prepared.d, prepared.chunk.alpha
    start, stop = chunk.start, chunk.stop
    target = y[start:stop]
    one_plus = d * before
    one_plus += 1.0  # 1 + d·ψᵀP₋ψ: the innovation over the residual after the row
    variance = out.variance[start:stop]
    np.divide(before, one_plus, out=variance)  # ψᵀP₊ψ = ψᵀP₋ψ / (1 + d·ψᵀP₋ψ)
    variance /= alpha
    out.residual[start:stop] = innovation
    np.subtract(target, innovation, out=out.prediction[start:stop])
    baseline = out.baseline[start:stop]
    np.divide(innovation, one_plus, out=baseline)  # y − φᵀθ after the row
    np.subtract(target, baseline, out=baseline)
    # θ = θ₀ + R₀⁻¹u and Λ(θ − μ) = Λ(θ₀ − μ) + ΛR₀⁻¹u from one matrix product, in the
    # (p, m) layout of u; θ goes straight into the output (its (n, p) is column-major).
    x0, prior_root, inverse = prepared.x0, est._prior_root, chunk.inverse
    both = np.vstack([inverse, prior_root[:, None] * inverse]) @ u
    coefficients = out.coefficients[start:stop].T
    np.add(both[:p], x0[:, None], out=coefficients)
    if est.column_scale is not None:
        coefficients /= est._scale[:, None]
    offset = both[p:]
    offset += (prior_root * (x0 - est._prior_center))[:, None]
    penalty = np.einsum("im,im->m", offset, offset)  # ‖Λ(θ − μ)‖²
    objective *= alpha
    penalty *= prepared.prior
    rss = np.subtract(objective, penalty, out=objective)
    np.maximum(rss, 0.0, out=rss)
    count = prepared.count
    sd = out.residual_sd[start:stop]
    with np.errstate(invalid="ignore", divide="ignore"):
        np.divide(rss, count - p, out=sd)
        np.sqrt(sd, out=sd)
    sd[count <= p] = math.nan


__all__: Sequence[str] = ["ReplayResult", "replay_batch"]
