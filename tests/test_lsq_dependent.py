"""Dependent and nearly dependent bases are refused, naming the terms that collide.

Source: design §1 ("the columns of F must be linearly independent; zeroline detects when
they are not (or nearly not: condition number) and says which terms collide") and issue 2,
requirement 4 (exit 2, a message naming e.g. `constant` and a `step` that is 1 everywhere).
That exactly dependent columns make FᵀF singular is textbook linear algebra (Golub & Van
Loan, Matrix Computations, §5.5, rank-deficient least squares); the nearly dependent cases
sit inside double rounding (relative perturbation 1e-16 of a column), where no digit of
the separate coefficients is meaningful.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pytest

from zeroline import cli
from zeroline.basis import parse_basis
from zeroline.errors import DependentBasisError
from zeroline.lsq import fit_least_squares
from zeroline.yamlfile import parse_yaml

RNG_SEED = 20260501


def fit_cli(tmp_path: Path, csv: str, basis: str, capsys: Any) -> tuple[int, str]:
    (tmp_path / "log.csv").write_text(csv)
    (tmp_path / "basis.yaml").write_text(basis)
    argv = ["fit", str(tmp_path / "log.csv"), "--y", "y", "--basis", str(tmp_path / "basis.yaml")]
    code = cli.main([*argv, "--json"])
    err = capsys.readouterr().err
    assert "Traceback" not in err
    return code, err


def one_line(err: str) -> str:
    lines = err.splitlines()
    assert len(lines) == 1, err
    assert lines[0].startswith("zeroline: error: ")
    return lines[0]


def design_of(basis_yaml: str, t: np.ndarray, inputs: dict[str, np.ndarray]) -> Any:
    basis = parse_basis(parse_yaml(basis_yaml).data, "basis", frozenset(inputs))
    return basis, basis.evaluate(t, inputs)


def test_constant_and_step_that_is_one_everywhere(tmp_path: Path, capsys: Any) -> None:
    """Issue 2: `constant` and a time `step` before all the data collide; both are named."""
    rows = "\n".join(f"2026-05-0{d}T00:00:00Z,{1.0 + 0.1 * d}" for d in range(1, 7))
    basis = '- constant\n- step: {of: t, at: "2026-04-01T00:00:00Z"}\n'
    code, err = fit_cli(tmp_path, "time,y\n" + rows + "\n", basis, capsys)
    line = one_line(err)
    assert code == 2, line
    assert "'constant'" in line and "'step(t>=2026-04-01T00:00:00Z)'" in line, line
    assert "dependent" in line


def test_constant_and_step_of_an_input(tmp_path: Path, capsys: Any) -> None:
    """A `step` of a named input that is past its threshold on every row equals `constant`."""
    csv = "y,valve\n1,3\n2,4\n3,5\n4,6\n"
    code, err = fit_cli(tmp_path, csv, "- constant\n- step: {of: valve, at: 1}\n", capsys)
    line = one_line(err)
    assert code == 2
    assert "'constant'" in line and "'step(valve>=1)'" in line, line


def test_only_the_colliding_terms_are_named(tmp_path: Path, capsys: Any) -> None:
    """x and x/2 collide; the independent `constant` and x² must not be blamed."""
    rng = np.random.default_rng(RNG_SEED)
    x = rng.uniform(-5, 5, size=20)
    csv = "y,x\n" + "\n".join(f"{float(v) ** 2!r},{float(v)!r}" for v in x) + "\n"
    basis = (
        "- constant\n- polynomial: {of: x, degree: 2}\n- polynomial: {of: x, degree: 1, scale: 2}\n"
    )
    code, err = fit_cli(tmp_path, csv, basis, capsys)
    line = one_line(err)
    assert code == 2
    assert "'x'" in line and "'x/2'" in line, line
    assert "'constant'" not in line and "'x^2'" not in line, line


def test_three_way_dependence_names_all_three() -> None:
    """constant, x and the expression 2*x + 3 are dependent together (no pair is)."""
    x = np.linspace(0.0, 4.0, 9)
    basis, design = design_of('- constant\n- polynomial: {of: x, degree: 1}\n'
                              '- expression: "2*x + 3"\n', np.zeros(9), {"x": x})  # fmt: skip
    with pytest.raises(DependentBasisError) as caught:
        fit_least_squares(design, x**2, names=basis.names)
    message = str(caught.value)
    assert all(f"'{name}'" in message for name in ("constant", "x", "2*x + 3")), message


def test_dependence_that_only_the_data_creates() -> None:
    """x and x² are independent functions, but not on data with two distinct x values."""
    x = np.array([1.0, 2.0, 1.0, 2.0, 1.0, 2.0])
    basis, design = design_of("- constant\n- polynomial: {of: x, degree: 2}\n", x, {"x": x})
    with pytest.raises(DependentBasisError, match="'constant', 'x' and 'x\\^2'"):
        fit_least_squares(design, x + 1.0, names=basis.names)


def test_numerically_dependent_columns_are_refused() -> None:
    """A column equal to another up to relative 1e-16 noise is refused, not solved."""
    rng = np.random.default_rng(RNG_SEED)
    x = rng.uniform(1.0, 2.0, size=30)
    nearly = x * (1.0 + 1e-16 * rng.standard_normal(30))
    assert not np.array_equal(x, nearly)  # exactly rank 3 in exact arithmetic
    design = np.column_stack([np.ones(30), x, nearly])
    with pytest.raises(DependentBasisError, match="'a' and 'b'"):
        fit_least_squares(design, x, names=["constant", "a", "b"])


def test_ill_conditioned_but_independent_is_solved() -> None:
    """Correlated to 1e-8 (κ ≈ 1e8): badly conditioned, yet well inside double; fitted."""
    rng = np.random.default_rng(RNG_SEED)
    x = rng.uniform(1.0, 2.0, size=40)
    other = x + 1e-8 * rng.standard_normal(40)
    truth = np.array([0.5, 2.0, -1.0])
    design = np.column_stack([np.ones(40), x, other])
    fit = fit_least_squares(design, design @ truth)
    assert 1e7 < fit.condition_number < 1e10
    np.testing.assert_allclose(fit.coefficients, truth, rtol=1e-6)


def test_zero_column_is_named() -> None:
    """A column that is zero on every used row (a step after all the data) is named."""
    with pytest.raises(DependentBasisError, match="'late step' is zero"):
        fit_least_squares(np.c_[np.ones(5), np.zeros(5)], np.arange(5.0), names=["c", "late step"])


def test_rows_with_zero_weight_do_not_separate_terms() -> None:
    """The only rows where a step is 0 have weight 0: on the rows used it equals `constant`."""
    step = np.array([0.0, 0.0, 1.0, 1.0, 1.0, 1.0])
    weights = np.array([0.0, 0.0, 1.0, 2.0, 1.0, 1.0])
    design = np.column_stack([np.ones(6), step, np.arange(6.0)])
    with pytest.raises(DependentBasisError, match="'constant' and 'step'"):
        fit_least_squares(design, np.arange(6.0) ** 2, weights, names=["constant", "step", "t"])
    fit_least_squares(design, np.arange(6.0) ** 2, names=["constant", "step", "t"])  # unweighted


def test_constant_and_time_step_collide_in_the_library() -> None:
    """The same collision without the CLI: a time step bound to an epoch after its instant."""
    epoch = 1_777_593_600.0  # 2026-05-01T00:00:00Z
    basis, _ = design_of('- constant\n- step: {of: t, at: "2026-04-01T00:00:00Z"}\n',
                         np.zeros(1), {})  # fmt: skip
    t = np.arange(6.0) * 86400.0
    design = basis.with_epoch(epoch).evaluate(t, {})
    assert np.array_equal(design, np.ones((6, 2)))
    with pytest.raises(DependentBasisError, match="'constant' and 'step\\(t>=2026-04-01"):
        fit_least_squares(design, t, names=basis.names)
