"""`zeroline fit` on bad input: one clear line, exit 2, never a traceback (design §3).

Source: design §3 (exit codes: 0 ok, 2 usage or input error with a clear message and no
traceback, 1 internal error) and issue 2, requirement 5. Each case writes its files into
tmp_path, runs `zeroline.cli.main` in-process and checks: exit code 2, nothing on stdout,
stderr exactly one line that starts `zeroline: error:`, names the problem (a substring
chosen per case) and holds no traceback. Two cases also run as a real subprocess
(`python -m zeroline.cli`, with PYTHONPATH the daemon/ folder next to this test file).
"""

from __future__ import annotations

import json
import math
import os
import subprocess
import sys
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pytest

from zeroline import cli

DAEMON_DIR = Path(__file__).resolve().parents[1] / "daemon"

GOOD_CSV = "y,x,w\n1.0,2,1\n2.1,3,1\n2.9,5,2\n4.2,7,1\n5.0,8,0.5\n"
GOOD_BASIS = "- constant\n- polynomial: {of: x, degree: 1}\n"


@dataclass(frozen=True)
class Case:
    """One bad input: the files, the extra arguments, and what the message must name."""

    csv: str = GOOD_CSV
    basis: str = GOOD_BASIS
    extra: tuple[str, ...] = ()
    names: tuple[str, ...] = ()  # substrings the one-line message must contain
    argv: tuple[str, ...] | None = field(default=None)  # replaces the standard argv


CASES: dict[str, Case] = {
    "missing y column": Case(extra=("--y", "z"), names=("no column 'z'", "--y", "columns: y")),
    "missing weights column": Case(extra=("--weights", "wt"), names=("no column 'wt'",)),
    "basis input not a column": Case(
        basis="- polynomial: {of: temp, degree: 1}\n", names=("'temp'", "basis[0].polynomial.of")
    ),
    "non-numeric cell": Case(
        csv="y,x\n1,2\n2,abc\n3,4\n4,5\n", names=(":3:", "column 'x'", "'abc'", "number")
    ),
    "nan cell": Case(csv="y,x\n1,2\n2,nan\n3,4\n4,5\n", names=(":3:", "'nan'", "finite")),
    "inf cell": Case(csv="y,x\n1,2\n2,3\n-inf,4\n4,5\n", names=(":4:", "'-inf'", "finite")),
    "blank cell in a used column": Case(
        csv="y,x\n1,2\n2,\n3,4\n4,5\n", names=(":3:", "column 'x' is blank")
    ),
    "wrong number of cells": Case(csv="y,x\n1,2\n2,3,4\n", names=(":3:", "3 cells", "2 columns")),
    "empty csv": Case(csv="", names=("empty",)),
    "header only": Case(csv="y,x\n", names=("no data rows",)),
    "fewer rows than terms": Case(
        csv="y,x\n1,2\n2,3\n",
        basis="- constant\n- polynomial: {of: x, degree: 2}\n",
        names=("2 usable rows for 3 basis columns",),
    ),
    "negative weight": Case(
        csv="y,x,w\n1,2,1\n2,3,-1\n3,5,1\n4,6,1\n", extra=("--weights", "w"), names=("negative",)
    ),
    "unknown basis term": Case(
        basis="- constant\n- polynomal: {of: x, degree: 1}\n",
        names=("unknown basis term 'polynomal'", "'polynomial'", ":2:"),
    ),
    "unknown field": Case(
        basis="- polynomial: {of: x, degre: 1}\n", names=("unknown key 'degre'", "'degree'")
    ),
    "wrong field type": Case(
        basis="- constant\n- polynomial: {of: x, degree: two}\n",
        names=("basis[1].polynomial.degree", "whole number", "'two'", ":2:"),
    ),
    "bad duration": Case(
        csv="t,y\n0,1\n60,2\n120,3\n180,3.5\n",
        basis="- constant\n- polynomial: {of: t, degree: 1, scale: 30 days}\n",
        names=("'30 days'", "duration", "basis[1].polynomial.scale"),
    ),
    "huge integer field": Case(
        basis="- constant\n- polynomial: {of: x, degree: 1, center: 1" + "0" * 400 + "}\n",
        names=("basis[1].polynomial.center",),
    ),
    "malformed yaml": Case(
        basis="- constant\n- polynomial: {of: x, degree: 1\n", names=("YAML syntax error",)
    ),
    "invalid calendar date in yaml": Case(
        csv="t,y\n0,1\n60,2\n120,3\n180,3.5\n",
        basis="- constant\n- step: {of: t, at: 2026-13-45}\n",
        names=("2026-13-45",),
    ),
    # Supported or refused, a merge key must not crash (the basis would then repeat x).
    "yaml merge key": Case(basis="- &a {polynomial: {of: x, degree: 1}}\n- {<<: *a}\n"),
    "recursive yaml alias": Case(basis="&a [constant, *a]\n", names=("basis.yaml",)),
    "basis not a list": Case(basis="constant: 1\n", names=("list of basis terms",)),
    "uses t without time column": Case(
        basis="- constant\n- polynomial: {of: t, degree: 1}\n", names=("no 'time' column",)
    ),
    "injection in expression": Case(
        basis="- constant\n- expression: \"__import__('os').system('touch PWNED')\"\n",
        names=("basis[1].expression", "\"'\""),
    ),
    "attribute access in expression": Case(
        basis='- constant\n- expression: "x.__class__"\n', names=("'.'", "basis[1].expression")
    ),
    "missing data file": Case(argv=("fit", "{dir}/nope.csv", "--y", "y", "--basis",
                                    "{dir}/basis.yaml"), names=("nope.csv", "cannot open")),
    "missing basis file": Case(argv=("fit", "{dir}/log.csv", "--y", "y", "--basis",
                                     "{dir}/nope.yaml"), names=("nope.yaml", "cannot read")),
    "missing --y option": Case(argv=("fit", "{dir}/log.csv", "--basis", "{dir}/basis.yaml"),
                               names=("--y",)),
}  # fmt: skip


def prepare(case: Case, folder: Path) -> list[str]:
    """Write the case's files and return its argv."""
    (folder / "log.csv").write_text(case.csv, encoding="utf-8")
    (folder / "basis.yaml").write_text(case.basis, encoding="utf-8")
    if case.argv is not None:
        return [part.format(dir=folder) for part in case.argv]
    argv = ["fit", str(folder / "log.csv"), "--basis", str(folder / "basis.yaml")]
    if "--y" not in case.extra:
        argv += ["--y", "y"]
    return argv + list(case.extra)


def run_in_process(argv: list[str], capsys: Any) -> tuple[int, str, str]:
    """cli.main's exit code (argparse's SystemExit counted as one), stdout and stderr."""
    try:
        code = cli.main(argv)
    except SystemExit as stop:  # argparse usage errors leave through sys.exit
        code = int(stop.code) if stop.code is not None else 0
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def assert_one_line_error(code: int, out: str, err: str, names: tuple[str, ...]) -> None:
    assert "Traceback" not in err, err
    assert code == 2, err
    assert out == "", out
    lines = err.splitlines()
    assert len(lines) == 1 and err.endswith("\n"), err
    assert lines[0].startswith("zeroline: error: "), err
    for name in names:
        assert name in lines[0], f"{name!r} not named in: {lines[0]}"


@pytest.mark.parametrize("label", list(CASES))
def test_bad_input_is_one_line_and_exit_2(label: str, tmp_path: Path, capsys: Any) -> None:
    """Design §3: a user error is exit 2 and one `zeroline: error:` line naming it."""
    case = CASES[label]
    code, out, err = run_in_process(prepare(case, tmp_path), capsys)
    assert_one_line_error(code, out, err, case.names)


@pytest.mark.parametrize("label", ["injection in expression", "non-numeric cell"])
def test_bad_input_as_a_real_process(label: str, tmp_path: Path) -> None:
    """Design §3 through `python -m zeroline.cli`: same single line, exit 2, no side effect."""
    case = CASES[label]
    argv = prepare(case, tmp_path)
    env = {**os.environ, "PYTHONPATH": str(DAEMON_DIR)}
    done = subprocess.run(
        [sys.executable, "-m", "zeroline.cli", *argv],
        capture_output=True, text=True, env=env, cwd=tmp_path, timeout=60, check=False,
    )  # fmt: skip
    assert_one_line_error(done.returncode, done.stdout, done.stderr, case.names)
    assert not (tmp_path / "PWNED").exists()


def test_good_input_prints_a_table(tmp_path: Path, capsys: Any) -> None:
    """Without --json the fit prints a table for people: every term and the statistics."""
    code, out, err = run_in_process(prepare(Case(), tmp_path), capsys)
    assert (code, err) == (0, "")
    assert out.splitlines()[0].split() == ["term", "coefficient", "std", "error"]
    assert "constant" in out and "\nx " in out
    assert "residual SD" in out and "R²" in out and "AIC" in out


def test_time_column_in_iso_8601_drives_t(tmp_path: Path, capsys: Any) -> None:
    """t is seconds since the first row's `time`: a line in t/1d recovers its slope per day."""
    rows = [f"2026-05-0{d}T00:00:00Z,{3.0 + 0.5 * (d - 1)}" for d in range(1, 6)]
    (tmp_path / "log.csv").write_text("time,y\n" + "\n".join(rows) + "\n")
    basis = "- constant\n- polynomial: {of: t, degree: 1, scale: 1d}\n"
    (tmp_path / "basis.yaml").write_text(basis)
    argv = ["fit", str(tmp_path / "log.csv"), "--y", "y", "--basis", str(tmp_path / "basis.yaml")]
    code, out, err = run_in_process([*argv, "--json"], capsys)
    assert (code, err) == (0, "")
    fit = json.loads(out)
    assert fit["terms"] == ["constant", "t/1d"]
    assert fit["coefficients"] == pytest.approx([3.0, 0.5], abs=1e-12)


def test_step_in_time_is_placed_at_its_instant(tmp_path: Path, capsys: Any) -> None:
    """A `step` in t at an absolute instant is 0 before and 1 from it on (design §2)."""
    levels = [1.0, 1.0, 3.0, 3.0, 3.0]  # the step happens on 2026-05-03
    rows = [f"2026-05-0{d}T00:00:00Z,{v}" for d, v in zip(range(1, 6), levels, strict=True)]
    (tmp_path / "log.csv").write_text("time,y\n" + "\n".join(rows) + "\n")
    (tmp_path / "basis.yaml").write_text(
        '- constant\n- step: {of: t, at: "2026-05-03T00:00:00Z"}\n'
    )
    argv = ["fit", str(tmp_path / "log.csv"), "--y", "y", "--basis", str(tmp_path / "basis.yaml")]
    code, out, err = run_in_process([*argv, "--json"], capsys)
    assert (code, err) == (0, "")
    assert json.loads(out)["coefficients"] == pytest.approx([1.0, 2.0], abs=1e-12)


def test_expression_of_an_input_needs_no_time_column(tmp_path: Path, capsys: Any) -> None:
    """An expression of a named input only (here sqrt(x − 1), x ≥ 2) does not need `time`."""
    x = [2.0, 3.0, 5.0, 10.0, 17.0]
    rows = [f"{1.0 + 2.0 * (v - 1.0) ** 0.5!r},{v!r}" for v in x]
    (tmp_path / "log.csv").write_text("y,x\n" + "\n".join(rows) + "\n")
    (tmp_path / "basis.yaml").write_text('- constant\n- expression: "sqrt(x - 1)"\n')
    argv = ["fit", str(tmp_path / "log.csv"), "--y", "y", "--basis", str(tmp_path / "basis.yaml")]
    code, out, err = run_in_process([*argv, "--json"], capsys)
    assert (code, err) == (0, ""), err
    assert json.loads(out)["coefficients"] == pytest.approx([1.0, 2.0], abs=1e-12)


def test_periodic_phase_is_anchored_to_utc(tmp_path: Path, capsys: Any) -> None:
    """Design §2: the phase of a periodic term in t is UTC's, whatever the first row's time."""
    start = 1_777_600_000 + 5 * 3600  # 2026-05-01T01:46:40Z plus 5 h: not a day boundary
    times = [start + 3600 * k for k in range(30)]
    rows = [f"{t},{2.0 + math.sin(2 * math.pi * (t % 86400) / 86400)!r}" for t in times]
    (tmp_path / "log.csv").write_text("time,y\n" + "\n".join(rows) + "\n")
    (tmp_path / "basis.yaml").write_text("- constant\n- periodic: {of: t, period: 1d}\n")
    argv = ["fit", str(tmp_path / "log.csv"), "--y", "y", "--basis", str(tmp_path / "basis.yaml")]
    code, out, err = run_in_process([*argv, "--json"], capsys)
    assert (code, err) == (0, "")
    fit = json.loads(out)
    assert fit["terms"] == ["constant", "sin(2π·t/1d)", "cos(2π·t/1d)"]
    assert fit["coefficients"] == pytest.approx([2.0, 1.0, 0.0], abs=1e-9)
