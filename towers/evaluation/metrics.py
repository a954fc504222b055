"""Full-catalog ranking metrics and rating errors, as pure functions of tensors.

Ranking metrics are computed from one number per held-out positive: its 0-based rank among the
query's non-excluded candidates. The evaluation protocol counts those ranks tile by tile
(search/rank_counts.py) and passes them to `per_query_ranking`. `ranks_of_positives` computes the
same ranks from a dense score block with excluded entries set to -inf: the reference the tests hold
the tiled counts to. Everything is vectorised over queries and positives.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping

import torch

_EXCLUDED = float("-inf")


def candidates_per_row(scores: torch.Tensor) -> torch.Tensor:
    """Count the non-excluded candidates (scores other than -inf) in each row.

    Returns a LongTensor of shape (U,) for scores of shape (U, n).
    """
    # `> -inf` rather than `!= -inf` so that NaN scores, which
    # ranks_of_positives never counts either, are not counted here.
    return (scores > _EXCLUDED).sum(dim=1)


def positives_per_query(query_index: torch.Tensor, num_queries: int) -> torch.Tensor:
    """Count the positives of each query.

    Returns a LongTensor of shape (num_queries,).
    """
    return torch.bincount(query_index.long(), minlength=num_queries)[:num_queries]


def ranks_of_positives(
    scores: torch.Tensor,
    rows: torch.Tensor,
    items: torch.Tensor,
    tie_break: torch.Tensor,
) -> torch.Tensor:
    """0-based rank of each positive among the non-excluded candidates of its row.

    scores: (U, n) float, -inf marks an excluded candidate. rows, items: (P,)
    row and column of each positive, whose score must be finite. tie_break:
    (n,) distinct priorities; among equal scores the smaller value ranks
    first. Returns a LongTensor (P,): the number of non-excluded candidates
    (other positives included) ranked strictly before each positive.

    Builds temporaries of about P * n * (scores.element_size() + 2) bytes.
    """
    if scores.dim() != 2:
        raise ValueError(f"scores must be 2-D (queries, candidates), got shape {tuple(scores.shape)}")
    rows = rows.long()
    items = items.long()
    if rows.dim() != 1 or rows.shape != items.shape:
        raise ValueError(
            f"rows and items must be 1-D of equal length, got {tuple(rows.shape)} and {tuple(items.shape)}"
        )
    if tie_break.shape != (scores.shape[1],):
        raise ValueError(
            f"tie_break must have shape ({scores.shape[1]},), got {tuple(tie_break.shape)}"
        )

    own = scores[rows, items].unsqueeze(1)  # (P, 1)
    if not torch.isfinite(own).all():
        # An excluded or NaN positive has no meaningful rank; counting it would
        # silently report a rank near the bottom of the catalog.
        raise ValueError("every positive must have a finite score (is a held-out positive also excluded?)")
    own_priority = tie_break[items].unsqueeze(1)  # (P, 1)

    block = scores.index_select(0, rows)  # (P, n), one row per positive
    # A finite score is never below -inf nor equal to it, so excluded
    # candidates drop out of both comparisons with no extra mask.
    ahead = block > own
    tied = block == own
    del block  # free the float copy before the boolean temporaries pile up
    # The positive itself ties with its own score but not with its own
    # priority, so it is never counted.
    tied &= tie_break.unsqueeze(0) < own_priority
    ahead |= tied
    return ahead.sum(dim=1)


def per_query_ranking(
    ranks: torch.Tensor,
    query_index: torch.Tensor,
    num_queries: int,
    num_candidates: torch.Tensor,
    ks: Iterable[int],
) -> dict[str, torch.Tensor]:
    """Per-query recall@k, ndcg@k (binary relevance), mrr and auc from positive ranks.

    ranks: (P,) 0-based ranks from ranks_of_positives. query_index: (P,) query
    of each positive, in [0, num_queries). num_candidates: (num_queries,)
    non-excluded candidates per query, positives included. ks: cutoffs >= 1.
    Returns float64 tensors of shape (num_queries,) keyed 'recall@k',
    'ndcg@k', 'mrr' and 'auc', each a fraction in [0, 1]; NaN for queries
    with no positives, and auc is also NaN for queries with no negatives.
    """
    ks = [int(k) for k in ks]
    if any(k < 1 for k in ks):
        raise ValueError(f"every k must be >= 1, got {ks}")
    ranks = ranks.long()
    query_index = query_index.long()
    if ranks.dim() != 1 or ranks.shape != query_index.shape:
        raise ValueError(
            f"ranks and query_index must be 1-D of equal length, got {tuple(ranks.shape)} and {tuple(query_index.shape)}"
        )
    if num_candidates.shape != (num_queries,):
        raise ValueError(f"num_candidates must have shape ({num_queries},), got {tuple(num_candidates.shape)}")
    if query_index.numel() and (query_index.min() < 0 or query_index.max() >= num_queries):
        raise ValueError(f"query_index must lie in [0, {num_queries})")

    f64 = torch.float64
    n_pos = positives_per_query(query_index, num_queries)
    num_neg = num_candidates.long() - n_pos
    if (num_neg < 0).any():
        raise ValueError("a query has more positives than non-excluded candidates")
    has_pos = n_pos > 0
    n_pos_f = n_pos.to(f64)
    nan = torch.full((num_queries,), math.nan, dtype=f64)

    def per_query_sum(values: torch.Tensor) -> torch.Tensor:
        return torch.bincount(query_index, weights=values.to(f64), minlength=num_queries)[:num_queries]

    out: dict[str, torch.Tensor] = {}
    gain = 1.0 / torch.log2(ranks.to(f64) + 2.0)
    # Ideal DCG of a query with m positives at cutoff k is the sum of the
    # first min(k, m) discounts: a prefix sum, looked up per query.
    longest = int(n_pos.max()) if num_queries else 0
    ideal_prefix = torch.cat(
        [torch.zeros(1, dtype=f64), torch.cumsum(1.0 / torch.log2(torch.arange(longest, dtype=f64) + 2.0), 0)]
    )
    for k in ks:  # a loop over cutoffs only, never over queries
        in_top = ranks < k
        hits = per_query_sum(in_top)
        out[f"recall@{k}"] = torch.where(has_pos, hits / n_pos_f.clamp(min=1), nan)
        dcg = per_query_sum(torch.where(in_top, gain, torch.zeros_like(gain)))
        idcg = ideal_prefix[n_pos.clamp(max=k)]
        out[f"ndcg@{k}"] = torch.where(has_pos, dcg / idcg, nan)

    best = torch.full((num_queries,), torch.iinfo(torch.long).max, dtype=torch.long)
    best = best.scatter_reduce(0, query_index, ranks, reduce="amin", include_self=True)
    out["mrr"] = torch.where(has_pos, 1.0 / (1.0 + best.to(f64)), nan)

    # The positive with the j-th smallest rank (0-based) has exactly j other
    # positives before it, so rank - j negatives. Summed over a query's m
    # positives the j's add up to m(m - 1)/2 whatever their order, so no sort
    # is needed: negatives ranked above positives = sum(ranks) - m(m - 1)/2.
    neg_above = per_query_sum(ranks) - n_pos_f * (n_pos_f - 1.0) / 2.0
    neg_f = num_neg.to(f64)
    auc = 1.0 - neg_above / (n_pos_f * neg_f).clamp(min=1)
    out["auc"] = torch.where(has_pos & (num_neg > 0), auc, nan)
    return out


def mean_over_queries(per_query: Mapping[str, torch.Tensor]) -> dict[str, float]:
    """Average each per-query metric over the queries where it is defined (not NaN).

    Returns plain floats in the metric's unit; NaN if no query defines it.
    """
    return {name: float(torch.nanmean(values.to(torch.float64))) for name, values in per_query.items()}


def _checked_pair(pred: torch.Tensor, target: torch.Tensor, weight: torch.Tensor | None):
    if pred.shape != target.shape:
        raise ValueError(f"pred and target must have the same shape, got {tuple(pred.shape)} and {tuple(target.shape)}")
    if weight is not None and weight.shape != pred.shape:
        raise ValueError(f"weight must have the shape of pred {tuple(pred.shape)}, got {tuple(weight.shape)}")
    # float64 so that long evaluation sets do not lose digits in the sums.
    pred = pred.detach().to(torch.float64)
    target = target.detach().to(torch.float64)
    weight = None if weight is None else weight.detach().to(torch.float64)
    return pred, target, weight


def _mean(values: torch.Tensor, weight: torch.Tensor | None) -> float:
    if weight is None:
        return float(values.mean()) if values.numel() else math.nan
    total = weight.sum()
    return float((weight * values).sum() / total) if total != 0 else math.nan


def rmse(pred: torch.Tensor, target: torch.Tensor, weight: torch.Tensor | None = None) -> float:
    """Root mean squared error, weighted by `weight` when given.

    Returns a float in the unit of the target; NaN for empty input or zero total weight.
    """
    pred, target, weight = _checked_pair(pred, target, weight)
    return math.sqrt(_mean((pred - target) ** 2, weight))


def mae(pred: torch.Tensor, target: torch.Tensor, weight: torch.Tensor | None = None) -> float:
    """Mean absolute error, weighted by `weight` when given.

    Returns a float in the unit of the target; NaN for empty input or zero total weight.
    """
    pred, target, weight = _checked_pair(pred, target, weight)
    return _mean((pred - target).abs(), weight)
