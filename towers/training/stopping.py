"""Early stopping, shared by every trainer: validate after each epoch (or ALS sweep), keep the best
weights, stop after `patience` rounds without improvement, and honour Ctrl-C between steps.
"""

from __future__ import annotations

import signal
import threading
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import torch

from towers.atomic import write_atomic
from towers.config import Config, lower_is_better
from towers.data.prepare import Prepared
from towers.errors import TowersError
from towers.evaluation.protocol import validation_metrics
from towers.model.embed import model_scorer
from towers.model.towers import TwoTowerModel
from towers.training.distributed import evaluation_share
from towers.training.progress import log


class TrainingDiverged(TowersError):
    """A NaN or infinite loss: the run stops and writes no model."""


class TrainingInterrupted(TowersError):
    """Ctrl-C during training: a checkpoint was written; the message says how to resume."""

    exit_code = 130


@dataclass
class TrainResult:
    history: list[dict] = field(default_factory=list)
    best_epoch: int = 0
    best_value: float | None = None
    stop_metric: str = ""
    best_state: dict | None = None

    @property
    def still_improving(self) -> bool:
        """Validation was measured and its best round was the last one run: more rounds may help."""
        validated = any(k.startswith("valid_") for row in self.history for k in row)
        return validated and bool(self.history) and self.best_epoch == self.history[-1]["epoch"]


def clone_state(state: dict) -> dict:
    return {k: v.detach().clone() for k, v in state.items()}


@dataclass
class EarlyStopping:
    """Tracks the best round and the rounds since it; one instance per training run.

    unit names a round in log lines ("epoch" or "sweep"); loss_name and loss_digits how its training
    loss is shown. `stale` and `result.best_state` are what a checkpoint needs to resume exactly.
    on_round, when given, is called after each round is validated and logged with (round, its
    validation value or None); an exception it raises ends training there and reaches the caller of
    `fit` (the best weights so far are saved, the last checkpoint is not). `towers tune` reports
    trials to its pruner this way; ordinary training passes nothing.
    """

    result: TrainResult
    patience: int
    label: str
    unit: str = "epoch"
    rounds: int = 0
    loss_name: str = "loss"
    loss_digits: int = 4
    stale: int = 0
    on_round: Callable[[int, float | None], None] | None = None

    def after_round(self, model: TwoTowerModel, data: Prepared, cfg: Config, step: int, loss: float, rate: float,
                    checkpoint_dir: Path | None) -> bool:
        """Validate round `step`, log it, save the best weights; returns whether training should stop."""
        value, improved = self._record(model, data, cfg, step, loss, rate, checkpoint_dir)
        self.stale = 0 if improved else self.stale + 1
        metric = self.result.stop_metric
        shown = "" if value is None else f"  valid {metric} {value:.4f}{' (best)' if improved else ''}"
        log(f"{self.label} {self.unit} {step}/{self.rounds}  {self.loss_name} {loss:.{self.loss_digits}f}  "
            f"{rate:,.0f} pairs/s{shown}")
        if self.on_round is not None:
            self.on_round(step, value)
        if self.stale >= self.patience:
            log(f"{self.label}: stopping early after {self.unit} {step}; best {self.unit} {self.result.best_epoch}")
            return True
        return False

    def restore_best(self, model: TwoTowerModel) -> None:
        """Load the best round's weights; warn when that round was the last (validation still improving)."""
        if self.result.best_state is not None:
            model.load_state_dict(self.result.best_state)
        if self.result.still_improving and self.rounds > 1:
            more = "training.epochs" if self.unit == "epoch" else "evaluation.baseline_rounds"
            log(f"warning: {self.label}: the best {self.unit} was the last one run ({self.result.best_epoch}); validation "
                f"was still improving, so raising {more} may help")

    def _record(self, model: TwoTowerModel, data: Prepared, cfg: Config, step: int, loss: float, rate: float,
                checkpoint_dir: Path | None) -> tuple[float | None, bool]:
        """Append the round's history row; keep and save the best weights. With no validation pairs every
        round counts as the best. In data-parallel training each process validates its share of the
        queries and every process gets the whole, identical value (distributed.evaluation_share)."""
        result, metric = self.result, self.result.stop_metric
        value = None
        if len(data.valid) or data.divided:  # divided: every process takes part, its own share empty or not
            # divided: the process ranks only its own users' queries, so it embeds only its own users
            scorer = model_scorer(model, data, data.own_queries)
            value = validation_metrics(scorer, data, cfg, data.valid, model,
                                       share=evaluation_share(data.divided)).get(metric)
        row = {"epoch": step, "loss": loss, "pairs_per_s": rate}
        if value is not None:
            row[f"valid_{metric}"] = value
        result.history.append(row)
        lower = lower_is_better(metric)
        improved = value is None or result.best_value is None or (
            value < result.best_value if lower else value > result.best_value)
        if improved:
            result.best_value, result.best_epoch = value, step
            result.best_state = clone_state(model.state_dict())
            if checkpoint_dir is not None:
                state = result.best_state
                write_atomic(checkpoint_dir / "best.pt", lambda f: torch.save({"epoch": step, "state_dict": state}, f))
        return value, improved


class StopRequest:
    """Ctrl-C asks training to stop after the current step; a second Ctrl-C stops at once.

    Used as a context manager around a training loop. The handler is installed only in the main
    thread of a single process: several processes could not agree on a step to stop at, so there
    Ctrl-C ends them at once.
    """

    def __init__(self, processes: int = 1):
        self.requested = False
        self.processes = processes
        self._previous = None

    def __enter__(self) -> "StopRequest":
        if threading.current_thread() is threading.main_thread() and self.processes == 1:
            self._previous = signal.signal(signal.SIGINT, self._request)
        return self

    def __exit__(self, *exc) -> None:
        if self._previous is not None:
            signal.signal(signal.SIGINT, self._previous)
            self._previous = None

    def _request(self, signum, frame) -> None:
        if self.requested:
            raise KeyboardInterrupt
        self.requested = True
        log("stopping after this step (Ctrl-C again to abort without a checkpoint)")
