"""Atomic file writes: write to a temporary name in the same folder, fsync, rename. A kill at any moment leaves
either the old file or the new one, never a torn one."""
from __future__ import annotations

import errno
import io
import json
import os
import re
import shutil
import tempfile
from pathlib import Path
from typing import Any, Callable, Union

PathLike = Union[str, os.PathLike]
_UMASK = os.umask(0)
os.umask(_UMASK)


class DiskFull(OSError):
    """The device ran out of space (or quota) while a file was written; the message names the file and the space
    left. The file's previous version, if any, is kept whole."""


def _space_error(exc: BaseException):
    """The ``OSError`` of a full device behind ``exc`` (itself, or what it was raised from: torch's writer turns
    Python's ENOSPC into a RuntimeError "[enforce fail at inline_container.cc…]" raised while handling it)."""
    seen = 0
    while exc is not None and seen < 8:
        if isinstance(exc, OSError) and exc.errno in (errno.ENOSPC, errno.EDQUOT):
            return exc
        exc, seen = exc.__cause__ or exc.__context__, seen + 1
    return None


def _gib(n: float) -> str:
    return f"{n / 2**30:.2f} GiB" if n >= 2**30 else f"{n / 2**20:.1f} MiB"


def disk_full(path: PathLike, exc: BaseException) -> DiskFull:
    """One line for a write of ``path`` that failed on a full device: the file, the free space there
    (``shutil.disk_usage``) and what to do."""
    path = Path(path)
    try:
        free = f"{_gib(shutil.disk_usage(path.parent).free)} free there"
    except OSError:
        free = "free space unknown"
    what = "quota exceeded" if getattr(exc, "errno", None) == errno.EDQUOT else "no space left on the device"
    return DiskFull(errno.ENOSPC, f"{what} while writing {path} ({free}); any previous version of the file is kept. "
                                  "Free some space (or choose another folder) and rerun to continue.")


def write_with(path: PathLike, write: Callable[[io.IOBase], None], *, mode: str = "wb", **open_kwargs) -> Path:
    """Call ``write(file)`` on a temporary file beside ``path`` (opened with ``mode`` and ``open_kwargs``, e.g.
    ``mode="w", encoding="utf-8", newline=""``), fsync it, then rename it over ``path`` in one step. A full device
    raises :class:`DiskFull` naming ``path`` and the free space, whatever layer (Python, torch's writer) saw it."""
    path = Path(path)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    except OSError as e:
        if _space_error(e) is not None:
            raise disk_full(path, e) from None
        raise
    try:
        os.chmod(tmp, 0o666 & ~_UMASK)  # mkstemp makes 0600 files; give them the usual mode
        with os.fdopen(fd, mode, **open_kwargs) as f:
            write(f)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except BaseException as e:
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
        full = _space_error(e) if isinstance(e, Exception) else None
        if full is not None:
            raise disk_full(path, full) from None
        raise
    return path


def check_writable(folder: PathLike, param: str = "run_dir", owner: str = "the run settings") -> Path:
    """Create ``folder`` if needed and write (then delete) an empty file in it: a folder that cannot be written
    (read-only, not a folder, no permission) is refused at once, before any work, naming it — not at the first
    write, steps later. The probe has :func:`write_with`'s temporary-name pattern, so a kill leaves nothing that
    :func:`remove_temporaries` would not clear."""
    folder = Path(folder)
    try:
        folder.mkdir(parents=True, exist_ok=True)
        fd, probe = tempfile.mkstemp(prefix=".write-check.", suffix=".tmp", dir=folder)
        os.close(fd)
        os.unlink(probe)
    except OSError as e:
        reason = f"{e.strerror or type(e).__name__}" + (f": {e.filename}" if e.filename else "")
        raise ValueError(f"The {param!r} parameter of {owner} must be a folder that can be written. Got "
                         f"{str(folder)!r} instead ({reason}).") from None
    return folder


_TEMP = re.compile(r"^\..+\.[A-Za-z0-9_]{8}\.tmp$")  # the names write_with's mkstemp makes


def remove_temporaries(folder: PathLike) -> list:
    """Delete temporary files that a process killed between a write and its rename left in ``folder`` or any folder
    below it (``plots/`` too; a hard kill skips the clean-up in ``write_with``). Only this module's own naming
    pattern is touched, and links are not followed; returns the paths removed, relative to ``folder``."""
    folder = Path(folder)
    if not folder.is_dir():
        return []
    gone = []
    for here, _, names in os.walk(folder):  # os.walk does not follow links to folders
        for name in names:
            p = Path(here) / name
            if _TEMP.match(name) and p.is_file() and not p.is_symlink():
                p.unlink(missing_ok=True)
                gone.append(p.relative_to(folder).as_posix())
    return sorted(gone)


def write_bytes(path: PathLike, data: bytes) -> Path:
    return write_with(path, lambda f: f.write(data))


def write_text(path: PathLike, text: str) -> Path:
    return write_bytes(path, text.encode("utf-8"))


def write_json(path: PathLike, obj: Any) -> Path:
    return write_text(path, json.dumps(obj, indent=2, sort_keys=True, default=_jsonable) + "\n")


def write_jsonl(path: PathLike, rows) -> Path:
    return write_text(path, "".join(json.dumps(r, sort_keys=True, default=_jsonable) + "\n" for r in rows))


def write_torch(path: PathLike, obj: Any) -> Path:
    import torch

    return write_with(path, lambda f: torch.save(obj, f))


def _jsonable(o: Any):
    try:
        import numpy as np

        if isinstance(o, np.generic):
            return o.item()
    except ImportError:  # pragma: no cover
        pass
    if isinstance(o, Path):
        return str(o)
    raise TypeError(f"not JSON serialisable: {type(o).__name__}")


# ----------------------------------------------------------------------------------------------------------------
# one writer per folder

LOCK = ".lock"  # the lock file inside a locked folder (its content names the holder)


class FolderBusy(RuntimeError):
    """Another live process holds the folder's lock. The message names it; try again when it has finished."""


class FolderLock:
    """An OS-level lock on ``folder`` held for the life of the ``with`` block (or until the process dies: the
    operating system releases it then, so a killed writer never leaves a stale lock). A second writer fails at
    once with :class:`FolderBusy` naming the holder (process id, host, command, start time).

    Uses ``fcntl.flock`` (Linux, macOS); where it is missing (Windows) the lock is advisory-free and a warning says
    so once.

    Example:
        >>> import tempfile
        >>> with FolderLock(tempfile.mkdtemp(), what="run folder"):
        ...     pass
    """

    def __init__(self, folder: PathLike, what: str = "folder"):
        self.folder, self.what = Path(folder), what
        self._fd = None

    def __enter__(self) -> "FolderLock":
        import socket
        import sys
        import time

        try:
            import fcntl
        except ImportError:  # pragma: no cover — not on this platform
            import warnings

            warnings.warn(f"no OS file locks on this platform: two writers to {self.folder} are not prevented.")
            return self
        self.folder.mkdir(parents=True, exist_ok=True)
        fd = os.open(self.folder / LOCK, os.O_RDWR | os.O_CREAT, 0o666 & ~_UMASK)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            holder = os.read(fd, 4096).decode("utf-8", "replace").strip() or "another process"
            os.close(fd)
            raise FolderBusy(f"{self.what} {str(self.folder)!r} is in use by {holder}; wait for it to finish "
                             "(or stop it), or choose another folder.") from None
        info = (f"process {os.getpid()} on {socket.gethostname()} ({' '.join(sys.argv)[:200]}), started "
                f"{time.strftime('%Y-%m-%d %H:%M:%S')}")
        os.ftruncate(fd, 0)
        os.pwrite(fd, info.encode("utf-8"), 0)
        self._fd = fd
        return self

    def __exit__(self, *exc) -> None:
        if self._fd is not None:
            os.ftruncate(self._fd, 0)  # the lock file stays (another process may be waiting on it); empty
            os.close(self._fd)  # closing releases the lock
            self._fd = None
