"""Types and limits shared by the exports (see the package docstring)."""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.typing import NDArray

Array = NDArray[np.float64]
Ints = NDArray[Any]  # int64, or object (Python ints) for an exact mirror
Bounds = tuple[int, int]

VALUE_SCALE = 1000  # the integer forms return thousandths of the value unit ("milli")
INT32_MAX = 2**31 - 1
INT32_MIN = -(2**31)
INT64_MAX = 2**63 - 1
INT32_ACCEPT = 1.0 / VALUE_SCALE  # value units: int32 integer form kept while it errs <= this
LUT_DEFAULT_FLOOR = 2.0 / VALUE_SCALE  # value units: the default table target is never finer
MAX_TABLE_ROWS = 1 << 20
MAX_CODES = (1 << 24) + 1  # valid codes checked one by one (a 24-bit converter)
MAX_LUT_ENTRIES = (1 << 16) + 2
CHUNK = 1 << 18  # codes per pass of the exhaustive checks
CACHE_CODES = 1 << 22  # engine values kept between passes up to this many codes
DEN_ERROR_MILLI = 1.0 / 32  # reciprocal form: rounding of the denominator costs at most this
MAX_FRAC_BITS = 20  # reciprocal form: fraction bits of the quotient below a thousandth
