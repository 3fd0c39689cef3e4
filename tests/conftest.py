"""Fixtures shared across the suite: a seeded generator, NIST StRD loading, digit counting."""

from __future__ import annotations

import math
import re
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest

NIST_DIR = Path(__file__).resolve().parent / "data" / "nist-strd"
"""Folder of the NIST StRD linear regression files shipped with the tests (see its README.md)."""

NIST_NAMES = (
    "Norris",
    "Pontius",
    "NoInt1",
    "NoInt2",
    "Filip",
    "Longley",
    "Wampler1",
    "Wampler2",
    "Wampler3",
    "Wampler4",
    "Wampler5",
)
"""The eleven NIST StRD linear least-squares datasets."""

_NUMBER = r"([-+]?(?:\d+\.?\d*|\.\d+)(?:[Ee][-+]?\d+)?)"


@dataclass(frozen=True)
class NistCase:
    """One NIST StRD linear regression dataset with its certified values."""

    name: str
    design: np.ndarray
    """Design matrix, the intercept column of ones first when the model has B0."""
    y: np.ndarray
    has_intercept: bool
    coef: np.ndarray
    """Certified estimates B0.. (or B1.. without intercept)."""
    std_error: np.ndarray
    resid_sd: float
    r2: float
    df_model: int
    df_resid: int
    f: float
    """Certified F statistic (inf where NIST prints "Infinity")."""


def parse_nist(path: Path) -> NistCase:
    """Parse a NIST StRD linear regression file (format per its "File Format" header)."""
    lines = path.read_text().splitlines()
    header = "\n".join(lines[:10])
    cert = re.search(r"Certified Values\s+\(lines (\d+) to (\d+)\)", header)
    data = re.search(r"Data\s+\(lines (\d+) to (\d+)\)", header)
    assert cert is not None and data is not None, f"no line ranges in {path}"
    cert_lines = lines[int(cert[1]) - 1 : int(cert[2])]
    params: dict[int, tuple[float, float]] = {}
    resid_sd = r2 = f = math.nan
    df: dict[str, int] = {}
    for line in cert_lines:
        if m := re.match(rf"^\s*B(\d+)\s+{_NUMBER}\s+{_NUMBER}\s*$", line):
            params[int(m[1])] = (float(m[2]), float(m[3]))
        elif m := re.match(rf"^\s*Standard Deviation\s+{_NUMBER}\s*$", line):
            resid_sd = float(m[1])
        elif m := re.match(rf"^\s*R-Squared\s+{_NUMBER}\s*$", line):
            r2 = float(m[1])
        elif m := re.match(r"^(Regression|Residual)\s+(\d+)\s+(.*)$", line):
            df[m[1]] = int(m[2])
            if m[1] == "Regression":
                last = m[3].split()[-1]
                f = math.inf if last == "Infinity" else float(last)
    rows = np.array(
        [[float(v) for v in line.split()] for line in lines[int(data[1]) - 1 : int(data[2])]]
    )
    y, x = rows[:, 0], rows[:, 1:]
    powers = sorted(params)
    has_intercept = powers[0] == 0
    columns = []
    for k in powers:
        if k == 0:
            columns.append(np.ones(len(y)))
        elif x.shape[1] == 1:
            columns.append(x[:, 0] ** k)  # polynomial models: B_k multiplies x^k
        else:
            columns.append(x[:, k - 1])  # several predictors: B_k multiplies x_k
    return NistCase(
        name=path.stem,
        design=np.column_stack(columns),
        y=y,
        has_intercept=has_intercept,
        coef=np.array([params[k][0] for k in powers]),
        std_error=np.array([params[k][1] for k in powers]),
        resid_sd=resid_sd,
        r2=r2,
        df_model=df["Regression"],
        df_resid=df["Residual"],
        f=f,
    )


def pytest_generate_tests(metafunc: pytest.Metafunc) -> None:
    """Run a test that asks for `nist_name` once per NIST StRD dataset."""
    if "nist_name" in metafunc.fixturenames:
        metafunc.parametrize("nist_name", NIST_NAMES)


@pytest.fixture
def rng() -> np.random.Generator:
    """Return a generator with a fixed seed, so every run sees the same data."""
    return np.random.default_rng(20_260_101)


@pytest.fixture
def nist() -> Callable[[str | Path], NistCase]:
    """Return a loader of NIST StRD cases by name (from `NIST_DIR`) or by path."""

    def load(source: str | Path) -> NistCase:
        return parse_nist(NIST_DIR / f"{source}.dat" if isinstance(source, str) else source)

    return load


def log_relative_error(estimate: np.ndarray | float, certified: np.ndarray | float) -> np.ndarray:
    """Return the digits of agreement, -log10(|estimate - certified| / |certified|), capped at 15.

    The "log relative error" (LRE) of McCullough's accuracy studies of statistical
    software against NIST StRD; a certified value of 0 gives the absolute error instead.
    """
    est = np.asarray(estimate, dtype=np.float64)
    cert = np.asarray(certified, dtype=np.float64)
    error = np.abs(est - cert)
    scale = np.where(cert == 0.0, 1.0, np.abs(cert))
    with np.errstate(divide="ignore", invalid="ignore"):
        digits = -np.log10(error / scale)
    # NaN (a missing estimate, or inf against inf) counts as no correct digit.
    return np.minimum(np.where(np.isnan(digits), 0.0, digits), 15.0)


@pytest.fixture
def lre() -> Callable[[np.ndarray | float, np.ndarray | float], np.ndarray]:
    """Return `log_relative_error`, the digit-counting measure used against certified values."""
    return log_relative_error
