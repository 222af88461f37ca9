"""Compiled replay kernel: `RecursiveEstimator.update`'s recursion, one row at a time, in numba.

Imported only by `estimator_replay` when a replay runs: numba's import costs ~0.5 s and tens
of MB, which the daemon (it never replays through here) should not pay. `replay_rows` is
compiled on its first call for each number of terms p (p is the length of the `terms` tuple,
so it is a constant to the compiler, which unrolls the loops over the terms: measured ~1.5×
faster at p = 6 than a run-time p), and cached on disk (`cache=True`), so the compile time is
paid once per install and p.

The recursion is the per-sample path's (estimator.py's module docstring), row by row:

- forgetting: the count and information decay by 2^(−Δt/h), computed as `_advance` does
  (regular samples reuse the last Δt's decay); the factor is kept as F = g·G with
  g = 2^(−(t − t_g)/2h) from its reference time (regular samples multiply it on by
  2^(−Δt/2h), computed afresh every 64 rows: a power per row cost ~20 ns of ~125), multiplied
  into G when it falls below 2⁻⁶⁴ and before a top-up;
- the prior's top-up when `_advance` would do it (the same test, the same amount
  1 + PRIOR_TOP_UP − a(t)), absorbing the p prior rows;
- the innovation against θ before the row; a row of weight w > 0 absorbed into G as
  √w·[φ, y]/g by p plane rotations, the QR update of [G; row] that LAPACK `dtpqrt` makes in
  the per-sample path (with one row, each of its Householder reflectors is a rotation of two
  rows: the same factor up to the signs of its rows);
- θ = G⁻¹z by back substitution, φᵀPφ and σ̂ (from ρ² and the prior's penalty) after the row.

The rotations are applied without square roots (Gentleman's form): G = D^½·U with U unit
upper triangular (z's column included) and D = diag(Gⱼⱼ²), and the row v is eliminated by
U (tⱼ = vⱼ after the earlier columns; v_k −= tⱼ·Uⱼₖ) while

    Σⱼ₊₁ = Σⱼ + tⱼ²/dⱼ (Σ₀ = 1),   dⱼ ← dⱼ·Σⱼ₊₁/Σⱼ,   Uⱼₖ ← Uⱼₖ + (tⱼ/(dⱼΣⱼ₊₁))·v_k,

which is the rotation with cⱼ² = Σⱼ/Σⱼ₊₁ written for D and U (W. M. Gentleman, "Least
squares computations by Givens transformations without square roots", J. Inst. Maths
Applics 12 (1973) 329–336; from memory, and checked here only against the per-sample path,
tests/test_estimator_replay.py). Why: a rotation with square roots puts a square root and a
division on the path from one column to the next; here that path is one multiply-add, and
the divisions of different columns overlap. Measured in experiments at p = 6 (1e6 rows, p
fixed at compile time, every result written): ~110 ns a row, against ~140 ns for the same
rotations with square roots (cⱼ, sⱼ from Σ); plain Givens rotations of the row (absorbing
and solving only, p not fixed) took ~190 ns.
The same sums give, exactly in exact arithmetic, what the per-sample path computes by
extra solves:

- ∏cⱼ² = 1/Σ_p = 1/(1 + w·φᵀP₋φ), so φᵀP₊φ after the row is (Σ_p − 1)/(Σ_p·w)
  (Sherman–Morrison); Σ_p − 1 is summed as its own sum of positive terms, so it keeps full
  precision when w·φᵀPφ is tiny. A row of weight 0 gets φᵀPφ by eliminating φ alone.
- the minimum objective ρ² grows by t_p²/Σ_p (t_p the row's residual entry after the p
  columns), so ρ is kept squared and no square root is taken for it.
- θ = U⁻¹ζ (ζ the z column of U) needs no division, U's diagonal being ones.

G is converted to D and U on entry and back on exit (p divisions and p square roots).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import Any, TypeVar, cast

import numba
import numpy as np

from zeroline.estimator import FloatArray

_Function = TypeVar("_Function", bound=Callable[..., Any])

#: Positions of the scalars in the `clock` array passed in and out of `replay_rows`.
G, G_TIME, TIME, REF_WEIGHT, REF_TIME, COUNT, INFORMATION = range(7)
HALF_LIFE, TOP_UP_AFTER, PRIOR_TOP_UP, SOLVED, PENALTY = range(7, 12)
CLOCK_SIZE = 12
_G_FLOOR = 2.0**-64  # as estimator._G_FLOOR
_G_EXACT = 64  # g multiplied on by at most this many steps (≤ ~64 ulps from the exact power)


def _jit(function: _Function) -> _Function:
    """numba.njit, cached on disk, keeping the function's type for mypy.

    `error_model="numpy"`: a division by zero gives inf/NaN instead of raising, which spares
    a test per division (the divisors are diagonals that the prior keeps non-zero; the caller
    checks the end state is finite). `fastmath={"contract"}` only lets a multiply and an add
    fuse (FMA); nothing is reassociated and NaN and infinity keep their meaning.
    """
    jit = numba.njit(
        cache=True, nogil=True, error_model="numpy", fastmath={"contract"}, inline="always"
    )
    return cast(_Function, jit(function))


@_jit
def _split(factor: FloatArray, unit: FloatArray, d: FloatArray, rd: FloatArray, p: int) -> float:
    """G (upper part of `factor`) as U (into `unit`, p×(p+1)), D, 1/D; returns ρ²."""
    for j in range(p):
        pivot = factor[j, j]
        d[j] = pivot * pivot
        rd[j] = 1.0 / d[j]
        unit[j, j] = 1.0
        for k in range(j + 1, p + 1):
            unit[j, k] = factor[j, k] / pivot
    corner: float = factor[p, p]
    return corner * corner


@_jit
def _join(factor: FloatArray, unit: FloatArray, d: FloatArray, rho2: float, p: int) -> None:
    """G = D^½·U with corner √ρ² into `factor` (its diagonal positive)."""
    for j in range(p):
        pivot = math.sqrt(d[j])
        factor[j, j] = pivot
        for k in range(j + 1, p + 1):
            factor[j, k] = pivot * unit[j, k]
    factor[p, p] = math.sqrt(rho2)


@_jit
def _absorb(
    unit: FloatArray, d: FloatArray, rd: FloatArray, row: FloatArray, start: int, p: int
) -> tuple[float, float]:
    """Rotate `row` (p+1 entries, zero before column `start`) into D^½·U.

    Returns (Σ_p − 1, 1/Σ_p); the row's residual entry t_p is left in row[p].
    """
    excess = 0.0  # Σⱼ − 1
    reciprocal = 1.0  # 1/Σⱼ
    for j in range(start, p):
        t = row[j]
        scaled = t * rd[j]
        excess_next = excess + t * scaled
        reciprocal_next = 1.0 / (1.0 + excess_next)
        gain = scaled * reciprocal_next  # tⱼ/(dⱼΣⱼ₊₁)
        for k in range(j + 1, p + 1):
            value = row[k] - t * unit[j, k]
            row[k] = value
            unit[j, k] += gain * value
        d[j] *= (1.0 + excess_next) * reciprocal  # dⱼ·Σⱼ₊₁/Σⱼ
        rd[j] *= (1.0 + excess) * reciprocal_next
        excess, reciprocal = excess_next, reciprocal_next
    return excess, reciprocal


@_jit
def _quadratic(unit: FloatArray, rd: FloatArray, x: FloatArray, work: FloatArray, p: int) -> float:
    """‖G⁻ᵀx‖² = Σ tⱼ²/dⱼ with t = U⁻ᵀx (into `work`), learning nothing."""
    total = 0.0
    for j in range(p):
        value = x[j]
        for k in range(j):
            value -= unit[k, j] * work[k]
        work[j] = value
        total += value * value * rd[j]
    return total


@_jit
def _solve(
    unit: FloatArray, theta: FloatArray, center: FloatArray, root: FloatArray, p: int
) -> float:
    """θ = U⁻¹ζ into `theta`; returns the prior's penalty ‖Λ(θ − μ)‖²."""
    penalty = 0.0
    for j in range(p - 1, -1, -1):
        total = unit[j, p]
        for k in range(p - 1, j, -1):  # θⱼ₊₁, the newest, last: the shortest chain
            total -= unit[j, k] * theta[k]
        theta[j] = total
        offset = (total - center[j]) * root[j]
        penalty += offset * offset
    return penalty


@_jit
def _settle(d: FloatArray, rd: FloatArray, g: float, p: int) -> None:
    """G ← g·G: D scales by g² (U is unchanged)."""
    for j in range(p):
        d[j] *= g * g
    _reciprocals(d, rd, p)


@_jit
def _reciprocals(d: FloatArray, rd: FloatArray, p: int) -> None:
    """1/D afresh (`_absorb` updates it by products, which drift by an ulp or so per row)."""
    for j in range(p):
        rd[j] = 1.0 / d[j]


@_jit
def replay_rows(
    terms: tuple[int, ...],
    factor: FloatArray,
    phi: FloatArray,
    y: FloatArray,
    weights: FloatArray,
    times: FloatArray,
    scale: FloatArray,
    scaled: bool,
    prior_rows: FloatArray,
    center: FloatArray,
    root: FloatArray,
    clock: FloatArray,
    theta: FloatArray,
    coefficients: FloatArray,
    baseline: FloatArray,
    variance: FloatArray,
    residual_sd: FloatArray,
    prediction: FloatArray,
    residual: FloatArray,
    start: int,
) -> int:
    """Learn rows `start` to the end as `update` would, writing each row's results.

    `terms` is any tuple of p entries (its length is what the compiler specialises on);
    `factor` is G, set to the end state (rows of positive diagonal); `clock` the scalars
    (positions above; HALF_LIFE 0 means no forgetting), `theta` the cached θ, valid if
    clock[SOLVED] is 1, both updated; `phi` in the user's units (divided by `scale` here
    when `scaled`, as `update` does).

    Returns −1, or the index of the first row with a non-finite number, a negative weight
    or a time before the one before it (or before clock[TIME]): the kernel stops there,
    leaving `factor`, `clock` and `theta` part-way (the caller passes copies), so checking
    the rows costs no pass of its own.
    """
    p = len(terms)
    n = phi.shape[0]
    g, g_time, time = clock[G], clock[G_TIME], clock[TIME]
    ref_weight, ref_time = clock[REF_WEIGHT], clock[REF_TIME]
    count, information = clock[COUNT], clock[INFORMATION]
    half_life, top_up_after, top_up = clock[HALF_LIFE], clock[TOP_UP_AFTER], clock[PRIOR_TOP_UP]
    forgetting = half_life > 0.0
    x = np.empty(p)
    row = np.empty(p + 1)
    unit = np.empty((p, p + 1))
    d = np.empty(p)
    rd = np.empty(p)
    rho2 = _split(factor, unit, d, rd, p)
    # a(t) = ref_weight·2^(−(t − t_ref)/h) = kappa·g², kappa fixed while t_g and t_ref are
    kappa = ref_weight
    if forgetting:
        kappa = ref_weight * 2.0 ** (-(g_time - ref_time) / half_life)
    penalty = clock[PENALTY]
    if clock[SOLVED] != 1.0:
        penalty = _solve(unit, theta, center, root, p)
    # The last Δt, its 2^(−Δt/h) and 2^(−Δt/2h): regular samples reuse them, and g is then
    # multiplied on (computed afresh every _G_EXACT rows and after any other Δt)
    step, decay, half_step = -1.0, 1.0, 1.0
    stepped = _G_EXACT
    for i in range(start, n):
        now, target, weight = times[i], y[i], weights[i]
        probe = 0.0  # stays 0 if φ is finite: x − x is NaN for NaN and ±inf
        for j in range(p):
            probe += phi[i, j] - phi[i, j]
        finite = math.isfinite(target) and math.isfinite(weight) and probe == 0.0
        if not (finite and weight >= 0.0 and now >= time and now < math.inf):
            return i
        # ---- _advance: forgetting, then the prior's top-up when due
        if forgetting and now > time:
            if now - time != step:
                step = now - time
                decay = 2.0 ** (-step / half_life)
                half_step = math.sqrt(decay)
                stepped = _G_EXACT
            count *= decay
            information *= decay
            if stepped < _G_EXACT:
                g *= half_step
                stepped += 1
            else:  # as `_advance`: from g's reference time, no rounding carried
                g = 2.0 ** (-(now - g_time) / (2.0 * half_life))
                stepped = 0
            if g < _G_FLOOR:  # multiply g into G (a uniform scaling: θ stays)
                _settle(d, rd, g, p)
                rho2 *= g * g
                g, g_time = 1.0, now
                kappa = ref_weight * 2.0 ** (-(g_time - ref_time) / half_life)
        time = now
        threshold = math.inf
        if forgetting:
            threshold = 0.0 if ref_weight == 1.0 else top_up_after
        if now - ref_time > threshold:
            if g != 1.0:  # `_top_up_prior` reads the settled factor
                _settle(d, rd, g, p)
                rho2 *= g * g
            g, g_time = 1.0, now  # as the factor's setter after the top-up
            current = ref_weight * 2.0 ** (-(now - ref_time) / half_life)
            lift = math.sqrt(1.0 + top_up - current)
            for r in range(p):  # prior row r is zero before column r
                for k in range(p + 1):
                    row[k] = lift * prior_rows[r, k]
                reciprocal = _absorb(unit, d, rd, row, r, p)[1]
                rho2 += row[p] * row[p] * reciprocal
            _reciprocals(d, rd, p)
            ref_weight, ref_time = 1.0 + top_up, now
            kappa = ref_weight
            penalty = _solve(unit, theta, center, root, p)
        # ---- the innovation, against θ before the row
        guess = 0.0
        for j in range(p):
            value = phi[i, j] / scale[j] if scaled else phi[i, j]
            x[j] = value
            guess += value * theta[j]
        prediction[i] = guess
        residual[i] = target - guess
        # ---- learning the row
        if weight > 0.0:
            if (i & 1023) == 0:  # bound the drift of 1/D without forgetting (no top-ups)
                _reciprocals(d, rd, p)
            lift = math.sqrt(weight) / g  # G absorbs the row divided by g
            for j in range(p):
                row[j] = x[j] * lift
            row[p] = target * lift
            excess, reciprocal = _absorb(unit, d, rd, row, 0, p)
            variance[i] = excess * reciprocal / weight
            rho2 += row[p] * row[p] * reciprocal
            count += 1.0
            information += weight
            penalty = _solve(unit, theta, center, root, p)
        else:
            variance[i] = _quadratic(unit, rd, x, row, p) / (g * g)
        # ---- the row's results after learning it
        fitted = 0.0
        for j in range(p):
            fitted += x[j] * theta[j]
            coefficients[i, j] = theta[j] / scale[j] if scaled else theta[j]
        baseline[i] = fitted
        if count <= p:
            residual_sd[i] = math.nan
        else:
            rss = g * g * (rho2 - kappa * penalty)
            residual_sd[i] = math.sqrt(max(rss, 0.0) / (count - p))
    _join(factor, unit, d, rho2, p)
    clock[G], clock[G_TIME], clock[TIME] = g, g_time, time
    clock[REF_WEIGHT], clock[REF_TIME] = ref_weight, ref_time
    clock[COUNT], clock[INFORMATION] = count, information
    clock[SOLVED], clock[PENALTY] = 1.0, penalty
    return -1
