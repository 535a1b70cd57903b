"""The catalog of model families: every module in this package that defines ``FAMILY``."""

from __future__ import annotations

import importlib
import pkgutil

from shared.errors import UnknownFamily
from shared.families.base import Family

FAMILIES: dict[str, Family] = {}

for _info in sorted(pkgutil.iter_modules(__path__), key=lambda m: m.name):
    if _info.name.startswith("_") or _info.name == "base":
        continue
    _module = importlib.import_module(f"{__name__}.{_info.name}")
    _family: Family = _module.FAMILY
    FAMILIES[_family.name] = _family


def get_family(name: str) -> Family:
    """The family called ``name``; an error listing the catalog when there is none."""
    try:
        return FAMILIES[name]
    except KeyError:
        raise UnknownFamily(
            f"unknown family {name!r}; the catalog has: {', '.join(sorted(FAMILIES))}"
        ) from None


__all__ = ["FAMILIES", "Family", "get_family"]
