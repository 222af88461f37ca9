"""Basis terms: the columns of the least-squares design, built from the user's YAML list.

A basis is a YAML list; each entry is one term *family* that contributes one or more columns
(design §2, a contract)::

    - constant                                   # 1
    - polynomial: {of: t, degree: 2, scale: 30d} # (t/30d), (t/30d)^2
    - exponential: {of: t, tau: 36h}             # exp(-t/tau)
    - periodic: {of: t, period: 24h, harmonics: 2}
    - step: {of: t, at: "2026-05-01T00:00:00Z"}
    - expression: "log1p(t / 7d)"

Every family that takes a variable first standardises it, u = (x − center) / scale (defaults
0 and 1), and then applies its shape to u. `t` is seconds since the channel's epoch; a term
that needs absolute time (a `step` at a date, the phase of a `periodic` term, which is
anchored to UTC so coefficients mean the same after a restart) is bound to the epoch with
`Basis.with_epoch`.

Each family is a small frozen class behind the `Term` protocol — `names`, `variables`,
`evaluate(t, inputs)`, `derivative(t, inputs)` (d/dt, for drift-rate alerts; named inputs are
held constant) — found by its YAML name in `FAMILIES`. Add a family by writing a class and a
parser function and registering both there.
"""

from __future__ import annotations

import difflib
import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field, replace
from datetime import date, datetime
from typing import Any, Protocol

import numpy as np
import numpy.typing as npt

from zeroline import expression
from zeroline.durations import parse_duration
from zeroline.errors import ConfigError, ExpressionError

Array = npt.NDArray[np.float64]
TIME = "t"
MAX_DEGREE = 12
MAX_HARMONICS = 6


class Term(Protocol):
    """One basis family: a block of columns of the design."""

    @property
    def names(self) -> tuple[str, ...]: ...

    @property
    def variables(self) -> frozenset[str]: ...

    @property
    def uses_time(self) -> bool: ...

    def evaluate(self, t: Array, inputs: Mapping[str, Array]) -> Array: ...

    def derivative(self, t: Array, inputs: Mapping[str, Array]) -> Array: ...

    def row(self, t: float, inputs: Mapping[str, float]) -> list[float]: ...

    def slope(self, t: float, inputs: Mapping[str, float]) -> list[float]: ...

    def point(self, t: float, inputs: Mapping[str, float]) -> Point: ...


#: A term's row and slope at one point, as Python floats (`Term.point`).
Point = tuple[list[float], list[float]]


@dataclass(frozen=True)
class Standardised:
    """u = (x − center) / scale for a named variable; `label` is how the column names show it."""

    of: str
    center: float = 0.0
    scale: float = 1.0
    label: str = ""

    def values(self, t: Array, inputs: Mapping[str, Array]) -> Array:
        x = t if self.of == TIME else inputs[self.of]
        return (x - self.center) / self.scale

    def value(self, t: float, inputs: Mapping[str, float]) -> float:
        x = t if self.of == TIME else inputs[self.of]
        return (x - self.center) / self.scale

    def du_dt(self) -> float:
        """du/dt: 1/scale for time, 0 for a named input (held constant)."""
        return 1.0 / self.scale if self.of == TIME else 0.0

    def text(self) -> str:
        return self.label or self.of


class _OfOneVariable:
    """What a family of one standardised variable `u` says about the variables it reads."""

    u: Standardised

    @property
    def variables(self) -> frozenset[str]:
        return frozenset({self.u.of}) - {TIME}

    @property
    def uses_time(self) -> bool:
        return self.u.of == TIME


def _zeros(t: Array, k: int) -> Array:
    return np.zeros((t.shape[0], k))


@dataclass(frozen=True)
class Constant:
    """The constant column 1."""

    @property
    def names(self) -> tuple[str, ...]:
        return ("constant",)

    @property
    def variables(self) -> frozenset[str]:
        return frozenset()

    @property
    def uses_time(self) -> bool:
        return False

    def evaluate(self, t: Array, inputs: Mapping[str, Array]) -> Array:
        return np.ones((t.shape[0], 1))

    def derivative(self, t: Array, inputs: Mapping[str, Array]) -> Array:
        return _zeros(t, 1)

    def row(self, t: float, inputs: Mapping[str, float]) -> list[float]:
        return [1.0]

    def slope(self, t: float, inputs: Mapping[str, float]) -> list[float]:
        return [0.0]

    def point(self, t: float, inputs: Mapping[str, float]) -> Point:
        return [1.0], [0.0]


@dataclass(frozen=True)
class Polynomial(_OfOneVariable):
    """u, u², …, u^degree (no constant column: add `constant` yourself)."""

    u: Standardised
    degree: int

    @property
    def names(self) -> tuple[str, ...]:
        base = self.u.text()
        wrapped = f"({base})" if not base.isidentifier() else base
        return tuple(base if k == 1 else f"{wrapped}^{k}" for k in range(1, self.degree + 1))

    def evaluate(self, t: Array, inputs: Mapping[str, Array]) -> Array:
        u = self.u.values(t, inputs)
        return np.stack([u**k for k in range(1, self.degree + 1)], axis=1)

    def derivative(self, t: Array, inputs: Mapping[str, Array]) -> Array:
        u = self.u.values(t, inputs)
        rate = self.u.du_dt()
        return np.stack([k * u ** (k - 1) * rate for k in range(1, self.degree + 1)], axis=1)

    def row(self, t: float, inputs: Mapping[str, float]) -> list[float]:
        u = self.u.value(t, inputs)
        return [u**k for k in range(1, self.degree + 1)]

    def slope(self, t: float, inputs: Mapping[str, float]) -> list[float]:
        u, rate = self.u.value(t, inputs), self.u.du_dt()
        return [k * u ** (k - 1) * rate for k in range(1, self.degree + 1)]

    def point(self, t: float, inputs: Mapping[str, float]) -> Point:
        of, center, scale = self.u.of, self.u.center, self.u.scale
        # `Standardised.value` and `du_dt`, inlined: this runs for every reading
        if of == TIME:
            u, rate = (t - center) / scale, 1.0 / scale
        else:
            u, rate = (inputs[of] - center) / scale, 0.0
        # Degrees 1 and 2 spelt out: the same floats as `row` and `slope` (u**0 = 1 and
        # u**1 = u exactly, so k·u^(k−1)·rate is rate and 2u·rate), without the loops.
        if self.degree == 1:
            return [u], [rate]
        if self.degree == 2:
            return [u, u**2], [rate, 2 * u * rate]
        powers = range(1, self.degree + 1)
        return [u**k for k in powers], [k * u ** (k - 1) * rate for k in powers]


@dataclass(frozen=True)
class Exponential(_OfOneVariable):
    """exp(−u/τ): warm-up and settling."""

    u: Standardised
    tau: float
    tau_text: str

    @property
    def names(self) -> tuple[str, ...]:
        return (f"exp(-{self.u.text()}/{self.tau_text})",)

    def evaluate(self, t: Array, inputs: Mapping[str, Array]) -> Array:
        with np.errstate(over="ignore"):
            return np.exp(-self.u.values(t, inputs) / self.tau)[:, None]

    def derivative(self, t: Array, inputs: Mapping[str, Array]) -> Array:
        return -self.evaluate(t, inputs) * (self.u.du_dt() / self.tau)

    def row(self, t: float, inputs: Mapping[str, float]) -> list[float]:
        exponent = -self.u.value(t, inputs) / self.tau
        return [math.exp(exponent) if exponent < 709.0 else math.inf]

    def slope(self, t: float, inputs: Mapping[str, float]) -> list[float]:
        return [-self.row(t, inputs)[0] * (self.u.du_dt() / self.tau)]

    def point(self, t: float, inputs: Mapping[str, float]) -> Point:
        value = self.row(t, inputs)[0]
        return [value], [-value * (self.u.du_dt() / self.tau)]


@dataclass(frozen=True)
class Periodic(_OfOneVariable):
    """sin/cos pairs of 2πk·u/period, k = 1…harmonics; for time the phase is anchored to UTC."""

    u: Standardised
    period: float
    period_text: str
    harmonics: int
    epoch: float = 0.0

    @property
    def names(self) -> tuple[str, ...]:
        names: list[str] = []
        for k in range(1, self.harmonics + 1):
            factor = "2π" if k == 1 else f"{2 * k}π"
            arg = f"{factor}·{self.u.text()}/{self.period_text}"
            names += [f"sin({arg})", f"cos({arg})"]
        return tuple(names)

    def _phase(self, t: Array, inputs: Mapping[str, Array]) -> Array:
        u = self.u.values(t, inputs)
        if self.u.of == TIME:
            # Anchor to absolute time without adding 1.8e9 s to every sample: only the
            # epoch's remainder modulo the period matters.
            offset = math.fmod(self.epoch / self.u.scale, self.period)
            u = np.fmod(u + offset, self.period)
        return 2.0 * math.pi * u / self.period

    def evaluate(self, t: Array, inputs: Mapping[str, Array]) -> Array:
        phase = self._phase(t, inputs)
        columns: list[Array] = []
        for k in range(1, self.harmonics + 1):
            columns += [np.sin(k * phase), np.cos(k * phase)]
        return np.stack(columns, axis=1)

    def derivative(self, t: Array, inputs: Mapping[str, Array]) -> Array:
        phase = self._phase(t, inputs)
        rate = 2.0 * math.pi * self.u.du_dt() / self.period
        columns: list[Array] = []
        for k in range(1, self.harmonics + 1):
            columns += [k * rate * np.cos(k * phase), -k * rate * np.sin(k * phase)]
        return np.stack(columns, axis=1)

    def _phase_at(self, t: float, inputs: Mapping[str, float]) -> float:
        u = self.u.value(t, inputs)
        if self.u.of == TIME:
            u = math.fmod(u + math.fmod(self.epoch / self.u.scale, self.period), self.period)
        return 2.0 * math.pi * u / self.period

    def row(self, t: float, inputs: Mapping[str, float]) -> list[float]:
        phase = self._phase_at(t, inputs)
        values: list[float] = []
        for k in range(1, self.harmonics + 1):
            values += [math.sin(k * phase), math.cos(k * phase)]
        return values

    def slope(self, t: float, inputs: Mapping[str, float]) -> list[float]:
        phase = self._phase_at(t, inputs)
        rate = 2.0 * math.pi * self.u.du_dt() / self.period
        values: list[float] = []
        for k in range(1, self.harmonics + 1):
            values += [k * rate * math.cos(k * phase), -k * rate * math.sin(k * phase)]
        return values

    def point(self, t: float, inputs: Mapping[str, float]) -> Point:
        u, period = self.u, self.period
        # `_phase_at` and the rate of `slope`, inlined (the same expressions): this runs for
        # every reading
        if u.of == TIME:
            offset = math.fmod(self.epoch / u.scale, period)
            phase = 2.0 * math.pi * math.fmod((t - u.center) / u.scale + offset, period)
            phase /= period
            rate = 2.0 * math.pi * (1.0 / u.scale) / period
        else:
            phase, rate = self._phase_at(t, inputs), 2.0 * math.pi * 0.0 / period
        if self.harmonics == 1:  # the common case, without the loop
            sine, cosine = math.sin(phase), math.cos(phase)
            return [sine, cosine], [rate * cosine, -rate * sine]
        row: list[float] = []
        slope: list[float] = []
        for k in range(1, self.harmonics + 1):
            sine, cosine = math.sin(k * phase), math.cos(k * phase)
            row += [sine, cosine]
            slope += [k * rate * cosine, -k * rate * sine]
        return row, slope


@dataclass(frozen=True)
class Step(_OfOneVariable):
    """0 before `at`, 1 from `at` on (a known event). For time, `at` is absolute epoch seconds."""

    u: Standardised
    at: float
    at_text: str
    epoch: float = 0.0

    @property
    def names(self) -> tuple[str, ...]:
        return (f"step({self.u.text()}>={self.at_text})",)

    def evaluate(self, t: Array, inputs: Mapping[str, Array]) -> Array:
        u = self.u.values(t, inputs)
        return (u >= self._threshold()).astype(np.float64)[:, None]

    def _threshold(self) -> float:
        return (self.at - self.epoch) / self.u.scale if self.u.of == TIME else self.at

    def derivative(self, t: Array, inputs: Mapping[str, Array]) -> Array:
        return _zeros(t, 1)

    def row(self, t: float, inputs: Mapping[str, float]) -> list[float]:
        return [1.0 if self.u.value(t, inputs) >= self._threshold() else 0.0]

    def slope(self, t: float, inputs: Mapping[str, float]) -> list[float]:
        return [0.0]

    def point(self, t: float, inputs: Mapping[str, float]) -> Point:
        return self.row(t, inputs), [0.0]


@dataclass(frozen=True)
class Expression:
    """A safe expression over t and named inputs (see `zeroline.expression`)."""

    text: str
    tree: expression.Node
    slope_tree: expression.Node

    @property
    def names(self) -> tuple[str, ...]:
        return (self.text,)

    @property
    def variables(self) -> frozenset[str]:
        return expression.variables_of(self.tree) - {TIME}

    @property
    def uses_time(self) -> bool:
        return TIME in expression.variables_of(self.tree)

    def evaluate(self, t: Array, inputs: Mapping[str, Array]) -> Array:
        return expression.evaluate(self.tree, {TIME: t, **inputs}, t.shape[0])[:, None]

    def derivative(self, t: Array, inputs: Mapping[str, Array]) -> Array:
        return expression.evaluate(self.slope_tree, {TIME: t, **inputs}, t.shape[0])[:, None]

    def row(self, t: float, inputs: Mapping[str, float]) -> list[float]:
        return [expression.evaluate_scalar(self.tree, {TIME: t, **inputs})]

    def slope(self, t: float, inputs: Mapping[str, float]) -> list[float]:
        return [expression.evaluate_scalar(self.slope_tree, {TIME: t, **inputs})]

    def point(self, t: float, inputs: Mapping[str, float]) -> Point:
        values = {TIME: t, **inputs}
        return (
            [expression.evaluate_scalar(self.tree, values)],
            [expression.evaluate_scalar(self.slope_tree, values)],
        )


# --- the basis as a whole -------------------------------------------------------------------


def _at_epoch(term: Periodic | Step, epoch: float) -> Periodic | Step:
    """`replace(term, epoch=epoch)` without running the constructor again (its other fields
    were checked when it was made): a restart binds every restored channel's basis."""
    fields = getattr(term, "__dict__", None)
    if fields is None:  # a slotted class: the general way
        return replace(term, epoch=epoch)
    bound = object.__new__(type(term))
    bound.__dict__.update(fields)
    object.__setattr__(bound, "epoch", epoch)
    return bound


@dataclass(frozen=True)
class Basis:
    """An ordered list of terms; its columns are the concatenation of theirs."""

    terms: tuple[Term, ...]
    epoch: float = 0.0
    # (term index, start, stop) of the terms that read a named input: worked out when the
    # configured basis is made and shared by every channel's `with_epoch` copy.
    input_spans: tuple[tuple[int, int, int], ...] = field(default=(), compare=False, repr=False)

    def __post_init__(self) -> None:
        if not self.input_spans:
            object.__setattr__(self, "input_spans", self._find_input_spans())

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(name for term in self.terms for name in term.names)

    @property
    def size(self) -> int:
        return len(self.names)

    @property
    def variables(self) -> frozenset[str]:
        """Named inputs (not `t`) that some term reads."""
        result: frozenset[str] = frozenset()
        for term in self.terms:
            result |= term.variables
        return result

    @property
    def uses_time(self) -> bool:
        """True when some term depends on time t."""
        return any(term.uses_time for term in self.terms)

    def owners(self) -> tuple[int, ...]:
        """For each column, the index of the term (YAML entry) it comes from."""
        return tuple(i for i, term in enumerate(self.terms) for _ in term.names)

    def with_epoch(self, epoch: float) -> Basis:
        """The same basis with time measured from `epoch` (UTC seconds)."""
        bound = tuple(
            _at_epoch(term, epoch) if isinstance(term, (Periodic, Step)) else term
            for term in self.terms
        )
        return Basis(bound, epoch, self.input_spans)

    def evaluate(self, t: Array, inputs: Mapping[str, Array]) -> Array:
        """The design matrix, shape (len(t), size)."""
        t = np.asarray(t, dtype=np.float64).reshape(-1)
        return np.concatenate([term.evaluate(t, inputs) for term in self.terms], axis=1)

    def row(self, t: float, inputs: Mapping[str, float]) -> Array:
        """The design row at one point, with Python floats: the per-reading hot path (the
        same numbers as `evaluate`, several times faster for a single point)."""
        values: list[float] = []
        for term in self.terms:
            values += term.row(t, inputs)
        return np.array(values)

    def slope(self, t: float, inputs: Mapping[str, float]) -> Array:
        """d(row)/dt at one point (see `row`)."""
        values: list[float] = []
        for term in self.terms:
            values += term.slope(t, inputs)
        return np.array(values)

    def point(self, t: float, inputs: Mapping[str, float]) -> Point:
        """Row and slope at one point in one pass over the terms, as Python floats: the
        per-reading hot path (the same numbers as `row` and `slope`)."""
        row: list[float] = []
        slope: list[float] = []
        for term in self.terms:
            term_row, term_slope = term.point(t, inputs)
            row += term_row
            slope += term_slope
        return row, slope

    def point_with(self, t: float, inputs: Mapping[str, float], at: Point) -> Point:
        """Row and slope at t with the named inputs at `inputs`, given `at`, the point at
        the same t with other input values: terms that read no input are copied from it
        (drift is judged at the inputs' means, right after the reading's own row)."""
        row, slope = list(at[0]), list(at[1])
        terms = self.terms
        for index, start, stop in self.input_spans:
            row[start:stop], slope[start:stop] = terms[index].point(t, inputs)
        return row, slope

    def _find_input_spans(self) -> tuple[tuple[int, int, int], ...]:
        found: list[tuple[int, int, int]] = []
        start = 0
        for index, term in enumerate(self.terms):
            stop = start + len(term.names)
            if term.variables:
                found.append((index, start, stop))
            start = stop
        return tuple(found)

    def derivative(self, t: Array, inputs: Mapping[str, Array]) -> Array:
        """d(design)/dt, shape (len(t), size)."""
        t = np.asarray(t, dtype=np.float64).reshape(-1)
        return np.concatenate([term.derivative(t, inputs) for term in self.terms], axis=1)


# --- parsing from YAML ----------------------------------------------------------------------

Parser = Callable[[Mapping[str, Any], str, frozenset[str]], Term]


def _unknown_key(key: str, allowed: Sequence[str], path: str) -> ConfigError:
    close = difflib.get_close_matches(key, allowed, n=1)
    hint = f"did you mean {close[0]!r}?" if close else f"allowed keys: {', '.join(allowed)}"
    return ConfigError(f"unknown key {key!r}; {hint}", f"{path}.{key}")


def _check_keys(
    fields: Mapping[str, Any], allowed: Sequence[str], required: Sequence[str], path: str
) -> None:
    for key in fields:
        if key not in allowed:
            raise _unknown_key(str(key), allowed, path)
    for key in required:
        if key not in fields:
            raise ConfigError(f"missing required key {key!r}", f"{path}.{key}")


def _number(value: Any, path: str, *, positive: bool = False) -> float:
    try:
        finite = (
            isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)
        )
    except OverflowError:  # an integer too large for a float
        finite = False
    if not finite:
        shown = repr(value) if len(repr(value)) < 40 else repr(value)[:37] + "..."
        raise ConfigError(f"expected a finite number, got {shown}", path)
    if positive and value <= 0:
        raise ConfigError(f"must be greater than zero, got {value!r}", path)
    return float(value)


def _integer(value: Any, path: str, low: int, high: int) -> int:
    if isinstance(value, bool) or not isinstance(value, int):
        raise ConfigError(f"expected a whole number from {low} to {high}, got {value!r}", path)
    if not low <= value <= high:
        raise ConfigError(f"must be from {low} to {high}, got {value}", path)
    return value


def _time_amount(value: Any, path: str, *, positive: bool) -> tuple[float, str]:
    """A duration string or a number of seconds, and how to show it in column names."""
    if isinstance(value, str):
        try:
            seconds = parse_duration(value, allow_zero=not positive)
        except ConfigError as error:
            raise ConfigError(error.message, path) from None
        return seconds, value.strip()
    number = _number(value, path, positive=positive)
    return number, f"{number:g}s"


def _variable(
    fields: Mapping[str, Any], path: str, inputs: frozenset[str]
) -> tuple[Standardised, bool]:
    """Read of/center/scale; returns the standardised variable and whether it is time."""
    of = fields["of"]
    if not isinstance(of, str) or not of:
        raise ConfigError(
            f"expected a variable name (t or a named input), got {of!r}", f"{path}.of"
        )
    if of != TIME and of not in inputs:
        known = ", ".join(sorted(inputs)) or "none yet"
        raise ConfigError(
            f"{of!r} is not t or a declared input; declare it under the channel's inputs "
            f"(declared: {known})",
            f"{path}.of",
        )
    is_time = of == TIME
    center, center_text = 0.0, ""
    scale, scale_text = 1.0, ""
    if "center" in fields:
        if is_time:
            center, center_text = _time_amount(fields["center"], f"{path}.center", positive=False)
        else:
            center = _number(fields["center"], f"{path}.center")
            center_text = f"{center:g}"
    if "scale" in fields:
        if is_time:
            scale, scale_text = _time_amount(fields["scale"], f"{path}.scale", positive=True)
        else:
            scale = _number(fields["scale"], f"{path}.scale", positive=True)
            scale_text = f"{scale:g}"
    label = of
    if center_text:
        label = f"{label}-{center_text}"
    if scale_text:
        label = f"({label})/{scale_text}" if center_text else f"{label}/{scale_text}"
    return Standardised(of, center, scale, label), is_time


def _parse_constant(fields: Mapping[str, Any], path: str, inputs: frozenset[str]) -> Term:
    if fields:
        raise ConfigError("`constant` takes no fields; write it as a bare list item", path)
    return Constant()


def _parse_polynomial(fields: Mapping[str, Any], path: str, inputs: frozenset[str]) -> Term:
    _check_keys(fields, ("of", "degree", "center", "scale"), ("of", "degree"), path)
    u, _ = _variable(fields, path, inputs)
    return Polynomial(u, _integer(fields["degree"], f"{path}.degree", 1, MAX_DEGREE))


def _shape_amount(
    fields: Mapping[str, Any], key: str, path: str, u: Standardised, is_time: bool
) -> tuple[float, str]:
    """tau/period: a duration for raw time, a plain number once time is scaled or for inputs."""
    if is_time and "scale" not in fields:
        return _time_amount(fields[key], f"{path}.{key}", positive=True)
    value = _number(fields[key], f"{path}.{key}", positive=True)
    return value, f"{value:g}"


def _parse_exponential(fields: Mapping[str, Any], path: str, inputs: frozenset[str]) -> Term:
    _check_keys(fields, ("of", "tau", "center", "scale"), ("of", "tau"), path)
    u, is_time = _variable(fields, path, inputs)
    tau, text = _shape_amount(fields, "tau", path, u, is_time)
    return Exponential(u, tau, text)


def _parse_periodic(fields: Mapping[str, Any], path: str, inputs: frozenset[str]) -> Term:
    _check_keys(fields, ("of", "period", "harmonics", "center", "scale"), ("of", "period"), path)
    u, is_time = _variable(fields, path, inputs)
    period, text = _shape_amount(fields, "period", path, u, is_time)
    harmonics = _integer(fields.get("harmonics", 1), f"{path}.harmonics", 1, MAX_HARMONICS)
    return Periodic(u, period, text, harmonics)


def parse_instant(value: Any, path: str) -> float:
    """An absolute time: RFC 3339 / ISO 8601 text with a zone, or epoch seconds."""
    if isinstance(value, datetime):  # YAML turns unquoted timestamps into datetimes
        if value.tzinfo is None:
            raise ConfigError(
                "the time has no zone; append Z for UTC or an offset like +02:00", path
            )
        return value.timestamp()
    if isinstance(value, str):
        try:
            parsed = datetime.fromisoformat(value.strip().replace("Z", "+00:00"))
        except ValueError:
            raise ConfigError(
                f"{value!r} is not a time; write ISO 8601 like 2026-05-01T00:00:00Z", path
            ) from None
        if parsed.tzinfo is None:
            raise ConfigError(
                f"{value!r} has no zone; append Z for UTC or an offset like +02:00", path
            )
        return parsed.timestamp()
    if isinstance(value, date):
        raise ConfigError(
            f"{value.isoformat()} is a date without a time; write {value.isoformat()}T00:00:00Z",
            path,
        )
    return _number(value, path)


def _parse_step(fields: Mapping[str, Any], path: str, inputs: frozenset[str]) -> Term:
    _check_keys(fields, ("of", "at", "center", "scale"), ("of", "at"), path)
    u, is_time = _variable(fields, path, inputs)
    if is_time:
        raw = fields["at"]
        at = parse_instant(raw, f"{path}.at")
        text = raw.strip() if isinstance(raw, str) else f"{at:g}"
        if isinstance(raw, datetime):
            text = raw.isoformat().replace("+00:00", "Z")
        if "center" in fields or "scale" in fields:
            raise ConfigError(
                "a step in time takes `at` only (an absolute time); remove center/scale", path
            )
        return Step(u, at, text)
    at = _number(fields["at"], f"{path}.at")
    return Step(u, at, f"{at:g}")


def _parse_expression(text: Any, path: str, inputs: frozenset[str]) -> Term:
    try:
        tree = expression.parse(text, inputs | {TIME})
    except ExpressionError as error:
        raise ExpressionError(error.message, path) from None
    return Expression(str(text).strip(), tree, expression.derivative(tree, TIME))


FAMILIES: dict[str, Parser] = {
    "constant": _parse_constant,
    "polynomial": _parse_polynomial,
    "exponential": _parse_exponential,
    "periodic": _parse_periodic,
    "step": _parse_step,
    "expression": _parse_expression,  # takes a string, not a mapping (see parse_term)
}


def parse_term(entry: Any, path: str, inputs: frozenset[str]) -> Term:
    """One YAML list item → a term, or ConfigError naming the path and the fix."""
    if isinstance(entry, str):
        name, fields = entry.strip(), None
    elif isinstance(entry, Mapping) and len(entry) == 1:
        key, fields = next(iter(entry.items()))
        name = str(key)
    else:
        raise ConfigError(
            "a basis entry is `constant` or a one-key mapping such as "
            "`polynomial: {of: t, degree: 2}`",
            path,
        )
    if name not in FAMILIES:
        close = difflib.get_close_matches(name, FAMILIES, n=1)
        hint = f"did you mean {close[0]!r}?" if close else f"known: {', '.join(FAMILIES)}"
        raise ConfigError(f"unknown basis term {name!r}; {hint}", path)
    if name == "expression":
        if fields is None:
            raise ConfigError('write an expression as `- expression: "log1p(t / 7d)"`', path)
        return _parse_expression(fields, f"{path}.expression", inputs)
    if fields is None:
        fields = {}
    if name == "constant" and fields != {}:
        raise ConfigError("`constant` takes no fields; write it as a bare list item", path)
    if not isinstance(fields, Mapping):
        raise ConfigError(
            f"expected a mapping of fields, e.g. {{of: t, degree: 2}}, got {fields!r}",
            f"{path}.{name}",
        )
    return FAMILIES[name](fields, path if name == "constant" else f"{path}.{name}", inputs)


def parse_basis(spec: Any, path: str = "basis", inputs: frozenset[str] = frozenset()) -> Basis:
    """A YAML basis list → Basis; raises ConfigError for the first bad entry."""
    if not isinstance(spec, list) or not spec:
        raise ConfigError("expected a non-empty list of basis terms, e.g. [constant]", path)
    terms = [parse_term(entry, f"{path}[{i}]", inputs) for i, entry in enumerate(spec)]
    basis = Basis(tuple(terms))
    if basis.size > 3 * MAX_DEGREE:
        raise ConfigError(f"the basis has {basis.size} columns; at most {3 * MAX_DEGREE}", path)
    return basis
