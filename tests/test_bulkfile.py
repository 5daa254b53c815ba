"""meshcheck.bulkfile: files written past the page cache hold the bytes of Python's own
buffered writes, whatever the path taken (direct, refused, slow device, short write)."""
import errno

import numpy as np
import pytest

from meshcheck import bulkfile
from meshcheck.bulkfile import BulkFile, supports_direct


@pytest.fixture
def small(monkeypatch):
    """Direct writes for any size, 64 KiB at a time, no rate probe."""
    monkeypatch.setattr(bulkfile, "DIRECT_MIN_BYTES", 0)
    monkeypatch.setattr(bulkfile, "BUFFER_BYTES", 64 << 10)
    monkeypatch.setattr(bulkfile, "PROBE_BYTES", 1 << 40)


def _pieces(seed=0, total=1_300_000):
    """Pieces of 1 byte to 200 kB (bytes, numpy arrays, memoryviews), ``total`` bytes."""
    rng = np.random.default_rng(seed)
    out, n = [], 0
    while n < total:
        k = int(rng.choice([1, 7, 4096, 4095, 65536, 65537, int(rng.integers(1, 200_000))]))
        a = rng.integers(0, 256, k, dtype=np.uint8)
        out.append([bytes(a), a, memoryview(a)][len(out) % 3])
        n += k
    return out


def _reference(tmp_path, pieces, name="ref.bin"):
    with open(tmp_path / name, "wb") as fh:  # the standard library's buffered writes
        for p in pieces:
            fh.write(p)
    return (tmp_path / name).read_bytes()


def _written(path, pieces, expected=None, patch=None):
    with BulkFile(path, sum(len(memoryview(p).cast("B")) for p in pieces)
                  if expected is None else expected) as f:
        for p in pieces:
            f.write(p)
        if patch is not None:
            f.pwrite(*patch)
    return f


def test_direct_writes_equal_buffered_ones(tmp_path, small):
    pieces = _pieces()
    f = _written(tmp_path / "d.bin", pieces)
    assert (tmp_path / "d.bin").read_bytes() == _reference(tmp_path, pieces)
    if supports_direct(tmp_path):
        # every full buffer went directly; only the last partial one the ordinary way
        size = (tmp_path / "d.bin").stat().st_size
        assert f.direct_bytes == size - size % (64 << 10) > 0
    else:
        assert f.direct_bytes == 0


def test_header_patched_at_the_end(tmp_path, small):
    pieces = _pieces(1)
    _written(tmp_path / "d.bin", pieces, patch=(b"HEADER", 3))
    ref = bytearray(_reference(tmp_path, pieces))
    ref[3:9] = b"HEADER"
    assert (tmp_path / "d.bin").read_bytes() == bytes(ref)


def test_small_files_are_written_the_ordinary_way(tmp_path, monkeypatch):
    monkeypatch.setattr(bulkfile, "_direct_write", None)  # would fail if called
    pieces = _pieces(2, total=100_000)
    f = _written(tmp_path / "s.bin", pieces)
    assert not f.direct and f.direct_bytes == 0
    assert (tmp_path / "s.bin").read_bytes() == _reference(tmp_path, pieces)


def test_file_system_refusing_direct_open(tmp_path, small, monkeypatch):
    real = bulkfile._open

    def refuse(path, flags, mode):
        if flags & getattr(bulkfile.os, "O_DIRECT", 0):
            raise OSError(errno.EINVAL, "Invalid argument")
        return real(path, flags, mode)
    monkeypatch.setattr(bulkfile, "_open", refuse)
    pieces = _pieces(3)
    f = _written(tmp_path / "r.bin", pieces)
    assert not f.direct and f.direct_bytes == 0
    assert (tmp_path / "r.bin").read_bytes() == _reference(tmp_path, pieces)


def test_file_system_refusing_direct_writes(tmp_path, small, monkeypatch):
    def refuse(fd, mv):
        raise OSError(errno.EINVAL, "Invalid argument")
    monkeypatch.setattr(bulkfile, "_direct_write", refuse)
    pieces = _pieces(4)
    f = _written(tmp_path / "w.bin", pieces)
    assert f.direct_bytes == 0
    assert (tmp_path / "w.bin").read_bytes() == _reference(tmp_path, pieces)


def test_other_write_errors_are_raised(tmp_path, small, monkeypatch):
    def full(fd, mv):
        raise OSError(errno.ENOSPC, "No space left on device")
    monkeypatch.setattr(bulkfile, "_direct_write", full)
    if not supports_direct(tmp_path):
        pytest.skip("the file system takes no direct writes")
    with pytest.raises(OSError, match="No space"):
        _written(tmp_path / "e.bin", _pieces(5))


def test_short_direct_write_continues_the_ordinary_way(tmp_path, small, monkeypatch):
    real = bulkfile._direct_write
    calls = []

    def short(fd, mv):  # the second direct write takes only its first 4096 bytes
        calls.append(1)
        return real(fd, mv[:4096] if len(calls) == 2 else mv)
    monkeypatch.setattr(bulkfile, "_direct_write", short)
    pieces = _pieces(6)
    f = _written(tmp_path / "h.bin", pieces)
    assert (tmp_path / "h.bin").read_bytes() == _reference(tmp_path, pieces)
    if supports_direct(tmp_path):
        assert len(calls) == 2 and f.direct_bytes == (64 << 10) + 4096 and not f.direct


def test_slow_device_switches_after_the_probe(tmp_path, small, monkeypatch):
    monkeypatch.setattr(bulkfile, "PROBE_BYTES", 3 * (64 << 10))
    monkeypatch.setattr(bulkfile, "MIN_DIRECT_RATE", 1e30)  # every device is slower
    pieces = _pieces(7)
    f = _written(tmp_path / "p.bin", pieces)
    assert (tmp_path / "p.bin").read_bytes() == _reference(tmp_path, pieces)
    if supports_direct(tmp_path):
        assert f.direct_bytes == 3 * (64 << 10) and not f.direct


def test_fast_device_keeps_direct_writes(tmp_path, small, monkeypatch):
    monkeypatch.setattr(bulkfile, "PROBE_BYTES", 3 * (64 << 10))
    monkeypatch.setattr(bulkfile, "MIN_DIRECT_RATE", 0.0)
    pieces = _pieces(8)
    f = _written(tmp_path / "q.bin", pieces)
    assert (tmp_path / "q.bin").read_bytes() == _reference(tmp_path, pieces)
    if supports_direct(tmp_path):
        assert f.direct_bytes > 3 * (64 << 10)


def test_existing_file_is_replaced_whole(tmp_path, small):
    (tmp_path / "x.bin").write_bytes(b"z" * 3_000_000)  # longer than the new content
    pieces = _pieces(9)
    _written(tmp_path / "x.bin", pieces)
    assert (tmp_path / "x.bin").read_bytes() == _reference(tmp_path, pieces)
