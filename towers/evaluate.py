"""Evaluation protocol: score held-out pairs against the full catalog, for every model, per slice.

Metrics themselves are pure functions in metrics.py; this module decides what is ranked against
what: warm pairs against every item with training history (the query's known positives excluded),
cold pairs against the held-out items only.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import torch

from . import metrics as M
from . import rank_counts as RC
from .dataset import Pairs


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

    def pairs(self, q: torch.Tensor, c: torch.Tensor) -> torch.Tensor:
        s = (self.query_vectors.index_select(0, q) * self.item_vectors.index_select(0, c)).sum(1) * self.scale
        if self.item_bias is not None:
            s = s + self.item_bias.index_select(0, c)
        if self.query_bias is not None:
            s = s + self.query_bias.index_select(0, q)
        return s + self.global_bias


def popularity_scorer(train: Pairs, n_queries: int, n_items: int, explicit: bool, item_item: bool = False) -> Scorer:
    """Popularity: training counts for ranking; for ratings, each item's mean target damped toward the global mean."""
    ones = torch.ones(n_queries, 1)
    if not explicit:
        counts = torch.bincount(train.candidate, minlength=n_items).float()
        if item_item:
            counts += torch.bincount(train.query, minlength=n_items).float()
        return Scorer(ones, counts.unsqueeze(1))
    damping = 5.0  # prior strength in pseudo-ratings: common practice (no source)
    y = train.target.double()
    mean = float(y.mean())
    sums = torch.zeros(n_items, dtype=torch.float64).index_add_(0, train.candidate, y)
    counts = torch.bincount(train.candidate, minlength=n_items).double()
    damped = ((sums + damping * mean) / (counts + damping)).float()
    return Scorer(torch.zeros(n_queries, 1), torch.zeros(n_items, 1), item_bias=damped)


def rating_metrics(scorer: Scorer, test: Pairs) -> dict[str, float]:
    """RMSE and MAE of predicted targets on held-out pairs."""
    if len(test) == 0:
        return {}
    pred = scorer.pairs(test.query, test.candidate)
    return {"rmse": M.rmse(pred, test.target, test.weight), "mae": M.mae(pred, test.target, test.weight)}


def _pair_keys(q: torch.Tensor, c: torch.Tensor, n_items: int) -> np.ndarray:
    return q.numpy().astype(np.int64) * n_items + c.numpy().astype(np.int64)


def ranking_metrics(scorer: Scorer, test: Pairs, known: Pairs, candidate_mask: torch.Tensor, ks,
                    tie_seed: int = 0, max_queries: int | None = None, exclude_self: bool = False) -> dict[str, float]:
    """Full-catalog ranking metrics of held-out positives, averaged over queries.

    candidate_mask: bool (n_items,) items that compete in the ranking. known: the pairs whose items
    are excluded from each query's ranking (its training positives). Test pairs that are also known,
    or whose item is not a candidate, are dropped. Ranks are counted tile by tile (rank_counts.py),
    from float32 scores ((scale q.x + item bias) + query bias) + global bias, without building the query x item score matrix.
    """
    n_items = len(candidate_mask)
    test = test.positives()
    keep = candidate_mask[test.candidate].numpy()
    tq, tc = test.query[keep], test.candidate[keep]
    if exclude_self:
        ok = (tq != tc).numpy()
        tq, tc = tq[ok], tc[ok]
    keys = np.unique(_pair_keys(tq, tc, n_items))
    known_keys = np.unique(_pair_keys(known.query, known.candidate, n_items))
    keys = keys[~np.isin(keys, known_keys, assume_unique=True)]
    if len(keys) == 0:
        return {}
    pq = torch.from_numpy(keys // n_items)
    pc = torch.from_numpy(keys % n_items)
    queries, q_index = torch.unique(pq, return_inverse=True)
    if max_queries is not None and len(queries) > max_queries:
        g = torch.Generator().manual_seed(tie_seed + 7)
        chosen = torch.zeros(len(queries), dtype=torch.bool)
        chosen[torch.randperm(len(queries), generator=g)[:max_queries]] = True
        sel = chosen[q_index]
        pq, pc = pq[sel], pc[sel]
        queries, q_index = torch.unique(pq, return_inverse=True)
    cand_rows = torch.nonzero(candidate_mask).flatten()
    over = scorer.over_items(cand_rows)
    col_of = torch.full((n_items,), -1, dtype=torch.int64)
    col_of[cand_rows] = torch.arange(len(cand_rows))
    n_cols = len(cand_rows)
    tie_break = torch.rand(n_cols, generator=torch.Generator().manual_seed(tie_seed))

    # excluded (query row, column) pairs: the test queries' known pairs and, for item-item data, each
    # query item itself
    kq = torch.from_numpy(known_keys // n_items)
    kc = torch.from_numpy(known_keys % n_items)
    kcol = col_of[kc]
    relevant = (kcol >= 0) & torch.isin(kq, queries)
    ex_rows, ex_cols = torch.searchsorted(queries, kq[relevant]), kcol[relevant]
    if exclude_self:
        own = col_of[queries]
        has = torch.nonzero(own >= 0).flatten()
        ex_rows, ex_cols = torch.cat([ex_rows, has]), torch.cat([ex_cols, own[has]])

    qb = None if over.query_bias is None else over.query_bias.index_select(0, queries)
    ranks, n_candidates = RC.rank_counts(over.query_vectors.index_select(0, queries), over.item_vectors, q_index,
                                         col_of[pc], tie_break, over.item_bias, qb, over.global_bias, over.scale,
                                         ex_rows, ex_cols)
    per_q = M.per_query_ranking(ranks, q_index, len(queries), n_candidates, ks)
    out = M.mean_over_queries(per_q)
    out["queries"] = int(len(queries))
    return out

