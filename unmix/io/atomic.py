"""Atomic output: write under a temporary name, rename into place.

An interrupted run must never leave a half-written file under a final name,
so every output is written to a hidden sibling whose name ends in
``.partial`` (never in a final output suffix such as ``.json`` or
``.ome.tif``) and renamed with :func:`os.replace` only once complete.
The rename is atomic on POSIX file systems when source and destination are
in the same folder (common practice). Several outputs that belong together
(:func:`atomic_outputs`) are all written before the first is renamed.

Temporaries of killed runs are removed by later runs, but an output folder
may be shared by several machines (a network file system), where a process
id means nothing. A temporary's name therefore carries its owner: the
process id and a short hash of the host name, the boot id and the PID
namespace. A later run removes a temporary only when

- its owner ran on the same host, boot and PID namespace and that process
  no longer exists, or
- its owner cannot be checked from here (another machine or container) and
  its lease has run out: a live process touches its temporaries every
  :data:`HEARTBEAT_SECONDS`, and one untouched for :data:`LEASE_SECONDS` (by
  the file system's clock) is taken as abandoned.

Anything else might be live and is left alone.
"""

from __future__ import annotations

import contextlib
import errno
import hashlib
import os
import shutil
import socket
import threading
import time
import uuid
from pathlib import Path
from typing import Iterable, Sequence

from ..errors import InputError

PARTIAL_SUFFIX = ".partial"
HEARTBEAT_SECONDS = 30.0
LEASE_SECONDS = 3600.0
# Faults of an output folder that the user can fix: full, read-only, no permission, over quota.
WRITE_FAULTS = frozenset({errno.ENOSPC, errno.EROFS, errno.EACCES, errno.EPERM, errno.EDQUOT, errno.EFBIG})
_NAME_MAX = 255
# "." + base + "." + pid (up to 10) + "-" + 8 + "-" + 6 + ".partial"
_TOKEN_ROOM = 1 + 1 + 10 + 1 + 8 + 1 + 6 + len(PARTIAL_SUFFIX)


def safe_file_name(text: str, longest: int = 64) -> str:
    """`text` made safe as one file name: letters, digits, '-', '_' and '.' kept, anything else
    (path separators included) replaced by '_', no leading dot, never empty, at most `longest`
    characters (a longer one keeps its start and a hash of the whole, so it stays unique). Label
    and channel names from users' files become parts of output names only through this."""
    import re

    name = re.sub(r"[^A-Za-z0-9._-]", "_", str(text)).lstrip(".") or "_"
    if len(name) > longest:
        digest = hashlib.sha256(str(text).encode("utf-8", "replace")).hexdigest()[:10]
        name = f"{name[:longest - 11]}~{digest}"
    return name


def check_name_length(final: str | os.PathLike, option: str = "-o") -> None:
    """InputError when the file name of `final` is longer than file systems allow (255 bytes)."""
    name = Path(final).name
    if len(os.fsencode(name)) > _NAME_MAX:
        raise InputError(f"{option} {final}: the file name would be {len(os.fsencode(name))} bytes long, more than "
                         f"the {_NAME_MAX} a file system allows; shorten the input or output name")


# --- owners of temporaries -------------------------------------------------------

def _read_first_line(path: str) -> str:
    try:
        with open(path, encoding="ascii", errors="replace") as handle:
            return handle.readline().strip()
    except OSError:
        return ""


def _pid_namespace() -> str:
    try:
        return os.readlink("/proc/self/ns/pid")
    except OSError:
        return ""


_MACHINE: tuple[int, str] | None = None


def machine_id() -> str:
    """8 hex digits naming where process ids of this process mean something: host name, boot id
    (Linux) and PID namespace (containers). Recomputed after a fork."""
    global _MACHINE
    if _MACHINE is None or _MACHINE[0] != os.getpid():
        text = "\0".join([socket.gethostname(), _read_first_line("/proc/sys/kernel/random/boot_id"),
                          _pid_namespace()])
        _MACHINE = (os.getpid(), hashlib.sha256(text.encode("utf-8", "replace")).hexdigest()[:8])
    return _MACHINE[1]


def _owner_token() -> str:
    return f"{os.getpid()}-{machine_id()}-{uuid.uuid4().hex[:6]}"


def _base(final: Path) -> str:
    """The part of a temporary's name that says whose temporary it is: the final name, or, when
    that is too long to leave room for the owner, a prefix of it and a hash of the whole."""
    name = final.name
    room = _NAME_MAX - _TOKEN_ROOM
    if len(os.fsencode(name)) <= room:
        return name
    digest = hashlib.sha256(os.fsencode(name)).hexdigest()[:10]
    prefix = os.fsencode(name)[:room - 11].decode("utf-8", "ignore")
    return f"{prefix}~{digest}"


class _Heartbeat:
    """Touches this process's live temporaries every HEARTBEAT_SECONDS (their lease)."""

    def __init__(self):
        self.lock = threading.Lock()
        self.paths: dict[Path, int] = {}
        self.thread: threading.Thread | None = None

    def add(self, path: Path) -> None:
        with self.lock:
            self.paths[path] = self.paths.get(path, 0) + 1
            if self.thread is None or not self.thread.is_alive():
                self.thread = threading.Thread(target=self._run, name="unmix-lease", daemon=True)
                self.thread.start()

    def discard(self, path: Path) -> None:
        with self.lock:
            count = self.paths.pop(path, 0) - 1
            if count > 0:
                self.paths[path] = count

    def _run(self) -> None:
        while True:
            time.sleep(HEARTBEAT_SECONDS)
            with self.lock:
                paths = list(self.paths)
            for path in paths:
                with contextlib.suppress(OSError):
                    os.utime(path)


_HEARTBEAT = _Heartbeat()


def temporary_sibling(final: Path) -> Path:
    """A unique temporary name beside `final` that ends in ``.partial`` and names its owner."""
    final = Path(final)
    return final.with_name(f".{_base(final)}.{_owner_token()}{PARTIAL_SUFFIX}")


@contextlib.contextmanager
def leased(path: Path):
    """Keep the lease of the temporary `path` (see the module docstring) while in the block."""
    path = Path(path)
    _HEARTBEAT.add(path)
    try:
        yield path
    finally:
        _HEARTBEAT.discard(path)


def _owner_of(tmp: Path, base: str) -> tuple[int, str] | None:
    """(pid, machine id) from a temporary's name, or None when it is not in our format."""
    token = tmp.name[len(base) + 2:-len(PARTIAL_SUFFIX)]
    parts = token.split("-")
    if len(parts) != 3 or not parts[0].isdigit() or len(parts[1]) != 8:
        return None
    return int(parts[0]), parts[1]


def _process_exists(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True  # alive, another user's process
    return True


def _filesystem_now(folder: Path) -> float:
    """The current time by the clock of the file system holding `folder` (a network file system's
    server may disagree with this machine's clock); this machine's clock if the folder is read-only."""
    probe = folder / f".unmix-clock.{_owner_token()}{PARTIAL_SUFFIX}"
    try:
        probe.touch()
        try:
            return probe.stat().st_mtime
        finally:
            probe.unlink()
    except OSError:
        return time.time()


def _abandoned(tmp: Path, base: str, now: float) -> bool:
    owner = _owner_of(tmp, base)
    if owner is not None and owner[1] == machine_id():
        return owner[0] != os.getpid() and not _process_exists(owner[0])
    try:
        age = now - tmp.lstat().st_mtime
    except FileNotFoundError:
        return False
    return age > LEASE_SECONDS


def remove_stale_temporaries(final: str | os.PathLike) -> list[Path]:
    """Remove temporaries of `final` whose owners are gone (killed runs); see the module docstring."""
    final = Path(final)
    base = _base(final)
    prefix = f".{base}."
    try:
        candidates = [p for p in final.parent.iterdir() if p.name.startswith(prefix)
                      and p.name.endswith(PARTIAL_SUFFIX)]
    except (FileNotFoundError, NotADirectoryError):
        return []
    removed = []
    now = _filesystem_now(final.parent) if candidates else 0.0
    for tmp in candidates:
        if _abandoned(tmp, base, now):
            _remove(tmp)
            removed.append(tmp)
    return removed


# --- writing ----------------------------------------------------------------------

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


def replace_into_place(tmp: Path, final: Path) -> None:
    """Rename the complete temporary `tmp` to `final`, replacing what is there."""
    if tmp.is_dir() and final.exists():
        # os.replace cannot replace a non-empty folder: move the old one
        # aside first so that the final name is never half-populated.
        old = temporary_sibling(final)
        os.replace(final, old)
        os.replace(tmp, final)
        _remove(old)
    else:
        os.replace(tmp, final)


def discard_output(final: Path) -> None:
    """Remove the output `final`: renamed to a temporary first, so its name is free at once."""
    final = Path(final)
    tmp = temporary_sibling(final)
    with contextlib.suppress(FileNotFoundError):
        os.replace(final, tmp)
        _remove(tmp)


def write_fault(exc: OSError, final: Path) -> InputError | None:
    """The one-line InputError for a fault of the output folder (full, read-only ...), else None."""
    if not isinstance(exc, OSError):
        return None
    if exc.errno in WRITE_FAULTS:
        reason = exc.strerror or os.strerror(exc.errno)
    elif exc.errno is None and " requested and " in str(exc) and str(exc).endswith(" written"):
        # numpy's tofile reports a short write, which on a regular file means the disk is full.
        reason = f"{os.strerror(errno.ENOSPC)}: {exc}"
    else:
        return None
    return InputError(f"{final}: cannot write ({reason}); free space or choose another output location")


@contextlib.contextmanager
def atomic_outputs(finals: Sequence[str | os.PathLike], commit=None):
    """Yield one temporary path per final path; when the block ends, rename them all into place.

    Nothing is renamed before every temporary is complete (written and flushed to disk).
    `commit`, if given, is called as ``commit(rename)`` to do the renaming: it may take a lock,
    check the destination again, and must call ``rename()`` (which renames every member) or raise.
    On any exception every temporary is removed and the final names are left as they were;
    a fault of the output folder (full, read-only) becomes an InputError naming the output.
    """
    finals = [Path(f) for f in finals]
    for final in finals:
        check_name_length(final)
    temporaries = [temporary_sibling(final) for final in finals]
    with contextlib.ExitStack() as leases:
        for tmp in temporaries:
            leases.enter_context(leased(tmp))
        try:
            yield temporaries
            for tmp in temporaries:
                _fsync_tree(tmp)

            def rename():
                for tmp, final in zip(temporaries, finals):
                    replace_into_place(tmp, final)

            if commit is None:
                rename()
            else:
                commit(rename)
        except BaseException as exc:
            for tmp in temporaries:
                _remove(tmp)
            fault = write_fault(exc, finals[0]) if isinstance(exc, OSError) else None
            if fault is not None:
                raise fault from None
            raise


@contextlib.contextmanager
def atomic_output(final: str | os.PathLike):
    """Yield a temporary path; on success move it to `final` atomically.

    The caller writes a file (or a folder, for OME-Zarr) at the yielded path.
    On any exception the temporary is removed and `final` is left as it was.
    """
    with atomic_outputs([final]) as (tmp,):
        yield tmp


def write_text_atomic(final: str | os.PathLike, text: str) -> None:
    """Write `text` (UTF-8) to `final` atomically."""
    with atomic_output(final) as tmp:
        tmp.write_text(text, encoding="utf-8")


def write_files_atomic(contents: dict) -> None:
    """Write several files, ``{path: bytes or str}``, all or none: each is complete before any is renamed."""
    paths = list(contents)
    with atomic_outputs(paths) as temporaries:
        for tmp, path in zip(temporaries, paths):
            data = contents[path]
            tmp.write_bytes(data.encode("utf-8") if isinstance(data, str) else data)


@contextlib.contextmanager
def folder_lock(lock_file: Path):
    """An exclusive advisory lock (POSIX flock) on the hidden file `lock_file`; released when
    the block ends, and by the kernel when the process ends, even when it is killed.

    The holder removes the lock file before releasing it, so no empty file is left in the folder.
    A run that was waiting then holds a lock on a removed file: it sees that the name no longer
    leads to the file it locked, and locks afresh.
    """
    try:
        import fcntl
    except ImportError:  # no flock on this platform: atomic replacement alone
        yield
        return
    while True:
        handle = open(lock_file, "a+b")
        fcntl.flock(handle, fcntl.LOCK_EX)
        try:
            named = os.stat(lock_file)
        except FileNotFoundError:
            named = None
        held = os.fstat(handle.fileno())
        if named is not None and (named.st_dev, named.st_ino) == (held.st_dev, held.st_ino):
            break
        handle.close()
    try:
        yield
    finally:
        Path(lock_file).unlink(missing_ok=True)
        handle.close()


# --- outputs and inputs -------------------------------------------------------------

def _resolved(path, what: str) -> Path:
    try:
        return Path(path).resolve()
    except (OSError, RuntimeError):
        raise InputError(f"{what} {path}: cannot be resolved (a symbolic link loop?); check the path") from None


def check_outside_inputs(output: str | os.PathLike, inputs: Iterable, option: str = "-o") -> None:
    """InputError when `output` is an input, or lies inside an input folder (an OME-Zarr store):
    inputs are never written into."""
    out = _resolved(output, option)
    for source in inputs:
        if source is None:
            continue
        path = _resolved(source, "input")
        if out == path:
            raise InputError(f"{option} {output}: is also an input; choose another output name")
        if path.is_dir() and path in out.parents:
            raise InputError(f"{option} {output}: lies inside the input {source}; inputs are never written into, "
                             "choose an output outside it")
