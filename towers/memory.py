"""Process memory settings of glibc's malloc: keep freed memory for reuse, or hand it back.

Every training step allocates and frees tensors of a few megabytes. glibc's malloc hands blocks of
that size back to the system (mmap, then trimming the heap), so the next step faults the same
pages in again; on virtual machines a page fault is expensive and this alone can slow a step
several times. Raising the mmap threshold to its maximum (32 MiB) and the trim threshold keeps such
blocks in the heap for the next step (`reuse_freed_memory`, training's run.reuse_memory). Peak
memory is unchanged (it is the same high-water mark). Reading a long log is the opposite case: its
freed pieces are not reused by the later arrays of the log's length, so `trim_freed_memory` hands
them back, with what pyarrow's pool keeps after writing a file. Elsewhere than glibc the malloc settings do
nothing.

`index_dtype` picks 4-byte positions into a long array where they fit, half the memory of 8.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import sys

import numpy as np
import pyarrow as pa

M_TRIM_THRESHOLD, M_MMAP_THRESHOLD = -1, -3  # mallopt parameter numbers in glibc's malloc.h
MMAP_THRESHOLD = 32 << 20  # glibc's largest allowed value on 64-bit systems
TRIM_THRESHOLD = 1 << 30

_applied = False


def _glibc_function(name: str):
    """A function of glibc by name, or None off Linux or with another C library (musl, say)."""
    if not sys.platform.startswith("linux"):
        return None
    try:
        return getattr(ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6"), name)
    except (OSError, AttributeError):
        return None


def _mallopt():
    """glibc's mallopt(param, value), typed, or None where there is none."""
    mallopt = _glibc_function("mallopt")
    if mallopt is not None:
        mallopt.argtypes, mallopt.restype = [ctypes.c_int, ctypes.c_int], ctypes.c_int
    return mallopt


def reuse_freed_memory() -> bool:
    """Apply the settings once per process; True when they are in effect (glibc on Linux)."""
    global _applied
    if _applied:
        return True
    mallopt = _mallopt()
    if mallopt is None:
        return False  # nothing to set
    _applied = bool(mallopt(M_MMAP_THRESHOLD, MMAP_THRESHOLD)) and bool(mallopt(M_TRIM_THRESHOLD, TRIM_THRESHOLD))
    return _applied


GLIBC_MMAP_THRESHOLD = GLIBC_TRIM_THRESHOLD = 128 << 10  # glibc's defaults (mallopt(3))


def hand_back_freed_memory() -> None:
    """After the training steps: glibc's default thresholds again, so what later work frees goes back to
    the system, and the free pages the steps kept are handed back now. Evaluation and export allocate
    once, not every step, and a process's peak then includes whatever the heap still keeps. Setting the
    mmap threshold fixes it at 128 KiB (glibc then stops moving it); measured at 6M events, resetting only
    the trim threshold left each of two processes' peak at 1.11-1.13 GiB against 0.99-1.01 GiB, and the
    one-process run took 49.6 s against 47.2 s, so blocks mapped afresh cost evaluation no time there."""
    global _applied
    mallopt = _mallopt()
    if mallopt is not None and _applied:
        mallopt(M_MMAP_THRESHOLD, GLIBC_MMAP_THRESHOLD)
        mallopt(M_TRIM_THRESHOLD, GLIBC_TRIM_THRESHOLD)
        _applied = False
    trim_freed_memory()


def trim_freed_memory() -> None:
    """Hand the heap's free pages back to the system (malloc_trim), and those pyarrow's memory pool keeps
    for its next buffers (writing 1M users' embeddings to parquet left 210 MB there, measured)."""
    trim = _glibc_function("malloc_trim")
    if trim is not None:
        trim(0)
    pa.default_memory_pool().release_unused()


def index_dtype(n: int):
    """The narrowest integer type for positions into n entries: int32 where it fits (half the memory of
    int64 for a long log), else int64."""
    return np.int32 if n < 2 ** 31 else np.int64
