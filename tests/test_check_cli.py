"""`zeroline check -c FILE` end to end: exit codes, what goes to stdout, never a traceback.

Most runs call `zeroline.cli.main` in-process (fast); one good and one bad config also run as
a real `python -m zeroline.cli` subprocess with PYTHONPATH set to this clone's daemon/.
"""

from __future__ import annotations

import os
import re
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

from test_config_bad import CASES, NAME, Bad
from zeroline.cli import main

ROOT = Path(__file__).resolve().parent.parent
EXAMPLES = ROOT / "config" / "examples"
# `*_basis.yaml` files are basis lists for `zeroline fit --basis`, not configs.
EXAMPLE_CONFIGS = sorted(p for p in EXAMPLES.glob("*.yaml") if not p.name.endswith("_basis.yaml"))
BASIS_FILES = sorted(EXAMPLES.glob("*_basis.yaml"))

THREE_PROBLEMS = """\
broker: {port: 70000}
channels:
  - name: cell
    topic: lab/cell
    basis: [constant, constant]
    learn: {mode: refrence}
"""


def check(path: Path, capsys: pytest.CaptureFixture[str]) -> tuple[int, list[str], str]:
    """Run `zeroline check -c path`; returns the exit code, stdout lines and stderr."""
    code = main(["check", "-c", str(path)])
    captured = capsys.readouterr()
    return code, captured.out.splitlines(), captured.err


def test_there_are_example_configs() -> None:
    """The examples folder holds several configs (so the parametrised test below is real)."""
    assert len(EXAMPLE_CONFIGS) >= 3
    assert BASIS_FILES, "the fit example's basis file moved; update this test"


@pytest.mark.parametrize("path", EXAMPLE_CONFIGS, ids=[p.name for p in EXAMPLE_CONFIGS])
def test_every_example_config_passes(path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """Exit 0 and exactly one line: `FILE: ok (N channel(s): names)`."""
    code, out, err = check(path, capsys)
    assert (code, err) == (0, "")
    assert len(out) == 1
    assert re.fullmatch(re.escape(str(path)) + r": ok \([1-9][0-9]* channel\(s\): \S.*\)", out[0])


def test_ok_line_names_the_channels(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """The summary lists the channel names in config order."""
    path = tmp_path / "two.yaml"
    path.write_text(
        textwrap.dedent(
            """\
            channels:
              - {name: cell-a, topic: lab/a, basis: [constant]}
              - {name: "{1}-b", topic: lab/+/b, basis: [constant]}
            """
        )
    )
    assert check(path, capsys) == (0, [f"{path}: ok (2 channel(s): cell-a, {{1}}-b)"], "")


def test_bad_config_prints_every_problem_on_stdout_and_exits_2(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """One line per problem, sorted by line, then a count; nothing on stderr."""
    path = tmp_path / "three.yaml"
    path.write_text(THREE_PROBLEMS)
    code, out, err = check(path, capsys)
    assert (code, err) == (2, "")
    assert out == [
        f"{path}:1: broker.port: must be at most 65535, got 70000",
        f"{path}:5: channels[0].basis: columns 'constant' and 'constant' are linearly "
        "dependent for any data (one is a multiple of the other); remove one",
        f"{path}:6: channels[0].learn.mode: 'refrence' is not allowed; did you mean 'reference'?",
        f"3 problem(s) in {path}",
    ]


@pytest.mark.parametrize("case", CASES, ids=[case.id for case in CASES])
def test_every_bad_config_through_the_cli(
    case: Bad, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """The same lines as the loader reports, with the real file name, exit 2, no traceback."""
    path = tmp_path / "case.yaml"
    path.write_text(textwrap.dedent(case.yaml).lstrip("\n"))
    code, out, err = check(path, capsys)
    expected = [line.replace(NAME, str(path), 1) for line in case.expected]
    assert (code, err) == (2, "")
    assert out == [*expected, f"{len(expected)} problem(s) in {path}"]
    assert "Traceback" not in "\n".join(out)


def test_basis_file_given_as_config_says_what_it_is(capsys: pytest.CaptureFixture[str]) -> None:
    """A basis list passed to check is one clear line pointing at `zeroline fit --basis`."""
    path = BASIS_FILES[0]
    code, out, err = check(path, capsys)
    assert (code, err) == (2, "")
    assert out == [
        f"{path}:1: (top): a config is a mapping of sections such as `broker:` and `channels:`, "
        "got a list; a bare list of basis terms is a basis file for `zeroline fit --basis`",
        f"1 problem(s) in {path}",
    ]


def test_missing_file(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """A path that does not exist: one line, exit 2."""
    path = tmp_path / "nowhere.yaml"
    assert check(path, capsys) == (
        2,
        [
            f"{path}: cannot read (No such file or directory); check the path",
            f"1 problem(s) in {path}",
        ],
        "",
    )


def test_file_that_is_not_utf8(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """Binary junk: one line, exit 2."""
    path = tmp_path / "junk.yaml"
    path.write_bytes(b"\xff\xfe\x00channels")
    assert check(path, capsys) == (2, [f"{path}: not UTF-8 text", f"1 problem(s) in {path}"], "")


def test_missing_config_argument_is_a_usage_error(capsys: pytest.CaptureFixture[str]) -> None:
    """`zeroline check` without -c: argparse's message in one line on stderr, exit 2."""
    with pytest.raises(SystemExit) as exit_info:
        main(["check"])
    err = capsys.readouterr().err
    assert exit_info.value.code == 2
    assert "the following arguments are required: -c/--config" in err
    assert "Traceback" not in err


def _run_cli(*args: str) -> subprocess.CompletedProcess[str]:
    env = {**os.environ, "PYTHONPATH": str(ROOT / "daemon")}
    return subprocess.run(
        [sys.executable, "-m", "zeroline.cli", *args],
        capture_output=True,
        text=True,
        env=env,
        timeout=60,
        check=False,
    )


def test_as_a_real_process(tmp_path: Path) -> None:
    """`python -m zeroline.cli check` on a bad file: exit 2, problem lines on stdout only.

    (One subprocess: starting Python with numpy costs about a second.)"""
    path = tmp_path / "three.yaml"
    path.write_text(THREE_PROBLEMS)
    bad = _run_cli("check", "-c", str(path))
    assert (bad.returncode, bad.stderr) == (2, "")
    lines = bad.stdout.splitlines()
    assert len(lines) == 4 and lines[-1] == f"3 problem(s) in {path}"
    assert all(line.startswith(f"{path}:") for line in lines[:-1])
    assert "Traceback" not in bad.stdout
