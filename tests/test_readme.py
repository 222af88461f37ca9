"""The README's commands, run as written on a clean clone, the way a new user would.

The clone gets a fresh virtual environment with zeroline installed into it; to keep the
suite fast its third-party dependencies come from the environment running the tests (a
`.pth` file), while `.ci/run` itself proves the from-scratch install (`make test` on a clean
clone bootstraps `.venv` with nothing but python3). Every `sh` block of the README is run
as a bash script, except `make test` (this very suite). `zeroline run`, which runs until it
is stopped, is started in the background and the following block (mosquitto_pub/sub) talks
to it through the machine's broker on 127.0.0.1:1883.
"""

from __future__ import annotations

import os
import re
import shlex
import signal
import site
import socket
import subprocess
import sys
import time
from pathlib import Path

from conftest import require_executable, require_service

ROOT = Path(__file__).resolve().parent.parent
BLOCK = re.compile(r"```sh\n(.*?)```", re.DOTALL)


def readme_blocks() -> list[str]:
    """The README's sh blocks, each a small shell script (`make test` left out: it is this
    suite)."""
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    blocks = []
    for block in BLOCK.findall(text):
        lines = [line for line in block.splitlines() if line.split("#")[0].strip() != "make test"]
        if any(line.strip() for line in lines):
            blocks.append("\n".join(lines))
    return blocks


def _broker_up() -> bool:
    try:
        with socket.create_connection(("127.0.0.1", 1883), timeout=1):
            return True
    except OSError:
        return False


def _clone(tmp: Path) -> Path:
    clone = tmp / "zeroline"
    subprocess.run(["git", "clone", "-q", str(ROOT), str(clone)], check=True, timeout=60)
    venv = clone / ".venv"
    subprocess.run([sys.executable, "-m", "venv", str(venv)], check=True, timeout=60)
    packages = next((venv / "lib").glob("python3*/site-packages"))
    (packages / "zz_test_dependencies.pth").write_text(
        "\n".join(site.getsitepackages()) + "\n", encoding="utf-8"
    )
    subprocess.run(
        [
            str(venv / "bin" / "pip"),
            "install",
            "-q",
            "--no-deps",
            "-e",
            str(clone),
        ],
        check=True,
        timeout=180,
        cwd=clone,
    )
    stamp = venv / ".installed"  # the Makefile's "already installed" mark
    stamp.touch()
    return clone


def test_every_readme_command_works_on_a_clean_clone(tmp_path: Path) -> None:
    """Each README command exits 0 (mosquitto_sub ends by its own -W timeout) and does
    what the README says: the demo reports its summary, the daemon corrects the published
    readings and stops cleanly on SIGTERM."""
    require_executable("mosquitto_pub", "mosquitto-clients")
    require_service(
        "an MQTT broker on 127.0.0.1:1883",
        _broker_up(),
        "start mosquitto (the README's tour uses the local broker)",
    )
    clone = _clone(tmp_path)
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "VIRTUAL_ENV")}
    blocks = readme_blocks()
    assert any("make demo" in b for b in blocks)
    assert any(" run -c " in b for b in blocks)
    daemon: subprocess.Popen[str] | None = None
    daemon_log = tmp_path / "daemon.log"
    outputs = []
    try:
        for block in blocks:
            if " run -c " in block:  # runs until stopped: start it in the background
                command = block.split("#")[0].strip()
                with open(daemon_log, "w") as log:
                    daemon = subprocess.Popen(
                        shlex.split(command),
                        cwd=clone,
                        env=env,
                        stdout=log,
                        stderr=subprocess.STDOUT,
                        text=True,
                    )
                _wait_for_text(daemon_log, "connected to the broker", 30)
                continue
            result = subprocess.run(
                ["bash", "-e", "-c", block],
                cwd=clone,
                env=env,
                timeout=300,
                capture_output=True,
                text=True,
                check=False,
            )
            output = result.stdout + result.stderr
            assert result.returncode == 0, f"{block}\n{output[-3000:]}"
            assert "Traceback" not in output, block
            outputs.append(output)
        everything = "\n".join(outputs)
        assert "summary:" in everything and "corrected RMS error" in everything  # the demo
        assert daemon is not None
        assert everything.count("zeroline/north-no2/corrected") == 2, everything[-2000:]
        daemon.send_signal(signal.SIGTERM)
        assert daemon.wait(30) == 0, daemon_log.read_text()[-3000:]
        daemon = None
    finally:
        if daemon is not None:
            daemon.kill()
            daemon.wait(10)


def _wait_for_text(path: Path, text: str, timeout: float) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if path.exists() and text in path.read_text():
            return
        time.sleep(0.1)
    raise AssertionError(f"{text!r} did not appear in {path}:\n{path.read_text()[-3000:]}")
