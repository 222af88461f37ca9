"""Recursive least-squares estimator of one channel's baseline coefficients.

The estimate after every sample is the weighted least-squares solution over all rows seen so
far, each row weighted by its sample weight times 2^(−age/half_life) (or 1 inside an exact
sliding window), plus a *prior*: p pseudo-observations θⱼ ≈ prior_meanⱼ with standard
deviation prior_sdⱼ that are never forgotten. In normal-equation terms

    info(t) = Σ w·2^(−age/h)·φφᵀ + a(t)·diag(prior_sd)⁻²,   P = info⁻¹,   θ = P·b

but the normal equations are never formed: they square the condition number.

Square-root information form
----------------------------
The state is one upper-triangular (p+1)×(p+1) matrix F = [[R, z], [0, ρ]] with
RᵀR = info, Rθ = z, and ρ² the minimum of the weighted objective (data + prior). It is the
R of a QR factorisation of all weighted rows [√w·φᵀ, √w·y] and prior rows, so

- a new row is absorbed by one orthogonal triangularisation of [F; row] (LAPACK `dtpqrt`,
  the structured "triangle on top of a few rows" QR: O(p²) per row in one compiled call;
  p Givens rotations as numpy operations, even in a closed form vectorised over the rows,
  measured about 3× slower at p ≤ 12);
- forgetting for Δt seconds is the exact scaling F ← F·√(2^(−Δt/h)) (irregular sampling is
  handled because the decay depends on elapsed time, not on the number of samples); it is
  kept as a number, F = g·G with g = 2^(−(t − t_g)/2h), and each row is absorbed into G
  divided by g, so a sample costs no pass over F (g is multiplied into G when it falls
  below 2⁻⁶⁴, and whenever other code reads the factor);
- θ = R⁻¹z and φᵀPφ = ‖R⁻ᵀφ‖² are triangular solves; nothing is ever inverted in place, so
  the factor stays positive definite in exact arithmetic and orthogonal updates keep it so in
  floating point (the textbook update P ← (P − kφᵀP)/λ does not: it loses definiteness).
  θ and the prior's penalty are solved once per change of G (a uniform scaling leaves them
  as they are) and shared by the innovation, `coefficients`, `predict` and `residual_sd`.

Per sample that is three LAPACK calls (R⁻ᵀφ, θ, `dtpqrt`) and a few small numpy operations;
at p ≤ 12 each costs its call overhead rather than its flops (bench/RESULTS.md).

Wind-up guard: the prior is never forgotten
-------------------------------------------
Scaling F also scales the prior rows inside it. Keeping them at weight exactly 1 would need a
rank-p refresh (O(p³)) after every sample, so the refresh is lazy: the prior's weight a(t)
decays with the data and, as soon as it would fall below 1, p prior rows are absorbed to lift
it back to 1 + PRIOR_TOP_UP. Hence 1 ≤ a(t) ≤ 1 + 1/16 at every sample, P ≤ diag(prior_sd²)
always (an unexcited direction can never wind up past its prior variance, whatever the gap),
and the rank-p refresh runs once per h·log₂(1 + 1/16) ≈ 0.087 half-lives: amortised O(p²)
whenever the sampling interval is small against the half-life. The weight is known exactly
(`prior_weight`), so the estimate still equals a batch fit: data rows plus the prior rows at
weight a(t).

Exact sliding window
--------------------
Downdating (removing a row by a hyperbolic rotation) is unstable when the removed row
carried most of the information in some direction. The window instead keeps its rows and
uses the two-stack queue: a *back* factor absorbs new rows (and the prior); the *front* holds
suffix factors of the older rows, built when the front runs empty from the back's rows by a
backward sweep (checkpointed every `_BLOCK` rows, with the suffixes inside one block
recomputed when the oldest row enters it). Expiry only moves an index, and the estimate is
the QR of the front suffix stacked on the back factor: every factor is built only by adding
rows, so the window stays exact forever. Cost: amortised three row absorptions per sample plus
one merge of two triangles per sample (a (2p+2)×(p+1) QR, one LAPACK call).

Scaling
-------
Times are seconds since the channel's epoch (10 years ≈ 3.2e8 s). The estimator only uses
differences of consecutive times for the decay, and the vectorised replay measures decay from
a chunk's start (never 2^(t/h) from the epoch, which overflows after 1024 half-lives), so a
channel that runs for years loses nothing. Basis columns may be divided by a fixed
`column_scale` (the estimator then works with φⱼ/sⱼ and reports coefficients in the user's
units); Householder QR and triangular solves are invariant under power-of-two column scaling,
so an automatic rescaling would not change a digit: the collinearity measure
`condition_number()` equilibrates the columns instead.

Replay fast path
----------------
`replay_batch` (module `zeroline.estimator_replay`, re-exported here) learns recorded rows
with every row's results and the same end state as per-sample `update`: by this recursion
compiled (`zeroline.estimator_kernel`, numba, imported on the first replay only) or, without
numba, in vectorised numpy chunks.

Threads: every matrix here is at most 13 wide. Multi-threaded OpenBLAS gains nothing at that
size and, on a busy 2-core gateway, waking its threads made single LAPACK calls with many
right-hand sides take milliseconds instead of microseconds (measured). Run the daemon and the
replay with OPENBLAS_NUM_THREADS=1 (set before numpy is imported).
"""

from __future__ import annotations

import functools
import itertools
import math
import threading
from collections.abc import Sequence
from typing import TYPE_CHECKING, Any, NamedTuple

import numpy as np
from numpy.typing import ArrayLike, NDArray

from zeroline.errors import InputError
from zeroline.fortran import blas, lapack
from zeroline.objects import shallow_copy
from zeroline.state_layout import number, optional, upper_triangle

if TYPE_CHECKING:  # the replay module imports this one; at run time see __getattr__ below
    from zeroline.estimator_replay import ReplayResult, replay_batch

FloatArray = NDArray[np.float64]

#: The prior's weight is kept in [1, 1 + PRIOR_TOP_UP] (see the module docstring).
PRIOR_TOP_UP = 1.0 / 16.0
#: Version of the dict written by `to_state`.
STATE_VERSION = 1
_MAX_TERMS = 64
_BLOCK = 64  # window: rows per checkpoint of the front stack
_G_FLOOR = 2.0**-64  # the forgetting g in F = g·G is multiplied into G below this


class Innovation(NamedTuple):
    """What a sample says before it is learnt: for alerts and robust weights.

    `prediction` φᵀθ and `residual` y − φᵀθ use the estimate before the sample;
    `baseline_variance` is φᵀPφ before the sample (unscaled, as `variance()`);
    `variance` = σ̂²·(1 + φᵀPφ) is the predicted variance of the residual of a unit-weight
    sample, and `standardised` = residual / √variance (NaN while σ̂ is not yet defined).
    """

    prediction: float
    residual: float
    baseline_variance: float
    variance: float
    standardised: float


# LAPACK handles fetched once; positional arguments, because f2py parses keywords slower.
_dtpqrt = lapack.dtpqrt
_dtrtrs = lapack.dtrtrs
# BLAS level 1 on the per-sample path: a third of the call cost of the numpy equivalents
# at p ≤ 12, with the same bits. `ndarray.dot` of two float64 vectors is BLAS ddot (numpy
# multiplies a one-element pair as scalars instead: see `dot`); a scaling is one correctly
# rounded product per element however it is computed.
_ddot, _dscal, _dcopy = blas.ddot, blas.dscal, blas.dcopy
_new_tuple = tuple.__new__


class _ScratchRows(threading.local):
    """Per thread, per number of terms, the scratch row LAPACK absorbs into a factor.

    Every estimator refills it before each use, so they share one per thread instead of
    each holding its own two small arrays (~0.5 KB an estimator, most of it the arrays'
    headers, on a daemon that keeps thousands resident)."""

    def __init__(self) -> None:
        self.rows: dict[int, tuple[FloatArray, FloatArray]] = {}


_SCRATCH = _ScratchRows()


def _scratch_row(p: int) -> tuple[FloatArray, FloatArray]:
    """The (1, p + 1) Fortran-ordered scratch row and its contiguous φ part."""
    rows = _SCRATCH.rows
    pair = rows.get(p)
    if pair is None:
        row = np.zeros((1, p + 1), order="F")
        pair = rows[p] = (row, row[0, :p])
    return pair


def dot(x: FloatArray, y: FloatArray) -> float:
    """x·y with the bits of `float(x.dot(y))`: ddot, or the product of a one-element pair
    (numpy's scalar case; ddot would turn a −0.0 product into +0.0)."""
    if len(x) > 1:
        result: float = _ddot(x, y)
        return result
    return x.item(0) * y.item(0)


#: Below this many numbers a Python loop over floats is cheaper than making arrays for
#: ddot. On the OpenBLAS x86-64 kernels seen here it also gives ddot's bits (they add
#: short vectors left to right; the vector kernel takes blocks of 16), but that is the
#: BLAS's choice, not a promise: nothing relies on it, and `tests/test_estimator.py` checks
#: both against the error bound of a dot product instead.
SEQUENTIAL_BELOW = 16


def sequential_dot(x: Sequence[float], y: Sequence[float]) -> float:
    """Σ xᵢ·yᵢ of Python floats, left to right (one element: the bare product, as numpy)."""
    if len(x) == 1:
        return x[0] * y[0]
    total = 0.0
    for i in range(len(x)):  # indexing: half the cost of zip(x, y, strict=True) here
        total += x[i] * y[i]
    return total


def _absorb(factor: FloatArray, rows: FloatArray) -> FloatArray:
    """Return R of QR([factor; rows]) for upper-triangular `factor`; `rows` is destroyed.

    A Fortran-ordered `factor` is overwritten in place and returned (f2py's overwrite_a).
    """
    n = factor.shape[0]
    result, _, _, info = _dtpqrt(0, n, factor, rows, 1, 1)
    if info != 0:  # only for malformed arguments, which would be a bug here
        raise RuntimeError(f"dtpqrt failed with info={info}")
    return np.asarray(result)


def _triangle(stack: FloatArray) -> FloatArray:
    """Return the (n, n) R factor (Fortran order) of a tall stacked matrix."""
    n = stack.shape[1]
    qr, _, _, info = lapack.dgeqrf(np.asfortranarray(stack), overwrite_a=1)
    if info != 0:
        raise RuntimeError(f"dgeqrf failed with info={info}")
    return np.asfortranarray(np.triu(qr[:n]))


def _finite_positive(name: str, value: float | None) -> float | None:
    if value is None:
        return None
    value = float(value)
    if not math.isfinite(value) or value <= 0:
        raise InputError(f"{name} must be a positive number of seconds, got {value!r}")
    return value


def _per_term(name: str, value: ArrayLike, p: int, *, positive: bool) -> FloatArray:
    array = np.asarray(value, dtype=float)
    if array.ndim == 0:
        array = np.full(p, float(array))
    if array.shape != (p,) or not np.all(np.isfinite(array)) or (positive and np.any(array <= 0)):
        need = "positive" if positive else "finite"
        raise InputError(f"{name} must be one {need} number or {p} of them, got {value!r}")
    return np.array(array, dtype=np.float64)


class RecursiveEstimator:
    """Weighted recursive least squares with forgetting per unit of time and a lasting prior.

    Settings are public (`n_terms`, `half_life`, `window`, `prior_sd`, `prior_mean`,
    `column_scale`), learned state is private. Times are seconds since the channel's epoch.

    >>> est = RecursiveEstimator(2, half_life=7 * 86400.0)
    >>> for minute in range(600):
    ...     t = 60.0 * minute
    ...     _ = est.update([1.0, t / 86400.0], 2.0 + 0.5 * t / 86400.0, time=t)
    >>> [round(float(c), 6) for c in est.coefficients]
    [2.0, 0.5]
    >>> est.variance([1.0, 0.0]) < 1.0
    True
    """

    __slots__ = (
        "_back",
        "_back_rows",
        "_checkpoints",
        "_count",
        "_f",
        "_front_rows",
        "_front_times",
        "_front_weights",
        "_g",
        "_g_time",
        "_head",
        "_information",
        "_inner",
        "_inner_block",
        "_penalty",
        "_prior_center",
        "_prior_ref_time",
        "_prior_ref_weight",
        "_prior_root",
        "_prior_rows",
        "_r",
        "_scale",
        "_scale_outer",
        "_shape",
        "_theta",
        "_time",
        "_top_up_after",
        "_z",
        "column_scale",
        "half_life",
        "n_terms",
        "prior_mean",
        "prior_sd",
        "window",
    )

    def __init__(
        self,
        n_terms: int,
        *,
        half_life: float | None = None,
        window: float | None = None,
        prior_sd: float | ArrayLike = 1e3,
        prior_mean: ArrayLike | None = None,
        column_scale: ArrayLike | None = None,
    ) -> None:
        if (
            isinstance(n_terms, bool)
            or not isinstance(n_terms, int)
            or not (1 <= n_terms <= _MAX_TERMS)
        ):
            raise InputError(f"n_terms must be an integer from 1 to {_MAX_TERMS}, got {n_terms!r}")
        if half_life is not None and window is not None:
            raise InputError("give either half_life or window, not both")
        p = n_terms
        self.n_terms = p
        self.half_life = _finite_positive("half_life", half_life)
        self.window = _finite_positive("window", window)
        self.prior_sd = _per_term("prior_sd", prior_sd, p, positive=True)
        self.prior_mean = _per_term(
            "prior_mean", np.zeros(p) if prior_mean is None else prior_mean, p, positive=False
        )
        self.column_scale = (
            None
            if column_scale is None
            else _per_term("column_scale", column_scale, p, positive=True)
        )
        self._scale = np.ones(p) if self.column_scale is None else self.column_scale
        # Prior rows in internal units: (1/(sd·s))·xⱼ ≈ mean/sd, with x = θ·s.
        self._prior_rows = np.zeros((p, p + 1), order="F")
        self._prior_rows[:, :p] = np.diag(1.0 / (self.prior_sd * self._scale))
        self._prior_rows[:, p] = self.prior_mean / self.prior_sd
        self._prior_center = self.prior_mean * self._scale  # prior mean, internal units
        self._prior_root = 1.0 / (self.prior_sd * self._scale)  # Λ, internal units
        # Shared by every copy of a template's estimator until a re-zero (`shift`) gives one
        # its own (~0.7 KB a channel); read-only, so an in-place change fails loudly.
        _read_only(self.prior_mean, self._prior_rows, self._prior_center)
        self._shape = (p,)
        self._scale_outer = np.outer(self._scale, self._scale)
        self._time: float | None = None
        self._top_up_after = (
            math.inf if self.half_life is None else self.half_life * math.log2(1.0 + PRIOR_TOP_UP)
        )
        self.reset()

    # ------------------------------------------------------------------ state
    def reset(self) -> None:
        """Forget every sample (e.g. after a recalibration); keep the settings and the clock."""
        p = self.n_terms
        self._factor = self._prior_factor()
        self._prior_ref_weight = 1.0  # prior weight a(t) = ref_weight·2^(−(t − ref_time)/h)
        self._prior_ref_time = self._time
        self._count = 0.0
        self._information = 0.0
        if self.window is not None:
            self._back = self._factor.copy(order="F")
            self._back_rows: list[tuple[float, float, FloatArray]] = []
            self._front_times = np.zeros(0)
            self._front_weights = np.zeros(0)
            self._front_rows = np.zeros((0, p + 1))
            self._head = 0
            self._checkpoints: list[FloatArray] = []
            self._inner: list[FloatArray] = []
            self._inner_block = -1

    @property
    def _factor(self) -> FloatArray:
        """F = [[R, z], [0, ρ]] at the current time, Fortran order; LAPACK works on it in place.

        Stored as F = g·G: forgetting only lowers the number g, and the hot path absorbs
        each row divided by g into G, which saves a pass over F per sample (a uniform
        scaling leaves every rotation and solve as it was). Reading `_factor` multiplies g
        into G, so in-place changes to the returned array are changes of the state.
        """
        self._settle()
        return self._f

    @_factor.setter
    def _factor(self, value: FloatArray) -> None:
        """Set F as the factor at the current `_time` (set the time first)."""
        p = self.n_terms
        self._f = np.asfortranarray(value)
        self._r = self._f[:, :p]  # R with its leading dimension p + 1, as dtrtrs takes it
        self._z = self._f[:p, p]
        self._g, self._g_time = 1.0, self._time
        self._changed()

    def settle(self) -> None:
        """Multiply the pending forgetting into the factor now (see `_factor`).

        Afterwards the state is exactly what `to_state` saves, so a caller that settles
        after every update (the channel does) continues bit for bit the same after a
        snapshot round trip. Costs one pass over the (p+1)² factor.
        """
        if self._g != 1.0:  # `_settle`, inlined: the channel calls this after every reading
            _dscal(self._g, self._f.ravel("F"))  # G is Fortran-ordered: a view, in place
            self._g, self._g_time = 1.0, self._time

    def _settle(self) -> None:
        """Multiply the pending forgetting g into G, so that G = F."""
        if self._g != 1.0:
            _dscal(self._g, self._f.ravel("F"))  # G is Fortran-ordered: a view, in place
            self._g, self._g_time = 1.0, self._time

    def _changed(self) -> None:
        """The factor changed other than by a uniform scaling: θ must be solved again.

        Forgetting scales F uniformly, which leaves θ = R⁻¹z and the prior's penalty as they
        are, so the cache survives it; every absorption, merge or shift clears it.
        """
        self._theta: FloatArray | None = None
        self._penalty = math.nan

    def _prior_factor(self) -> FloatArray:
        p = self.n_terms
        factor = np.zeros((p + 1, p + 1), order="F")
        factor[:p, :] = self._prior_rows
        return factor

    @property
    def time(self) -> float | None:
        """Time of the last update in seconds, or None before the first."""
        return self._time

    @property
    def prior_weight(self) -> float:
        """Current weight a(t) of the prior rows: 1 ≤ a ≤ 1 + PRIOR_TOP_UP (1 if not forgetting)."""
        if self.half_life is None or self._time is None or self._prior_ref_time is None:
            return self._prior_ref_weight
        age = self._time - self._prior_ref_time
        return float(self._prior_ref_weight * 2.0 ** (-age / self.half_life))

    @property
    def effective_n(self) -> float:
        """Number of learnt rows (weight > 0), each counted 2^(−age/h) or 1 in the window."""
        return self._count

    @property
    def information_count(self) -> float:
        """Sum of learnt weights, each times 2^(−age/h) (or 1 in the window)."""
        return self._information

    # ------------------------------------------------------------- updating
    def update(
        self, phi: ArrayLike, y: float, weight: float = 1.0, time: float | None = None
    ) -> Innovation:
        """Learn one row φ, y with `weight` at `time` (s; None: the last update's time).

        Returns the innovation (before learning). A weight of 0 advances the clock only.
        """
        # The hot path: every check comes before any state changes, and the finiteness of φ
        # is read off φᵀPφ, which the innovation needs anyway (R is finite and non-singular,
        # so a NaN or infinity in φ always shows there).
        x = np.asarray(phi, dtype=float)
        if x.shape != self._shape:
            raise InputError(f"phi must hold {self.n_terms} numbers, got shape {x.shape}")
        if self.column_scale is not None:
            x = x / self._scale
        y, weight = float(y), float(weight)
        if not math.isfinite(y):
            raise InputError(f"y must be a finite number, got {y!r}")
        if not math.isfinite(weight) or weight < 0:
            raise InputError(f"weight must be a finite number >= 0, got {weight!r}")
        moment = self._checked_time(time)
        a = _dtrtrs(self._r, x, 0, 1)[0]  # a = G⁻ᵀφ (R = g·G), before forgetting
        quadratic: float = _ddot(a, a)  # φᵀPφ = ‖R⁻ᵀφ‖² = ‖G⁻ᵀφ‖² / g²
        if not math.isfinite(quadratic):
            raise InputError("phi must be finite numbers (no NaN, no infinity, not above 1e150)")
        if self._advance(moment):  # the prior was topped up or rows left the window
            a = _dtrtrs(self._r, x, 0, 1)[0]
            quadratic = _ddot(a, a)
        innovation = self._innovation(x, y, quadratic / (self._g * self._g))
        if weight > 0:
            self._learn(x, y, weight)
        return innovation

    def innovation(self, phi: ArrayLike, y: float) -> Innovation:
        """The innovation of φ, y against the current estimate, without learning anything."""
        x = self._internal(phi)
        a = _dtrtrs(self._r, x, 0, 1)[0]
        return self._innovation(x, float(y), _ddot(a, a) / (self._g * self._g))

    def _internal(self, phi: ArrayLike) -> FloatArray:
        x = np.asarray(phi, dtype=float)
        if x.shape != (self.n_terms,):
            raise InputError(f"phi must hold {self.n_terms} numbers, got shape {x.shape}")
        if not math.isfinite(float(x @ x)):
            raise InputError("phi must be finite numbers (no NaN, no infinity, not above 1e150)")
        return x if self.column_scale is None else x / self._scale

    def _checked_time(self, time: float | None) -> float:
        if time is None:
            return 0.0 if self._time is None else self._time
        time = float(time)
        if not math.isfinite(time):
            raise InputError(f"time must be a finite number of seconds, got {time!r}")
        if self._time is not None and time < self._time:
            raise InputError(
                f"time {time!r} is before the last update at {self._time!r}; give samples in order"
            )
        return time

    def _advance(self, time: float) -> bool:
        """Bring the state to `time`: forgetting and prior top-up, or window expiry.

        Returns True if G changed (forgetting only changes g, which leaves θ as it is).
        """
        if self._time is None:
            self._time = self._g_time = time
            self._prior_ref_time = time
            return False
        changed = False
        if self.window is not None:
            changed = self._expire(time - self.window)
        elif self.half_life is not None and time > self._time:
            decay = 2.0 ** (-(time - self._time) / self.half_life)
            self._count *= decay
            self._information *= decay
            assert self._g_time is not None
            # F ← √λ·F as g = 2^(−(t − t_g)/2h): computed, not multiplied up, so it has
            # no rounding drift; multiplied into G long before 1/g could overflow.
            self._g = 2.0 ** (-(time - self._g_time) / (2.0 * self.half_life))
            if self._g < _G_FLOOR:
                self._time = time
                self._settle()
        self._time = time
        assert self._prior_ref_time is not None
        if time - self._prior_ref_time > self._top_up_threshold(self._prior_ref_weight):
            self._top_up_prior()
            changed = True
        return changed

    def _top_up_threshold(self, ref_weight: float) -> float:
        """Top up when the time since the reference exceeds this (replay makes the same test)."""
        if self.half_life is None:
            return math.inf
        return 0.0 if ref_weight == 1.0 else self._top_up_after

    def _top_up_prior(self) -> None:
        amount = 1.0 + PRIOR_TOP_UP - self.prior_weight
        rows = np.asfortranarray(math.sqrt(amount) * self._prior_rows)
        self._factor = _absorb(self._factor, rows)
        self._prior_ref_weight = 1.0 + PRIOR_TOP_UP
        self._prior_ref_time = self._time

    def _innovation(self, x: FloatArray, y: float, baseline_variance: float) -> Innovation:
        """The innovation of internal-unit x, y given φᵀPφ (`baseline_variance`)."""
        theta = self._theta
        if theta is None:
            theta = self._solve()
        prediction = dot(x, theta)  # φᵀθ
        sd = self._residual_sd(self._penalty)
        variance = sd * sd * (1.0 + baseline_variance)
        residual = y - prediction
        standardised = residual / math.sqrt(variance) if variance > 0 else math.nan
        # The named tuple made without its generated __new__ (a Python-level call)
        return _new_tuple(
            Innovation, (prediction, residual, baseline_variance, variance, standardised)
        )

    def _learn(self, x: FloatArray, y: float, weight: float) -> None:
        p = self.n_terms
        root = math.sqrt(weight) / self._g  # G absorbs the row divided by g
        row, row_x = _scratch_row(p)
        _dscal(root, _dcopy(x, row_x))  # x·root into the row's view, in place
        row[0, p] = y * root
        if self.window is not None:
            assert self._time is not None
            self._back_rows.append((self._time, weight, row[0].copy()))
            self._back = _absorb(self._back, row.copy(order="F"))
        # In place (G is Fortran-ordered float64), so the views of R and z stay valid.
        info = _dtpqrt(0, p + 1, self._f, row, 1, 1)[3]
        if info != 0:  # only for malformed arguments, which would be a bug here
            raise RuntimeError(f"dtpqrt failed with info={info}")
        self._theta = None
        self._count += 1.0
        self._information += weight

    # ------------------------------------------------------ exact window
    def _expire(self, cutoff: float) -> bool:
        """Drop every row with time ≤ cutoff; the window is (t − window, t]. True if any."""
        expired = False
        while True:
            if self._head == len(self._front_times):
                if not self._back_rows or self._back_rows[0][0] > cutoff:
                    break
                self._flip()
            if self._front_times[self._head] > cutoff:
                break
            self._count -= 1.0
            self._information -= self._front_weights[self._head]
            self._head += 1
            expired = True
        if expired:
            self._factor = self._merged()
            if self._head == len(self._front_times) and not self._back_rows:
                self._count, self._information = 0.0, 0.0  # no drift from repeated subtraction
        return expired

    def _flip(self) -> None:
        """Move the back's rows to the front and checkpoint their suffix factors."""
        rows = self._back_rows
        self._front_times = np.array([r[0] for r in rows])
        self._front_weights = np.array([r[1] for r in rows])
        self._front_rows = np.array([r[2] for r in rows]).reshape(len(rows), self.n_terms + 1)
        self._back_rows = []
        self._back = self._prior_factor()
        self._head = 0
        n1 = self.n_terms + 1
        n_blocks = -(-len(rows) // _BLOCK)
        checkpoints = [np.zeros((n1, n1), order="F")]
        for block in range(n_blocks - 1, -1, -1):  # suffix of block b = its rows ⊕ suffix b+1
            stack = np.vstack(
                [self._front_rows[block * _BLOCK : (block + 1) * _BLOCK], checkpoints[-1]]
            )
            checkpoints.append(_triangle(stack))
        self._checkpoints = checkpoints[::-1]  # [b] = factor of rows from b·_BLOCK to the end
        self._inner_block = -1

    def _front_suffix(self) -> FloatArray | None:
        """Factor of the front rows from the head to the end, or None if the front is empty."""
        if self._head == len(self._front_times):
            return None
        block = self._head // _BLOCK
        if block != self._inner_block:  # suffixes inside this block, by a backward sweep
            first, last = block * _BLOCK, min((block + 1) * _BLOCK, len(self._front_times))
            factor = self._checkpoints[block + 1].copy(order="F")
            inner = []
            for index in range(last - 1, first - 1, -1):
                # A copy of the row: LAPACK overwrites what it absorbs, and a one-row slice
                # is already Fortran-contiguous, so asfortranarray would hand over the row
                # itself (the window's rows are read again by `shift` and `to_state`).
                row = np.array(self._front_rows[index : index + 1], order="F")
                factor = _absorb(factor.copy(order="F"), row)
                inner.append(factor)
            self._inner = inner[::-1]
            self._inner_block = block
        return self._inner[self._head - block * _BLOCK]

    def _merged(self) -> FloatArray:
        suffix = self._front_suffix()
        merged = self._back.copy(order="F")
        return merged if suffix is None else _absorb(merged, suffix.copy(order="F"))

    # ------------------------------------------------------------ results
    def _solved(self) -> tuple[FloatArray, float]:
        """θ = R⁻¹z (internal units; do not modify) and the prior's penalty ‖Λ(θ − μ)‖².

        Solved once per change of the factor: the channel asks for the coefficients, the
        prediction and σ̂ after every update, and the next innovation needs them again.
        """
        theta = self._theta
        if theta is None:
            theta = self._solve()
        return theta, self._penalty

    def _solve(self) -> FloatArray:
        """Solve θ = R⁻¹z = G⁻¹z_G and the penalty into the cache; return θ."""
        theta: FloatArray = _dtrtrs(self._r, self._z)[0]
        if self.n_terms < SEQUENTIAL_BELOW:  # without two numpy operations
            penalty = 0.0
            values = theta.tolist()
            centers, roots = self._prior_center.tolist(), self._prior_root.tolist()
            for i in range(len(values)):
                offset = (values[i] - centers[i]) * roots[i]
                penalty += offset * offset
        else:
            offsets = theta - self._prior_center
            offsets *= self._prior_root
            penalty = _ddot(offsets, offsets)
        self._theta, self._penalty = theta, penalty
        return theta

    def _solution(self) -> FloatArray:
        return self._solved()[0]

    @property
    def coefficients(self) -> FloatArray:
        """θ in the user's units (internal column scaling undone); a new array each call."""
        theta = self._solution()
        # Copied, not divided by ones, when there is no column scale: the same numbers.
        result: FloatArray = theta.copy() if self.column_scale is None else theta / self._scale
        return result

    def solution(self) -> tuple[FloatArray, float]:
        """(`coefficients`, `residual_sd`) in one call: what the channel reads after every
        update (θ is solved once per change of the factor either way)."""
        theta = self._theta  # `_solved`, inlined: this runs after every reading
        if theta is None:
            theta = self._solve()
        coefficients = theta.copy() if self.column_scale is None else theta / self._scale
        return coefficients, self._residual_sd(self._penalty)

    @property
    def covariance(self) -> FloatArray:
        """P = info⁻¹ in the user's units (unscaled by σ̂²; multiply by σ̂² for Cov(θ))."""
        p = self.n_terms
        inverse = lapack.dtrtri(self._factor[:p, :p])[0]  # R⁻¹; P = R⁻¹R⁻ᵀ
        covariance = inverse @ inverse.T
        return np.asarray(covariance / self._scale_outer)

    def predict(self, phi: ArrayLike) -> float:
        """Baseline φᵀθ."""
        return float(self._internal(phi) @ self._solution())

    def variance(self, phi: ArrayLike) -> float:
        """φᵀPφ with P = (Σ w·2^(−age/h)·φφᵀ + a·diag(prior_sd)⁻²)⁻¹, *not* multiplied by σ̂².

        The published uncertainty of the baseline is √variance(φ)·residual_sd.
        """
        a = _dtrtrs(self._r, self._internal(phi), 0, 1)[0]
        result: float = _ddot(a, a) / (self._g * self._g)
        return result

    def spread(self, phi: FloatArray) -> tuple[float, FloatArray]:
        """(φᵀPφ, P·φ) for one row φ in the user's units, *not* multiplied by σ̂².

        Two triangular solves: a = R⁻ᵀφ gives φᵀPφ = ‖a‖² (as `variance`) and Pφ = R⁻¹a,
        so P is never formed (that costs an inversion and two products, and squares the
        condition number before the quadratic form is taken). The channel needs both for
        its uncertainties after every reading.
        """
        x = phi if self.column_scale is None else phi / self._scale
        p = self.n_terms
        a = _dtrtrs(self._r, x, 0, 1)[0]  # G⁻ᵀx = g·R⁻ᵀx (R = g·G, see `_factor`)
        g2 = self._g * self._g
        quadratic: float = _ddot(a, a) / g2
        # In place: a (a new array) is not needed again; lda positional, as overwrite_b is
        solved: FloatArray = _dtrtrs(self._r, a, 0, 0, 0, p + 1, 1)[0]  # G⁻¹G⁻ᵀx = g²·P·x
        if self.column_scale is not None:
            solved /= g2 * self._scale
        elif g2 != 1.0:  # the channel settles g into G after every reading
            solved /= g2
        return quadratic, solved

    def information_matrix(self) -> FloatArray:
        """info = RᵀR = Σ w·2^(−age/h)·φφᵀ + prior, in the user's units.

        With a second estimator fed w² (and half the half-life) this gives the sandwich
        variance of a weighted estimate: gᵀP·info₂·Pg.
        """
        p = self.n_terms
        r = self._factor[:p, :p] * self._scale[None, :]
        return np.asarray(r.T @ r)

    @property
    def residual_sd(self) -> float:
        """σ̂ = √(Σ w·2^(−age/h)·r² / (effective_n − p)) at the current θ; NaN until n > p."""
        if self._count <= self.n_terms:
            return math.nan
        return self._residual_sd(self._solved()[1])

    def _residual_sd(self, penalty: float) -> float:
        """σ̂ given the prior's penalty at θ: the data's part of ρ² = min objective."""
        p = self.n_terms
        count = self._count
        if count <= p:
            return math.nan
        rho = self._g * self._f.item(p, p)  # a Python float: cheaper arithmetic, same bits
        # `prior_weight`, inlined (this runs twice per sample): the same expression
        weight, half_life = self._prior_ref_weight, self.half_life
        now, reference = self._time, self._prior_ref_time
        if half_life is not None and now is not None and reference is not None:
            weight *= 2.0 ** (-(now - reference) / half_life)
        rss = rho * rho - weight * penalty
        # max(rss, 0.0) as a comparison (the builtin call costs more than the rest here)
        return math.sqrt((0.0 if rss < 0.0 else rss) / (count - p))

    def condition_number(self) -> float:
        """2-norm condition number of R after scaling its columns to unit length.

        Scaling-invariant, so it measures collinearity of the terms, not their units; it
        includes the prior, so a never-excited term shows as (prior-limited) ill-conditioning.
        """
        p = self.n_terms
        r = self._factor[:p, :p]
        squares = r * r
        norms = np.sqrt(squares.sum(axis=0))
        # np.linalg.cond's own 2-norm formula σ_max/σ_min (a singular R gives inf, 0/0 too),
        # with the singular values from LAPACK dgesdd directly: the routine numpy's svd
        # calls (the same values), without the wrappers, which cost twice the SVD itself
        _, singular, _, info = lapack.dgesdd(r / norms, 0)
        if info > 0:
            raise np.linalg.LinAlgError("SVD did not converge")
        largest, smallest = singular.item(0), singular.item(p - 1)
        if smallest == 0.0:
            return math.inf
        ratio: float = largest / smallest
        return math.inf if math.isnan(ratio) else ratio

    def shift(self, term: int, delta: float) -> None:
        """Re-zero: add `delta` to coefficient `term` keeping every other coefficient and P.

        As if every learnt y (and the prior mean) had been shifted by delta·φ_term: a
        technician's re-zero moves the constant term without losing the learnt shape.
        """
        if not 0 <= term < self.n_terms or not math.isfinite(delta):
            raise InputError(f"shift needs a term index below {self.n_terms} and a finite delta")
        p = self.n_terms
        moved = delta * self._scale[term]  # in internal units
        # New arrays, not changes in place: the old ones may be shared with other channels.
        self.prior_mean = self.prior_mean.copy()
        self.prior_mean[term] += delta
        self._prior_rows = np.array(self._prior_rows, order="F")
        self._prior_rows[:, p] += moved * self._prior_rows[:, term]
        self._prior_center = self._prior_center.copy()
        self._prior_center[term] += moved
        _read_only(self.prior_mean, self._prior_rows, self._prior_center)
        if self.window is None:
            self._factor[:p, p] += moved * self._factor[:p, term]  # z ← z + R·Δx
            self._changed()
            return
        rows = self._window_rows()
        rows[:, 2 + p] += moved * rows[:, 2 + term]
        self._rebuild_window(rows)

    # ------------------------------------------------------- serialising
    def to_state(self) -> dict[str, Any]:
        """A JSON-able dict of settings and learnt state (about 1 KB at p = 6 with half_life).

        With a window the rows inside it are included (the exact window needs them).
        """
        p = self.n_terms
        upper = self._factor[np.triu_indices(p + 1)]
        state: dict[str, Any] = {
            "version": STATE_VERSION,
            "n_terms": p,
            "half_life": self.half_life,
            "window": self.window,
            "prior_sd": self.prior_sd.tolist(),
            "prior_mean": self.prior_mean.tolist(),
            "column_scale": None if self.column_scale is None else self.column_scale.tolist(),
            "factor": upper.tolist(),
            "time": self._time,
            "prior_ref": [self._prior_ref_weight, self._prior_ref_time],
            "count": self._count,
            "information": self._information,
        }
        if self.window is not None:
            state["rows"] = self._window_rows().tolist()
        return state

    @classmethod
    def from_state(cls, state: dict[str, Any]) -> RecursiveEstimator:
        """Rebuild an estimator from `to_state`'s dict; InputError if it is not one."""
        try:
            if state["version"] != STATE_VERSION:
                raise InputError(
                    f"estimator state version {state['version']!r} is not {STATE_VERSION}"
                )
            est = cls(
                state["n_terms"],
                half_life=state["half_life"],
                window=state["window"],
                prior_sd=state["prior_sd"],
                prior_mean=state["prior_mean"],
                column_scale=state["column_scale"],
            )
            p = est.n_terms
            factor = np.zeros((p + 1, p + 1), order="F")
            factor[np.triu_indices(p + 1)] = np.asarray(state["factor"], dtype=float)
            ref_weight, ref_time = state["prior_ref"]
            est._time = None if state["time"] is None else float(state["time"])
            est._prior_ref_weight = float(ref_weight)
            est._prior_ref_time = None if ref_time is None else float(ref_time)
            est._count = float(state["count"])
            est._information = float(state["information"])
            if not np.all(np.isfinite(factor)):
                raise InputError("estimator state holds a non-finite factor")
            est._factor = factor
            if est.window is not None:
                est._rebuild_window(np.asarray(state["rows"], dtype=float).reshape(-1, p + 3))
        except (KeyError, TypeError, ValueError) as error:
            raise InputError(
                f"not a saved estimator state ({error}); use to_state()'s dict"
            ) from None
        return est

    # ------------------------------------------------- cheap copies, packed state
    def blank_copy(self) -> RecursiveEstimator:
        """A new estimator with this one's settings and prior and none of its samples.

        Much cheaper than the constructor (no validation, shared read-only settings): a
        channel template keeps one pristine estimator and copies it for every channel.
        Arrays that any method changes in place are the copy's own.
        """
        new = shallow_copy(self)
        # Arrays that methods change in place are the copy's own (LAPACK changes the
        # factor); the prior's are shared and read-only (`shift` replaces them).
        if self._time is None and self.window is None:  # never fed: the factor is the prior's
            new._factor = np.array(self._f, order="F")
        else:
            new._time = None
            new.reset()
        return new

    def _window_state(self) -> dict[str, Any]:
        """The exact window's queue, which has no fixed size: a JSON-able side entry."""
        return {
            "back": self._back.tolist(),
            "back_rows": [[t, w, *row.tolist()] for t, w, row in self._back_rows],
            "front_times": self._front_times.tolist(),
            "front_weights": self._front_weights.tolist(),
            "front_rows": self._front_rows.tolist(),
            "head": self._head,
            "checkpoints": [c.tolist() for c in self._checkpoints],
            # The suffixes of the head's block are kept as computed (rebuilding them from
            # the rows would round differently).
            "inner": [c.tolist() for c in self._inner],
            "inner_block": self._inner_block,
        }

    def _load_window_state(self, state: dict[str, Any]) -> None:
        p1 = self.n_terms + 1
        self._back = np.array(state["back"], dtype=np.float64, order="F").reshape(p1, p1)
        self._back_rows = [
            (float(r[0]), float(r[1]), np.array(r[2:], dtype=np.float64))
            for r in state["back_rows"]
        ]
        self._front_times = np.array(state["front_times"], dtype=np.float64)
        self._front_weights = np.array(state["front_weights"], dtype=np.float64)
        self._front_rows = np.array(state["front_rows"], dtype=np.float64).reshape(-1, p1)
        self._head = int(state["head"])
        self._checkpoints = [
            np.array(c, dtype=np.float64, order="F").reshape(p1, p1) for c in state["checkpoints"]
        ]
        self._inner = [
            np.array(c, dtype=np.float64, order="F").reshape(p1, p1) for c in state["inner"]
        ]
        self._inner_block = int(state["inner_block"])

    def _window_rows(self) -> FloatArray:
        """Rows in the window as (time, weight, √w·x..., √w·y), oldest first."""
        p = self.n_terms
        front = np.column_stack([self._front_times, self._front_weights, self._front_rows])[
            self._head :
        ]
        back = [np.concatenate(([t, w], row)) for t, w, row in self._back_rows]
        return np.vstack([front.reshape(-1, p + 3), np.array(back).reshape(-1, p + 3)])

    def _rebuild_window(self, rows: FloatArray) -> None:
        time = self._time
        self.reset()
        self._time = time
        self._back_rows = [(float(r[0]), float(r[1]), r[2:].copy()) for r in rows]
        if len(rows):
            self._back = _triangle(np.vstack([rows[:, 2:], self._back]))
        self._factor = self._back.copy(order="F")
        self._count = float(np.count_nonzero(rows[:, 1] > 0))
        self._information = float(np.sum(rows[:, 1]))


def packed_layout(n_terms: int) -> list[tuple[str, int]]:
    """Fields (name, number of float64 values) of `pack_estimators`, in order."""
    p = n_terms
    return [
        ("estimator.factor", (p + 1) * (p + 2) // 2),
        ("estimator.clock", len(_CLOCK)),
        ("estimator.prior_mean", p),
        ("estimator.prior_column", p),
        ("estimator.prior_center", p),
        ("estimator.solution", p + 2),
    ]


#: The scalars of "estimator.clock"; None is stored as NaN (no time is NaN).
_CLOCK = ("g", "g_time", "time", "prior_ref_weight", "prior_ref_time", "count", "information")

#: Field index of "estimator.prior_mean" in `packed_layout`: it, prior_column and
#: prior_center follow one another (unpacking compares the three at once).
_PRIOR_FIRST = [name for name, _ in packed_layout(1)].index("estimator.prior_mean")


def pack_estimators(
    estimators: Sequence[RecursiveEstimator],
) -> tuple[FloatArray, list[dict[str, Any] | None]]:
    """Every estimator's learnt state as one row of float64 (`packed_layout`), plus a
    JSON-able side entry for what has no fixed size (an exact window's queue).

    The factor is stored as kept, F = g·G with g apart, so packing changes nothing and
    the restored estimator continues bit for bit; so is the cached solution θ.
    """
    p = estimators[0].n_terms
    n = len(estimators)
    upper = upper_triangle(p + 1)
    # np.concatenate of flat views is several times faster than np.stack of 10,000 small
    # arrays (bench/snapshot.py); the factor is Fortran-ordered, so ravel("F") is a view
    # and reshaping the result by rows gives each estimator's Fᵀ.
    factors = np.concatenate([e._f.ravel("F") for e in estimators]).reshape(n, p + 1, p + 1)
    factors = factors[:, upper[1], upper[0]]
    clock = np.array(
        [
            (
                e._g,
                number(e._g_time),
                number(e._time),
                e._prior_ref_weight,
                number(e._prior_ref_time),
                e._count,
                e._information,
            )
            for e in estimators
        ],
        dtype=np.float64,
    ).reshape(n, len(_CLOCK))
    missing = np.full(p, math.nan)
    solution = np.empty((n, p + 2))
    solution[:, 0] = [e._theta is not None for e in estimators]
    solution[:, 1] = [e._penalty if e._theta is not None else math.nan for e in estimators]
    solution[:, 2:] = _rows([missing if e._theta is None else e._theta for e in estimators], p)
    block = np.hstack(
        [
            factors,
            clock,
            _rows([e.prior_mean for e in estimators], p),
            _rows([e._prior_rows[:, p] for e in estimators], p),
            _rows([e._prior_center for e in estimators], p),
            solution,
        ]
    )
    sides = [None if e.window is None else e._window_state() for e in estimators]
    return block, sides


@functools.lru_cache(maxsize=64)
def _field_bounds(p: int) -> tuple[int, ...]:
    """Where each field of `packed_layout(p)` starts, and the row's width last."""
    return tuple(itertools.accumulate((width for _, width in packed_layout(p)), initial=0))


def _read_only(*arrays: FloatArray) -> None:
    for array in arrays:
        array.setflags(write=False)


def _rows(vectors: Sequence[FloatArray], size: int) -> FloatArray:
    """Vectors of `size` numbers as the rows of one array (faster than np.stack)."""
    return np.concatenate(vectors).reshape(len(vectors), size)


def unpack_estimators(
    prototype: RecursiveEstimator,
    block: FloatArray,
    sides: Sequence[dict[str, Any] | None],
) -> list[RecursiveEstimator]:
    """Estimators with `prototype`'s settings and the learnt state of `pack_estimators`'
    rows; InputError if the rows cannot be such a state.

    The arrays of all estimators are made at once, each estimator's being views of its
    own part of them (Fortran-ordered where LAPACK works on them in place).
    """
    p = prototype.n_terms
    n = block.shape[0] if block.ndim == 2 else 0
    bounds = _field_bounds(p)
    if block.ndim != 2 or block.shape[1] != bounds[-1]:
        raise InputError(f"packed estimator rows need {bounds[-1]} values at p = {p}")
    block = np.array(block, dtype=np.float64)
    parts = [block[:, start:stop] for start, stop in itertools.pairwise(bounds)]
    packed_factor, clock, prior_mean, prior_column, prior_center, solution = parts
    if not np.isfinite(packed_factor).all():
        raise InputError("estimator state holds a non-finite factor")
    upper = upper_triangle(p + 1)
    factors = np.zeros((n, p + 1, p + 1))  # each [i] is Fᵀ, so [i].T is F in Fortran order
    factors[:, upper[1], upper[0]] = packed_factor
    # Most channels still have the template's prior (only a re-zero moves it): they share
    # the prototype's read-only arrays instead of holding copies. Compared as bytes: bit
    # for bit (0.0 and -0.0 differ), and one comparison a row.
    template_prior = np.concatenate(
        (prototype.prior_mean, prototype._prior_rows[:, p], prototype._prior_center)
    ).tobytes()
    priors = block[:, bounds[_PRIOR_FIRST] : bounds[_PRIOR_FIRST + 3]]
    own_prior = [row.tobytes() != template_prior for row in priors]
    valid = (solution[:, 0] == 1.0).tolist()
    penalties = solution[:, 1].tolist()
    result = []
    for i, (g, g_time, time, ref_weight, ref_time, count, information) in enumerate(clock.tolist()):
        est = shallow_copy(prototype)
        if own_prior[i]:
            est._prior_rows = np.array(prototype._prior_rows, order="F")
            est._prior_rows[:, p] = prior_column[i]
            est._prior_center, est.prior_mean = prior_center[i].copy(), prior_mean[i].copy()
            _read_only(est.prior_mean, est._prior_rows, est._prior_center)
        est._time = optional(time)
        est._factor = factors[i].T
        est._g, est._g_time = g, optional(g_time)
        est._prior_ref_weight, est._prior_ref_time = ref_weight, optional(ref_time)
        est._count, est._information = count, information
        if valid[i]:  # a copy: a view would keep this whole block of rows alive
            est._theta, est._penalty = solution[i, 2:].copy(), penalties[i]
        if est.window is not None:
            side = sides[i]
            if side is None:
                raise InputError("a windowed estimator's state lacks its window rows")
            est._load_window_state(side)
        result.append(est)
    return result


def __getattr__(name: str) -> Any:
    """`replay_batch` and `ReplayResult` live in estimator_replay, which imports this module;
    importing them lazily (PEP 562) keeps `from zeroline.estimator import replay_batch`
    working whichever module is imported first."""
    if name in ("replay_batch", "ReplayResult"):
        from zeroline import estimator_replay

        return getattr(estimator_replay, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


__all__: Sequence[str] = [
    "PRIOR_TOP_UP",
    "Innovation",
    "RecursiveEstimator",
    "ReplayResult",
    "replay_batch",
]
