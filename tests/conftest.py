"""Fixtures shared by several test files."""

from __future__ import annotations

import pytest
import torch


@pytest.fixture
def two_threads():
    """torch set to two threads (blocked searches and counts then run on two worker threads), restored after."""
    before = torch.get_num_threads()
    torch.set_num_threads(2)
    yield
    torch.set_num_threads(before)
