"""The float form: each family's formula in double, constants to 17 significant digits."""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass

from shared.fitting import Fit


@dataclass(frozen=True, slots=True)
class FloatForm:
    """C statements computing the value from ``double r``; ``$`` stands for the macro prefix.

    ``constants``: (macro suffix, value) printed as double literals with 17 digits.
    """

    constants: tuple[tuple[str, float], ...]
    body: tuple[str, ...]


def _params(fit: Fit) -> tuple[tuple[str, float], ...]:
    return tuple((name.upper(), float(value)) for name, value in fit.params.items())


def _horner_c(coefs: Sequence[str]) -> str:
    """Horner expression in ``r`` of coefficients given lowest power first."""
    expr = coefs[-1]
    for c in coefs[-2::-1]:
        expr = f"({expr}) * r + {c}"
    return expr


def _float_polynomial(fit: Fit) -> FloatForm:
    powers = {int(name[1:]): f"${name.upper()}" for name in fit.params}
    coefs = [powers.get(k, "0.0") for k in range(max(powers) + 1)]
    return FloatForm(_params(fit), (f"return (float)({_horner_c(coefs)});",))


def _float_rational(fit: Fit) -> FloatForm:
    p = [f"${n.upper()}" for n in fit.params if n.startswith("p")]
    q = ["1.0"] + [f"${n.upper()}" for n in fit.params if n.startswith("q")]
    return FloatForm(_params(fit), (f"return (float)(({_horner_c(p)}) / ({_horner_c(q)}));",))


def _fixed(body: str) -> Callable[[Fit], FloatForm]:
    def build(fit: Fit) -> FloatForm:
        return FloatForm(_params(fit), (body,))

    return build


def _float_beta(fit: Fit) -> FloatForm:
    t0_k = float(fit.options["t0_c"]) + 273.15
    return FloatForm(
        (*_params(fit), ("T0_K", t0_k)),
        ("return (float)(1.0 / (1.0 / $T0_K + log(r / $R0) / $B) - 273.15);",),
    )


def _float_exp_rise(fit: Fit) -> FloatForm:
    offset = " + $C" if "c" in fit.params else ""
    return FloatForm(_params(fit), (f"return (float)(-$A * expm1(-$B * r){offset});",))


FloatBuilder = Callable[[Fit], FloatForm]
FLOAT_FORMS: dict[str, FloatBuilder] = {
    "line": _float_polynomial,
    "polynomial": _float_polynomial,
    "inverse": _fixed("return (float)($K / r + $V0);"),
    "inverse_offset": _fixed("return (float)($K / (r + $R0) + $V0);"),
    "power": _fixed("return (float)($A * pow(r, $B));"),
    "power_offset": _fixed("return (float)($A * pow(r + $R0, $B));"),
    "steinhart_hart": _fixed(
        "double lr = log(r);\nreturn (float)(1.0 / ($A + $B * lr + $C * lr * lr * lr) - 273.15);"
    ),
    "beta": _float_beta,
    "exp_rise": _float_exp_rise,
    "rational": _float_rational,
}
NO_FLOAT_FORM = {
    "callendar_van_dusen": "the value inverts R(t), by Newton's method below 0 degC",
    "table": "it is a table already (its knots are not at whole codes)",
}
