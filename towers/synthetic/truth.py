"""Generated data's true vectors, written in the embeddings-file layout that runs export, so the
oracle rows of an evaluation read them like any model's vectors."""

from __future__ import annotations

import pathlib

import numpy as np
import torch

from towers.data.embeddings_file import write_embeddings
from towers.search.scorer import FORMULA


def write_truth(path: pathlib.Path, ids: np.ndarray, vectors: np.ndarray, bias: np.ndarray, side: str) -> pathlib.Path:
    """Write one side's true vectors and biases (side: "user" or "item"); returns the path."""
    meta = {"normalized": "false", "temperature": 1.0, "score": FORMULA, "global_bias": 0.0,
            "model": "planted truth", "side": side}
    return write_embeddings(path, ids, torch.from_numpy(np.ascontiguousarray(vectors, dtype=np.float32)),
                            torch.from_numpy(np.asarray(bias, dtype=np.float32)), meta)
