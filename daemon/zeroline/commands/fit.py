"""`zeroline fit DATA.csv --y COL --basis BASIS.yaml [--weights COL] [--json]`.

One batch least-squares fit of a column of a recorded log over a basis, to try terms out
before putting them in a channel's config. Every CSV column is a named input usable in
`of:`; time `t` is seconds since the first row's `time` (or the `t` column itself).
"""

from __future__ import annotations

import argparse
import json
import math
from typing import TYPE_CHECKING, Any

import numpy as np

from zeroline.basis import TIME, Basis, parse_basis
from zeroline.csvdata import TIME_COLUMN, Table, read_table
from zeroline.errors import ConfigError, InputError
from zeroline.yamlfile import load_yaml

if TYPE_CHECKING:
    from zeroline.lsq import FitResult


def add_parser(commands: Any) -> None:
    parser = commands.add_parser("fit", help="one batch least-squares fit of a recorded log")
    parser.add_argument("data", metavar="DATA.csv", help="recorded log with a header row")
    parser.add_argument("--y", required=True, metavar="COL", help="column to fit")
    parser.add_argument("--basis", required=True, metavar="BASIS.yaml", help="basis term list")
    parser.add_argument("--weights", metavar="COL", help="column of weights (>= 0)")
    parser.add_argument("--json", action="store_true", help="print the result as one JSON object")
    parser.set_defaults(handler=run)


def load_basis_file(path: str, inputs: frozenset[str]) -> Basis:
    """A YAML basis list (or a mapping with one key `basis`) → Basis, errors as file:line."""
    located = load_yaml(path)
    spec, prefix = located.data, ""
    if isinstance(spec, dict) and set(spec) == {"basis"}:
        spec, prefix = spec["basis"], "basis"
    try:
        return parse_basis(spec, prefix, inputs)
    except ConfigError as error:
        shown = error.path if error.path.startswith("basis") else f"basis{error.path}"
        raise ConfigError(f"{located.where(error.path)}: {shown}: {error.message}") from None


def time_since_start(table: Table) -> tuple[np.ndarray, float] | None:
    """t (seconds since the first row) and the epoch, or None when the log has no time."""
    if TIME_COLUMN in table.columns:
        times = table.require_complete(TIME_COLUMN, purpose="time t")
        return times - times[0], float(times[0])
    if TIME in table.columns:
        return table.require_complete(TIME, purpose="time t"), 0.0
    return None


def design_from_table(table: Table, basis: Basis) -> np.ndarray:
    """Evaluate the basis on every row, with the table's columns as named inputs."""
    timing = time_since_start(table) if basis.uses_time else None
    if basis.uses_time and timing is None:
        raise InputError(
            f"{table.path}: the basis uses t but the log has no 'time' column; add one "
            "(epoch seconds or ISO 8601) or a 't' column in seconds"
        )
    t, epoch = timing if timing is not None else (np.zeros(table.rows), 0.0)
    inputs = {
        name: table.require_complete(name, purpose=f"basis input {name!r}")
        for name in sorted(basis.variables)
    }
    return basis.with_epoch(epoch).evaluate(t, inputs)


def run(args: argparse.Namespace) -> int:
    table = read_table(args.data)
    inputs = frozenset(table.columns)
    basis = load_basis_file(args.basis, inputs)
    y = table.require_complete(args.y, purpose="--y")
    weights = None
    if args.weights is not None:
        weights = table.require_complete(args.weights, purpose="--weights")
    design = design_from_table(table, basis)
    # Imported here: zeroline.lsq needs all of scipy.linalg (~30 MB), and the console
    # script imports every command's module to build its parser, the daemon's too.
    from zeroline.lsq import fit_least_squares

    result = fit_least_squares(design, y, weights, basis.names)
    print(json.dumps(result.to_json()) if args.json else format_fit(result))
    return 0


def format_fit(result: FitResult) -> str:
    """A plain-text table of the fit for people."""
    width = max(12, *(len(name) for name in result.terms))
    lines = [f"{'term':<{width}}  {'coefficient':>22}  {'std error':>12}"]
    for name, coefficient, error in zip(
        result.terms, result.coefficients, result.std_errors, strict=True
    ):
        lines.append(f"{name:<{width}}  {coefficient:>22.15g}  {error:>12.6g}")
    lines += [
        "",
        f"n = {result.n}   residual SD = {result.residual_sd:.6g}   R² = {result.r_squared:.10g}",
        f"condition number = {result.condition_number:.3g}   AIC = {_g(result.aic)}   "
        f"BIC = {_g(result.bic)}",
    ]
    return "\n".join(lines)


def _g(value: float) -> str:
    return f"{value:.6g}" if math.isfinite(value) else str(value)
