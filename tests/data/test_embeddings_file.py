"""Embeddings files: the parquet schema other tools read, and the round trip through towers' reader."""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import torch

from towers.data.embeddings_file import read_embeddings, write_embeddings


def test_embeddings_parquet_round_trip(tmp_path):
    ids = np.array(["a", "b", "c"], dtype=object)
    vec = torch.randn(3, 4)
    path = write_embeddings(tmp_path / "e.parquet", ids, vec, torch.tensor([0.1, 0.2, 0.3]), {"normalized": "false"})
    t = pq.read_table(path)
    assert t.schema.field("embedding").type == pa.list_(pa.float32(), 4)  # reference: Arrow fixed_size_list
    got_ids, got_vec, got_bias, meta = read_embeddings(path)
    assert list(got_ids) == ["a", "b", "c"] and torch.equal(got_vec, vec) and meta["k"] == "4"
    assert not list(tmp_path.glob(".*.tmp"))  # the atomic write left no temp file


