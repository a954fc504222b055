"""Process memory settings for the training loop: keep freed memory in the process for reuse.

Every training step allocates and frees tensors of a few megabytes. glibc's malloc hands blocks of
that size back to the system (mmap, then trimming the heap), so the next step faults the same
pages in again; on virtual machines a page fault is expensive and this alone can slow a step
several times. Raising the mmap threshold to its maximum (32 MiB) and the trim threshold keeps such
blocks in the heap for the next step. Peak memory is unchanged (it is the same high-water mark);
memory is returned to the system when the process ends. Elsewhere than glibc this does nothing.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import sys

M_TRIM_THRESHOLD, M_MMAP_THRESHOLD = -1, -3  # mallopt parameter numbers in glibc's malloc.h
MMAP_THRESHOLD = 32 << 20  # glibc's largest allowed value on 64-bit systems
TRIM_THRESHOLD = 1 << 30

_applied = False


def reuse_freed_memory() -> bool:
    """Apply the settings once per process; True when they are in effect (glibc on Linux)."""
    global _applied
    if _applied:
        return True
    if not sys.platform.startswith("linux"):
        return False
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
        mallopt = libc.mallopt
    except (OSError, AttributeError):
        return False  # not glibc (musl, say): nothing to set
    mallopt.argtypes, mallopt.restype = [ctypes.c_int, ctypes.c_int], ctypes.c_int
    _applied = bool(mallopt(M_MMAP_THRESHOLD, MMAP_THRESHOLD)) and bool(mallopt(M_TRIM_THRESHOLD, TRIM_THRESHOLD))
    return _applied
