"""The lookup-table form: int32 breakpoints with linear interpolation (every family)."""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace
from itertools import pairwise

import numpy as np

from shared.errors import BadInput
from shared.exports._common import (
    INT32_MAX,
    LUT_DEFAULT_FLOOR,
    MAX_LUT_ENTRIES,
    VALUE_SCALE,
    Bounds,
    Ints,
)
from shared.exports._integer import (
    Reference,
    add_b,
    c_div,
    c_int,
    div_b,
    fits_int,
    mul_b,
    round_add,
    round_add_b,
    valid_codes,
    worst_error,
)
from shared.fitting import Fit


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
        rounded = round_add(prod, 2 ** (self.shift - 1))
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
            f"    frac = offset & {c_int(one - 1, 32)};",
            "    prod = (table[index + 1] - table[index]) * frac;",
            f"    return table[index] + (prod >= 0 ? prod + {c_int(half, 32)} "
            f": prod - {c_int(half, 32)}) / {c_int(one, 32)};",
            "}",
        ]
        return lines

    def describe(self) -> list[str]:
        return [
            f"{len(self.nodes)} entries, one every 2^{self.shift} = {2**self.shift} codes from "
            f"code {self.code_min}; int32 interpolation, rounded half away from zero."
        ]


def _lut_nodes(ref: Reference, shift: int) -> list[int]:
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
    bounds["prod"] = mul_b(bounds["diff"], bounds["frac"])
    bounds["rounded"] = round_add_b(bounds["prod"], 2 ** (shift - 1))
    bounds["y"] = add_b(bounds["node"], div_b(bounds["rounded"], 2**shift))
    return bounds


def _lut_at(ref: Reference, shift: int, target: float | None) -> LookupTable | None:
    """The table at this spacing if its every intermediate provably fits int32, else None."""
    nodes = _lut_nodes(ref, shift)
    bounds = _lut_bounds(nodes, shift, ref.a, ref.b)
    if not fits_int(bounds, INT32_MAX):
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
    ref = Reference(fit, a, b)
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
        return replace(table, max_error=worst_error(table.evaluate, ref))
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
        worst = worst_error(table.evaluate, ref)
        if worst <= target:
            return replace(table, max_error=worst)
        best = min(best, worst)
    raise BadInput(
        f"no lookup table of at most {MAX_LUT_ENTRIES} entries errs by <= {target:.6g} "
        f"(the closest errs by {best:.6g}; thousandths of the value unit limit it to about "
        f"{1 / VALUE_SCALE:g})"
    )
