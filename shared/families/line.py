"""line: value = c0 + c1 r (or c1 r through zero). Potentiometers, load cells."""

from __future__ import annotations

from typing import Any

from shared.errors import BadInput
from shared.families._monomial import MonomialFamily
from shared.families.base import Options, check_known_options


class Line(MonomialFamily):
    def check_options(self, options: Options) -> dict[str, Any]:
        opts = check_known_options(self.name, options, self.options)
        if not isinstance(opts["through_zero"], bool):
            raise BadInput("line: through_zero must be true or false")
        return opts


FAMILY = Line(
    name="line",
    formula="value = c0 + c1·r   (through_zero: value = c1·r)",
    typical="potentiometer, load cell",
    options={"through_zero": False},
)
