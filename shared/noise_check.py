"""Which noise model do the points support: the scatter in the value or in the reading?

Test (a likelihood comparison, our own wording of a standard idea): both models describe each
residual e_i = v_i - f(r_i) of their own fit as normal with variance s^2 w_i, where w_i = 1
when the scatter is in the value and w_i = f'(r_i)^2 (the reading's noise carried through the
curve's slope) when it is in the reading. With s^2 at its maximum-likelihood value
sum(e_i^2 / w_i) / n, the log-likelihood of the n used points is

    log L = -n/2 (log(2 pi s^2) + 1) - 1/2 sum log w_i.

Each model is fitted by ``fit`` (noise="value", noise="reading"), both have the same number of
parameters, so the larger log-likelihood is the better-supported model (as AIC would judge it);
a difference below ``DECISIVE`` (2, i.e. a likelihood ratio under e^2 ~ 7.4) is "either": the
points do not tell the two apart (always so for a straight line, whose slope is constant).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np

from shared.fitting import Fit

Verdict = Literal["value", "reading", "either"]
DECISIVE = 2.0  # difference of log-likelihoods from which one model is preferred


@dataclass(frozen=True, slots=True)
class NoiseCheck:
    """The two models' log-likelihoods, which the points support, and the setting used."""

    setting: str  # the noise model the fit used
    supported: Verdict
    loglik_value: float | None  # None: that model could not be fitted
    loglik_reading: float | None

    @property
    def disagrees(self) -> bool:
        """The points clearly support the other model than the one the fit used."""
        return self.supported not in ("either", self.setting)

    def to_dict(self) -> dict[str, Any]:
        return {
            "setting": self.setting,
            "supported": self.supported,
            "loglik_value": self.loglik_value,
            "loglik_reading": self.loglik_reading,
            "disagrees": self.disagrees,
            "test": "log-likelihood, noise in the value against noise in the reading; "
            f"a difference of {DECISIVE:g} or more decides",
        }

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> NoiseCheck:
        return cls(
            setting=str(d["setting"]),
            supported=d["supported"],
            loglik_value=d.get("loglik_value"),
            loglik_reading=d.get("loglik_reading"),
        )


def log_likelihood(result: Fit) -> float:
    """log L of the fit's used points under its own noise model (see the module docstring)."""
    used = result.used
    e = np.asarray(result.residuals)[used]
    n = e.size
    if result.noise == "reading":
        w = np.asarray(result.slope(np.asarray(result.reading)[used]), dtype=float) ** 2
    else:
        w = np.ones(n)
    s2 = float(np.sum(e * e / w) / n)
    if not (s2 > 0 and np.all(w > 0) and np.all(np.isfinite(w))):
        return float("inf") if s2 == 0 else float("nan")
    return float(-0.5 * n * (np.log(2.0 * np.pi * s2) + 1.0) - 0.5 * np.sum(np.log(w)))


def compare(value_fit: Fit | None, reading_fit: Fit | None, setting: str) -> NoiseCheck:
    """The check from the two fits (either may be None: it could not be fitted)."""
    lv = log_likelihood(value_fit) if value_fit is not None else None
    lr = log_likelihood(reading_fit) if reading_fit is not None else None
    supported: Verdict = "either"
    if lv is not None and lr is not None and np.isfinite(lv) and np.isfinite(lr):
        if lv - lr >= DECISIVE:
            supported = "value"
        elif lr - lv >= DECISIVE:
            supported = "reading"
    return NoiseCheck(setting=setting, supported=supported, loglik_value=lv, loglik_reading=lr)


def check_noise(result: Fit) -> NoiseCheck:
    """Fit the same family, options and used points with the other noise model and compare.

    Fits with given uncertainties (``sigma_source="given"``) are not checked ("either").
    """
    return check_noise_many([result])[0]


def check_noise_many(results: Sequence[Fit]) -> list[NoiseCheck]:
    """``check_noise`` of each fit, the other model fitted to all of them at once (``fit_each``,
    batched by family, options and the points a user excluded; fold-back is found again)."""
    from shared.batch import fit_each  # imported here: shared.batch uses shared.fitting

    out: list[NoiseCheck | None] = [None] * len(results)
    groups: dict[tuple[Any, ...], list[int]] = {}
    for i, result in enumerate(results):
        if result.sigma_source == "given":
            out[i] = NoiseCheck(result.noise, "either", None, None)
            continue
        user = tuple((j, why) for j, why in result.excluded if not str(why).startswith("fold-back"))
        options = tuple(sorted(_fit_options(result).items(), key=lambda kv: kv[0]))
        key = (result.family, repr(options), user, result.noise)
        groups.setdefault(key, []).append(i)
    for (family, _, user, noise), members in groups.items():
        other = "reading" if noise == "value" else "value"
        first = results[members[0]]
        alts = fit_each(
            family,
            [(results[i].reading, results[i].value) for i in members],
            noise=other,
            exclude=dict(user),
            **_fit_options(first),
        )
        for i, alt in zip(members, alts, strict=True):
            alt_fit = alt if isinstance(alt, Fit) else None
            mine = results[i]
            pair = (mine, alt_fit) if mine.noise == "value" else (alt_fit, mine)
            out[i] = compare(pair[0], pair[1], mine.noise)
    return [c for c in out if c is not None]


def _fit_options(result: Fit) -> dict[str, Any]:
    """The family options to refit with: those a family binds from the points (a table's knots)
    are left for it to bind again."""
    return {k: v for k, v in result.options.items() if k in _settable(result.family)}


def _settable(family: str) -> set[str]:
    from shared.families import get_family

    return set(get_family(family).options)
