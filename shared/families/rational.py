"""rational: value = (p0 + p1 r + ... + pm r^m) / (1 + q1 r + ... + qn r^n). Smooth curves.

Option ``degree=(m, n)``: numerator degree m = 0..5, denominator degree n = 1..5 (default (1, 1));
stored as the list [m, n]. Parameters p0..pm (value units per reading^k), q1..qn (per reading^k).

Solving works in the scaled reading t = r / s, s the power of two nearest max |r| (so t is exact
and |t| <= ~1.4): there the powers t^k are of comparable size, where raw r^k for readings in the
hundreds span six or more orders of magnitude (NIST StRD Hahn1, x up to 880 K, stalls unscaled).
The scaled coefficients map back exactly: p_k = p~_k / s^k, q_k = q~_k / s^k.

1. **Starting values** (no user input): a polynomial of degree m (q = 0), and the linearised
   problem v (1 + q1 t + ...) = p(t), which is linear in every parameter, solved by weighted least
   squares twice: with the given weights (Levy) and with relative weights 1 / v^2 (which keeps
   the small values near a steep end in play).
2. **Levenberg–Marquardt** on the true residuals (analytic Jacobian, ``x_scale="jac"``,
   tolerances 1e-15) from each start whose denominator has no zero among the readings, and from a
   start with one only if it already fits better than those (the points may call for a pole).
3. **Gauss–Newton polish** of the best by QR of the Jacobian, while the steps shrink: LM stops
   where the sum of squares no longer changes in double precision, ~1e-8 (relative) from the
   minimum in the parameters; the polish gets to ~1e-11 (the certified digits of Kirby2, Hahn1).

A curve whose denominator is zero inside the range of the readings has a pole there. Among the
fits found, the best one without such a pole is kept, unless the best one with a pole leaves less
than a quarter of its residual sum of squares (then the points call for a pole); either way a
pole inside the range is never returned: SingularFit, with where it is.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from numbers import Integral
from types import MappingProxyType
from typing import Any

import numpy as np
from scipy.optimize import least_squares

from shared.errors import BadInput, SingularFit
from shared.families.base import (
    Array,
    Options,
    Solution,
    check_known_options,
    unscaled_covariance,
    weighted_lstsq,
)

MAX_NUMERATOR, MAX_DENOMINATOR = 5, 5
POLISH_STEPS = 20
POLE_PREFERENCE = 4.0  # a fit without a pole wins unless its residual SS is 4x the best's
REAL_ROOT = 1e-9  # a root of the denominator counts as real when |imag| <= this * max(1, |root|)


def _degrees(options: Options) -> tuple[int, int]:
    m, n = options["degree"]
    return int(m), int(n)


def _split(params: Array, m: int) -> tuple[Array, Array]:
    """Numerator coefficients p0..pm and denominator coefficients 1, q1..qn (lowest first)."""
    return params[: m + 1], np.concatenate(([1.0], params[m + 1 :]))


def _pole_in(params: Array, m: int, lo: float, hi: float) -> float | None:
    """A real zero of the denominator in [lo, hi], or None."""
    _, q = _split(params, m)
    q = np.trim_zeros(q, "b")  # q[0] = 1, so at least that remains
    if q.size < 2:
        return None
    for root in np.polynomial.polynomial.polyroots(q):
        if abs(root.imag) <= REAL_ROOT * max(1.0, abs(root)) and lo <= root.real <= hi:
            return float(root.real)
    return None


def _cost(resid: Callable[[Array], Array], theta: Array) -> float:
    """Half the weighted residual sum of squares (inf where the curve is not finite)."""
    with np.errstate(all="ignore"):
        r = resid(theta)
    cost = float(r @ r) / 2
    return cost if np.isfinite(cost) else np.inf


def _descend(
    start: Array, resid: Callable[[Array], Array], jac: Callable[[Array], Array]
) -> tuple[float, Array]:
    """Levenberg–Marquardt from ``start``: (half the residual SS, parameters)."""
    if not np.isfinite(_cost(resid, start)):
        return np.inf, start
    with np.errstate(all="ignore"):
        result = least_squares(
            resid,
            start,
            jac=jac,
            method="lm",
            x_scale="jac",
            xtol=1e-15,
            ftol=1e-15,
            gtol=1e-15,
            max_nfev=100 * (start.size + 1),
        )
    theta = np.asarray(result.x, dtype=float)
    return (_cost(resid, theta) if np.all(np.isfinite(theta)) else np.inf), theta


class Rational:
    """(p0 + ... + pm r^m) / (1 + q1 r + ... + qn r^n)."""

    name = "rational"
    formula = "value = (p0 + p1·r + … + pm·r^m) / (1 + q1·r + … + qn·r^n)   (degree (m, n))"
    typical = "general smooth non-linear response"
    options: Mapping[str, Any] = MappingProxyType({"degree": (1, 1)})
    foldback = False

    def check_options(self, options: Options) -> dict[str, Any]:
        opts = check_known_options(self.name, options, self.options)
        degree = opts["degree"]
        if (
            not isinstance(degree, list | tuple)
            or len(degree) != 2
            or not all(isinstance(d, Integral) and not isinstance(d, bool) for d in degree)
        ):
            raise BadInput(
                f"rational: degree must be two integers (m, n), numerator and denominator "
                f"degrees; got {degree!r}"
            )
        m, n = int(degree[0]), int(degree[1])
        if not 0 <= m <= MAX_NUMERATOR:
            raise BadInput(f"rational: numerator degree m = {m} is outside 0..{MAX_NUMERATOR}")
        if not 1 <= n <= MAX_DENOMINATOR:
            raise BadInput(f"rational: denominator degree n = {n} is outside 1..{MAX_DENOMINATOR}")
        opts["degree"] = [m, n]
        return opts

    def param_names(self, options: Options) -> tuple[str, ...]:
        m, n = _degrees(options)
        return tuple(f"p{k}" for k in range(m + 1)) + tuple(f"q{k}" for k in range(1, n + 1))

    def evaluate(self, params: Array, reading: Array, options: Options) -> Array:
        m, _ = _degrees(options)
        p, q = _split(params, m)
        pv = np.polynomial.polynomial.polyval(reading, p)
        qv = np.polynomial.polynomial.polyval(reading, q)
        with np.errstate(divide="ignore", invalid="ignore"):
            out: Array = pv / qv
        return out

    def jacobian(self, params: Array, reading: Array, options: Options) -> Array:
        """[r^k / Q for p_k; -r^k value / Q for q_k]."""
        m, n = _degrees(options)
        p, q = _split(params, m)
        qv = np.polynomial.polynomial.polyval(reading, q)
        value = np.polynomial.polynomial.polyval(reading, p) / qv
        powers = np.stack([reading**k for k in range(max(m, n) + 1)], axis=-1)
        return np.concatenate(
            [powers[:, : m + 1] / qv[:, None], -powers[:, 1 : n + 1] * (value / qv)[:, None]],
            axis=-1,
        )

    def slope(self, params: Array, reading: Array, options: Options) -> Array:
        """d value / d reading = (P' Q - P Q') / Q^2."""
        m, _ = _degrees(options)
        p, q = _split(params, m)
        poly = np.polynomial.polynomial
        pv, qv = poly.polyval(reading, p), poly.polyval(reading, q)
        dp, dq = poly.polyval(reading, poly.polyder(p)), poly.polyval(reading, poly.polyder(q))
        out: Array = (dp * qv - pv * dq) / qv**2
        return out

    def solve(self, reading: Array, value: Array, weight: Array, options: Options) -> Solution:
        m, n = _degrees(options)
        scale = 2.0 ** np.round(np.log2(np.abs(reading).max()))
        t = reading / scale  # exact: a power of two
        lo, hi = float(t.min()), float(t.max())
        sw = np.sqrt(weight)

        def resid(theta: Array) -> Array:
            return (self.evaluate(theta, t, options) - value) * sw

        wall = np.full_like(value, 1e3 * max(float(np.abs(value * sw).max()), 1e-300))

        def resid_pole_free(theta: Array) -> Array:
            """The residuals; a wall of 1000 x the values once a pole enters (LM backs off)."""
            return wall if _pole_in(theta, m, lo, hi) is not None else resid(theta)

        def jac(theta: Array) -> Array:
            return self.jacobian(theta, t, options) * sw[:, None]

        # LM from every start without a pole among the readings, kept without one; then from a
        # start with one only if it already fits better than those (the points may call for one)
        starts = self._starts(t, value, weight, m, n)
        found = [
            _descend(s, resid_pole_free, jac) for s in starts if _pole_in(s, m, lo, hi) is None
        ]
        bar = min((cost for cost, _ in found), default=np.inf)
        for start in starts:
            if _pole_in(start, m, lo, hi) is not None and _cost(resid, start) < bar:
                found.append(_descend(start, resid, jac))
        fits = [(cost, theta, _pole_in(theta, m, lo, hi)) for cost, theta in found]
        fits = [f for f in fits if np.isfinite(f[0])]
        if not fits:
            raise SingularFit(f"rational {m}/{n}: no starting value led to a finite fit")
        best_cost, _, best_pole = min(fits, key=lambda f: f[0])
        pole_free = [(cost, theta) for cost, theta, pole in fits if pole is None]
        if not pole_free:
            raise self._pole_error(m, n, best_pole, reading, scale, None)
        cost, theta = min(pole_free, key=lambda f: f[0])
        if best_pole is not None and cost > POLE_PREFERENCE * best_cost:
            raise self._pole_error(m, n, best_pole, reading, scale, cost / best_cost)

        theta = self._polish(theta, resid_pole_free, t, value, weight, options)
        pole = _pole_in(theta, m, lo, hi)
        if pole is not None:  # the polish moved a pole in: not expected, but never return one
            raise self._pole_error(m, n, pole, reading, scale, None)
        try:
            cov = unscaled_covariance(self.jacobian(theta, t, options), weight)
        except SingularFit as exc:
            raise SingularFit(
                f"rational {m}/{n}: {exc}; try a lower degree (the numerator and denominator "
                "may nearly share a factor, or the readings span little of their distance from 0)"
            ) from None
        to_raw = scale ** -np.concatenate((np.arange(m + 1), np.arange(1, n + 1)))
        return Solution(params=theta * to_raw, cov_unscaled=cov * np.outer(to_raw, to_raw))

    @staticmethod
    def _pole_error(
        m: int, n: int, pole: float | None, reading: Array, scale: float, worse: float | None
    ) -> SingularFit:
        lo, hi = float(reading.min()), float(reading.max())
        where = f"r = {pole * scale:.6g}" if pole is not None else "a reading"
        alternative = (
            f"the best fit without one leaves {worse:.3g} times the residual sum of squares"
            if worse is not None
            else "no fit without one was found"
        )
        return SingularFit(
            f"rational {m}/{n}: the best fit has a pole (its denominator 1 + q1·r + … is zero) "
            f"at {where}, inside the readings {lo:.6g}..{hi:.6g}; {alternative}. Calibrate each "
            "side of it separately, or use another degree or family"
        )

    def _starts(self, t: Array, value: Array, weight: Array, m: int, n: int) -> list[Array]:
        """Polynomial (q = 0), then the linearised problem with absolute and relative weights."""
        powers = np.stack([t**j for j in range(max(m, n) + 1)], axis=-1)
        try:
            poly, _ = weighted_lstsq(powers[:, : m + 1], value, weight)
        except SingularFit as exc:
            raise SingularFit(
                f"rational {m}/{n}: {exc}: r^0..r^{m} are nearly dependent over these readings; "
                "use a lower degree"
            ) from None
        starts = [np.concatenate((poly, np.zeros(n)))]
        design = np.concatenate([powers[:, : m + 1], -value[:, None] * powers[:, 1 : n + 1]], 1)
        weights = [weight]
        top = float(np.abs(value).max())
        if top > 0:
            weights.append(weight / np.maximum(np.abs(value), 1e-3 * top) ** 2)
        for w in weights:
            try:
                starts.append(weighted_lstsq(design, value, w)[0])
            except SingularFit:
                continue  # e.g. constant values: the linearised columns are dependent
        return starts

    def _polish(
        self,
        theta: Array,
        resid: Callable[[Array], Array],
        t: Array,
        value: Array,
        weight: Array,
        options: Options,
    ) -> Array:
        """Gauss–Newton steps (QR of the Jacobian) while they shrink and do not raise the cost."""
        cost, last = _cost(resid, theta), np.inf
        for _ in range(POLISH_STEPS):
            jac = self.jacobian(theta, t, options)
            try:
                step, _ = weighted_lstsq(jac, value - self.evaluate(theta, t, options), weight)
            except SingularFit:
                break
            # the step's size in value units: each parameter's change times its column's norm
            norms = np.linalg.norm(jac * np.sqrt(weight)[:, None], axis=0)
            size = float(np.max(np.abs(step) * norms))
            if not size < 0.5 * last:
                break
            trial = theta + step
            trial_cost = _cost(resid, trial)
            if not trial_cost <= cost * (1 + 1e-10):
                break
            theta, cost, last = trial, trial_cost, size
        return theta


FAMILY = Rational()
