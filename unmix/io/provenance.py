"""Provenance: what went into an output, so that it can be traced and redone."""

from __future__ import annotations

import datetime as _dt
import hashlib
import platform
from pathlib import Path

from .._version import __version__

_CHUNK = 1 << 20


def sha256_path(path, stop=None) -> str | None:
    """SHA-256 of a file, or of a folder's files (relative names and contents, sorted).

    `stop`, a :class:`threading.Event`, ends the reading within one chunk once it
    is set, and the result is then None (the caller no longer needs it).
    """
    path = Path(path)
    digest = hashlib.sha256()
    files = [path] if path.is_file() else sorted(p for p in path.rglob("*") if p.is_file())
    for file in files:
        if file is not path:
            digest.update(file.relative_to(path).as_posix().encode("utf-8") + b"\0")
        with open(file, "rb") as handle:
            while chunk := handle.read(_CHUNK):
                if stop is not None and stop.is_set():
                    return None
                digest.update(chunk)
    return digest.hexdigest()


def utc_now() -> str:
    return _dt.datetime.now(_dt.timezone.utc).replace(microsecond=0).isoformat().replace("+00:00", "Z")


def software() -> dict:
    import numpy
    import scipy

    return {"unmix": __version__, "python": platform.python_version(), "numpy": numpy.__version__,
            "scipy": scipy.__version__}


def describe_input(path, role: str, stop=None, **extra) -> dict:
    """One input's entry: its role, file name, full path and checksum (None when `stop`
    ended it; see :func:`sha256_path`)."""
    path = Path(path)
    return {"role": role, "name": path.name, "path": str(path.resolve()), "sha256": sha256_path(path, stop),
            **extra}
