"""Read NIST StRD linear least-squares files (.dat) and score estimates against them.

Source: NIST Statistical Reference Datasets, "Linear Least Squares Regression" suite
(NIST/ITL, Statistical Engineering Division; public domain). Each file states in its header
where its certified values and its data are::

    File Format:   ASCII
                   Certified Values  (lines 31 to 46)
                   Data              (lines 61 to 96)

and the line just before the data names the columns (`Data:  y  x` or `y x1 ... x6`).
This loader reads those line numbers from the header instead of assuming them, keeps every
data cell as the decimal text NIST printed (so a CSV written from it is byte-for-byte the
published value, with no rounding on the way), and parses the certified block's
`B<k> estimate std-deviation` rows, the residual standard deviation and R².

Accuracy is scored by the log relative error (LRE) of McCullough, "Assessing the
reliability of statistical software", The American Statistician 52 (1998) 358-366:
LRE = −log10(|estimate − certified| / |certified|), the number of correct significant
digits. When the certified value is 0 (Wampler1/2 fit exactly) the absolute error is used,
as NIST's suite notes say. An LRE is capped at the number of digits the certified value is
printed with (15 for every value in these files): agreement beyond the printed digits says
nothing more.

Files are read in text mode, which folds NIST's CRLF line ends into plain lines.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import numpy.typing as npt

Array = npt.NDArray[np.float64]

ROOT = Path(__file__).resolve().parents[2]
#: The eight StRD files shared with the project (see that folder's README.md for provenance).
SHARED_DIR = ROOT.parent / "shared" / "refdata" / "nist-strd"
#: Files kept in the repository itself (Filip; see tests/refdata/README.md).
LOCAL_DIR = ROOT / "tests" / "refdata"

EIGHT = ("Norris", "Pontius", "NoInt1", "NoInt2", "Longley", "Wampler1", "Wampler2", "Wampler3")

_LINES = re.compile(r"\(lines\s+(\d+)\s+to\s+(\d+)\)")
_PARAMETER = re.compile(r"^\s*B(\d+)\s+(\S+)\s+(\S+)\s*$")
_NUMBER_AT_END = re.compile(r"(\S+)\s*$")


@dataclass(frozen=True)
class Certified:
    """One certified value with the text it was printed as (which fixes its precision)."""

    value: float
    text: str

    @property
    def digits(self) -> int:
        """Significant digits printed; for a printed zero, the decimals printed."""
        mantissa = self.text.lower().split("e")[0].lstrip("+-")
        whole, _, fraction = mantissa.partition(".")
        if self.value == 0.0:
            return len(fraction)
        return len((whole + fraction).lstrip("0"))


@dataclass(frozen=True)
class Dataset:
    """A StRD linear least-squares problem: data as printed, and its certified results."""

    name: str
    columns: tuple[str, ...]  # "y" first, then "x" or "x1".."xk"
    cells: tuple[tuple[str, ...], ...]  # data rows as printed
    parameters: tuple[int, ...]  # the k of each certified B<k>, in order
    coefficients: tuple[Certified, ...]
    std_errors: tuple[Certified, ...]
    residual_sd: Certified
    r_squared: Certified

    @property
    def predictors(self) -> tuple[str, ...]:
        return self.columns[1:]

    @property
    def has_intercept(self) -> bool:
        """B0 is in the model (NoInt1/NoInt2 are y = B1·x)."""
        return 0 in self.parameters

    def column(self, name: str) -> Array:
        j = self.columns.index(name)
        return np.array([float(row[j]) for row in self.cells])

    def basis_yaml(self) -> str:
        """The zeroline basis list for the file's stated model, as YAML text.

        One predictor x: `constant` (when B0 is there) and a polynomial in x with degree the
        highest power of the model. Several predictors (Longley): `constant` and a degree-1
        polynomial of each.
        """
        lines = ["- constant"] if self.has_intercept else []
        if len(self.predictors) == 1:
            lines.append(f"- polynomial: {{of: x, degree: {max(self.parameters)}}}")
        else:
            lines += [f"- polynomial: {{of: {x}, degree: 1}}" for x in self.predictors]
        return "\n".join(lines) + "\n"

    def design(self) -> Array:
        """The raw design of the model (what a plain solver would be given)."""
        columns = [np.ones(len(self.cells))] if self.has_intercept else []
        if len(self.predictors) == 1:
            x = self.column("x")
            columns += [x**k for k in range(1, max(self.parameters) + 1)]
        else:
            columns += [self.column(x) for x in self.predictors]
        return np.column_stack(columns)

    def csv_text(self) -> str:
        """The data as CSV with a header row, every cell exactly as NIST printed it."""
        return "\n".join(",".join(row) for row in (self.columns, *self.cells)) + "\n"

    def write_inputs(self, folder: Path) -> tuple[Path, Path]:
        """Write `<name>.csv` and `<name>.basis.yaml` into `folder`; returns both paths."""
        csv_path = folder / f"{self.name}.csv"
        basis_path = folder / f"{self.name}.basis.yaml"
        csv_path.write_text(self.csv_text(), encoding="utf-8")
        basis_path.write_text(self.basis_yaml(), encoding="utf-8")
        return csv_path, basis_path


def dataset_path(name: str) -> Path:
    """Where the file for `name` lives: the shared eight, or tests/refdata (Filip)."""
    for folder in (LOCAL_DIR, SHARED_DIR):
        candidate = folder / f"{name}.dat"
        if candidate.is_file():
            return candidate
    raise FileNotFoundError(f"NIST StRD file {name}.dat is in neither {LOCAL_DIR} nor {SHARED_DIR}")


def load(name: str) -> Dataset:
    """Parse `<name>.dat` using the line ranges its own header states."""
    path = dataset_path(name)
    with open(path, encoding="ascii") as handle:  # text mode: CRLF becomes "\n"
        lines = handle.read().splitlines()
    certified_range, data_range = _ranges(lines, path)
    certified = lines[certified_range[0] - 1 : certified_range[1]]
    parameters, coefficients, std_errors = _parameters(certified, path)
    header = lines[data_range[0] - 2].split()
    if not header or header[0] != "Data:":
        raise ValueError(f"{path}: line {data_range[0] - 1} should name the data columns")
    columns = tuple(header[1:])
    cells = tuple(tuple(line.split()) for line in lines[data_range[0] - 1 : data_range[1]])
    if any(len(row) != len(columns) for row in cells):
        raise ValueError(f"{path}: a data row does not have {len(columns)} cells")
    return Dataset(
        name=name,
        columns=columns,
        cells=cells,
        parameters=parameters,
        coefficients=coefficients,
        std_errors=std_errors,
        residual_sd=_value_after(certified, "Standard Deviation", path),
        r_squared=_value_after(certified, "R-Squared", path),
    )


def _ranges(lines: list[str], path: Path) -> tuple[tuple[int, int], tuple[int, int]]:
    found: dict[str, tuple[int, int]] = {}
    for line in lines[:10]:
        match = _LINES.search(line)
        if match is None:
            continue
        key = "certified" if "Certified Values" in line else "data" if "Data" in line else ""
        if key:
            found[key] = (int(match.group(1)), int(match.group(2)))
    if set(found) != {"certified", "data"}:
        raise ValueError(f"{path}: header does not state both line ranges")
    return found["certified"], found["data"]


def _parameters(
    block: list[str], path: Path
) -> tuple[tuple[int, ...], tuple[Certified, ...], tuple[Certified, ...]]:
    parameters: list[int] = []
    estimates: list[Certified] = []
    deviations: list[Certified] = []
    for line in block:
        match = _PARAMETER.match(line)
        if match is None:
            continue
        parameters.append(int(match.group(1)))
        estimates.append(Certified(float(match.group(2)), match.group(2)))
        deviations.append(Certified(float(match.group(3)), match.group(3)))
    if not parameters:
        raise ValueError(f"{path}: no certified parameter rows")
    return tuple(parameters), tuple(estimates), tuple(deviations)


def _value_after(block: list[str], label: str, path: Path) -> Certified:
    for line in block:
        if label in line:
            match = _NUMBER_AT_END.search(line)
            if match is not None:
                return Certified(float(match.group(1)), match.group(1))
    raise ValueError(f"{path}: no certified {label!r} line")


def lre(estimate: float, certified: Certified) -> float:
    """Log relative error (absolute when the certified value is 0), capped at its digits.

    A non-finite estimate scores 0 digits.
    """
    cap = float(certified.digits)
    if not math.isfinite(estimate):
        return 0.0
    error = abs(estimate - certified.value)
    if certified.value != 0.0:
        error /= abs(certified.value)
    if error == 0.0:
        return cap
    return max(0.0, min(cap, -math.log10(error)))


def min_lre(estimates: npt.ArrayLike, certified: tuple[Certified, ...]) -> float:
    """The worst LRE over a vector of estimates (coefficients or standard errors)."""
    values = np.asarray(estimates, dtype=np.float64).reshape(-1)
    if values.shape[0] != len(certified):
        raise ValueError(f"{values.shape[0]} estimates for {len(certified)} certified values")
    return min(lre(float(v), c) for v, c in zip(values, certified, strict=True))
