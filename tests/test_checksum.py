"""meshcheck.checksum: the input file's SHA-256 (hashlib's, the standard library's
reference implementation of FIPS 180-4), computed once per file version."""
import hashlib

from meshcheck import checksum, report


def test_file_checksum_is_computed_once_and_follows_the_file(tmp_path, monkeypatch):
    calls = []
    real = checksum._sha256
    monkeypatch.setattr(checksum, "_sha256", lambda p: calls.append(p) or real(p))
    f = tmp_path / "mesh.msh"
    f.write_bytes(b"first version")
    assert checksum.file_sha256(f, aside=True) is None  # started on a thread
    assert checksum.file_sha256(str(f)) == hashlib.sha256(b"first version").hexdigest()
    assert report.file_sha256(f) == hashlib.sha256(b"first version").hexdigest()
    assert len(calls) == 1  # the thread's checksum was shared, not computed again
    f.write_bytes(b"second, longer version")  # a changed file: a new checksum
    assert checksum.file_sha256(f) == hashlib.sha256(b"second, longer version").hexdigest()
    assert len(calls) == 2
    assert checksum.file_sha256(tmp_path / "missing.msh") is None
    assert checksum.file_sha256(None) is None
