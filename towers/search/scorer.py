"""The score of a pair, for every model and every path (evaluation, top-N lists, exports, the API).

score(q, c) = scale * q_vec . c_vec + q_bias + c_bias + global_bias, with scale = 1 / temperature.
"""

from __future__ import annotations

from dataclasses import dataclass

import torch

FORMULA = "dot(query, item) / temperature + query bias + item bias + global bias"
FORMULA_NO_BIAS = "dot(query, item) / temperature"


@dataclass
class Scorer:
    """Any model as vectors: score(q, c) = scale * q_vec . c_vec + q_bias + c_bias + global_bias."""

    query_vectors: torch.Tensor
    item_vectors: torch.Tensor
    query_bias: torch.Tensor | None = None
    item_bias: torch.Tensor | None = None
    global_bias: float = 0.0
    scale: float = 1.0

    def over_items(self, item_rows: torch.Tensor) -> "Scorer":
        """The same model restricted to some items (column j is item_rows[j]): selected once, not per block."""
        bias = None if self.item_bias is None else self.item_bias.index_select(0, item_rows)
        return Scorer(self.query_vectors, self.item_vectors.index_select(0, item_rows), self.query_bias, bias,
                      self.global_bias, self.scale)

    def for_events(self, users: torch.Tensor, vectors: torch.Tensor | None = None) -> "Scorer":
        """One query row per event: the event's own vector (context-aware towers) or its user's."""
        qv = vectors if vectors is not None else self.query_vectors.index_select(0, users)
        qb = None if self.query_bias is None else self.query_bias.index_select(0, users)
        return Scorer(qv, self.item_vectors, qb, self.item_bias, self.global_bias, self.scale)

    def formula(self, biases: bool = True) -> str:
        """The score function in words, as exported files record it."""
        return FORMULA if biases else FORMULA_NO_BIAS

    def pairs(self, q: torch.Tensor, c: torch.Tensor) -> torch.Tensor:
        s = (self.query_vectors.index_select(0, q) * self.item_vectors.index_select(0, c)).sum(1) * self.scale
        if self.item_bias is not None:
            s = s + self.item_bias.index_select(0, c)
        if self.query_bias is not None:
            s = s + self.query_bias.index_select(0, q)
        return s + self.global_bias
