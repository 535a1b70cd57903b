"""Loader for NIST StRD linear-regression files (``tests/data/strd/*.dat``).

A file is a 60-line header followed by the data. The header names the line ranges of the
certified values and of the data ("Certified Values (lines 31 to 46)", "Data (lines 61 to 96)");
the certified block lists each parameter as ``B<k>  estimate  standard-deviation`` and then the
"Residual Standard Deviation". Numbers are Fortran-style (``.591E0``, ``0.1E-03``, possibly with a
``D`` exponent). Data rows hold ``y`` then ``x``.
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
_PARAM = re.compile(rf"^\s*B(\d+)\s+({_NUMBER})\s+({_NUMBER})\s*$")
_RESIDUAL_SD = re.compile(rf"^\s*Standard Deviation\s+({_NUMBER})\s*$")
_OBSERVATIONS = re.compile(r"^\s*(\d+)\s+Observations\s*$", re.MULTILINE)


def fortran_float(text: str) -> float:
    """A Fortran-style number (``.591E0``, ``-0.3E-14``, ``1.0D0``) as a float."""
    return float(text.replace("D", "E").replace("d", "e"))


@dataclass(frozen=True, slots=True)
class StrdDataset:
    """One StRD problem: its data and NIST's certified results.

    ``estimates[k]`` and ``std_devs[k]`` belong to B<k> (the coefficient of x**k).
    """

    name: str
    x: NDArray[np.float64]
    y: NDArray[np.float64]
    estimates: tuple[float, ...]
    std_devs: tuple[float, ...]
    residual_sd: float


def _line_range(header: str, block: str) -> tuple[int, int]:
    for match in _RANGE.finditer(header):
        if match.group(1) == block:
            return int(match.group(2)), int(match.group(3))
    raise ValueError(f"StRD header names no line range for {block!r}")


def load_strd(name: str) -> StrdDataset:
    """Parse ``tests/data/strd/<name>.dat``."""
    path = DATA_DIR / f"{name}.dat"
    text = path.read_text(encoding="ascii")
    lines = text.splitlines()
    cert_first, cert_last = _line_range(text, "Certified Values")
    data_first, data_last = _line_range(text, "Data")

    params: dict[int, tuple[float, float]] = {}
    residual_sd: float | None = None
    for line in lines[cert_first - 1 : cert_last]:  # header line numbers are 1-based, inclusive
        if m := _PARAM.match(line):
            params[int(m.group(1))] = (fortran_float(m.group(2)), fortran_float(m.group(3)))
        elif m := _RESIDUAL_SD.match(line):
            residual_sd = fortran_float(m.group(1))
    if not params or sorted(params) != list(range(len(params))):
        raise ValueError(f"{path.name}: certified parameters B0..Bp not found in order")
    if residual_sd is None:
        raise ValueError(f"{path.name}: certified residual standard deviation not found")

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
        residual_sd=residual_sd,
    )
