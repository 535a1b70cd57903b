"""fit() and fit_many(): least-squares calibration curves as frozen, JSON-round-trippable values.

Where the noise is. A calibration point has a reference value (from a jig, a reference
thermometer, known masses) and a reading (what the unit output). Either may carry the noise:

* ``noise="value"`` (default): the scatter is in the value; plain least squares in value units.
* ``noise="reading"``: the scatter is in the reading (ADC noise, a resistance meter). A fit of
  value = f(reading) then weights each point by 1 / f'(r)^2, the propagated reading noise
  (effective variance, iterated because f' depends on the fit), and a new reading's noise enters a
  converted value as |f'(r)| u_r — large on the steep part of a curve, small on the flat part.
  An unweighted fit would spread one average noise level over the whole range instead.
* ``u_value=`` / ``u_reading=``: known standard uncertainties (absolute); each point's variance in
  the space the family is fitted in is u_v^2 + (f' u_r)^2 (value space) or u_r^2 + (u_v / f')^2
  (reading space), and the covariance is absolute (``sigma_source="given"``).

Families stated the natural way round (``direction = "reading_from_value"``, e.g. an RTD's
resistance as a function of temperature) are fitted in reading space and inverted exactly; the
same noise models apply.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field, replace
from typing import Any, Literal

import numpy as np
from numpy.typing import ArrayLike
from scipy.optimize import least_squares

from shared.errors import BadInput, SingularFit, TooFewPoints
from shared.families import get_family
from shared.families.base import Array, Family, Solution, unscaled_covariance
from shared.foldback import find_foldback
from shared.uncertainty import K_CONVENTION, coverage_factor, propagate
from shared.version import ENGINE_VERSION

SigmaSource = Literal["residuals", "given"]
Noise = Literal["value", "reading"]
MONOTONE_GRID = 513
EV_MAX_ITER = 30  # effective-variance reweighting: iterations at most
EV_START_ITER = 4  # reweighted solves that start the direct effective-variance minimisation
EV_RTOL = 1e-9  # ... until the parameters change by less than this (relative)
EV_POLISH_STEPS = 8  # Gauss-Newton steps with the analytic Jacobian after least_squares
EV_POLISH_XTOL = 1e-12  # ... until a step moves the normalised residuals by less (relative)
EV_POLISH_TRUST = 1e-6  # a step this small is taken even if the rounded cost rises


def _frozen(values: ArrayLike, dtype: type = np.float64) -> Array:
    arr: Array = np.array(values, dtype=dtype)
    arr.setflags(write=False)
    return arr


def direction_of(family: Family) -> str:
    """``"value_from_reading"`` (most families) or ``"reading_from_value"`` (fitted naturally)."""
    return str(getattr(family, "direction", "value_from_reading"))


def slope_of(family: Family, params: Array, reading: Array, options: Mapping[str, Any]) -> Array:
    """d value / d reading: the family's own ``slope`` if it has one, else a central difference."""
    own = getattr(family, "slope", None)
    if own is not None:
        return np.asarray(own(params, reading, options), dtype=float)
    h = 1e-6 * np.maximum(np.abs(reading), 1e-3 * max(float(np.max(np.abs(reading))), 1.0))
    up = family.evaluate(params, reading + h, options)
    down = family.evaluate(params, reading - h, options)
    return np.asarray((up - down) / (2.0 * h), dtype=float)


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
    the uncertainties the caller supplied.
    ``noise`` says where the scatter was taken to be (see the module docstring);
    ``noise_value_sd`` (value units) and ``noise_reading_sd`` (reading units) are one new
    observation's noise, used by ``value_interval``.
    ``rse`` is the residual standard error of the values, sqrt(sum(residual^2) / dof), value units;
    ``scale`` is sqrt(sum(weight * residual^2) / dof) in the space the family is fitted in, the
    factor the covariance was scaled by when ``sigma_source="residuals"`` (equal to ``rse`` for an
    unweighted value-direction fit). Both are 0.0 when ``dof`` is 0, which only a family that
    interpolates its points (``table``) allows, and only with given uncertainties.
    ``reading``, ``value`` are every input point; ``used`` marks those that entered the fit;
    ``weights`` are the final least-squares weights (0 for points not used); ``excluded`` gives
    (index, reason) for each point left out; ``residuals`` = value - f(reading) for every point
    (extrapolated for excluded ones).
    """

    family: str
    options: Mapping[str, Any]
    params: Mapping[str, float]
    covariance: Array
    dof: int
    rse: float
    scale: float
    sigma_source: SigmaSource
    noise: Noise
    noise_value_sd: float
    noise_reading_sd: float
    reading: Array
    value: Array
    used: Array
    weights: Array
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

    @property
    def direction(self) -> str:
        return direction_of(get_family(self.family))

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

    def slope(self, reading: ArrayLike) -> Array:
        """d value / d reading of the fitted curve (sensitivity to the reading)."""
        r = np.atleast_1d(np.asarray(reading, dtype=float))
        return slope_of(get_family(self.family), self._vector(), r, self.options)

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

    def new_reading_u(self, reading: ArrayLike) -> Array:
        """Standard uncertainty one new observation's noise adds to a converted value."""
        r = np.atleast_1d(np.asarray(reading, dtype=float))
        var = np.full(r.shape, self.noise_value_sd**2)
        if self.noise_reading_sd:
            var = var + (self.slope(r) * self.noise_reading_sd) ** 2
        return np.asarray(np.sqrt(var), dtype=float)

    def value_interval(self, reading: ArrayLike, level: float | None = 0.95) -> Interval:
        """Prediction interval of the value for a new single reading at ``reading``.

        u^2 = g^T V g + u_new^2: GUM law of propagation for the constants plus one observation's
        noise (``new_reading_u``); coverage from Student t at the fit's dof (``level``), or
        k = 2 with ``level=None``.
        """
        r = np.atleast_1d(np.asarray(reading, dtype=float))
        u_curve = propagate(self._gradient(r), self.covariance)
        u = np.sqrt(u_curve**2 + self.new_reading_u(r) ** 2)
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
            "scale": self.scale,
            "sigma_source": self.sigma_source,
            "noise": self.noise,
            "noise_value_sd": self.noise_value_sd,
            "noise_reading_sd": self.noise_reading_sd,
            "reading": self.reading.tolist(),
            "value": self.value.tolist(),
            "used": self.used.tolist(),
            "weights": self.weights.tolist(),
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
            scale=float(d["scale"]),
            sigma_source=d["sigma_source"],
            noise=d["noise"],
            noise_value_sd=float(d["noise_value_sd"]),
            noise_reading_sd=float(d["noise_reading_sd"]),
            reading=_frozen(d["reading"]),
            value=_frozen(d["value"]),
            used=_frozen(d["used"], dtype=bool),
            weights=_frozen(d["weights"]),
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


def _uncertainty(name: str, given: ArrayLike | None, shape: tuple[int, ...]) -> Array | None:
    if given is None:
        return None
    u = np.broadcast_to(np.asarray(given, dtype=float), shape)
    if not np.all(np.isfinite(u) & (u >= 0)):
        raise BadInput(f"{name} must be finite and not negative for every point")
    return np.array(u)


def _is_monotone(family_fit: Fit) -> bool:
    lo, hi = family_fit.valid_range
    grid = np.linspace(lo, hi, MONOTONE_GRID)
    steps = np.diff(family_fit.to_value(grid, extrapolate=True))
    return bool(np.all(steps >= 0) or np.all(steps <= 0))


def _solve_weighted(
    fam: Family,
    opts: Mapping[str, Any],
    r: Array,
    v: Array,
    u_v: Array,
    u_r: Array,
) -> tuple[Solution, Array]:
    """Least squares with each point's variance in the family's fitting space.

    In value space a point's variance is u_v^2 + (f' u_r)^2; in reading space u_r^2 + (u_v/f')^2.
    When a term involves f', a few reweighted solves (weights from the latest fit) give a start,
    and for value-direction families the effective-variance objective
    sum (v - f(r))^2 / (u_v^2 + f'(r)^2 u_r^2) is then minimised over all parameters, f' included:
    with reading noise alone that is, to first order, a fit in the reading direction (exactly so
    for a line, where it reproduces the inverse of the reading-on-value regression).
    """
    natural = direction_of(fam) == "reading_from_value"
    needs_slope = bool(np.any(u_v > 0)) if natural else bool(np.any(u_r > 0))
    var = u_r**2 if natural else u_v**2
    if not needs_slope:
        weight = _weights_from(var)
        return fam.solve(r, v, weight, opts), weight
    # the first pass is unweighted when the direct term alone leaves points without variance
    sol = fam.solve(r, v, _weights_from(var) if np.all(var > 0) else np.ones_like(var), opts)

    def variance(params: Array) -> Array:
        f_prime = slope_of(fam, params, r, opts)
        if not np.all(np.isfinite(f_prime)) or np.any(f_prime == 0):
            raise SingularFit(
                "the fitted curve is flat at a point: reading noise cannot be "
                "propagated to the value there"
            )
        return u_r**2 + (u_v / f_prime) ** 2 if natural else u_v**2 + (f_prime * u_r) ** 2

    for _ in range(EV_MAX_ITER if natural else EV_START_ITER):
        weight = _weights_from(variance(sol.params))
        new = fam.solve(r, v, weight, opts)
        change = np.max(np.abs(new.params - sol.params) / np.maximum(np.abs(new.params), 1e-300))
        sol = new
        if change < EV_RTOL:
            break
    if natural:
        return sol, _weights_from(variance(sol.params))

    def normalised(params: Array) -> Array:
        return (v - fam.evaluate(params, r, opts)) / np.sqrt(variance(params))

    found = least_squares(
        normalised,
        sol.params,
        jac="3-point",
        method="trf",
        x_scale="jac",
        xtol=1e-15,
        ftol=1e-15,
        gtol=1e-15,
    )
    if not found.success or not np.all(np.isfinite(found.x)):
        raise SingularFit(f"the effective-variance fit did not converge: {found.message}")
    slope_jac = getattr(fam, "slope_jacobian", None)
    if slope_jac is None:
        cov = unscaled_covariance(np.asarray(found.jac, dtype=float), np.ones_like(r))
        return Solution(params=found.x, cov_unscaled=cov), _weights_from(variance(found.x))

    def jacobian(params: Array) -> Array:
        """d normalised / d params, analytic: -(J_f + e f' u_r^2 J_f' / sigma) / sigma."""
        sigma = np.sqrt(variance(params))
        e = normalised(params)
        jf = np.atleast_2d(fam.jacobian(params, r, opts))
        jg = np.atleast_2d(slope_jac(params, r, opts))
        f_prime = slope_of(fam, params, r, opts)
        inner = (e * f_prime * u_r**2 / sigma)[:, None] * jg
        return np.asarray(-(jf + inner) / sigma[:, None], dtype=float)

    params = _ev_polish(normalised, jacobian, np.asarray(found.x, dtype=float))
    cov = unscaled_covariance(jacobian(params), np.ones_like(r))
    return Solution(params=params, cov_unscaled=cov), _weights_from(variance(params))


def _ev_polish(
    normalised: Callable[[Array], Array], jacobian: Callable[[Array], Array], params: Array
) -> Array:
    """Gauss-Newton steps on the effective-variance objective with the analytic Jacobian.

    ``least_squares`` with a finite-difference Jacobian stops once it cannot see the sum of
    squares fall, short of the minimum where the parameters are ill-conditioned (a raw cubic);
    these steps (least squares on the column-scaled Jacobian, by SVD) go on to the rounding
    floor: until a step moves the normalised residuals by less than EV_POLISH_XTOL of their
    root sum of squares, or stops shrinking. A step that raises the sum of squares is refused
    unless it is below EV_POLISH_TRUST of it (its gain is then below the rounding).
    """
    e = normalised(params)
    cost = float(e @ e)
    last = np.inf
    for _ in range(EV_POLISH_STEPS):
        jac = jacobian(params)
        norms = np.linalg.norm(jac, axis=0)
        if not np.all(np.isfinite(jac)) or np.any(norms == 0):
            break
        scaled = np.linalg.lstsq(jac / norms, -e, rcond=None)[0]
        moved = float(np.linalg.norm((jac / norms) @ scaled))
        root = np.sqrt(cost)
        if moved <= EV_POLISH_XTOL * root or moved > 0.5 * last:
            break
        last = moved
        trial = params + scaled / norms
        with np.errstate(all="ignore"):
            e_trial = normalised(trial)
        trial_cost = float(e_trial @ e_trial)
        if not np.isfinite(trial_cost) or (trial_cost > cost and moved > EV_POLISH_TRUST * root):
            break
        params, e, cost = trial, e_trial, min(cost, trial_cost)
    return params


def _weights_from(var: Array) -> Array:
    if np.any(var <= 0):
        raise BadInput(
            "u_value and u_reading leave a point with zero uncertainty; every point "
            "needs a positive one"
        )
    return 1.0 / var


def fit(
    family: str,
    reading: ArrayLike,
    value: ArrayLike,
    *,
    noise: Noise = "value",
    u_value: ArrayLike | None = None,
    u_reading: ArrayLike | None = None,
    relative: bool = False,
    exclude: Mapping[int, str] | None = None,
    **options: Any,
) -> Fit:
    """Fit ``family`` to calibration points by (weighted) least squares.

    Parameters
    ----------
    family : name in ``FAMILIES`` (see the family table in DEVELOPERS.md).
    reading : what the unit outputs (ADC counts, ohms, mV, ...), one entry per point.
    value : the reference value of the physical quantity (mm, degC, N, ...), same length.
    noise : ``"value"`` or ``"reading"``: where the scatter is, when no uncertainties are given
        (see the module docstring). The covariance is then estimated from the residuals.
    u_value, u_reading : standard uncertainties of each value (value units) and each reading
        (reading units), scalars or one per point. With either, the covariance is absolute
        (``sigma_source="given"``) and ``noise`` is ignored.
    relative : with ``relative=True`` the given uncertainties are relative weights only: their
        scale is estimated from the residuals (``sigma_source="residuals"``; the covariance and
        a new observation's noise are scaled by ``Fit.scale``), as weighted least squares does
        when only the ratios of the point uncertainties are known.
    exclude : point index -> reason, for points a user has excluded; kept in ``Fit.excluded``.
    **options : family options, e.g. ``degree=3`` for ``polynomial``; unknown names are an error.

    Families that can fold back (``inverse_offset``) also exclude, with a stated reason, the
    points beyond a detected turnover. Raises ``BadInput``/``TooFewPoints`` for unusable input and
    ``SingularFit`` when the points do not determine the parameters.

    Two optional family hooks: ``bind_options(reading, value, options) -> dict`` completes the
    options from the used points once the exclusions are known (a table's knots; whether
    ``callendar_van_dusen`` fits C); the result is what ``Fit.options`` records. A family with
    ``interpolates = True`` (``table``) may have as many parameters as used points (dof 0) when
    u_value / u_reading are given; otherwise every family needs one point more than parameters.
    """
    fam = get_family(family)
    opts = fam.check_options(options)
    r, v = _as_points(reading, value)
    if noise not in ("value", "reading"):
        raise BadInput(f"noise must be 'value' or 'reading', not {noise!r}")
    given_v = _uncertainty("u_value", u_value, r.shape)
    given_r = _uncertainty("u_reading", u_reading, r.shape)
    weighted = given_v is not None or given_r is not None
    if relative and not weighted:
        raise BadInput("relative=True needs u_value and/or u_reading to weight the points")
    source: SigmaSource = "given" if weighted and not relative else "residuals"
    if weighted:
        u_v = given_v if given_v is not None else np.zeros_like(r)
        u_r = given_r if given_r is not None else np.zeros_like(r)
        noise = "reading" if given_v is None else "value"
    else:
        u_v = np.ones_like(r) if noise == "value" else np.zeros_like(r)
        u_r = np.ones_like(r) if noise == "reading" else np.zeros_like(r)

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

    bind = getattr(fam, "bind_options", None)
    if bind is not None:  # options that depend on the used points (e.g. a table's knots)
        opts = dict(bind(r[used], v[used], opts))
    names = fam.param_names(opts)
    interpolates = bool(getattr(fam, "interpolates", False))
    needed = max(len(names), 2) if interpolates and source == "given" else len(names) + 1
    if used.sum() < needed:
        if interpolates and used.sum() >= max(len(names), 2):
            raise TooFewPoints(
                f"{family} passes through its points: {int(used.sum())} points without repeated "
                f"readings give {len(names)} parameters and no residual to estimate the "
                "uncertainty from; repeat some readings, or state u_value / u_reading"
            )
        raise TooFewPoints(
            f"{family} has {len(names)} parameters and needs at least "
            f"{len(names) + 1} usable points; got {int(used.sum())}"
        )
    ru, vu = r[used], v[used]
    if np.ptp(ru) == 0:
        raise BadInput("all usable readings are equal: the curve cannot be determined")

    sol, wu = _solve_weighted(fam, opts, ru, vu, u_v[used], u_r[used])
    resid_all = v - fam.evaluate(sol.params, r, opts)
    if direction_of(fam) == "reading_from_value":
        fit_space = ru - np.asarray(fam.reading_of(sol.params, vu, opts))  # type: ignore[attr-defined]
    else:
        fit_space = resid_all[used]
    dof = int(used.sum()) - len(names)
    scale = float(np.sqrt(np.sum(wu * fit_space**2) / dof)) if dof else 0.0
    rse = float(np.sqrt(np.sum(resid_all[used] ** 2) / dof)) if dof else 0.0
    if not weighted:
        cov = sol.cov_unscaled * scale**2
        noise_v, noise_r = (scale, 0.0) if noise == "value" else (0.0, scale)
    else:
        factor = scale if relative else 1.0
        cov = sol.cov_unscaled * factor**2
        noise_v = factor * float(np.sqrt(np.mean(u_v[used] ** 2)))
        noise_r = factor * float(np.sqrt(np.mean(u_r[used] ** 2)))
    weights = np.zeros_like(r)
    weights[used] = wu
    result = Fit(
        family=family,
        options=opts,
        params=dict(zip(names, (float(p) for p in sol.params), strict=True)),
        covariance=_frozen(cov),
        dof=dof,
        rse=rse,
        scale=scale,
        sigma_source=source,
        noise=noise,
        noise_value_sd=noise_v,
        noise_reading_sd=noise_r,
        reading=_frozen(r),
        value=_frozen(v),
        used=_frozen(used, dtype=bool),
        weights=_frozen(weights),
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
    """Fit the same family to many units' points; the same results as ``fit`` one by one.

    Vectorised across units where the family and options allow (see ``shared.batch``), ``fit``
    unit by unit otherwise. ``options`` are ``fit``'s keywords and the family's options. A unit
    ``fit`` cannot fit raises its error, the message starting with the unit's index.
    """
    from shared.batch import fit_many as batched  # imported here: shared.batch uses this module

    return batched(family, datasets, **options)
