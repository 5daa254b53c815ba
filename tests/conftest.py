import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).parent))

import os  # noqa: E402
import tempfile  # noqa: E402

# the tests build usable-kh tables in a cache folder of their own (never the user's)
os.environ.setdefault("MESHCHECK_CACHE_DIR", tempfile.mkdtemp(prefix="meshcheck-test-cache-"))


import pytest  # noqa: E402


@pytest.fixture(params=["numpy", "numba"])
def kernel_mode(request, monkeypatch):
    """The test runs on the numpy reference path, then on the compiled kernels
    (``MESHCHECK_KERNELS``; skipped where numba is not installed)."""
    if request.param == "numba":
        pytest.importorskip("numba")
    monkeypatch.setenv("MESHCHECK_KERNELS", request.param)
    return request.param
