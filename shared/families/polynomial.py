"""polynomial: value = c0 + c1 r + ... + cd r^d, degree 2..10. Load cells, pressure transducers."""

from __future__ import annotations

from typing import Any

from shared.errors import BadInput
from shared.families._monomial import MonomialFamily
from shared.families.base import Options, check_known_options

MIN_DEGREE, MAX_DEGREE = 2, 10


class Polynomial(MonomialFamily):
    def check_options(self, options: Options) -> dict[str, Any]:
        opts = check_known_options(self.name, options, self.options)
        degree = opts["degree"]
        if isinstance(degree, bool) or not isinstance(degree, int):
            raise BadInput(f"polynomial: degree must be an integer {MIN_DEGREE}..{MAX_DEGREE}")
        if not MIN_DEGREE <= degree <= MAX_DEGREE:
            raise BadInput(f"polynomial: degree {degree} is outside {MIN_DEGREE}..{MAX_DEGREE}")
        if not isinstance(opts["through_zero"], bool):
            raise BadInput("polynomial: through_zero must be true or false")
        return opts


FAMILY = Polynomial(
    name="polynomial",
    formula="value = c0 + c1·r + … + cd·r^d   (degree d = 2..10)",
    typical="load cell, pressure transducer",
    options={"degree": 2, "through_zero": False},
)
