"""sensorledger's calibration engine: pure numpy/scipy, usable from a notebook or a script.

>>> from shared import fit
>>> f = fit("line", reading=[0, 1, 2, 3], value=[0.1, 1.0, 2.1, 2.9])
>>> sorted(f.params)
['c0', 'c1']
"""

from shared.acceptance import Decision, decide
from shared.errors import (
    BadInput,
    CalibrationError,
    OutOfRange,
    SingularFit,
    TooFewPoints,
    UnknownFamily,
)
from shared.families import FAMILIES, get_family
from shared.fitting import Fit, Interval, fit, fit_many
from shared.version import ENGINE_VERSION

__all__ = [
    "ENGINE_VERSION",
    "FAMILIES",
    "BadInput",
    "CalibrationError",
    "Decision",
    "Fit",
    "Interval",
    "OutOfRange",
    "SingularFit",
    "TooFewPoints",
    "UnknownFamily",
    "decide",
    "fit",
    "fit_many",
    "get_family",
]
