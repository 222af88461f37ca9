"""Shared test helpers.

Tests that need a real service (a broker, a database, a browser) call `require_service`:
on a developer's laptop without the service they skip with a clear reason; under CI=true a
missing service is a failure, never a skip.
"""

from __future__ import annotations

import os
import shutil
import sys
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "tests"))

SHARED = ROOT.parent / "shared"


def in_ci() -> bool:
    """True when running under CI, where every service must be present."""
    return os.environ.get("CI", "").lower() in {"1", "true", "yes"}


def require_service(name: str, available: bool, how: str) -> None:
    """Skip (laptop) or fail (CI=true) when service `name` is not available."""
    if available:
        return
    message = f"{name} is not available here; {how}"
    if in_ci():
        pytest.fail(f"CI=true but {message}")
    pytest.skip(message)


def require_executable(program: str, package: str) -> str:
    """Return the path of `program`, or skip/fail saying which Debian package provides it."""
    path = shutil.which(program)
    require_service(program, path is not None, f"install the Debian package '{package}'")
    assert path is not None
    return path


@pytest.fixture
def victoria(tmp_path: Path) -> Iterator[Any]:
    """A VictoriaMetrics on a free 127.0.0.1 port with its own storage, stopped afterwards."""
    from support.victoria import VictoriaMetrics

    binary = require_executable("victoria-metrics", "victoria-metrics")
    server = VictoriaMetrics(binary, tmp_path / "vm-data")
    server.start()
    yield server
    server.stop()


@pytest.fixture()
def mosquitto_bin() -> str:
    """The mosquitto broker binary; the clients must be there too (tests use them)."""
    require_executable("mosquitto_pub", "mosquitto-clients")
    require_executable("mosquitto_sub", "mosquitto-clients")
    return require_executable("mosquitto", "mosquitto")


@pytest.fixture()
def broker(mosquitto_bin: str) -> Iterator[Any]:
    """A Mosquitto of the tests' own on a free 127.0.0.1 port, stopped afterwards."""
    from support.broker import Mosquitto

    server = Mosquitto(mosquitto_bin)
    server.start()
    yield server
    server.cleanup()


@pytest.fixture(params=["kernel", "numpy"])
def replay_path(request: pytest.FixtureRequest, monkeypatch: pytest.MonkeyPatch) -> Iterator[str]:
    """Run the test with `replay_batch`'s compiled kernel, then with its numpy block path.

    numba is a dependency, so on the "kernel" side the kernel must load and must not have
    given up (a compile failure falls back to the numpy path with a warning): the test fails
    instead of quietly testing the numpy path twice.
    """
    import zeroline.estimator_replay as replay

    monkeypatch.setattr(replay, "USE_KERNEL", request.param == "kernel")
    if request.param == "kernel":
        assert replay._kernel() is not None, "the compiled replay kernel did not load"
    yield str(request.param)
    if request.param == "kernel":
        assert not replay._kernel_failed, "the compiled replay kernel failed; see the log"
