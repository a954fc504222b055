"""The Python API: every command of the `towers` CLI as a function, so both give the same results.

train a run, load a run folder (a `Run` embeds unseen entities, recommends, finds similar items and
re-evaluates: towers/runs/run.py), sweep a grid, tune settings within a time budget, write a report,
align one run onto another, and generate the demo store; format_table and format_drift give the
tables the CLI prints.
"""

from __future__ import annotations

from pathlib import Path

from towers.data.tables import read_table
from towers.evaluation.protocol import format_table
from towers.runs.align import align_run, format_drift
from towers.runs.lists import ItemFilter, read_id_file
from towers.runs.report import write_report
from towers.runs.run import Run
from towers.runs.summary import describe
from towers.runs.sweep import run_sweep
from towers.runs.train import train_run
from towers.runs.tune import run_tune
from towers.synthetic.demo_store import generate_store

__all__ = ["ItemFilter", "Run", "align_run", "describe", "format_drift", "format_table", "generate_store", "load",
           "read_id_file", "read_table", "run_sweep", "run_tune", "train", "write_report"]


def load(run_dir: str | Path) -> Run:
    """Open a run folder written by `towers train`."""
    return Run(run_dir)


def train(config_path: str | Path, out_dir: str | Path, overwrite: bool = False, resume: bool = False,
          init_from: str | Path | None = None) -> dict:
    """Train a run from a YAML config (same as `towers train`); returns metrics, folder and table."""
    return train_run(config_path, out_dir, overwrite=overwrite, resume=resume, init_from=init_from)
