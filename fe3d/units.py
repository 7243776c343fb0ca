"""The one pint registry of fe3d. Internally every number is SI (m, s, kg)."""

from __future__ import annotations

import re
from functools import lru_cache
from typing import Any

__all__ = ["DIMENSIONS", "from_si", "to_seconds", "to_si", "unit_is"]

# dimension name → (pint dimensionality, an example shown in error messages)
DIMENSIONS: dict[str, tuple[str, str]] = {
    "length": ("[length]", "'12 m'"),
    "time": ("[time]", "'30 d'"),
    "velocity": ("[length] / [time]", "'12 m/d'"),
    "concentration": ("[mass] / [length] ** 3", "'5 ug/L'"),
    "density": ("[mass] / [length] ** 3", "'1650 kg/m^3'"),
    "specific_volume": ("[length] ** 3 / [mass]", "'0.35 L/kg'"),
    "diffusivity": ("[length] ** 2 / [time]", "'1e-9 m^2/s'"),
    "flow_rate": ("[length] ** 3 / [time]", "'250 m^3/d'"),
    "leakance": ("1 / [time]", "'0.5 d^-1'"),
    "angle": ("[]", "'30 deg'"),
    "mass_ratio": ("[]", "'250 mg/kg'"),
    "mass_rate": ("[mass] / [time]", "'2 g/d'"),
    "second_order_rate": ("[length] ** 3 / [mass] / [time]", "'0.01 L/mg/d'"),
    "reaction_rate": ("[mass] / [length] ** 3 / [time]", "'0.5 mg/L/d'"),
}


# a number, then a unit made of names with optional integer powers joined by '/', '*' or
# spaces ("12 m/d", "1e-9 m^2/s", "1650 kg/m**3"); a bare unit or a trailing number is refused
_QUANTITY = re.compile(
    r"^\s*[+-]?(\d+(\.\d*)?|\.\d+)([eE][+-]?\d+)?\s*"
    r"[A-Za-zµμ_]+((\^|\*\*)-?\d+)?(\s*[/*]?\s*[A-Za-zµμ_]+((\^|\*\*)-?\d+)?)*\s*$")


@lru_cache(maxsize=1)
def _registry() -> Any:
    import pint

    reg = pint.UnitRegistry()
    return reg


def to_si(text: object, dimension: str) -> float:
    """Parse ``"12 m/d"`` and return its value in SI base units.

    Raises ``ValueError`` with a message naming the expected dimension when the text is not a
    number with a unit of that dimension. Never evaluates anything but pint's unit grammar.
    """
    dim, example = DIMENSIONS[dimension]
    if not isinstance(text, str):
        msg = f"must be a {dimension.replace('_', ' ')} written with its unit, e.g. {example}"
        raise ValueError(msg)
    if not _QUANTITY.match(text):
        msg = f"must be a number followed by a unit, e.g. {example}"
        raise ValueError(msg)
    reg = _registry()
    try:
        q = reg.Quantity(text.strip())
    except Exception:  # pint raises many types for bad text
        msg = f"has a unit fe3d does not know; write e.g. {example}"
        raise ValueError(msg) from None
    if not hasattr(q, "check") or not q.check(dim):
        msg = f"must be a {dimension.replace('_', ' ')} with a unit, e.g. {example}"
        raise ValueError(msg)
    value = float(q.to_base_units().magnitude)
    if value != value or value in (float("inf"), float("-inf")):
        msg = f"must be a finite {dimension.replace('_', ' ')}, e.g. {example}"
        raise ValueError(msg)
    return value


def from_si(value: float, unit: str) -> float:
    """Convert an SI value to ``unit`` (e.g. seconds to ``"d"``)."""
    reg = _registry()
    q = reg.Quantity(1.0, unit)
    return float(value / q.to_base_units().magnitude)


def unit_is(unit: str, dimension: str) -> bool:
    """True when ``unit`` (e.g. ``"mg/L"``) has the given fe3d dimension."""
    try:
        return bool(_registry().Quantity(1.0, unit).check(DIMENSIONS[dimension][0]))
    except Exception:
        return False


def to_seconds(unit: str) -> float:
    """Length of one ``unit`` of time in seconds (e.g. ``"d"`` → 86400)."""
    return 1.0 / from_si(1.0, unit)
