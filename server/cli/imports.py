"""`sensorledger import`: a file of points stored as one calibration session."""

from __future__ import annotations

import argparse
import json
from datetime import UTC, datetime
from typing import TYPE_CHECKING

from server.cli.common import (
    EXIT_OK,
    KINDS,
    db_option,
    describe_database,
    finite_number,
    open_session,
    parse_when,
    read_points_file,
    recorded_by,
    require_existing,
    source_name,
    url_of,
)

if TYPE_CHECKING:
    from server.calibrations.schemas import CalibrationRead
    from server.flags.models import Flag

# -- import: a file of points as a calibration session -------------------------------------------

# CalibrationCreate's fields as the options that set them, for error messages
IMPORT_OPTIONS = {
    "performed_at": "--performed-at",
    "operator": "--operator",
    "reference": "--reference",
    "reference_standard": "--reference-standard",
    "kind": "--kind",
    "family": "--family",
    "ambient": "--ambient",
    "notes": "--notes",
    "reference_expanded_u": "--reference-u",
    "reference_k": "--reference-k",
    "extra_u": "--extra-u",
    "extra_label": "--extra-label",
}


def _import_field(field: str | None, source: str) -> str:
    """The option or file behind a CalibrationCreate field (``points.3.reading`` -> the file)."""
    head, _, rest = (field or "points").partition(".")
    if head != "points":
        return IMPORT_OPTIONS.get(head, head)
    index = rest.split(".")[0]
    return f"{source}, point {int(index) + 1}" if index.isdigit() else source


def _import(args: argparse.Namespace) -> int:
    from pydantic import ValidationError

    from server.calibrations import service as calibrations
    from server.calibrations.schemas import CalibrationCreate
    from server.errors import Invalid, NotFound
    from server.flags.service import flag_read, flags_of, recompute_flags
    from server.fleet.service import get_unit

    source = source_name(args.file)
    points = read_points_file(args.file)  # every check that needs no database comes first
    try:
        data = CalibrationCreate(
            performed_at=args.performed_at or datetime.now(UTC),
            operator=args.operator,
            reference=args.reference,
            reference_standard=args.reference_standard,
            kind=args.kind,
            family=args.family or None,
            ambient=args.ambient,
            notes=args.notes,
            reference_expanded_u=args.reference_u,
            # without --reference-k: 2, or the register's k with --reference-standard
            **({"reference_k": args.reference_k} if args.reference_k is not None else {}),
            extra_u=args.extra_u,
            extra_label=args.extra_label,
            points=points,
        )
    except ValidationError as exc:
        first = exc.errors()[0]
        field = ".".join(str(p) for p in first["loc"])
        message = first["msg"].removeprefix("Value error, ")
        raise Invalid(f"{_import_field(field, source)}: {message}", field=field) from None
    url = url_of(args)
    require_existing(url)
    with open_session(args) as session:
        try:
            unit = get_unit(session, args.unit.strip())
        except NotFound:
            raise NotFound(
                f"--unit: no unit {args.unit.strip()!r} in {describe_database(url)}", field="unit"
            ) from None
        try:
            record = calibrations.run_calibration(session, unit, data, recorded_by=recorded_by())
        except Invalid as exc:  # nothing is committed: the session rolls back on close
            raise Invalid(
                f"{_import_field(exc.field, source)}: {exc.message}", field=exc.field
            ) from None
        recompute_flags(session, unit.sensor_type, units=[unit])
        session.commit()
        found = calibrations.calibration_read(record)
        open_flags = [f for f in flags_of(unit) if f.open]
        if args.json:  # the API's answer to the same upload: the session and the open flags
            doc = found.model_dump(mode="json")
            doc["flags"] = [flag_read(f).model_dump(mode="json") for f in open_flags]
            print(json.dumps(doc, indent=2))
        else:
            print(
                import_report(
                    found,
                    open_flags,
                    value_unit=unit.sensor_type.value_unit,
                    reading_unit=unit.sensor_type.reading_unit,
                    where=describe_database(url),
                )
            )
    return EXIT_OK


def _with_unit(x: float, unit: str) -> str:
    return f"{x:g} {unit}".rstrip()


WIDTH = 100  # the import report wraps its long lines (rules, reasons, flags) to this width


def import_report(
    found: CalibrationRead,
    open_flags: list[Flag],
    *,
    value_unit: str,
    reading_unit: str,
    where: str,
) -> str:
    """A stored session in a few lines: what was stored, the fit kept and why, the decision and
    the unit's open flags after the save."""
    import textwrap

    from server.formatting import significant

    lines = [
        f"Stored calibration session {found.id} of {found.unit} ({found.sensor_type}) in {where}."
    ]

    def row(label: str, text: str, *, bullet: bool = False) -> None:
        first = f"{label:<14}" + ("- " if bullet else "")
        lines.extend(
            textwrap.wrap(
                text,
                WIDTH,
                initial_indent=first,
                subsequent_indent=" " * len(first),
                break_on_hyphens=False,
            )
            or [first.rstrip()]
        )

    f, decision = found.fit, found.decision
    excluded = [(i, p) for i, p in enumerate(found.points) if p.excluded_reason is not None]
    row(
        "session",
        f"{found.kind.value}, {found.performed_at.astimezone(UTC):%Y-%m-%d %H:%M} UTC, by "
        f"{found.operator} against {found.reference}",
    )
    row("points", f"{len(found.points)}, {len(found.points) - len(excluded)} used")
    for n, (i, p) in enumerate(excluded):
        row(
            "" if n else "excluded",
            f"point {i + 1} ({p.reference_value:g}, {p.reading:g}): {p.excluded_reason}",
        )
    if found.ranking is None:
        row("family", f.family)
    else:
        chosen, reason = found.ranking.chosen, found.ranking.reason
        row(
            "family",
            {
                "requested": f"{chosen}, asked for with --family",
                "recommended": f"{chosen}, recommended: {reason.removeprefix(chosen + ': ')}",
                "fallback": f"{chosen}, the type's first family that fitted ({reason})",
            }[found.ranking.chosen_because],
        )
    lo, hi = f.valid_range
    row("formula", f.formula)
    row(
        "valid range",
        f"{lo:g} to {_with_unit(hi, reading_unit)} (outside it a value is an extrapolation)",
    )
    row("rse", f"{significant(f.rse, 4)} {value_unit}".rstrip())
    if not found.suspects:
        row("suspect", "none")
    for i, suspect in enumerate(found.suspects):
        row("suspect" if i == 0 else "", f"point {suspect.index + 1}: {suspect.reason}")
    row("decision", "PASSED" if decision.passed else "FAILED")
    for reason in decision.reasons:
        row("", reason, bullet=True)
    row("rule", decision.rule)
    row("open flags", f"{len(open_flags) or 'none'} on {found.unit}" + (":" if open_flags else ""))
    for flag in open_flags:
        row("", f"{flag.severity.value} {flag.kind.value}: {flag.message}", bullet=True)
    return "\n".join(lines)


def _configure_import(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "file",
        metavar="FILE",
        help="CSV with a header row: reference_value,reading[,excluded,exclude_reason]; "
        "'-' reads standard input",
    )
    parser.add_argument(
        "--unit",
        required=True,
        metavar="SERIAL",
        help="the serial of the unit calibrated (required)",
    )
    parser.add_argument(
        "--operator", required=True, metavar="NAME", help="who did the calibration (required)"
    )
    reference = parser.add_mutually_exclusive_group(required=True)
    reference.add_argument(
        "--reference",
        metavar="TEXT",
        help="the reference instrument or jig used, e.g. 'distance jig DJ-2' (this or "
        "--reference-standard is required)",
    )
    reference.add_argument(
        "--reference-standard",
        metavar="NAME",
        help="a standard of the register, e.g. DJ-1: its U and k are used; a standard overdue "
        "or found out of tolerance before the session makes it fail",
    )
    parser.add_argument(
        "--performed-at",
        type=parse_when,
        metavar="WHEN",
        help="when the points were taken, ISO 8601, e.g. 2025-03-01T14:30 (this machine's "
        "time zone) or 2025-03-01T14:30+01:00 (default: now)",
    )
    parser.add_argument(
        "--kind", choices=KINDS, default="periodic", help="the kind of session (default periodic)"
    )
    parser.add_argument(
        "--family",
        metavar="F",
        help="one of the sensor type's families (default: the one the ranking recommends)",
    )
    parser.add_argument(
        "--reference-u",
        type=finite_number,
        metavar="U",
        help="expanded uncertainty U of the reference standard, value units",
    )
    parser.add_argument(
        "--reference-k",
        type=finite_number,
        metavar="K",
        help="coverage factor of that U (default 2, or the register's)",
    )
    parser.add_argument(
        "--extra-u",
        type=finite_number,
        metavar="U",
        help="one more standard uncertainty, value units (with --extra-label)",
    )
    parser.add_argument("--extra-label", metavar="TEXT", help="what --extra-u is")
    parser.add_argument("--ambient", metavar="TEXT", help="conditions, e.g. '22 degC, 45 %%RH'")
    parser.add_argument("--notes", metavar="TEXT", help="anything else worth keeping")
    parser.add_argument(
        "--json",
        action="store_true",
        help="print the stored session as the API returns it (CalibrationRead JSON)",
    )
    db_option(parser)
