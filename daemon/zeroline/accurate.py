"""Compensated (error-free transformation) arithmetic for residuals in twice double precision.

Iterative refinement of a least-squares solution only helps when its residuals are computed
more accurately than the solution itself. `long double` is not portable (it is plain double
on some platforms), so this module uses the classic error-free transformations instead:

- TwoSum (Knuth): a + b = s + e exactly, with s = fl(a + b).
- TwoProduct (Dekker, with Veltkamp splitting): a · b = p + e exactly, with p = fl(a · b).

Sums of many terms are done pairwise with TwoSum and the rounding errors added up
separately, which gives a result as if computed in about twice the working precision (the
"Sum2" bound of Ogita, Rump and Oishi, 2005, with log₂ n in place of n). Everything is
vectorised with numpy; nothing here loops over rows in Python.

Valid while no intermediate overflows: |values| below about 1e300 / 2²⁷.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

Array = npt.NDArray[np.float64]

_SPLITTER = 134217729.0  # 2**27 + 1: splits a double into two 26-bit halves


def two_sum(a: Array, b: Array) -> tuple[Array, Array]:
    """s, e with s = fl(a + b) and a + b = s + e exactly."""
    s = a + b
    bb = s - a
    e = (a - (s - bb)) + (b - bb)
    return s, e


def _split(a: Array) -> tuple[Array, Array]:
    c = _SPLITTER * a
    high = c - (c - a)
    return high, a - high


def two_product(a: Array, b: Array) -> tuple[Array, Array]:
    """p, e with p = fl(a · b) and a · b = p + e exactly."""
    p = a * b
    a_hi, a_lo = _split(a)
    b_hi, b_lo = _split(b)
    e = a_lo * b_lo - (((p - a_hi * b_hi) - a_lo * b_hi) - a_hi * b_lo)
    return p, e


def accurate_sum(values: Array, axis: int = 0) -> Array:
    """Sum along `axis` as if in twice double precision, then rounded once."""
    a = np.moveaxis(np.asarray(values, dtype=np.float64), axis, 0)
    errors = np.zeros(a.shape[1:])
    while a.shape[0] > 1:
        if a.shape[0] % 2:
            a = np.concatenate([a, np.zeros((1, *a.shape[1:]))])
        s, e = two_sum(a[0::2], a[1::2])
        errors += e.sum(axis=0)
        a = s
    if a.shape[0] == 0:
        return errors
    total: Array = a[0] + errors
    return total


def accurate_residual(target: Array, matrix: Array, vector: Array, *extra: Array) -> Array:
    """target − Σ extra − matrix @ vector, each row in one compensated sum, rounded once.

    Rounding `matrix @ vector` to double before subtracting it from `target` would throw
    away exactly the digits a refinement step needs, so everything goes into one sum.
    """
    products, errors = two_product(matrix, vector[None, :])
    parts = [target[:, None], *(-e[:, None] for e in extra), -products, -errors]
    return accurate_sum(np.concatenate(parts, axis=1), axis=1)


def accurate_residual_t(target: Array, matrix: Array, vector: Array) -> Array:
    """target − matrixᵀ @ vector, each column in one compensated sum, rounded once."""
    products, errors = two_product(matrix, vector[:, None])
    return accurate_sum(np.concatenate([target[None, :], -products, -errors], axis=0), axis=0)


def accurate_dot(a: Array, b: Array) -> float:
    """a · b accumulated in twice double precision."""
    products, errors = two_product(a, b)
    return float(accurate_sum(np.concatenate([products, errors])))
