"""The batch fit against statsmodels OLS/WLS, an independent reference implementation.

Source: statsmodels (`statsmodels.regression.linear_model.OLS` and `WLS`, version 0.14+),
whose conventions the fit follows; on well-posed random designs both must agree to near
double precision:

- residual SD = √(RSS/(n − p)) (statsmodels `sqrt(scale)`), RSS weighted for WLS;
- R² centred when the model has a constant column (`rsquared`, weighted mean for WLS),
  uncentred (1 − RSS/Σw y²) when it has none;
- log-likelihood ℓ = −n/2·(ln 2π + ln(RSS/n) + 1) + ½ Σ ln wᵢ (`llf`), and with k = p
  estimated coefficients AIC = −2ℓ + 2k, BIC = −2ℓ + k ln n (`aic`, `bic`; statsmodels
  counts k = df_model + k_constant = p);
- standard errors √(σ̂² diag (FᵀWF)⁻¹) (`bse`).

Rows with weight 0 carry no information; zeroline leaves them out (and out of n), so the
reference is WLS on the remaining rows. Designs are random but seeded.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import statsmodels.api as sm

from zeroline import cli
from zeroline.lsq import FitResult, fit_least_squares

RTOL = 1e-10


def random_problem(
    seed: int, n: int, p: int, *, intercept: bool
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """A well-posed design (columns of different scales), targets and positive weights."""
    rng = np.random.default_rng(seed)
    design = rng.normal(size=(n, p)) * 10.0 ** rng.uniform(-3, 3, size=p)
    if intercept:
        design[:, 0] = 1.0
    truth = rng.normal(size=p) / np.linalg.norm(design, axis=0) * np.sqrt(n)
    y = design @ truth + rng.normal(scale=0.3, size=n)
    weights = rng.uniform(0.2, 5.0, size=n)
    return design, y, weights


def assert_matches(fit: FitResult, reference: Any, n: int) -> None:
    np.testing.assert_allclose(fit.coefficients, reference.params, rtol=RTOL, atol=0)
    np.testing.assert_allclose(fit.std_errors, reference.bse, rtol=RTOL, atol=0)
    assert fit.residual_sd == pytest.approx(np.sqrt(reference.scale), rel=RTOL)
    assert fit.r_squared == pytest.approx(reference.rsquared, rel=RTOL)
    assert fit.aic == pytest.approx(reference.aic, rel=RTOL)
    assert fit.bic == pytest.approx(reference.bic, rel=RTOL)
    np.testing.assert_allclose(fit.covariance, reference.cov_params(), rtol=1e-9, atol=1e-300)
    assert fit.n == n


@pytest.mark.parametrize("seed", range(6))
def test_ols_matches_statsmodels(seed: int) -> None:
    """statsmodels OLS: coefficients, standard errors, residual SD, R², AIC and BIC."""
    n, p = 30 + 7 * seed, 2 + seed % 5
    design, y, _ = random_problem(seed, n, p, intercept=True)
    fit = fit_least_squares(design, y)
    assert_matches(fit, sm.OLS(y, design).fit(), n)


@pytest.mark.parametrize("seed", range(4))
def test_ols_without_constant_uses_uncentred_r_squared(seed: int) -> None:
    """statsmodels OLS without a constant column reports the uncentred R²."""
    design, y, _ = random_problem(100 + seed, 25, 3, intercept=False)
    fit = fit_least_squares(design, y)
    reference = sm.OLS(y, design).fit()
    assert reference.k_constant == 0
    assert_matches(fit, reference, 25)
    assert fit.r_squared == pytest.approx(1 - reference.ssr / float(y @ y), rel=RTOL)


@pytest.mark.parametrize("seed", range(4))
def test_wls_matches_statsmodels(seed: int) -> None:
    """statsmodels WLS: weighted fit, including the ½Σ ln w term of the log-likelihood."""
    n, p = 40, 3 + seed
    design, y, weights = random_problem(200 + seed, n, p, intercept=True)
    fit = fit_least_squares(design, y, weights)
    assert_matches(fit, sm.WLS(y, design, weights=weights).fit(), n)


def test_zero_weight_rows_are_left_out() -> None:
    """statsmodels WLS on the rows with positive weight equals a fit with zero weights."""
    design, y, weights = random_problem(300, 50, 4, intercept=True)
    weights[::5] = 0.0
    y[::5] = 1e6  # would wreck the fit if those rows counted at all
    keep = weights > 0
    fit = fit_least_squares(design, y, weights)
    reference = sm.WLS(y[keep], design[keep], weights=weights[keep]).fit()
    assert_matches(fit, reference, int(keep.sum()))


def test_cli_weights_column_matches_statsmodels(tmp_path: Path, capsys: Any) -> None:
    """statsmodels WLS through `zeroline fit --weights COL --json` (CSV round trip by repr)."""
    rng = np.random.default_rng(400)
    x = rng.uniform(0, 10, size=35)
    w = rng.uniform(0.5, 3.0, size=35)
    y = 1.5 - 0.25 * x + 0.02 * x**2 + rng.normal(scale=0.1, size=35)
    rows = "\n".join(",".join(repr(float(v)) for v in row) for row in zip(y, x, w, strict=True))
    (tmp_path / "log.csv").write_text("y,x,w\n" + rows + "\n")
    (tmp_path / "basis.yaml").write_text("- constant\n- polynomial: {of: x, degree: 2}\n")
    argv = ["fit", str(tmp_path / "log.csv"), "--y", "y", "--basis", str(tmp_path / "basis.yaml")]
    assert cli.main([*argv, "--weights", "w", "--json"]) == 0
    result = json.loads(capsys.readouterr().out)
    design = np.column_stack([np.ones_like(x), x, x**2])
    reference = sm.WLS(y, design, weights=w).fit()
    np.testing.assert_allclose(result["coefficients"], reference.params, rtol=RTOL)
    np.testing.assert_allclose(result["std_errors"], reference.bse, rtol=RTOL)
    assert result["aic"] == pytest.approx(reference.aic, rel=RTOL)
    assert result["bic"] == pytest.approx(reference.bic, rel=RTOL)
    assert result["r_squared"] == pytest.approx(reference.rsquared, rel=RTOL)
    unweighted = sm.OLS(y, design).fit()
    assert abs(result["coefficients"][1] - unweighted.params[1]) > 1e-6  # weights were used


def test_condition_number_is_that_of_the_unit_column_design() -> None:
    """numpy.linalg.cond (2-norm) of the design with unit-length columns, the reported κ."""
    design, y, _ = random_problem(500, 40, 4, intercept=True)
    unit = design / np.linalg.norm(design, axis=0)
    fit = fit_least_squares(design, y)
    assert fit.condition_number == pytest.approx(np.linalg.cond(unit), rel=1e-9)
