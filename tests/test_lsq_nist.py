"""`zeroline fit` against the NIST StRD linear least-squares certified values.

Source: NIST Statistical Reference Datasets, Linear Least Squares Regression suite
(NIST/ITL Statistical Engineering Division; files as described in
/work/shared/refdata/nist-strd/README.md and tests/refdata/README.md). Scoring by the log
relative error (LRE, correct significant digits) of McCullough, The American Statistician
52 (1998) 358-366, capped at the 15 digits the certified values are printed with; see
tests/support/nist.py.

Every fit goes through the real contract path: the data is written as a CSV (columns y, x
or y, x1..x6, cells exactly as NIST printed them), the model as a basis YAML, and
`zeroline.cli.main(["fit", ..., "--json"])` runs in-process; the JSON it prints is scored.

Targets (stated, not measured-and-frozen):
- the eight shared files: at least 10 correct digits for every coefficient, every standard
  error, the residual SD and R². Where the certified value is 0 (Wampler1/2 fit exactly:
  residual SD and standard errors 0) the absolute error must be below 1e-10 instead.
- Filip: at least 7 digits for coefficients and standard errors. Lower on purpose: its
  design holds x^10 for x near −9, so the powers themselves are rounded in double
  precision and the raw design's condition number is about 1e15; no double-precision
  method that is given the design can certify more. It must still be fitted, not refused.
For scale (issue 2's statement, reproduced by bench/fit_accuracy.py): plain
numpy.linalg.lstsq reaches about 6.3 digits on Pontius, the normal equations about 6.4 on
Wampler1 and Wampler3.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import pytest

from support import nist
from zeroline import cli

TARGET_DIGITS = 10.0
FILIP_TARGET_DIGITS = 7.0


def fit_via_cli(dataset: nist.Dataset, folder: Path, capsys: pytest.CaptureFixture[str]) -> Any:
    """Run `zeroline fit DATA.csv --y y --basis BASIS.yaml --json` and parse its output."""
    csv_path, basis_path = dataset.write_inputs(folder)
    code = cli.main(["fit", str(csv_path), "--y", "y", "--basis", str(basis_path), "--json"])
    captured = capsys.readouterr()
    assert code == 0, captured.err
    assert captured.err == ""
    return json.loads(captured.out)


@pytest.fixture(scope="module")
def datasets() -> dict[str, nist.Dataset]:
    return {name: nist.load(name) for name in (*nist.EIGHT, "Filip")}


def test_loader_reads_what_each_header_states(datasets: dict[str, nist.Dataset]) -> None:
    """The loader finds the observation counts and parameter lists NIST's headers state."""
    expected = {  # name: (n, parameters), from each file's "Data:"/"Model:" header lines
        "Norris": (36, 2), "Pontius": (40, 3), "NoInt1": (11, 1), "NoInt2": (3, 1),
        "Longley": (16, 7), "Wampler1": (21, 6), "Wampler2": (21, 6), "Wampler3": (21, 6),
        "Filip": (82, 11),
    }  # fmt: skip
    for name, (n, p) in expected.items():
        data = datasets[name]
        assert (len(data.cells), len(data.coefficients)) == (n, p), name
        assert all(c.digits == 15 for c in data.coefficients), name
    assert datasets["NoInt1"].parameters == (1,)
    assert datasets["Longley"].predictors == tuple(f"x{k}" for k in range(1, 7))
    assert datasets["Pontius"].basis_yaml() == "- constant\n- polynomial: {of: x, degree: 2}\n"


@pytest.mark.parametrize("name", nist.EIGHT)
def test_certified_values_to_ten_digits(
    name: str, datasets: dict[str, nist.Dataset], tmp_path: Path, capsys: Any
) -> None:
    """NIST StRD (linear least squares): ≥ 10 digits for every certified quantity."""
    data = datasets[name]
    fit = fit_via_cli(data, tmp_path, capsys)
    assert fit["n"] == len(data.cells)
    assert len(fit["coefficients"]) == len(data.coefficients)
    scores = {
        "coefficients": nist.min_lre(fit["coefficients"], data.coefficients),
        "std_errors": nist.min_lre(fit["std_errors"], data.std_errors),
        "residual_sd": nist.lre(fit["residual_sd"], data.residual_sd),
        "r_squared": nist.lre(fit["r_squared"], data.r_squared),
    }
    low = {what: round(digits, 2) for what, digits in scores.items() if digits < TARGET_DIGITS}
    assert not low, f"{name}: fewer than {TARGET_DIGITS} correct digits: {low}"


def test_filip_is_fitted_to_seven_digits_not_refused(
    datasets: dict[str, nist.Dataset], tmp_path: Path, capsys: Any
) -> None:
    """NIST StRD Filip (degree-10 polynomial, raw design κ ≈ 1e15): fitted, ≥ 7 digits."""
    data = datasets["Filip"]
    fit = fit_via_cli(data, tmp_path, capsys)  # asserts exit 0: not refused as dependent
    assert nist.min_lre(fit["coefficients"], data.coefficients) >= FILIP_TARGET_DIGITS
    assert nist.min_lre(fit["std_errors"], data.std_errors) >= FILIP_TARGET_DIGITS
    assert nist.lre(fit["residual_sd"], data.residual_sd) >= FILIP_TARGET_DIGITS
    assert nist.lre(fit["r_squared"], data.r_squared) >= FILIP_TARGET_DIGITS


def test_exact_fits_have_zero_residual_to_absolute_precision(
    datasets: dict[str, nist.Dataset], tmp_path: Path, capsys: Any
) -> None:
    """NIST StRD Wampler1/Wampler2: certified residual SD and standard errors are exactly 0."""
    for name in ("Wampler1", "Wampler2"):
        data = datasets[name]
        assert data.residual_sd.value == 0.0
        fit = fit_via_cli(data, tmp_path, capsys)
        assert abs(fit["residual_sd"]) < 1e-10, name
        assert max(abs(s) for s in fit["std_errors"]) < 1e-10, name


def test_json_keys_are_the_contract_in_order(
    datasets: dict[str, nist.Dataset], tmp_path: Path, capsys: Any
) -> None:
    """Design §3 (contract): `fit --json` prints exactly these keys, in this order."""
    fit = fit_via_cli(datasets["Pontius"], tmp_path, capsys)
    assert list(fit) == [
        "terms", "coefficients", "std_errors", "residual_sd", "r_squared",
        "condition_number", "n", "aic", "bic",
    ]  # fmt: skip
    assert fit["terms"] == ["constant", "x", "x^2"]
    assert isinstance(fit["n"], int)
    for key in ("residual_sd", "r_squared", "condition_number", "aic", "bic"):
        assert isinstance(fit[key], float), key
    assert len(fit["coefficients"]) == len(fit["std_errors"]) == len(fit["terms"])
