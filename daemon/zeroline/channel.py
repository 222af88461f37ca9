"""Where a reading becomes a corrected reading.

One `Channel` per sensor stream. For each reading it

1. looks up the named inputs (covariates, reference) and decides what the sample can teach,
   per the learn mode (design §1):
   - `all`:       target raw − nominal, every sample;
   - `reference`: target raw − reference, only samples with a fresh reference value; with a
                  gain basis ψ the row is [ψ·reference, φ] against raw, so raw = ψᵀa·ref + φᵀθ
                  is solved as one linear least-squares problem;
   - `envelope`:  like `all`, but samples far above the current baseline get a small weight,
                  so sparse positive events (peaks, plumes) do not lift it;
   optionally with Huber weights (any mode) so one bad sample cannot drag the baseline;
2. updates the recursive estimator with that row (`zeroline.estimator`);
3. corrects: corrected = raw − baseline, or (raw − baseline)/gain, with the baseline's
   standard uncertainty σ̂·√(φᵀPφ) (delta method when a gain is fitted) and quality flags;
4. caps the correction if configured, and feeds the alert rules (`zeroline.channel_alerts`).

The channel never does I/O; the daemon and `zeroline replay` drive the same class, which is
what makes a replay a faithful rehearsal of the daemon.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from statistics import NormalDist
from typing import Any, ClassVar

import numpy as np
import numpy.typing as npt

from zeroline import quality as q
from zeroline.alerts import Crossing, crossing_time
from zeroline.basis import Basis, Point
from zeroline.channel_alerts import ChannelAlerts
from zeroline.config import ChannelConfig
from zeroline.errors import InputError
from zeroline.estimator import (
    SEQUENTIAL_BELOW,
    RecursiveEstimator,
    dot,
    pack_estimators,
    sequential_dot,
    unpack_estimators,
)
from zeroline.estimator import packed_layout as estimator_layout
from zeroline.fortran import blas
from zeroline.inputs import InputCache
from zeroline.objects import shallow_copy
from zeroline.state_layout import (
    PackedChannels,
    collector_paused,
    number,
    optional,
    rearranged,
    upper_triangle,
)

Array = npt.NDArray[np.float64]
STATE_VERSION = 1
CONTROL_EVENTS = ("recalibrated", "cleaned", "replaced")
CONDITION_EVERY = 32
FORECAST_POINTS = 200
RATE_Z = 2.0  # a drift rate counts once it is this many standard uncertainties beyond zero
INPUT_MEAN_TAU = 86400.0  # time constant of the input means that drift is judged at
# BLAS handles fetched once; positional arguments, because f2py parses keywords slower
# (and a BLAS call costs a third of a numpy call on a vector of p ≤ 12 numbers).
_dsyr, _dsymv, _ddot, _dscal = blas.dsyr, blas.dsymv, blas.ddot, blas.dscal
_NON_FINITE_ROW = "phi must be finite numbers (no NaN, no infinity, not above 1e150)"


@dataclass(frozen=True)
class Sample:
    """One raw reading of a channel: UTC epoch seconds, the value, other payload fields."""

    time: float
    value: float
    fields: Mapping[str, float] = field(default_factory=dict)


@dataclass(frozen=True)
class Corrected:
    """The outcome for one reading (the contract fields first, then diagnostics)."""

    time: float
    raw: float
    corrected: float | None
    baseline: float | None
    uncertainty: float | None
    quality: str
    quality_code: int
    flags: tuple[str, ...]
    gain: float | None
    drift_rate: float | None
    learned: bool
    coefficients: Array | None = None

    def to_json(self) -> dict[str, Any]:
        """The `<prefix>/<channel>/corrected` payload (design §4) plus diagnostic fields."""
        return {
            "time": self.time,
            "raw": self.raw,
            "corrected": _finite(self.corrected),
            "baseline": _finite(self.baseline),
            "uncertainty": _finite(self.uncertainty),
            "quality": self.quality,
            "quality_code": self.quality_code,
            "flags": list(self.flags),
            "gain": _finite(self.gain),
            "drift_rate": _finite(self.drift_rate),
        }


def _finite(value: float | None) -> float | None:
    return value if value is not None and math.isfinite(value) else None


def _published(
    time: float,
    raw: float,
    corrected: float,
    baseline: float,
    uncertainty: float,
    quality: str,
    quality_code: int,
    flags: tuple[str, ...],
    gain: float | None,
    drift_rate: float,
    learned: bool,
    coefficients: Array,
) -> Corrected:
    """`Corrected(...)` made at a third of the cost, once per reading: a frozen dataclass's
    constructor sets each of its 12 fields through `object.__setattr__`; this sets the
    instance's dict in one go. The same object (tests compare it with the constructor's)."""
    result = object.__new__(Corrected)
    object.__setattr__(
        result,
        "__dict__",
        {
            "time": time,
            "raw": raw,
            "corrected": corrected,
            "baseline": baseline,
            "uncertainty": uncertainty,
            "quality": quality,
            "quality_code": quality_code,
            "flags": flags,
            "gain": gain,
            "drift_rate": drift_rate,
            "learned": learned,
            "coefficients": coefficients,
        },
    )
    return result


@dataclass(frozen=True)
class ControlEvent:
    """A technician's action: recalibrated (mode reset|rezero), cleaned, replaced."""

    time: float
    event: str
    mode: str = "reset"

    @staticmethod
    def parse(data: Mapping[str, Any], default_time: float) -> ControlEvent:
        """From a control payload/events-file row; InputError with the fix if malformed."""
        event = data.get("event")
        if event not in CONTROL_EVENTS:
            raise InputError(
                f"control event {event!r} is not known; use one of {', '.join(CONTROL_EVENTS)}"
            )
        # A recalibration or a cleaning changes the sensor's zero, not its shape (its
        # temperature response, its creep): by default keep the shape. A new sensor starts over.
        mode = data.get("mode") or ("reset" if event == "replaced" else "rezero")
        if mode not in ("reset", "rezero"):
            raise InputError(f"control mode {mode!r} is not known; use reset or rezero")
        time = data.get("time", default_time)
        if isinstance(time, bool) or not isinstance(time, (int, float)) or not math.isfinite(time):
            raise InputError(f"control time {time!r} is not epoch seconds")
        return ControlEvent(float(time), str(event), str(mode))


class SquaredInformation:
    """FᵀW²F = Σ w²·4^(−age/h)·φφᵀ: the information of the data under squared weights,
    for the sandwich covariance P·(FᵀW²F + prior)·P of the weighted estimate.

    It is only ever used as a quadratic form (never solved), so a plain accumulation of
    rank-one terms is numerically safe; squared weights forget twice as fast. In a sliding
    window the estimator's own information is used instead (exact for unit weights).

    Only the upper triangle is kept up to date (BLAS dsyr/dsymv, one call each per
    reading, and dscal for the forgetting); `matrix()` mirrors it. The snapshot stores that
    triangle, so a restored matrix computes exactly the same quadratic forms. The matrix is
    always Fortran-ordered (an unpacked one is the transpose of a C-ordered block's
    matrix, the same symmetric values), so dsyr updates it in place and its flat view is
    a view that dscal scales in place.
    """

    __slots__ = ("_matrix", "_time", "half_life")

    def __init__(self, size: int, half_life: float | None) -> None:
        self.half_life = half_life
        self._matrix = np.zeros((size, size), order="F")  # BLAS updates it in place
        self._time: float | None = None

    def add(self, row: Array, weight_squared: float, time: float) -> None:
        if self.half_life is not None and self._time is not None:
            _dscal(4.0 ** (-(time - self._time) / self.half_life), self._matrix.ravel("K"))
        self._time = time
        self._matrix = _dsyr(weight_squared, row, 0, 1, 0, len(row), self._matrix, 1)

    def quadratic(self, solved: Array, prior_precision: float) -> float:
        """vᵀ(S + prior_precision·I)v for v = `solved` (a channel's prior SD is one number
        for every term, so its information is a multiple of the identity)."""
        # ddot even for one term, where numpy's dot would give a −0.0 product as −0.0: the
        # sum with the prior's part, a +0.0 at least, is the same either way.
        data: float = _ddot(_dsymv(1.0, self._matrix, solved), solved)
        squared: float = _ddot(solved, solved)
        return data + prior_precision * squared

    def matrix(self) -> Array:
        """S in full (the upper triangle mirrored)."""
        upper = np.triu(self._matrix)
        full: Array = upper + np.triu(upper, 1).T
        return full

    def reset(self) -> None:
        self._matrix[:] = 0.0

    def to_state(self) -> dict[str, Any]:
        upper = self._matrix[np.triu_indices(self._matrix.shape[0])]
        return {"half_life": self.half_life, "time": self._time, "upper": upper.tolist()}

    @classmethod
    def from_state(cls, state: Mapping[str, Any]) -> SquaredInformation:
        upper = np.asarray(state["upper"], dtype=np.float64)
        size = int((math.isqrt(8 * upper.size + 1) - 1) // 2)
        result = cls(size, state["half_life"])
        index = np.triu_indices(size)
        result._matrix[index] = upper
        result._matrix.T[index] = upper
        result._time = state["time"]
        return result


@dataclass(frozen=True)
class _Fit:
    """The estimator's state after a reading, read out once (each read-out costs solves).

    `sandwich` is P·(FᵀW²F + prior)·P, the covariance (over σ̂²) of the weighted estimate:
    P alone overstates the variance of a forgetting estimate by up to 2×."""

    theta: Array
    covariance: Array
    sandwich: Array
    sd: float

    def variances(self, rows: Array) -> Array:
        """gᵀ·sandwich·g for each row g (times σ̂² it is Var(gθ̂))."""
        spread: Array = np.einsum("ij,jk,ik->i", rows, self.sandwich, rows)
        return np.maximum(spread, 0.0)

    def uncertainty(self, gradient: Array) -> float:
        """σ̂·√(gᵀ·sandwich·g), the standard uncertainty of gθ̂."""
        spread = float(gradient @ self.sandwich @ gradient)
        return self.sd * math.sqrt(max(spread, 0.0))


class Channel:
    """One sensor stream's model: feed it readings with `process`, actions with `control`."""

    def __init__(self, config: ChannelConfig, name: str | None = None) -> None:
        # What is the same for every channel of a template (sizes, a pristine estimator, the
        # basis bound to the config's epoch) is made once and shared: a daemon restoring
        # 10,000 channels makes 10,000 of these (see `_TemplateParts`).
        parts = _TemplateParts.of(config)
        self._parts = parts
        self.config = config
        self.name = name or config.name
        self.learn = config.learn
        self._offset_size = parts.offset_size
        # φ·θ and the like with numpy's bits (`dot`); ddot directly where that is the same,
        # and short rows that are lists of floats by `sequential_dot` (no arrays made; the
        # same bits as ddot on the OpenBLAS kernels seen here, which nothing relies on)
        self._offset_dot = _ddot if parts.offset_size > 1 else dot
        self._offset_lists = parts.offset_size < SEQUENTIAL_BELOW
        self._gain_size = parts.gain_size
        self._min_samples = config.learn.min_samples or 2 * self.n_terms
        if parts.estimator is None:  # the first channel of the template: the long way
            parts.estimator = self._new_estimator()
        self._estimator = parts.estimator.blank_copy()
        self._squared = SquaredInformation(self.n_terms, config.memory.half_life)
        self._inputs = InputCache(parts.max_ages)
        self._epoch: float | None = config.epoch
        self._basis: Basis | None = None
        self._gain: Basis | None = None
        self._last_time = -math.inf
        self._last_useful = -math.inf
        self._condition: float | None = None
        self.last_drift: float | None = None  # at the inputs' means, as the alerts judge it
        self._input_means: dict[str, float] = {}
        self._input_stage1: dict[str, float] = {}
        self._means_time: float | None = None
        self._since_condition = 0
        self._payload_inputs = tuple(
            (spec.name, spec.field) for spec in config.inputs.values() if spec.field is not None
        )
        self._needed = parts.needed  # the named inputs the bases read
        self._prior_variance = config.memory.prior_sd**2  # one prior SD for every term
        self._windowed = config.memory.window is not None
        self.alerts = ChannelAlerts(self.name, config.alerts, cap=config.cap)
        if self._epoch is not None:
            self._bind(self._epoch)

    # --- public -------------------------------------------------------------------------

    @property
    def n_terms(self) -> int:
        return self._offset_size + self._gain_size

    @property
    def estimator(self) -> RecursiveEstimator:
        return self._estimator

    @property
    def epoch(self) -> float | None:
        return self._epoch

    @property
    def last_time(self) -> float:
        return self._last_time

    def set_input(self, name: str, time: float, value: float) -> None:
        """A value of a named input that arrived on its own topic."""
        if name in self.config.inputs:
            self._inputs.put(name, time, value)

    def process(self, sample: Sample) -> tuple[Corrected, list[Any]]:
        """Correct one reading (and learn from it if it is useful); returns alert events too.

        A reading not newer than the last one processed is the caller's to skip (the daemon
        counts those as duplicates); here it raises InputError.

        The hot path (issue 10): one pass over the basis gives the row and its slope (the
        drift at the inputs' means re-evaluates only the terms that read an input); two
        triangular solves give each variance, so P is never formed; the covariance
        matrices are read out only for a forecast. The vector operations are single BLAS
        calls on the arrays the solves return (`dot`, a third of a numpy call's cost at
        p ≤ 12, the same bits).
        """
        time = sample.time
        if time <= self._last_time:
            raise InputError(
                f"reading at {time} is not newer than the last one ({self._last_time})"
            )
        self._last_time = time
        if self._epoch is None:
            self._bind(time)
        basis = self._basis
        assert basis is not None
        fields = sample.fields
        inputs = self._inputs
        for name, key in self._payload_inputs:
            if key in fields:
                inputs.put(name, time, fields[key])
        # The inputs the basis needs. A stale input's last value is used and flagged; one
        # never seen makes the reading uncorrectable (QARTOD 9).
        found = inputs.values(self._needed, time)
        if found is None:
            flags = [q.INPUT_STALE]
            return self._uncorrectable(sample, flags), self.alerts.on_missing(time, flags)
        covariates, stale = found
        flags = [q.INPUT_STALE] if stale else []
        t = time - (self._epoch or 0.0)
        here = basis.point(t, covariates)
        phi = np.array(here[0])
        phi_squared: float = _ddot(phi, phi)  # for the finiteness check and the wind-up test
        psi = self._gain.row(t, covariates) if self._gain else None
        if self._last_useful > -math.inf and time - self._last_useful > self.learn.max_gap:
            flags.append(q.EXTRAPOLATING)  # judged before this sample teaches anything
        learned, check_error, z = self._learn(sample, t, phi, psi, phi_squared, stale)
        if learned:
            self._last_useful = time
        self._track_means(time, covariates)
        return self._after_learning(
            sample, t, here, phi, phi_squared, psi, flags, learned, check_error, z
        )

    def _after_learning(
        self,
        sample: Sample,
        t: float,
        here: Point,
        phi: Array,
        phi_squared: float,
        psi: Array | None,
        flags: list[str],
        learned: bool,
        check_error: float | None,
        z: float | None,
    ) -> tuple[Corrected, list[Any]]:
        """Correct the reading with the updated model and feed the alert rules."""
        estimator = self._estimator
        # Settled after every reading, so a snapshot taken now continues bit for bit.
        estimator.settle()
        theta, sd = estimator.solution()
        gain_size = self._gain_size
        offset_theta = theta[gain_size:] if gain_size else theta
        offset_dot = self._offset_dot
        baseline: float = offset_dot(phi, offset_theta)
        # The slope and the row at the inputs' means are lists: dotted as they are
        theta_list = offset_theta.tolist() if self._offset_lists else None
        established = estimator.effective_n >= self._min_samples
        if psi is None:
            gain = None
            corrected = sample.value - baseline
            row_variance, sandwiched = self._variances(phi)
        else:
            gain = float(psi @ theta[:gain_size])
            corrected = (sample.value - baseline) / gain if gain != 0 else math.nan
            # delta method: d corrected/d a = −corrected·ψ/g, d corrected/d θ = −φ/g
            _, sandwiched = self._variances(np.concatenate([corrected * psi, phi]) / gain)
            row_variance = estimator.spread(np.concatenate([psi, phi]))[0]
        result = self._correct(
            sample,
            baseline,
            corrected,
            sd * math.sqrt(0.0 if sandwiched < 0.0 else sandwiched),  # max(·, 0.0), cheaper
            gain,
            offset_dot(np.array(here[1]), offset_theta)
            if theta_list is None
            else sequential_dot(here[1], theta_list),
            flags,
            established,
            learned,
            theta,
        )
        health = self._health(flags, phi_squared, psi, row_variance, established)
        alerts = self.alerts
        if not established:  # an untrained model's drift and residuals say nothing
            return result, alerts.observe(result, None, None, None, None, None, health)
        assert self._basis is not None
        held = self._basis.point_with(t, self._input_means, here)
        drift: float = (
            offset_dot(np.array(held[0]), offset_theta)
            if theta_list is None
            else sequential_dot(held[0], theta_list)
        )
        self.last_drift = drift
        # The rate's uncertainty costs solves, the forecast a covariance read-out: only
        # for a rule that watches them.
        watched = alerts.book.rules
        rate = self._rate_at_means(held[1], offset_theta, sd) if "rate_limit" in watched else None
        forecast = self._forecaster() if "forecast" in watched else None
        return result, alerts.observe(result, drift, rate, z, check_error, forecast, health)

    def _variances(self, gradient: Array) -> tuple[float, float]:
        """(gᵀPg, gᵀ·P(FᵀW²F + prior)P·g), both over σ̂² (see `_Fit`), without forming P.

        In a sliding window the middle is the estimator's own information RᵀR (unit
        weights), and P·RᵀR·P = P: the second is the first."""
        estimator = self._estimator
        plain, solved = estimator.spread(gradient)
        if self._windowed:
            return plain, plain
        # prior information a·diag(prior_sd)⁻², with the channel's one prior_sd
        precision = estimator.prior_weight / self._prior_variance
        return plain, self._squared.quadratic(solved, precision)

    def _rate_at_means(self, slope: list[float], offset_theta: Array, sd: float) -> float:
        """The drift rate with every input at its running mean, as its conservative
        magnitude (`_conservative_rate`)."""
        full = np.array([0.0] * self._gain_size + slope)
        _, sandwiched = self._variances(full)
        rate: float = self._offset_dot(full[self._gain_size :], offset_theta)
        return _conservative_rate(rate, sd * math.sqrt(0.0 if sandwiched < 0.0 else sandwiched))

    def _read_fit(self) -> _Fit:
        """The full read-out, covariance matrices included: for forecasts (at most hourly)
        and control events, never per reading."""
        estimator = self._estimator
        covariance = estimator.covariance
        prior = np.diag(estimator.prior_weight / estimator.prior_sd**2)
        middle = (
            estimator.information_matrix()  # unit weights in a window: FᵀW²F = FᵀWF
            if self.config.memory.window is not None
            else self._squared.matrix() + prior
        )
        return _Fit(
            estimator.coefficients,
            covariance,
            covariance @ middle @ covariance,
            estimator.residual_sd,
        )

    def control(self, event: ControlEvent) -> list[Any]:
        """Apply a technician's action so it does not read as drift; returns alert clears.

        rezero keeps the learned shape (see `_rezero`); reset forgets every sample; a
        replaced sensor also starts a new epoch (its settling terms start again) and new
        input means. Readings older than the last one stay refused either way.
        """
        if event.event == "replaced":
            self._estimator = self._new_estimator()
            self._squared = SquaredInformation(self.n_terms, self.config.memory.half_life)
            self._epoch, self._basis, self._gain = self.config.epoch, None, None
            if self._epoch is not None:
                self._bind(self._epoch)
            self._input_means, self._input_stage1, self._means_time = {}, {}, None
            self._last_useful = -math.inf
        elif event.mode == "reset":
            self._reset_estimators()
            self._last_useful = -math.inf
        else:
            self._rezero(event.time)
        return self.alerts.reset(event.time, f"{event.event} ({event.mode})")

    # --- learning -----------------------------------------------------------------------

    def _new_estimator(self) -> RecursiveEstimator:
        memory = self.config.memory
        prior_mean = np.zeros(self.n_terms)
        if self.config.gain is not None:
            prior_mean[0] = 1.0  # the first gain term starts at 1 (documented in the README)
        return RecursiveEstimator(
            self.n_terms,
            half_life=memory.half_life,
            window=memory.window,
            prior_sd=memory.prior_sd,
            prior_mean=prior_mean,
        )

    def _reset_estimators(self) -> None:
        self._estimator.reset()
        self._squared.reset()

    def _bind(self, epoch: float) -> None:
        self._epoch = epoch
        parts = self._parts
        if epoch == parts.epoch:  # the config's own epoch: bound once per template
            self._basis, self._gain = parts.basis, parts.gain
            return
        self._basis = self.config.basis.with_epoch(epoch)
        self._gain = self.config.gain.with_epoch(epoch) if self.config.gain else None

    def _learn(
        self,
        sample: Sample,
        t: float,
        phi: Array,
        psi: Array | None,
        phi_squared: float,
        stale: bool,
    ) -> tuple[bool, float | None, float | None]:
        """Update the estimator if this sample teaches the baseline.

        Returns (learned, check error, standardised residual). The check error is the
        out-of-sample error of the correction at a reference check: the corrected value the
        model would have published, minus the reference.
        """
        if stale:
            return False, None, None  # a stale covariate would teach a wrong shape
        learn = self.learn
        if learn.mode != "reference":
            target, row, check_error = sample.value - learn.nominal, phi, None
        else:
            target, maybe_row, check_error = self._reference_row(sample, phi, psi)
            if maybe_row is None:
                return False, None, None
            row = maybe_row
        estimator = self._estimator
        established = estimator.effective_n >= self._min_samples
        if learn.mode == "envelope" or learn.robust:
            weight = self._weight(target - estimator.predict(row))
        else:  # unit weight; refuse the rows `predict` would refuse, as it used to be asked
            squared = phi_squared if row is phi else _ddot(row, row)
            if not math.isfinite(squared):
                raise InputError(_NON_FINITE_ROW)
            weight = 1.0
        z = estimator.update(row, target, weight, t).standardised
        self._squared.add(row, weight * weight, t)
        if not established:
            check_error = None  # an untrained model's error says nothing about the sensor
        return True, check_error, z if math.isfinite(z) else None

    def _reference_row(
        self, sample: Sample, phi: Array, psi: Array | None
    ) -> tuple[float, Array | None, float | None]:
        """(target, row, check error) in learn mode `reference`; no row without a fresh
        reference value. (In the other modes the target is raw − nominal, the row φ.)"""
        reference = self._inputs.lookup(self.learn.input, sample.time)
        if reference.value is None or not reference.fresh:
            return math.nan, None, None
        ref = reference.value
        if psi is None:
            predicted = sample.value - self._estimator.predict(phi)
            return sample.value - ref, phi, predicted - ref
        theta = self._estimator.coefficients
        gain = float(psi @ theta[: self._gain_size])
        offset = float(phi @ theta[self._gain_size :])
        predicted = (sample.value - offset) / gain if gain else math.nan
        return sample.value, np.concatenate([psi * ref, phi]), predicted - ref

    def _weight(self, residual: float) -> float:
        """Envelope and Huber weights; both need a residual SD the model trusts."""
        sd = self._estimator.residual_sd
        if not (self._established() and math.isfinite(sd) and sd > 0):
            return 1.0
        weight = 1.0
        if self.learn.mode == "envelope" and residual > self.learn.envelope_k * sd:
            weight = self.learn.envelope_weight
        if self.learn.robust and abs(residual) > self.learn.huber_k * sd:
            weight *= self.learn.huber_k * sd / abs(residual)
        return weight

    def _established(self) -> bool:
        return self._estimator.effective_n >= self._min_samples

    def _rezero(self, time: float) -> None:
        """Keep the learned shape, make the drift zero now (the sensor's zero was adjusted).

        "Zero" is judged where drift is judged: with the inputs at their running means, so
        that re-zeroing on a cold morning does not bake that morning's temperature effect
        into the new zero. Without a constant term there is nothing to shift: start over.
        """
        if self._basis is None or "constant" not in self._basis.names:
            self._reset_estimators()
            return
        if set(self._input_means) < self._basis.variables:
            self._reset_estimators()  # never saw the inputs: the shape is unknown anyway
            return
        theta = self._estimator.coefficients[self._gain_size :]
        t = time - (self._epoch or 0.0)
        drift = float(self._basis.row(t, self._input_means) @ theta)
        index = self._gain_size + self._basis.names.index("constant")
        self._estimator.shift(index, -drift)

    # --- correcting ---------------------------------------------------------------------

    def _correct(
        self,
        sample: Sample,
        baseline: float,
        corrected: float,
        uncertainty: float,
        gain: float | None,
        drift_rate: float,
        flags: list[str],
        established: bool,
        learned: bool,
        theta: Array,
    ) -> Corrected:
        """The published reading: quality flags, the cap, the QARTOD summary.

        The caller's `flags` feed model health, which must not see the flags added here:
        they are added to a copy."""
        if not established:
            flags = [*flags, q.LEARNING]
        elif self._condition_number() > self.config.ill_conditioned_above:
            flags = [*flags, q.ILL_CONDITIONED]  # while learning, too few samples is expected
        if self.config.cap is not None:
            flags = list(flags)
            corrected = self._capped(sample.value, corrected, flags)
        quality, code = q.summarise(flags) if flags else (q.OK, q.QARTOD_PASS)
        return _published(
            sample.time,
            sample.value,
            corrected,
            baseline,
            uncertainty,
            quality,
            code,
            tuple(sorted(set(flags))) if flags else (),
            gain,
            drift_rate,
            learned,
            theta,
        )

    def _condition_number(self) -> float:
        """The estimator's condition number, refreshed every CONDITION_EVERY readings: it
        needs an SVD, and collinearity builds up over many samples, not one."""
        self._since_condition += 1
        if self._since_condition >= CONDITION_EVERY or self._condition is None:
            self._condition = self._estimator.condition_number()
            self._since_condition = 0
        return self._condition

    def _capped(self, raw: float, corrected: float, flags: list[str]) -> float:
        cap = self.config.cap
        if cap is None or not math.isfinite(corrected):
            return corrected
        correction = raw - corrected
        if abs(correction) <= cap:
            return corrected
        flags.append(q.CAPPED)
        return raw - math.copysign(cap, correction)

    def _uncorrectable(self, sample: Sample, flags: list[str]) -> Corrected:
        quality, code = q.summarise(flags, missing=True)
        return Corrected(
            sample.time,
            sample.value,
            None,
            None,
            None,
            quality,
            code,
            tuple(flags),
            None,
            None,
            False,
        )

    def _track_means(self, time: float, covariates: dict[str, float]) -> None:
        """Smoothed inputs at which drift is judged: a compensated cross-sensitivity's daily
        swing is the model working, not the sensor drifting. Two cascaded exponential means
        (time constant INPUT_MEAN_TAU each) cut a daily cycle to 1/(1 + (2π·τ/24 h)²) ≈ 2.5 %
        of its amplitude; one stage would leave 16 %."""
        weight = 1.0
        if self._means_time is not None:
            weight = 1.0 - math.exp(-(time - self._means_time) / INPUT_MEAN_TAU)
        self._means_time = time
        stage1, means = self._input_stage1, self._input_means
        for name, value in covariates.items():
            first = stage1.get(name, value)
            first += weight * (value - first)
            stage1[name] = first
            previous = means.get(name, value)
            means[name] = previous + weight * (first - previous)

    def _forecaster(self) -> Callable[[Array], tuple[Array, Array]]:
        """Predicted drift and its SD at future (absolute) times, inputs at their means.

        The covariance read-out it needs is made on the first call, so the function is
        only valid until the channel's next reading or control event (the alert rules and
        `forecast` call it at once); a later call raises RuntimeError."""
        basis, start = self._basis, self._gain_size
        epoch = self._epoch or 0.0
        held_at = dict(self._input_means)
        made_at = (self._last_time, self._estimator)
        fits: list[_Fit] = []

        def predict(times: Array) -> tuple[Array, Array]:
            assert basis is not None
            if made_at != (self._last_time, self._estimator):
                raise RuntimeError("a drift forecast is valid only until the next reading")
            if not fits:
                fits.append(self._read_fit())
            fit = fits[0]
            held = {name: np.full(times.shape[0], mean) for name, mean in held_at.items()}
            rows = basis.evaluate(times - epoch, held)
            full = np.zeros((rows.shape[0], self.n_terms))
            full[:, start:] = rows
            return rows @ fit.theta[start:], fit.sd * np.sqrt(fit.variances(full))

        return predict

    def forecast(self, horizon: float, confidence: float = 0.95) -> Crossing | None:
        """When the drift (inputs at their means) is predicted to reach ±drift_limit within
        `horizon` seconds of the last reading, with a `confidence` interval; None if not."""
        limit = self.config.alerts.drift_limit
        if limit is None or self._basis is None or not math.isfinite(self._last_time):
            return None
        times = np.linspace(self._last_time, self._last_time + horizon, FORECAST_POINTS)
        mean, spread = self._forecaster()(times)
        if not (np.all(np.isfinite(mean)) and np.all(np.isfinite(spread))):
            return None
        z = NormalDist().inv_cdf(0.5 + confidence / 2)
        return crossing_time(times, mean, spread, limit, z)

    def _health(
        self,
        flags: list[str],
        phi_squared: float,
        psi: Array | None,
        row_variance: float,
        established: bool,
    ) -> list[str]:
        """Model problems for the model_health rule; `row_variance` is rowᵀP·row for the
        reading's row φ, or [ψ, φ] with a gain (`phi_squared` = ‖φ‖²)."""
        problems = [f for f in flags if f in (q.INPUT_STALE, q.ILL_CONDITIONED)] if flags else []
        if not established:
            return problems  # still learning: that is the 'learning' flag, not wind-up
        if self._last_time - self._last_useful > self.learn.max_gap:
            problems.append("no_useful_sample")
        if self._wound_up(phi_squared, psi, row_variance):
            problems.append("wind_up")
        return problems

    def _wound_up(self, phi_squared: float, psi: Array | None, row_variance: float) -> bool:
        """The data no longer pin the baseline down: its variance has grown back to a quarter
        of what the prior alone allows (the prior itself bounds it, see the estimator)."""
        squared = phi_squared if psi is None else phi_squared + float(psi.dot(psi))
        prior_only = self._prior_variance * squared  # Σ(sd·rowᵢ)² of the row, one sd
        return row_variance > 0.25 * prior_only

    # --- state --------------------------------------------------------------------------

    def to_state(self) -> dict[str, Any]:
        return {
            "version": STATE_VERSION,
            "model": self.config.model_key(),
            "epoch": self._epoch,
            "last_time": self._last_time,
            "last_useful": self._last_useful,
            "estimator": self._estimator.to_state(),
            "inputs": self._inputs.to_state(),
            "alerts": self.alerts.to_state(),
            "input_means": [dict(self._input_stage1), dict(self._input_means)],
            "squared": self._squared.to_state(),
            "means_time": self._means_time,
        }

    def load_state(self, state: Mapping[str, Any]) -> None:
        """Restore from `to_state`; InputError if the state is for another model."""
        if state.get("version") != STATE_VERSION or state.get("model") != self.config.model_key():
            raise InputError("state was saved for a different model or version")
        self._estimator = RecursiveEstimator.from_state(state["estimator"])
        if state["epoch"] is not None:
            self._bind(float(state["epoch"]))
        self._last_time = float(state["last_time"])
        self._last_useful = float(state["last_useful"])
        self._inputs.load_state(state["inputs"])
        self.alerts.load_state(state["alerts"])
        stage1, means = state["input_means"]
        self._input_stage1 = {k: float(v) for k, v in stage1.items()}
        self._input_means = {k: float(v) for k, v in means.items()}
        self._means_time = state["means_time"]
        self._squared = SquaredInformation.from_state(state["squared"])

    def _pack_scalars(self, input_names: tuple[str, ...]) -> list[float]:
        """The channel's own numbers, its inputs, input means and alert states as float64
        values in `PackedChannels` layout order (None is NaN)."""
        values = [
            number(self._epoch),
            self._last_time,
            self._last_useful,
            number(self._means_time),
            number(self._condition),
            float(self._since_condition),
            number(self.last_drift),
        ]
        values += self._inputs.pack(input_names)
        stage1, means = self._input_stage1, self._input_means
        for name in input_names:
            values += (1.0, stage1[name], means[name]) if name in means else _UNKNOWN_MEAN
        values += self.alerts.pack()
        return values

    def _pack_side(self) -> dict[str, Any] | None:
        """What does not fit fixed float64 fields (active alert events, a window's queue)."""
        side: dict[str, Any] = {}
        active = self.alerts.active_json()
        if active is not None:
            side["alerts"] = active
        return side or None

    def restored_copy(
        self,
        name: str,
        values: list[float],
        squared: SquaredInformation,
        estimator: RecursiveEstimator,
        side: Mapping[str, Any] | None,
    ) -> Channel:
        """A channel named `name` with this (never fed) one's settings and the state that
        `_pack_scalars` / `_pack_side` wrote, with its unpacked estimator and squared
        information. Copying the settings is what makes restoring 10,000 channels fast;
        every attribute that holds learned state is set anew in `_unpack`."""
        channel = shallow_copy(self)
        channel.name = name
        channel.alerts = self.alerts.blank_copy(name)
        channel._inputs = self._inputs.blank_copy()
        channel._unpack(values, squared, estimator, side)
        return channel

    def _unpack(
        self,
        values: list[float],
        squared: SquaredInformation,
        estimator: RecursiveEstimator,
        side: Mapping[str, Any] | None,
    ) -> None:
        """Restore what `_pack_scalars` / `_pack_side` wrote, with the unpacked parts."""
        parts = self._parts
        epoch, last_time, last_useful, means_time, condition, since, last_drift = values[:7]
        self._estimator = estimator
        self._squared = squared
        if math.isnan(epoch):
            self._epoch, self._basis, self._gain = None, None, None
        else:
            self._bind(epoch)
        self._last_time, self._last_useful = last_time, last_useful
        self._means_time = optional(means_time)
        self._condition = optional(condition)
        self._since_condition = int(since)
        self.last_drift = optional(last_drift)
        names = parts.input_names
        start = 7 + 3 * len(names)
        self._inputs.unpack(names, values[7:start])
        stage1: dict[str, float] = {}
        means: dict[str, float] = {}
        for name in parts.sorted_names:  # the insertion order `_track_means` gives
            index = start + 3 * parts.input_index[name]
            if values[index] == 1.0:
                stage1[name] = values[index + 1]
                means[name] = values[index + 2]
        self._input_stage1, self._input_means = stage1, means
        self.alerts.unpack(values[start + 3 * len(names) :], (side or {}).get("alerts"))


_UNKNOWN_MEAN = (0.0, math.nan, math.nan)


class _TemplateParts:
    """What every channel of one template shares: sizes, the inputs' names and ages, a
    pristine estimator to copy, the basis bound to the config's epoch, the packed layout.

    Kept per config object (by identity, with the config held so its id cannot be reused),
    at most `_MAX` of them (a daemon reloading its config makes new config objects)."""

    _known: ClassVar[dict[int, _TemplateParts]] = {}
    _MAX: ClassVar[int] = 256

    def __init__(self, config: ChannelConfig) -> None:
        self.config = config
        self.offset_size = config.basis.size
        self.gain_size = config.gain.size if config.gain is not None else 0
        self.max_ages = {i.name: i.max_age for i in config.inputs.values()}
        self.input_names = tuple(self.max_ages)
        self.sorted_names = tuple(sorted(self.input_names))
        self.input_index = {name: i for i, name in enumerate(self.input_names)}
        self.epoch = config.epoch
        self.basis = None if config.epoch is None else config.basis.with_epoch(config.epoch)
        self.gain = (
            None
            if config.epoch is None or config.gain is None
            else config.gain.with_epoch(config.epoch)
        )
        #: A never-fed estimator that channels copy (set by the first `Channel`).
        self.estimator: RecursiveEstimator | None = None
        needed = config.basis.variables | (config.gain.variables if config.gain else frozenset())
        self.needed = tuple(sorted(needed))  # the named inputs the bases read
        self.alerts = ChannelAlerts("", config.alerts, cap=config.cap)
        self._layout: list[tuple[str, int]] | None = None
        self._blank: Channel | None = None

    def blank_channel(self) -> Channel:
        """A channel of this template that is never fed: restored ones copy its settings."""
        if self._blank is None:
            self._blank = Channel(self.config, "")
        return self._blank

    @classmethod
    def of(cls, config: ChannelConfig) -> _TemplateParts:
        parts = cls._known.get(id(config))
        if parts is None or parts.config is not config:
            parts = cls(config)
            if len(cls._known) >= cls._MAX:
                cls._known.pop(next(iter(cls._known)))
            cls._known[id(config)] = parts
        return parts

    @property
    def layout(self) -> list[tuple[str, int]]:
        """The packed fields (name, number of float64 values) of a channel, in order."""
        if self._layout is None:
            n = self.offset_size + self.gain_size
            self._layout = [
                ("channel", 7),
                *((f"inputs.{name}", 3) for name in self.input_names),
                *((f"means.{name}", 3) for name in self.input_names),
                *self.alerts.packed_layout(),
                ("squared", 1 + n * (n + 1) // 2),
                *estimator_layout(n),
            ]
        return self._layout

    @property
    def scalar_width(self) -> int:
        """Values of `Channel._pack_scalars`: the layout before "squared"."""
        return 7 + 6 * len(self.input_names) + sum(w for _, w in self.alerts.packed_layout())


def pack_channels(channels: Sequence[Channel]) -> PackedChannels:
    """Pack channels that share one config (one template); nothing in them changes."""
    with collector_paused():
        return _packed(channels)


def _packed(channels: Sequence[Channel]) -> PackedChannels:
    config = channels[0].config
    parts = _TemplateParts.of(config)
    if any(channel.config is not config for channel in channels):
        raise ValueError("pack_channels takes the channels of one config")
    names = parts.input_names
    scalars = np.array([c._pack_scalars(names) for c in channels], dtype=np.float64)
    n = parts.offset_size + parts.gain_size
    upper = upper_triangle(n)
    # The matrices are Fortran-ordered (BLAS updates them in place): ravel("F") is a view
    # where ravel() copied, and reshaping by rows gives each one's transpose, hence the
    # swapped index pair (the same upper triangle, in the same order).
    squared = np.concatenate([c._squared._matrix.ravel("F") for c in channels])
    squared = squared.reshape(len(channels), n, n)[:, upper[1], upper[0]]
    squared_time = np.array([number(c._squared._time) for c in channels], dtype=np.float64)
    estimators, estimator_sides = pack_estimators([c._estimator for c in channels])
    rows = np.hstack(
        [scalars.reshape(len(channels), -1), squared_time[:, None], squared, estimators]
    )
    sides = []
    for channel, window in zip(channels, estimator_sides, strict=True):
        side = channel._pack_side()
        if window is not None:
            side = {**(side or {}), "window": window}
        sides.append(side)
    return PackedChannels(config.model_key(), parts.layout, rows, sides)


def blank_packed(config: ChannelConfig) -> PackedChannels:
    """The packed state of a never-fed channel of `config`: one row."""
    return pack_channels([_TemplateParts.of(config).blank_channel()])


def unpack_channels(
    config: ChannelConfig, names: Sequence[str], packed: PackedChannels
) -> list[Channel]:
    """Channels of `config` named `names` with the state of `packed`'s rows.

    InputError if the state was saved for another model. Alert rules or inputs that were
    added to or removed from the config since are matched by name: new ones start clear.
    """
    with collector_paused():
        return _unpacked(config, names, packed)


def conformed(config: ChannelConfig, packed: PackedChannels, count: int) -> PackedChannels:
    """`packed` (state of `count` channels) in the layout `config` packs today.

    InputError if it was saved for another model or does not hold `count` rows of its
    layout. Alert rules or inputs added to or removed from the config since are matched by
    name (`rearranged`): new ones start as a new channel's do. Cheap (whole-array work), so
    a daemon can check a snapshot block at start and unpack its channels only when asked.
    """
    if packed.model != config.model_key():
        raise InputError("state was saved for a different model")
    parts = _TemplateParts.of(config)
    rows = np.asarray(packed.rows, dtype=np.float64)
    if rows.ndim != 2 or rows.shape[0] != count or len(packed.sides) != count:
        raise InputError(f"packed state holds {rows.shape} values for {count} channels")
    if packed.layout is parts.layout:  # conformed before (a parked channel)
        return packed
    layout = [(str(name), int(size)) for name, size in packed.layout]
    if layout != parts.layout:  # alert rules or inputs changed in the config
        rows = rearranged(rows, layout, parts.layout, blank_packed(config).rows[0])
    return PackedChannels(packed.model, parts.layout, rows, list(packed.sides))


def _unpacked(config: ChannelConfig, names: Sequence[str], packed: PackedChannels) -> list[Channel]:
    rows = conformed(config, packed, len(names)).rows
    parts = _TemplateParts.of(config)
    width = parts.scalar_width
    scalars = rows[:, :width].tolist()
    n = parts.offset_size + parts.gain_size
    upper = upper_triangle(n)
    squared_time = rows[:, width].tolist()
    squared = np.zeros((len(names), n, n))
    squared[:, upper[0], upper[1]] = rows[:, width + 1 : width + 1 + len(upper[0])]
    squared[:, upper[1], upper[0]] = rows[:, width + 1 : width + 1 + len(upper[0])]
    sides = [side or {} for side in packed.sides]
    blank = parts.blank_channel()  # also makes parts.estimator
    assert parts.estimator is not None
    estimators = unpack_estimators(
        parts.estimator, rows[:, width + 1 + len(upper[0]) :], [s.get("window") for s in sides]
    )
    half_life = config.memory.half_life
    channels = []
    for i, name in enumerate(names):
        information = object.__new__(SquaredInformation)
        information.half_life = half_life
        # The transpose (the same symmetric matrix) is Fortran-ordered, as BLAS updates it
        # in place: the C-ordered view would be copied at the channel's next reading.
        information._matrix = squared[i].T
        information._time = optional(squared_time[i])
        channels.append(blank.restored_copy(name, scalars[i], information, estimators[i], sides[i]))
    return channels


def _conservative_rate(rate: float, spread: float) -> float:
    """The drift rate as its conservative magnitude |rate| − RATE_Z·u(rate) (zero if that is
    negative), keeping its sign: a rate estimate is much noisier than the drift itself,
    above all soon after learning starts, and a rate alert should mean the drift is
    significantly that fast. An undefined u(rate) gives zero."""
    if not math.isfinite(spread):
        return 0.0
    magnitude = abs(rate) - RATE_Z * spread
    return math.copysign(magnitude if magnitude > 0.0 else 0.0, rate)  # max(0.0, ·)
