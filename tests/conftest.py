import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).parent))

import os  # noqa: E402
import tempfile  # noqa: E402

# the tests build usable-kh tables in a cache folder of their own (never the user's)
os.environ.setdefault("MESHCHECK_CACHE_DIR", tempfile.mkdtemp(prefix="meshcheck-test-cache-"))
