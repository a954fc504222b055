"""The Python API: train a run, load a run folder, align one run onto another.

The CLI calls exactly these functions, so both give the same results. A loaded `Run` embeds unseen
entities, recommends, finds similar items and re-evaluates (towers/runs/run.py).
"""

from __future__ import annotations

from pathlib import Path

from towers.runs.align import align_run
from towers.runs.run import Run
from towers.runs.train import train_run

__all__ = ["Run", "align_run", "load", "train"]


def load(run_dir: str | Path) -> Run:
    """Open a run folder written by `towers train`."""
    return Run(run_dir)


def train(config_path: str | Path, out_dir: str | Path, overwrite: bool = False, resume: bool = False,
          init_from: str | Path | None = None) -> dict:
    """Train a run from a YAML config (same as `towers train`); returns metrics, folder and table."""
    return train_run(config_path, out_dir, overwrite=overwrite, resume=resume, init_from=init_from)
