"""Correct digits reached on the NIST StRD linear least-squares suite, three ways.

Run from the repository root:

    PYTHONPATH=daemon python bench/fit_accuracy.py

For every certified file (the eight in ../shared/refdata/nist-strd plus Filip from
tests/refdata) it prints the log relative error (LRE, correct significant digits, capped
at the 15 digits NIST prints; McCullough, The American Statistician 52 (1998) 358-366)
reached by

- zeroline: the same path as `zeroline fit` (the basis YAML parsed, the design evaluated
  from the CSV cells, `fit_least_squares`), for coefficients, standard errors, residual SD
  and R²;
- numpy.linalg.lstsq on the raw design (an SVD-based solver, no column scaling and no
  refinement), coefficients and residual SD;
- the normal equations FᵀF c = Fᵀy solved by numpy.linalg.solve, coefficients and
  residual SD.

Each cell is the worst LRE over the vector (coefficients, standard errors). Where the
certified value is 0 (Wampler1/2 residual SD and standard errors) the absolute error is
scored. `--markdown` prints the table as Markdown for bench/RESULTS.md.
"""

from __future__ import annotations

import argparse
import math
import sys
import tempfile
import warnings
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "tests"))

from support import nist  # noqa: E402 - needs the path above
from zeroline.commands.fit import design_from_table, load_basis_file  # noqa: E402
from zeroline.csvdata import read_table  # noqa: E402
from zeroline.lsq import fit_least_squares  # noqa: E402

FILES = (*nist.EIGHT, "Filip")
COLUMNS = (
    "file", "zeroline coef", "zeroline SE", "zeroline res SD", "zeroline R²",
    "lstsq coef", "lstsq res SD", "normal eq. coef", "normal eq. res SD",
)  # fmt: skip


def residual_sd(design: np.ndarray, y: np.ndarray, coefficients: np.ndarray) -> float:
    n, p = design.shape
    residual = y - design @ coefficients
    return math.sqrt(float(residual @ residual) / (n - p))


def zeroline_scores(data: nist.Dataset, folder: Path) -> list[float]:
    csv_path, basis_path = data.write_inputs(folder)
    table = read_table(csv_path)
    basis = load_basis_file(str(basis_path), frozenset(table.columns))
    design = design_from_table(table, basis)
    fit = fit_least_squares(design, table.columns["y"], None, basis.names)
    return [
        nist.min_lre(fit.coefficients, data.coefficients),
        nist.min_lre(fit.std_errors, data.std_errors),
        nist.lre(fit.residual_sd, data.residual_sd),
        nist.lre(fit.r_squared, data.r_squared),
    ]


def plain_scores(data: nist.Dataset) -> list[float]:
    design, y = data.design(), data.column("y")
    lstsq = np.linalg.lstsq(design, y, rcond=None)[0]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # an ill-conditioned solve is the point here
        try:
            normal = np.linalg.solve(design.T @ design, design.T @ y)
        except np.linalg.LinAlgError:  # singular in double: no digits at all
            normal = np.full(design.shape[1], np.nan)
    return [
        nist.min_lre(lstsq, data.coefficients),
        nist.lre(residual_sd(design, y, lstsq), data.residual_sd),
        nist.min_lre(normal, data.coefficients),
        nist.lre(residual_sd(design, y, normal), data.residual_sd),
    ]


def measure() -> list[tuple[str, list[float]]]:
    rows: list[tuple[str, list[float]]] = []
    with tempfile.TemporaryDirectory() as folder:
        for name in FILES:
            data = nist.load(name)
            rows.append((name, zeroline_scores(data, Path(folder)) + plain_scores(data)))
    return rows


def render(rows: list[tuple[str, list[float]]], markdown: bool) -> str:
    if markdown:
        lines = ["| " + " | ".join(COLUMNS) + " |", "|" + "---|" * len(COLUMNS)]
        lines += ["| " + " | ".join([name, *(f"{v:.1f}" for v in values)]) + " |"
                  for name, values in rows]  # fmt: skip
        return "\n".join(lines)
    widths = [max(9, len(c)) for c in COLUMNS]
    lines = ["  ".join(c.rjust(w) for c, w in zip(COLUMNS, widths, strict=True))]
    for name, values in rows:
        cells = [name, *(f"{v:.1f}" for v in values)]
        lines.append("  ".join(c.rjust(w) for c, w in zip(cells, widths, strict=True)))
    return "\n".join(lines)


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--markdown", action="store_true", help="print a Markdown table")
    args = parser.parse_args()
    print(render(measure(), args.markdown))
    print("\nLRE = correct significant digits (max 15); absolute error where certified = 0.")
    return 0


if __name__ == "__main__":
    sys.exit(main())
