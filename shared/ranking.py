"""Model choice: fit every candidate family to the same points and rank them by AICc.

Criteria for a least-squares fit with n points, weighted residual sum of squares RSS and p
fitted parameters (additive constants dropped; Burnham & Anderson count the error variance as a
parameter, so k = p + 1):

    AIC  = n ln(RSS/n) + 2k
    AICc = AIC + 2k(k + 1)/(n - k - 1)
    BIC  = n ln(RSS/n) + k ln(n)

The recommendation is the family with the fewest parameters among the monotone fits within
delta-AICc 2 of the best (ties broken by AICc): a simpler curve that the data cannot tell from
the best one is the safer thing to put into firmware.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import ArrayLike

from shared.errors import BadInput, CalibrationError
from shared.families import get_family
from shared.fitting import Fit, fit
from shared.foldback import find_foldback

DELTA_AICC = 2.0


def information_criteria(rss: float, n: int, p: int) -> tuple[float, float, float]:
    """(AIC, AICc, BIC) with k = p + 1; AICc is +inf when n - k - 1 <= 0."""
    if rss <= 0:
        rss = np.finfo(float).tiny * n
    k = p + 1
    base = n * np.log(rss / n)
    aic = base + 2 * k
    aicc = aic + 2 * k * (k + 1) / (n - k - 1) if n - k - 1 > 0 else np.inf
    bic = base + k * np.log(n)
    return float(aic), float(aicc), float(bic)


@dataclass(frozen=True, slots=True)
class Candidate:
    """One family's fit in a ranking (``fit`` is None when it could not be made)."""

    family: str
    options: Mapping[str, Any]
    fit: Fit | None
    n_params: int
    rss: float = np.nan
    aic: float = np.nan
    aicc: float = np.nan
    bic: float = np.nan
    delta_aicc: float = np.nan
    error: str | None = None

    @property
    def label(self) -> str:
        shown = {k: v for k, v in self.options.items() if v not in (False, None)}
        extra = ", ".join(f"{k}={_option_text(v)}" for k, v in shown.items())
        return f"{self.family}({extra})" if extra else self.family


@dataclass(frozen=True, slots=True)
class Ranking:
    """Candidates by AICc (failed ones last) and the recommended one, with the reason."""

    candidates: tuple[Candidate, ...]
    recommended: Candidate | None
    reason: str
    excluded: Mapping[int, str] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        return {
            "recommended": self.recommended.label if self.recommended else None,
            "reason": self.reason,
            "candidates": [
                {
                    "family": c.family,
                    "options": dict(c.options),
                    "label": c.label,
                    "n_params": c.n_params,
                    "rss": _json(c.rss),
                    "aic": _json(c.aic),
                    "aicc": _json(c.aicc),
                    "bic": _json(c.bic),
                    "delta_aicc": _json(c.delta_aicc),
                    "monotone": c.fit.monotone if c.fit else None,
                    "error": c.error,
                }
                for c in self.candidates
            ],
        }


def _json(x: float) -> float | None:
    return float(x) if np.isfinite(x) else None


def rank(
    candidates: Sequence[tuple[str, Mapping[str, Any]]],
    reading: ArrayLike,
    value: ArrayLike,
    *,
    exclude: Mapping[int, str] | None = None,
    **fit_kwargs: Any,
) -> Ranking:
    """Fit each (family, options) to the same points and rank by AICc (see module docstring).

    Every candidate sees the same used points: when any candidate detects fold-back, its
    exclusions are applied to all, so the criteria compare like with like.
    """
    if not candidates:
        raise BadInput("rank needs at least one candidate family")
    excluded = _excluded(candidates, reading, value, exclude)
    found: list[Fit | CalibrationError] = []
    for name, options in candidates:
        opts = get_family(name).check_options(options)
        found.append(_fit_one(name, reading, value, excluded, fit_kwargs, opts))
    return _ranked(candidates, found, excluded)


def _fit_one(
    name: str,
    reading: ArrayLike,
    value: ArrayLike,
    excluded: Mapping[int, str],
    fit_kwargs: Mapping[str, Any],
    opts: Mapping[str, Any],
) -> Fit | CalibrationError:
    """One family on one dataset, or its error. With the noise in the reading, through the
    batched effective-variance fit (``shared.batch_reading``): several times faster than
    fit()'s, even for one dataset, and agreeing with it to ~1e-12 (fit_many's promise)."""
    if fit_kwargs.get("noise") == "reading":
        from shared.batch import fit_each  # imported here: shared.batch uses shared.fitting

        (one,) = fit_each(name, [(reading, value)], exclude=excluded, **fit_kwargs, **opts)
        return one
    try:
        return fit(name, reading, value, exclude=excluded, **fit_kwargs, **opts)
    except CalibrationError as exc:
        return exc


def rank_many(
    candidates: Sequence[tuple[str, Mapping[str, Any]]],
    datasets: Sequence[tuple[ArrayLike, ArrayLike]],
    **fit_kwargs: Any,
) -> list[Ranking]:
    """``rank`` of each (reading, value) dataset: the same rankings, with each family fitted to
    all the datasets at once by ``shared.batch`` (vectorised where the family allows).

    A dataset where fold-back excludes points is fitted on its own with those exclusions, as
    ``rank`` does; the results agree with ``rank`` as ``fit_many`` agrees with ``fit``.
    """
    if not candidates:
        raise BadInput("rank needs at least one candidate family")
    from shared.batch import fit_each  # imported here: shared.batch uses shared.fitting

    excluded = [_excluded(candidates, r, v, None) for r, v in datasets]
    plain = [i for i, e in enumerate(excluded) if not e]
    found: list[list[Fit | CalibrationError]] = [[] for _ in datasets]
    for name, options in candidates:
        opts = get_family(name).check_options(options)
        each: dict[int, Fit | CalibrationError] = dict(
            zip(
                plain,
                fit_each(name, [datasets[i] for i in plain], **fit_kwargs, **opts),
                strict=True,
            )
        )
        for i, (reading, value) in enumerate(datasets):
            if i not in each:
                each[i] = _fit_one(name, reading, value, excluded[i], fit_kwargs, opts)
            found[i].append(each[i])
    return [_ranked(candidates, f, e) for f, e in zip(found, excluded, strict=True)]


def _excluded(
    candidates: Sequence[tuple[str, Mapping[str, Any]]],
    reading: ArrayLike,
    value: ArrayLike,
    exclude: Mapping[int, str] | None,
) -> dict[int, str]:
    """The given exclusions plus fold-back's, when a candidate family can fold back."""
    excluded = dict(exclude or {})
    if any(get_family(name).foldback for name, _ in candidates):
        r = np.asarray(reading, dtype=float).ravel()
        v = np.asarray(value, dtype=float).ravel()
        keep = np.setdiff1d(np.arange(r.size), list(excluded))
        if r.shape == v.shape and keep.size and np.all(np.isfinite(r)) and np.all(np.isfinite(v)):
            fold = find_foldback(r[keep], v[keep])
            if fold is not None:
                excluded.update({int(keep[j]): fold.reason for j in fold.excluded})
    return excluded


def _ranked(
    candidates: Sequence[tuple[str, Mapping[str, Any]]],
    found: Sequence[Fit | CalibrationError],
    excluded: dict[int, str],
) -> Ranking:
    """The ranking of the candidates' fits (or errors), in the candidates' order."""
    scored: list[Candidate] = []
    failed: list[Candidate] = []
    for (name, options), result in zip(candidates, found, strict=True):
        fam = get_family(name)
        opts = fam.check_options(options)
        n_params = len(fam.param_names(opts))
        if isinstance(result, CalibrationError):
            failed.append(Candidate(name, opts, None, n_params, error=str(result)))
            continue
        n_params = len(result.params)  # after the family bound its options to the data
        rss = result.scale**2 * result.dof
        aic, aicc, bic = information_criteria(rss, result.n_used, n_params)
        scored.append(Candidate(name, opts, result, n_params, rss, aic, aicc, bic))
    if not scored:
        return Ranking(tuple(failed), None, "no candidate family could be fitted", excluded)
    best = min(c.aicc for c in scored)
    scored = [
        Candidate(
            c.family, c.options, c.fit, c.n_params, c.rss, c.aic, c.aicc, c.bic, c.aicc - best
        )
        for c in scored
    ]
    scored.sort(key=lambda c: (c.aicc, c.n_params))
    eligible = [
        c for c in scored if c.fit is not None and c.fit.monotone and c.delta_aicc <= DELTA_AICC
    ]
    if eligible:
        chosen = min(eligible, key=lambda c: (c.n_params, c.aicc))
        reason = (
            f"{chosen.label}: the fewest parameters ({chosen.n_params}) among the monotone "
            f"fits within delta-AICc {DELTA_AICC:g} of the best"
        )
    else:
        chosen = None
        reason = "no monotone fit within delta-AICc 2 of the best; review the points"
    return Ranking(tuple(scored + failed), chosen, reason, excluded)


def _option_text(value: Any) -> str:
    """``(2, 2)`` or ``[2, 2]`` as ``2/2``; anything else as it prints."""
    if isinstance(value, list | tuple):
        return "/".join(str(v) for v in value)
    return str(value)
