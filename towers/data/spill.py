"""Long columns on disk: memory-mapped arrays in a scratch folder, for logs larger than memory.

With `run.spill_folder` set, every array that holds one entry per event (the log's codes, times and
weights, the pairs and their split slices) is a file there, mapped into memory: the operating system
pages it in while it is read and drops the pages again when memory runs short, so memory holds the
catalogs, the model and what one step needs, not the log. Without a folder the same calls make
ordinary arrays, so both ways run the same code and give the same numbers.

Each file is created owner-only (the pairs say who bought what), mapped, and unlinked at once: it
lives as long as its mapping, and nothing is left behind when the run ends, fails or is killed.
"""

from __future__ import annotations

import os
import tempfile
from pathlib import Path

import numpy as np

from towers.errors import TowersError

CHUNK = 1 << 20  # entries copied at a time between long columns: a few MB, whatever the log's length


class Spill:
    """Makes long arrays: memory-mapped files in `folder`, or plain arrays when folder is None."""

    def __init__(self, folder: Path | None = None):
        self.folder = None if folder is None else Path(folder)
        if self.folder is not None and not self.folder.is_dir():
            raise TowersError(f"run.spill_folder {self.folder}: no such folder; create it on a disk with room "
                              "(at most about 50 bytes an event), or remove the key to keep the log in memory")

    @property
    def on_disk(self) -> bool:
        return self.folder is not None

    def empty(self, n: int, dtype) -> np.ndarray:
        """An uninitialised array of n entries (zeros when on disk)."""
        dtype = np.dtype(dtype)
        if self.folder is None or n == 0:  # an empty file cannot be mapped
            return np.empty(n, dtype)
        fd, name = tempfile.mkstemp(prefix="towers-", suffix=".bin", dir=self.folder)  # mode 0600
        try:
            if hasattr(os, "posix_fallocate"):  # blocks reserved now: a full disk is an error here, not a crash
                os.posix_fallocate(fd, 0, n * dtype.itemsize)  # (SIGBUS) when a mapped page is first written
            else:
                os.ftruncate(fd, n * dtype.itemsize)
            return np.memmap(name, dtype=dtype, mode="r+", shape=(n,))
        except OSError as exc:
            raise TowersError(f"run.spill_folder {self.folder}: cannot hold {n * dtype.itemsize / 2**30:.1f} GiB more "
                              f"({exc.strerror}); free room there or choose a larger disk") from None
        finally:
            os.close(fd)
            os.unlink(name)

    def copy(self, values: np.ndarray, dtype=None) -> np.ndarray:
        """values (any array, a mapped one too) as a new long array of `dtype`, copied a chunk at a time."""
        out = self.empty(len(values), dtype or values.dtype)
        for lo in range(0, len(values), CHUNK):
            out[lo:lo + CHUNK] = values[lo:lo + CHUNK]
        return out

    def where(self, values: np.ndarray, keep: np.ndarray) -> np.ndarray:
        """values[keep] as a long array, a chunk at a time; `values` itself when every entry is kept."""
        if keep.all():
            return values
        out = self.empty(int(keep.sum()), values.dtype)
        at = 0
        for lo in range(0, len(values), CHUNK):
            part = values[lo:lo + CHUNK][keep[lo:lo + CHUNK]]
            out[at:at + len(part)] = part
            at += len(part)
        return out

    def lookup(self, table: np.ndarray, codes: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        """table[codes] as a long array (or into `out`, of the same length), a chunk at a time."""
        out = self.empty(len(codes), table.dtype) if out is None else out
        for lo in range(0, len(codes), CHUNK):
            out[lo:lo + CHUNK] = table[codes[lo:lo + CHUNK]]
        return out


class Column:
    """A long column written piece by piece (its length unknown until the end) as one spill array."""

    def __init__(self, spill: Spill, dtype):
        self.spill, self.dtype = spill, np.dtype(dtype)
        self.pieces: list[np.ndarray] = []
        self.file = None
        if spill.on_disk:
            # owner-only and unlinked already; closed by finish, once mapped
            self.file = tempfile.TemporaryFile(dir=spill.folder)  # noqa: SIM115

    def add(self, values: np.ndarray) -> None:
        values = np.ascontiguousarray(values, dtype=self.dtype)
        if self.file is None:
            self.pieces.append(values)
        else:
            try:
                self.file.write(values.tobytes())
            except OSError as exc:
                raise TowersError(f"run.spill_folder {self.spill.folder}: cannot write the log's columns there "
                                  f"({exc.strerror}); free room there or choose a larger disk") from None

    def finish(self) -> np.ndarray:
        if self.file is None:
            out = self.pieces[0] if len(self.pieces) == 1 else np.concatenate(self.pieces) if self.pieces else \
                np.zeros(0, self.dtype)
            self.pieces = []
            return out
        self.file.flush()
        n = self.file.tell() // self.dtype.itemsize
        out = np.zeros(0, self.dtype) if n == 0 else np.memmap(self.file, dtype=self.dtype, mode="r+", shape=(n,))
        self.file.close()  # the mapping keeps the data
        return out
