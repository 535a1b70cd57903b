"""What a model family is, and the shared solvers behind the families.

A family maps a reading r (what the unit outputs) to a value (the physical quantity) through named
parameters. Adding a family is one new module in this package that defines a ``FAMILY`` object
satisfying :class:`Family`; the registry in ``shared.families`` finds it.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any, Protocol

import numpy as np
from numpy.typing import NDArray

from shared.errors import BadInput, SingularFit

Array = NDArray[np.float64]
Options = Mapping[str, Any]


@dataclass(frozen=True, slots=True)
class Solution:
    """A family's least-squares estimate: raw parameters and their unscaled covariance.

    ``cov_unscaled`` is (J^T W J)^-1 at the estimate; the caller scales it by the residual variance
    or leaves it absolute, depending on where the uncertainty comes from.
    """

    params: Array
    cov_unscaled: Array


class Family(Protocol):
    """The interface every model family module provides as ``FAMILY``."""

    name: str
    formula: str
    typical: str
    options: Mapping[str, Any]  # option name -> default
    foldback: bool  # whether points beyond a turnover are detected and excluded

    def check_options(self, options: Options) -> dict[str, Any]:
        """Validate keyword options, fill defaults, return them as a plain JSON-able dict."""
        ...

    def param_names(self, options: Options) -> tuple[str, ...]: ...

    def evaluate(self, params: Array, reading: Array, options: Options) -> Array: ...

    def jacobian(self, params: Array, reading: Array, options: Options) -> Array:
        """d value / d params, shape (n, k)."""
        ...

    def solve(self, reading: Array, value: Array, weight: Array, options: Options) -> Solution:
        """Weighted least squares from automatic starting values."""
        ...


def check_known_options(family: str, given: Options, defaults: Mapping[str, Any]) -> dict[str, Any]:
    """Reject unknown option names, listing the ones that exist."""
    unknown = sorted(set(given) - set(defaults))
    if unknown:
        allowed = ", ".join(sorted(defaults)) or "none"
        raise BadInput(f"{family}: unknown option(s) {', '.join(unknown)}; allowed: {allowed}")
    return {**defaults, **given}


def weighted_lstsq(design: Array, value: Array, weight: Array) -> tuple[Array, Array]:
    """Solve min ||sqrt(w) (X b - v)|| by QR with column equilibration.

    Returns the coefficients and (X^T W X)^-1. Raises SingularFit when the columns are dependent.
    """
    sw = np.sqrt(weight)
    xw = design * sw[:, None]
    norms = np.linalg.norm(xw, axis=0)
    if np.any(norms == 0) or not np.all(np.isfinite(norms)):
        raise SingularFit("a basis column is zero or not finite: the readings do not vary enough")
    q, r = np.linalg.qr(xw / norms)
    diag = np.abs(np.diag(r))
    if diag.min() <= 1e-13 * diag.max():
        raise SingularFit("the readings do not determine every parameter (dependent basis)")
    coef = np.linalg.solve(r, q.T @ (value * sw)) / norms
    r_inv = np.linalg.solve(r, np.eye(r.shape[0])) / norms[:, None]
    return coef, r_inv @ r_inv.T


def unscaled_covariance(jac: Array, weight: Array) -> Array:
    """(J^T W J)^-1 through the SVD of the column-scaled weighted Jacobian."""
    jw = jac * np.sqrt(weight)[:, None]
    norms = np.linalg.norm(jw, axis=0)
    if np.any(norms == 0) or not np.all(np.isfinite(jw)):
        raise SingularFit("the Jacobian has a zero or non-finite column at the estimate")
    _, s, vt = np.linalg.svd(jw / norms, full_matrices=False)
    if s.min() <= 1e-12 * s.max():
        raise SingularFit("the parameters are not separately determined by these points")
    v = vt.T / s
    cov: Array = (v @ v.T) / np.outer(norms, norms)
    return cov


def polish(
    family: Family, start: Array, reading: Array, value: Array, weight: Array, options: Options
) -> Array:
    """Levenberg–Marquardt on the weighted value residuals from ``start`` (analytic Jacobian).

    A trial step that overflows or crosses a pole gets a huge residual, so the solver backs off.
    Returns the polished parameters, or ``start`` when the polish ended no better than it began.
    """
    from scipy.optimize import least_squares  # local: only the non-linear families need it

    sw = np.sqrt(weight)

    def resid(p: Array) -> Array:
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            out: Array = (family.evaluate(p, reading, options) - value) * sw
        return np.where(np.isfinite(out), out, 1e150)

    def jac(p: Array) -> Array:
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            out: Array = family.jacobian(p, reading, options) * sw[:, None]
        return np.where(np.isfinite(out), out, 0.0)

    found = least_squares(
        resid, start, jac=jac, method="lm", x_scale="jac", xtol=1e-15, ftol=1e-15, gtol=1e-15
    )
    start_cost = 0.5 * float(resid(start) @ resid(start))
    return np.asarray(found.x if found.cost <= start_cost else start, dtype=float)
