"""Atomic output: write under a temporary name, rename into place.

An interrupted run must never leave a half-written file under a final name,
so every output is written to a hidden sibling whose name ends in
``.partial`` (never in a final output suffix such as ``.json`` or
``.ome.tif``) and renamed with :func:`os.replace` only once complete.
The rename is atomic on POSIX file systems when source and destination are
in the same folder (common practice).
"""

from __future__ import annotations

import contextlib
import os
import shutil
import uuid
from pathlib import Path

PARTIAL_SUFFIX = ".partial"


def safe_file_name(text: str) -> str:
    """`text` made safe as one file name: letters, digits, '-', '_' and '.' kept, anything else
    (path separators included) replaced by '_', no leading dot, never empty. Label and channel
    names from users' files become parts of output names only through this."""
    import re

    name = re.sub(r"[^A-Za-z0-9._-]", "_", str(text)).lstrip(".")
    return name or "_"


def temporary_sibling(final: Path) -> Path:
    """A unique temporary name beside `final` that ends in ``.partial``."""
    final = Path(final)
    return final.with_name(f".{final.name}.{os.getpid()}-{uuid.uuid4().hex[:8]}{PARTIAL_SUFFIX}")


def _fsync_tree(path: Path) -> None:
    paths = [path] if path.is_file() else [p for p in path.rglob("*") if p.is_file()]
    for p in paths:
        with open(p, "rb") as handle:
            os.fsync(handle.fileno())


def _remove(path: Path) -> None:
    if path.is_dir() and not path.is_symlink():
        shutil.rmtree(path, ignore_errors=True)
    else:
        with contextlib.suppress(FileNotFoundError):
            path.unlink()


@contextlib.contextmanager
def atomic_output(final: str | os.PathLike):
    """Yield a temporary path; on success move it to `final` atomically.

    The caller writes a file (or a folder, for OME-Zarr) at the yielded path.
    On any exception the temporary is removed and `final` is left as it was.
    """
    final = Path(final)
    tmp = temporary_sibling(final)
    try:
        yield tmp
        _fsync_tree(tmp)
        if tmp.is_dir() and final.exists():
            # os.replace cannot replace a non-empty folder: move the old one
            # aside first so that the final name is never half-populated.
            old = temporary_sibling(final)
            os.replace(final, old)
            os.replace(tmp, final)
            _remove(old)
        else:
            os.replace(tmp, final)
    except BaseException:
        _remove(tmp)
        raise


def write_text_atomic(final: str | os.PathLike, text: str) -> None:
    """Write `text` (UTF-8) to `final` atomically."""
    with atomic_output(final) as tmp:
        tmp.write_text(text, encoding="utf-8")


def remove_stale_temporaries(final: str | os.PathLike) -> list[Path]:
    """Remove temporaries of `final` left by processes that no longer run (killed runs)."""
    final = Path(final)
    removed = []
    for tmp in final.parent.glob(f".{final.name}.*{PARTIAL_SUFFIX}"):
        owner = tmp.name[len(final.name) + 2:].split("-", 1)[0]
        if not owner.isdigit() or int(owner) == os.getpid():
            continue
        try:
            os.kill(int(owner), 0)
        except ProcessLookupError:
            _remove(tmp)
            removed.append(tmp)
        except PermissionError:
            pass  # alive, another user's process
    return removed
