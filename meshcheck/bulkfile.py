"""Writing large output files (the VTU of a large mesh) past the page cache.

A file written the ordinary way is copied into page-cache pages the kernel must first find
and clear. For the 529 MB VTU of a 4.77M-tet audit that copy took the writing thread 0.12 s
of CPU on the project's machine when the pages had been freed moments before, and 1.2-1.4 s
when they had not (a virtual machine whose host takes back the memory its guest leaves free:
free page reporting). Written with ``O_DIRECT`` (Linux), the device reads the data from an
aligned buffer of ours: 0.28-0.48 s of waiting and about 0.01 s of CPU for the same 529 MB.

:class:`BulkFile` falls back to ordinary writes wherever that does not apply: files smaller
than :data:`DIRECT_MIN_BYTES`, systems without ``O_DIRECT``, file systems that refuse it
(at ``open`` or at the first write), and devices slower than :data:`MIN_DIRECT_RATE`, on
which waiting for the device would cost more than the copy. The bytes written are the same
either way."""
from __future__ import annotations

import errno
import mmap
import os
import time
from pathlib import Path

__all__ = ["BulkFile", "DIRECT_MIN_BYTES", "supports_direct"]

#: files expected to be smaller than this are written the ordinary way (bytes)
DIRECT_MIN_BYTES = 64 << 20
#: bytes per direct write (the aligned buffer's size; 2, 4 and 8 MiB wrote 529 MB equally
#: fast on the project's machine, 0.37-0.48 s, and the buffer adds to the peak memory)
BUFFER_BYTES = 2 << 20
#: a direct write's offset, length and memory must be multiples of the device's logical
#: block size; 4096 covers the usual 512- and 4096-byte devices
_ALIGN = 4096
#: bytes written directly before the device's rate is judged
PROBE_BYTES = 32 << 20
#: below this rate (bytes/s) the rest of the file is written the ordinary way: a judgement
#: (a copy into the page cache costs about 0.2-2.6 ms of CPU per MiB on the project's
#: machine, whose direct writes ran at 1.1-2.1 GB/s; a slower disk makes the end of the
#: audit wait for it)
MIN_DIRECT_RATE = 500e6


class BulkFile:
    """A new file written sequentially (``write``), then optionally patched (``pwrite``),
    then closed; ``expected`` is the file's expected size in bytes (it decides whether
    direct writes are tried). Use as a context manager.

    ``direct`` tells whether the file is being written directly (it turns False when the
    writer falls back); ``direct_bytes`` counts the bytes that were."""

    def __init__(self, path: str | Path, expected: int):
        self.path = Path(path)
        self.direct = False
        self.direct_bytes = 0
        self._buf: mmap.mmap | None = None
        self._fill = 0
        self._spent = 0.0
        flags = os.O_WRONLY | os.O_CREAT | os.O_TRUNC | getattr(os, "O_BINARY", 0)
        o_direct = getattr(os, "O_DIRECT", 0)
        self._fd = -1
        if o_direct and expected >= DIRECT_MIN_BYTES:
            try:
                self._fd = _open(self.path, flags | o_direct, 0o666)
                self.direct = True
            except OSError as exc:
                if exc.errno not in (errno.EINVAL, errno.EOPNOTSUPP):
                    raise
        if self._fd < 0:
            self._fd = os.open(self.path, flags, 0o666)
        if self.direct:
            self._buf = mmap.mmap(-1, BUFFER_BYTES)  # page-aligned anonymous memory
            self._view = memoryview(self._buf)

    def __enter__(self) -> BulkFile:
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def write(self, data) -> None:
        """Append ``data`` (bytes or any C-contiguous buffer)."""
        mv = memoryview(data).cast("B")
        if not self.direct:
            _write_all(self._fd, mv)
            return
        at = 0
        while at < len(mv):
            take = min(len(mv) - at, BUFFER_BYTES - self._fill)
            self._view[self._fill:self._fill + take] = mv[at:at + take]
            self._fill += take
            at += take
            if self._fill == BUFFER_BYTES:
                self._flush_full()
                if not self.direct:  # fell back: the rest the ordinary way
                    _write_all(self._fd, mv[at:])
                    return

    def _flush_full(self) -> None:
        """Write the full buffer directly (or, failing that, the ordinary way)."""
        t0 = time.perf_counter()
        try:
            n = _direct_write(self._fd, self._view)
        except OSError as exc:
            if exc.errno != errno.EINVAL:  # a file system that takes no direct writes
                raise
            self._ordinary()
            return
        self._spent += time.perf_counter() - t0
        self.direct_bytes += n
        if n < BUFFER_BYTES:  # a short write (rare): the rest, and the file, the ordinary way
            rest = bytes(self._view[n:])
            self._view[:len(rest)] = rest
            self._fill = len(rest)
            self._ordinary()
            return
        self._fill = 0
        if (self.direct_bytes >= PROBE_BYTES and self.direct_bytes - BUFFER_BYTES < PROBE_BYTES
                and self.direct_bytes / max(self._spent, 1e-9) < MIN_DIRECT_RATE):
            self._ordinary()  # a slow device: judged once, after the probe

    def _ordinary(self) -> None:
        """Leave direct writes: the buffer's bytes written the ordinary way, and the rest."""
        import fcntl

        fl = fcntl.fcntl(self._fd, fcntl.F_GETFL)
        fcntl.fcntl(self._fd, fcntl.F_SETFL, fl & ~os.O_DIRECT)
        self.direct = False
        if self._fill:
            _write_all(self._fd, self._view[:self._fill])
        self._fill = 0
        self._release()

    def _release(self) -> None:
        if self._buf is not None:
            self._view.release()
            self._buf.close()
            self._buf = None

    def pwrite(self, data, offset: int) -> None:
        """Overwrite bytes already written, at ``offset`` (e.g. a header whose numbers are
        known only at the end); the file continues the ordinary way."""
        if self.direct:
            self._ordinary()
        mv = memoryview(data).cast("B")
        while len(mv):
            n = os.pwrite(self._fd, mv, offset)
            mv, offset = mv[n:], offset + n

    def close(self) -> None:
        if self._fd < 0:
            return
        try:
            if self.direct and self._fill:  # the last partial block the ordinary way
                self._ordinary()
        finally:
            self._release()
            fd, self._fd = self._fd, -1
            os.close(fd)


def supports_direct(folder: str | Path) -> bool:
    """Whether files in ``folder`` take direct writes (one aligned block written to a
    temporary file there, then removed)."""
    import tempfile

    if not getattr(os, "O_DIRECT", 0):
        return False
    fd, name = tempfile.mkstemp(dir=folder)
    os.close(fd)
    buf = mmap.mmap(-1, _ALIGN)
    try:
        fd = os.open(name, os.O_WRONLY | os.O_DIRECT)
        try:
            return os.write(fd, buf) == _ALIGN
        finally:
            os.close(fd)
    except OSError:
        return False
    finally:
        buf.close()
        os.unlink(name)


_open = os.open  # (the direct open and writes by name: tests make them fail)
_direct_write = os.write


def _write_all(fd: int, mv: memoryview) -> None:
    while len(mv):
        mv = mv[os.write(fd, mv):]
