"""The arithmetic of `sensorledger capture`, with no terminal, port or network: reading a number
from a line the unit printed, collecting one point's samples until they are steady, rejecting
spikes by the median and MAD, the point's statistics, and the steps of a plan. Standard library
only; ``server/cli/capture.py`` is the shell around it."""

from __future__ import annotations

import math
import re
import statistics
from collections import deque
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field

# the last number on the line: 2048, -3.5, .25, 1.2e3
NUMBER = re.compile(r"[-+]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][-+]?\d+)?")
MAD_TO_SD = 1.482602218505602  # 1 / Phi^-1(3/4): the MAD of a normal sample is 0.6745 sigma


def compile_pattern(text: str | None) -> re.Pattern[str] | None:
    """``--pattern``: a regular expression whose first group (else its whole match) is the
    reading; ``None`` for the default (the last number on the line). ValueError says what is
    wrong with it."""
    if text is None:
        return None
    try:
        pattern = re.compile(text)
    except re.error as exc:
        raise ValueError(f"--pattern {text!r} is not a regular expression: {exc}") from None
    return pattern


def reading_of(line: str, pattern: re.Pattern[str] | None = None) -> float | None:
    """The reading on a line, or None when the line carries none (garbage, a boot message,
    a line cut in half)."""
    if pattern is None:
        found = NUMBER.findall(line)
        text = found[-1] if found else None
    else:
        match = pattern.search(line)
        if match is None:
            return None
        text = match.group(1) if pattern.groups else match.group(0)
    if text is None:
        return None
    try:
        x = float(text)
    except ValueError:
        return None
    return x if math.isfinite(x) else None


def robust_sd(values: Sequence[float], floor: float) -> float:
    """The scaled MAD (1.4826 MAD), never below ``floor`` (a quantised reading's MAD is often 0)."""
    med = statistics.median(values)
    mad = statistics.median(abs(v - med) for v in values)
    return max(MAD_TO_SD * mad, floor)


def split_outliers(
    values: Sequence[float], k: float, floor: float
) -> tuple[list[float], list[float]]:
    """(kept, rejected): rejected are further than ``k`` robust SDs from the median."""
    med = statistics.median(values)
    limit = k * robust_sd(values, floor)
    kept = [v for v in values if abs(v - med) <= limit]
    rejected = [v for v in values if abs(v - med) > limit]
    return kept, rejected


@dataclass(frozen=True, slots=True)
class Settings:
    """How a point is taken. ``count``: take exactly that many samples; else collect until the
    standard deviation of the last ``window`` samples (spikes left out) is at most
    ``threshold``; without a threshold, ``window`` samples. ``reject_k`` robust SDs from the
    median is a spike; ``spread_floor`` (reading units) is the least robust SD assumed;
    ``max_samples`` ends a point that never settles (marked unsteady)."""

    window: int = 20
    count: int | None = None
    threshold: float | None = None
    reject_k: float = 3.5
    spread_floor: float = 0.5
    max_samples: int = 600

    def __post_init__(self) -> None:
        if self.window < 3:
            raise ValueError("--window must be at least 3 samples")
        if self.count is not None and self.count < 3:
            raise ValueError("--count must be at least 3 samples")
        if self.threshold is not None and not (self.threshold > 0):
            raise ValueError("--threshold must be above 0")
        if not (self.reject_k > 0):
            raise ValueError("--reject must be above 0")
        if not (self.spread_floor >= 0):
            raise ValueError("--spread-floor must be 0 or more")
        if self.max_samples < self.needed:
            raise ValueError("--max-samples must be at least the samples a point needs")

    @property
    def needed(self) -> int:
        """Samples a point needs at least."""
        return self.count if self.count is not None else self.window


@dataclass(frozen=True, slots=True)
class PointStats:
    """One captured point: the mean of the kept samples, their SD, how many were kept and
    rejected, how many lines carried no reading, and whether the samples settled."""

    reference_value: float
    reading: float
    sd: float
    n: int
    rejected: int
    garbage: int
    steady: bool = True


def point_stats(
    reference_value: float,
    samples: Sequence[float],
    settings: Settings,
    *,
    garbage: int = 0,
    steady: bool = True,
) -> PointStats:
    kept, rejected = split_outliers(samples, settings.reject_k, settings.spread_floor)
    return PointStats(
        reference_value=reference_value,
        reading=statistics.fmean(kept),
        sd=statistics.stdev(kept) if len(kept) > 1 else 0.0,
        n=len(kept),
        rejected=len(rejected),
        garbage=garbage,
        steady=steady,
    )


@dataclass(slots=True)
class Window:
    """The last ``size`` samples, for the live display's stability indicator."""

    size: int
    values: deque[float] = field(default_factory=deque)

    def add(self, x: float) -> None:
        self.values.append(x)
        while len(self.values) > self.size:
            self.values.popleft()

    def spread(self, k: float, floor: float) -> float | None:
        """SD of the window with spikes left out; None until it is full."""
        if len(self.values) < self.size:
            return None
        kept, _ = split_outliers(list(self.values), k, floor)
        return statistics.stdev(kept) if len(kept) > 1 else 0.0


@dataclass(slots=True)
class Collector:
    """The samples of one point, from the moment it was confirmed."""

    reference_value: float
    settings: Settings
    samples: list[float] = field(default_factory=list)
    garbage: int = 0
    done: PointStats | None = None

    def add_line(self, line: str, pattern: re.Pattern[str] | None = None) -> PointStats | None:
        """Feed one line the unit printed; the point once it is complete, else None."""
        x = reading_of(line, pattern)
        if x is None:
            self.garbage += 1
            return None
        return self.add(x)

    def add(self, x: float) -> PointStats | None:
        if self.done is not None:
            return self.done
        self.samples.append(x)
        s = self.settings
        if s.count is not None:
            if len(self.samples) >= s.count:
                self.done = self._finish(self.samples, steady=True)
        elif len(self.samples) >= s.window:
            last = self.samples[-s.window :]
            if s.threshold is None:
                self.done = self._finish(last, steady=True)
            else:
                kept, _ = split_outliers(last, s.reject_k, s.spread_floor)
                spread = statistics.stdev(kept) if len(kept) > 1 else 0.0
                if spread <= s.threshold:
                    self.done = self._finish(last, steady=True)
                elif len(self.samples) >= s.max_samples:
                    self.done = self._finish(last, steady=False)
        return self.done

    def _finish(self, samples: Sequence[float], *, steady: bool) -> PointStats:
        return point_stats(
            self.reference_value, samples, self.settings, garbage=self.garbage, steady=steady
        )


def parse_plan(text: str) -> list[float]:
    """``--plan 100,150,200``: the reference values in order (repeats allowed)."""
    values = []
    for part in text.replace(";", ",").split(","):
        part = part.strip()
        if not part:
            continue
        try:
            x = float(part)
        except ValueError:
            raise ValueError(f"--plan: {part!r} is not a number") from None
        if not math.isfinite(x):
            raise ValueError(f"--plan: {part!r} is not a finite number")
        values.append(x)
    if len(values) < 2:
        raise ValueError("--plan needs at least two reference values, e.g. 100,150,200")
    return values


def confirmation(line: str, planned: float) -> float:
    """The reference value an Enter confirms: the planned one, or the number typed with it.
    ValueError when the line is neither empty nor a number."""
    text = line.strip()
    if not text:
        return planned
    try:
        x = float(text)
    except ValueError:
        raise ValueError(f"{text!r} is not a number: press Enter alone for {planned:g}") from None
    if not math.isfinite(x):
        raise ValueError(f"{text!r} is not a finite number")
    return x


def csv_rows(points: Iterable[PointStats]) -> list[str]:
    """The captured points as CSV lines: ``reference_value,reading`` first (what ``sensorledger
    import`` reads), then ``sd,n,rejected``; numbers written exactly (repr)."""
    rows = ["reference_value,reading,sd,n,rejected"]
    for p in points:
        rows.append(f"{p.reference_value!r},{p.reading!r},{p.sd!r},{p.n},{p.rejected}")
    return rows


def notes_of(points: Sequence[PointStats], garbage_total: int, limit: int = 2000) -> str:
    """The session's notes: how the points were taken and each point's repeat statistics."""
    head = (
        f"Captured with sensorledger capture: each point is the mean of n samples, spikes "
        f"rejected; {garbage_total} line(s) without a reading skipped. "
        f"reference: mean (sd, n, rejected):"
    )
    parts = [
        f" {p.reference_value:g}: {p.reading:.6g} ({p.sd:.3g}, {p.n}, {p.rejected})"
        + ("" if p.steady else " unsteady")
        + ";"
        for p in points
    ]
    text = head
    for part in parts:
        if len(text) + len(part) > limit - 4:
            return text + " ..."
        text += part
    return text
