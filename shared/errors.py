"""Errors raised by the calibration engine.

Every failure the engine can foresee is a named subclass of :class:`CalibrationError`, so callers
(the server, a notebook) can tell bad input from a fit that cannot be made.
"""

from __future__ import annotations


class CalibrationError(Exception):
    """Base class of every error the engine raises on purpose."""


class BadInput(CalibrationError, ValueError):
    """The points or options cannot be fitted as given (NaN, mismatched lengths, unknown option)."""


class UnknownFamily(BadInput):
    """The family name is not in the catalog."""


class TooFewPoints(BadInput):
    """Fewer usable points than the family needs (parameters + 1, so that uncertainty exists)."""


class SingularFit(CalibrationError):
    """The points do not determine the parameters (degenerate design, no convergence)."""


class OutOfRange(CalibrationError):
    """A reading lies outside the valid range where a value was demanded."""
