"""Evaluation protocol: score held-out pairs against the full catalog, for every model, per slice.

Metrics themselves are pure functions in metrics.py; this module decides what is ranked against
what: warm pairs against every item with training history (the query's known positives excluded),
cold pairs against the held-out items only.
"""

from __future__ import annotations

import numpy as np
import torch

from towers.config import Config
from towers.data.context import event_pairs, vectors_with_context
from towers.data.embeddings_file import TrueVectors
from towers.data.pairs import Pairs, SplitPairs
from towers.data.prepare import Prepared
from towers.evaluation import metrics as M
from towers.model.embed import reads_context
from towers.model.towers import TwoTowerModel
from towers.search import rank_counts as RC
from towers.search.scorer import Scorer, excluded_cells

MODEL_ORDER = ("popularity", "linear_factor", "bilinear", "towers", "oracle")


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
    or whose item is not a candidate, are dropped. Candidates above and tied with each positive are
    counted tile by tile (rank_counts.py), from float32 scores ((scale q.x + item bias) + query bias)
    + global bias, without building the query x item score matrix; ties count at their expected value
    (metrics.per_query_ranking). tie_seed seeds the sample of max_queries queries.
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

    # excluded (query row, column) cells: the test queries' known pairs and, for item-item data, each
    # query item itself
    ex_rows, ex_cols = excluded_cells(queries, torch.from_numpy(known_keys // n_items),
                                      torch.from_numpy(known_keys % n_items), col_of, exclude_self)

    qb = None if over.query_bias is None else over.query_bias.index_select(0, queries)
    ahead, tied, n_candidates = RC.rank_counts(over.query_vectors.index_select(0, queries), over.item_vectors,
                                               q_index, col_of[pc], over.item_bias, qb, over.global_bias, over.scale,
                                               ex_rows, ex_cols)
    per_q = M.per_query_ranking(ahead, q_index, len(queries), n_candidates, ks, tied)
    out = M.mean_over_queries(per_q)
    out["queries"] = int(len(queries))
    return out


def oracle_scorer(truth: TrueVectors) -> Scorer:
    """The planted truth as a model: its true vectors and biases."""
    return Scorer(truth.query_vectors, truth.item_vectors, truth.query_bias, truth.item_bias)


def evaluate_slices(scorers: dict[str, Scorer], data: SplitPairs, cfg: Config, event_vectors: dict | None = None) -> dict:
    """{slice: {model: {metric: value}}} for the warm test pairs and, if any, the cold ones.

    With context columns each held-out event is its own query (context.py); event_vectors maps a
    model name to a function giving its query vectors for a slice's events (context-aware towers).
    """
    explicit = cfg.training.rating_loss
    ks, tie = cfg.evaluation.top_k, cfg.run.seed
    empty = Pairs(torch.zeros(0, dtype=torch.int64), torch.zeros(0, dtype=torch.int64))
    slices = {"warm": (data.test, data.known(), data.warm_items)}
    if len(data.cold_test):
        slices["cold"] = (data.cold_test, empty, data.cold_items)
    out: dict = {name: {} for name in slices}
    for slice_name, (pairs, known, candidates) in slices.items():
        users = None
        if pairs.context is not None:
            raw = pairs
            pairs, known, users = event_pairs(pairs, known)
        for name in MODEL_ORDER:
            if name not in scorers:
                continue
            s = scorers[name]
            if users is not None:
                fn = (event_vectors or {}).get(name)
                s = s.for_queries(users, fn(raw) if fn else None)
            if explicit:
                out[slice_name][name] = rating_metrics(s, pairs)
            else:
                out[slice_name][name] = ranking_metrics(s, pairs, known, candidates, ks, tie, exclude_self=data.item_item)
    return out


def format_table(metrics: dict) -> str:
    """The metrics as a plain text table, one block per slice."""
    lines = []
    for slice_name, models in metrics.items():
        names = [m for m in models if models[m]]
        if not names:
            continue
        cols = [c for c in next(iter(models[n] for n in names)) if c != "queries"]
        width = max(len(n) for n in names) + 2
        first = models[names[0]]
        lines.append(f"[{slice_name}]" + (f"  ({first['queries']} queries)" if "queries" in first else ""))
        lines.append("model".ljust(width) + "".join(c.rjust(11) for c in cols))
        for n in names:
            lines.append(n.ljust(width) + "".join(f"{models[n].get(c, float('nan')):11.4f}" for c in cols))
        lines.append("")
    return "\n".join(lines).rstrip() + "\n"


def validation_metrics(scorer: Scorer, data: Prepared, cfg: Config, pairs: Pairs,
                       model: TwoTowerModel | None = None) -> dict[str, float]:
    """Metrics of `pairs` (validation or test) in the warm setting.

    With context columns every pair is its own query event (see context.py); `model` then gives the
    events' query vectors when its query tower reads the context.
    """
    known = data.train.positives()
    if pairs.context is not None:
        vectors = None
        if model is not None and reads_context(model.query_tower, data):
            vectors = vectors_with_context(model.query_tower, data.queries.block, pairs.query, pairs.context)
        pairs, known, users = event_pairs(pairs, known)
        scorer = scorer.for_queries(users, vectors)
    if cfg.training.rating_loss:
        return rating_metrics(scorer, pairs)
    return ranking_metrics(scorer, pairs, known, data.warm_items, cfg.evaluation.top_k,
                           tie_seed=cfg.run.seed, max_queries=cfg.training.validate_queries,
                           exclude_self=data.item_item)
