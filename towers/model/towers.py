"""The two towers: encoded features -> concatenation -> MLP -> k-dim vector; score = dot product.

The linear factor model is this same code with ids only and no hidden layer: the id table row is
then the embedding itself (matrix factorisation with biases).
"""

from __future__ import annotations

from typing import NamedTuple

import torch
import torch.nn as nn
import torch.nn.functional as F

from towers.config import ModelSection
from towers.data.history import HISTORY
from towers.model.id_tables import id_table, sparse_table

ACTIVATIONS = {"relu": nn.ReLU, "gelu": nn.GELU, "tanh": nn.Tanh, "silu": nn.SiLU}
ID_INIT_STD = 0.1  # common practice for factor tables (no source)


class Encoded(NamedTuple):
    """What a tower makes of a batch: the vectors, the id-table rows read (None without ids), and the bias
    predicted from features (None without a bias head)."""

    vectors: torch.Tensor
    id_rows: torch.Tensor | None
    feature_bias: torch.Tensor | None


class Tower(nn.Module):
    """Maps one side's encoded features (a FeatureBlock batch) to k-dim embeddings.

    bias_head: also predict each entity's bias from its features (model.feature_bias), a linear map of
    what the MLP's output layer reads: a new entity gets a popularity of its own instead of the unknown
    id's, and normalised vectors, which cannot carry popularity in their length, keep one.
    """

    def __init__(self, inputs: list[dict], id_rows: int, model_cfg: ModelSection, side: str = "id",
                 bias_head: bool = False):
        super().__init__()
        dim = model_cfg.dim
        self.inputs = inputs
        self.normalize = model_cfg.normalize
        self.non_negative = model_cfg.non_negative
        self.id_dropout = model_cfg.id_dropout
        self.use_ids = model_cfg.use_ids
        self.history_decay = model_cfg.history_decay
        hidden = model_cfg.hidden
        # ids only and no hidden layer: the id row is the embedding (plain matrix factorisation)
        self.direct = self.use_ids and not inputs and not hidden
        if self.direct:
            self.id_dropout = 0.0
        id_dim = dim if self.direct else (model_cfg.id_dim or dim)
        # one row per id, or two bounded tables composing each id's row (model/id_tables.py); forward(ids) either way
        self.ids = id_table(id_rows, id_dim, model_cfg.id_table_rows, model_cfg.id_table_combine, ID_INIT_STD,
                            side) if self.use_ids else None
        self.tables = nn.ModuleDict()
        width = id_dim if self.use_ids else 0
        # tables are keyed by position: column names may hold characters torch refuses in module names
        for pos, spec in enumerate(inputs):
            d = spec.get("dim") or model_cfg.feature_dim
            if spec["kind"] == "categorical":
                self.tables[f"f{pos}"] = nn.Embedding(spec["size"], d)
                width += d
            elif spec["kind"] == "tokens":
                self.tables[f"f{pos}"] = nn.EmbeddingBag(spec["size"], d, mode="mean", padding_idx=0)
                width += d
            else:
                width += spec["width"]
        if width == 0:
            raise ValueError("a tower needs ids or at least one feature")
        layers: list[nn.Module] = []
        if not self.direct:
            for h in hidden:
                layers += [nn.Linear(width, h), ACTIVATIONS[model_cfg.activation]()]
                if model_cfg.dropout > 0:
                    layers.append(nn.Dropout(model_cfg.dropout))
                width = h
            layers.append(nn.Linear(width, dim))
        self.mlp = nn.Sequential(*layers)
        # a head of its own, not a row of the output layer: towers trained without one keep their weights' shapes
        self.bias_head = nn.Linear(width, 1) if bias_head and inputs and not self.direct else None

    def id_rows(self, block: dict) -> torch.Tensor:
        """The id-table rows this batch uses; in training a share is swapped for the unknown row."""
        ids = block["id"]
        if self.training and self.id_dropout > 0:
            ids = torch.where(torch.rand(ids.shape) < self.id_dropout, torch.zeros_like(ids), ids)
        return ids

    def _recent_first(self, bags: torch.Tensor, table: nn.EmbeddingBag) -> torch.Tensor:
        """The history bags (latest item first, 0 padding) pooled with weights decay**position, summing to 1
        over each bag's items; an empty bag gives zeros, as the plain mean does."""
        weights = self.history_decay ** torch.arange(bags.shape[1], dtype=torch.float32)
        weights = weights.expand(bags.shape[0], -1) * (bags != 0)
        weights = weights / weights.sum(1, keepdim=True).clamp_min(torch.finfo(torch.float32).tiny)
        return F.embedding_bag(bags, table.weight, mode="sum", per_sample_weights=weights, padding_idx=0)

    def forward(self, block: dict, ids: torch.Tensor | None = None) -> torch.Tensor:
        return self.encode(block, ids).vectors

    def encode(self, block: dict, ids: torch.Tensor | None = None) -> Encoded:
        """The embeddings, the id-table rows they were made from, so the id penalty in training reads each row
        once (one sparse gradient entry a lookup, not two to be added together), and the feature bias."""
        if ids is None and self.use_ids:
            ids = self.id_rows(block)
        rows = self.ids(ids) if self.use_ids else None
        bias = None
        if self.direct:
            out = rows
        else:
            parts = [rows] if self.use_ids else []
            for pos, spec in enumerate(self.inputs):
                x = block[spec["name"]]
                if spec["name"] == HISTORY and self.history_decay < 1.0:
                    x = self._recent_first(x, self.tables[f"f{pos}"])
                elif spec["kind"] in ("categorical", "tokens"):
                    x = self.tables[f"f{pos}"](x)
                parts.append(x)
            x = torch.cat(parts, dim=1)
            if self.bias_head is None:
                out = self.mlp(x)
            else:
                # one product with the output layer: as chunk-size-independent as the vectors it sits beside
                last = self.mlp[-1]
                both = F.linear(self.mlp[:-1](x), torch.cat([last.weight, self.bias_head.weight]),
                                torch.cat([last.bias, self.bias_head.bias]))
                out, bias = both[:, :-1], both[:, -1]
        if self.non_negative:
            out = F.softplus(out)
        if self.normalize:
            out = F.normalize(out, dim=1)
        return Encoded(out, rows, bias)


class TwoTowerModel(nn.Module):
    """Query and candidate towers, optional per-id and global biases; score = q.c / temperature + biases, an
    item's bias its id bias plus, with model.feature_bias, the bias its tower predicts from its features."""

    def __init__(self, query_inputs: list[dict], query_ids: int, cand_inputs: list[dict], cand_ids: int,
                 model_cfg: ModelSection, shared: bool = False):
        super().__init__()
        self.temperature = model_cfg.temperature
        self.use_biases = model_cfg.biases
        # the item side only: a query's bias shifts all its scores alike, so it ranks nothing
        self.candidate_tower = Tower(cand_inputs, cand_ids, model_cfg, "item id",
                                     bias_head=model_cfg.biases and model_cfg.feature_bias)
        self.shared = shared
        self.query_tower = self.candidate_tower if shared else Tower(query_inputs, query_ids, model_cfg, "query-side id")
        if self.use_biases:
            self.candidate_bias = sparse_table(cand_ids, 1, 0.0)
            self.query_bias = self.candidate_bias if shared else sparse_table(query_ids, 1, 0.0)
            self.global_bias = nn.Parameter(torch.zeros(()))

    def query_bias_of(self, ids: torch.Tensor) -> torch.Tensor:
        return self.query_bias(ids).squeeze(1) if self.use_biases else torch.zeros(len(ids))

    def candidate_bias_of(self, ids: torch.Tensor) -> torch.Tensor:
        """The items' id biases (zeros without biases); Encoded.feature_bias adds to them (whole_bias)."""
        return self.candidate_bias(ids).squeeze(1) if self.use_biases else torch.zeros(len(ids))

    def sparse_parameters(self) -> list[nn.Parameter]:
        """Id and bias tables: updated with a sparse optimiser, penalised per row."""
        out = []
        for m in self.modules():
            if isinstance(m, nn.Embedding) and m.sparse:
                out.append(m.weight)
        return list({id(p): p for p in out}.values())

    def dense_parameters(self) -> list[nn.Parameter]:
        sparse = {id(p) for p in self.sparse_parameters()}
        skip = {id(self.global_bias)} if self.use_biases else set()
        return [p for p in self.parameters() if id(p) not in sparse and id(p) not in skip]


def whole_bias(id_bias: torch.Tensor, encoded: Encoded) -> torch.Tensor:
    """An entity's whole bias: its id bias plus what its tower predicts from its features, if it does (item
    towers, so also the items a shared tower embeds as queries)."""
    return id_bias if encoded.feature_bias is None else id_bias + encoded.feature_bias
