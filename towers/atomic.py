"""Atomic, owner-only file writes: write to a temporary name in the same folder, then rename over the target.

A killed process or a full disk leaves either the previous file or the new one, never a torn file.
What towers writes comes from user logs (personal data), so files are owner-only (0600, as mkstemp
creates them) and the folders towers creates are owner-only too (0700).
"""

from __future__ import annotations

import errno
import os
import tempfile
from collections.abc import Callable
from pathlib import Path

from towers.errors import TowersError

_NO_ROOM = {errno.ENOSPC, errno.EDQUOT, errno.EROFS, errno.EACCES, errno.EPERM}


def write_atomic(path: str | Path, write: Callable[[Path], None]) -> Path:
    """Call write(tmp_path), fsync it, then rename tmp_path to path."""
    path = Path(path)
    try:
        make_private_dir(path.parent)
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    except OSError as exc:
        raise _write_error(path, exc) from None
    os.close(fd)
    tmp_path = Path(tmp)
    try:
        write(tmp_path)
        with open(tmp_path, "rb+") as fh:
            os.fsync(fh.fileno())
        os.replace(tmp_path, path)
    except BaseException as exc:
        tmp_path.unlink(missing_ok=True)
        if isinstance(exc, OSError) and exc.errno in _NO_ROOM:
            raise _write_error(path, exc) from None
        raise
    return path


def make_private_dir(path: str | Path) -> Path:
    """Create a folder, and each missing folder above it, readable by its owner only (0700).

    Folders that exist already are left as they are.
    """
    path = Path(path)
    missing = []
    while not path.is_dir() and path != path.parent:
        missing.append(path)
        path = path.parent
    for folder in reversed(missing):
        folder.mkdir(mode=0o700, exist_ok=True)
        os.chmod(folder, 0o700)  # mkdir's mode is masked by the umask; the folder must not depend on it
    return Path(missing[0]) if missing else path


def open_private_log(path: str | Path):
    """A text file opened for appending, created owner-only (0600): logs can carry ids from user data."""
    path = Path(path)
    make_private_dir(path.parent)
    return os.fdopen(os.open(path, os.O_WRONLY | os.O_CREAT | os.O_APPEND, 0o600), "a", encoding="utf-8")


def _write_error(path: Path, exc: OSError) -> TowersError:
    """Disk full, read-only or no permission: the previous file (if any) is untouched."""
    return TowersError(f"{path}: could not be written ({exc.strerror or exc}); the previous file, if any, is intact; "
                       "free disk space or choose a writable folder, then rerun (training runs take --resume)")


def write_text_atomic(path: str | Path, text: str) -> Path:
    return write_atomic(path, lambda p: p.write_text(text, encoding="utf-8"))
