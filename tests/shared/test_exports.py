"""Exports: conversion tables (CSV, JSON), and firmware C headers compiled and run by gcc.

Every calibration here is synthetic (invented constants, fixed seeds). Each header is compiled
with gcc (C99, every warning an error, UBSan when the toolchain has it) together with
tests/shared/c_harness/harness.c, which prints every form at every code of the converter's span;
the output is compared with ``Fit.to_value`` code by code.
"""

from __future__ import annotations

import csv
import functools
import io
import json
import math
import re
import shutil
import subprocess
import sys
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from shared import BadInput, Fit, fit
from shared.exports import (
    FLOAT_FORMS,
    INT32_MAX,
    INT32_MIN,
    HornerForm,
    ReciprocalForm,
    c_header,
    conversion_table,
    firmware,
    integer_form,
    lookup_table,
    table_to_csv,
    table_to_json,
)
from tests.conftest import missing
from tests.shared.synthetic import DISTANCES_MM, rangefinder_counts, rangefinder_points

HARNESS = Path(__file__).parent / "c_harness" / "harness.c"
CFLAGS = ["-std=c99", "-Wall", "-Wextra", "-Werror", "-O2", "-pedantic-errors", "-Wshadow",
          "-Wconversion", "-Wsign-conversion", "-Wdouble-promotion"]  # fmt: skip
SANITIZE = ["-fsanitize=undefined", "-fno-sanitize-recover=all"]
FLOAT_RTOL = 1e-6
TIGHT = 0.8  # the measured worst error is at least this fraction of the stated one


# -- synthetic calibrations --------------------------------------------------------------------
def rangefinder() -> Fit:
    """IR rangefinder, 12-bit counts -> mm (tests/shared/synthetic.py), 0.5 mm noise."""
    rng = np.random.default_rng(7)
    counts, mm = rangefinder_points(rng, np.repeat(rangefinder_counts(DISTANCES_MM), 2), 0.5)
    return fit("inverse_offset", counts, mm)


def potentiometer() -> Fit:
    """Angle potentiometer, 12-bit counts -> deg: -135 + 270/4095 r, 0.05 deg noise."""
    rng = np.random.default_rng(11)
    r = np.linspace(150, 3950, 12).round()
    return fit("line", r, -135 + 270 / 4095 * r + rng.normal(0, 0.05, r.size))


def load_cell() -> Fit:
    """Load cell on a 16-bit ADC, code -> N, slightly quadratic, 0.05 N noise."""
    rng = np.random.default_rng(12)
    r = np.linspace(2000, 63000, 15).round()
    value = -12.5 + 0.0763 * r + 2.1e-8 * r**2 + rng.normal(0, 0.05, r.size)
    return fit("polynomial", r, value, degree=2)


SH_TRUTH = (1.129148e-3, 2.34125e-4, 8.76741e-8)  # a 10 kohm NTC, invented to look typical


def thermistor() -> Fit:
    """NTC thermistor, reading = resistance in whole ohms -> degC, 0.01 degC noise."""
    rng = np.random.default_rng(13)
    ohm = np.array([500, 700, 1000, 1500, 2500, 4000, 6500, 10000, 16000, 27000, 45000.0])
    a, b, c = SH_TRUTH
    t = 1 / (a + b * np.log(ohm) + c * np.log(ohm) ** 3) - 273.15
    return fit("steinhart_hart", ohm, t + rng.normal(0, 0.01, ohm.size))


def platinum() -> Fit:
    """Pt100, reading = resistance in milliohm -> degC (Callendar–Van Dusen, IEC-like)."""
    rng = np.random.default_rng(14)
    t = np.linspace(-50, 150, 11)
    a, b, c = 3.9083e-3, -5.775e-7, -4.183e-12
    r = 100_000 * (1 + a * t + b * t**2 + np.where(t < 0, c * (t - 100) * t**3, 0.0))
    return fit("callendar_van_dusen", r.round(), t + rng.normal(0, 0.01, t.size))


@dataclass(frozen=True)
class Case:
    make: Any
    span: tuple[int, int]
    value_unit: str
    reading_unit: str
    lut_max_error: float | None = None
    lut_size: int | None = None


CASES = {
    "inverse_offset": Case(rangefinder, (0, 4095), "mm", "counts", lut_max_error=0.2),
    "line": Case(potentiometer, (0, 4095), "deg", "counts"),
    "polynomial": Case(load_cell, (0, 65535), "N", "code"),
    "steinhart_hart": Case(thermistor, (0, 60000), "°C", "ohm", lut_max_error=0.005),
    "callendar_van_dusen": Case(platinum, (70_000, 170_000), "°C", "mΩ", lut_size=1024),
}


@functools.cache
def fitted(family: str) -> Fit:
    return CASES[family].make()  # type: ignore[no-any-return]


# -- compiling and running a header ------------------------------------------------------------
@functools.cache
def sanitizer_flags() -> tuple[str, ...]:
    """UBSan (signed overflow traps) when this gcc can link it; nothing otherwise."""
    probe = subprocess.run(
        ["gcc", *SANITIZE, "-x", "c", "-o", "/dev/null", "-"],
        input="int main(void) { return 0; }\n",
        capture_output=True,
        text=True,
    )
    return tuple(SANITIZE) if probe.returncode == 0 else ()


@dataclass(frozen=True)
class Run:
    fit: Fit
    case: Case
    header: str
    code: np.ndarray
    float_nan: np.ndarray
    value_f: np.ndarray
    milli: np.ndarray
    lut: np.ndarray


def compile_and_run(header: str, span: tuple[int, int], workdir: Path) -> np.ndarray:
    if shutil.which("gcc") is None:
        missing("gcc not found")
    (workdir / "calibration.h").write_text(header)
    exe = workdir / "harness"
    lo, hi = span
    command = ["gcc", *CFLAGS, *sanitizer_flags(), f"-DSPAN_MIN={lo}", f"-DSPAN_MAX={hi}",
               f"-I{workdir}", str(HARNESS), "-o", str(exe), "-lm"]  # fmt: skip
    build = subprocess.run(
        command,
        capture_output=True,
        text=True,
    )
    assert build.returncode == 0, build.stderr
    out = subprocess.run([str(exe)], capture_output=True, text=True, check=True, timeout=60)
    assert out.stderr == "", out.stderr  # UBSan reports here
    return np.loadtxt(io.StringIO(out.stdout), dtype=np.float64, ndmin=2)


def build_run(f: Fit, case: Case, workdir: Path) -> Run:
    """Header for ``f``, compiled with the harness and run over the span (+-3 codes)."""
    family = f.family
    header = c_header(
        f,
        name="cal",
        unit_serial=f"SN-{family.upper()}-0001 */ ??/",
        sensor_type=f"synthetic {family} (µ, °, Ω)",
        calibrated_on="2024-05-02",
        reading_min=case.span[0],
        reading_max=case.span[1],
        value_unit=case.value_unit,
        reading_unit=case.reading_unit,
        lut_max_error=case.lut_max_error,
        lut_size=case.lut_size,
    )
    span = (case.span[0] - 3, case.span[1] + 3)  # a few codes beyond the converter's span too
    data = compile_and_run(header, span, workdir)
    code, nan, value_f, milli, lut = data.T
    assert np.array_equal(code, np.arange(span[0], span[1] + 1))
    return Run(f, case, header, code.astype(np.int64), nan == 1, value_f, milli, lut)


@pytest.fixture(scope="module", params=sorted(CASES))
def run(request: pytest.FixtureRequest, tmp_path_factory: pytest.TempPathFactory) -> Run:
    family = request.param
    return build_run(fitted(family), CASES[family], tmp_path_factory.mktemp(family))


def stated(header: str, macro: str) -> float:
    found = re.search(rf"#define CAL_{macro} (\S+)", header)
    assert found, macro
    return float(found.group(1))


def prose(header: str) -> str:
    """The header comment as one line of text (it is wrapped at 100 columns)."""
    return re.sub(r"\s*\n \*\s*", " ", header)


def engine(r: Run) -> tuple[np.ndarray, np.ndarray]:
    """(in the valid range, engine value) at every code of the run."""
    return np.asarray(r.fit.in_range(r.code)), r.fit.to_value(r.code.astype(float))


# -- the compiled forms against the engine -----------------------------------------------------
def test_out_of_range_codes_give_the_sentinel(run: Run) -> None:
    inside, _ = engine(run)
    assert inside.any() and not inside.all()
    assert np.array_equal(run.lut != INT32_MIN, inside)
    if stated(run.header, "HAS_INTEGER_FORM"):
        assert np.array_equal(run.milli != INT32_MIN, inside)
    if stated(run.header, "HAS_FLOAT_FORM"):
        assert np.array_equal(~run.float_nan, inside)


def test_float_form_agrees_with_the_engine(run: Run) -> None:
    if run.fit.family not in FLOAT_FORMS:
        assert stated(run.header, "HAS_FLOAT_FORM") == 0
        assert "No float form" in prose(run.header)
        return
    inside, value = engine(run)
    got, want = run.value_f[inside], value[inside]
    scale = float(np.max(np.abs(want)))
    # relative, or 1e-6 of a thousandth of the full scale where the value crosses zero
    assert np.all(np.abs(got - want) <= FLOAT_RTOL * np.maximum(np.abs(want), 1e-3 * scale))


def test_integer_form_meets_its_stated_worst_error(run: Run) -> None:
    if run.fit.family not in ("line", "polynomial", "inverse", "inverse_offset"):
        assert stated(run.header, "HAS_INTEGER_FORM") == 0
        assert "lookup table below is its integer-only form" in prose(run.header)
        return
    inside, value = engine(run)
    worst = float(np.max(np.abs(run.milli[inside] / 1000 - value[inside])))
    claim = stated(run.header, "MILLI_MAX_ERROR")
    assert TIGHT * claim <= worst <= claim
    # and the C is the Python mirror the proof and the error were computed on, bit for bit
    form = integer_form(run.fit, *run.case.span)
    assert np.array_equal(run.milli[inside], form.evaluate(run.code[inside])[0])


def test_lookup_table_meets_its_stated_worst_error(run: Run) -> None:
    inside, value = engine(run)
    worst = float(np.max(np.abs(run.lut[inside] / 1000 - value[inside])))
    claim = stated(run.header, "LUT_MAX_ERROR")
    assert TIGHT * claim <= worst <= claim
    case = run.case
    if case.lut_max_error is not None:
        assert claim <= case.lut_max_error
    if case.lut_size is not None:
        assert stated(run.header, "LUT_SIZE") <= case.lut_size


def test_header_names_what_firmware_and_auditors_need(run: Run) -> None:
    h = prose(run.header)
    f = run.fit
    assert h.startswith("/*") and "#ifndef SENSORLEDGER_CAL_H" in h and h.rstrip().endswith("*/")
    assert "does not replace accredited calibration" in h
    assert f"SN-{f.family.upper()}-0001" in h and "2024-05-02" in h
    assert f"Family: {f.family}" in h and f"engine {f.engine_version}" in h
    for name, value in f.params.items():
        assert f"{name} = {value:.17g}  (u = {f.stderr[name]:.3g})" in h
    assert "Valid range" in h and "OUT_OF_RANGE" in h
    assert not re.search(r"malloc|calloc|free\(", h)
    assert h.isascii()
    if f.family in FLOAT_FORMS:
        assert "double arithmetic" in h
    # the width of the integer arithmetic is stated: int32 where it is exact enough
    if f.family in ("inverse_offset", "line"):
        assert "int32 arithmetic only" in h and "int64_t" not in h
    if f.family == "polynomial":
        assert "int64 arithmetic" in h and "int64_t" in h


# invented constants for the other float emitters: (params, valid range, options)
OTHER_FAMILIES: dict[str, tuple[dict[str, float], tuple[float, float], dict[str, Any]]] = {
    "inverse": ({"k": 5000.0, "v0": -3.0}, (100, 1000), {}),
    "power": ({"a": 2.5, "b": 0.7}, (1, 1023), {}),
    "power_offset": ({"a": 1e4, "r0": 20.0, "b": -1.2}, (0, 1023), {}),
    "beta": ({"R0": 10_000.0, "B": 3950.0}, (500, 40_000), {"t0_c": 25.0}),
    "exp_rise": ({"a": 100.0, "b": 0.003, "c": -2.0}, (0, 2000), {"offset": True}),
    "rational": ({"p0": 1.0, "p1": 0.5, "q1": 0.001}, (0, 2000), {"degree": [1, 1]}),
}


@pytest.mark.parametrize("family", sorted(OTHER_FAMILIES))
def test_every_float_emitter_compiles_and_agrees(family: str, tmp_path: Path) -> None:
    params, valid, options = OTHER_FAMILIES[family]
    f = synthetic_fit(family, params, valid, options)
    case = Case(None, (int(valid[0]) - 5, int(valid[1]) + 5), "unit", "code")
    r = build_run(f, case, tmp_path)
    test_out_of_range_codes_give_the_sentinel(r)
    test_float_form_agrees_with_the_engine(r)
    test_integer_form_meets_its_stated_worst_error(r)
    test_lookup_table_meets_its_stated_worst_error(r)
    assert set(OTHER_FAMILIES) | set(CASES) >= set(FLOAT_FORMS)


# -- the generator in Python -------------------------------------------------------------------
def test_lookup_table_is_the_largest_spacing_that_meets_the_target() -> None:
    f = fitted("steinhart_hart")
    table = lookup_table(f, 0, 60000, max_error=0.005)
    assert table.max_error <= 0.005
    coarser = lookup_table(f, 0, 60000, size=len(table.nodes) - 1)
    assert coarser.shift == table.shift + 1
    assert coarser.max_error > 0.005


def test_default_lookup_table_target_is_a_tenth_of_the_rse() -> None:
    f = fitted("inverse_offset")
    table = lookup_table(f, 0, 4095)
    assert table.target == pytest.approx(f.rse / 10)
    assert table.target is not None and table.max_error <= table.target
    # the hyperbola is steep near its pole: a tenth of the noise needs every code here
    assert table.shift == 0


def test_header_generation_refuses_what_it_cannot_honour() -> None:
    f = fitted("line")
    with pytest.raises(BadInput, match="C identifier"):
        c_header(f, name="2bad", unit_serial="x", sensor_type="x", calibrated_on="x",
                 reading_min=0, reading_max=4095, value_unit="deg",
                 reading_unit="counts")  # fmt: skip
    with pytest.raises(BadInput, match="no code"):
        firmware(f, 5000, 6000)
    with pytest.raises(BadInput, match="not both"):
        lookup_table(f, 0, 4095, max_error=0.01, size=10)
    with pytest.raises(BadInput, match="no lookup table"):
        lookup_table(fitted("steinhart_hart"), 0, 60000, max_error=1e-5)
    with pytest.raises(BadInput, match="integer-only form"):
        integer_form(fitted("steinhart_hart"), 0, 60000)


def test_exports_stay_pure() -> None:
    """shared.exports pulls in nothing of the web stack (a clean interpreter says so)."""
    probe = (
        "import sys, shared.exports; "
        "print(sorted({m.split('.')[0] for m in sys.modules} & "
        "{'fastapi', 'sqlalchemy', 'jinja2', 'plotly', 'starlette'}))"
    )
    root = Path(__file__).resolve().parents[2]
    out = subprocess.run(
        [sys.executable, "-c", probe], cwd=root, capture_output=True, text=True, check=True
    )
    assert out.stdout.strip() == "[]"


# -- conversion tables -------------------------------------------------------------------------
def test_table_rows_agree_with_the_engine_and_mark_out_of_range() -> None:
    f = fitted("inverse_offset")
    table = conversion_table(f, 0, 4095)
    assert np.array_equal(table.reading, np.arange(4096.0))
    assert np.array_equal(table.value, f.to_value(table.reading), equal_nan=True)
    assert np.array_equal(table.in_range, f.in_range(table.reading))
    inside = table.in_range
    assert inside.sum() == 535 - 159 + 1
    assert np.all(np.isnan(table.value[~inside]) & np.isnan(table.expanded[~inside]))
    interval = f.value_interval(table.reading[inside], level=None)
    assert table.k == 2.0 and table.level is None
    np.testing.assert_allclose(table.expanded[inside], 2.0 * interval.u, rtol=1e-12)


def test_table_at_a_coverage_level_uses_student_t() -> None:
    f = fitted("line")
    table = conversion_table(f, 100, 200, 0.5, level=0.95)
    assert table.reading.size == 201 and table.reading[1] == 100.5
    assert table.k == pytest.approx(stats.t.ppf(0.975, f.dof))
    interval = f.value_interval(table.reading[table.in_range], level=0.95)
    np.testing.assert_allclose(table.expanded[table.in_range], interval.upper - interval.value)


def test_table_csv_names_units_and_leaves_out_of_range_values_empty() -> None:
    f = fitted("inverse_offset")
    table = conversion_table(f, 150, 540)
    rows = list(csv.reader(io.StringIO(table_to_csv(table, "mm", "counts"))))
    assert rows[0] == [
        "reading [counts]",
        "value [mm]",
        "expanded uncertainty [mm] (k = 2)",
        "status",
    ]
    assert len(rows) == 1 + table.reading.size
    for row, r, v, big_u, ok in zip(
        rows[1:], table.reading, table.value, table.expanded, table.in_range, strict=True
    ):
        assert float(row[0]) == r
        if ok:
            assert (float(row[1]), float(row[2]), row[3]) == (v, big_u, "in range")
        else:
            assert row[1:] == ["", "", "out of range"]


def test_table_json_is_plain_json_without_nan() -> None:
    f = fitted("inverse_offset")
    table = conversion_table(f, 150, 540, level=0.9)

    def no_constants(name: str) -> None:
        raise AssertionError(f"{name} in JSON")

    doc = json.loads(table_to_json(table, "mm", "counts"), parse_constant=no_constants)
    assert doc["value_unit"] == "mm" and doc["reading_unit"] == "counts"
    assert doc["coverage"] == {"k": table.k, "level": 0.9}
    assert doc["family"] == "inverse_offset" and doc["valid_range"] == list(f.valid_range)
    assert len(doc["rows"]) == table.reading.size
    for row, v, ok in zip(doc["rows"], table.value, table.in_range, strict=True):
        assert row["in_range"] is bool(ok)
        assert (row["value"] == v) if ok else (row["value"] is None)
        assert (row["expanded_uncertainty"] is None) is (not ok)


def test_table_rejects_bad_rows() -> None:
    f = fitted("line")
    for args in [(0, 10, 0), (0, 10, -1), (10, 0, 1), (0, math.inf, 1), (0, 1e9, 1e-3)]:
        with pytest.raises(BadInput):
            conversion_table(f, *args)
    with pytest.raises(BadInput, match="level"):
        conversion_table(f, 0, 10, level=1.5)


# -- the int32 proof against brute force -------------------------------------------------------
def synthetic_fit(
    family: str,
    params: dict[str, float],
    valid: tuple[float, float],
    options: dict[str, Any] | None = None,
) -> Fit:
    """A Fit with given constants (for the generator; nothing else is read)."""
    n = len(params)
    zeros = np.zeros(2)
    if options is None:
        options = {"degree": 1, "through_zero": False} if family == "line" else {}
    return Fit(
        family=family,
        options=options,
        params=params,
        covariance=np.zeros((n, n)),
        dof=1,
        rse=1.0,
        scale=1.0,
        sigma_source="residuals",
        noise="value",
        noise_value_sd=1.0,
        noise_reading_sd=0.0,
        reading=np.array(valid),
        value=zeros,
        used=np.ones(2, dtype=bool),
        weights=np.ones(2),
        residuals=zeros,
        excluded=(),
        valid_range=valid,
        monotone=True,
    )


def c_div(n: int, d: int) -> int:
    """C99 integer division: truncates toward zero."""
    q = abs(n) // abs(d)
    return q if (n >= 0) == (d > 0) else -q


def c_rem(n: int, d: int) -> int:
    return n - d * c_div(n, d)


def brute_force(form: HornerForm | ReciprocalForm, code: int) -> tuple[int, list[int]]:
    """The C function in plain Python ints, one code: its result and every value it computes."""
    seen: list[int] = []

    def note(x: int) -> int:
        seen.append(x)
        return x

    if isinstance(form, ReciprocalForm):
        d = note(form.centre - code if form.flip else code - form.centre)
        den = note(note(d * form.den_scale) + form.den_offset)
        rem = q = 0
        for digit in form.digits:
            acc = note(note(rem * form.base) + digit)
            q = note(note(q * form.base) + c_div(acc, den))
            rem = note(c_rem(acc, den))
        total = note(form.v0_scaled + form.sign * q)
    else:
        d = note(code - form.centre)
        total = form.coefs[0]
        for coef, g in zip(form.coefs[1:], form.shifts, strict=True):
            total = note(coef + c_div(note(total * d), 2**g))
    half, one = (2 ** (form.frac_bits - 1), 2**form.frac_bits) if form.frac_bits else (0, 1)
    rounded = note(total + half if total >= 0 else total - half)
    return note(c_div(rounded, one)), seen


def check_proof(form: HornerForm | ReciprocalForm, f: Fit) -> None:
    limit = 2 ** (form.int_bits - 1) - 1
    proven = max(max(abs(lo), abs(hi)) for lo, hi in form.bounds.values())
    assert proven <= limit  # the generator's proof
    codes = range(form.code_min, form.code_max + 1)
    mirror, _ = form.evaluate(np.arange(form.code_min, form.code_max + 1, dtype=np.int64))
    worst_seen = 0
    for code, mirrored in zip(codes, mirror.tolist(), strict=True):
        y, seen = brute_force(form, code)
        worst_seen = max(worst_seen, *map(abs, seen))
        assert y == mirrored and abs(y) <= INT32_MAX
    assert worst_seen <= proven  # brute force never exceeds what was proven
    errors = np.abs(mirror / 1000 - f.to_value(np.arange(form.code_min, form.code_max + 1.0)))
    assert float(errors.max()) == form.max_error


def check_widths(f: Fit, low: int, high: int) -> None:
    """The int32 form (when one exists) and the chosen one: proofs hold, the choice is justified."""
    int32: HornerForm | ReciprocalForm | None
    try:
        int32 = integer_form(f, low, high, bits=32)
    except BadInput:
        int32 = None
    else:
        assert int32.int_bits == 32
        check_proof(int32, f)
    chosen = integer_form(f, low, high)
    if chosen.int_bits == 64:
        check_proof(chosen, f)
        assert int32 is None or int32.max_error > 1e-3  # int64 only where int32 is not enough
    else:
        assert chosen == int32
    assert chosen.max_error <= 1e-3  # a thousandth of the value unit, in either width


@settings(max_examples=40, deadline=None)
@given(
    low=st.integers(-100_000, 100_000),
    span=st.integers(0, 1500),
    gap=st.floats(0.3, 5000),
    pole_below=st.booleans(),
    peak=st.floats(1e-3, 2e5),
    negative_k=st.booleans(),
    v0=st.floats(-1e5, 1e5),
)
def test_reciprocal_form_proof_agrees_with_brute_force(
    low: int, span: int, gap: float, pole_below: bool, peak: float, negative_k: bool, v0: float
) -> None:
    high = low + span
    r0 = -(low - gap) if pole_below else -(high + gap)
    k = (-1 if negative_k else 1) * peak * gap  # |k / (r + r0)| peaks at `peak` value units
    f = synthetic_fit("inverse_offset", {"k": k, "r0": r0, "v0": v0}, (low, high))
    check_widths(f, low, high)


@settings(max_examples=40, deadline=None)
@given(
    low=st.integers(-(2**24), 2**24),
    span=st.integers(0, 4000),
    c0=st.floats(-1e5, 1e5),
    c1=st.floats(-100, 100).filter(lambda x: abs(x) > 1e-9),
)
def test_line_form_proof_agrees_with_brute_force(low: int, span: int, c0: float, c1: float) -> None:
    high = low + span
    f = synthetic_fit("line", {"c0": c0 - c1 * low, "c1": c1}, (low, high))
    check_widths(f, low, high)
