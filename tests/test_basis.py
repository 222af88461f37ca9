"""Basis terms: the design §2 contract (names, fields, columns), derivatives, time anchoring.

Sources: design §2 (the YAML families, their fields and what each column is: a contract);
the closed forms of the columns are those written there. Derivatives are checked against a
Richardson-extrapolated central difference (Press et al., Numerical Recipes, 3rd ed.,
§5.7). The UTC anchoring check uses exact rational arithmetic (Python `fractions`) for
the reference phase. Randomised checks use hypothesis with fixed seeds (`derandomize`).
"""

from __future__ import annotations

import math
from fractions import Fraction
from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from zeroline.basis import MAX_DEGREE, Basis, parse_basis
from zeroline.errors import ConfigError
from zeroline.yamlfile import parse_yaml

SETTINGS = settings(max_examples=40, derandomize=True, deadline=None, database=None)
INPUTS = frozenset({"temperature", "humidity"})
DAY = 86400.0


def basis_from(text: str) -> Basis:
    return parse_basis(parse_yaml(text).data, "basis", INPUTS)


def columns(text: str, t: Any, **inputs: Any) -> np.ndarray:
    t = np.asarray(t, dtype=np.float64)
    values = {name: np.asarray(v, dtype=np.float64) for name, v in inputs.items()}
    return basis_from(text).evaluate(t, values)


def central_difference(basis: Basis, t: np.ndarray, inputs: dict[str, np.ndarray]) -> np.ndarray:
    h = np.full((t.shape[0], 1), 1e-3)  # absolute: the shortest time scale here is ~1 s

    def d(step: np.ndarray) -> np.ndarray:
        s = step[:, 0]
        return (basis.evaluate(t + s, inputs) - basis.evaluate(t - s, inputs)) / (2 * step)

    return (4 * d(h / 2) - d(h)) / 3


# --- the contract: names and columns --------------------------------------------------------


def test_design_section_2_example_names_and_size() -> None:
    """The example basis of design §2, term by term, with the column names it yields."""
    basis = basis_from(
        "- constant\n"
        "- polynomial: {of: t, degree: 2, scale: 30d}\n"
        "- polynomial: {of: temperature, degree: 2, center: 20}\n"
        "- exponential: {of: t, tau: 36h}\n"
        "- periodic: {of: t, period: 24h, harmonics: 2}\n"
        '- step: {of: t, at: "2026-05-01T00:00:00Z"}\n'
        '- expression: "log1p(t / 7d)"\n'
    )
    assert basis.names == (
        "constant",
        "t/30d", "(t/30d)^2",
        "temperature-20", "(temperature-20)^2",
        "exp(-t/36h)",
        "sin(2π·t/24h)", "cos(2π·t/24h)", "sin(4π·t/24h)", "cos(4π·t/24h)",
        "step(t>=2026-05-01T00:00:00Z)",
        "log1p(t / 7d)",
    )  # fmt: skip
    assert basis.size == 12
    assert basis.variables == {"temperature"}
    assert basis.owners() == (0, 1, 1, 2, 2, 3, 4, 4, 4, 4, 5, 6)


def test_constant_is_one() -> None:
    np.testing.assert_array_equal(columns("- constant\n", [0.0, 5.0, -3.0]), np.ones((3, 1)))


def test_polynomial_of_scaled_time() -> None:
    """(t/30d), (t/30d)^2 — no constant column."""
    t = np.array([0.0, 15 * DAY, 60 * DAY])
    got = columns("- polynomial: {of: t, degree: 2, scale: 30d}\n", t)
    u = t / (30 * DAY)
    np.testing.assert_allclose(got, np.c_[u, u**2], rtol=1e-15)


def test_polynomial_of_centred_and_scaled_input() -> None:
    """(T − 20)/5 and its powers, named as written."""
    text = "- polynomial: {of: temperature, degree: 3, center: 20, scale: 5}\n"
    assert basis_from(text).names == ("(temperature-20)/5", "((temperature-20)/5)^2",
                                      "((temperature-20)/5)^3")  # fmt: skip
    got = columns(text, [0.0, 0.0], temperature=[25.0, 10.0])
    np.testing.assert_allclose(got, [[1, 1, 1], [-2, 4, -8]], rtol=1e-15)


def test_exponential() -> None:
    """exp(−t/τ) with τ a duration."""
    t = np.array([0.0, 36 * 3600.0, 72 * 3600.0])
    got = columns("- exponential: {of: t, tau: 36h}\n", t)
    np.testing.assert_allclose(got[:, 0], [1.0, math.exp(-1), math.exp(-2)], rtol=1e-15)


def test_periodic_pairs() -> None:
    """sin/cos of 2πk·t/period for k = 1…harmonics (epoch 0: phase of UTC midnight)."""
    t = np.array([0.0, 6 * 3600.0, 8 * 3600.0])
    got = columns("- periodic: {of: t, period: 1d, harmonics: 2}\n", t)
    phase = 2 * math.pi * t / DAY
    expected = np.c_[np.sin(phase), np.cos(phase), np.sin(2 * phase), np.cos(2 * phase)]
    np.testing.assert_allclose(got, expected, atol=1e-15)


def test_step_is_zero_before_and_one_from_its_instant() -> None:
    """0 before `at`, 1 from `at` on (at the instant itself: 1)."""
    at = 1_777_593_600.0  # 2026-05-01T00:00:00Z
    basis = basis_from('- step: {of: t, at: "2026-05-01T00:00:00Z"}\n').with_epoch(at - 10.0)
    got = basis.evaluate(np.array([0.0, 9.999, 10.0, 1e6]), {})
    np.testing.assert_array_equal(got[:, 0], [0.0, 0.0, 1.0, 1.0])


def test_step_accepts_an_unquoted_yaml_timestamp_and_offsets() -> None:
    """YAML turns an unquoted RFC 3339 time into a datetime; offsets count (+02:00)."""
    a = basis_from("- step: {of: t, at: 2026-05-01T02:00:00+02:00}\n").with_epoch(0.0)
    b = basis_from('- step: {of: t, at: "2026-05-01T00:00:00Z"}\n').with_epoch(0.0)
    t = np.array([1_777_593_599.0, 1_777_593_600.0])
    np.testing.assert_array_equal(a.evaluate(t, {}), b.evaluate(t, {}))
    np.testing.assert_array_equal(a.evaluate(t, {})[:, 0], [0.0, 1.0])


def test_step_of_an_input() -> None:
    got = columns("- step: {of: humidity, at: 80}\n", [0, 0, 0], humidity=[79.9, 80.0, 95.0])
    np.testing.assert_array_equal(got[:, 0], [0.0, 1.0, 1.0])


def test_expression_term() -> None:
    got = columns('- expression: "log1p(t / 7d)"\n', [0.0, 7 * DAY])
    np.testing.assert_allclose(got[:, 0], [0.0, math.log(2.0)], rtol=1e-15)


def test_a_mapping_entry_equals_the_bare_constant() -> None:
    assert basis_from("- constant:\n").names == ("constant",)


# --- time anchoring over years ---------------------------------------------------------------


@pytest.mark.parametrize("years", [0.0, 3.0, 10.0])
def test_periodic_phase_is_utc_anchored_to_double_precision(years: float) -> None:
    """Phase of a daily term after `years` of operation with a 2026 epoch, vs exact arithmetic.

    The reference reduces (epoch + t) modulo the period with Fractions, so it carries no
    rounding; the term must agree to 1e-9 in value, i.e. sub-second timing after years.
    """
    epoch = 1_777_600_123  # an integer second in May 2026
    t = np.array([0.0, 1.0, 3601.5]) + round(years * 365.25 * DAY)
    basis = basis_from("- periodic: {of: t, period: 1d, harmonics: 3}\n").with_epoch(epoch)
    got = basis.evaluate(t, {})
    for row, seconds in enumerate(t):
        fraction = (Fraction(epoch) + Fraction(seconds)) % 86400 / 86400
        for k in range(1, 4):
            phase = 2 * math.pi * float(k * fraction % 1)
            assert got[row, 2 * k - 2] == pytest.approx(math.sin(phase), abs=1e-9)
            assert got[row, 2 * k - 1] == pytest.approx(math.cos(phase), abs=1e-9)


@SETTINGS
@given(st.integers(0, 2_000_000_000), st.floats(0.0, 3e8), st.floats(3600.0, 40 * DAY))
def test_with_epoch_is_a_shift_of_absolute_time(epoch: int, t: float, period: float) -> None:
    """Binding an epoch E gives at t what the unbound term gives at E + t (periodic)."""
    basis = basis_from(f"- periodic: {{of: t, period: {period:.9f}, harmonics: 2}}\n")
    bound = basis.with_epoch(float(epoch)).evaluate(np.array([t]), {})
    absolute = basis.evaluate(np.array([float(epoch) + t]), {})
    np.testing.assert_allclose(bound, absolute, atol=1e-6)


# --- derivatives for every family -----------------------------------------------------------

# Fixed-point text: YAML 1.1 (PyYAML) reads an exponent form such as 1e-05 as a string.
scales = st.floats(0.5, 50.0).map(lambda x: f"{x:.9f}")
centers = st.floats(-20.0, 20.0).map(lambda x: f"{x:.9f}")
TIMES = np.array([0.7, 13.0, 77.7, 190.0])

FAMILY_STRATEGIES = {
    "constant": st.just("- constant\n"),
    "polynomial": st.builds(
        lambda d, c, s: f"- polynomial: {{of: t, degree: {d}, center: {c}, scale: {s}}}\n",
        st.integers(1, 6), centers, scales,
    ),
    "polynomial of an input": st.builds(
        lambda d: f"- polynomial: {{of: temperature, degree: {d}}}\n", st.integers(1, 4)
    ),
    "exponential": st.builds(
        lambda tau, c, s: f"- exponential: {{of: t, tau: {tau:.9f}, center: {c}, scale: {s}}}\n",
        st.floats(0.5, 20.0), centers, scales,
    ),
    "exponential of raw time": st.builds(
        lambda tau: f"- exponential: {{of: t, tau: {tau:.9f}}}\n", st.floats(20.0, 500.0)
    ),
    "periodic": st.builds(
        lambda p, h: f"- periodic: {{of: t, period: {p:.9f}, harmonics: {h}}}\n",
        st.floats(20.0, 400.0), st.integers(1, 6),
    ),
    "periodic of scaled time": st.builds(
        lambda p, s: f"- periodic: {{of: t, period: {p:.9f}, scale: {s:.9f}, harmonics: 2}}\n",
        st.floats(1.0, 10.0), st.floats(10.0, 50.0),
    ),
    "step": st.just('- step: {of: t, at: "1970-01-01T00:00:50Z"}\n'),
    "expression": st.sampled_from([
        '- expression: "log1p(t / 1min)"\n',
        '- expression: "sin(t / 30s) * temperature"\n',
        '- expression: "exp(-t/100s) * (temperature - 20)^2"\n',
        '- expression: "t^1.5 / (1 + humidity)"\n',
    ]),
}  # fmt: skip


@pytest.mark.parametrize("family", sorted(FAMILY_STRATEGIES))
def test_derivative_matches_finite_differences(family: str) -> None:
    """d(column)/dt of each family vs a central difference; named inputs held constant."""

    @SETTINGS
    @given(FAMILY_STRATEGIES[family], st.integers(0, 2**32 - 1))
    def check(text: str, seed: int) -> None:
        rng = np.random.default_rng(seed)
        basis = basis_from(text).with_epoch(float(rng.integers(0, 2_000_000_000)))
        inputs = {
            "temperature": rng.uniform(10.0, 30.0, size=TIMES.shape[0]),
            "humidity": rng.uniform(20.0, 90.0, size=TIMES.shape[0]),
        }
        times = TIMES + rng.uniform(0.0, 0.5)  # never within 0.5 s of the step at 50 s
        numeric = central_difference(basis, times, inputs)
        size = max(1.0, float(np.max(np.abs(basis.evaluate(times, inputs)))))
        exact = basis.derivative(times, inputs)
        assert exact.shape == (times.shape[0], basis.size)
        np.testing.assert_allclose(exact, numeric, rtol=1e-6, atol=1e-8 * size)

    check()


def test_derivative_of_an_input_term_is_zero_even_where_it_varies() -> None:
    """Named inputs are held constant in d/dt (design: derivative is for drift rates)."""
    basis = basis_from("- polynomial: {of: temperature, degree: 2}\n")
    got = basis.derivative(np.array([0.0, 1.0]), {"temperature": np.array([20.0, 30.0])})
    np.testing.assert_array_equal(got, np.zeros((2, 2)))


# --- errors: every one names its key path and the fix ----------------------------------------


@pytest.mark.parametrize(
    ("text", "path", "says"),
    [
        ("[]", "basis", "non-empty list"),
        ("constant", "basis", "list"),
        ("- 5\n", "basis[0]", "one-key mapping"),
        ("- {constant: 1, polynomial: 2}\n", "basis[0]", "one-key mapping"),
        ("- polynomal: {of: t, degree: 1}\n", "basis[0]", "did you mean 'polynomial'"),
        ("- wiggle\n", "basis[0]", "known: constant, polynomial"),
        ("- constant: {of: t}\n", "basis[0]", "takes no fields"),
        ("- polynomial: {of: t}\n", "basis[0].polynomial.degree", "missing required key"),
        ("- polynomial: {of: t, degree: 0}\n", "basis[0].polynomial.degree", "from 1 to 12"),
        ("- polynomial: {of: t, degree: 13}\n", "basis[0].polynomial.degree", "from 1 to 12"),
        ("- polynomial: {of: t, degree: 2.0}\n", "basis[0].polynomial.degree", "whole number"),
        ("- polynomial: {of: t, degree: true}\n", "basis[0].polynomial.degree", "whole number"),
        (
            "- polynomial: {of: t, degree: 1, scal: 2}\n",
            "basis[0].polynomial.scal",
            "did you mean 'scale'",
        ),
        (
            "- polynomial: {of: pressure, degree: 1}\n",
            "basis[0].polynomial.of",
            "declared: humidity, temperature",
        ),
        ("- polynomial: {of: [t], degree: 1}\n", "basis[0].polynomial.of", "variable name"),
        (
            "- polynomial: {of: t, degree: 1, scale: 0s}\n",
            "basis[0].polynomial.scale",
            "longer than zero",
        ),
        (
            "- polynomial: {of: temperature, degree: 1, scale: -2}\n",
            "basis[0].polynomial.scale",
            "greater than zero",
        ),
        (
            "- polynomial: {of: temperature, degree: 1, center: warm}\n",
            "basis[0].polynomial.center",
            "finite number",
        ),
        (
            "- polynomial: {of: temperature, degree: 1, center: .nan}\n",
            "basis[0].polynomial.center",
            "finite number",
        ),
        ("- polynomial: 3\n", "basis[0].polynomial", "mapping of fields"),
        ("- exponential: {of: t, tau: -3h}\n", "basis[0].exponential.tau", "not a duration"),
        ("- exponential: {of: t}\n", "basis[0].exponential.tau", "missing required key"),
        (
            "- periodic: {of: t, period: 1d, harmonics: 7}\n",
            "basis[0].periodic.harmonics",
            "from 1 to 6",
        ),
        ("- step: {of: t, at: yesterday}\n", "basis[0].step.at", "ISO 8601"),
        ("- step: {of: t, at: 2026-05-01}\n", "basis[0].step.at", "2026-05-01T00:00:00Z"),
        ("- step: {of: t, at: 2026-05-01 10:00:00}\n", "basis[0].step.at", "no zone"),
        ('- step: {of: t, at: "2026-05-01T10:00:00"}\n', "basis[0].step.at", "no zone"),
        (
            '- step: {of: t, at: "2026-05-01T00:00:00Z", scale: 2}\n',
            "basis[0].step",
            "takes `at` only",
        ),
        ("- expression:\n", "basis[0]", "write an expression as"),
        ('- expression: "humidity + pressure"\n', "basis[0].expression", "'pressure'"),
        ("- polynomial: {of: t, degree: 12}\n" * 4, "basis", "at most 36"),
    ],
)
def test_errors_name_the_key_path(text: str, path: str, says: str) -> None:
    """Each bad entry is one ConfigError whose path points at the key and says the fix."""
    with pytest.raises(ConfigError) as caught:
        basis_from(text)
    assert caught.value.path == path, str(caught.value)
    assert says in caught.value.message
    assert "\n" not in str(caught.value)


def test_a_bare_number_period_for_raw_time_is_seconds() -> None:
    """Numbers where durations are expected are seconds (`period: 24` is 24 s)."""
    basis = basis_from("- periodic: {of: t, period: 24}\n")
    assert basis.names == ("sin(2π·t/24s)", "cos(2π·t/24s)")
    np.testing.assert_allclose(basis.evaluate(np.array([6.0]), {}), [[1.0, 0.0]], atol=1e-15)


def test_largest_allowed_degree_is_accepted() -> None:
    assert basis_from(f"- polynomial: {{of: t, degree: {MAX_DEGREE}}}\n").size == MAX_DEGREE


def test_scalar_row_equals_the_array_design_for_every_family() -> None:
    """`Basis.row`/`slope` (the per-reading hot path, Python floats) give the same numbers
    as `evaluate`/`derivative` (numpy arrays) for every family, to 1e-12 relative."""
    import yaml

    from zeroline.basis import parse_basis

    spec = yaml.safe_load(
        """
- constant
- polynomial: {of: t, degree: 3, scale: 30d, center: 2d}
- polynomial: {of: temperature, degree: 2, center: 20}
- exponential: {of: t, tau: 36h}
- periodic: {of: t, period: 24h, harmonics: 2}
- periodic: {of: temperature, period: 7}
- step: {of: t, at: "2026-11-05T00:00:00Z"}
- step: {of: temperature, at: 21}
- expression: "log1p(t / 7d) * (temperature - 20) + sqrt(abs(temperature))"
"""
    )
    basis = parse_basis(spec, inputs=frozenset({"temperature"})).with_epoch(1793491200.0)
    rng = np.random.default_rng(12)
    times = rng.uniform(0, 60 * 86400.0, 40)
    temperatures = rng.uniform(5, 35, 40)
    design = basis.evaluate(times, {"temperature": temperatures})
    slopes = basis.derivative(times, {"temperature": temperatures})
    for i in range(times.size):
        inputs = {"temperature": float(temperatures[i])}
        np.testing.assert_allclose(
            basis.row(float(times[i]), inputs), design[i], rtol=1e-12, atol=1e-15
        )
        np.testing.assert_allclose(
            basis.slope(float(times[i]), inputs), slopes[i], rtol=1e-12, atol=1e-18
        )


def test_point_is_row_and_slope_bit_for_bit_for_every_family() -> None:
    """`Basis.point` (row and slope in one pass) and `point_with` (other input values,
    time-only terms reused) give exactly the floats of `row` and `slope`: the channel's
    corrected values must not change by a digit when it uses them. Harmonics 1 and 2 and
    degrees 1, 2 and 3 cover the spelt-out cases and the general loops."""
    import yaml

    spec = yaml.safe_load(
        """
- constant
- polynomial: {of: t, degree: 1, scale: 30d}
- polynomial: {of: t, degree: 2, scale: 7d, center: 1d}
- polynomial: {of: t, degree: 3, scale: 30d, center: 2d}
- polynomial: {of: temperature, degree: 1, center: 20}
- polynomial: {of: temperature, degree: 2, center: 20, scale: 5}
- exponential: {of: t, tau: 36h}
- periodic: {of: t, period: 24h}
- periodic: {of: t, period: 12h, harmonics: 2}
- periodic: {of: temperature, period: 7}
- step: {of: t, at: "2026-11-05T00:00:00Z"}
- step: {of: temperature, at: 21}
- expression: "log1p(t / 7d) * (temperature - 20) + sqrt(abs(temperature))"
"""
    )
    basis = parse_basis(spec, inputs=frozenset({"temperature"})).with_epoch(1793491200.0)
    rng = np.random.default_rng(13)
    for t, temperature, mean in zip(
        rng.uniform(0, 60 * DAY, 50), rng.uniform(5, 35, 50), rng.uniform(5, 35, 50), strict=True
    ):
        here = {"temperature": float(temperature)}
        held = {"temperature": float(mean)}
        point = basis.point(float(t), here)
        assert point == (basis.row(float(t), here).tolist(), basis.slope(float(t), here).tolist())
        assert basis.point_with(float(t), held, point) == (
            basis.row(float(t), held).tolist(),
            basis.slope(float(t), held).tolist(),
        )
