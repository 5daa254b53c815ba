"""The SHA-256 of an input file, computed once per file version and shared: the JSON
report carries the mesh file's checksum, and the CLI starts it on a thread as early as
it can (hashlib and file reads release the GIL)."""
from __future__ import annotations

import hashlib
import threading
from concurrent.futures import Future
from pathlib import Path

__all__ = ["file_sha256"]


def _sha256(path: str) -> str | None:
    p = Path(path)
    if not p.is_file():
        return None
    h = hashlib.sha256()
    with open(p, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


_SUMS: dict = {}
_SUMS_LOCK = threading.Lock()


def file_sha256(path: str | Path | None, aside: bool = False):
    """SHA-256 (hex) of a file, or None when it is not a file; computed once per (path,
    size, modification time) and shared, so a checksum started early on a thread
    (``aside`` True: returns at once, e.g. while the mesh is read) is not computed again
    by the JSON report (a file changed since gives a new key, so a new checksum)."""
    if not path:
        return None
    p = Path(path)
    try:
        st = p.stat()
        key = (str(p.resolve()), st.st_size, st.st_mtime_ns)
    except OSError:
        return None
    with _SUMS_LOCK:
        fut = _SUMS.get(key)
        mine = fut is None
        if mine:
            fut = _SUMS[key] = Future()
            if len(_SUMS) > 64:  # a long-lived process: drop the oldest
                _SUMS.pop(next(iter(_SUMS)))
    if mine:
        def run():
            try:
                fut.set_result(_sha256(str(p)))
            except BaseException as exc:
                fut.set_exception(exc)
        if aside:
            threading.Thread(target=run, name="meshcheck-sha256", daemon=True).start()
            return None
        run()
    return None if aside else fut.result()
