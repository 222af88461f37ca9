"""The BLAS and LAPACK routines of the hot path, reached without importing `scipy.linalg`.

The estimator and the channel call a handful of Fortran routines through scipy's f2py
wrappers (BLAS dsyr, dsymv, ddot, dscal, dcopy; LAPACK dgeqrf, dtpqrt, dtrtrs, dtrtri,
dgesdd). `from scipy.linalg import blas` first runs the package's `__init__`, which loads
all of `scipy.linalg` (decompositions, matrix functions, the array-API shims of
`scipy._lib`): about 30 MB of resident memory, three times what the daemon spends on ten
thousand parked channels, on machines that often have 1 GB in all. The wrappers live in two
extension modules, `scipy.linalg._fblas` and `scipy.linalg._flapack`, that need only numpy;
loading their files directly costs about 7 MB (measured with bench/memory.py's idle figure).

They are the same compiled wrappers `scipy.linalg.blas` and `scipy.linalg.lapack` re-export
(tests/test_fortran.py checks that every routine used is the very object scipy exports,
so results are scipy's bit for bit). Where the files are not
where scipy 1.x keeps them, this falls back to those public modules: heavier, never
different. `loaded_directly` says which happened (the test asserts the light path on the
pinned scipy, so a move of the files is noticed rather than silently costing 23 MB).
"""

from __future__ import annotations

import importlib.machinery
import importlib.util
from pathlib import Path
from types import ModuleType


def _extension(package_dir: Path, name: str) -> ModuleType | None:
    """The extension module `scipy.linalg.<name>` loaded from its file, or None if absent.

    The module registers itself under its full name as it initialises, so a later
    `import scipy.linalg` (the `fit` command, tests) finds it and uses the same object."""
    for suffix in importlib.machinery.EXTENSION_SUFFIXES:
        path = package_dir / "linalg" / f"{name}{suffix}"
        if path.is_file():
            spec = importlib.util.spec_from_file_location(f"scipy.linalg.{name}", path)
            if spec is None or spec.loader is None:
                return None
            module = importlib.util.module_from_spec(spec)
            spec.loader.exec_module(module)
            return module
    return None


def _load() -> tuple[ModuleType, ModuleType, bool]:
    """(blas, lapack, loaded directly)."""
    spec = importlib.util.find_spec("scipy")  # a top-level name: found, not imported
    if spec is not None and spec.submodule_search_locations:
        package_dir = Path(next(iter(spec.submodule_search_locations)))
        try:
            fblas, flapack = _extension(package_dir, "_fblas"), _extension(package_dir, "_flapack")
        except ImportError:  # a build that needs scipy's own loader after all
            fblas = flapack = None
        if fblas is not None and flapack is not None:
            return fblas, flapack, True
    from scipy.linalg import blas as public_blas
    from scipy.linalg import lapack as public_lapack

    return public_blas, public_lapack, False


blas, lapack, loaded_directly = _load()
