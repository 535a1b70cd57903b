"""Loader for NIST StRD files (``tests/data/strd/*.dat``), linear and nonlinear.

A file is a 60-line header followed by the data. The header names the line ranges of the
certified values and of the data ("Certified Values (lines 31 to 46)", "Data (lines 61 to 96)")
and the number of observations ("36 Observations"). Data rows hold ``y`` then ``x``. Numbers are
Fortran-style (``.591E0``, ``0.1E-03``, possibly with a ``D`` exponent).

The certified block differs between the two kinds of file:

- linear: each parameter reads ``B<k>  estimate  standard-deviation`` (B0..Bp, or B1 alone for a
  line through zero such as NoInt1); then "Residual" / "Standard Deviation <value>"; the degrees
  of freedom are in the Residual row of the certified analysis of variance table
  (``Residual  34  sum-of-squares  mean-square``).
- nonlinear: each parameter reads ``b<k> = start-1 start-2 estimate standard-deviation`` (b1..bp;
  the two starting values are not read); then lines "Residual Standard Deviation: <value>" and
  "Degrees of Freedom: <n>".
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from numpy.typing import NDArray

DATA_DIR = Path(__file__).resolve().parent.parent / "data" / "strd"

_NUMBER = r"[-+]?(?:\d+\.?\d*|\.\d+)(?:[EeDd][-+]?\d+)?"
_RANGE = re.compile(r"^\s*(Certified Values|Data)\s*\(lines\s+(\d+)\s+to\s+(\d+)\)", re.MULTILINE)
_OBSERVATIONS = re.compile(r"^\s*(\d+)\s+Observations\s*$", re.MULTILINE)
# linear files
_PARAM = re.compile(rf"^\s*B(\d+)\s+({_NUMBER})\s+({_NUMBER})\s*$")
_RESIDUAL_SD = re.compile(rf"^\s*Standard Deviation\s+({_NUMBER})\s*$")
_ANOVA_RESIDUAL = re.compile(rf"^\s*Residual\s+(\d+)\s+{_NUMBER}\s+{_NUMBER}\s*$")
# nonlinear files
_NONLINEAR_PARAM = re.compile(
    rf"^\s*b(\d+)\s*=\s*{_NUMBER}\s+{_NUMBER}\s+({_NUMBER})\s+({_NUMBER})\s*$"
)
_NONLINEAR_RESIDUAL_SD = re.compile(rf"^\s*Residual Standard Deviation:\s*({_NUMBER})\s*$")
_NONLINEAR_DOF = re.compile(r"^\s*Degrees of Freedom:\s*(\d+)\s*$")


def fortran_float(text: str) -> float:
    """A Fortran-style number (``.591E0``, ``-0.3E-14``, ``1.0D0``) as a float."""
    return float(text.replace("D", "E").replace("d", "e"))


@dataclass(frozen=True, slots=True)
class StrdDataset:
    """One StRD problem: its data and NIST's certified results.

    ``estimates[k]`` and ``std_devs[k]`` belong to parameter ``first_index + k`` in the file's
    order: B<k> (the coefficient of x**k) when ``first_index`` is 0, B<k+1> for NoInt1, b<k+1> for
    the nonlinear files. ``dof`` is the certified residual degrees of freedom.
    """

    name: str
    x: NDArray[np.float64]
    y: NDArray[np.float64]
    estimates: tuple[float, ...]
    std_devs: tuple[float, ...]
    first_index: int
    residual_sd: float
    dof: int


def _line_range(header: str, block: str) -> tuple[int, int]:
    for match in _RANGE.finditer(header):
        if match.group(1) == block:
            return int(match.group(2)), int(match.group(3))
    raise ValueError(f"StRD header names no line range for {block!r}")


def load_strd(name: str) -> StrdDataset:
    """Parse ``tests/data/strd/<name>.dat`` (linear or nonlinear)."""
    path = DATA_DIR / f"{name}.dat"
    text = path.read_text(encoding="ascii")
    lines = text.splitlines()
    cert_first, cert_last = _line_range(text, "Certified Values")
    data_first, data_last = _line_range(text, "Data")

    params: dict[int, tuple[float, float]] = {}
    residual_sd: float | None = None
    dof: int | None = None
    for line in lines[cert_first - 1 : cert_last]:  # header line numbers are 1-based, inclusive
        if m := _PARAM.match(line) or _NONLINEAR_PARAM.match(line):
            params[int(m.group(1))] = (fortran_float(m.group(2)), fortran_float(m.group(3)))
        elif m := _RESIDUAL_SD.match(line) or _NONLINEAR_RESIDUAL_SD.match(line):
            residual_sd = fortran_float(m.group(1))
        elif m := _ANOVA_RESIDUAL.match(line) or _NONLINEAR_DOF.match(line):
            dof = int(m.group(1))
    first_index = min(params, default=-1)  # -1: no parameter found
    if first_index not in (0, 1) or sorted(params) != list(
        range(first_index, first_index + len(params))
    ):
        raise ValueError(f"{path.name}: certified parameters B0..Bp, B1..Bp or b1..bp not found")
    if residual_sd is None:
        raise ValueError(f"{path.name}: certified residual standard deviation not found")
    if dof is None:
        raise ValueError(f"{path.name}: certified residual degrees of freedom not found")

    rows = [
        [fortran_float(tok) for tok in line.split()] for line in lines[data_first - 1 : data_last]
    ]
    data = np.array(rows, dtype=np.float64)
    if data.ndim != 2 or data.shape[1] != 2:
        raise ValueError(f"{path.name}: expected two data columns (y, x), got shape {data.shape}")
    observations = _OBSERVATIONS.search(text)
    if observations is None or int(observations.group(1)) != data.shape[0]:
        raise ValueError(f"{path.name}: data rows do not match the header's observation count")

    return StrdDataset(
        name=name,
        x=data[:, 1].copy(),
        y=data[:, 0].copy(),
        estimates=tuple(params[k][0] for k in sorted(params)),
        std_devs=tuple(params[k][1] for k in sorted(params)),
        first_index=first_index,
        residual_sd=residual_sd,
        dof=dof,
    )
