"""Where numba keeps its compiled kernels: set before numba is first imported.

The kernels are compiled with ``cache=True`` so that the JIT cost is paid once
per machine. numba caches beside the source (``__pycache__``) or in the user's
cache folder; on a read-only installation with an unwritable home (containers,
service accounts) it finds neither and every decorated function fails with
"cannot cache function ... no locator available". Then the cache goes to a
private folder under the temporary directory instead (the user's choice in
NUMBA_CACHE_DIR always wins).
"""

from __future__ import annotations

import os
import tempfile
from pathlib import Path


def _writable(folder: Path) -> bool:
    try:
        folder.mkdir(parents=True, exist_ok=True)
        with tempfile.TemporaryFile(dir=folder):
            return True
    except OSError:
        return False


def configure(package_dir: Path) -> str | None:
    """Set NUMBA_CACHE_DIR when numba could not cache by itself; the folder chosen, or None when
    numba's own places work (or the user chose one). Nothing is imported from numba here."""
    if os.environ.get("NUMBA_CACHE_DIR"):
        return None
    if os.access(package_dir, os.W_OK) and _writable(package_dir / "engine" / "__pycache__"):
        return None
    home_cache = Path(os.environ.get("XDG_CACHE_HOME") or Path.home() / ".cache")
    if _writable(home_cache / "numba"):
        return None
    uid = os.getuid() if hasattr(os, "getuid") else "user"
    private = Path(tempfile.gettempdir()) / f"unmix-numba-cache-{uid}"
    if not _writable(private):
        return None
    os.environ["NUMBA_CACHE_DIR"] = str(private)
    return str(private)
