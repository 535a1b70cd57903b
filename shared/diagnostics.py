"""Diagnostics of a fit: suspect points, repeatability and the lack-of-fit test.

All of them work in the space the family was fitted in, with the fit's weights, so they agree
with the least-squares problem that was solved (value residuals for value-direction fits; reading
residuals for families fitted in the reading direction).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

from shared.errors import CalibrationError
from shared.families import get_family
from shared.families.base import Array
from shared.fitting import Fit, direction_of, fit, slope_of

SUSPECT_ALPHA = 0.05


def fit_space(result: Fit) -> tuple[Array, Array, Array]:
    """Residuals, Jacobian and weights of the used points in the fitting space.

    For a family fitted in the reading direction, residual = reading - g(value) and the
    Jacobian is d g / d params = -(d value / d params) / (d value / d reading) (implicit function).
    """
    fam = get_family(result.family)
    params = np.array(list(result.params.values()))
    r, v, w = result.reading[result.used], result.value[result.used], result.weights[result.used]
    jac = np.asarray(fam.jacobian(params, r, result.options), dtype=float)
    if direction_of(fam) == "reading_from_value":
        resid = r - np.asarray(fam.reading_of(params, v, result.options))  # type: ignore[attr-defined]
        jac = -jac / slope_of(fam, params, r, result.options)[:, None]
    else:
        resid = result.residuals[result.used]
    return np.asarray(resid, dtype=float), jac, np.asarray(w, dtype=float)


def leverage(result: Fit) -> Array:
    """Diagonal of the weighted hat matrix for the used points (0..1)."""
    _, jac, w = fit_space(result)
    q, _ = np.linalg.qr(jac * np.sqrt(w)[:, None])
    return np.asarray(np.sum(q * q, axis=1), dtype=float)


def studentized_residuals(result: Fit) -> Array:
    """Externally studentised residuals, one per input point (NaN for points not used).

    t_i = e_i sqrt(w_i) / (s_(i) sqrt(1 - h_i)), with the deletion variance
    s_(i)^2 = (SSE - w_i e_i^2 / (1 - h_i)) / (dof - 1): each point is judged against the
    scatter of the others.
    """
    resid, _, w = fit_space(result)
    h = np.minimum(leverage(result), 1.0 - 1e-12)
    sse = float(np.sum(w * resid**2))
    out = np.full(result.reading.shape, np.nan)
    if result.dof < 2:
        return out
    s2_del = (sse - w * resid**2 / (1.0 - h)) / (result.dof - 1)
    # The deletion formula is exact for a linear least-squares problem. For a non-linear or
    # effective-variance fit it is a linearisation, which a gross outlier can break (its share of
    # SSE then exceeds SSE itself); there s_(i)^2 is taken from an actual refit without point i,
    # with the weights held at their values in the full fit.
    used_index = np.flatnonzero(result.used)
    for j in np.flatnonzero(~(s2_del > 0)):
        s2_del[j] = _deleted_scale_squared(result, int(used_index[j]))
    t = resid * np.sqrt(w) / np.sqrt(np.maximum(s2_del, 1e-300) * (1.0 - h))
    out[result.used] = t
    return out


def _deleted_scale_squared(result: Fit, index: int) -> float:
    """s_(i)^2: the weighted residual variance of a refit without point ``index`` (fixed weights).

    Returns NaN when that refit cannot be made; the point's studentised residual is then NaN and
    it is not flagged.
    """
    keep = np.asarray(result.used, dtype=bool).copy()
    keep[index] = False
    u = 1.0 / np.sqrt(np.where(keep, result.weights, 1.0))
    natural = direction_of(get_family(result.family)) == "reading_from_value"
    try:
        refit = fit(
            result.family,
            result.reading,
            result.value,
            u_value=None if natural else u,
            u_reading=u if natural else None,
            exclude={int(i): "deleted" for i in np.flatnonzero(~keep)},
            **result.options,
        )
    except CalibrationError:
        return float("nan")
    return float(refit.scale**2)


@dataclass(frozen=True, slots=True)
class Suspect:
    index: int
    t: float
    reason: str


EXACT_REL = 1e-9  # residuals below this fraction of the values: an exact fit (rounding only)


def suspect_points(result: Fit, alpha: float = SUSPECT_ALPHA) -> list[Suspect]:
    """Points whose studentised residual exceeds the Bonferroni-corrected Student-t limit.

    Limit t_{1 - alpha/(2n), dof - 1} over n used points: a family-wise false-alarm rate of about
    ``alpha`` per calibration (the usual outlier test for regression; common practice). Suspect
    points are flagged, never dropped. Points that an exact formula generated (residuals within
    ``EXACT_REL`` of the values: rounding) have no scatter, so none is suspect.
    """
    n = result.n_used
    if result.dof < 2 or n == 0:
        return []
    used = np.asarray(result.used, dtype=bool)
    scale = float(np.max(np.abs(result.value[used]))) or 1.0
    if float(np.max(np.abs(result.residuals[used]))) <= EXACT_REL * scale:
        return []  # the points lie on the curve to rounding: no scatter to judge a point by
    t = studentized_residuals(result)
    limit = float(stats.t.ppf(1.0 - alpha / (2.0 * n), result.dof - 1))
    found = []
    for i in np.flatnonzero(np.abs(np.nan_to_num(t)) > limit):
        found.append(
            Suspect(
                int(i),
                float(t[i]),
                f"studentised residual {t[i]:+.2f} is beyond "
                f"±{limit:.2f} (Bonferroni, alpha {alpha:g} over {n} points)",
            )
        )
    return found


@dataclass(frozen=True, slots=True)
class LackOfFit:
    """Pure error vs lack of fit, from repeated points (NIST/SEMATECH e-Handbook 4.4.4.4)."""

    groups: int  # distinct reference values among the used points
    ss_pure_error: float
    dof_pure_error: int
    ss_lack_of_fit: float
    dof_lack_of_fit: int
    f: float
    p_value: float
    repeatability_fit_space: float  # pooled within-group sd, fitting-space units

    @property
    def significant(self) -> bool:
        """True when the model's lack of fit is significant at 5 %."""
        return self.p_value < 0.05


def lack_of_fit(result: Fit) -> LackOfFit | None:
    """The lack-of-fit F test when repeats exist (points sharing a reference value), else None.

    SSE splits into pure error (scatter of residuals around their mean within each group of
    repeats, n - g degrees of freedom) and lack of fit (the rest, g - p degrees of freedom);
    F = (SS_lof / dof_lof) / (SS_pe / dof_pe).
    """
    resid, _, w = fit_space(result)
    groups, inverse = np.unique(result.value[result.used], return_inverse=True)
    n, g, p = resid.size, groups.size, len(result.params)
    if g >= n or g <= p:
        return None
    w_sum = np.bincount(inverse, weights=w)
    mean = np.bincount(inverse, weights=w * resid) / w_sum
    ss_pe = float(np.sum(w * (resid - mean[inverse]) ** 2))
    sse = float(np.sum(w * resid**2))
    dof_pe, dof_lof = n - g, g - p
    ss_lof = max(sse - ss_pe, 0.0)
    if ss_pe <= 0:
        return None
    f_stat = (ss_lof / dof_lof) / (ss_pe / dof_pe)
    return LackOfFit(
        groups=int(g),
        ss_pure_error=ss_pe,
        dof_pure_error=int(dof_pe),
        ss_lack_of_fit=ss_lof,
        dof_lack_of_fit=int(dof_lof),
        f=float(f_stat),
        p_value=float(stats.f.sf(f_stat, dof_lof, dof_pe)),
        repeatability_fit_space=float(np.sqrt(ss_pe / dof_pe)),
    )
