"""Shared machinery of the families that are polynomials in the reading (line, polynomial).

The public parameters are the raw monomial coefficients c0..cd (firmware needs them), but raw
monomials are a poor basis to solve in: for a degree 10 curve on readings far from zero (NIST StRD
Filip, readings -9..-3) the raw Vandermonde matrix has a condition number of ~1e15 (its normal
equations ~1e30). So:

1. **Solve in a well-conditioned basis.** Least squares by QR on Chebyshev polynomials T_k(x) of
   the centred, scaled reading x = (r - c) / h, which lies in [-1, 1] (condition number ~3 for
   Filip). A curve through zero uses (r / s) T_{k-1}(x) instead, s = max |r|: the same span
   r, r^2, ..., r^d, with no constant. The coefficients and their covariance are mapped to raw
   monomials by a linear map built from integer Chebyshev and binomial coefficients.
2. **Refine in raw coefficients.** Rounding in that map (its terms cancel heavily far from r = 0)
   costs digits in the raw coefficients, so they are refined (corrected semi-normal equations):
   the residuals v - p(r) and the raw normal-equation gradient V^T W (v - p(r)) are computed in
   double-double arithmetic (error-free transformations, no extended floats), and the correction
   is solved through the well-conditioned basis of step 1. The iteration converges to the exact
   least-squares solution of the given doubles, rounded to doubles (within an ulp or so of each
   coefficient; Filip's raw basis is so ill-conditioned that it settles to ~1e-14 relative).
3. **Evaluate accurately.** p(r) is evaluated from the raw coefficients by compensated Horner
   (Graillat, Langlois & Louvet, 2005): as accurate as Horner in twice the working precision, then
   rounded. Residuals of a degree 10 fit keep their digits where the terms c_k r^k cancel by seven
   orders of magnitude (Filip: terms up to 5e6, values ~0.9; plain Horner errs by ~4e-10 there),
   and evaluation needs nothing but the parameters.
"""

from __future__ import annotations

from functools import cache
from math import comb
from typing import Any

import numpy as np

from shared.families.base import Array, Options, Solution, weighted_lstsq

REFINE_STEPS = 4  # refinement converges in one or two steps; the rest is a safety margin
_EPS = float(np.finfo(np.float64).eps)
_SPLITTER = 134217729.0  # 2**27 + 1, Veltkamp's splitting constant for binary64


# -- error-free transformations (Dekker / Knuth), elementwise --------------------------------------
def _two_sum(a: Array, b: Array) -> tuple[Array, Array]:
    """s + e == a + b exactly, s = fl(a + b)."""
    s = a + b
    bb = s - a
    return s, (a - (s - bb)) + (b - bb)


def _fast_two_sum(a: Array, b: Array) -> tuple[Array, Array]:
    """Renormalise a + b when |a| >= |b| (or a == 0)."""
    s = a + b
    return s, b - (s - a)


def _split(a: Array) -> tuple[Array, Array]:
    """a = hi + lo exactly, each half with at most 26 significant bits (Veltkamp)."""
    c = _SPLITTER * a
    hi = c - (c - a)
    return hi, a - hi


def _two_prod(a: Array, b: Array, b_split: tuple[Array, Array]) -> tuple[Array, Array]:
    """p + e == a * b exactly, p = fl(a * b) (no fused multiply-add needed)."""
    p = a * b
    ah, al = _split(a)
    bh, bl = b_split
    return p, ((ah * bh - p) + ah * bl + al * bh) + al * bl


def _dd_times(ah: Array, al: Array, bh: Array, bl: Array) -> tuple[Array, Array]:
    """Double-double product (ah + al)(bh + bl), relative error ~ 1e-32."""
    p, e = _two_prod(ah, bh, _split(bh))
    return _fast_two_sum(p, e + (ah * bl + al * bh))


def _accurate_sum(hi: Array, lo: Array) -> tuple[Array, Array]:
    """Column sums of hi + lo (shape (n, k)) as double-doubles, error ~ 1e-32 * sum |terms|.

    Pairwise error-free summation of ``hi``; the rounding errors and ``lo`` are summed plainly,
    being ~1e-16 of the terms already.
    """
    err = lo.sum(axis=0)
    while hi.shape[0] > 1:
        if hi.shape[0] % 2:
            hi = np.vstack([hi, np.zeros((1, hi.shape[1]))])
        hi, e = _two_sum(hi[0::2], hi[1::2])
        err = err + e.sum(axis=0)
    return _two_sum(hi[0], err)


def horner_compensated(
    coef: Array, reading: Array, reading_split: tuple[Array, Array] | None = None
) -> tuple[Array, Array]:
    """Compensated Horner: p(r) = value + correction to about twice the working precision.

    ``coef`` are monomial coefficients, lowest power first.
    """
    r_split = _split(reading) if reading_split is None else reading_split
    value = np.full_like(reading, coef[-1])
    correction = np.zeros_like(reading)
    for a in coef[-2::-1].tolist():
        p, e_prod = _two_prod(value, reading, r_split)
        value = p + a  # two-sum of p and the scalar a, inlined
        bb = value - p
        correction = correction * reading + (e_prod + ((p - (value - bb)) + (a - bb)))
    return value, correction


def polyval_accurate(coef: Array, reading: Array) -> Array:
    """The polynomial at ``reading`` by compensated Horner (plain Horner where that overflows)."""
    with np.errstate(over="ignore", invalid="ignore"):
        value, correction = horner_compensated(coef, reading)
        out = value + correction
    if not np.all(np.isfinite(out)):
        plain = np.polynomial.polynomial.polyval(reading, coef)
        out = np.where(np.isfinite(out), out, plain)
    return np.asarray(out, dtype=np.float64)


def _power_terms(
    reading: Array,
    reading_split: tuple[Array, Array],
    wr_hi: Array,
    wr_lo: Array,
    powers: list[int],
) -> tuple[Array, Array]:
    """r_i^k w_i (v_i - p(r_i)) for each k in ``powers`` (last axis), as double-doubles: the
    terms of ``_raw_gradient``'s sums. Any leading axes (one unit, or units x points)."""
    # columns r^k in double-double, built up by exact products with r
    pow_hi, pow_lo = [np.ones_like(reading)], [np.zeros_like(reading)]
    for _ in range(max(powers)):
        p, e = _two_prod(pow_hi[-1], reading, reading_split)
        hi, lo = _fast_two_sum(p, e + pow_lo[-1] * reading)
        pow_hi.append(hi)
        pow_lo.append(lo)
    return _dd_times(
        np.stack([pow_hi[k] for k in powers], axis=-1),
        np.stack([pow_lo[k] for k in powers], axis=-1),
        wr_hi[..., None],
        wr_lo[..., None],
    )


def _raw_gradient(
    reading: Array,
    reading_split: tuple[Array, Array],
    weight: Array,
    resid_hi: Array,
    resid_lo: Array,
    powers: list[int],
) -> tuple[Array, Array]:
    """sum_i w_i r_i^k (v_i - p(r_i)) for each k in ``powers``, as double-doubles."""
    wr_p, wr_e = _two_prod(resid_hi, weight, _split(weight))
    wr_hi, wr_lo = _fast_two_sum(wr_p, wr_e + resid_lo * weight)
    return _accurate_sum(*_power_terms(reading, reading_split, wr_hi, wr_lo, powers))


# -- the well-conditioned basis --------------------------------------------------------------------
@cache
def _chebyshev_monomials(degree: int) -> Array:
    """Integer matrix C: column k holds the monomial coefficients of T_k(x) (exact in binary64)."""
    out = np.zeros((degree + 1, degree + 1))
    out[0, 0] = 1.0
    if degree >= 1:
        out[1, 1] = 1.0
    for k in range(2, degree + 1):  # T_k = 2 x T_{k-1} - T_{k-2}
        out[1:, k] = 2.0 * out[:-1, k - 1]
        out[:, k] -= out[:, k - 2]
    out.setflags(write=False)
    return out


@cache
def _binomials(degree: int) -> tuple[Array, Array]:
    """comb(k, j) at row j, column k (0 for j > k), and the exponents max(k - j, 0)."""
    ks = range(degree + 1)
    binom = np.array([[comb(k, j) for k in ks] for j in ks], dtype=np.float64)
    expo = np.clip(np.subtract.outer(ks, ks).T, 0, None)
    binom.setflags(write=False)
    expo.setflags(write=False)
    return binom, expo


def centre_and_scale(reading: Array) -> tuple[float, float]:
    """Centre c and half-width h that map the readings onto [-1, 1]."""
    lo, hi = float(reading.min()), float(reading.max())
    return (lo + hi) / 2.0, ((hi - lo) / 2.0) or 1.0


def chebyshev_to_raw(degree: int, centre: float, half: float) -> Array:
    """Matrix M, (degree+1) x (degree+1): raw monomial coefficients of T_k((r - c) / h) in column k.

    M = B C, C the integer monomial coefficients of T_k(x), B[j, k] = comb(k, j) (-c)^(k-j) / h^k
    the binomial expansion of ((r - c) / h)^k.
    """
    binom, expo = _binomials(degree)
    scaled = binom * (-centre) ** expo / half ** np.arange(degree + 1)
    out: Array = scaled @ _chebyshev_monomials(degree)
    return out


class MonomialFamily:
    """value = c0 + c1 r + ... + cd r^d (c0 absent when through_zero)."""

    foldback = False

    def __init__(self, name: str, formula: str, typical: str, options: dict[str, Any]) -> None:
        self.name = name
        self.formula = formula
        self.typical = typical
        self.options = options

    def degree(self, options: Options) -> int:
        return int(options.get("degree", 1))

    def powers(self, options: Options) -> list[int]:
        start = 1 if options.get("through_zero", False) else 0
        return list(range(start, self.degree(options) + 1))

    def param_names(self, options: Options) -> tuple[str, ...]:
        return tuple(f"c{k}" for k in self.powers(options))

    def _raw(self, params: Array, options: Options) -> Array:
        coef = np.zeros(self.degree(options) + 1)
        coef[self.powers(options)] = params
        return coef

    def evaluate(self, params: Array, reading: Array, options: Options) -> Array:
        r = np.asarray(reading, dtype=np.float64)
        return polyval_accurate(self._raw(params, options), r)

    def jacobian(self, params: Array, reading: Array, options: Options) -> Array:
        return np.stack([reading**k for k in self.powers(options)], axis=-1)

    def slope(self, params: Array, reading: Array, options: Options) -> Array:
        """d value / d reading = c1 + 2 c2 r + ... + d cd r^(d-1)."""
        coef = np.polynomial.polynomial.polyder(self._raw(params, options))
        return polyval_accurate(np.asarray(coef, dtype=np.float64), np.asarray(reading, np.float64))

    def slope_jacobian(self, params: Array, reading: Array, options: Options) -> Array:
        """d slope / d params: k r^(k-1) for c_k."""
        r = np.asarray(reading, dtype=np.float64)
        return np.stack(
            [k * r ** (k - 1) if k else np.zeros_like(r) for k in self.powers(options)], axis=-1
        )

    def basis(self, reading: Array, options: Options) -> tuple[Array, Array]:
        """The design matrix in the well-conditioned basis, and M with raw params = M @ coef."""
        degree = self.degree(options)
        centre, half = centre_and_scale(reading)
        x = (reading - centre) / half
        design: Array
        if not options.get("through_zero", False):
            design = np.asarray(np.polynomial.chebyshev.chebvander(x, degree), dtype=np.float64)
            return design, chebyshev_to_raw(degree, centre, half)
        # (r / s) T_{k-1}(x), k = 1..d: raw coefficients shift up one power and divide by s
        s = float(np.abs(reading).max())
        design = (reading / s)[:, None] * np.polynomial.chebyshev.chebvander(x, degree - 1)
        return design, chebyshev_to_raw(degree - 1, centre, half) / s

    def solve(self, reading: Array, value: Array, weight: Array, options: Options) -> Solution:
        powers = self.powers(options)
        design, to_raw = self.basis(reading, options)
        coef, cov = weighted_lstsq(design, value, weight)
        with np.errstate(over="ignore", invalid="ignore"):
            params = refine(to_raw @ coef, reading, value, weight, powers, to_raw, cov)
        return Solution(params=params, cov_unscaled=to_raw @ cov @ to_raw.T)


def refine(
    params: Array,
    reading: Array,
    value: Array,
    weight: Array,
    powers: list[int],
    to_raw: Array,
    cov: Array,
) -> Array:
    """Iterative refinement of raw coefficients (``params``, from the basis solution).

    Each step solves the normal equations for the correction through the well-conditioned basis
    (``cov`` = (X^T W X)^-1 of its design X, ``to_raw`` its map to raw coefficients), with the
    raw gradient V^T W (v - p(r)) from double-double residuals. A step is kept only while the
    corrections shrink (by half each time, Wilkinson's rule) and the residual sum of squares does
    not grow; the iteration stops once a correction moves no coefficient by more than 2 ulp.
    """
    reading_split = _split(reading)
    raw = np.zeros(max(powers) + 1)
    best, best_sse, last = params, np.inf, np.inf
    for attempt in range(REFINE_STEPS + 1):
        raw[powers] = params
        p_hi, p_lo = horner_compensated(raw, reading, reading_split)
        r_hi, r_lo = _two_sum(value, -p_hi)  # residuals v - p(r), double-double
        r_lo = r_lo - p_lo
        sse = float(weight @ (r_hi + r_lo) ** 2)
        if not sse <= best_sse * (1 + 1e-9):
            break  # the last step made the fit worse: keep the one before
        best, best_sse = params, sse
        if attempt == REFINE_STEPS:
            break
        g_hi, g_lo = _raw_gradient(reading, reading_split, weight, r_hi, r_lo, powers)
        # the gradient in basis coordinates, to_raw^T g, in double-double: its terms cancel
        # heavily when the raw basis is ill-conditioned
        t_hi, t_lo = _two_prod(to_raw, g_hi[:, None], _split(g_hi[:, None]))
        gb_hi, gb_lo = _accurate_sum(t_hi, t_lo + to_raw * g_lo[:, None])
        step = cov @ (gb_hi + gb_lo)  # the correction, in basis coordinates
        size = float(np.abs(step).max())
        if not size < 0.5 * last:
            break  # no longer converging (or not finite)
        change = to_raw @ step
        params, last = params + change, size
        if np.all(np.abs(change) <= 2 * _EPS * np.abs(params)):
            return params  # converged to the last bit or two
    return best
