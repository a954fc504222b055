"""The one user-facing error type: a clear one-line message, exit code 2 from the CLI."""

from __future__ import annotations

import contextlib
import contextvars

import numpy as np

# rows before the piece of a table being checked: a table read in pieces still names its own rows
_ROWS_BEFORE = contextvars.ContextVar("rows_before", default=0)


class TowersError(Exception):
    """Bad input or a bad request by the user. The CLI prints `error: <message>` and exits 2.

    Messages name the file, column and row where they apply, then the fix.
    """

    exit_code = 2


def where(path=None, column=None, row=None) -> str:
    """Format the 'file, column, row' prefix used by every input error."""
    parts = []
    if path is not None:
        parts.append(str(path))
    if column is not None:
        parts.append(f"column '{column}'")
    if row is not None:
        parts.append(f"row {row + _ROWS_BEFORE.get()}")
    return ", ".join(parts)


def plain(value):
    """A numpy scalar as the Python value it holds, for messages: 424242, not np.int64(424242)."""
    return value.item() if isinstance(value, np.generic) else value


@contextlib.contextmanager
def rows_after(before: int):
    """Inside: every `where(..., row=r)` names row r + before, so checks of a table read in pieces, which
    count rows from 1 within the piece, name the row of the whole file."""
    token = _ROWS_BEFORE.set(before)
    try:
        yield
    finally:
        _ROWS_BEFORE.reset(token)
