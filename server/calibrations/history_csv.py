"""A calibration history file: one long CSV of points, read and grouped into sessions.

Columns (header row required, in any order; blanks and case in names ignored, ``sensor type``
reads as ``sensor_type``): serial, sensor_type, performed_at, operator, reference,
reference_value, reading; optional kind, notes. The rows of one session are all the rows with the
same serial (ignoring case), performed_at (the same moment), operator and reference, wherever they
are in the file. A row that cannot be read is a problem of its session, which is then not stored;
nothing here touches the database.
"""

from __future__ import annotations

import csv
import io
import math
from collections.abc import Iterable, Iterator
from dataclasses import dataclass, field
from datetime import UTC, datetime
from typing import IO

from server.calibrations.schemas import POINT_MAGNITUDE
from server.errors import Invalid

REQUIRED = (
    "serial",
    "sensor_type",
    "performed_at",
    "operator",
    "reference",
    "reference_value",
    "reading",
)
OPTIONAL = ("kind", "notes")
KINDS = ("incoming", "as_found", "as_left", "periodic")  # server.calibrations.models.SessionKind
LIMITS = {"serial": 64, "sensor_type": 64, "operator": 64, "reference": 128, "notes": 2000}
HEAD_CHARS = 65536  # read before sniffing the delimiter (then to the end of that line)
GROUPING = (
    "the rows of one session are those with the same serial (ignoring case), performed_at (the "
    "same moment), operator and reference, wherever they are in the file"
)


@dataclass(frozen=True, slots=True)
class Problem:
    """Why a row (or a whole session, at its first line) was not stored."""

    line: int
    serial: str
    performed_at: str
    reason: str
    session_lines: str = ""  # the lines of its session, e.g. "12-26" or "3, 9-10"


@dataclass(slots=True)
class PendingSession:
    """The rows of one session as read; ``problems`` non-empty: it will not be stored."""

    serial: str  # as first spelled in the file
    sensor_type: str
    performed_at: datetime | None  # None: the date could not be read (a problem says so)
    performed_at_text: str
    operator: str
    reference: str
    kind: str | None = None
    notes: str | None = None
    lines: list[int] = field(default_factory=list)
    reference_values: list[float] = field(default_factory=list)
    readings: list[float] = field(default_factory=list)
    problems: list[tuple[int, str]] = field(default_factory=list)  # (line, reason)

    def line_span(self) -> str:
        """The session's lines, compressed: "12-26" or "3, 9-10"."""
        parts, start, prev = [], self.lines[0], self.lines[0]
        for n in [*self.lines[1:], None]:
            if n is not None and n == prev + 1:
                prev = n
                continue
            parts.append(str(start) if start == prev else f"{start}-{prev}")
            if n is not None:
                start = prev = n
        return ", ".join(parts)

    def problem(self, line: int, reason: str) -> Problem:
        return Problem(line, self.serial, self.performed_at_text, reason, self.line_span())


@dataclass(slots=True)
class HistoryFile:
    """A history file read and grouped: its sessions in the order of their first row."""

    sessions: list[PendingSession]
    rows: int  # data rows read (blank rows not counted)


def parse_when(text: str) -> datetime:
    """ISO 8601 date or date and time; without an offset it is UTC (ValueError otherwise)."""
    moment = datetime.fromisoformat(text)
    return (moment if moment.tzinfo else moment.replace(tzinfo=UTC)).astimezone(UTC)


def _number(text: str, column: str) -> float:
    try:
        x = float(text)
    except ValueError:
        raise ValueError(f"{column} {text!r} is not a number") from None
    if not math.isfinite(x):
        raise ValueError(f"{column} {text!r} is not a finite number")
    if abs(x) > POINT_MAGNITUDE:
        raise ValueError(f"{column} {text!r} is larger than {POINT_MAGNITUDE:g} in magnitude")
    return x


def _column_name(raw: str) -> str:
    return "_".join(raw.strip().lower().replace("-", " ").split())


def _columns(header: list[str]) -> list[str]:
    """The header's column names, checked: every required one, nothing unknown, no repeats."""
    columns = [_column_name(c) for c in header]
    found = ", ".join(c for c in columns if c) or "nothing"
    missing = [c for c in REQUIRED if c not in columns]
    if missing:
        raise Invalid(
            f"line 1, the header row, must name the columns {', '.join(REQUIRED)} (and may name "
            f"{', '.join(OPTIONAL)}); missing {', '.join(missing)} (found: {found})",
            field="file",
        )
    unknown = [c for c in columns if c not in REQUIRED + OPTIONAL]
    if unknown:
        raise Invalid(
            f"line 1, the header row: unknown column(s) {', '.join(repr(c) for c in unknown)}; "
            f"allowed: {', '.join(REQUIRED + OPTIONAL)}",
            field="file",
        )
    repeated = sorted({c for c in columns if columns.count(c) > 1})
    if repeated:
        raise Invalid(
            f"line 1, the header row, names {', '.join(repeated)} more than once", field="file"
        )
    return columns


def _rows(stream: IO[str]) -> Iterator[tuple[int, list[str]]]:
    """(line number, fields) of every row after the header; the header checked first."""
    try:
        head = stream.read(HEAD_CHARS)
        head += stream.readline()
    except UnicodeDecodeError:
        raise Invalid("the file is not UTF-8 text", field="file") from None
    if not head.strip():
        raise Invalid(
            f"the file is empty; its first line must be the header row naming "
            f"{', '.join(REQUIRED)}",
            field="file",
        )
    try:
        dialect: type[csv.Dialect] | csv.Dialect = csv.Sniffer().sniff(head[:4096], ",;\t")
    except csv.Error:
        dialect = csv.excel
    lines: Iterable[str] = _chain(io.StringIO(head), stream)
    reader = csv.reader(lines, dialect=dialect)
    try:
        header = next(reader)
        yield 1, _columns(header)
        for row in reader:
            yield reader.line_num, row
    except UnicodeDecodeError:
        raise Invalid(
            f"the file is not UTF-8 text (after line {reader.line_num})", field="file"
        ) from None
    except csv.Error as exc:
        raise Invalid(f"line {reader.line_num}: {exc}", field="file") from None


def _chain(first: IO[str], rest: IO[str]) -> Iterator[str]:
    yield from first
    yield from rest


def _text(values: dict[str, str], column: str) -> str:
    return (values.get(column) or "").strip()


def read_history(stream: IO[str]) -> HistoryFile:
    """Read a history file (a text stream opened with ``newline=""``) and group its rows.

    A bad header, text that is not UTF-8 or a broken CSV quote is Invalid (nothing can be
    trusted); a bad row is kept as a problem of its session.
    """
    rows = _rows(stream)
    _, columns = next(rows)
    by_key: dict[tuple[str, object, str, str], PendingSession] = {}
    count = 0
    for line, fields in rows:
        if not any(f.strip() for f in fields):
            continue
        count += 1
        values = dict(zip(columns, fields, strict=False))
        serial, when = _text(values, "serial"), _text(values, "performed_at")
        operator, reference = _text(values, "operator"), _text(values, "reference")
        problems: list[str] = []
        if len(fields) > len(columns):
            problems.append(f"{len(fields)} fields, but the header names {len(columns)} columns")
        performed_at: datetime | None = None
        try:
            performed_at = parse_when(when)
        except ValueError:
            problems.append(
                f"performed_at {when!r} is not a date and time; give ISO 8601, e.g. "
                f"2021-03-01T14:30:00+01:00 (without an offset: UTC)"
                if when
                else "performed_at is empty"
            )
        key = (serial.lower(), performed_at or f"unread: {when}", operator, reference)
        pending = by_key.get(key)
        if pending is None:
            pending = by_key[key] = PendingSession(
                serial=serial,
                sensor_type=_text(values, "sensor_type"),
                performed_at=performed_at,
                performed_at_text=when,
                operator=operator,
                reference=reference,
            )
        pending.lines.append(line)
        for column in REQUIRED[:5]:
            if not _text(values, column):
                problems.append(f"{column} is empty")
        for column, limit in LIMITS.items():
            if len(_text(values, column)) > limit:
                problems.append(f"{column} is longer than {limit} characters")
        sensor_type = _text(values, "sensor_type")
        if sensor_type and pending.sensor_type and sensor_type != pending.sensor_type:
            problems.append(
                f"sensor_type {sensor_type!r} differs from {pending.sensor_type!r} on line "
                f"{pending.lines[0]} of the same session"
            )
        kind = _text(values, "kind")
        if kind and kind not in KINDS:
            problems.append(f"kind {kind!r} is not one of {', '.join(KINDS)}")
        elif kind and pending.kind and kind != pending.kind:
            problems.append(f"kind {kind!r} differs from {pending.kind!r} earlier in the session")
        elif kind:
            pending.kind = kind
        notes = _text(values, "notes")
        if notes and pending.notes is None:
            pending.notes = notes
        try:
            reference_value = _number(_text(values, "reference_value"), "reference_value")
            reading = _number(_text(values, "reading"), "reading")
        except ValueError as exc:
            problems.append(str(exc))
        else:
            pending.reference_values.append(reference_value)
            pending.readings.append(reading)
        pending.problems += [(line, reason) for reason in problems]
    return HistoryFile(sessions=list(by_key.values()), rows=count)
