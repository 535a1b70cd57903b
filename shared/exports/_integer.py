"""C integer semantics, exact interval arithmetic, and the valid codes with the engine's values
there: what the integer forms and the lookup table are checked with."""

from __future__ import annotations

import math
from collections.abc import Callable, Iterator, Mapping

import numpy as np

from shared.errors import BadInput
from shared.exports._common import (
    CACHE_CODES,
    CHUNK,
    INT32_MAX,
    INT32_MIN,
    MAX_CODES,
    VALUE_SCALE,
    Array,
    Bounds,
    Ints,
)
from shared.fitting import Fit


# == C integer semantics and interval arithmetic =================================================
def c_div(n: Ints, d: int) -> Ints:
    """C99 ``n / d`` for a positive constant ``d``: the quotient truncated toward zero."""
    out: Ints = np.where(n >= 0, n // d, -((-n) // d))
    return out


def round_add(n: Ints, half: int) -> Ints:
    """``n >= 0 ? n + half : n - half``: the numerator of a division rounded half away from 0."""
    out: Ints = np.where(n >= 0, n + half, n - half)
    return out


def cdiv_int(n: int, d: int) -> int:
    return n // d if n >= 0 else -((-n) // d)


def mul_b(a: Bounds, b: Bounds) -> Bounds:
    corners = [a[0] * b[0], a[0] * b[1], a[1] * b[0], a[1] * b[1]]
    return min(corners), max(corners)


def add_b(a: Bounds, b: Bounds) -> Bounds:
    return a[0] + b[0], a[1] + b[1]


def div_b(a: Bounds, d: int) -> Bounds:
    return cdiv_int(a[0], d), cdiv_int(a[1], d)  # truncation is monotone


def round_add_b(a: Bounds, half: int) -> Bounds:
    lo = a[0] + half if a[0] >= 0 else a[0] - half
    hi = a[1] + half if a[1] >= 0 else a[1] - half
    return lo, hi


def c_output(x: Ints, frac_bits: int, parts: dict[str, Ints]) -> Ints:
    """Drop the fraction bits, rounding half away from zero as the C does; record the steps."""
    if frac_bits:
        rounded = round_add(x, 2 ** (frac_bits - 1))
        parts["rounded"] = rounded
        x = c_div(rounded, 2**frac_bits)
    parts["y"] = x
    return x


def c_output_bounds(x: Bounds, frac_bits: int, bounds: dict[str, Bounds]) -> dict[str, Bounds]:
    """``c_output`` on value bounds, for the int32 proof."""
    if frac_bits:
        rounded = round_add_b(x, 2 ** (frac_bits - 1))
        bounds["rounded"] = rounded
        x = div_b(rounded, 2**frac_bits)
    bounds["y"] = x
    return bounds


def fits_int(bounds: Mapping[str, Bounds], limit: int) -> bool:
    return all(-limit <= lo and hi <= limit for lo, hi in bounds.values())


def c_int(x: int, bits: int) -> str:
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


class Reference:
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


def worst_error(mirror: Mirror, ref: Reference) -> float:
    """max |y / VALUE_SCALE - engine| over every valid code (value units)."""
    worst = 0.0
    for codes, values in ref.chunks():
        y, _ = mirror(codes)
        worst = max(worst, float(np.max(np.abs(y / VALUE_SCALE - values))))
    return worst


def observed(mirror: Mirror, codes: Ints) -> dict[str, Bounds]:
    """The range each intermediate actually takes over ``codes`` (a brute-force check)."""
    _, parts = mirror(codes)
    return {k: (int(np.min(v)), int(np.max(v))) for k, v in parts.items()}
