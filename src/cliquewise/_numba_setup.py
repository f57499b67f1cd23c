"""Point numba's on-disk cache somewhere writable before any kernel compiles.

numba caches compiled kernels next to the source file by default, which fails in
read-only installs. We use ``$NUMBA_CACHE_DIR`` when the user set it, else a
per-user cache folder.
"""

import os
from pathlib import Path

def _kernels_digest() -> str:
    """Hash of every kernel source: numba checks only the file of the cached function,
    but our drivers inline helpers from sibling modules, so the cache lives in a
    folder named by all of them and any kernel edit starts a fresh cache."""
    import hashlib

    h = hashlib.blake2b(digest_size=8)
    for f in sorted((Path(__file__).parent / "kernels").glob("*.py")):
        h.update(f.name.encode())
        h.update(f.read_bytes())
    return h.hexdigest()


_SUB = _kernels_digest()

if os.environ.get("NUMBA_CACHE_DIR"):
    _base = Path(os.environ["NUMBA_CACHE_DIR"])
    if _base.name != _SUB:
        os.environ["NUMBA_CACHE_DIR"] = str(_base / _SUB)
else:
    base = os.environ.get("XDG_CACHE_HOME") or str(Path.home() / ".cache")
    path = Path(base) / "cliquewise" / "numba" / _SUB
    try:
        path.mkdir(parents=True, exist_ok=True)
        os.environ["NUMBA_CACHE_DIR"] = str(path)
    except OSError:  # read-only home: fall back to a temp folder
        import tempfile

        tmp = Path(tempfile.gettempdir()) / "cliquewise-numba-cache" / _SUB
        tmp.mkdir(parents=True, exist_ok=True)
        os.environ["NUMBA_CACHE_DIR"] = str(tmp)

# numba reads its configuration when first imported; if it was imported before us,
# make it see the cache folder chosen above.
import sys as _sys  # noqa: E402

if "numba" in _sys.modules:
    from numba.core import config as _config

    _config.reload_config()
