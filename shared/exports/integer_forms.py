"""The integer forms: fixed-point Horner (line, polynomial) and the reciprocal by long
division (inverse, inverse_offset); see the package docstring."""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, replace
from fractions import Fraction

import numpy as np

from shared.errors import BadInput
from shared.exports._common import (
    DEN_ERROR_MILLI,
    INT32_ACCEPT,
    INT32_MAX,
    MAX_FRAC_BITS,
    VALUE_SCALE,
    Bounds,
    Ints,
)
from shared.exports._integer import (
    Reference,
    add_b,
    c_div,
    c_int,
    c_output,
    c_output_bounds,
    div_b,
    fits_int,
    mul_b,
    observed,
    valid_codes,
    worst_error,
)
from shared.fitting import Fit


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
        return c_output(acc, self.frac_bits, parts), parts

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
            div = f" / {c_int(2**g, self.int_bits)}" if g else ""
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
        out = [("MILLI_CENTRE", c_int(self.centre, 32), "d = reading - centre")]
        for i, coef in enumerate(self.coefs):
            k = n - i
            f = self.frac_bits + sum(self.shifts[i:])
            out.append(
                (f"MILLI_B{k}", c_int(coef, self.int_bits), f"d^{k} coefficient x 1000 x 2^{f}")
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
        ("MILLI_ONE", c_int(2**frac_bits, bits), f"2^{frac_bits}: one thousandth"),
        ("MILLI_HALF", c_int(2 ** (frac_bits - 1), bits), "half of it, for rounding"),
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
        prod = mul_b(acc, d)
        bounds[f"prod{k}"] = prod
        acc = add_b((coef, coef), div_b(prod, 2**g) if g else prod)
        bounds[f"acc{k}"] = acc
    return c_output_bounds(acc, frac_bits, bounds)


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
        if fits_int(bounds, limit) and y[0] >= -INT32_MAX and y[1] <= INT32_MAX:
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
        return c_output(total, self.frac_bits, parts), parts

    def c_lines(self, fn: str, macro: str) -> list[str]:
        t = f"int{self.int_bits}_t"
        reading = "reading" if self.int_bits == 32 else "(int64_t)reading"
        d = (
            f"({macro}MILLI_CENTRE - {reading})"
            if self.flip
            else f"({reading} - {macro}MILLI_CENTRE)"
        )
        digits = [c_int(x, self.int_bits) for x in self.digits]
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
            ("MILLI_CENTRE", c_int(self.centre, 32), "d = reading - centre"),
            ("MILLI_DEN_SCALE", c_int(self.den_scale, self.int_bits), "denominator scale"),
            ("MILLI_DEN_OFFSET", c_int(self.den_offset, self.int_bits), "denominator offset"),
            ("MILLI_BASE", c_int(self.base, self.int_bits), "digit base of the numerator"),
            ("MILLI_DIGITS", str(len(self.digits)), "digits of the numerator"),
            (
                "MILLI_V0",
                c_int(self.v0_scaled, self.int_bits),
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
    d_scaled = mul_b(d, (form.den_scale, form.den_scale))
    den = add_b(d_scaled, (form.den_offset, form.den_offset))
    numerator = 0
    for digit in form.digits:
        numerator = numerator * form.base + digit
    acc = (0, den[1] * form.base - 1) if den[0] >= 1 else (0, 2**130)
    q_max = numerator // den[0] if den[0] >= 1 else 2**130
    q = (0, q_max)
    total = add_b((form.v0_scaled, form.v0_scaled), mul_b((form.sign, form.sign), q))
    bounds = {"d": d, "d_scaled": d_scaled, "den": den, "acc": acc, "q": q, "total": total}
    return c_output_bounds(total, form.frac_bits, bounds)


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
        if fits_int(bounds, limit) and y[0] >= -INT32_MAX and y[1] <= INT32_MAX:
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
    ref = Reference(fit, a, b)
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


def _checked(form: HornerForm | ReciprocalForm, ref: Reference) -> HornerForm | ReciprocalForm:
    """Confirm the proof at the ends of the range, and state the exhaustive worst error."""
    ends = np.array([form.code_min, form.code_max], dtype=np.int64)
    for name, (lo, hi) in observed(form.evaluate, ends).items():
        b_lo, b_hi = form.bounds[name]
        if not b_lo <= lo <= hi <= b_hi:  # pragma: no cover - a bug in a proof
            raise AssertionError(f"integer form: {name} leaves its proven range")
    return replace(form, max_error=worst_error(form.evaluate, ref))
