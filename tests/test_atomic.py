"""Atomic writes: a failed or interrupted write leaves the previous file intact and no temp file."""

from __future__ import annotations

import errno
import os

import numpy as np
import pyarrow.parquet as pq
import pytest
import torch

from towers import atomic
from towers.data.embeddings_file import write_embeddings
from towers.errors import TowersError


def _export(path, value: float):
    return write_embeddings(path, np.array([1, 2]), torch.full((2, 3), value), None, {})


def test_disk_full_leaves_previous_parquet_intact(tmp_path, monkeypatch):
    path = tmp_path / "item_embeddings.parquet"
    _export(path, 1.0)
    before = path.read_bytes()

    def full_disk(*args, **kwargs):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(pq, "write_table", full_disk)
    with pytest.raises(TowersError, match="No space left.*previous file.*intact"):
        _export(path, 2.0)
    assert path.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["item_embeddings.parquet"]


def test_write_killed_half_way_never_replaces_the_target(tmp_path):
    path = tmp_path / "notes.txt"
    atomic.write_text_atomic(path, "old")

    def half_then_crash(tmp):
        tmp.write_text("new but trunc")
        raise KeyboardInterrupt  # stands in for a process killed mid-write

    with pytest.raises(KeyboardInterrupt):
        atomic.write_atomic(path, half_then_crash)
    assert path.read_text() == "old"
    assert [p.name for p in tmp_path.iterdir()] == ["notes.txt"]


def test_written_files_and_created_folders_are_owner_only(tmp_path):
    # run outputs hold personal data: files 0600 and folders 0700 whatever the umask (README "Personal data")
    old = os.umask(0o022)
    try:
        path = atomic.write_text_atomic(tmp_path / "new" / "deeper" / "a.txt", "x")
    finally:
        os.umask(old)
    assert path.stat().st_mode & 0o777 == 0o600
    assert path.parent.stat().st_mode & 0o777 == 0o700
    assert (tmp_path / "new").stat().st_mode & 0o777 == 0o700  # created on the way: owner-only too
