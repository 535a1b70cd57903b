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

from __future__ import annotations

import csv
import io
import json
import math
import re
import textwrap
import unicodedata
from collections.abc import Callable, Iterator, Mapping, Sequence
from dataclasses import dataclass, replace
from datetime import date
from decimal import ROUND_CEILING, Decimal
from fractions import Fraction
from itertools import pairwise
from typing import Any

import numpy as np
from numpy.typing import NDArray

from shared.errors import BadInput
from shared.families import get_family
from shared.fitting import Fit
from shared.version import ENGINE_VERSION

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


# == conversion table ============================================================================
@dataclass(frozen=True, slots=True, eq=False)
class Table:
    """Rows reading -> value, expanded uncertainty ``expanded = k u`` (value units).

    ``value``, ``u`` and ``expanded`` are NaN where ``in_range`` is False (outside the fit's valid
    range); ``level`` is None for the k = 2 convention, else the Student-t coverage level.
    """

    family: str
    reading: Array
    value: Array
    u: Array
    expanded: Array
    k: float
    level: float | None
    in_range: NDArray[np.bool_]
    valid_range: tuple[float, float]
    engine_version: str


def _frozen(arr: NDArray[Any]) -> NDArray[Any]:
    arr.setflags(write=False)
    return arr


def conversion_table(
    fit: Fit,
    reading_min: float,
    reading_max: float,
    step: float = 1,
    *,
    level: float | None = None,
) -> Table:
    """Readings ``reading_min, reading_min + step, ... <= reading_max`` converted by ``fit``.

    Parameters
    ----------
    fit : the calibration curve.
    reading_min, reading_max, step : the rows, in reading units (every code: step 1).
    level : coverage level of the expanded uncertainty (Student t at the fit's dof, normal for
        given uncertainties); None (default) for the k = 2 convention.
    """
    lo, hi, st = float(reading_min), float(reading_max), float(step)
    if not (math.isfinite(lo) and math.isfinite(hi) and math.isfinite(st)):
        raise BadInput("reading_min, reading_max and step must be finite numbers")
    if st <= 0:
        raise BadInput(f"step must be > 0, not {step}")
    if hi < lo:
        raise BadInput(f"reading_max {reading_max} is below reading_min {reading_min}")
    if level is not None and not 0.0 < level < 1.0:
        raise BadInput(f"level must lie between 0 and 1 (e.g. 0.95), not {level}")
    rows = math.floor((hi - lo) / st + 1e-9) + 1
    if rows > MAX_TABLE_ROWS:
        raise BadInput(f"{rows} rows exceed the limit of {MAX_TABLE_ROWS}; use a larger step")
    reading = np.minimum(lo + np.arange(rows) * st, hi)
    with np.errstate(all="ignore"):  # the formula outside the valid range is masked anyway
        value = fit.to_value(reading)
    inside = fit.in_range(reading)
    u = np.full(rows, np.nan)
    probe = reading[inside] if inside.any() else np.array([fit.valid_range[0]])
    interval = fit.value_interval(probe, level)
    if inside.any():
        u[inside] = interval.u
    return Table(
        family=fit.family,
        reading=_frozen(reading),
        value=_frozen(np.asarray(value, dtype=float)),
        u=_frozen(u),
        expanded=_frozen(interval.k * u),
        k=float(interval.k),
        level=level,
        in_range=_frozen(np.asarray(inside, dtype=bool)),
        valid_range=fit.valid_range,
        engine_version=fit.engine_version,
    )


def _number(x: float) -> str:
    """Shortest text that reads back as exactly ``x``; whole numbers without a decimal point."""
    if x.is_integer() and abs(x) < 2**53:
        return str(int(x))
    return repr(float(x))


def _coverage_label(table: Table) -> str:
    if table.level is None:
        return f"k = {table.k:g}"
    return f"k = {table.k:.4g}, level {table.level:g}"


def table_to_csv(table: Table, value_unit: str, reading_unit: str) -> str:
    """CSV text: ``reading [unit], value [unit], expanded uncertainty [unit] (k = ..), status``.

    Values print with the shortest digits that read back exactly; out-of-range rows have empty
    value and uncertainty and the status ``out of range``.
    """
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(
        [
            f"reading [{reading_unit}]",
            f"value [{value_unit}]",
            f"expanded uncertainty [{value_unit}] ({_coverage_label(table)})",
            "status",
        ]
    )
    for r, v, big_u, ok in zip(
        table.reading.tolist(),
        table.value.tolist(),
        table.expanded.tolist(),
        table.in_range.tolist(),
        strict=True,
    ):
        if ok:
            writer.writerow([_number(r), _number(v), _number(big_u), "in range"])
        else:
            writer.writerow([_number(r), "", "", "out of range"])
    return out.getvalue()


def table_to_json(table: Table, value_unit: str, reading_unit: str) -> str:
    """Plain JSON (no NaN): units, coverage, valid range and rows; ``null`` out of range."""
    rows = [
        {
            "reading": r,
            "value": v if ok else None,
            "expanded_uncertainty": big_u if ok else None,
            "in_range": ok,
        }
        for r, v, big_u, ok in zip(
            table.reading.tolist(),
            table.value.tolist(),
            table.expanded.tolist(),
            table.in_range.tolist(),
            strict=True,
        )
    ]
    doc = {
        "family": table.family,
        "engine_version": table.engine_version,
        "reading_unit": reading_unit,
        "value_unit": value_unit,
        "valid_range": list(table.valid_range),
        "coverage": {"k": table.k, "level": table.level},
        "rows": rows,
    }
    return json.dumps(doc, allow_nan=False)


# == C integer semantics and interval arithmetic =================================================
def c_div(n: Ints, d: int) -> Ints:
    """C99 ``n / d`` for a positive constant ``d``: the quotient truncated toward zero."""
    out: Ints = np.where(n >= 0, n // d, -((-n) // d))
    return out


def _round_add(n: Ints, half: int) -> Ints:
    """``n >= 0 ? n + half : n - half``: the numerator of a division rounded half away from 0."""
    out: Ints = np.where(n >= 0, n + half, n - half)
    return out


def _cdiv_int(n: int, d: int) -> int:
    return n // d if n >= 0 else -((-n) // d)


def _mul_b(a: Bounds, b: Bounds) -> Bounds:
    corners = [a[0] * b[0], a[0] * b[1], a[1] * b[0], a[1] * b[1]]
    return min(corners), max(corners)


def _add_b(a: Bounds, b: Bounds) -> Bounds:
    return a[0] + b[0], a[1] + b[1]


def _div_b(a: Bounds, d: int) -> Bounds:
    return _cdiv_int(a[0], d), _cdiv_int(a[1], d)  # truncation is monotone


def _round_add_b(a: Bounds, half: int) -> Bounds:
    lo = a[0] + half if a[0] >= 0 else a[0] - half
    hi = a[1] + half if a[1] >= 0 else a[1] - half
    return lo, hi


def _output(x: Ints, frac_bits: int, parts: dict[str, Ints]) -> Ints:
    """Drop the fraction bits, rounding half away from zero as the C does; record the steps."""
    if frac_bits:
        rounded = _round_add(x, 2 ** (frac_bits - 1))
        parts["rounded"] = rounded
        x = c_div(rounded, 2**frac_bits)
    parts["y"] = x
    return x


def _output_bounds(x: Bounds, frac_bits: int, bounds: dict[str, Bounds]) -> dict[str, Bounds]:
    """``_output`` on value bounds, for the int32 proof."""
    if frac_bits:
        rounded = _round_add_b(x, 2 ** (frac_bits - 1))
        bounds["rounded"] = rounded
        x = _div_b(rounded, 2**frac_bits)
    bounds["y"] = x
    return bounds


def _fits(bounds: Mapping[str, Bounds], limit: int) -> bool:
    return all(-limit <= lo and hi <= limit for lo, hi in bounds.values())


def _c_int(x: int, bits: int) -> str:
    return f"INT{bits}_C({x})"


# == the valid codes and the engine's values there ===============================================
def valid_codes(fit: Fit, reading_min: int, reading_max: int) -> tuple[int, int]:
    """The integer codes in [reading_min, reading_max] that lie in the fit's valid range."""
    for label, x in (("reading_min", reading_min), ("reading_max", reading_max)):
        if isinstance(x, bool) or int(x) != x or not INT32_MIN <= int(x) <= INT32_MAX:
            raise BadInput(f"{label} must be a whole number within int32, not {x!r}")
    lo, hi = fit.valid_range
    a = max(int(reading_min), math.ceil(lo))
    b = min(int(reading_max), math.floor(hi))
    if a > b:
        raise BadInput(
            f"no code in {reading_min} .. {reading_max} lies in the valid range "
            f"{lo:.9g} .. {hi:.9g}"
        )
    if b - a + 1 > MAX_CODES:
        raise BadInput(
            f"the valid range holds {b - a + 1} codes; at most {MAX_CODES} can be checked "
            "one by one"
        )
    return a, b


class _Reference:
    """The engine's values at every valid code, in chunks (kept when they are few)."""

    def __init__(self, fit: Fit, a: int, b: int) -> None:
        self.fit, self.a, self.b = fit, a, b
        self._cache: list[tuple[Ints, Array]] | None = None

    def values(self, codes: Ints) -> Array:
        out = np.asarray(self.fit.to_value(codes.astype(np.float64)), dtype=np.float64)
        if not np.all(np.isfinite(out)):
            bad = codes[~np.isfinite(out)][:5].tolist()
            raise BadInput(f"the engine gives no finite value at code(s) {bad} of the valid range")
        return out

    def chunks(self) -> Iterator[tuple[Ints, Array]]:
        if self._cache is not None:
            yield from self._cache
            return
        keep = self.b - self.a + 1 <= CACHE_CODES
        cache: list[tuple[Ints, Array]] = []
        for start in range(self.a, self.b + 1, CHUNK):
            codes = np.arange(start, min(start + CHUNK, self.b + 1), dtype=np.int64)
            item = (codes, self.values(codes))
            if keep:
                cache.append(item)
            yield item
        if keep:
            self._cache = cache


Mirror = Callable[[Ints], tuple[Ints, dict[str, Ints]]]


def _worst_error(mirror: Mirror, ref: _Reference) -> float:
    """max |y / VALUE_SCALE - engine| over every valid code (value units)."""
    worst = 0.0
    for codes, values in ref.chunks():
        y, _ = mirror(codes)
        worst = max(worst, float(np.max(np.abs(y / VALUE_SCALE - values))))
    return worst


def _observed(mirror: Mirror, codes: Ints) -> dict[str, Bounds]:
    """The range each intermediate actually takes over ``codes`` (a brute-force check)."""
    _, parts = mirror(codes)
    return {k: (int(np.min(v)), int(np.max(v))) for k, v in parts.items()}


# == integer form 1: fixed-point Horner (line, polynomial) =======================================
@dataclass(frozen=True, slots=True)
class HornerForm:
    """value_milli = round(acc_0 / 2^frac_bits), d = reading - centre, by fixed-point Horner.

    acc_n = coefs[0]; for each following coefficient B and shift g:
    prod = acc * d; acc = B + prod / 2^g (C division). ``coefs`` are B_n .. B_0, highest first.
    """

    code_min: int
    code_max: int
    centre: int
    coefs: tuple[int, ...]
    shifts: tuple[int, ...]
    frac_bits: int
    int_bits: int
    bounds: Mapping[str, Bounds]
    max_error: float = math.nan

    def evaluate(self, codes: Ints) -> tuple[Ints, dict[str, Ints]]:
        parts: dict[str, Ints] = {}
        d = codes - self.centre
        parts["d"] = d
        n = len(self.coefs) - 1
        acc = d * 0 + self.coefs[0]
        for i, (coef, g) in enumerate(zip(self.coefs[1:], self.shifts, strict=True)):
            k = n - 1 - i
            prod = acc * d
            parts[f"prod{k}"] = prod
            acc = coef + (c_div(prod, 2**g) if g else prod)
            parts[f"acc{k}"] = acc
        return _output(acc, self.frac_bits, parts), parts

    def c_lines(self, fn: str, macro: str) -> list[str]:
        t = f"int{self.int_bits}_t"
        n = len(self.coefs) - 1
        reading = "reading" if self.int_bits == 32 else "(int64_t)reading"
        lines = [
            f"static inline int32_t {fn}(int32_t reading)",
            "{",
            f"    {t} d;",
            f"    {t} acc;",
            f"    if (reading < {macro}CODE_MIN || reading > {macro}CODE_MAX) {{",
            f"        return {macro}OUT_OF_RANGE;",
            "    }",
            f"    d = {reading} - {macro}MILLI_CENTRE;",
            f"    acc = {macro}MILLI_B{n};",
        ]
        for i, g in enumerate(self.shifts):
            k = n - 1 - i
            div = f" / {_c_int(2**g, self.int_bits)}" if g else ""
            lines.append(f"    acc = {macro}MILLI_B{k} + (acc * d){div};")
        if self.frac_bits:
            half, one = f"{macro}MILLI_HALF", f"{macro}MILLI_ONE"
            lines.append(f"    return (int32_t)((acc >= 0 ? acc + {half} : acc - {half}) / {one});")
        else:
            lines.append("    return (int32_t)acc;")
        lines.append("}")
        return lines

    def macros(self) -> list[tuple[str, str, str]]:
        n = len(self.coefs) - 1
        out = [("MILLI_CENTRE", _c_int(self.centre, 32), "d = reading - centre")]
        for i, coef in enumerate(self.coefs):
            k = n - i
            f = self.frac_bits + sum(self.shifts[i:])
            out.append(
                (f"MILLI_B{k}", _c_int(coef, self.int_bits), f"d^{k} coefficient x 1000 x 2^{f}")
            )
        return out + _rounding_macros(self.frac_bits, self.int_bits)

    def describe(self) -> list[str]:
        n = len(self.coefs) - 1
        steps = "; ".join(
            f"acc = B{n - 1 - i} + acc*d" + (f" / 2^{g}" if g else "")
            for i, g in enumerate(self.shifts)
        )
        return [
            f"fixed-point Horner in d = reading - {self.centre}: acc = B{n}; {steps};",
            f"result = acc / 2^{self.frac_bits}, rounded half away from zero.",
        ]


def _rounding_macros(frac_bits: int, bits: int) -> list[tuple[str, str, str]]:
    if not frac_bits:
        return []
    return [
        ("MILLI_ONE", _c_int(2**frac_bits, bits), f"2^{frac_bits}: one thousandth"),
        ("MILLI_HALF", _c_int(2 ** (frac_bits - 1), bits), "half of it, for rounding"),
    ]


def _monomials(fit: Fit) -> list[Fraction]:
    """Raw coefficients c0..cd of a line/polynomial fit, exactly as the engine holds them."""
    powers = {int(name[1:]): value for name, value in fit.params.items()}
    return [Fraction(powers.get(k, 0.0)) for k in range(max(powers) + 1)]


def _taylor(coef: Sequence[Fraction], centre: int) -> list[Fraction]:
    """Coefficients of p(centre + d) in powers of d, times VALUE_SCALE (exact)."""
    n = len(coef) - 1
    out = []
    for k in range(n + 1):
        terms = (math.comb(j, k) * coef[j] * centre ** (j - k) for j in range(k, n + 1))
        out.append(VALUE_SCALE * sum(terms, Fraction(0)))
    return out


def _horner_bounds(
    coefs: Sequence[int], shifts: Sequence[int], frac_bits: int, d: Bounds
) -> dict[str, Bounds]:
    n = len(coefs) - 1
    bounds: dict[str, Bounds] = {"d": d}
    acc = (coefs[0], coefs[0])
    for i, (coef, g) in enumerate(zip(coefs[1:], shifts, strict=True)):
        k = n - 1 - i
        prod = _mul_b(acc, d)
        bounds[f"prod{k}"] = prod
        acc = _add_b((coef, coef), _div_b(prod, 2**g) if g else prod)
        bounds[f"acc{k}"] = acc
    return _output_bounds(acc, frac_bits, bounds)


def _horner_form(fit: Fit, a: int, b: int, bits: int) -> HornerForm | None:
    """The most precise fixed-point Horner whose every intermediate provably fits ``bits``."""
    limit = 2 ** (bits - 1) - 1
    g_max = bits - 2  # 2^g must itself be a value of the type
    centre = (a + b) // 2
    taylor = _taylor(_monomials(fit), centre)
    while len(taylor) > 1 and taylor[-1] == 0:
        taylor.pop()
    n = len(taylor) - 1
    d: Bounds = (a - centre, b - centre)
    h = max(-d[0], d[1], 1)
    # real-valued magnitudes of the Horner accumulators q_k(d) = b_k + d q_{k+1}(d)
    mags = [0.0] * (n + 1)
    q_lo = q_hi = float(taylor[n])
    mags[n] = abs(q_hi)
    for k in range(n - 1, -1, -1):
        corners = [q_lo * d[0], q_lo * d[1], q_hi * d[0], q_hi * d[1]]
        q_lo, q_hi = float(taylor[k]) + min(corners), float(taylor[k]) + max(corners)
        mags[k] = max(abs(q_lo), abs(q_hi))
    # scale caps: 2^f_k |q_k| (times h where it multiplies d) within the limit
    caps = []
    for k in range(n + 1):
        m = mags[k] * (h if k >= 1 else 1)
        caps.append(math.floor(math.log2(limit / m)) if m > 0 else g_max * (n + 1))
    # the greatest scales with f_0 <= g_max and 0 <= f_{k+1} - f_k <= g_max (relaxation)
    f = [min(c, g_max * (n + 1)) for c in caps]
    f[0] = min(f[0], g_max)
    changed = True
    while changed:
        changed = False
        for k in range(n):
            up, down = min(f[k + 1], f[k] + g_max), min(f[k], f[k + 1])
            changed |= (up, down) != (f[k + 1], f[k])
            f[k + 1], f[k] = up, down
    while f[0] >= 0:
        coefs = [round(taylor[k] * Fraction(2) ** f[k]) for k in range(n, -1, -1)]
        shifts = [f[k + 1] - f[k] for k in range(n - 1, -1, -1)]
        bounds = _horner_bounds(coefs, shifts, f[0], d)
        y = bounds["y"]
        if _fits(bounds, limit) and y[0] >= -INT32_MAX and y[1] <= INT32_MAX:
            return HornerForm(
                code_min=a,
                code_max=b,
                centre=centre,
                coefs=tuple(coefs),
                shifts=tuple(shifts),
                frac_bits=f[0],
                int_bits=bits,
                bounds=bounds,
            )
        f = [x - 1 for x in f]  # one bit less everywhere, and prove again
    return None


# == integer form 2: reciprocal by long division (inverse, inverse_offset) =======================
@dataclass(frozen=True, slots=True)
class ReciprocalForm:
    """value_milli = round((v0s + sign * q) / 2^frac_bits), q = N / den by long division.

    den = d * den_scale + den_offset with d = reading - centre (or centre - reading when
    ``flip``), a positive integer ~ |r + r0| den_scale; N = |k| den_scale 1000 2^frac_bits,
    held as base-``base`` ``digits`` (most significant first): rem = 0, q = 0, and per digit
    acc = rem * base + digit, q = q * base + acc / den, rem = acc % den.
    """

    code_min: int
    code_max: int
    centre: int
    flip: bool
    den_scale: int
    den_offset: int
    base: int
    digits: tuple[int, ...]
    sign: int
    v0_scaled: int
    frac_bits: int
    int_bits: int
    bounds: Mapping[str, Bounds]
    max_error: float = math.nan

    def evaluate(self, codes: Ints) -> tuple[Ints, dict[str, Ints]]:
        parts: dict[str, Ints] = {}
        d = self.centre - codes if self.flip else codes - self.centre
        d_scaled = d * self.den_scale
        den = d_scaled + self.den_offset
        parts.update(d=d, d_scaled=d_scaled, den=den)
        rem = d * 0
        q = d * 0
        acc_max, acc_min = d * 0, d * 0 + self.digits[0]
        for digit in self.digits:
            acc = rem * self.base + digit
            q = q * self.base + acc // den  # acc >= 0 and den > 0: C truncation is floor here
            rem = acc % den
            acc_max, acc_min = np.maximum(acc_max, acc), np.minimum(acc_min, acc)
        # every partial quotient and q * base lie between 0 and the final q
        parts.update(acc=np.concatenate([acc_min, acc_max]), q=q)
        total = self.v0_scaled + self.sign * q
        parts["total"] = total
        return _output(total, self.frac_bits, parts), parts

    def c_lines(self, fn: str, macro: str) -> list[str]:
        t = f"int{self.int_bits}_t"
        reading = "reading" if self.int_bits == 32 else "(int64_t)reading"
        d = (
            f"({macro}MILLI_CENTRE - {reading})"
            if self.flip
            else f"({reading} - {macro}MILLI_CENTRE)"
        )
        digits = [_c_int(x, self.int_bits) for x in self.digits]
        rows = [", ".join(digits[i : i + 6]) for i in range(0, len(digits), 6)]
        op = "+" if self.sign > 0 else "-"
        lines = [
            f"static inline int32_t {fn}(int32_t reading)",
            "{",
            f"    static const {t} digits[{macro}MILLI_DIGITS] = {{",
            *[f"        {row}," for row in rows],
            "    };",
            f"    {t} den;",
            f"    {t} rem = 0;",
            f"    {t} q = 0;",
            f"    {t} total;",
            "    int i;",
            f"    if (reading < {macro}CODE_MIN || reading > {macro}CODE_MAX) {{",
            f"        return {macro}OUT_OF_RANGE;",
            "    }",
            f"    den = {d} * {macro}MILLI_DEN_SCALE + {macro}MILLI_DEN_OFFSET;",
            f"    for (i = 0; i < {macro}MILLI_DIGITS; ++i) {{",
            f"        {t} acc = rem * {macro}MILLI_BASE + digits[i];",
            f"        q = q * {macro}MILLI_BASE + acc / den;",
            "        rem = acc % den;",
            "    }",
            f"    total = {macro}MILLI_V0 {op} q;",
        ]
        if self.frac_bits:
            half, one = f"{macro}MILLI_HALF", f"{macro}MILLI_ONE"
            lines.append(
                f"    return (int32_t)((total >= 0 ? total + {half} : total - {half}) / {one});"
            )
        else:
            lines.append("    return (int32_t)total;")
        lines.append("}")
        return lines

    def macros(self) -> list[tuple[str, str, str]]:
        return [
            ("MILLI_CENTRE", _c_int(self.centre, 32), "d = reading - centre"),
            ("MILLI_DEN_SCALE", _c_int(self.den_scale, self.int_bits), "denominator scale"),
            ("MILLI_DEN_OFFSET", _c_int(self.den_offset, self.int_bits), "denominator offset"),
            ("MILLI_BASE", _c_int(self.base, self.int_bits), "digit base of the numerator"),
            ("MILLI_DIGITS", str(len(self.digits)), "digits of the numerator"),
            (
                "MILLI_V0",
                _c_int(self.v0_scaled, self.int_bits),
                f"v0 x 1000 x 2^{self.frac_bits}",
            ),
            *_rounding_macros(self.frac_bits, self.int_bits),
        ]

    def describe(self) -> list[str]:
        sign = "-" if self.flip else ""
        return [
            f"den = {sign}(reading - {self.centre}) x {self.den_scale} + {self.den_offset} "
            f"(> 0 over the valid codes);",
            f"q = N / den by long division, N = |k| x {self.den_scale} x 1000 x "
            f"2^{self.frac_bits} in {len(self.digits)} base-{self.base} digits;",
            f"result = (v0 x 1000 x 2^{self.frac_bits} {'+' if self.sign > 0 else '-'} q) / "
            f"2^{self.frac_bits}, rounded half away from zero.",
        ]


def _digits(n: int, base: int) -> list[int]:
    out = []
    while True:
        n, digit = divmod(n, base)
        out.append(digit)
        if n == 0:
            return out[::-1]


def _reciprocal_bounds(form: ReciprocalForm) -> dict[str, Bounds]:
    a, b, c = form.code_min, form.code_max, form.centre
    d = (c - b, c - a) if form.flip else (a - c, b - c)
    d_scaled = _mul_b(d, (form.den_scale, form.den_scale))
    den = _add_b(d_scaled, (form.den_offset, form.den_offset))
    numerator = 0
    for digit in form.digits:
        numerator = numerator * form.base + digit
    acc = (0, den[1] * form.base - 1) if den[0] >= 1 else (0, 2**130)
    q_max = numerator // den[0] if den[0] >= 1 else 2**130
    q = (0, q_max)
    total = _add_b((form.v0_scaled, form.v0_scaled), _mul_b((form.sign, form.sign), q))
    bounds = {"d": d, "d_scaled": d_scaled, "den": den, "acc": acc, "q": q, "total": total}
    return _output_bounds(total, form.frac_bits, bounds)


def _reciprocal_form(fit: Fit, a: int, b: int, bits: int) -> ReciprocalForm | None:
    """k / (r + r0) + v0 (inverse: r0 = 0) in ``bits``-wide integers, or None if impossible."""
    limit = 2 ** (bits - 1) - 1
    k = Fraction(fit.params["k"])
    r0 = Fraction(fit.params.get("r0", 0.0))
    v0 = Fraction(fit.params["v0"])
    ends = (a + r0, b + r0)
    if ends[0] * ends[1] <= 0:
        raise BadInput(f"{fit.family}: the pole r = {-float(r0):.9g} lies among the valid codes")
    flip = ends[0] < 0
    m_lo, m_hi = min(abs(ends[0]), abs(ends[1])), max(abs(ends[0]), abs(ends[1]))
    q_real = VALUE_SCALE * abs(k) / m_lo  # largest |quotient|, thousandths
    if q_real + VALUE_SCALE * abs(v0) > limit or k == 0:
        return None
    # denominator scale: its rounding costs <= DEN_ERROR_MILLI where the digits allow (the larger
    # the denominator, the fewer bits per digit of the numerator: at least one)
    e_want = max(0, math.ceil(math.log2(float(0.5 * q_real / (DEN_ERROR_MILLI * m_lo)))))
    e_cap = math.floor(math.log2((limit + 1) / (2 * (float(m_hi) + 1))))
    if e_cap < 0:
        return None
    scale = 2 ** min(e_want, e_cap)
    centre = (a + b) // 2
    offset = round((-1 if flip else 1) * (centre + r0) * scale)
    sign = 1 if (k > 0) != flip else -1
    probe = ReciprocalForm(a, b, centre, flip, scale, offset, 2, (0,), sign, 0, 0, bits, {})
    den = _reciprocal_bounds(probe)["den"]
    if den[0] < 1:
        return None
    base = 2 ** math.floor(math.log2((limit + 1) / den[1]))
    if base < 2:
        return None
    for frac_bits in range(MAX_FRAC_BITS, -1, -1):
        numerator = round(abs(k) * scale * VALUE_SCALE * 2**frac_bits)
        form = ReciprocalForm(
            code_min=a,
            code_max=b,
            centre=centre,
            flip=flip,
            den_scale=scale,
            den_offset=offset,
            base=base,
            digits=tuple(_digits(numerator, base)),
            sign=sign,
            v0_scaled=round(v0 * VALUE_SCALE * 2**frac_bits),
            frac_bits=frac_bits,
            int_bits=bits,
            bounds={},
        )
        bounds = _reciprocal_bounds(form)
        y = bounds["y"]
        if _fits(bounds, limit) and y[0] >= -INT32_MAX and y[1] <= INT32_MAX:
            return replace(form, bounds=bounds)
    return None


IntegerBuilder = Callable[[Fit, int, int, int], HornerForm | ReciprocalForm | None]
INTEGER_FORMS: dict[str, IntegerBuilder] = {
    "line": _horner_form,
    "polynomial": _horner_form,
    "inverse": _reciprocal_form,
    "inverse_offset": _reciprocal_form,
}


def integer_form(
    fit: Fit, reading_min: int, reading_max: int, *, bits: int | None = None
) -> HornerForm | ReciprocalForm:
    """The integer-only form (value in thousandths) with its proof and its worst error.

    ``bits=None`` chooses: int32 when its worst error is at most ``INT32_ACCEPT``, int64
    otherwise (int32 again if int64 is impossible). ``bits=32`` or ``64`` forces a width.
    Raises BadInput for families without one (their lookup table is the integer-only form) and
    when the values do not fit int32 as thousandths.
    """
    builder = INTEGER_FORMS.get(fit.family)
    if builder is None:
        raise BadInput(
            f"{fit.family}: no integer form with scaled constants; the lookup table is its "
            "integer-only form"
        )
    a, b = valid_codes(fit, reading_min, reading_max)
    ref = _Reference(fit, a, b)
    found: list[HornerForm | ReciprocalForm] = []
    for width in (32, 64) if bits is None else (bits,):
        form = builder(fit, a, b, width)
        if form is None:
            continue
        checked = _checked(form, ref)
        if width == 32 and bits is None and checked.max_error > INT32_ACCEPT:
            found.append(checked)
            continue
        return checked
    if found:
        return found[0]
    raise BadInput(
        f"{fit.family}: the values do not fit an integer form in thousandths of the value unit "
        f"within int{bits or 64} arithmetic; use a larger value unit"
    )


def _checked(form: HornerForm | ReciprocalForm, ref: _Reference) -> HornerForm | ReciprocalForm:
    """Confirm the proof at the ends of the range, and state the exhaustive worst error."""
    ends = np.array([form.code_min, form.code_max], dtype=np.int64)
    for name, (lo, hi) in _observed(form.evaluate, ends).items():
        b_lo, b_hi = form.bounds[name]
        if not b_lo <= lo <= hi <= b_hi:  # pragma: no cover - a bug in a proof
            raise AssertionError(f"integer form: {name} leaves its proven range")
    return replace(form, max_error=_worst_error(form.evaluate, ref))


# == lookup table ================================================================================
@dataclass(frozen=True, slots=True)
class LookupTable:
    """int32 thousandths at codes code_min + i 2^shift, linear interpolation between them.

    offset = reading - code_min; i = offset >> shift; frac = offset & (2^shift - 1);
    result = nodes[i] + round((nodes[i+1] - nodes[i]) frac / 2^shift) (half away from zero).
    """

    code_min: int
    code_max: int
    shift: int
    nodes: tuple[int, ...]
    bounds: Mapping[str, Bounds]
    target: float | None
    int_bits: int = 32
    max_error: float = math.nan

    def evaluate(self, codes: Ints) -> tuple[Ints, dict[str, Ints]]:
        nodes = np.array(self.nodes, dtype=np.int64)
        if codes.dtype == object:
            nodes = nodes.astype(object)
        offset = codes - self.code_min
        index = offset // 2**self.shift  # offset >= 0: the shift is a floor division
        frac = offset % 2**self.shift
        i = np.asarray(index, dtype=np.int64)
        low = nodes[i]
        parts: dict[str, Ints] = {"offset": offset, "index": index, "frac": frac}
        if self.shift == 0:
            parts["y"] = low
            return low, parts
        diff = nodes[i + 1] - low
        prod = diff * frac
        rounded = _round_add(prod, 2 ** (self.shift - 1))
        y = low + c_div(rounded, 2**self.shift)
        parts.update(diff=diff, prod=prod, rounded=rounded, y=y)
        return y, parts

    def c_lines(self, fn: str, macro: str) -> list[str]:
        nodes = [str(x) for x in self.nodes]
        rows = [", ".join(nodes[i : i + 8]) for i in range(0, len(nodes), 8)]
        lines = [
            f"static inline int32_t {fn}(int32_t reading)",
            "{",
            f"    static const int32_t table[{macro}LUT_SIZE] = {{",
            *[f"        {row}," for row in rows],
            "    };",
            "    int32_t offset;",
        ]
        if self.shift:
            lines += ["    int32_t index;", "    int32_t frac;", "    int32_t prod;"]
        lines += [
            f"    if (reading < {macro}CODE_MIN || reading > {macro}CODE_MAX) {{",
            f"        return {macro}OUT_OF_RANGE;",
            "    }",
            f"    offset = reading - {macro}CODE_MIN;",
        ]
        if not self.shift:
            lines += ["    return table[offset];", "}"]
            return lines
        half, one = 2 ** (self.shift - 1), 2**self.shift
        lines += [
            f"    index = offset >> {macro}LUT_SHIFT;",
            f"    frac = offset & {_c_int(one - 1, 32)};",
            "    prod = (table[index + 1] - table[index]) * frac;",
            f"    return table[index] + (prod >= 0 ? prod + {_c_int(half, 32)} "
            f": prod - {_c_int(half, 32)}) / {_c_int(one, 32)};",
            "}",
        ]
        return lines

    def describe(self) -> list[str]:
        return [
            f"{len(self.nodes)} entries, one every 2^{self.shift} = {2**self.shift} codes from "
            f"code {self.code_min}; int32 interpolation, rounded half away from zero."
        ]


def _lut_nodes(ref: _Reference, shift: int) -> list[int]:
    a, b = ref.a, ref.b
    step = 2**shift
    last = (b - a) >> shift
    pos = np.arange(last + 1, dtype=np.int64) * step + a
    values = ref.values(pos)
    nodes = [round(VALUE_SCALE * float(v)) for v in values]
    if shift == 0:
        return nodes
    end = int(pos[-1])
    if end == b:
        nodes.append(nodes[-1])  # never weighed: frac is 0 at the last code
    else:  # the line through the last node and the last code, so the table is exact at b
        v_end, v_b = float(values[-1]), float(ref.values(np.array([b], dtype=np.int64))[0])
        nodes.append(round(VALUE_SCALE * (v_end + (v_b - v_end) * step / (b - end))))
    return nodes


def _lut_bounds(nodes: Sequence[int], shift: int, a: int, b: int) -> dict[str, Bounds]:
    span = b - a
    bounds: dict[str, Bounds] = {
        "offset": (0, span),
        "index": (0, span >> shift),
        "frac": (0, min(2**shift - 1, span)),
        "node": (min(nodes), max(nodes)),
    }
    if shift == 0:
        bounds["y"] = bounds["node"]
        return bounds
    diffs = [hi - lo for lo, hi in pairwise(nodes)]
    bounds["diff"] = (min(diffs), max(diffs))
    bounds["prod"] = _mul_b(bounds["diff"], bounds["frac"])
    bounds["rounded"] = _round_add_b(bounds["prod"], 2 ** (shift - 1))
    bounds["y"] = _add_b(bounds["node"], _div_b(bounds["rounded"], 2**shift))
    return bounds


def _lut_at(ref: _Reference, shift: int, target: float | None) -> LookupTable | None:
    """The table at this spacing if its every intermediate provably fits int32, else None."""
    nodes = _lut_nodes(ref, shift)
    bounds = _lut_bounds(nodes, shift, ref.a, ref.b)
    if not _fits(bounds, INT32_MAX):
        return None
    return LookupTable(ref.a, ref.b, shift, tuple(nodes), bounds, target)


def _lut_entries(a: int, b: int, shift: int) -> int:
    return (b - a) + 1 if shift == 0 else ((b - a) >> shift) + 2


def lookup_table(
    fit: Fit,
    reading_min: int,
    reading_max: int,
    *,
    max_error: float | None = None,
    size: int | None = None,
) -> LookupTable:
    """The interpolated lookup table over the valid codes.

    ``max_error`` (value units; default ``max(rse / 10, LUT_DEFAULT_FLOOR)``): the largest
    power-of-two spacing whose worst error over every valid code meets it. ``size``: instead,
    the finest spacing with at most that many entries. Raises BadInput when neither is possible.
    """
    if max_error is not None and size is not None:
        raise BadInput("give lut_max_error or lut_size, not both")
    a, b = valid_codes(fit, reading_min, reading_max)
    ref = _Reference(fit, a, b)
    top = (b - a).bit_length()
    if size is not None:
        if isinstance(size, bool) or int(size) != size or size < 2:
            raise BadInput(f"lut_size must be a whole number >= 2, not {size!r}")
        if size > MAX_LUT_ENTRIES:
            raise BadInput(f"lut_size {size} exceeds the limit of {MAX_LUT_ENTRIES} entries")
        shift = next(s for s in range(top + 1) if _lut_entries(a, b, s) <= size)
        table = _lut_at(ref, shift, None)
        if table is None:
            raise BadInput(
                f"a table of {size} entries would overflow int32 in its interpolation; "
                "allow more entries"
            )
        return replace(table, max_error=_worst_error(table.evaluate, ref))
    target = max(fit.rse / 10, LUT_DEFAULT_FLOOR) if max_error is None else float(max_error)
    if not target > 0 or not math.isfinite(target):
        raise BadInput(f"lut_max_error must be a positive number, not {max_error!r}")
    best = math.inf
    for shift in range(top, -1, -1):
        if _lut_entries(a, b, shift) > MAX_LUT_ENTRIES:
            break
        table = _lut_at(ref, shift, target)
        if table is None:
            continue
        if shift:  # midway between breakpoints first: a cheap lower bound of the worst error
            mid = np.arange(a + 2 ** (shift - 1), b + 1, 2**shift, dtype=np.int64)
            if mid.size:
                y, _ = table.evaluate(mid)
                err = float(np.max(np.abs(y / VALUE_SCALE - ref.values(mid))))
                if err > target:
                    best = min(best, err)
                    continue
        worst = _worst_error(table.evaluate, ref)
        if worst <= target:
            return replace(table, max_error=worst)
        best = min(best, worst)
    raise BadInput(
        f"no lookup table of at most {MAX_LUT_ENTRIES} entries errs by <= {target:.6g} "
        f"(the closest errs by {best:.6g}; thousandths of the value unit limit it to about "
        f"{1 / VALUE_SCALE:g})"
    )


# == float forms =================================================================================
@dataclass(frozen=True, slots=True)
class FloatForm:
    """C statements computing the value from ``double r``; ``$`` stands for the macro prefix.

    ``constants``: (macro suffix, value) printed as double literals with 17 digits.
    """

    constants: tuple[tuple[str, float], ...]
    body: tuple[str, ...]


def _params(fit: Fit) -> tuple[tuple[str, float], ...]:
    return tuple((name.upper(), float(value)) for name, value in fit.params.items())


def _horner_c(coefs: Sequence[str]) -> str:
    """Horner expression in ``r`` of coefficients given lowest power first."""
    expr = coefs[-1]
    for c in coefs[-2::-1]:
        expr = f"({expr}) * r + {c}"
    return expr


def _float_polynomial(fit: Fit) -> FloatForm:
    powers = {int(name[1:]): f"${name.upper()}" for name in fit.params}
    coefs = [powers.get(k, "0.0") for k in range(max(powers) + 1)]
    return FloatForm(_params(fit), (f"return (float)({_horner_c(coefs)});",))


def _float_rational(fit: Fit) -> FloatForm:
    p = [f"${n.upper()}" for n in fit.params if n.startswith("p")]
    q = ["1.0"] + [f"${n.upper()}" for n in fit.params if n.startswith("q")]
    return FloatForm(_params(fit), (f"return (float)(({_horner_c(p)}) / ({_horner_c(q)}));",))


def _fixed(body: str) -> Callable[[Fit], FloatForm]:
    def build(fit: Fit) -> FloatForm:
        return FloatForm(_params(fit), (body,))

    return build


def _float_beta(fit: Fit) -> FloatForm:
    t0_k = float(fit.options["t0_c"]) + 273.15
    return FloatForm(
        (*_params(fit), ("T0_K", t0_k)),
        ("return (float)(1.0 / (1.0 / $T0_K + log(r / $R0) / $B) - 273.15);",),
    )


def _float_exp_rise(fit: Fit) -> FloatForm:
    offset = " + $C" if "c" in fit.params else ""
    return FloatForm(_params(fit), (f"return (float)(-$A * expm1(-$B * r){offset});",))


FloatBuilder = Callable[[Fit], FloatForm]
FLOAT_FORMS: dict[str, FloatBuilder] = {
    "line": _float_polynomial,
    "polynomial": _float_polynomial,
    "inverse": _fixed("return (float)($K / r + $V0);"),
    "inverse_offset": _fixed("return (float)($K / (r + $R0) + $V0);"),
    "power": _fixed("return (float)($A * pow(r, $B));"),
    "power_offset": _fixed("return (float)($A * pow(r + $R0, $B));"),
    "steinhart_hart": _fixed(
        "double lr = log(r);\nreturn (float)(1.0 / ($A + $B * lr + $C * lr * lr * lr) - 273.15);"
    ),
    "beta": _float_beta,
    "exp_rise": _float_exp_rise,
    "rational": _float_rational,
}
NO_FLOAT_FORM = {
    "callendar_van_dusen": "the value inverts R(t), by Newton's method below 0 degC",
    "table": "it is a table already (its knots are not at whole codes)",
}


# == the header ==================================================================================
@dataclass(frozen=True, slots=True)
class Firmware:
    """Everything a header states: the valid codes and the three forms (None where absent)."""

    code_min: int
    code_max: int
    float_form: FloatForm | None
    integer: HornerForm | ReciprocalForm | None
    lut: LookupTable


def firmware(
    fit: Fit,
    reading_min: int,
    reading_max: int,
    *,
    lut_max_error: float | None = None,
    lut_size: int | None = None,
) -> Firmware:
    """The forms of a header for codes ``reading_min .. reading_max`` (see ``c_header``)."""
    a, b = valid_codes(fit, reading_min, reading_max)
    builder = FLOAT_FORMS.get(fit.family)
    integer = integer_form(fit, reading_min, reading_max) if fit.family in INTEGER_FORMS else None
    lut = lookup_table(fit, reading_min, reading_max, max_error=lut_max_error, size=lut_size)
    return Firmware(a, b, None if builder is None else builder(fit), integer, lut)


_ASCII = {"°": "deg", "µ": "u", "μ": "u", "Ω": "ohm", "·": "*", "…": "...", "²": "^2", "³": "^3",
          "−": "-", "–": "-", "—": "-", "×": "x"}  # fmt: skip


def _ascii(text: object) -> str:
    """One line of plain ASCII, safe inside a C comment or string (no */, no ?? trigraphs)."""
    s = "".join(_ASCII.get(ch, ch) for ch in str(text))
    s = unicodedata.normalize("NFKD", s).encode("ascii", "replace").decode("ascii")
    s = re.sub(r"\s+", " ", s).strip()
    while "*/" in s or "/*" in s or "??" in s:
        s = s.replace("*/", "* /").replace("/*", "/ *").replace("??", "? ?")
    return s


def _c_string(text: object) -> str:
    return '"' + _ascii(text).replace("\\", "\\\\").replace('"', '\\"') + '"'


def _c_double(x: float) -> str:
    s = f"{x:.17g}"
    if not any(ch in s for ch in ".en"):
        s += ".0"
    return f"({s})" if s.startswith("-") else s


def _at_most(x: float, digits: int = 3) -> str:
    """``x`` rounded up to ``digits`` significant digits (so the text is never below ``x``)."""
    if x == 0:
        return "0"
    exact = Decimal(x)
    quantum = Decimal(1).scaleb(exact.adjusted() - digits + 1)
    return format(exact.quantize(quantum, rounding=ROUND_CEILING).normalize(), "f")


_NAME = re.compile(r"[A-Za-z][A-Za-z0-9_]*")


def c_header(
    fit: Fit,
    *,
    name: str,
    unit_serial: str,
    sensor_type: str,
    calibrated_on: date | str,
    reading_min: int,
    reading_max: int,
    value_unit: str,
    reading_unit: str,
    lut_max_error: float | None = None,
    lut_size: int | None = None,
) -> str:
    """A C99 header converting an ``int32_t`` reading code of this unit to its value.

    Parameters
    ----------
    name : C identifier prefix of the functions (``name_to_value_f``...); macros use it in
        upper case.
    unit_serial, sensor_type, calibrated_on, value_unit, reading_unit : for the header comment.
    reading_min, reading_max : the codes the converter can produce (int32); the functions accept
        any int32 and give the sentinel outside the valid range.
    lut_max_error, lut_size : how the lookup table is sized (see ``lookup_table``).
    """
    if not _NAME.fullmatch(name):
        raise BadInput(f"name must be a C identifier of letters, digits and _, not {name!r}")
    fw = firmware(fit, reading_min, reading_max, lut_max_error=lut_max_error, lut_size=lut_size)
    m = name.upper() + "_"
    vu, ru = _ascii(value_unit), _ascii(reading_unit)
    day = calibrated_on.isoformat() if isinstance(calibrated_on, date) else str(calibrated_on)
    family = get_family(fit.family)
    lo, hi = fit.valid_range
    stderr = fit.stderr
    sigma = (
        "estimated from the residuals"
        if fit.sigma_source == "residuals"
        else "from the stated uncertainties of the points"
    )
    doc = [
        f"{name}: calibration of unit {_ascii(unit_serial)} ({_ascii(sensor_type)})",
        f"Calibrated on {_ascii(day)}. Generated by sensorledger, engine {fit.engine_version} "
        f"(exported by {ENGINE_VERSION}).",
        "This tool does not replace accredited calibration: the constants below are a fit to "
        "the recorded points, nothing more.",
        "",
        f"Family: {fit.family}: {_ascii(family.formula)}",
        f"  r is the reading in {ru}; the value is in {vu}.",
        *([f"  options: {_ascii(json.dumps(dict(fit.options)))}"] if fit.options else []),
        "Constants (estimate, standard uncertainty; covariance "
        f"{sigma}, dof {fit.dof}, rse {fit.rse:.6g} {vu}):",
        *[f"  {p} = {v:.17g}  (u = {stderr[p]:.3g})" for p, v in fit.params.items()],
        f"Valid range: readings {lo:.9g} .. {hi:.9g} {ru}, i.e. codes {fw.code_min} .. "
        f"{fw.code_max} of {reading_min} .. {reading_max}.",
        f"Every function returns {m}OUT_OF_RANGE (INT32_MIN)"
        + ("; the float form NAN," if fw.float_form is not None else "")
        + " for a code outside the valid range, before any arithmetic.",
        "",
    ]
    if fw.float_form is not None:
        doc += [
            f"{name}_to_value_f: the formula in double arithmetic (constants printed with 17 "
            "significant digits, the engine's exact binary64 values), rounded to float at the "
            "end; chosen over float arithmetic, which loses digits to cancellation. Needs "
            "<math.h> (-lm); on an FPU without double support it is emulated.",
        ]
    else:
        doc += [
            f"No float form: {fit.family} is not a closed formula here "
            f"({NO_FLOAT_FORM.get(fit.family, 'no emitter')}); use the lookup table."
        ]
    if fw.integer is not None:
        form = fw.integer
        width = (
            "int32 arithmetic only"
            if form.int_bits == 32
            else "int64 arithmetic: int32 would err by more than "
            f"{INT32_ACCEPT:g} {vu} (the result is still int32)"
        )
        doc += [
            "",
            f"{name}_to_value_milli: the value in thousandths of {vu} (int32), {width}.",
            *form.describe(),
            f"Worst error over every valid code: {_at_most(form.max_error)} {vu} "
            f"({m}MILLI_MAX_ERROR), computed by running this algorithm over each code.",
            "Range of every intermediate over the valid codes (exact integer interval "
            f"arithmetic; int{form.int_bits} holds +-{2 ** (form.int_bits - 1) - 1}):",
            *[f"  {k}: {lo_} .. {hi_}" for k, (lo_, hi_) in form.bounds.items()],
        ]
    else:
        doc += [
            "",
            f"No separate integer form with scaled constants for {fit.family}: the lookup "
            "table below is its integer-only form.",
        ]
    lut = fw.lut
    goal = (
        f"the largest spacing meeting {_at_most(lut.target, 6)} {vu}"
        if lut.target is not None
        else f"the finest spacing within {lut_size} entries"
    )
    doc += [
        "",
        f"{name}_lut_milli: lookup table, the value in thousandths of {vu} (int32 arithmetic "
        f"only); {goal}.",
        *lut.describe(),
        "Nodes are the engine's values rounded to thousandths (the one past the last code lies "
        "on the line through the last node and the last code).",
        f"Worst error over every valid code: {_at_most(lut.max_error)} {vu} "
        f"({m}LUT_MAX_ERROR), computed by running this algorithm over each code.",
        "Range of every intermediate: "
        + ", ".join(f"{k} {lo_}..{hi_}" for k, (lo_, hi_) in lut.bounds.items())
        + ".",
    ]
    guard = f"SENSORLEDGER_{m}H"
    out = ["/*"]
    for line in doc:  # wrapped at 100 columns, continuation lines indented
        indent = " " * (len(line) - len(line.lstrip()) + 2)
        wrapped = textwrap.wrap(line, 96, subsequent_indent=indent, break_on_hyphens=False)
        out += [f" * {part}".rstrip() for part in wrapped or [""]]
    out += [
        " */",
        f"#ifndef {guard}",
        f"#define {guard}",
        "",
        "#include <stdint.h>",
    ]
    if fw.float_form is not None:
        out.append("#include <math.h>")
    out += [
        "",
        f"#define {m}UNIT_SERIAL {_c_string(unit_serial)}",
        f"#define {m}CALIBRATED_ON {_c_string(day)}",
        f"#define {m}ENGINE_VERSION {_c_string(fit.engine_version)}",
        f"#define {m}CODE_MIN {_c_int(fw.code_min, 32)} /* lowest valid code */",
        f"#define {m}CODE_MAX {_c_int(fw.code_max, 32)} /* highest valid code */",
        f"#define {m}OUT_OF_RANGE INT32_MIN /* integer forms, outside the valid range */",
        f"#define {m}VALUE_SCALE {VALUE_SCALE} /* integer forms: thousandths of {vu} */",
        f"#define {m}HAS_FLOAT_FORM {int(fw.float_form is not None)}",
        f"#define {m}HAS_INTEGER_FORM {int(fw.integer is not None)}",
    ]
    if fw.float_form is not None:
        out += [""]
        out += [
            f"#define {m}{suffix} {_c_double(value)}" for suffix, value in fw.float_form.constants
        ]
        out += [
            "",
            f"static inline float {name}_to_value_f(int32_t reading)",
            "{",
            "    double r;",
            f"    if (reading < {m}CODE_MIN || reading > {m}CODE_MAX) {{",
            "        return (float)NAN;",
            "    }",
            "    r = (double)reading;",
            *[
                f"    {line.replace('$', m)}"
                for stmt in fw.float_form.body
                for line in stmt.split("\n")
            ],
            "}",
        ]
    if fw.integer is not None:
        out += [""]
        out += [f"#define {m}{k} {v} /* {c} */" for k, v, c in fw.integer.macros()]
        out += [f"#define {m}MILLI_MAX_ERROR {_at_most(fw.integer.max_error)} /* {vu} */", ""]
        out += fw.integer.c_lines(f"{name}_to_value_milli", m)
    out += [
        "",
        f"#define {m}LUT_SIZE {len(lut.nodes)}",
        f"#define {m}LUT_SHIFT {lut.shift}",
        f"#define {m}LUT_MAX_ERROR {_at_most(lut.max_error)} /* {vu} */",
        "",
        *lut.c_lines(f"{name}_lut_milli", m),
        "",
        f"#endif /* {guard} */",
        "",
    ]
    return "\n".join(out)
