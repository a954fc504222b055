"""Trained towers as vectors: every catalog entity embedded in chunks, wrapped as the shared Scorer.
"""

from __future__ import annotations

import torch

from towers.data.context import averaged_vectors, sample_contexts
from towers.data.features import FeatureBlock, block_len, slice_block, take
from towers.data.history import HISTORY
from towers.data.prepare import Prepared
from towers.model.towers import Tower, TwoTowerModel
from towers.search.scorer import Scorer

EMBED_CHUNK = 65536


@torch.no_grad()
def embed_all(tower: Tower, block: FeatureBlock) -> torch.Tensor:
    """Embeddings of every entity in a block, computed in chunks with the tower in eval mode."""
    return embed_with_bias(tower, block)[0]


@torch.no_grad()
def embed_with_bias(tower: Tower, block: FeatureBlock) -> tuple[torch.Tensor, torch.Tensor | None]:
    """embed_all, and the bias the tower predicts for each entity from its features (None without a bias head)."""
    was = tower.training
    tower.eval()
    n = block_len(block)
    out = bias = None  # filled chunk by chunk: the chunks are never held beside their joined copy
    for i in range(0, n, EMBED_CHUNK):
        part = tower.encode(slice_block(block, i, min(n, i + EMBED_CHUNK)))
        if out is None:
            out = torch.empty(n, part.vectors.shape[1], dtype=part.vectors.dtype)
            bias = None if part.feature_bias is None else torch.empty(n)
        out[i:i + len(part.vectors)] = part.vectors
        if bias is not None:
            bias[i:i + len(part.vectors)] = part.feature_bias
    if out is None:
        out = torch.zeros(0, tower.mlp[-1].out_features if len(tower.mlp) else tower.ids.embedding_dim)
        bias = None if tower.bias_head is None else torch.zeros(0)
    tower.train(was)
    return out, bias


@torch.no_grad()
def model_scorer(model: TwoTowerModel, data: Prepared, query_rows: torch.Tensor | None = None) -> Scorer:
    """The trained model as vectors over both catalogs.

    A query tower that reads context columns gives each query its vector averaged over a fixed sample
    of training contexts (context.sample_contexts): its expected scores over the usual context mix.
    query_rows: embed only these queries (a process of a divided log evaluates only its own users), the
    Scorer's query_place saying where each is.
    """
    block = data.queries.block if query_rows is None else take(data.queries.block, query_rows)
    cv, item_feature_bias = embed_with_bias(model.candidate_tower, data.candidates.block)
    query_feature_bias = None  # a shared tower's queries are items: their feature bias too
    if reads_context(model.query_tower, data):
        qv = averaged_vectors(model.query_tower, block, sample_contexts(data.train.context))
    elif model.shared and query_rows is None and data.queries is data.candidates:
        qv, query_feature_bias = cv, item_feature_bias
    else:
        qv, query_feature_bias = embed_with_bias(model.query_tower, block)
    qb = cb = None
    if model.use_biases:
        qb = model.query_bias_of(block["id"])
        cb = model.candidate_bias_of(data.candidates.block["id"])
        if query_feature_bias is not None:
            qb = qb + query_feature_bias
        if item_feature_bias is not None:
            cb = cb + item_feature_bias
    g = float(model.global_bias) if model.use_biases else 0.0
    place = None
    if query_rows is not None:
        place = torch.full((len(data.queries.ids),), -1, dtype=torch.int64)
        place[query_rows] = torch.arange(len(query_rows))
    return Scorer(qv, cv, qb, cb, g, 1.0 / model.temperature, place)


def reads_context(tower: Tower, data: Prepared) -> bool:
    """Whether a query tower takes the data's context columns as inputs."""
    return data.context is not None and any(i["name"] in data.context.names for i in tower.inputs)


def reads_history(tower: Tower) -> bool:
    """Whether a query tower takes a bag of the user's items as an input (data/history.py)."""
    return any(i["name"] == HISTORY for i in tower.inputs)
