"""Point numba's on-disk cache somewhere writable before any kernel compiles.

numba caches compiled kernels next to the source file by default, which fails in
read-only installs. We use ``$NUMBA_CACHE_DIR`` when the user set it, else a
per-user cache folder.
"""

import os
from pathlib import Path

if not os.environ.get("NUMBA_CACHE_DIR"):
    base = os.environ.get("XDG_CACHE_HOME") or str(Path.home() / ".cache")
    path = Path(base) / "cliquewise" / "numba"
    try:
        path.mkdir(parents=True, exist_ok=True)
        os.environ["NUMBA_CACHE_DIR"] = str(path)
    except OSError:  # read-only home: fall back to a temp folder
        import tempfile

        tmp = Path(tempfile.gettempdir()) / "cliquewise-numba-cache"
        tmp.mkdir(parents=True, exist_ok=True)
        os.environ["NUMBA_CACHE_DIR"] = str(tmp)
