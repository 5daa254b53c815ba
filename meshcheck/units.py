"""Length units of supplied meshes.

No common mesh format stores a length unit (the I-DEAS universal file's
dataset 164 aside); supplied meshes are often in millimetres.  A factor-1000
mistake moves every frequency limit by 1000, so a missing unit is only
accepted when the evidence leaves one reading:

* the bounding box: its diagonal is plausible for an acoustic fluid domain
  in metres only, in millimetres only, or in both (ambiguous) or neither;
* a speed of sound stated by a material card (Nastran MAT10, Abaqus
  *ACOUSTIC MEDIUM), which is in file length units per second: about 343
  in a metre model, about 343 000 in a millimetre model.

:func:`decide_unit` combines them and raises UnitsError, spelling out both
readings (domain size and elements per wavelength), when they do not settle
the unit.
"""
from __future__ import annotations

from dataclasses import dataclass

from .errors import UnitsError

__all__ = ["UNIT_FACTORS", "UNIT_NAMES", "unit_factor", "guess_unit", "UnitGuess",
           "speed_unit", "decide_unit", "UnitDecision", "REFERENCE_SPEED"]

#: metres per unit (the inch and foot are exact by definition, international yard and pound, 1959).
UNIT_FACTORS: dict[str, float] = {"m": 1.0, "cm": 1e-2, "mm": 1e-3, "in": 0.0254, "ft": 0.3048}
UNIT_NAMES = {"m": "metres", "cm": "centimetres", "mm": "millimetres", "in": "inches",
              "ft": "feet"}

#: Plausible diagonal of an acoustic fluid domain, metres (common practice, no
#: source: from a small coupler cavity to a large hall).
PLAUSIBLE_DIAGONAL_M = (0.02, 200.0)

#: Plausible speed of sound of the fluids an acoustic model holds, m/s (common
#: practice, no source: heavy gases ~130 m/s up to liquids ~2000 m/s).
PLAUSIBLE_SPEED_M_S = (100.0, 2500.0)

#: Speed of sound used to state elements per wavelength in messages: dry air at
#: 20 deg C, 331.3 sqrt(1 + 20/273.15) = 343.2 m/s (see REFERENCES, sound speed).
REFERENCE_SPEED = 343.2


def unit_factor(unit: str, source: str = "") -> float:
    """Metres per unit; raises UnitsError naming the allowed units."""
    try:
        return UNIT_FACTORS[unit.strip().lower()]
    except (KeyError, AttributeError):
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

    @property
    def plausible(self) -> tuple[str, ...]:
        lo, hi = PLAUSIBLE_DIAGONAL_M
        return tuple(u for u in ("m", "mm") if lo <= self.readings[u] <= hi)


def guess_unit(diagonal: float) -> UnitGuess:
    """Classify a bounding-box diagonal (file units) as metres, millimetres or ambiguous."""
    g = UnitGuess(None, float(diagonal))
    ok = g.plausible
    return UnitGuess(ok[0] if len(ok) == 1 else None, float(diagonal))


def speed_unit(speed: float) -> str | None:
    """"m" or "mm" when a speed of sound (file length units per second) is plausible in one only."""
    lo, hi = PLAUSIBLE_SPEED_M_S
    ok = [u for u in ("m", "mm") if lo <= speed * UNIT_FACTORS[u] <= hi]
    return ok[0] if len(ok) == 1 else None


@dataclass(frozen=True)
class UnitDecision:
    """The unit chosen for a file and why (for reports)."""

    unit: str
    reason: str


def _fmt(x: float) -> str:
    return f"{x:.2g}" if x < 10 else f"{x:.3g}"


def decide_unit(diagonal: float, edge: float, label: str = "",
                speeds: tuple[tuple[str, float], ...] = (),
                fmax_hint: float | None = None) -> UnitDecision:
    """Unit of a file that does not state one.

    diagonal : bounding-box diagonal, file units; edge : typical (median) edge
    length, file units; speeds : (card, speed of sound in file units per s)
    from material cards; fmax_hint : upper frequency for the message, Hz.
    Raises UnitsError when the evidence leaves no single reading.
    """
    g = guess_unit(diagonal)
    where = f"{label}: " if label else ""
    votes = {}
    for card, c in speeds:
        u = speed_unit(c)
        if u is not None:
            votes.setdefault(u, (card, c))
    mat = next(iter(votes)) if len(votes) == 1 else None
    if g.unit is not None and (mat is None or mat == g.unit):
        reason = f"domain diagonal {diagonal:.4g} is plausible in {UNIT_NAMES[g.unit]} only"
        if mat:
            reason += f" and {votes[mat][0]} gives c = {votes[mat][1]:.4g} {g.unit}/s"
        return UnitDecision(g.unit, reason)
    if g.unit is not None and mat is not None:
        card, c = votes[mat]
        raise UnitsError(f"{where}the domain size reads as {UNIT_NAMES[g.unit]} (diagonal "
                         f"{diagonal:.4g}) but {card} gives a speed of sound of {c:.4g}, which "
                         f"reads as {UNIT_NAMES[mat]} per second; the file is inconsistent - "
                         "pass --units m or --units mm")
    if g.unit is None and mat is not None and mat in g.plausible:
        card, c = votes[mat]
        return UnitDecision(mat, f"{card} gives c = {c:.4g} {mat}/s (the domain size alone "
                                 "was ambiguous)")
    f = fmax_hint if fmax_hint and fmax_hint > 0 else 1000.0
    lam = REFERENCE_SPEED / f
    r = g.readings
    epw_m = lam / (edge * UNIT_FACTORS["m"]) if edge > 0 else float("inf")
    epw_mm = lam / (edge * UNIT_FACTORS["mm"]) if edge > 0 else float("inf")
    fs = f"{f / 1000:g} kHz" if f >= 1000 else f"{f:g} Hz"
    why = ("the domain size does not tell it" if g.plausible else
           "the domain size is implausible in both units")
    if len(votes) > 1:
        why += " and the material cards disagree"
    raise UnitsError(f"{where}the length unit is not stored in the file and {why} (diagonal "
                     f"{diagonal:.4g}: {r['m']:.4g} m if metres, {r['mm']:.4g} m if "
                     f"millimetres; elements per wavelength at {fs} in air: {_fmt(epw_m)} if "
                     f"metres, {_fmt(epw_mm)} if millimetres); pass --units m or --units mm")
