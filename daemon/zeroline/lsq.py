"""Batch weighted least squares that stays accurate on ill-conditioned bases.

Given a design F (n × p), targets y and optional weights w, find c minimising
Σ wᵢ (yᵢ − Fᵢc)². The method, and why:

1. Rows are scaled by √w and columns by a power of two close to 1/‖column‖ (column
   equilibration: exact in binary, and it removes the part of the condition number that
   only comes from units, e.g. t in seconds next to a constant).
2. Householder QR with column pivoting, F P = Q R. The normal equations FᵀF c = Fᵀy are
   never formed: they square the condition number and lose half the digits.
3. The singular values of R give the condition number of the equilibrated design; when the
   columns are (numerically) dependent, the fit is refused and the smallest singular vector
   names the terms that collide.
4. Iterative refinement of the augmented system [I F; Fᵀ 0][r; c] = [y; 0] (Björck, 1967),
   reusing the QR factors, with residuals accumulated in twice double precision
   (`zeroline.accurate`). Refining the augmented system rather than c alone also removes
   the κ²·‖r‖ term of the error bound, so problems with large residuals benefit too.
5. The covariance (FᵀWF)⁻¹ is refined the same way, column by column, so standard errors are
   as accurate as the coefficients.

Statistics follow the conventions of the NIST StRD certified values and of statsmodels:
residual SD = √(RSS/(n − p)); R² centred (1 − RSS/Σw(y − ȳ_w)²) when a column is constant
(an intercept) and uncentred (1 − RSS/Σwy²) otherwise; log-likelihood
ℓ = −n/2·(ln 2π + ln(RSS/n) + 1) + ½Σ ln wᵢ, AIC = −2ℓ + 2p, BIC = −2ℓ + p·ln n
(statsmodels OLS/WLS `llf`, `aic`, `bic` with k = p). Rows with weight 0 are left out and
not counted in n.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import numpy.typing as npt
import scipy.linalg

from zeroline.accurate import (
    accurate_dot,
    accurate_residual,
    accurate_residual_t,
    accurate_sum,
    two_product,
)
from zeroline.errors import DependentBasisError, InputError

Array = npt.NDArray[np.float64]

#: Equilibrated designs whose smallest singular value is below this fraction of the largest
#: are refused as numerically dependent. At 1e-15 the columns are dependent to within a few
#: units of double rounding; refinement still recovers well-posed problems up to about that.
DEPENDENCE_TOLERANCE = 64 * np.finfo(np.float64).eps

MAX_REFINEMENT_STEPS = 30
_TINY = np.finfo(np.float64).tiny


@dataclass(frozen=True)
class FitResult:
    """Coefficients (basis order, the user's units) and the statistics of one fit."""

    terms: tuple[str, ...]
    coefficients: Array
    std_errors: Array
    covariance: Array
    residual_sd: float
    r_squared: float
    condition_number: float
    n: int
    aic: float
    bic: float
    residuals: Array
    refinement_steps: int

    def to_json(self) -> dict[str, Any]:
        """The `zeroline fit --json` object (design §3); non-finite numbers become null."""

        def number(x: float) -> float | None:
            return float(x) if math.isfinite(x) else None

        return {
            "terms": list(self.terms),
            "coefficients": [number(c) for c in self.coefficients],
            "std_errors": [number(s) for s in self.std_errors],
            "residual_sd": number(self.residual_sd),
            "r_squared": number(self.r_squared),
            "condition_number": number(self.condition_number),
            "n": self.n,
            "aic": number(self.aic),
            "bic": number(self.bic),
        }


@dataclass(frozen=True)
class _Factors:
    """QR factors of the scaled design and how to solve the augmented system with them."""

    q: Array
    r: Array
    pivot: npt.NDArray[np.intp]

    def correct(self, f: Array, g: Array) -> tuple[Array, Array]:
        """Solve [I A; Aᵀ 0][dr; dx] = [f; g] with A P = Q R (Björck's scheme).

        With h = R⁻ᵀ Pᵀg and d = Qᵀf:  dx = P R⁻¹(d − h),  dr = f − Q(d − h).
        """
        h = scipy.linalg.solve_triangular(self.r, g[self.pivot], trans="T")
        d = self.q.T @ f
        dy = scipy.linalg.solve_triangular(self.r, d - h)
        dx = np.empty_like(dy)
        dx[self.pivot] = dy
        return dx, f - self.q @ (d - h)


def fit_least_squares(
    design: npt.ArrayLike,
    y: npt.ArrayLike,
    weights: npt.ArrayLike | None = None,
    names: Sequence[str] | None = None,
) -> FitResult:
    """Fit y ≈ design · c by weighted least squares; see the module docstring for the method.

    Raises InputError for unusable data and DependentBasisError, naming the colliding
    terms, when the columns are linearly dependent on this data.

    >>> import numpy as np
    >>> x = np.arange(5.0)
    >>> fit = fit_least_squares(np.c_[np.ones(5), x], 2 + 3 * x, names=["constant", "x"])
    >>> [round(float(c), 12) for c in fit.coefficients]
    [2.0, 3.0]
    """
    f_all, y_all, w_all, names = _validated(design, y, weights, names)
    used = w_all > 0
    n, p = int(used.sum()), f_all.shape[1]
    if n <= p:
        raise InputError(
            f"{n} usable rows for {p} basis columns; a fit needs more rows than columns "
            "(add data or remove terms)"
        )
    root_w = np.sqrt(w_all[used])
    a = f_all[used] * root_w[:, None]
    b = y_all[used] * root_w
    scale = _column_scale(a, names)
    a_scaled = a * scale

    q, r, pivot = scipy.linalg.qr(a_scaled, mode="economic", pivoting=True)
    factors = _Factors(q, r, pivot)
    condition = _check_independent(r, pivot, names)

    x_scaled, _, steps = _refine(a_scaled, b, np.zeros(p), factors)
    inverse_scaled = np.column_stack(
        [_refine(a_scaled, np.zeros(n), -np.eye(p)[j], factors)[0] for j in range(p)]
    )
    inverse = inverse_scaled * scale[:, None] * scale[None, :]  # (FᵀWF)⁻¹ in user units
    inverse = 0.5 * (inverse + inverse.T)

    coefficients = x_scaled * scale
    final_residual = accurate_residual(b, a_scaled, x_scaled)
    rss = float(accurate_sum(_squares(final_residual)))
    sigma2 = rss / (n - p)
    covariance = inverse * sigma2
    std_errors = np.sqrt(np.clip(np.diag(inverse), 0.0, None) * sigma2)

    y_used, w_used = y_all[used], w_all[used]
    tss = _total_sum_of_squares(y_used, w_used, centred=_has_intercept(f_all[used]))
    log_likelihood = _log_likelihood(rss, n, w_used)
    return FitResult(
        terms=tuple(names),
        coefficients=coefficients,
        std_errors=std_errors,
        covariance=covariance,
        residual_sd=math.sqrt(sigma2),
        r_squared=1.0 - rss / tss if tss > 0 else float("nan"),
        condition_number=condition,
        n=n,
        aic=-2.0 * log_likelihood + 2.0 * p,
        bic=-2.0 * log_likelihood + p * math.log(n),
        residuals=final_residual / root_w,
        refinement_steps=steps,
    )


# --- steps ----------------------------------------------------------------------------------


def _validated(
    design: npt.ArrayLike,
    y: npt.ArrayLike,
    weights: npt.ArrayLike | None,
    names: Sequence[str] | None,
) -> tuple[Array, Array, Array, list[str]]:
    f = np.asarray(design, dtype=np.float64)
    if f.ndim != 2 or f.shape[1] == 0:
        raise InputError(f"the design must be a 2-D array with at least one column, got {f.shape}")
    target = np.asarray(y, dtype=np.float64).reshape(-1)
    if target.shape[0] != f.shape[0]:
        raise InputError(f"{target.shape[0]} targets for {f.shape[0]} design rows; they must match")
    labels = list(names) if names is not None else [f"c{j}" for j in range(f.shape[1])]
    if len(labels) != f.shape[1]:
        raise InputError(f"{len(labels)} names for {f.shape[1]} columns; they must match")
    w = np.ones_like(target) if weights is None else np.asarray(weights, dtype=np.float64)
    w = w.reshape(-1)
    if w.shape != target.shape:
        raise InputError(f"{w.shape[0]} weights for {target.shape[0]} rows; they must match")
    _require_finite(w, "weight")
    if (w < 0).any():
        row = int(np.argmax(w < 0))
        raise InputError(f"weight at row {row + 1} is negative ({w[row]:g}); weights must be >= 0")
    _require_finite(target, "target")
    bad_rows, bad_cols = np.nonzero(~np.isfinite(f) & (w > 0)[:, None])
    if bad_rows.size:
        raise InputError(
            f"basis column {labels[bad_cols[0]]!r} is not finite at row {bad_rows[0] + 1} "
            f"({f[bad_rows[0], bad_cols[0]]}); check the term's inputs at that row"
        )
    return f, target, w, labels


def _require_finite(values: Array, what: str) -> None:
    bad = ~np.isfinite(values)
    if bad.any():
        row = int(np.argmax(bad))
        raise InputError(f"{what} at row {row + 1} is {values[row]}; every {what} must be finite")


def _column_scale(a: Array, names: Sequence[str]) -> Array:
    """Powers of two near 1/‖column‖: equilibration without any rounding."""
    norms = np.sqrt(accurate_sum(_squares(a), axis=0))
    for j, norm in enumerate(norms):
        if norm == 0.0:
            raise DependentBasisError(
                f"basis column {names[j]!r} is zero on every row used; remove it or fit over "
                "data where it varies"
            )
    return np.exp2(-np.round(np.log2(norms)))


def _check_independent(r: Array, pivot: npt.NDArray[np.intp], names: Sequence[str]) -> float:
    """Condition number of the unit-column design; refuse dependent columns, naming them."""
    unit = r / np.linalg.norm(r, axis=0)[None, :]
    _, singular, vt = np.linalg.svd(unit)
    smallest = singular[-1]
    if smallest <= DEPENDENCE_TOLERANCE * singular[0]:
        weights = np.abs(vt[-1])
        involved = sorted(int(pivot[j]) for j in np.nonzero(weights >= 0.1 * weights.max())[0])
        quoted = [repr(names[j]) for j in involved]
        listed = quoted[0] if len(quoted) == 1 else ", ".join(quoted[:-1]) + " and " + quoted[-1]
        raise DependentBasisError(
            f"basis terms {listed} are linearly dependent on this data (condition number "
            f"{_condition(singular):.3g}); remove one of them, or fit over data that "
            "separates them"
        )
    return _condition(singular)


def _condition(singular: Array) -> float:
    return float(singular[0] / singular[-1]) if singular[-1] > 0 else math.inf


def _refine(a: Array, b: Array, c: Array, factors: _Factors) -> tuple[Array, Array, int]:
    """Solve [I A; Aᵀ 0][r; x] = [b; c] by refinement on accurately computed residuals.

    c = 0 is the least-squares problem min‖b − A x‖; b = 0, c = −e_j gives column j of
    (AᵀA)⁻¹. Returns x, r and the number of refinement steps taken.
    """
    x, r = factors.correct(b, c)  # the direct (unrefined) solution
    previous = math.inf
    steps = 0
    while steps < MAX_REFINEMENT_STEPS:
        steps += 1
        f = accurate_residual(b, a, x, r)  # b − r − A x
        g = accurate_residual_t(c, a, r)  # c − Aᵀ r
        dx, dr = factors.correct(f, g)
        x = x + dx
        r = r + dr
        # Componentwise: coefficients of very different sizes must each converge.
        size = float(np.max(np.abs(dx) / np.maximum(np.abs(x), _TINY)))
        if size <= np.finfo(np.float64).eps or size >= 0.5 * previous:
            break
        previous = size
    return x, r, steps


def _squares(values: Array) -> Array:
    """Squares stacked with their rounding errors (along axis 0), for an accurate sum."""
    p, e = two_product(values, values)
    return np.concatenate([p, e], axis=0)


def _has_intercept(f: Array) -> bool:
    """True when some column is the same non-zero number on every row."""
    first = f[0]
    return bool(np.any((first != 0) & np.all(f == first[None, :], axis=0)))


def _total_sum_of_squares(y: Array, w: Array, *, centred: bool) -> float:
    if centred:
        mean = accurate_dot(w, y) / float(accurate_sum(w))
        deviations = y - mean
    else:
        deviations = y
    return accurate_dot(w * deviations, deviations)


def _log_likelihood(rss: float, n: int, w: Array) -> float:
    if rss <= 0:
        return math.inf
    return -0.5 * n * (math.log(2 * math.pi) + math.log(rss / n) + 1.0) + 0.5 * float(
        np.sum(np.log(w))
    )
