"""`sensorledger fit`: fit a file of points offline (no database) and report."""

from __future__ import annotations

import argparse
import json
import math
from typing import TYPE_CHECKING, Any

from server.cli.common import (
    EXIT_OK,
    read_points_file,
    source_name,
)

if TYPE_CHECKING:
    from server.calibrations.schemas import PointIn
    from server.calibrations.service import OfflineFit
    from shared.ranking import Ranking

# -- fit (offline) -------------------------------------------------------------------------------


def _degree(text: str) -> int | tuple[int, int]:
    """``3`` (polynomial) or ``2,2`` / ``2/2`` (rational: numerator, denominator)."""
    parts = [p.strip() for p in text.replace("/", ",").split(",")]
    try:
        numbers = [int(p) for p in parts]
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"{text!r} is not a degree: give N (polynomial) or M,N (rational)"
        ) from None
    if len(numbers) == 1:
        return numbers[0]
    if len(numbers) == 2:
        return numbers[0], numbers[1]
    raise argparse.ArgumentTypeError(f"{text!r}: give N (polynomial) or M,N (rational)")


def _fit(args: argparse.Namespace) -> int:
    import shared
    from server.calibrations import service as calibrations
    from server.errors import Invalid

    points = read_points_file(args.file)
    if args.family is not None and args.family not in shared.FAMILIES:
        raise Invalid(
            f"unknown family {args.family!r}; the catalog has: {', '.join(sorted(shared.FAMILIES))}"
        )
    found = calibrations.run_offline_fit(
        points, family=args.family, degree=args.degree, noise=args.noise
    )
    if args.json:
        print(json.dumps(_plain(found.to_dict()), indent=2))
    else:
        print(fit_report(source_name(args.file), points, found))
    return EXIT_OK


def _plain(x: Any) -> Any:
    """JSON without NaN or infinity (strict parsers refuse them): such numbers become null."""
    if isinstance(x, float):
        return x if math.isfinite(x) else None
    if isinstance(x, dict):
        return {k: _plain(v) for k, v in x.items()}
    if isinstance(x, list | tuple):
        return [_plain(v) for v in x]
    return x


def _criterion(x: float | None) -> str:
    return "—" if x is None or not math.isfinite(x) else f"{x:.2f}"


def fit_report(source: str, points: list[PointIn], found: OfflineFit) -> str:
    """The fit of a file in words and columns, for a terminal (units are the file's own)."""
    import shared
    from server.formatting import significant, uncertainty

    f = found.fit
    lines = [f"Fit of {source}: {len(points)} points, {f.n_used} used.", ""]

    def point(i: int) -> str:
        return f"#{i + 1} ({points[i].reference_value:g}, {points[i].reading:g})"

    options = ", ".join(f"{k}={v}" for k, v in f.options.items() if v not in (False, None))
    family = f"{f.family} ({options})" if options else f.family
    if found.ranking is not None:  # named as in the ranking's table below
        label = next((c.label for c in found.ranking.candidates if c.fit is f), family)
        family = f"{label}  [{found.chosen_because}]"
    noise = {
        "value": "in the value (plain least squares)",
        "reading": "in the reading (effective-variance weights)",
    }[f.noise]
    lines += [
        f"family        {family}",
        f"formula       {shared.get_family(f.family).formula}",
        f"noise         {noise}",
        "parameters    (value, standard uncertainty)",
    ]
    width = max(len(n) for n in f.params)
    shown = {name: significant(value) for name, value in f.params.items()}
    digits = max(len(text) for text in shown.values())
    for name, text in shown.items():
        lines.append(f"  {name:<{width}}  {text:>{digits}}  ± {uncertainty(f.stderr[name])}")
    lo, hi = f.valid_range
    lines += [
        f"dof           {f.dof}",
        f"rse           {significant(f.rse, 4)} (value units)",
        f"valid range   {lo:g} to {hi:g} (reading units; outside it a value is an extrapolation)",
        f"monotone      {'yes' if f.monotone else 'NO: one reading stands for two values'}",
    ]
    lines.append(
        "excluded      "
        + ("none" if not f.excluded else f"{point(f.excluded[0][0])}: {f.excluded[0][1]}")
    )
    lines += [f"              {point(i)}: {why}" for i, why in f.excluded[1:]]
    suspects = found.diagnostics["suspects"]
    lines.append(
        "suspect       "
        + ("none" if not suspects else f"{point(suspects[0]['index'])}: {suspects[0]['reason']}")
    )
    lines += [f"              {point(s['index'])}: {s['reason']}" for s in suspects[1:]]
    lof = found.diagnostics["lack_of_fit"]
    if lof is None:
        lines.append("lack of fit   not tested (no reference value was measured twice)")
    else:
        verdict = "SIGNIFICANT at 5 %" if lof["significant"] else "not significant at 5 %"
        lines.append(
            f"lack of fit   F = {lof['f']:.3g} on {lof['dof_lack_of_fit']} and "
            f"{lof['dof_pure_error']} dof, p = {lof['p_value']:.2g}: {verdict}"
        )
    if found.ranking is not None:
        lines += ["", *_ranking_lines(found.ranking)]
    return "\n".join(line.rstrip() for line in lines)


def _ranking_lines(ranking: Ranking) -> list[str]:
    fitted = [c for c in ranking.candidates if c.fit is not None]
    failed = [c for c in ranking.candidates if c.fit is None]
    width = max(len(c.label) for c in fitted)
    lines = [
        f"Ranking by AICc (lower is better): {len(fitted)} of {len(ranking.candidates)} catalog "
        f"families fit these points.",
        f"  {'family':<{width}}  params      AICc    dAICc       BIC  monotone",
    ]
    for c in fitted:
        mark = "  <- recommended" if c is ranking.recommended else ""
        lines.append(
            f"  {c.label:<{width}}  {c.n_params:>6}  {_criterion(c.aicc):>8}  "
            f"{_criterion(c.delta_aicc):>7}  {_criterion(c.bic):>8}  "
            f"{'yes' if c.fit is not None and c.fit.monotone else 'no':<8}{mark}"
        )
    lines.append(f"Recommendation: {ranking.reason}.")
    if failed:
        lines.append("Could not be fitted: " + ", ".join(c.family for c in failed) + ".")
    return lines


def _configure_fit(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "file",
        metavar="FILE",
        help="CSV with a header row: reference_value,reading[,excluded,exclude_reason]; "
        "'-' reads standard input",
    )
    parser.add_argument(
        "--family",
        metavar="F",
        help="the model family to fit; without it every catalog family is fitted and ranked",
    )
    parser.add_argument(
        "--degree",
        type=_degree,
        metavar="N",
        help="polynomial degree N (or M,N for rational); without --family it applies to the "
        "family it suits",
    )
    parser.add_argument(
        "--noise",
        choices=["value", "reading"],
        default="value",
        help="where the scatter is: in the value (default) or in the reading (e.g. ADC noise)",
    )
    parser.add_argument(
        "--json", action="store_true", help="print one JSON document (Fit.to_dict plus ranking)"
    )
