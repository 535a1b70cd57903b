"""`sensorledger export`: a unit's conversion table or firmware header."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import TYPE_CHECKING

from server.cli.common import (
    EXIT_OK,
    db_option,
    open_session,
)

if TYPE_CHECKING:
    pass

# -- export --------------------------------------------------------------------------------------


def _step(text: str) -> float:
    try:
        step = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number") from None
    if not (step > 0 and step != float("inf")):
        raise argparse.ArgumentTypeError(f"the step must be a positive number, not {text}")
    return step


def _export(args: argparse.Namespace) -> int:
    from server.errors import Invalid
    from server.exports import service as exports
    from server.fleet.service import get_unit

    with open_session(args) as session:
        unit = get_unit(session, args.serial)
        if args.format == "c":
            found = exports.firmware_header(unit)
        elif args.format == "json":
            found = exports.table_download(unit, "json", args.step)
        else:
            found = exports.table_download(unit, "csv", args.step)
    text = found.content if found.content.endswith("\n") else found.content + "\n"
    if args.output is None:
        sys.stdout.write(text)
        return EXIT_OK
    try:
        Path(args.output).write_text(text, encoding="utf-8")
    except OSError as exc:
        raise Invalid(
            f"cannot write {args.output}: {exc.strerror or exc}", field="output"
        ) from None
    print(f"Wrote {args.output} ({args.format}, unit {unit.serial}).", file=sys.stderr)
    return EXIT_OK


def _configure_export(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("serial", metavar="SERIAL", help="the unit whose current calibration")
    parser.add_argument(
        "--format",
        required=True,
        choices=["csv", "json", "c"],
        help="csv or json: the conversion table; c: a C99 firmware header",
    )
    parser.add_argument(
        "--step",
        type=_step,
        default=None,
        metavar="STEP",
        help="table rows every STEP reading units over the type's reading span (default: every "
        "code for whole-code readings, else the smallest 1-2-5 step giving at most 200 rows)",
    )
    parser.add_argument("--output", metavar="FILE", help="write to FILE instead of standard output")
    db_option(parser)
