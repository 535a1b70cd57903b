"""Exports of a fit: a conversion table (CSV, JSON) and a firmware C header.

Conversion table
    ``conversion_table`` lists reading -> value with its expanded uncertainty (k = 2 by default,
    Student t at ``level`` otherwise) from ``Fit.value_interval``. Values are ``Fit.to_value``
    itself; rows outside the valid range are marked (``in_range`` False, value and uncertainty
    NaN in the arrays, empty in CSV, ``null`` in JSON): nothing is extrapolated.

Firmware header (``c_header``): one C99 header, no dynamic memory, ``static inline`` functions of
an ``int32_t`` reading code. Three forms:

* **float** ``NAME_to_value_f`` (families in ``FLOAT_FORMS``): the family's formula evaluated in
  double with the constants printed to 17 significant digits (the exact binary64 values the
  engine uses), the result rounded to float. Double, not float, because a float evaluation loses
  digits to cancellation (``k / (r + r0) + v0``, raw polynomial terms) and could not promise
  agreement with the engine to 1e-6; on an MCU without a double FPU it is emulated (slower, still
  exact): the two integer forms are the FPU-free options.
* **integer** ``NAME_to_value_milli`` (families in ``INTEGER_FORMS``: line, polynomial, inverse,
  inverse_offset): the value in thousandths of the value unit, from scaled integer constants.
  Polynomials: fixed-point Horner in d = reading - centre. Reciprocals ``k / (r + r0) + v0``: a
  long division of a multi-digit constant numerator by an integer denominator (schoolbook, one
  base-2^j digit at a time), so the numerator may carry more bits than the int type. Every
  intermediate's range is bounded by exact integer interval arithmetic over the valid codes (the
  proof, kept in ``bounds`` and printed in the header) and must lie within int32; int64 is used
  instead only when int32 arithmetic would err by more than ``INT32_ACCEPT``, and the header says
  so. The worst error is computed by running the algorithm in Python over every valid code,
  mirroring C exactly (integer division truncates toward zero).
* **lookup table** ``NAME_lut_milli`` (every family): int32 thousandths at breakpoints spaced
  2^shift codes apart from the lowest valid code, linear interpolation between them in int32;
  the spacing is the largest whose worst error over every valid code (computed as above) meets
  ``lut_max_error`` (default ``max(rse / 10, LUT_DEFAULT_FLOOR)``), or the finest within
  ``lut_size`` entries. For families without an integer form the table is the integer-only form.

Every function checks the valid range first: codes outside it return ``NAME_OUT_OF_RANGE``
(INT32_MIN) from the integer forms and NAN from the float form, and no arithmetic runs on them.
"""

from shared.exports._common import (
    CACHE_CODES,
    CHUNK,
    DEN_ERROR_MILLI,
    INT32_ACCEPT,
    INT32_MAX,
    INT32_MIN,
    INT64_MAX,
    LUT_DEFAULT_FLOOR,
    MAX_CODES,
    MAX_FRAC_BITS,
    MAX_LUT_ENTRIES,
    MAX_TABLE_ROWS,
    VALUE_SCALE,
    Array,
    Bounds,
    Ints,
)
from shared.exports.float_forms import FLOAT_FORMS, NO_FLOAT_FORM, FloatBuilder, FloatForm
from shared.exports.header import Firmware, c_header, firmware
from shared.exports.integer_forms import (
    INTEGER_FORMS,
    HornerForm,
    IntegerBuilder,
    ReciprocalForm,
    integer_form,
)
from shared.exports.lut import LookupTable, lookup_table
from shared.exports.table import Table, conversion_table, table_to_csv, table_to_json

__all__ = [
    "CACHE_CODES",
    "CHUNK",
    "DEN_ERROR_MILLI",
    "FLOAT_FORMS",
    "INT32_ACCEPT",
    "INT32_MAX",
    "INT32_MIN",
    "INT64_MAX",
    "INTEGER_FORMS",
    "LUT_DEFAULT_FLOOR",
    "MAX_CODES",
    "MAX_FRAC_BITS",
    "MAX_LUT_ENTRIES",
    "MAX_TABLE_ROWS",
    "NO_FLOAT_FORM",
    "VALUE_SCALE",
    "Array",
    "Bounds",
    "Firmware",
    "FloatBuilder",
    "FloatForm",
    "HornerForm",
    "IntegerBuilder",
    "Ints",
    "LookupTable",
    "ReciprocalForm",
    "Table",
    "c_header",
    "conversion_table",
    "firmware",
    "integer_form",
    "lookup_table",
    "table_to_csv",
    "table_to_json",
]
