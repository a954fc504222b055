"""What a run is, in plain data: its model, score formula, catalog and split sizes, and held-out metrics.

Everything is read back from the run folder (the bundle, the embeddings files' metadata, pairs.pt,
metrics.json and history.json), so the summary says what the files say and nothing more. The training
pairs' time range comes from pairs.pt when the log had a time column: as ISO text when the times were
dates (nanoseconds since 1970), as the log's own numbers otherwise.
"""

from __future__ import annotations

import math

import pandas as pd

from towers.evaluation.protocol import SLICES
from towers.runs.folder import TOWERS, RunFolder
from towers.runs.run import Run

SPLITS = {"train": "training_pairs", "valid": "validation_pairs", "test": "test_pairs",
          "cold_test": "cold_item_pairs", "cold_user_test": "cold_user_pairs"}


def _finite(value):
    """The value with every float that is not finite (an empty slice's NaN) as None, so it is valid JSON."""
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, dict):
        return {k: _finite(v) for k, v in value.items()}
    if isinstance(value, list):
        return [_finite(v) for v in value]
    return value


def _columns(encoders) -> list[str] | None:
    """The columns a feature row of one side needs (the id column first), or None without a feature table."""
    if encoders.id_column is None:
        return None
    return [encoders.id_column] + [e.name for e in encoders.encoders]


DATES_FROM_NS = 10**17  # a time at or above this, read as nanoseconds, is after 1973: a parsed date, not seconds


def time_range(times) -> dict | None:
    """First and last training time, or None when the log had no time column (see the module docstring)."""
    if times is None or not len(times):
        return None
    first, last = int(times.min()), int(times.max())
    if first >= DATES_FROM_NS:
        return {"first": pd.Timestamp(first, unit="ns").isoformat(), "last": pd.Timestamp(last, unit="ns").isoformat()}
    return {"first": first, "last": last, "unit": "as in the log"}


def describe(run: Run) -> dict:
    """A summary of a run as plain JSON-ready data (see README, `GET /model`)."""
    meta = run.embeddings("item")[3]
    cfg = run.bundle.model_cfg
    pairs = run.pairs
    folder = run.folder
    metrics = folder.read_json(RunFolder.METRICS) if folder.file(RunFolder.METRICS).is_file() else {}
    history = folder.read_json(RunFolder.HISTORY) if folder.file(RunFolder.HISTORY).is_file() else {}
    training = run.config.training if run.config is not None else None
    context = run.context
    summary = {
        "run": run.dir.name,
        "mode": "item_item" if run.item_item else "user_item",
        "model": {
            "name": meta.get("model", TOWERS),
            "k": int(meta["k"]),
            "score": meta["score"],
            "temperature": float(meta.get("temperature", 1.0)),
            "global_bias": float(meta.get("global_bias", 0.0)),
            "normalized": meta.get("normalized") == "true",
            "hidden": list(cfg.hidden),
            "shared_tower": bool(cfg.shared_tower),
            "history_length": int(cfg.history_length),
            "context_columns": list(context.names) if context is not None else [],
            "loss": training.loss if training is not None else None,
        },
        "columns": {"users": None if run.item_item else _columns(run.bundle.query_encoders),
                    "items": _columns(run.bundle.candidate_encoders)},
        "catalog": {"users": None if run.item_item else len(pairs["query_ids"]), "items": len(pairs["item_ids"])},
        "data": {name: len(pairs[key]["query"]) if key in pairs else 0 for key, name in SPLITS.items()},
        "training": {key: history.get(key) for key in ("stop_metric", "best_epoch", "still_improving")},
        "training_times": time_range(pairs["train"].get("time")) if "train" in pairs else None,
        "metrics": {s: metrics[s] for s in SLICES if s in metrics},
        "notes": metrics.get("notes", {}),
    }
    return _finite(summary)
