"""Run a calibration: store the session and its points, fit server-side, judge, keep the fit.

Every family the sensor type lists is fitted to the same points and ranked (shared.ranking); the
stored fit is the family the session asked for, else the ranking's recommendation. The ranking,
the suspect points and the lack-of-fit test are stored with the fit; the uncertainty budget is
computed on read from the stored fit and the session's type B inputs (nothing is refitted).
"""

from __future__ import annotations

import dataclasses
from collections import defaultdict
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np

import shared
from server.audit import service as audit
from server.calibrations.models import (
    CalibrationSession,
    FitRecord,
    Point,
    latest_session,
    stored_fit,
)
from server.calibrations.schemas import (
    BudgetRead,
    BudgetRowRead,
    CalibrationCreate,
    CalibrationPreviewRead,
    CalibrationRead,
    CalibrationSummaryRead,
    CurrentCalibrationRead,
    DecisionRead,
    FitHistoryRead,
    FitRead,
    LackOfFitRead,
    NoiseCheckRead,
    PointIn,
    PointRead,
    RankingRead,
    SuspectRead,
)
from server.db import utcnow
from server.errors import Conflict, Invalid, NotFound
from server.fleet.models import NoiseIn, SensorType, Unit
from server.fleet.service import due_on
from server.standards.service import Named, resolve_for_session
from shared.budget import TypeB, budget
from shared.diagnostics import lack_of_fit, suspect_points
from shared.fitting import Noise
from shared.noise_check import NoiseCheck, check_noise, check_noise_many
from shared.ranking import Candidate, Ranking, rank, rank_many

ChosenBecause = Literal["requested", "recommended", "fallback"]


@dataclass(frozen=True, slots=True)
class Outcome:
    """A fit and everything judged about it, before anything is stored."""

    fit: shared.Fit
    decision: shared.Decision
    ranking: dict[str, Any]  # Ranking.to_dict() plus "chosen" and "chosen_because"
    diagnostics: dict[str, Any]  # {"suspects": [...], "lack_of_fit": {...} | None}
    noise_check: dict[str, Any] | None = None  # shared.noise_check.NoiseCheck.to_dict()


def check_family(sensor_type: SensorType, family: str | None) -> None:
    """A requested family must be one of the type's."""
    if family is not None and family not in sensor_type.families:
        raise Invalid(
            f"{sensor_type.name} units are fitted with "
            f"{', '.join(sensor_type.families)}; not {family!r}",
            field="family",
        )


def candidates_of(sensor_type: SensorType) -> list[tuple[str, dict[str, Any]]]:
    """The type's families with their options, in the type's order."""
    return [(name, dict(sensor_type.family_options.get(name, {}))) for name in sensor_type.families]


def choose(
    sensor_type: SensorType, ranking: Ranking, family: str | None
) -> tuple[Candidate, ChosenBecause]:
    """The requested family, else the recommended one, else the type's first that fitted."""
    by_family = {c.family: c for c in ranking.candidates}
    if family is not None:
        requested = by_family[family]
        if requested.fit is None:
            raise Invalid(f"cannot fit {family}: {requested.error}", field="points")
        return requested, "requested"
    if ranking.recommended is not None:
        return ranking.recommended, "recommended"
    for name in sensor_type.families:
        if by_family[name].fit is not None:
            return by_family[name], "fallback"
    raise Invalid(
        "; ".join(f"cannot fit {c.family}: {c.error}" for c in ranking.candidates),
        field="points",
    )


def type_b_of(
    sensor_type: SensorType,
    reference_expanded_u: float | None,
    reference_k: float,
    extra_u: float | None,
    extra_label: str | None,
) -> TypeB:
    """The type B inputs of a session: its reference standard and extra term, the type's
    reading resolution."""
    return TypeB(
        reference_expanded=reference_expanded_u,
        reference_k=reference_k,
        resolution=sensor_type.reading_resolution,
        extra_u=extra_u,
        extra_label=extra_label or "stated extra term",
    )


def diagnostics_of(result: shared.Fit) -> dict[str, Any]:
    """Suspect points and the lack-of-fit test, as plain JSON."""
    found = lack_of_fit(result)
    return {
        "suspects": [
            {"index": s.index, "t": s.t, "reason": s.reason} for s in suspect_points(result)
        ],
        "lack_of_fit": (
            None
            if found is None
            else {**dataclasses.asdict(found), "significant": found.significant}
        ),
    }


def _exclusions(points: Sequence[PointIn]) -> dict[int, str]:
    exclude = {}
    for i, p in enumerate(points):
        if p.excluded:
            if not (p.exclude_reason and p.exclude_reason.strip()):
                raise Invalid(
                    "an excluded point needs a reason", field=f"points.{i}.exclude_reason"
                )
            exclude[i] = p.exclude_reason.strip()
    return exclude


def fit_points(
    sensor_type: SensorType,
    points: Sequence[PointIn],
    family: str | None,
    type_b: TypeB | None = None,
) -> Outcome:
    """Rank the type's families on the points, keep one, judge it; nothing is stored."""
    check_family(sensor_type, family)
    exclude = _exclusions(points)
    ranking = rank(
        candidates_of(sensor_type),
        [p.reading for p in points],
        [p.reference_value for p in points],
        exclude=exclude,
        noise=NoiseIn(sensor_type.noise_in).value,
    )
    return judge(sensor_type, ranking, family, type_b)


def fit_many_points(
    sensor_type: SensorType,
    datasets: Sequence[tuple[Sequence[float], Sequence[float]]],
    type_bs: Sequence[TypeB | None],
) -> list[Outcome | Invalid]:
    """``fit_points`` of many sessions of one type at once, each given as (readings, reference
    values) with no excluded points and no requested family: the type's families are ranked
    on all of them together (``shared.ranking.rank_many``, batched by family), then each is
    judged as ``fit_points`` judges it. A session that cannot be fitted gets its Invalid in its
    place; nothing is stored."""
    rankings = rank_many(
        candidates_of(sensor_type), datasets, noise=NoiseIn(sensor_type.noise_in).value
    )
    chosen: list[shared.Fit | None] = []
    for ranking in rankings:
        try:
            kept = choose(sensor_type, ranking, None)[0].fit
        except Invalid:
            kept = None
        chosen.append(kept)
    fitted = [f for f in chosen if f is not None]
    checks = iter(check_noise_many(fitted))  # the other noise model for all at once
    found: list[Outcome | Invalid] = []
    for ranking, type_b, kept in zip(rankings, type_bs, chosen, strict=True):
        try:
            check = next(checks) if kept is not None else None
            found.append(judge(sensor_type, ranking, None, type_b, check))
        except Invalid as exc:
            found.append(exc)
    return found


def judge(
    sensor_type: SensorType,
    ranking: Ranking,
    family: str | None,
    type_b: TypeB | None,
    noise_check: NoiseCheck | None = None,
) -> Outcome:
    """Keep one fit of the ranking (``choose``) and judge it against the type's tolerance."""
    chosen, because = choose(sensor_type, ranking, family)
    assert chosen.fit is not None  # choose() only returns candidates that were fitted
    result = chosen.fit
    decision = shared.decide(
        result,
        sensor_type.tolerance_abs,
        sensor_type.tolerance_rel,
        tur=sensor_type.tur,
        unit=sensor_type.value_unit,
        reading_unit=sensor_type.reading_unit,
        type_b=type_b,
        rule_kind="guarded" if sensor_type.decision_rule == "guarded" else "simple",
        guard_multiple=sensor_type.guard_multiple,
    )
    return Outcome(
        fit=result,
        decision=decision,
        ranking={**ranking.to_dict(), "chosen": chosen.label, "chosen_because": because},
        diagnostics=diagnostics_of(result),
        noise_check=(noise_check or check_noise(result)).to_dict(),
    )


def preview_read(unit: Unit, data: CalibrationCreate) -> CalibrationPreviewRead:
    """``fit_points`` of a session's points for the API's preview; nothing is stored."""
    sensor_type = unit.sensor_type
    outcome = fit_points(
        sensor_type,
        data.points,
        data.family,
        type_b_of(
            sensor_type, data.reference_expanded_u, data.reference_k, data.extra_u, data.extra_label
        ),
    )
    result = outcome.fit
    return CalibrationPreviewRead(
        unit=unit.serial,
        sensor_type=sensor_type.name,
        value_unit=sensor_type.value_unit,
        reading_unit=sensor_type.reading_unit,
        points=len(data.points),
        family=result.family,
        formula=shared.get_family(result.family).formula,
        params=dict(result.params),
        stderr=result.stderr,
        rse=result.rse,
        dof=result.dof,
        valid_range=result.valid_range,
        monotone=result.monotone,
        excluded=[f"point {i + 1}: {reason}" for i, reason in result.excluded],
        decision=DecisionRead.model_validate(outcome.decision.to_dict()),
        ranking=RankingRead(**outcome.ranking),
        suspects=[SuspectRead(**s) for s in outcome.diagnostics["suspects"]],
    )


def repeat_indices(values: list[float]) -> list[int]:
    """0, 1, 2... for each repeated reading at the same reference value, in entry order."""
    seen: dict[float, int] = defaultdict(int)
    out = []
    for v in values:
        out.append(seen[v])
        seen[v] += 1
    return out


def with_standard_problem(outcome: Outcome, problem: str | None) -> Outcome:
    """The outcome failed for a reason of the session's reference standard (overdue, or found
    out of tolerance before the session), the reason added to the decision's; unchanged when
    there is none. The fit and its numbers stay as they are."""
    if problem is None:
        return outcome
    d = outcome.decision
    failed = dataclasses.replace(d, passed=False, reasons=(*d.reasons, problem))
    return dataclasses.replace(outcome, decision=failed)


def named_standard(
    session: Any, sensor_type: SensorType, data: CalibrationCreate
) -> tuple[CalibrationCreate, Named | None]:
    """The body with the register's standard filled in (its name as the reference, its U and
    k), and the standard; the body unchanged (no standard) for a free-text reference."""
    if data.reference_standard is None:
        return data, None
    named = resolve_for_session(
        session,
        data.reference_standard,
        data.performed_at,
        sensor_type.value_unit,
        reference=data.reference,
        given_u=data.reference_expanded_u,
        given_k=data.reference_k if "reference_k" in data.model_fields_set else None,
    )
    filled = data.model_copy(
        update={
            "reference": named.standard.name,
            "reference_standard": named.standard.name,
            "reference_expanded_u": named.standard.expanded_u,
            "reference_k": named.standard.k,
        }
    )
    return filled, named


def run_calibration(
    session: Any, unit: Unit, data: CalibrationCreate, recorded_by: str | None
) -> CalibrationSession:
    sensor_type = unit.sensor_type
    data, named = named_standard(session, sensor_type, data)
    problem = named.problem if named is not None else None
    inputs = type_b_of(
        sensor_type, data.reference_expanded_u, data.reference_k, data.extra_u, data.extra_label
    )
    outcome = with_standard_problem(
        fit_points(sensor_type, data.points, data.family, inputs), problem
    )
    result, decision = outcome.fit, outcome.decision
    assert data.reference is not None  # CalibrationCreate needs a reference or a standard
    record = CalibrationSession(
        unit=unit,
        performed_at=data.performed_at,
        operator=data.operator,
        reference=data.reference,
        reference_standard_id=named.standard.id if named is not None else None,
        reference_standard_problem=problem,
        reference_expanded_u=data.reference_expanded_u,
        reference_k=data.reference_k,
        extra_u=data.extra_u,
        extra_label=data.extra_label,
        kind=data.kind,
        ambient=data.ambient,
        notes=data.notes,
        recorded_by=recorded_by,
    )
    repeats = repeat_indices([p.reference_value for p in data.points])
    record.points = [
        Point(
            seq=i,
            reference_value=p.reference_value,
            reading=p.reading,
            repeat_index=repeats[i],
            excluded=p.excluded,
            exclude_reason=p.exclude_reason.strip() if p.excluded and p.exclude_reason else None,
            sample_sd=p.sd,
            sample_n=p.n,
            sample_rejected=p.rejected,
        )
        for i, p in enumerate(data.points)
    ]
    record.fits = [
        FitRecord(
            family=result.family,
            options=dict(result.options),
            result=result.to_dict(),
            decision=decision.to_dict(),
            ranking=outcome.ranking,
            diagnostics=outcome.diagnostics,
            noise_check=outcome.noise_check,
            passed=decision.passed,
            is_current=True,
            engine_version=result.engine_version,
        )
    ]
    session.add(record)
    session.flush()
    audit.record(
        session,
        recorded_by,
        "calibration.saved",
        "unit",
        unit.serial,
        f"calibration of {record.performed_at:%Y-%m-%d} ({record.kind.value.replace('_', ' ')}) "
        f"saved: {result.family}, {'passed' if decision.passed else 'failed'}",
        session_id=record.id,
        performed_at=record.performed_at,
        operator=record.operator,
        reference=record.reference,
        reference_standard=named.standard.name if named is not None else None,
        family=result.family,
        passed=decision.passed,
        points=len(record.points),
        engine_version=result.engine_version,
    )
    return record


def get_session_of(unit: Unit, session_id: int) -> CalibrationSession:
    """One of the unit's calibration sessions, by id."""
    found = next((s for s in unit.sessions if s.id == session_id), None)
    if found is None:
        raise NotFound(f"unit {unit.serial!r} has no calibration {session_id}")
    return found


def void_session(session: Any, record: CalibrationSession, reason: str, who: str) -> None:
    """Mark a mistaken session void, with the reason and who; it is kept, no longer counts
    (current calibration, drift, due date, fleet statistics), and cannot be voided twice. The
    caller recomputes the type's flags."""
    text = reason.strip()
    if not text:
        raise Invalid("say why the calibration is void: a reason is needed", field="reason")
    if record.voided_at is not None:
        raise Conflict(
            f"calibration {record.id} was voided already by {record.voided_by or 'someone'} on "
            f"{record.voided_at:%Y-%m-%d %H:%M} UTC: {record.void_reason}",
            field="reason",
        )
    record.voided_at, record.void_reason, record.voided_by = utcnow(), text, who
    session.flush()
    audit.record(
        session,
        who,
        "calibration.voided",
        "unit",
        record.unit.serial,
        f"calibration of {record.performed_at:%Y-%m-%d} voided: {text}",
        session_id=record.id,
        performed_at=record.performed_at,
        reason=text,
    )


def fit_of(record: CalibrationSession) -> tuple[shared.Fit, FitRecord]:
    current = record.current_fit
    if current is None:
        raise NotFound(f"calibration {record.id} has no current fit")
    return stored_fit(record), current


def stored_diagnostics(result: shared.Fit, stored: FitRecord) -> dict[str, Any]:
    """The diagnostics kept with the fit; computed from the stored fit for older records."""
    return stored.diagnostics if stored.diagnostics is not None else diagnostics_of(result)


def middle_reading(result: shared.Fit) -> float:
    lo, hi = result.valid_range
    return (lo + hi) / 2.0


def budget_of(
    record: CalibrationSession, result: shared.Fit, reading: float | None = None
) -> BudgetRead:
    """The GUM budget of a value converted from ``reading`` (default: mid-range)."""
    sensor_type = record.unit.sensor_type
    at = middle_reading(result) if reading is None else reading
    if not bool(result.in_range(at)):
        lo, hi = result.valid_range
        raise Invalid(
            f"reading {at:g} {sensor_type.reading_unit} is outside the valid range "
            f"{lo:g} to {hi:g} {sensor_type.reading_unit}; an uncertainty budget is only "
            f"stated inside it",
            field="reading",
        )
    inputs = type_b_of(
        sensor_type,
        record.reference_expanded_u,
        record.reference_k,
        record.extra_u,
        record.extra_label,
    )
    found = budget(
        result,
        at,
        inputs,
        value_unit=sensor_type.value_unit,
        reading_unit=sensor_type.reading_unit,
    )
    return BudgetRead(
        reading=found.reading,
        value=found.value,
        value_unit=sensor_type.value_unit,
        reading_unit=sensor_type.reading_unit,
        rows=[
            BudgetRowRead(
                source=r.source,
                kind="A" if r.kind == "A" else "B",
                distribution=r.distribution,
                u=r.u,
                unit=r.unit,
                sensitivity=r.sensitivity,
                contribution=r.contribution,
                dof=r.dof if np.isfinite(r.dof) else None,
            )
            for r in found.rows
        ],
        u=found.u,
        dof_eff=found.dof_eff if np.isfinite(found.dof_eff) else None,
        k=found.k,
        expanded=found.expanded,
        level=found.level,
    )


def calibration_read(record: CalibrationSession, reading: float | None = None) -> CalibrationRead:
    result, stored = fit_of(record)
    reasons = dict(result.excluded)
    diagnostics = stored_diagnostics(result, stored)
    suspects = [SuspectRead(**s) for s in diagnostics["suspects"]]
    suspect_reasons = {s.index: s.reason for s in suspects}
    points = [
        PointRead(
            reference_value=p.reference_value,
            reading=p.reading,
            repeat_index=p.repeat_index,
            used=bool(result.used[i]),
            excluded_reason=reasons.get(i),
            residual=float(result.residuals[i]),
            sd=p.sample_sd,
            n=p.sample_n,
            rejected=p.sample_rejected,
            suspect_reason=suspect_reasons.get(i),
        )
        for i, p in enumerate(record.points)
    ]
    fit = FitRead(
        family=result.family,
        formula=shared.get_family(result.family).formula,
        options=dict(result.options),
        params=dict(result.params),
        stderr=result.stderr,
        covariance=np.asarray(result.covariance).tolist(),
        rse=result.rse,
        dof=result.dof,
        sigma_source=result.sigma_source,
        noise=result.noise,
        valid_range=result.valid_range,
        monotone=result.monotone,
        engine_version=result.engine_version,
        fitted_at=stored.created_at,
    )
    lof = diagnostics["lack_of_fit"]
    return CalibrationRead(
        id=record.id,
        unit=record.unit.serial,
        sensor_type=record.unit.sensor_type.name,
        performed_at=record.performed_at,
        operator=record.operator,
        reference=record.reference,
        reference_standard=record.reference if record.reference_standard_id is not None else None,
        reference_standard_problem=record.reference_standard_problem,
        reference_expanded_u=record.reference_expanded_u,
        reference_k=record.reference_k,
        extra_u=record.extra_u,
        extra_label=record.extra_label,
        kind=record.kind,
        ambient=record.ambient,
        notes=record.notes,
        recorded_by=record.recorded_by,
        voided=record.voided_at is not None,
        voided_at=record.voided_at,
        voided_by=record.voided_by,
        void_reason=record.void_reason,
        points=points,
        fit=fit,
        decision=DecisionRead(**stored.decision),
        ranking=RankingRead(**stored.ranking) if stored.ranking is not None else None,
        suspects=suspects,
        lack_of_fit=LackOfFitRead(**lof) if lof is not None else None,
        noise_check=NoiseCheckRead(**stored.noise_check) if stored.noise_check else None,
        budget=budget_of(record, result, reading),
        fit_history=[
            FitHistoryRead(
                id=f.id,
                family=f.family,
                passed=f.passed,
                current=f.is_current,
                engine_version=f.engine_version,
                fitted_at=f.created_at,
            )
            for f in record.fits
        ],
    )


def summary_read(
    record: CalibrationSession, current: CalibrationSession | None
) -> CalibrationSummaryRead:
    """A session as a line of the unit's history."""
    stored = record.current_fit
    return CalibrationSummaryRead(
        id=record.id,
        performed_at=record.performed_at,
        kind=record.kind,
        operator=record.operator,
        reference=record.reference,
        recorded_by=record.recorded_by,
        family=stored.family if stored else None,
        passed=stored.passed if stored else None,
        current=current is not None and record.id == current.id,
        voided=record.voided_at is not None,
        void_reason=record.void_reason,
        fits=len(record.fits),
    )


def current_calibration(unit: Unit, reading: float | None = None) -> CurrentCalibrationRead:
    last = latest_session(unit.sessions)
    if last is None:
        raise NotFound(f"unit {unit.serial!r} has no calibration yet")
    return CurrentCalibrationRead(
        unit=unit.serial, due_on=due_on(unit), calibration=calibration_read(last, reading)
    )


# -- fitting a file offline (`sensorledger fit`): no database, no sensor type ---------------------


@dataclass(frozen=True, slots=True)
class OfflineFit:
    """A fit of points from a file, with its diagnostics and, when no family was named, the
    ranking of every catalog family on the same points."""

    fit: shared.Fit
    ranking: Ranking | None
    chosen_because: str  # "requested", "recommended" or "lowest AICc (nothing recommended)"
    diagnostics: dict[str, Any]

    def to_dict(self) -> dict[str, Any]:
        """``Fit.to_dict()`` (so ``Fit.from_dict`` reads it back) plus formula, standard
        uncertainties, diagnostics and the ranking (None when a family was named)."""
        return {
            **self.fit.to_dict(),
            "formula": shared.get_family(self.fit.family).formula,
            "stderr": self.fit.stderr,
            "suspects": self.diagnostics["suspects"],
            "lack_of_fit": self.diagnostics["lack_of_fit"],
            "ranking": self.ranking.to_dict() if self.ranking else None,
            "chosen_because": self.chosen_because,
        }


def degree_option(family: str, degree: int | tuple[int, int]) -> dict[str, Any]:
    """``{"degree": ...}`` for a family that takes one, else Invalid naming --degree."""
    if "degree" not in shared.get_family(family).options:
        raise Invalid(f"{family} has no degree option", field="degree")
    return {"degree": list(degree) if isinstance(degree, tuple) else degree}


def run_offline_fit(
    points: Sequence[PointIn],
    *,
    family: str | None = None,
    degree: int | tuple[int, int] | None = None,
    noise: Noise = "value",
) -> OfflineFit:
    """Fit ``family`` (with ``degree``) to the points; without a family, rank every catalog
    family (``degree`` set where it suits: an integer for polynomial, a pair for rational) and
    keep the recommended one, else the lowest AICc. Engine errors become Invalid."""
    exclude = _exclusions(points)
    reading = [p.reading for p in points]
    value = [p.reference_value for p in points]
    try:
        if family is not None:
            options = degree_option(family, degree) if degree is not None else {}
            result = shared.fit(family, reading, value, noise=noise, exclude=exclude, **options)
            return OfflineFit(result, None, "requested", diagnostics_of(result))
        candidates: list[tuple[str, dict[str, Any]]] = []
        for name in sorted(shared.FAMILIES):
            suits = degree is not None and (
                (name == "polynomial" and isinstance(degree, int))
                or (name == "rational" and isinstance(degree, tuple))
            )
            candidates.append((name, degree_option(name, degree) if suits and degree else {}))
        ranking = rank(candidates, reading, value, exclude=exclude, noise=noise)
    except shared.CalibrationError as exc:
        raise Invalid(f"cannot fit {family or 'the points'}: {exc}", field="family") from exc
    fitted = [c for c in ranking.candidates if c.fit is not None]
    if ranking.recommended is not None:
        chosen, because = ranking.recommended, "recommended"
    elif fitted:
        chosen, because = fitted[0], "lowest AICc (nothing recommended)"
    else:
        raise Invalid(
            "no family could be fitted: "
            + "; ".join(f"{c.family}: {c.error}" for c in ranking.candidates),
            field="file",
        )
    assert chosen.fit is not None
    return OfflineFit(chosen.fit, ranking, because, diagnostics_of(chosen.fit))
