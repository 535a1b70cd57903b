"""Comparing two Fit objects field by field, within stated tolerances (fit_many vs fit)."""

from __future__ import annotations

import dataclasses

import numpy as np

from shared import Fit


@dataclasses.dataclass(frozen=True)
class Tolerance:
    """How far a batched Fit may be from fit()'s; 0 everywhere means bit for bit.

    ``minpack`` adds, for each quantity, that many times the distance at which MINPACK stops:
    sqrt(rho) (parameters in u, covariance in u_i u_j, residuals in rse) and rho (rse), with
    rho = eps max|value| / rse.
    """

    params_rel: float = 0.0  # |dp| <= params_rel |p| + params_u u_p
    params_u: float = 0.0
    cov: float = 0.0  # |dC_ij| <= cov u_i u_j  (u from fit()'s covariance)
    rse: float = 0.0  # relative, for rse, scale and noise_value_sd
    residuals: float = 0.0  # |de| <= residuals rse
    minpack: float = 0.0


EXACT = Tolerance()
LINEAR = Tolerance(params_rel=1e-13, cov=1e-13, rse=1e-13, residuals=1e-10)
# fit() ends inverse_offset with full Newton steps; on ill-conditioned units the batched polish
# may stop short of that by the MINPACK-like floor (well below a standard uncertainty)
INVERSE_OFFSET = Tolerance(
    params_rel=1e-10, params_u=1e-9, cov=1e-9, rse=1e-12, residuals=1e-8, minpack=10.0
)


def assert_fits_agree(got: Fit, want: Fit, tol: Tolerance) -> None:
    u = np.sqrt(np.diag(want.covariance))
    rho = np.finfo(np.float64).eps * float(np.max(np.abs(want.value))) / want.rse
    rho = rho if tol.minpack else 0.0
    floor = tol.minpack * np.sqrt(rho)
    tol = dataclasses.replace(
        tol,
        params_u=tol.params_u + floor,
        cov=tol.cov + floor,
        residuals=tol.residuals + floor,
        rse=tol.rse + tol.minpack * rho,
    )
    for field in dataclasses.fields(Fit):
        name = field.name
        a, b = getattr(got, name), getattr(want, name)
        if isinstance(b, np.ndarray):
            assert isinstance(a, np.ndarray), name
            assert (a.dtype, a.shape) == (b.dtype, b.shape), name
            assert not a.flags.writeable, name
        if name == "params":
            assert list(a) == list(b), name  # same names, same order
            assert all(type(x) is float for x in a.values()), name
            p, q = np.array(list(a.values())), np.array(list(b.values()))
            limit = tol.params_rel * np.abs(q) + tol.params_u * u
            assert np.all(np.abs(p - q) <= limit), (name, p, q, np.abs(p - q) / u)
        elif name == "covariance":
            limit = tol.cov * np.outer(u, u)
            assert np.all(np.abs(a - b) <= limit), (name, np.max(np.abs(a - b) / np.outer(u, u)))
        elif name in ("rse", "scale", "noise_value_sd"):
            assert type(a) is float and abs(a - b) <= tol.rse * abs(b), (name, a, b)
        elif name == "residuals":
            assert np.all(np.abs(a - b) <= tol.residuals * want.rse), (name, a - b)
        elif isinstance(b, np.ndarray):
            assert np.array_equal(a, b), name
        else:
            assert type(a) is type(b) and a == b, (name, a, b)
