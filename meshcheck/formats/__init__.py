"""Format readers of meshcheck: content sniffing, own readers, pre-scans.

* :mod:`.sniff` tells the format from the first bytes of a file;
* :mod:`.nastran`, :mod:`.abaqus`, :mod:`.unv` are meshcheck's own readers;
* other formats go through meshio (:mod:`.via_meshio`), guarded;
* :mod:`.prescan` counts entities independently of the readers;
* :mod:`.raw` holds the :class:`RawMesh` record they all return.
"""
from .raw import RawBlock, RawMesh, SpeedHint, clean_name

__all__ = ["RawBlock", "RawMesh", "SpeedHint", "clean_name"]
