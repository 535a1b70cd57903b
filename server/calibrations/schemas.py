"""Request and response shapes for calibration sessions, points, fits and decisions."""

from __future__ import annotations

from datetime import date, datetime
from typing import Annotated, Any, Literal

from pydantic import (
    AwareDatetime,
    BaseModel,
    ConfigDict,
    Field,
    StringConstraints,
    ValidationInfo,
    field_validator,
    model_validator,
)

from server.calibrations.models import SessionKind
from server.flags.schemas import FlagRead

Text64 = Annotated[str, StringConstraints(strip_whitespace=True, min_length=1, max_length=64)]
Text128 = Annotated[str, StringConstraints(strip_whitespace=True, min_length=1, max_length=128)]


# the largest magnitude a point may have: far beyond any sensor's range in any unit, and small
# enough that the fits' squares and products of it stay finite in double precision
POINT_MAGNITUDE = 1e15


class PointIn(BaseModel):
    model_config = ConfigDict(extra="forbid")

    reference_value: float = Field(
        allow_inf_nan=False,
        ge=-POINT_MAGNITUDE,
        le=POINT_MAGNITUDE,
        description="reference, value units",
    )
    reading: float = Field(
        allow_inf_nan=False,
        ge=-POINT_MAGNITUDE,
        le=POINT_MAGNITUDE,
        description="what the unit read",
    )
    excluded: bool = False
    exclude_reason: str | None = Field(None, max_length=500)
    sd: float | None = Field(
        None,
        ge=0,
        allow_inf_nan=False,
        description="when the reading is the mean of several samples: their standard deviation, "
        "reading units",
    )
    n: int | None = Field(None, ge=1, description="how many samples that mean has")
    rejected: int | None = Field(None, ge=0, description="samples left out as spikes")


class CalibrationCreate(BaseModel):
    """One calibration session: who, when, against what, and the points."""

    model_config = ConfigDict(extra="forbid")

    performed_at: AwareDatetime
    operator: Text64
    reference: Text128 | None = Field(
        None,
        description="the reference instrument or jig used, as free text (labs without a "
        "register); give this or reference_standard",
    )
    reference_standard: Text64 | None = Field(
        None,
        validate_default=True,
        description="the name of a standard of the register (instead of reference): its U and "
        "k are used; a session performed after its due date, or after a check found it out of "
        "tolerance, is stored but does not pass",
    )
    kind: SessionKind = SessionKind.periodic
    family: str | None = Field(
        None,
        description="one of the type's families; default: the one the ranking recommends "
        "(every family of the type is fitted and ranked by AICc)",
    )
    ambient: str | None = Field(None, max_length=128, description="e.g. 22 degC, 45 %RH")
    notes: str | None = Field(None, max_length=2000)
    reference_expanded_u: float | None = Field(
        None,
        gt=0,
        allow_inf_nan=False,
        description="expanded uncertainty U of the reference standard, value units (type B)",
    )
    reference_k: float = Field(
        2.0, gt=0, le=10, allow_inf_nan=False, description="coverage factor of that U"
    )
    extra_u: float | None = Field(
        None,
        gt=0,
        allow_inf_nan=False,
        description="one more stated standard uncertainty, value units (type B)",
    )
    extra_label: str | None = Field(
        None,
        max_length=128,
        validate_default=True,
        description="what extra_u is, e.g. 'target alignment'; needed with extra_u",
    )
    points: list[PointIn] = Field(min_length=2, max_length=100_000)

    @field_validator("reference_standard")
    @classmethod
    def _a_reference_is_named(cls, name: str | None, info: ValidationInfo) -> str | None:
        if "reference" not in info.data:  # reference itself was invalid; that error is reported
            return name
        if name is None and info.data["reference"] is None:
            raise ValueError(
                "say what the unit was calibrated against: reference_standard (a standard of "
                "the register) or reference (free text)"
            )
        return name

    @field_validator("extra_label")
    @classmethod
    def _label_goes_with_extra_u(cls, label: str | None, info: ValidationInfo) -> str | None:
        label = (label or "").strip() or None
        if "extra_u" not in info.data:  # extra_u itself was invalid; that error is reported
            return label
        if info.data["extra_u"] is not None and label is None:
            raise ValueError("needed with an extra standard uncertainty (extra_u)")
        if info.data["extra_u"] is None and label is not None:
            raise ValueError("given without a value: give the extra standard uncertainty (extra_u)")
        return label


class PointRead(BaseModel):
    reference_value: float
    reading: float
    repeat_index: int
    used: bool
    excluded_reason: str | None
    residual: float
    sd: float | None = Field(None, description="SD of the samples averaged, reading units")
    n: int | None = Field(None, description="samples averaged into the reading")
    rejected: int | None = Field(None, description="samples left out as spikes")
    suspect_reason: str | None = Field(
        None, description="why the point is suspect (flagged, still used); None when it is not"
    )


class FitRead(BaseModel):
    family: str
    formula: str
    options: dict[str, Any]
    params: dict[str, float]
    stderr: dict[str, float]
    covariance: list[list[float]]
    rse: float
    dof: int
    sigma_source: str
    noise: str = Field(description="where the scatter was taken to be: 'value' or 'reading'")
    valid_range: tuple[float, float]
    monotone: bool
    engine_version: str
    fitted_at: datetime


class DecisionRead(BaseModel):
    passed: bool
    rule: str
    reasons: list[str]
    worst_error: float
    worst_error_at: float
    allowed_at_worst: float
    max_expanded_uncertainty: float
    tur_required: float
    tur_achieved: float
    tolerance_used_pct: float | None = Field(
        default=None,
        description="the point closest to its limit uses this share of its tolerance, in % "
        "(100 |worst_error| / allowed_at_worst); the point is the one with the largest share. "
        "Decisions stored before it was recorded: computed from their worst point.",
    )

    decision_rule: str = Field(
        "simple", description="'simple' or 'guarded' acceptance (ILAC-G8:2019)"
    )
    guard_multiple: float | None = Field(None, description="r of the guard band w = r U")
    guard_band_at_worst: float | None = Field(
        None, description="the guard band w at the point closest to its limit (guarded)"
    )
    acceptance_limit_at_worst: float | None = None
    false_accept_risk: float | None = Field(
        None,
        description="for a unit that passed: the largest specific probability (normal model, "
        "JCGM 106:2012) that a judged point is in fact outside its tolerance",
    )
    false_accept_at: float | None = Field(None, description="the reference value where it is")

    @model_validator(mode="after")
    def _share_of_older_decisions(self) -> DecisionRead:
        if self.tolerance_used_pct is None and self.allowed_at_worst > 0:
            self.tolerance_used_pct = 100.0 * abs(self.worst_error) / self.allowed_at_worst
        return self


class NoiseCheckRead(BaseModel):
    """shared.noise_check: log-likelihood of noise in the value against noise in the reading."""

    setting: str = Field(description="the type's noise_in the fit used")
    supported: Literal["value", "reading", "either"]
    loglik_value: float | None
    loglik_reading: float | None
    disagrees: bool = Field(description="the points clearly support the other setting")
    test: str


class CandidateRead(BaseModel):
    """One family of the ranking; ``error`` says why it could not be fitted (criteria None)."""

    family: str
    options: dict[str, Any]
    label: str
    n_params: int
    rss: float | None
    aic: float | None
    aicc: float | None
    bic: float | None
    delta_aicc: float | None
    monotone: bool | None
    error: str | None


class RankingRead(BaseModel):
    """Every family of the type fitted to the same points, by AICc (shared.ranking)."""

    recommended: str | None = Field(description="label of the recommended candidate, if any")
    reason: str
    candidates: list[CandidateRead]
    chosen: str = Field(description="label of the candidate stored as this calibration's fit")
    chosen_because: Literal["requested", "recommended", "fallback"] = Field(
        description="requested: the session named the family; recommended: the ranking's "
        "choice; fallback: nothing was recommended, so the type's first family that fitted"
    )


class SuspectRead(BaseModel):
    """A point whose externally studentised residual is beyond the Bonferroni limit."""

    index: int = Field(description="position of the point in the session, from 0")
    t: float
    reason: str


class LackOfFitRead(BaseModel):
    """Pure error against lack of fit, from repeated reference values (5 % level)."""

    groups: int
    ss_pure_error: float
    dof_pure_error: int
    ss_lack_of_fit: float
    dof_lack_of_fit: int
    f: float
    p_value: float
    repeatability_fit_space: float
    significant: bool


class BudgetRowRead(BaseModel):
    source: str
    kind: Literal["A", "B"]
    distribution: str
    u: float = Field(description="standard uncertainty in ``unit``")
    unit: str
    sensitivity: float = Field(description="value units per ``unit``")
    contribution: float = Field(description="|sensitivity| u, value units")
    dof: float | None = Field(description="degrees of freedom; None for infinitely many")


class BudgetRead(BaseModel):
    """GUM uncertainty budget of the value converted from one new reading (shared.budget)."""

    reading: float
    value: float
    value_unit: str
    reading_unit: str
    rows: list[BudgetRowRead]
    u: float = Field(description="combined standard uncertainty, value units")
    dof_eff: float | None = Field(description="Welch-Satterthwaite; None for infinitely many")
    k: float
    expanded: float = Field(description="U = k u, value units")
    level: float


class FitHistoryRead(BaseModel):
    """One of a session's fits: the first when it was saved, then one per refit."""

    id: int
    family: str
    passed: bool
    current: bool
    engine_version: str
    fitted_at: datetime


class CalibrationSummaryRead(BaseModel):
    """A calibration session in a unit's history (GET .../calibrations/{id} has the rest)."""

    id: int
    performed_at: datetime
    kind: SessionKind
    operator: str
    reference: str
    recorded_by: str | None
    family: str | None = Field(description="of the current fit")
    passed: bool | None = Field(description="the current fit's decision")
    current: bool = Field(description="the unit's current calibration")
    voided: bool
    void_reason: str | None
    fits: int = Field(description="how many fits the session has had (refits add one each)")


class CalibrationPreviewRead(BaseModel):
    """What saving these points would store (fit and decision), with nothing stored."""

    unit: str
    sensor_type: str
    value_unit: str
    reading_unit: str
    points: int
    family: str
    formula: str
    params: dict[str, float]
    stderr: dict[str, float]
    rse: float
    dof: int
    valid_range: tuple[float, float]
    monotone: bool
    excluded: list[str] = Field(description="points the fit left out, with the reason")
    decision: DecisionRead
    ranking: RankingRead
    suspects: list[SuspectRead]


class CalibrationRead(BaseModel):
    id: int
    unit: str
    sensor_type: str
    performed_at: datetime
    operator: str
    reference: str
    reference_standard: str | None = Field(
        None, description="the register's standard named by the session (its name is reference)"
    )
    reference_standard_problem: str | None = Field(
        None, description="why that standard could not vouch for the session (it then fails)"
    )
    reference_expanded_u: float | None
    reference_k: float
    extra_u: float | None
    extra_label: str | None
    kind: SessionKind
    ambient: str | None
    notes: str | None
    recorded_by: str | None
    voided: bool
    voided_at: datetime | None = None
    voided_by: str | None = None
    void_reason: str | None = None
    points: list[PointRead]
    fit: FitRead
    decision: DecisionRead
    ranking: RankingRead | None = Field(
        description="None for calibrations stored before rankings were kept"
    )
    suspects: list[SuspectRead]
    lack_of_fit: LackOfFitRead | None = Field(description="None when no reference value repeats")
    noise_check: NoiseCheckRead | None = Field(
        None, description="which noise model the points support; None for fits stored earlier"
    )
    budget: BudgetRead = Field(
        description="at the middle of the valid range, or at the reading asked for"
    )
    fit_history: list[FitHistoryRead] = Field(
        default_factory=list, description="every fit of the session, oldest first"
    )
    flags: list[FlagRead] = Field(
        default_factory=list,
        description="the unit's open flags after this calibration (on a calibration just "
        "saved and on the current calibration; empty on older ones)",
    )


class CurrentCalibrationRead(BaseModel):
    unit: str
    due_on: date | None
    calibration: CalibrationRead


class VoidCreate(BaseModel):
    """Why a calibration session is void (it is kept, and no longer counts)."""

    model_config = ConfigDict(extra="forbid")

    reason: str = Field(min_length=1, max_length=2000)


class RefitProblemRead(BaseModel):
    session_id: int
    unit: str
    performed_at: datetime
    reason: str


class JobRead(BaseModel):
    """A background job: a refit of a sensor type (``done`` of ``total`` sessions fitted so
    far), a fleet comparison of a type, or an overdue sweep."""

    id: int
    kind: Literal["refit", "fleet", "overdue_sweep"] = "refit"
    sensor_type: str | None
    state: str = Field(description="queued, running, done or failed")
    reason: str = Field(description="why the job runs")
    requested_by: str | None
    done: int
    total: int
    refitted: int = Field(description="sessions that got a new current fit")
    changed_decisions: int = Field(description="of those, how many now pass/fail differently")
    problems: list[RefitProblemRead] = Field(
        description="sessions that could not be refitted; their previous fit stays current"
    )
    message: str | None
    created_at: datetime
    started_at: datetime | None
    finished_at: datetime | None


class HistoryProblemRead(BaseModel):
    """A row (or a session, at its first line) of a history file that was not stored."""

    line: int = Field(description="line number in the file (the header is line 1)")
    session_lines: str = Field(description="the lines of its session, e.g. '12-26'")
    serial: str
    performed_at: str = Field(description="as written in the file")
    reason: str


class HistoryImportRead(BaseModel):
    """What an import of a history file did."""

    source: str
    rows: int = Field(description="data rows read")
    sessions: int = Field(description="sessions in the file")
    stored: int
    points: int = Field(description="points stored")
    skipped: int = Field(description="sessions stored already (the same file imported before)")
    rejected: int = Field(description="sessions not stored because of a problem")
    rejected_rows: int
    units_created: list[str]
    flag_types: list[str] = Field(description="sensor types whose flags were recomputed")
    problems: list[HistoryProblemRead]
    summary: str
