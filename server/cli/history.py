"""`sensorledger import-history`: a whole calibration history from one long CSV file."""

from __future__ import annotations

import argparse
import csv
import io
import sys
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import IO, TYPE_CHECKING

from server.cli.common import (
    EXIT_OK,
    db_option,
    open_session,
    recorded_by,
    require_existing,
    source_name,
    url_of,
)

if TYPE_CHECKING:
    from server.calibrations.history import HistoryResult

EXIT_REJECTED = 1  # some rows were rejected (the rest is stored)
SHOWN_PROBLEMS = 20  # problems printed; the report file has them all
# server.calibrations.history_csv.GROUPING, written out so that building the parser loads no
# server module (a test keeps them equal)
GROUPING = (
    "the rows of one session are those with the same serial (ignoring case), performed_at (the "
    "same moment), operator and reference, wherever they are in the file"
)
DESCRIPTION = f"""Store a whole calibration history from one long CSV file, one row per point.

Columns (a header row naming them is required, in any order): serial, sensor_type,
performed_at, operator, reference, reference_value, reading; optional: kind (incoming, as_found,
as_left, periodic; default periodic) and notes (a session takes its first non-empty one).
performed_at is ISO 8601, e.g. 2021-03-01T14:30:00+01:00; without an offset it is UTC.

Sessions: {GROUPING}. Units missing from the database are created (their sensor type must exist);
every session is fitted and judged as a single upload would be, and stored whole or not at all.
A bad row (a number or date that does not read, an unknown sensor type, a serial of another
type, too few points, a fit that fails) keeps its whole session out; it is named by its line
number, printed and, with --report, written to a CSV file, and the other sessions go in.
Sessions stored already (same unit, performed_at, operator and reference) are skipped, so running
the same file again is harmless. Flags are recomputed once, at the end.

Exit status: 0 every session stored or present already; 1 some rows rejected (the rest stored);
2 a mistake in the command or the file (bad header, not UTF-8): nothing stored."""


def _open(path: str) -> IO[str]:
    from server.errors import Invalid

    if path == "-":
        return io.TextIOWrapper(sys.stdin.buffer, encoding="utf-8-sig", newline="")
    try:
        return open(path, encoding="utf-8-sig", newline="")  # closed by the caller
    except OSError as exc:
        raise Invalid(f"cannot read {path}: {exc.strerror or exc}", field="file") from None


def _check_report(path: str | None) -> None:
    from server.errors import Invalid

    if path is None:
        return
    target = Path(path)
    if target.is_dir():
        raise Invalid(f"--report: {path} is a folder; give a file name", field="report")
    if not target.resolve().parent.is_dir():
        raise Invalid(f"--report: there is no folder {target.parent}", field="report")


def write_report(path: str, result: HistoryResult) -> None:
    """Every problem as a CSV row: line, session_lines, serial, performed_at, reason."""
    with open(path, "w", encoding="utf-8", newline="") as handle:
        out = csv.writer(handle)
        out.writerow(["line", "session_lines", "serial", "performed_at", "reason"])
        for p in result.problems:
            out.writerow([p.line, p.session_lines, p.serial, p.performed_at, p.reason])


@contextmanager
def _progress(total: int) -> Iterator[tuple[Callable[[int], None], Callable[[str], None]]]:
    """(advance(n), stage(text)) that drive a rich progress bar on a terminal, else nothing."""
    from rich.console import Console
    from rich.progress import (
        BarColumn,
        MofNCompleteColumn,
        Progress,
        TaskProgressColumn,
        TextColumn,
        TimeElapsedColumn,
        TimeRemainingColumn,
    )

    bar = Progress(
        TextColumn("{task.description}"),
        BarColumn(),
        MofNCompleteColumn(),
        TaskProgressColumn(),
        TimeElapsedColumn(),
        TimeRemainingColumn(),
        console=Console(file=sys.stdout),
        disable=not sys.stdout.isatty(),
    )
    with bar:
        task = bar.add_task("checking sessions", total=total)

        def advance(n: int) -> None:
            bar.advance(task, n)

        def stage(text: str) -> None:
            bar.update(task, description=text)

        yield advance, stage


def _import_history(args: argparse.Namespace) -> int:
    from server.calibrations.history import import_history
    from server.calibrations.history_csv import read_history

    _check_report(args.report)
    source = source_name(args.file)
    stream = _open(args.file)
    try:
        parsed = read_history(stream)  # the whole file is read and grouped before any write
    finally:
        if args.file != "-":
            stream.close()
    require_existing(url_of(args))
    with open_session(args) as session, _progress(len(parsed.sessions)) as (advance, stage):
        result = import_history(
            session,
            parsed,
            actor=recorded_by(),
            source=source,
            batch=args.batch,
            on_progress=advance,
            on_stage=stage,
        )
    for p in result.problems[:SHOWN_PROBLEMS]:
        print(
            f"line {p.line}: {p.reason} (its session, {_lines(p.session_lines)}, is not stored)",
            file=sys.stderr,
        )
    if len(result.problems) > SHOWN_PROBLEMS:
        more = len(result.problems) - SHOWN_PROBLEMS
        hint = f"all in {args.report}" if args.report else "give --report FILE for all of them"
        print(f"... and {more} more problems ({hint})", file=sys.stderr)
    if args.report:
        write_report(args.report, result)
    print(result.summary())
    if result.rejected:
        print(
            f"Some rows were rejected: fix them and run the same file again (what is stored is "
            f"skipped){f'; the report is in {args.report}' if args.report else ''}."
        )
        return EXIT_REJECTED
    return EXIT_OK


def _lines(span: str) -> str:
    return f"line {span}" if span.isdigit() else f"lines {span}"


def _batch(text: str) -> int:
    try:
        n = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a whole number") from None
    if n < 1:
        raise argparse.ArgumentTypeError("give at least 1 session per transaction")
    return n


def _configure_import_history(parser: argparse.ArgumentParser) -> None:
    parser.description = DESCRIPTION
    parser.formatter_class = argparse.RawDescriptionHelpFormatter
    parser.add_argument(
        "file", metavar="FILE", help="the CSV file (UTF-8), one row per point; '-' reads stdin"
    )
    parser.add_argument(
        "--report",
        metavar="FILE",
        help="write every rejected row (line, session_lines, serial, performed_at, reason) to "
        "this CSV file",
    )
    parser.add_argument(
        "--batch",
        type=_batch,
        default=300,
        metavar="N",
        help="sessions fitted and committed together (default 300)",
    )
    db_option(parser)
