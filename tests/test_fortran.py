"""`zeroline.fortran`: scipy's BLAS/LAPACK wrappers without the weight of `scipy.linalg`.

What is checked: the routines the hot path calls are the very objects scipy's public
`scipy.linalg.blas` / `scipy.linalg.lapack` modules export (so their results are scipy's,
bit for bit); the daemon's import chain does not load the `scipy.linalg` package; and
without the files the loader falls back to the public modules.
"""

from __future__ import annotations

import importlib.util
import subprocess
import sys

import pytest

from zeroline import fortran

BLAS_USED = ("dsyr", "dsymv", "ddot", "dscal", "dcopy")
LAPACK_USED = ("dgeqrf", "dtpqrt", "dtrtrs", "dtrtri", "dgesdd")


def test_the_light_path_is_taken_with_the_pinned_scipy() -> None:
    # If scipy moves its extension files, this fails instead of silently costing ~23 MB.
    assert fortran.loaded_directly


@pytest.mark.parametrize(
    ("public_name", "loaded", "names"),
    [("blas", fortran.blas, BLAS_USED), ("lapack", fortran.lapack, LAPACK_USED)],
)
def test_routines_are_scipys_own(public_name: str, loaded: object, names: tuple[str, ...]) -> None:
    import scipy.linalg

    public = getattr(scipy.linalg, public_name)
    for name in names:
        assert getattr(loaded, name) is getattr(public, name), name


def test_the_daemon_does_not_import_the_scipy_linalg_package() -> None:
    probe = (
        "import sys, zeroline.cli, zeroline.service; "
        "print(sorted(m for m in sys.modules if m in ('scipy', 'scipy.linalg')))"
    )
    result = subprocess.run(
        [sys.executable, "-c", probe], capture_output=True, text=True, check=True
    )
    assert result.stdout.strip() == "[]"


def test_falls_back_to_the_public_modules(monkeypatch: pytest.MonkeyPatch) -> None:
    import scipy.linalg

    monkeypatch.setattr(importlib.util, "find_spec", lambda name: None)
    blas, lapack, direct = fortran._load()
    assert (blas, lapack, direct) == (scipy.linalg.blas, scipy.linalg.lapack, False)
