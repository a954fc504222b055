"""Progress as people read it: a tqdm bar on a terminal, plain log lines on stderr otherwise.
"""

from __future__ import annotations

import sys

from towers.training.distributed import is_primary


def log(message: str) -> None:
    """Plain log lines go to stderr so stdout stays clean for tables and results (process 0 only)."""
    if is_primary():
        print(message, file=sys.stderr, flush=True)




def show_bar(progress: str) -> bool:
    """tqdm only on a terminal (or when asked); plain log lines otherwise."""
    if progress == "bar":
        return True
    if progress == "plain":
        return False
    return sys.stderr.isatty()
