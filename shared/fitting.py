"""fit() and fit_many(): least-squares calibration curves as frozen, JSON-round-trippable values."""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field, replace
from typing import Any, Literal

import numpy as np
from numpy.typing import ArrayLike

from shared.errors import BadInput, TooFewPoints
from shared.families import get_family
from shared.families.base import Array
from shared.foldback import find_foldback
from shared.uncertainty import K_CONVENTION, coverage_factor, propagate
from shared.version import ENGINE_VERSION

SigmaSource = Literal["residuals", "given"]
MONOTONE_GRID = 513


def _frozen(values: ArrayLike, dtype: type = np.float64) -> Array:
    arr: Array = np.array(values, dtype=dtype)
    arr.setflags(write=False)
    return arr


@dataclass(frozen=True, slots=True)
class Interval:
    """A converted value with its uncertainty: ``lower``/``upper`` = value -/+ k u.

    ``in_range`` is False where the reading lies outside the fit's valid range; there ``value`` is
    the extrapolated formula value and must not be used as a calibrated result.
    """

    value: Array
    u: Array
    k: float
    lower: Array
    upper: Array
    in_range: Array


@dataclass(frozen=True, slots=True, eq=False)
class Fit:
    """A fitted calibration curve: value = f(reading; params). Frozen; no solver attached.

    ``sigma_source`` says what the covariance means: ``"residuals"`` — scaled by the residual
    variance (uncertainty estimated from the scatter of the points); ``"given"`` — absolute, from
    the value uncertainties the caller supplied.
    ``reading``, ``value`` are every input point; ``used`` marks those that entered the fit;
    ``excluded`` gives (index, reason) for each point left out; ``residuals`` = value - f(reading)
    for every point (extrapolated for excluded ones).
    """

    family: str
    options: Mapping[str, Any]
    params: Mapping[str, float]
    covariance: Array
    dof: int
    rse: float
    sigma_source: SigmaSource
    noise_sd: float
    reading: Array
    value: Array
    used: Array
    residuals: Array
    excluded: tuple[tuple[int, str], ...]
    valid_range: tuple[float, float]
    monotone: bool
    engine_version: str = field(default=ENGINE_VERSION)

    # -- derived -------------------------------------------------------------------------------
    @property
    def param_names(self) -> tuple[str, ...]:
        return tuple(self.params)

    @property
    def stderr(self) -> dict[str, float]:
        """Standard uncertainty of each parameter (square root of the covariance diagonal)."""
        return dict(zip(self.params, np.sqrt(np.diag(self.covariance)).tolist(), strict=True))

    @property
    def n_used(self) -> int:
        return int(self.used.sum())

    def _vector(self) -> Array:
        return np.array(list(self.params.values()), dtype=float)

    # -- conversion ----------------------------------------------------------------------------
    def in_range(self, reading: ArrayLike) -> Array:
        """True where ``reading`` lies inside the valid range (inclusive)."""
        r = np.asarray(reading, dtype=float)
        lo, hi = self.valid_range
        return np.asarray((r >= lo) & (r <= hi))

    def to_value(self, reading: ArrayLike, *, extrapolate: bool = False) -> Array:
        """Converted values; NaN outside the valid range unless ``extrapolate=True``.

        Returning NaN (rather than a plain number) makes an extrapolated reading impossible to
        mistake for a calibrated one; ``in_range`` tells which entries those are.
        """
        r = np.asarray(reading, dtype=float)
        out = np.asarray(get_family(self.family).evaluate(self._vector(), r, self.options))
        if extrapolate:
            return out
        return np.where(self.in_range(r), out, np.nan)

    def _gradient(self, r: Array) -> Array:
        return np.atleast_2d(get_family(self.family).jacobian(self._vector(), r, self.options))

    def _k(self, level: float | None) -> float:
        if level is None:
            return K_CONVENTION
        dof = np.inf if self.sigma_source == "given" else self.dof
        return coverage_factor(level, dof)

    def curve_band(self, reading: ArrayLike, level: float | None = 0.95) -> Interval:
        """Confidence band of the fitted curve at ``reading`` (uncertainty of the constants only).

        ``level=None`` applies the k = 2 convention instead of a Student-t coverage factor.
        """
        r = np.atleast_1d(np.asarray(reading, dtype=float))
        u = propagate(self._gradient(r), self.covariance)
        return self._interval(r, u, self._k(level))

    def value_interval(self, reading: ArrayLike, level: float | None = 0.95) -> Interval:
        """Prediction interval of the value for a new single reading at ``reading``.

        u^2 = g^T V g + noise_sd^2 (GUM law of propagation plus one observation's noise); coverage
        from Student t at the fit's dof (``level``), or k = 2 with ``level=None``.
        """
        r = np.atleast_1d(np.asarray(reading, dtype=float))
        u_curve = propagate(self._gradient(r), self.covariance)
        u = np.sqrt(u_curve**2 + self.noise_sd**2)
        return self._interval(r, u, self._k(level))

    def _interval(self, r: Array, u: Array, k: float) -> Interval:
        value = self.to_value(r, extrapolate=True)
        return Interval(
            value=value,
            u=u,
            k=k,
            lower=value - k * u,
            upper=value + k * u,
            in_range=self.in_range(r),
        )

    # -- serialisation -------------------------------------------------------------------------
    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-able dict; ``Fit.from_dict(f.to_dict())`` rebuilds ``f`` exactly."""
        return {
            "family": self.family,
            "options": dict(self.options),
            "params": dict(self.params),
            "covariance": self.covariance.tolist(),
            "dof": self.dof,
            "rse": self.rse,
            "sigma_source": self.sigma_source,
            "noise_sd": self.noise_sd,
            "reading": self.reading.tolist(),
            "value": self.value.tolist(),
            "used": self.used.tolist(),
            "residuals": self.residuals.tolist(),
            "excluded": [[i, why] for i, why in self.excluded],
            "valid_range": list(self.valid_range),
            "monotone": self.monotone,
            "engine_version": self.engine_version,
        }

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> Fit:
        return cls(
            family=d["family"],
            options=dict(d["options"]),
            params={str(k): float(v) for k, v in d["params"].items()},
            covariance=_frozen(d["covariance"]),
            dof=int(d["dof"]),
            rse=float(d["rse"]),
            sigma_source=d["sigma_source"],
            noise_sd=float(d["noise_sd"]),
            reading=_frozen(d["reading"]),
            value=_frozen(d["value"]),
            used=_frozen(d["used"], dtype=bool),
            residuals=_frozen(d["residuals"]),
            excluded=tuple((int(i), str(why)) for i, why in d["excluded"]),
            valid_range=(float(d["valid_range"][0]), float(d["valid_range"][1])),
            monotone=bool(d["monotone"]),
            engine_version=str(d["engine_version"]),
        )


def _as_points(reading: ArrayLike, value: ArrayLike) -> tuple[Array, Array]:
    try:
        r = np.asarray(reading, dtype=float).ravel()
        v = np.asarray(value, dtype=float).ravel()
    except (TypeError, ValueError) as exc:
        raise BadInput(f"reading and value must be lists of numbers: {exc}") from None
    if r.shape != v.shape:
        raise BadInput(f"reading has {r.size} entries but value has {v.size}")
    bad = ~(np.isfinite(r) & np.isfinite(v))
    if bad.any():
        raise BadInput(
            f"reading and value must be finite numbers; point(s) "
            f"{', '.join(str(i) for i in np.flatnonzero(bad)[:10])} are not"
        )
    return r, v


def _is_monotone(family_fit: Fit) -> bool:
    lo, hi = family_fit.valid_range
    grid = np.linspace(lo, hi, MONOTONE_GRID)
    steps = np.diff(family_fit.to_value(grid, extrapolate=True))
    return bool(np.all(steps >= 0) or np.all(steps <= 0))


def fit(
    family: str,
    reading: ArrayLike,
    value: ArrayLike,
    *,
    u_value: ArrayLike | None = None,
    exclude: Mapping[int, str] | None = None,
    **options: Any,
) -> Fit:
    """Fit ``family`` to calibration points by (weighted) least squares.

    Parameters
    ----------
    family : name in ``FAMILIES`` (see the family table in DEVELOPERS.md).
    reading : what the unit outputs (ADC counts, ohms, mV, ...), one entry per point.
    value : the reference value of the physical quantity (mm, degC, N, ...), same length.
    u_value : standard uncertainty of each value, in value units. With it the covariance is
        absolute (``sigma_source="given"``); without it, it is estimated from the residuals.
    exclude : point index -> reason, for points a user has excluded; kept in ``Fit.excluded``.
    **options : family options, e.g. ``degree=3`` for ``polynomial``; unknown names are an error.

    Families that can fold back (``inverse_offset``) also exclude, with a stated reason, the
    points beyond a detected turnover. Raises ``BadInput``/``TooFewPoints`` for unusable input and
    ``SingularFit`` when the points do not determine the parameters.
    """
    fam = get_family(family)
    opts = fam.check_options(options)
    r, v = _as_points(reading, value)
    source: SigmaSource
    if u_value is None:
        weight, source = np.ones_like(r), "residuals"
    else:
        u = np.broadcast_to(np.asarray(u_value, dtype=float), r.shape)
        if not np.all(np.isfinite(u) & (u > 0)):
            raise BadInput("u_value must be positive and finite for every point")
        weight, source = 1.0 / u**2, "given"

    excluded: dict[int, str] = {}
    for i, why in (exclude or {}).items():
        if not 0 <= int(i) < r.size:
            raise BadInput(f"exclude: point {i} does not exist ({r.size} points)")
        excluded[int(i)] = why
    if fam.foldback:
        keep = np.setdiff1d(np.arange(r.size), list(excluded))
        fold = find_foldback(r[keep], v[keep]) if keep.size else None
        if fold is not None:
            for j in fold.excluded:
                excluded[int(keep[j])] = fold.reason
    used = np.ones(r.size, dtype=bool)
    used[list(excluded)] = False

    names = fam.param_names(opts)
    if used.sum() < len(names) + 1:
        raise TooFewPoints(
            f"{family} has {len(names)} parameters and needs at least "
            f"{len(names) + 1} usable points; got {int(used.sum())}"
        )
    ru, vu, wu = r[used], v[used], weight[used]
    if np.ptp(ru) == 0:
        raise BadInput("all usable readings are equal: the curve cannot be determined")

    sol = fam.solve(ru, vu, wu, opts)
    resid_all = v - fam.evaluate(sol.params, r, opts)
    dof = int(used.sum()) - len(names)
    chi2 = float(np.sum(wu * resid_all[used] ** 2))
    rse = float(np.sqrt(chi2 / dof))
    if source == "residuals":
        cov, noise = sol.cov_unscaled * rse**2, rse
    else:
        cov, noise = sol.cov_unscaled, float(np.sqrt(np.mean(1.0 / wu)))
    result = Fit(
        family=family,
        options=opts,
        params=dict(zip(names, (float(p) for p in sol.params), strict=True)),
        covariance=_frozen(cov),
        dof=dof,
        rse=rse,
        sigma_source=source,
        noise_sd=noise,
        reading=_frozen(r),
        value=_frozen(v),
        used=_frozen(used, dtype=bool),
        residuals=_frozen(resid_all),
        excluded=tuple(sorted(excluded.items())),
        valid_range=(float(ru.min()), float(ru.max())),
        monotone=True,
    )
    return replace(result, monotone=_is_monotone(result))


def fit_many(
    family: str,
    datasets: Iterable[tuple[ArrayLike, ArrayLike]],
    **options: Any,
) -> list[Fit]:
    """Fit the same family to many units' points; the same results as ``fit`` one by one."""
    get_family(family).check_options(options)  # a bad name is an error even with no units
    return [fit(family, r, v, **options) for r, v in datasets]
