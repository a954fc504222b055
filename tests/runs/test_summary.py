"""The run summary's training time range (towers/runs/summary.py), as `GET /model` shows it."""

import numpy as np
import torch

from towers.runs.summary import time_range


def test_dates_read_back_as_iso_text():
    # reference: numpy datetime64 arithmetic, independent of the pandas conversion the summary uses
    stamps = np.array(["2026-03-14T09:30:00", "2025-11-02T00:00:00", "2026-01-01T12:00:00"], dtype="datetime64[ns]")
    got = time_range(torch.from_numpy(stamps.astype(np.int64)))
    assert got == {"first": str(stamps.min()).split(".")[0], "last": str(stamps.max()).split(".")[0]}


def test_plain_numbers_stay_as_given():
    # unix seconds (as MovieLens stores them) are not read as dates
    got = time_range(torch.tensor([1_100_000_000, 964_982_703, 1_500_000_000]))
    assert got == {"first": 964_982_703, "last": 1_500_000_000, "unit": "as in the log"}


def test_no_time_column_gives_none():
    assert time_range(None) is None
    assert time_range(torch.zeros(0, dtype=torch.int64)) is None
