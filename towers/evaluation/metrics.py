"""Full-catalog ranking metrics, beyond-accuracy measures and rating errors, as pure functions of tensors.

Ranking metrics are computed from two numbers per held-out positive: `ahead`, its query's
non-excluded candidates scoring above it, and `tied`, those scoring exactly the same (itself not
counted). Each metric is its exact expected value when tied candidates are put in random order,
independently per query, so a model that ties many items (popularity on items without history, an
unknown id row, an all-zero row) scores what a random order of those items scores on average, not
one draw of it. The evaluation protocol counts both tile by tile (search/rank_counts.py) and passes
them to `per_query_ranking`; `ranks_of_positives` counts them from a dense score block with excluded
entries set to -inf: the reference the tests hold the tiled counts to, and the path for small dense
blocks. Everything is vectorised over queries and positives.
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
) -> tuple[torch.Tensor, torch.Tensor]:
    """For each positive, the non-excluded candidates of its row scoring above it and those tied with it.

    scores: (U, n) float, -inf marks an excluded candidate. rows, items: (P,) row and column of
    each positive, whose score must be finite. Returns LongTensors ahead (P,): candidates with a
    strictly higher score (other positives included), and tied (P,): candidates with exactly the
    positive's score, the positive itself not counted.

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

    own = scores[rows, items].unsqueeze(1)  # (P, 1)
    if not torch.isfinite(own).all():
        # An excluded or NaN positive has no meaningful rank; counting it would
        # silently report a rank near the bottom of the catalog.
        raise ValueError("every positive must have a finite score (is a held-out positive also excluded?)")

    block = scores.index_select(0, rows)  # (P, n), one row per positive
    # A finite score is never below -inf nor equal to it, so excluded
    # candidates drop out of both comparisons with no extra mask.
    ahead = (block > own).sum(dim=1)
    # The positive's own (finite) score equals itself exactly once in its row.
    tied = (block == own).sum(dim=1) - 1
    return ahead, tied


def per_query_ranking(
    ahead: torch.Tensor,
    query_index: torch.Tensor,
    num_queries: int,
    num_candidates: torch.Tensor,
    ks: Iterable[int],
    tied: torch.Tensor | None = None,
) -> dict[str, torch.Tensor]:
    """Per-query recall@k, ndcg@k (binary relevance), mrr and auc, each its exact expectation over random orders of ties.

    ahead, tied: (P,) counts from ranks_of_positives or rank_counts (tied=None: no ties).
    query_index: (P,) query of each positive, in [0, num_queries). num_candidates: (num_queries,)
    non-excluded candidates per query, positives included. ks: cutoffs >= 1. Returns float64
    tensors of shape (num_queries,) keyed 'recall@k', 'ndcg@k', 'mrr' and 'auc', each in [0, 1];
    NaN for queries with no positives, and auc is also NaN for queries with no negatives.

    Each query's tied candidates are put in uniformly random order, independently per query. A
    positive with a ahead and t tied then has the 0-based rank a + X, X uniform on {0..t}, and:
    - recall@k: P(a + X < k) = clamp(k - a, 0, t + 1) / (t + 1), summed over positives / m;
    - ndcg@k: E[1{a+X<k} / log2(a+X+2)] = (D(min(a+t+1, k)) - D(min(a, k))) / (t + 1), with D(n)
      the sum of the first n discounts 1/log2(r + 2), summed over positives; the ideal DCG has no ties;
    - auc: negatives above positives = sum of ranks - m(m - 1)/2 in every order (the j-th best
      positive has j positives above it), linear in the ranks, so E[rank] = a + t/2 gives it: half
      credit per tied (positive, negative) pair, as roc_auc_score;
    - mrr: 1 / (1 + the best rank), which lies in the query's highest tie group holding a positive
      (positives with equal `ahead` share a score, so one group of T = t + 1 items). With m
      positives there, their places are a uniform m-subset of {0..T-1}; the first, J, has
      P(J >= j) = C(T-j, m) / C(T, m), so P(J = j) = C(T-1-j, m-1) / C(T, m) and E[1/(a+1+J)] is
      that sum over j = 0..T-m (_first_reciprocal). For m = 1, J is uniform on {0..T-1}:
      E = (H(a+T) - H(a)) / T = (psi(a+1+T) - psi(a+1)) / T.
    With t = 0 each is the plain metric of rank a.
    """
    ks = [int(k) for k in ks]
    if any(k < 1 for k in ks):
        raise ValueError(f"every k must be >= 1, got {ks}")
    a = ahead.long()
    query_index = query_index.long()
    if a.dim() != 1 or a.shape != query_index.shape:
        raise ValueError(
            f"ahead and query_index must be 1-D of equal length, got {tuple(a.shape)} and {tuple(query_index.shape)}"
        )
    t = torch.zeros_like(a) if tied is None else tied.long()
    if t.shape != a.shape:
        raise ValueError(f"tied must have the shape of ahead {tuple(a.shape)}, got {tuple(t.shape)}")
    if num_candidates.shape != (num_queries,):
        raise ValueError(f"num_candidates must have shape ({num_queries},), got {tuple(num_candidates.shape)}")
    if query_index.numel() and (query_index.min() < 0 or query_index.max() >= num_queries):
        raise ValueError(f"query_index must lie in [0, {num_queries})")
    if a.numel() and (a.min() < 0 or t.min() < 0):
        raise ValueError("ahead and tied counts must be >= 0")

    f64 = torch.float64
    num_candidates = num_candidates.long()
    n_pos = positives_per_query(query_index, num_queries)
    num_neg = num_candidates - n_pos
    if (num_neg < 0).any():
        raise ValueError("a query has more positives than non-excluded candidates")
    size = t + 1  # the positive's tie group: itself and the candidates tied with it
    if (a + size > num_candidates[query_index]).any():
        raise ValueError("a positive has more candidates ahead of and tied with it than its query has")
    has_pos = n_pos > 0
    n_pos_f = n_pos.to(f64)
    nan = torch.full((num_queries,), math.nan, dtype=f64)

    def per_query_sum(values: torch.Tensor) -> torch.Tensor:
        return torch.bincount(query_index, weights=values.to(f64), minlength=num_queries)[:num_queries]

    out: dict[str, torch.Tensor] = {}
    # D(n), the sum of the first n discounts, for n up to the largest cutoff: gains and ideal DCGs
    # at cutoff k only need n <= k
    discounts = 1.0 / torch.log2(torch.arange(max(ks, default=0), dtype=f64) + 2.0)
    prefix = torch.cat([torch.zeros(1, dtype=f64), torch.cumsum(discounts, 0)])
    size_f = size.to(f64)
    plain_gain = 1.0 / torch.log2(a.to(f64) + 2.0)  # the gain of rank a, used where there is no tie
    for k in ks:  # a loop over cutoffs only, never over queries
        hit = torch.minimum((k - a).clamp(min=0), size).to(f64) / size_f
        # (clamped: sums of fractions can round a last bit past 1)
        out[f"recall@{k}"] = torch.where(has_pos, (per_query_sum(hit) / n_pos_f.clamp(min=1)).clamp(max=1.0), nan)
        spread = (prefix[(a + size).clamp(max=k)] - prefix[a.clamp(max=k)]) / size_f
        gain = torch.where(t == 0, torch.where(a < k, plain_gain, torch.zeros_like(plain_gain)), spread)
        idcg = prefix[n_pos.clamp(max=k)]
        out[f"ndcg@{k}"] = torch.where(has_pos, (per_query_sum(gain) / idcg).clamp(max=1.0), nan)

    big = torch.iinfo(torch.long).max
    best = torch.full((num_queries,), big, dtype=torch.long).scatter_reduce(0, query_index, a, "amin")
    top = a == best[query_index]  # the positives in their query's highest tie group holding one
    q_top, size_top = query_index[top], size[top]
    m_top = torch.bincount(q_top, minlength=num_queries)[:num_queries]
    group = torch.zeros(num_queries, dtype=torch.long).scatter_reduce(0, q_top, size_top, "amax")
    smallest = torch.full((num_queries,), big, dtype=torch.long).scatter_reduce(0, q_top, size_top, "amin")
    if (has_pos & ((group != smallest) | (m_top > group))).any():
        raise ValueError("positives of a query with equal `ahead` share a score: their tied counts must agree "
                         "and their group must hold them all")
    first = torch.where(has_pos, best, torch.zeros_like(best)) + 1
    mrr = _first_reciprocal(first, group.clamp(min=1), m_top.clamp(min=1))
    out["mrr"] = torch.where(has_pos, mrr.clamp(max=1.0), nan)

    neg_above = per_query_sum(a.to(f64) + t.to(f64) / 2.0) - n_pos_f * (n_pos_f - 1.0) / 2.0
    neg_f = num_neg.to(f64)
    auc = 1.0 - neg_above / (n_pos_f * neg_f).clamp(min=1)
    out["auc"] = torch.where(has_pos & (num_neg > 0), auc, nan)
    return out


# terms of the m > 1 sums of _first_reciprocal evaluated at once: bounds the temporaries (a few MB each)
MRR_CHUNK = 1 << 18


def _first_reciprocal(first: torch.Tensor, size: torch.Tensor, m: torch.Tensor) -> torch.Tensor:
    """E[1 / (first + J)], J the smallest of m places drawn without replacement from {0..size-1} (per query, float64).

    first (a + 1), size (T) and m (1 <= m <= T): int64 (Q,). J = 0 surely where m = T (T = 1
    included): 1 / first. For m = 1 the digamma form. For 1 < m < T the sum over j = 0..T-m of
    P(J = j) / (first + j), P(J = j) = C(T-1-j, m-1) / C(T, m) = exp of log-gamma differences; each
    distinct (first, T, m) is summed once, its terms in chunks of MRR_CHUNK, so the work is one term
    per place of each distinct group. Log-gamma values of size T carry absolute errors near
    T log(T) x 2^-53, so the sums carry relative errors near that (1e-9 at T = 10^6).
    """
    f64 = torch.float64
    c = first.to(f64)
    out = 1.0 / c
    single = (m == 1) & (size > 1)
    if single.any():
        cs, ts = c[single], size[single].to(f64)
        out[single] = (torch.digamma(cs + ts) - torch.digamma(cs)) / ts
    several = (m > 1) & (m < size)
    if not several.any():
        return out
    triples, where = torch.unique(torch.stack([first[several], size[several], m[several]], 1), dim=0,
                                  return_inverse=True)
    uc, ut, um = (triples[:, i] for i in range(3))
    ends = torch.cumsum(ut - um + 1, 0)  # each triple's terms j = 0..T-m, laid end to end
    starts = ends - (ut - um + 1)
    ut_f, um_f = ut.to(f64), um.to(f64)
    # log(1 / C(T, m)) + log(m) - log((m-1)!): the part of log P(J = j) that does not depend on j
    constant = torch.lgamma(ut_f - um_f + 1.0) - torch.lgamma(ut_f + 1.0) + torch.log(um_f)
    sums = torch.zeros(len(triples), dtype=f64)
    total = int(ends[-1])
    for g0 in range(0, total, MRR_CHUNK):  # a loop over chunks of terms, never over queries
        g = torch.arange(g0, min(g0 + MRR_CHUNK, total))
        u = torch.searchsorted(ends, g, right=True)
        j = (g - starts[u]).to(f64)
        rest = ut_f[u] - j  # T - j
        log_p = torch.lgamma(rest) - torch.lgamma(rest - um_f[u] + 1.0) + constant[u]
        sums.index_add_(0, u, torch.exp(log_p) / (uc[u].to(f64) + j))
    out[several] = sums[where]
    return out


def catalog_coverage(top_items: torch.Tensor, n_candidates: int) -> float:
    """Share of the n_candidates columns that appear in any row of top_items.

    top_items: (Q, K) int64 column indices in [0, n_candidates), -1 for padding (a list shorter
    than K). Returns a float in [0, 1]; NaN when there are no candidates.
    """
    flat = recommended(top_items, n_candidates)
    if n_candidates == 0:
        return math.nan
    shown = torch.zeros(n_candidates, dtype=torch.bool)
    shown[flat] = True
    return float(shown.sum()) / n_candidates


def popularity_percentile(top_items: torch.Tensor, counts: torch.Tensor) -> float:
    """Mean popularity percentile of the recommended items, over every non-padding slot of top_items.

    counts: (n_candidates,) training interaction counts per candidate column. A candidate's
    percentile is the share of candidates with a smaller count plus half the share with an equal one
    (itself included), in percent: scipy.stats.percentileofscore(counts, its count, kind="mean").
    top_items: (Q, K) as in catalog_coverage. Returns a float in [0, 100]; NaN with no slot filled.
    """
    if counts.dim() != 1:
        raise ValueError(f"counts must be 1-D (n_candidates,), got shape {tuple(counts.shape)}")
    counts = counts.to(torch.float64)
    if not torch.isfinite(counts).all():
        raise ValueError("counts must be finite")
    flat = recommended(top_items, len(counts))
    if flat.numel() == 0:
        return math.nan
    return float(percentiles(counts)[flat].mean())


def percentiles(counts: torch.Tensor) -> torch.Tensor:
    """float64 (n,): each candidate's popularity percentile among `counts` (popularity_percentile's)."""
    counts = counts.to(torch.float64)
    ordered = torch.sort(counts).values
    below = torch.searchsorted(ordered, counts, right=False)  # candidates with a smaller count
    at_or_below = torch.searchsorted(ordered, counts, right=True)
    return 50.0 * (below + at_or_below).to(torch.float64) / len(counts)


def recommended(top_items: torch.Tensor, n_candidates: int) -> torch.Tensor:
    """The non-padding entries of a (Q, K) top_items table, flattened, checked to lie in [0, n_candidates)."""
    if top_items.dim() != 2:
        raise ValueError(f"top_items must be 2-D (queries, K), got shape {tuple(top_items.shape)}")
    flat = top_items.reshape(-1).long()
    if flat.numel() and (flat.min() < -1 or flat.max() >= n_candidates):
        raise ValueError(f"top_items must lie in [0, {n_candidates}), or be -1 for padding")
    return flat[flat >= 0]


def mean_by_group(per_query: Mapping[str, torch.Tensor], group: torch.Tensor, n_groups: int) -> dict[str, torch.Tensor]:
    """Each per-query metric averaged within groups of queries (NaN values left out), and the queries per group.

    per_query: name -> (Q,) values, as per_query_ranking returns. group: (Q,) int64 in [0, n_groups).
    Returns name -> float64 (n_groups,) means (NaN where a group defines none) and 'queries' ->
    int64 (n_groups,), the queries in each group.
    """
    group = group.long()
    if group.dim() != 1:
        raise ValueError(f"group must be 1-D (queries,), got shape {tuple(group.shape)}")
    if group.numel() and (group.min() < 0 or group.max() >= n_groups):
        raise ValueError(f"group must lie in [0, {n_groups})")
    if "queries" in per_query:
        raise ValueError("'queries' is the name of the count of queries per group; rename that metric")
    out: dict[str, torch.Tensor] = {}
    for name, values in per_query.items():  # a loop over metrics, never over queries
        if values.shape != group.shape:
            raise ValueError(f"metric '{name}' must have the shape of group {tuple(group.shape)}, got {tuple(values.shape)}")
        v = values.to(torch.float64)
        ok = ~torch.isnan(v)
        sums = torch.zeros(n_groups, dtype=torch.float64).index_add_(0, group[ok], v[ok])
        defined = torch.bincount(group[ok], minlength=n_groups)[:n_groups]
        out[name] = torch.where(defined > 0, sums / defined.clamp(min=1), math.nan)
    out["queries"] = torch.bincount(group, minlength=n_groups)[:n_groups]
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
