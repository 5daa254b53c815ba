"""What a format reader hands back before units and checks: :class:`RawMesh`.

Readers fill these small frozen records; :mod:`meshcheck.reading` cross-checks
them (pre-scan counts, node counts, region alignment), settles the length
unit and turns them into a :class:`~meshcheck.mesh.Mesh`.  Coordinates stay
in the unit of the file here.
"""
from __future__ import annotations

import re
from dataclasses import dataclass, field

import numpy as np

__all__ = ["RawBlock", "RawMesh", "SpeedHint", "clean_name"]


@dataclass(frozen=True)
class RawBlock:
    """Cells of one type as read.

    type : meshio cell type name (``tetra``, ``hexahedron20``, ...).
    cells : (m, k) int32 or int64 0-based indices into ``RawMesh.points``, meshio/VTK node
        order.
    region : (m,) int64 region tag of each cell (0 = none); one tag for the block may be
        a read-only broadcast.
    ids : (m,) int64 element numbers of the file (for messages), or None.
    in_range : the reader checked that every index is a row of ``RawMesh.points`` (the
        cross-checks then skip their pass over the cells).
    """

    type: str
    cells: np.ndarray
    region: np.ndarray
    ids: np.ndarray | None = None
    in_range: bool = False


@dataclass(frozen=True)
class SpeedHint:
    """A speed of sound stated by a material card, in file length units per second.

    card : where it comes from, e.g. ``"MAT10 3"``; regions : region tags using it.
    """

    card: str
    speed: float
    regions: tuple[int, ...] = ()


@dataclass(frozen=True)
class RawMesh:
    """A mesh as a reader found it.

    points : (n, 3) float64 coordinates in the unit of the file.
    blocks : cell blocks of every dimension found (volume and boundary).
    region_names : region tag -> name (names cleaned by :func:`clean_name`).
    format : human-readable format name for messages.
    point_ids : (n,) int64 node numbers of the file, or None (0-based order).
    unit : length unit stated by the file (I-DEAS dataset 164) or None.
    unit_source : where ``unit`` comes from, for messages.
    speeds : speeds of sound stated by material cards.
    counts : (what, pre-scan count, read count) triples for the cross-check.
    ignored : card or element names read but not used -> how many.
    notes : (code, message, count) of what the reader decided and the user should know.
    """

    points: np.ndarray
    blocks: tuple[RawBlock, ...]
    region_names: dict[int, str] = field(default_factory=dict)
    format: str = ""
    point_ids: np.ndarray | None = None
    unit: str | None = None
    unit_source: str = ""
    speeds: tuple[SpeedHint, ...] = ()
    counts: tuple[tuple[str, int, int], ...] = ()
    ignored: dict[str, int] = field(default_factory=dict)
    notes: tuple[tuple[str, str, int], ...] = ()


_CTRL = re.compile(r"[\x00-\x1f\x7f-\x9f\u2028\u2029\u200b-\u200f\u202a-\u202e\u2066-\u2069]")


def clean_name(raw: str | bytes, limit: int = 80) -> str:
    """A name from a file made safe to print: control and bidi characters escaped, length capped."""
    if isinstance(raw, bytes):
        raw = raw.decode("utf-8", errors="replace")
    s = _CTRL.sub(lambda m: f"\\x{ord(m.group()):02x}" if ord(m.group()) < 256
                  else f"\\u{ord(m.group()):04x}", raw.strip())
    return s if len(s) <= limit else s[:limit - 3] + "..."
