"""Small helpers shared by test files in several folders (fixtures live in conftest.py)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pyarrow.parquet as pq
import torch

from towers import config as C
from towers.data.prepare import prepare
from towers.model.build import baseline_model
from towers.runs.train import apply_threads


def score_scale(path: Path) -> tuple[float, float]:
    """(1 / temperature, global bias) from an embeddings parquet's schema metadata, read with pyarrow alone."""
    meta = pq.read_schema(path).metadata
    return 1.0 / float(meta[b"temperature"]), float(meta[b"global_bias"])


def read_vectors(path: Path):
    """(ids, vectors, bias) of an embeddings parquet, read with pyarrow alone (not towers' reader)."""
    t = pq.read_table(path)
    k = t.schema.field("embedding").type.list_size
    vec = t.column("embedding").combine_chunks().flatten().to_numpy().reshape(-1, k).astype(np.float64)
    bias = t.column("bias").to_numpy().astype(np.float64) if "bias" in t.column_names else np.zeros(len(vec))
    return t.column("id").to_pylist(), vec, bias


def prepared_baseline(cfg: C.Config):
    """(prepared data, the linear factor model, its preset) for a resolved config, seeded as a run is."""
    apply_threads(cfg)
    torch.manual_seed(cfg.run.seed)
    data = prepare(cfg)
    model, preset = baseline_model(data, cfg)
    return data, model, preset
