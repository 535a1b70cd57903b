"""Points from an uploaded CSV file: a header row naming reference_value and reading."""

from __future__ import annotations

import csv
import io

from pydantic import ValidationError

from server.calibrations.schemas import PointIn
from server.errors import Invalid

REQUIRED = ("reference_value", "reading")
OPTIONAL = ("excluded", "exclude_reason")
# written by `sensorledger capture` beside each point: the SD, count and rejected count of the
# samples its reading is the mean of (kept with the point)
INFORMATIONAL = ("sd", "n", "rejected")
TRUE = {"1", "true", "yes", "y", "x"}
FALSE = {"", "0", "false", "no", "n"}
MAX_BYTES = 5_000_000


def parse_points_csv(data: bytes) -> list[PointIn]:
    """Rows of ``reference_value,reading[,excluded,exclude_reason]``; errors name the row.
    Columns ``sd,n,rejected`` (a capture's sample statistics, each may be empty) are kept."""
    if len(data) > MAX_BYTES:
        raise Invalid(f"the file is larger than {MAX_BYTES // 1_000_000} MB", field="file")
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise Invalid("the file is not UTF-8 text", field="file") from exc
    sample = text[:4096]
    try:
        dialect: type[csv.Dialect] | csv.Dialect = csv.Sniffer().sniff(sample, ",;\t")
    except csv.Error:
        dialect = csv.excel
    reader = csv.DictReader(io.StringIO(text), dialect=dialect)
    columns = [c.strip().lower() for c in reader.fieldnames or []]
    missing = [c for c in REQUIRED if c not in columns]
    if missing:
        raise Invalid(
            f"the header row must name {', '.join(REQUIRED)}; missing "
            f"{', '.join(missing)} (found: {', '.join(columns) or 'nothing'})",
            field="file",
        )
    unknown = sorted(set(columns) - set(REQUIRED) - set(OPTIONAL) - set(INFORMATIONAL))
    if unknown:
        raise Invalid(
            f"unknown column(s) {', '.join(unknown)}; allowed: "
            f"{', '.join(REQUIRED + OPTIONAL + INFORMATIONAL)}",
            field="file",
        )
    reader.fieldnames = columns
    points = []
    for row in reader:
        line = reader.line_num
        if not any((v or "").strip() for v in row.values()):
            continue
        flag = (row.get("excluded") or "").strip().lower()
        if flag not in TRUE | FALSE:
            raise Invalid(f"row {line}: excluded must be yes/no, got {flag!r}", field="file")
        try:
            points.append(
                PointIn(
                    reference_value=(row["reference_value"] or "").strip(),
                    reading=(row["reading"] or "").strip(),
                    excluded=flag in TRUE,
                    exclude_reason=(row.get("exclude_reason") or "").strip() or None,
                    **{c: (row.get(c) or "").strip() or None for c in INFORMATIONAL},
                )
            )
        except ValidationError as exc:
            first = exc.errors()[0]
            column = ".".join(str(p) for p in first["loc"])
            raise Invalid(f"row {line}, column {column}: {first['msg']}", field="file") from exc
    if not points:
        raise Invalid("the file has a header but no points", field="file")
    return points
