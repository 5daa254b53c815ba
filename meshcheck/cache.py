"""meshcheck's on-disk cache folder (usable-kh tables, the kernels' ahead-of-time module)."""
from __future__ import annotations

import os
from pathlib import Path

__all__ = ["cache_dir"]


def cache_dir() -> Path | None:
    """Folder of meshcheck's on-disk cache: ``$MESHCHECK_CACHE_DIR``, else
    ``$XDG_CACHE_HOME/meshcheck``, else ``~/.cache/meshcheck``; None when
    ``MESHCHECK_CACHE_DIR=off``."""
    env = os.environ.get("MESHCHECK_CACHE_DIR")
    if env is not None:
        return None if env.strip().lower() in ("", "off", "0", "no") else Path(env)
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return Path(base) / "meshcheck"
