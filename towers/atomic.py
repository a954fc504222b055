"""Atomic file writes: write to a temporary name in the same folder, then rename over the target.

A killed process or a full disk leaves either the previous file or the new one, never a torn file.
"""

from __future__ import annotations

import os
import tempfile
from pathlib import Path
from typing import Callable


def write_atomic(path: str | Path, write: Callable[[Path], None]) -> Path:
    """Call write(tmp_path), fsync it, then rename tmp_path to path."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    os.close(fd)
    tmp_path = Path(tmp)
    umask = os.umask(0)
    os.umask(umask)
    os.chmod(tmp_path, 0o666 & ~umask)  # mkstemp makes files owner-only; give them the usual mode
    try:
        write(tmp_path)
        with open(tmp_path, "rb+") as fh:
            os.fsync(fh.fileno())
        os.replace(tmp_path, path)
    except BaseException:
        tmp_path.unlink(missing_ok=True)
        raise
    return path


def write_text_atomic(path: str | Path, text: str) -> Path:
    return write_atomic(path, lambda p: p.write_text(text, encoding="utf-8"))
