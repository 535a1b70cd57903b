"""The demo fleet: an invented teaching workshop's sensors, for `sensorledger serve --demo`.

Everything here is invented: the workshop ("Larchmoor Robot Workshop", which lends robot kits to
students), its people (first names only), the serial numbers, every sensor constant, noise level
and date. No real organisation, person or product data is used, and no constant comes from a data
sheet. The data are made in the natural direction, as a bench would record them: reference values
are chosen on a jig, each unit's true response to them is computed from its own invented constants,
noise is added and the reading is rounded the way the bench logs it. Every session then goes through
the same service as the API (`run_calibration`), so fits, decisions and fold-back exclusions are the
engine's own. Deterministic: numpy ``default_rng(SEED)`` and dates counted from ``REFERENCE_DATE``.

Sensor types (three boxes of rangefinders, two of potentiometers, two of load cells; 40 units):

- IR rangefinder 80-800 mm: 12-bit ADC counts -> mm. True response
  ``counts = k / (mm - v0) - r0`` with k about 3.2e5, r0 about 30 counts, v0 about -8 mm (a few
  percent unit to unit), times a smooth roll-off below a knee near 75 mm, so the reading peaks
  near 72 mm and falls again closer in. The jig has 40, 50 and 60 mm below the 80 mm minimum
  range: the engine's fold-back detection excludes them with a stated reason. Each reading is
  the mean of 16 ADC samples (sample noise 3 counts), rounded to a count.
- Rotary pot 300 deg: counts -> degrees, a straight line plus a small invented bow of the track.
- Load cell 200 N: mV/V -> N against dead weights loaded up then down (repeats at every level),
  with a small invented quadratic non-linearity; the type lists a degree-2 polynomial and a line,
  both are fitted and ranked, and the ranking recommends the polynomial for every unit.

In all three the scatter is in the reading (ADC or bridge noise; the jig, the indexing head and
the dead weights are far finer), so each type has ``noise_in="reading"`` and a reading resolution
(one count; the load cell's logged digit, 0.00001 mV/V). Every session records its reference
standard by name from the register (``server.standards.demo``: invented certificates, U with
k = 2): it enters the uncertainty budget and the test-uncertainty ratio. The dead-weight set
DW-20 is found out of tolerance at the end of the story: the load cells calibrated against it
since its last good check are flagged.

Units later features must find (also in ``DemoSummary``):

- ``DRIFTED_SERIAL`` (IR-2506-03): its third calibration reads 5 % fewer counts than before
  (emitter ageing): the newest curve lies tens of mm from the previous one at long range, well
  past the type's drift limit, and the previous curve applied to the new points is out of
  tolerance: it was installed in "kit 02 / left bumper" meanwhile. No other unit drifts past its
  type's limit.
- ``ODD_SERIAL`` (IR-2609-04): its k is 0.78 times its own draw, about a fifth below its siblings'
  (a different optics batch): it calibrates and passes on its own, but reads unlike the rest.
- ``QUARANTINED_SERIAL`` (POT-2603-05): a bowed track; fails its incoming calibration and is
  quarantined. ``NOISY_SERIAL`` (IR-2609-06): a noisy output fails the test-uncertainty ratio.
- ``OVERDUE_SERIAL`` (POT-2507-04): on loan with kit 04, it missed its yearly recalibration (the
  story's calendar ends on ``REFERENCE_DATE``; a few other units fall due around then).

Users: ``demo`` (admin, password ``demo``) and ``mira`` (technician, password ``demo``); both exist
only in the demo data.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass
from datetime import UTC, date, datetime, time, timedelta
from statistics import NormalDist

import numpy as np
from sqlalchemy import func, select
from sqlalchemy.orm import Session

from server.accounts import service as accounts
from server.accounts.models import Role, User
from server.calibrations.models import SessionKind
from server.calibrations.schemas import CalibrationCreate, PointIn
from server.calibrations.service import run_calibration
from server.errors import Conflict
from server.flags.models import EventKind, InstallationEvent
from server.flags.service import recompute_flags
from server.fleet import service as fleet
from server.fleet.models import NoiseIn, SensorType, Unit, UnitStatus
from server.fleet.schemas import SensorTypeCreate, UnitCreate
from server.standards.demo import REFERENCE_OF, SUSPECT, flag_suspect, register_standards

SEED = 20261120
REFERENCE_DATE = date(2026, 11, 20)  # "today" in the demo story
WORKSHOP = "Larchmoor Robot Workshop"
DEMO_PASSWORD = "demo"
ADMIN, TECHNICIAN = "demo", "mira"
OPERATORS = ("Mira", "Jonas", "Ayo", "Lin")  # Mira is staff; the others are students

DRIFTED_SERIAL = "IR-2506-03"
ODD_SERIAL = "IR-2609-04"
QUARANTINED_SERIAL = "POT-2603-05"
NOISY_SERIAL = "IR-2609-06"
OVERDUE_SERIAL = "POT-2507-04"

DRIFT_GAIN = 0.95  # the drifted unit's last session reads 5 % fewer counts
ODD_K_FACTOR = 0.78  # the odd unit's k relative to its own draw
MAX_SESSIONS = 3
GRAVITY = 9.80665  # m/s^2, standard gravity: force of the dead weights


def _scores(rng: np.random.Generator, n: int) -> np.ndarray:
    """n standard normal scores, evenly spread over the distribution and shuffled.

    Unit-to-unit spread drawn this way (stratified, like a Latin hypercube) looks like a normal
    sample without the accidental far draws a small random sample can hold, so the one unit that
    is meant to read unlike its siblings is the only one that does.
    """
    normal = NormalDist()
    return rng.permutation([normal.inv_cdf((i + 0.5) / n) for i in range(n)])


Scores = Mapping[str, float]


# -- the three sensor types: spec, jig, reference, and each unit's invented truth ------------------


@dataclass(frozen=True, slots=True)
class Truth:
    """One unit's invented constants; ``respond`` turns reference values into bench readings."""

    params: dict[str, float]


RANGEFINDER = SensorTypeCreate(
    name="IR rangefinder 80-800 mm",
    quantity="distance",
    value_unit="mm",
    reading_unit="counts",
    reading_min=0,
    reading_max=4095,
    families=["inverse_offset"],
    tolerance_abs=3.0,
    tolerance_rel=2.0,
    drift_limit_abs=8.0,
    interval_days=180,
    noise_in=NoiseIn.reading,  # the scatter is the ADC's: averaged samples, rounded to a count
    reading_resolution=1.0,  # counts
)
BELOW_MIN_RANGE_MM = (40, 50, 60)  # where the response folds back: excluded by the engine
IN_RANGE_MM = (80, 90, 100, 120, 150, 200, 250, 300, 350, 400, 450, 500, 600, 700, 800)
RANGEFINDER_JIG = BELOW_MIN_RANGE_MM + IN_RANGE_MM
SAMPLES_PER_READING = 16


def _rangefinder_truth(z: Scores) -> Truth:
    return Truth(
        {
            "k": 3.2e5 * (1 + 0.03 * z["k"]),  # mm*counts
            "r0": 30.0 + 8.0 * z["r0"],  # counts
            "v0": -8.0 + 1.5 * z["v0"],  # mm
            "knee": 75.0 + 1.0 * z["knee"],  # mm: below it the spot leaves the detector
            "width": 20.0,  # mm: how fast the reading falls below the knee
            "sample_noise": 3.0,  # counts, one ADC sample
            "gain": 1.0,  # ageing multiplies the counts
        }
    )


def _rangefinder_respond(t: Truth, mm: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    p = t.params
    ideal = p["k"] / (mm - p["v0"]) - p["r0"]
    below = np.clip(p["knee"] - mm, 0.0, None)
    rolloff = np.exp(-((below / p["width"]) ** 2))  # 1 at and above the knee, smooth below
    noise = p["sample_noise"] / np.sqrt(SAMPLES_PER_READING) * rng.standard_normal(mm.size)
    counts = p["gain"] * ideal * rolloff + noise
    clipped: np.ndarray = np.clip(np.rint(counts), 0, 4095)
    return clipped


def _rangefinder_age(t: Truth, years: float, rng: np.random.Generator) -> Truth:
    """Ordinary ageing: the emitter loses about 0.2 % of output a year."""
    return Truth({**t.params, "gain": t.params["gain"] * (1 - 0.002 * years)})


POTENTIOMETER = SensorTypeCreate(
    name="Rotary pot 300 deg",
    quantity="angle",
    value_unit="deg",
    reading_unit="counts",
    reading_min=0,
    reading_max=4095,
    families=["line"],
    tolerance_abs=1.0,
    drift_limit_abs=0.5,
    interval_days=365,
    noise_in=NoiseIn.reading,  # wiper and ADC noise, in counts; the indexing head is far finer
    reading_resolution=1.0,  # counts
)
POT_JIG = tuple(range(0, 271, 15))  # deg on the indexing head


def _pot_truth(z: Scores) -> Truth:
    return Truth(
        {
            "travel": 300.0 + 2.0 * z["travel"],  # deg of electrical travel over 0..4095
            "offset": 15.0 + 2.0 * z["offset"],  # deg of track before the jig's zero
            "bow": 0.0006 + 0.0002 * z["bow"],  # track bow, fraction of full scale
            "noise": 1.5,  # counts
        }
    )


def _pot_respond(t: Truth, deg: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    p = t.params
    x = (deg + p["offset"]) / p["travel"]  # position along the track, 0..1
    counts = 4095 * (x + p["bow"] * np.sin(np.pi * x)) + p["noise"] * rng.standard_normal(deg.size)
    return np.clip(np.rint(counts), 0, 4095)


def _pot_age(t: Truth, years: float, rng: np.random.Generator) -> Truth:
    """The shaft coupling settles a little: the zero moves by some hundredths of a degree."""
    return Truth({**t.params, "offset": t.params["offset"] + 0.05 * rng.standard_normal()})


LOAD_CELL = SensorTypeCreate(
    name="Load cell 200 N",
    quantity="force",
    value_unit="N",
    reading_unit="mV/V",
    reading_min=0,
    reading_max=2.2,
    families=["polynomial", "line"],  # both ranked; the non-linearity makes the line lose
    family_options={"polynomial": {"degree": 2}},
    tolerance_abs=0.2,
    tolerance_rel=0.5,
    drift_limit_abs=0.6,
    interval_days=365,
    noise_in=NoiseIn.reading,  # bridge amplifier noise; class M1 weights are far finer
    reading_resolution=0.00001,  # mV/V, the logged digit
)
LOAD_KG = (0, 2, 4, 6, 8, 10, 12, 14, 16, 18, 20)
LOAD_CELL_JIG = tuple(round(kg * GRAVITY, 5) for kg in (*LOAD_KG, *reversed(LOAD_KG)))  # up, down
FULL_SCALE_N = 20 * GRAVITY


def _load_cell_truth(z: Scores) -> Truth:
    return Truth(
        {
            "sensitivity": 2.0 / FULL_SCALE_N * (1 + 0.02 * z["sensitivity"]),  # mV/V per N
            "zero": 0.012 + 0.004 * z["zero"],  # mV/V
            "nonlinearity": -0.0015 + 0.0004 * z["nonlinearity"],  # fraction of reading at FS
            "noise": 0.0002,  # mV/V
        }
    )


def _load_cell_respond(t: Truth, newton: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    p = t.params
    signal = p["sensitivity"] * newton * (1 + p["nonlinearity"] * newton / FULL_SCALE_N)
    reading = p["zero"] + signal + p["noise"] * rng.standard_normal(newton.size)
    return np.round(reading, 5)


def _load_cell_age(t: Truth, years: float, rng: np.random.Generator) -> Truth:
    """Zero creep of a fraction of a microvolt per volt; the sensitivity holds."""
    return Truth({**t.params, "zero": t.params["zero"] + 0.0002 * rng.standard_normal()})


@dataclass(frozen=True, slots=True)
class Kind:
    """A sensor type of the demo and how its units behave on the bench."""

    spec: SensorTypeCreate
    prefix: str
    jig: tuple[float, ...]
    # its reference standard is server.standards.demo.REFERENCE_OF[key] (U and k from there)
    spread: tuple[str, ...]  # the constants that vary unit to unit
    truth: Callable[[Scores], Truth]
    respond: Callable[[Truth, np.ndarray, np.random.Generator], np.ndarray]
    age: Callable[[Truth, float, np.random.Generator], Truth]
    mounts: tuple[str, ...]  # where in a kit such a unit goes


KINDS = {
    "ir": Kind(
        spec=RANGEFINDER,
        prefix="IR",
        jig=RANGEFINDER_JIG,
        spread=("k", "r0", "v0", "knee"),
        truth=_rangefinder_truth,
        respond=_rangefinder_respond,
        age=_rangefinder_age,
        mounts=("left bumper", "right bumper"),
    ),
    "pot": Kind(
        spec=POTENTIOMETER,
        prefix="POT",
        jig=POT_JIG,
        spread=("travel", "offset", "bow"),
        truth=_pot_truth,
        respond=_pot_respond,
        age=_pot_age,
        mounts=("arm elbow",),
    ),
    "lc": Kind(
        spec=LOAD_CELL,
        prefix="LC",
        jig=LOAD_CELL_JIG,
        spread=("sensitivity", "zero", "nonlinearity"),
        truth=_load_cell_truth,
        respond=_load_cell_respond,
        age=_load_cell_age,
        mounts=("gripper",),
    ),
}


@dataclass(frozen=True, slots=True)
class Box:
    """Units of one type received together; ``installed`` of them went into kits from ``kit``."""

    kind: str
    received: date
    count: int
    installed: int = 0
    kit: int = 1


BOXES = (
    Box("lc", date(2025, 5, 26), 5, installed=5, kit=1),
    Box("ir", date(2025, 6, 2), 6, installed=6, kit=1),
    Box("pot", date(2025, 7, 14), 6, installed=6, kit=1),
    Box("ir", date(2026, 1, 19), 6, installed=4, kit=4),
    Box("pot", date(2026, 3, 2), 6),
    Box("lc", date(2026, 8, 17), 5),
    Box("ir", date(2026, 9, 8), 6),
)


@dataclass(frozen=True, slots=True)
class DemoSummary:
    """What ``load_demo`` created, and the units later features should single out."""

    workshop: str
    sensor_types: int
    units: int
    sessions: int
    passed: int
    failed: int
    installed: int
    users: tuple[str, ...]  # the demo accounts created (existing names are left alone)
    drifted_serial: str
    odd_serial: str
    quarantined_serial: str
    overdue_serial: str
    failed_serials: tuple[str, ...]  # units with at least one failed session
    suspect_standard: str = ""  # the reference standard found out of tolerance
    suspect_flagged: int = 0  # units it put at risk (reference_suspect flags)

    def describe(self) -> list[str]:
        """A few lines for a person who has just started the demo."""
        return [
            f"Loaded the demo data (invented): the {self.workshop}, which lends robot kits.",
            f"  {self.sensor_types} sensor types, {self.units} units, {self.sessions} calibration "
            f"sessions ({self.passed} passed, {self.failed} failed). Worth a look:",
            f"    {self.drifted_serial:<12} drifted between its last two calibrations",
            f"    {self.odd_serial:<12} reads unlike its siblings",
            f"    {self.quarantined_serial:<12} failed its incoming calibration; quarantined",
            f"    {self.overdue_serial:<12} missed its yearly recalibration",
            f"    {self.suspect_standard:<12} a reference standard found out of tolerance: "
            f"{self.suspect_flagged} units to check (/standards)",
        ]


def fleet_size(session: Session) -> tuple[int, int]:
    """How many sensor types and units the database holds."""
    types = session.scalar(select(func.count()).select_from(SensorType)) or 0
    units = session.scalar(select(func.count()).select_from(Unit)) or 0
    return types, units


def _at(day: date, minutes: int) -> datetime:
    """A bench time on ``day``: from 09:30 UTC, ``minutes`` later."""
    return datetime.combine(day, time(9, 30), tzinfo=UTC) + timedelta(minutes=minutes)


def _ambient(rng: np.random.Generator) -> str:
    return f"{rng.uniform(20.5, 23.5):.1f} degC, {rng.uniform(35, 55):.0f} %RH"


def _schedule(box: Box, position: int, interval: int, rng: np.random.Generator) -> list[date]:
    """Incoming on receipt, then periodic a little before each due date, up to the story's today."""
    days = [box.received + timedelta(days=1 + position * 2 // box.count)]
    while len(days) < MAX_SESSIONS:
        nxt = days[-1] + timedelta(days=interval - int(rng.integers(0, 15)))
        if nxt > REFERENCE_DATE - timedelta(days=3):
            break
        days.append(nxt)
    return days


def _users(session: Session) -> tuple[str, ...]:
    created = []
    for name, role in ((ADMIN, Role.admin), (TECHNICIAN, Role.technician)):
        if session.scalar(select(User).where(User.name == name)) is None:
            accounts.create_user(session, name, role, password=DEMO_PASSWORD)
            created.append(name)
    return tuple(created)


def _with(truth: Truth, **changes: float) -> Truth:
    return Truth({**truth.params, **changes})


def _story(serial: str, truth: Truth) -> Truth:
    """The constants of the units the demo singles out (drift and the missed recalibration
    happen in ``_calibrate``)."""
    p = truth.params
    if serial == ODD_SERIAL:
        return _with(truth, k=p["k"] * ODD_K_FACTOR)
    if serial == NOISY_SERIAL:
        return _with(truth, sample_noise=16.0)
    if serial == QUARANTINED_SERIAL:
        return _with(truth, bow=0.009)
    return truth


def _calibrate(
    session: Session, unit: Unit, box: Box, position: int, truth: Truth, rng: np.random.Generator
) -> list[bool]:
    """Every session of one unit, oldest first; whether each passed."""
    kind = KINDS[box.kind]
    days = _schedule(box, position, kind.spec.interval_days, rng)
    if unit.serial == OVERDUE_SERIAL:
        days = days[:1]  # on loan with its kit when it fell due
    reference = np.asarray(kind.jig, dtype=float)
    passed = []
    for n, day in enumerate(days):
        if n:
            truth = kind.age(truth, (day - days[n - 1]).days / 365.25, rng)
        if unit.serial == DRIFTED_SERIAL and n == len(days) - 1:
            truth = _with(truth, gain=truth.params["gain"] * DRIFT_GAIN)
        readings = kind.respond(truth, reference, rng)
        data = CalibrationCreate(
            performed_at=_at(day, 25 * position),
            operator=OPERATORS[int(rng.integers(0, len(OPERATORS)))],
            reference_standard=REFERENCE_OF[box.kind],  # U and k from the register
            kind=SessionKind.incoming if n == 0 else SessionKind.periodic,
            ambient=_ambient(rng),
            points=[
                PointIn(reference_value=float(v), reading=float(r))
                for v, r in zip(reference, readings, strict=True)
            ],
        )
        record = run_calibration(session, unit, data, recorded_by=TECHNICIAN)
        passed.append(record.current_fit is not None and record.current_fit.passed)
    return passed


def _place(unit: Unit, box: Box, position: int, kind: Kind) -> None:
    """Quarantine the failed unit; put the first ``box.installed`` of a box into kits."""
    if unit.serial == QUARANTINED_SERIAL:
        unit.status = UnitStatus.quarantined
        unit.notes = (
            "Quarantined: failed its incoming calibration (the track is bowed); "
            "waiting to go back to the supplier."
        )
    elif position < box.installed:
        kit = box.kit + position // len(kind.mounts)
        unit.status = UnitStatus.installed
        unit.installed_in = f"kit {kit:02d} / {kind.mounts[position % len(kind.mounts)]}"


def _record_installations(session: Session) -> None:
    """An installation event for each installed unit, the day after its first calibration (the
    kits were built from units calibrated on receipt)."""
    for unit in session.scalars(select(Unit).where(Unit.status == UnitStatus.installed)):
        first = min(s.performed_at for s in unit.sessions)
        session.add(
            InstallationEvent(
                unit=unit,
                kind=EventKind.installed,
                location=unit.installed_in,
                at=first + timedelta(days=1),
                recorded_by=TECHNICIAN,
            )
        )


def load_demo(session: Session) -> DemoSummary:
    """Fill an empty database with the invented demo fleet; flushes, never commits."""
    types, units = fleet_size(session)
    if types or units:
        raise Conflict(
            f"the demo fleet only goes into an empty database; this one has {types} "
            f"sensor type(s) and {units} unit(s)"
        )
    rng = np.random.default_rng(SEED)
    users = _users(session)
    sensor_types = {key: fleet.create_sensor_type(session, k.spec) for key, k in KINDS.items()}
    register_standards(session, TECHNICIAN)
    scores = {
        key: {name: _scores(rng, sum(b.count for b in BOXES if b.kind == key)) for name in k.spread}
        for key, k in KINDS.items()
    }
    drawn = dict.fromkeys(KINDS, 0)  # units of each kind so far: the index into its scores
    results: dict[str, list[bool]] = {}
    installed = 0
    for box in BOXES:
        kind = KINDS[box.kind]
        for position in range(box.count):
            i = drawn[box.kind]
            drawn[box.kind] += 1
            serial = f"{kind.prefix}-{box.received:%y%m}-{position + 1:02d}"
            truth = _story(
                serial, kind.truth({n: float(z[i]) for n, z in scores[box.kind].items()})
            )
            unit = fleet.create_unit(
                session,
                UnitCreate(serial=serial, sensor_type=kind.spec.name, received_on=box.received),
            )
            results[serial] = _calibrate(session, unit, box, position, truth, rng)
            _place(unit, box, position, kind)
            installed += unit.status == UnitStatus.installed
    _record_installations(session)
    session.flush()
    for sensor_type in sensor_types.values():
        recompute_flags(session, sensor_type)
    suspect_flagged = flag_suspect(session, TECHNICIAN)
    sessions = sum(len(r) for r in results.values())
    passed = sum(sum(r) for r in results.values())
    return DemoSummary(
        workshop=WORKSHOP,
        sensor_types=len(sensor_types),
        units=len(results),
        sessions=sessions,
        passed=passed,
        failed=sessions - passed,
        installed=installed,
        users=users,
        drifted_serial=DRIFTED_SERIAL,
        odd_serial=ODD_SERIAL,
        quarantined_serial=QUARANTINED_SERIAL,
        overdue_serial=OVERDUE_SERIAL,
        failed_serials=tuple(serial for serial, r in results.items() if not all(r)),
        suspect_standard=SUSPECT,
        suspect_flagged=suspect_flagged,
    )
