"""Length units of supplied meshes.

No common mesh format stores a length unit; supplied meshes are often in
millimetres.  A factor-1000 mistake moves every frequency limit by 1000, so a
missing unit is only accepted when the size of the domain leaves one reading.
"""
from __future__ import annotations

from dataclasses import dataclass

from .errors import UnitsError

__all__ = ["UNIT_FACTORS", "UNIT_NAMES", "unit_factor", "guess_unit", "UnitGuess"]

#: metres per unit (the inch is exact by definition, 1959 international yard and pound).
UNIT_FACTORS: dict[str, float] = {"m": 1.0, "cm": 1e-2, "mm": 1e-3, "in": 0.0254}
UNIT_NAMES = {"m": "metres", "cm": "centimetres", "mm": "millimetres", "in": "inches"}

#: Plausible diagonal of an acoustic fluid domain, metres (common practice, no
#: source: from a small coupler cavity to a large hall).
PLAUSIBLE_DIAGONAL_M = (0.02, 200.0)


def unit_factor(unit: str, source: str = "") -> float:
    """Metres per unit; raises UnitsError naming the allowed units."""
    try:
        return UNIT_FACTORS[unit.strip().lower()]
    except KeyError:
        where = f"{source}: " if source else ""
        raise UnitsError(f"{where}unknown length unit '{unit}'; use one of "
                         f"{', '.join(UNIT_FACTORS)}") from None


@dataclass(frozen=True)
class UnitGuess:
    """Outcome of reading the unit off the domain size.

    unit : "m" or "mm" when only one reading is plausible, else None.
    diagonal : bounding-box diagonal in file units.
    """

    unit: str | None
    diagonal: float

    @property
    def readings(self) -> dict[str, float]:
        """Diagonal in metres under each candidate unit."""
        return {u: self.diagonal * UNIT_FACTORS[u] for u in ("m", "mm")}


def guess_unit(diagonal: float) -> UnitGuess:
    """Classify a bounding-box diagonal (file units) as metres, millimetres or ambiguous."""
    lo, hi = PLAUSIBLE_DIAGONAL_M
    ok = [u for u in ("m", "mm") if lo <= diagonal * UNIT_FACTORS[u] <= hi]
    return UnitGuess(ok[0] if len(ok) == 1 else None, float(diagonal))
