"""Evaluation protocol: score held-out pairs against the full catalog, for every model, per slice.

Metrics themselves are pure functions in metrics.py; this module decides what is ranked against
what: warm pairs against every item with training history (the query's known positives excluded),
cold pairs against the held-out items only, pairs of users held out whole against the warm items.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import torch

from towers.collective import across, joined, summed
from towers.config import Config
from towers.data.context import event_pairs, vectors_with_context
from towers.data.embeddings_file import TrueVectors
from towers.data.groups import Groups
from towers.data.pairs import Pairs, SplitPairs
from towers.data.prepare import Prepared
from towers.evaluation import metrics as M
from towers.evaluation import references as R
from towers.evaluation.references import ReferenceScorer
from towers.evaluation.shares import Share
from towers.model.embed import reads_context
from towers.model.towers import TwoTowerModel
from towers.search import rank_counts as RC
from towers.search.scorer import Scorer, excluded_cells, known_chunks

MODEL_ORDER = ("popularity", "linear_factor", R.ITEM_KNN, R.EASE, "bilinear", "towers", "oracle")
SLICES = ("warm", "cold", "cold_users")  # the keys of metrics.json that hold a slice's {model: metrics}


def popularity_scorer(train: Pairs, n_queries: int, n_items: int, explicit: bool, item_item: bool = False,
                      divided: bool = False) -> Scorer:
    """Popularity: training counts for ranking; for ratings, each item's mean target damped toward the global mean.

    divided: the log is divided among processes; the counts and sums are of every process's pairs.
    """
    summed = across(divided)
    ones = torch.ones(n_queries, 1)
    if not explicit:
        counts = torch.bincount(train.candidate, minlength=n_items).float()
        if item_item:
            counts += torch.bincount(train.query, minlength=n_items).float()
        return Scorer(ones, summed(counts).unsqueeze(1))
    damping = 5.0  # prior strength in pseudo-ratings: common practice (no source)
    y = train.target.double()
    total = summed(torch.tensor([float(y.sum()), float(len(y))], dtype=torch.float64))
    mean = float(total[0] / total[1])
    sums = summed(torch.zeros(n_items, dtype=torch.float64).index_add_(0, train.candidate, y))
    counts = summed(torch.bincount(train.candidate, minlength=n_items).double())
    damped = ((sums + damping * mean) / (counts + damping)).float()
    return Scorer(torch.zeros(n_queries, 1), torch.zeros(n_items, 1), item_bias=damped)


def rating_metrics(scorer: Scorer, test: Pairs, share: Share | None = None) -> dict[str, float]:
    """RMSE and MAE of predicted targets on held-out pairs (share.divided: of every process's pairs)."""
    pred, target, weight = scorer.pairs(test.query, test.candidate), test.target, test.weight
    if share is not None and share.divided:  # every process's pairs (weights are configured alike in all)
        pred, target = share.joined(pred), share.joined(target)
        weight = None if weight is None else share.joined(weight)
    if len(pred) == 0:
        return {}
    return {"rmse": M.rmse(pred, target, weight), "mae": M.mae(pred, target, weight)}


def _pair_keys(q: np.ndarray, c: np.ndarray, n_items: int) -> np.ndarray:
    return q.astype(np.int64) * n_items + c.astype(np.int64)


@dataclass
class HeldOut:
    """A slice's held-out positives as a ranking problem: distinct queries, their positives and exclusions."""

    queries: torch.Tensor  # catalog query rows, distinct
    q_index: torch.Tensor  # (P,) each positive's position in `queries`
    items: torch.Tensor  # (P,) each positive's catalog item row
    cand_rows: torch.Tensor  # catalog rows of the competing items; column j of a ranking is cand_rows[j]
    columns: torch.Tensor  # (P,) each positive's column
    ex_rows: torch.Tensor  # excluded (ranking row, column) cells, sorted by row
    ex_cols: torch.Tensor

    def part(self, share: Share) -> "HeldOut":
        """This process's share: every world-th query from the rank-th, with its positives and exclusions,
        query positions renumbered within the share (positive and exclusion order kept)."""
        keep_p, keep_x = share.mine(self.q_index), share.mine(self.ex_rows)
        return HeldOut(self.queries[share.mine(torch.arange(len(self.queries)))], self.q_index[keep_p] // share.world,
                       self.items[keep_p], self.cand_rows, self.columns[keep_p], self.ex_rows[keep_x] // share.world,
                       self.ex_cols[keep_x])


def held_out(test: Pairs, known: Pairs | list[Pairs], candidate_mask: torch.Tensor, seed: int = 0,
             max_queries: int | None = None, exclude_self: bool = False,
             share: Share | None = None) -> HeldOut | None:
    """The positives of `test` to rank, or None when none is left.

    Test pairs that are also known (known: pairs, or a list of parts), or whose item does not compete,
    are dropped; with max_queries a seeded sample of that many queries is kept (`sample_keys`). With a
    divided log (share.divided) the sample is drawn over every process's queries, so the processes
    together rank the very queries one process would.
    """
    n_items = len(candidate_mask)
    test = test.positives()
    keep = candidate_mask[test.candidate].numpy()
    tq, tc = test.query[keep], test.candidate[keep]
    if exclude_self:
        ok = (tq != tc).numpy()
        tq, tc = tq[ok], tc[ok]
    keys = np.unique(_pair_keys(tq.numpy(), tc.numpy(), n_items))
    keys = keys[~_known_among(keys, known, n_items)]
    pq = torch.from_numpy(keys // n_items)
    pc = torch.from_numpy(keys % n_items)
    queries, q_index = torch.unique(pq, return_inverse=True)
    if max_queries is not None:
        sel = _sampled(queries, seed, max_queries, share)
        if sel is not None:
            sel = sel[q_index]
            pq, pc = pq[sel], pc[sel]
            queries, q_index = torch.unique(pq, return_inverse=True)
    if len(pq) == 0:
        return None
    cand_rows = torch.nonzero(candidate_mask).flatten()
    col_of = torch.full((n_items,), -1, dtype=torch.int64)
    col_of[cand_rows] = torch.arange(len(cand_rows))
    ex_rows, ex_cols = excluded_cells(queries, _parts(known), col_of, exclude_self)
    return HeldOut(queries, q_index, pc, cand_rows, col_of[pc], ex_rows, ex_cols)


def sample_keys(queries: torch.Tensor, seed: int) -> np.ndarray:
    """A seeded pseudo-random uint64 key for each query row, the same in every process: splitmix64's
    finaliser (Steele, Lea & Flood, "Fast Splittable Pseudorandom Number Generators", OOPSLA 2014) of
    row + seed. It is a bijection, so distinct rows get distinct keys and a sample has no ties."""
    with np.errstate(over="ignore"):
        z = queries.numpy().astype(np.uint64) + np.uint64(seed + 7) * np.uint64(0x9E3779B97F4A7C15)
        z = (z ^ (z >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
        z = (z ^ (z >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
        return z ^ (z >> np.uint64(31))


def _sampled(queries: torch.Tensor, seed: int, size: int, share: Share | None) -> torch.Tensor | None:
    """bool mask of the queries in the sample of `size` with the smallest keys (over every process's
    queries when the log is divided), or None when every query is in it."""
    keys = sample_keys(queries, seed)
    every = keys
    if share is not None and share.divided:
        every = share.joined(torch.from_numpy(keys.view(np.int64))).numpy().view(np.uint64)
    if len(every) <= size:
        return None
    cut = np.partition(every, size - 1)[size - 1]
    return torch.from_numpy(keys <= cut)


def _empty_held_out(candidate_mask: torch.Tensor) -> HeldOut:
    """A ranking problem with no queries: a process of a divided log whose users left none still joins in."""
    none = torch.zeros(0, dtype=torch.int64)
    return HeldOut(none, none, none, torch.nonzero(candidate_mask).flatten(), none, none, none)


def joined_ranks(share: Share, h: HeldOut, ahead, tied, candidates, top=None):
    """(h, ahead, tied, candidates, top) of every process joined in rank order, when the log is divided and
    each process ranked its own queries (shares.py): query positions are renumbered past the earlier
    processes' queries; the exclusions, used up by the ranking, are left out."""
    sizes = share.gather(torch.tensor([len(h.queries)], dtype=torch.int64))
    offset = int(sum(int(n) for n in sizes[:share.rank]))
    j, none = share.joined, torch.zeros(0, dtype=torch.int64)
    whole = HeldOut(j(h.queries), j(h.q_index + offset), j(h.items), h.cand_rows, j(h.columns), none, none)
    top = None if top is None else j(top.reshape(-1)).view(-1, top.shape[1])
    return whole, j(ahead), j(tied), j(candidates), top


def _ranked(scorer, h: HeldOut | None, candidate_mask: torch.Tensor, share: Share | None, k_max: int = 0):
    """(h, ahead, tied, candidates, top or None) of one ranking problem, or None when it has no query.

    share: data-parallel; each process ranks its share of the queries, or its own queries when the log
    is divided, and every process gets the whole (shares.py). k_max: also each query's top-k_max columns.
    """
    divided = share is not None and share.divided
    if h is None and divided:
        h = _empty_held_out(candidate_mask)
    if h is None:
        return None
    if divided:
        counts = _ranks_and_lists(scorer, h, k_max) if k_max else (*rank_positives(scorer, h), None)
        h, *counts = joined_ranks(share, h, *counts)
        return (h, *counts) if len(h.queries) else None
    if k_max:
        return (h, *_ranks_and_lists(scorer, h, k_max))
    return (h, *rank_positives(scorer, h, share), None)


def _parts(known: Pairs | list[Pairs]) -> list[tuple[torch.Tensor, torch.Tensor]]:
    """The known pairs as (query rows, candidate rows) parts, as excluded_cells and known_chunks take them."""
    return [(p.query, p.candidate) for p in (known if isinstance(known, list) else [known])]


def _known_among(keys: np.ndarray, known: Pairs | list[Pairs], n_items: int) -> np.ndarray:
    """bool per sorted distinct pair key: whether `known` holds that pair, the known pairs read a chunk at a time."""
    found = np.zeros(len(keys), dtype=bool)
    if len(keys) == 0:
        return found
    for q, c in known_chunks(_parts(known)):
        part = _pair_keys(q, c, n_items)
        at = np.minimum(np.searchsorted(keys, part), len(keys) - 1)
        found[at[keys[at] == part]] = True
    return found


# Cells of one dense score block of a reference model, and of one comparison block of its positives
BLOCK_CELLS = 1 << 22


def _reference_blocks(scorer: ReferenceScorer, h: HeldOut):
    """Yield (first row, last row + 1, scores) dense blocks of a reference model's queries over the competing
    items, excluded cells at -inf."""
    per_block = max(1, BLOCK_CELLS // max(1, scorer.history.n_items))
    for lo in range(0, len(h.queries), per_block):
        hi = min(len(h.queries), lo + per_block)
        s = scorer.score_rows(h.queries[lo:hi]).index_select(1, h.cand_rows)
        a, b = torch.searchsorted(h.ex_rows, torch.tensor([lo, hi])).tolist()
        s[h.ex_rows[a:b] - lo, h.ex_cols[a:b]] = float("-inf")
        yield lo, hi, s


def _reference_ranks(scorer: ReferenceScorer, h: HeldOut, k_max: int = 0):
    """(ahead, tied, candidates, top) of a history-based reference model, from one pass of dense score blocks.

    top: each query's k_max best columns (padding -1; level scores in catalog order), or None when k_max is 0.
    """
    n_q, n_p, n_cols = len(h.queries), len(h.q_index), len(h.cand_rows)
    ahead = torch.zeros(n_p, dtype=torch.int64)
    tied = torch.zeros(n_p, dtype=torch.int64)
    candidates = torch.zeros(n_q, dtype=torch.int64)
    tops = []
    by_query = torch.argsort(h.q_index, stable=True)
    p_starts = torch.searchsorted(h.q_index.index_select(0, by_query), torch.arange(n_q + 1))
    step = max(1, BLOCK_CELLS // max(1, n_cols))
    for lo, hi, s in _reference_blocks(scorer, h):
        candidates[lo:hi] = (s > float("-inf")).sum(1)
        mine = by_query[p_starts[lo]:p_starts[hi]]
        for c0 in range(0, len(mine), step):
            part = mine[c0:c0 + step]
            ahead[part], tied[part] = M.ranks_of_positives(s, h.q_index[part] - lo, h.columns[part])
        if k_max:
            val, idx = torch.topk(s, k_max, dim=1)
            tops.append(torch.where(val > float("-inf"), idx, -1))
    top = (torch.cat(tops) if tops else torch.zeros(0, k_max, dtype=torch.int64)) if k_max else None
    return ahead, tied, candidates, top


def rank_positives(scorer, h: HeldOut, share: Share | None = None) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor]:
    """(ahead, tied, candidates): for each positive the competing items scored above it and level with it
    (itself not counted), and each query's competing items.

    Vector models are counted tile by tile (rank_counts.py), from float32 scores
    ((scale q.x + item bias) + query bias) + global bias, without building the query x item score matrix;
    history-based references from dense blocks of their scores. share: count only this process's
    queries and gather the other processes' counts (shares.py); the result is the same.
    """
    if share is not None:
        ahead, tied, candidates = rank_positives(scorer, h.part(share))
        return tuple(share.whole([(h.q_index, ahead), (h.q_index, tied), (torch.arange(len(h.queries)), candidates)]))
    if isinstance(scorer, ReferenceScorer):
        return _reference_ranks(scorer, h)[:3]
    over = scorer.over_items(h.cand_rows)
    ranked = over.for_queries(h.queries)
    return RC.rank_counts(ranked.query_vectors, over.item_vectors, h.q_index, h.columns,
                          item_bias=over.item_bias, query_bias=ranked.query_bias, global_bias=over.global_bias,
                          scale=over.scale,
                          exclude_rows=h.ex_rows, exclude_cols=h.ex_cols)


def ranking_metrics(scorer, test: Pairs, known: Pairs, candidate_mask: torch.Tensor, ks,
                    tie_seed: int = 0, max_queries: int | None = None, exclude_self: bool = False,
                    share: Share | None = None, cache: dict | None = None) -> dict[str, float]:
    """Full-catalog ranking metrics of held-out positives, averaged over queries.

    candidate_mask: bool (n_items,) items that compete in the ranking. known: the pairs whose items
    are excluded from each query's ranking (its training positives). Test pairs that are also known,
    or whose item is not a candidate, are dropped. Items scored level with a positive count as in a
    random order: each metric is its exact expected value over those orders (metrics.per_query_ranking).
    tie_seed seeds only the sample of max_queries queries. share: this process ranks only its share of
    the (sampled) queries and the counts are gathered (shares.py): the same metrics, on every process;
    with a divided log (share.divided) each process samples and ranks its own queries.
    cache: a dict that keeps the ranking problem between calls with the same arguments (validation
    asks the same each epoch, and finding the known pairs reads every training pair).
    """
    key = (id(test), id(candidate_mask), tie_seed, max_queries, exclude_self)
    if cache is not None and key in cache:
        h = cache[key]
    else:
        h = held_out(test, known, candidate_mask, tie_seed, max_queries, exclude_self, share)
        if cache is not None:
            cache[key] = h
    ranked = _ranked(scorer, h, candidate_mask, share)
    if ranked is None:
        return {}
    h, ahead, tied, n_candidates, _ = ranked
    per_q = M.per_query_ranking(ahead, h.q_index, len(h.queries), n_candidates, ks, tied=tied)
    out = M.mean_over_queries(per_q)
    out["queries"] = int(len(h.queries))
    return out


def oracle_scorer(truth: TrueVectors) -> Scorer:
    """The planted truth as a model: its true vectors and biases."""
    return Scorer(truth.query_vectors, truth.item_vectors, truth.query_bias, truth.item_bias)


def reference_scorers(data: SplitPairs, n_queries: int, n_items: int, cfg: Config, log=None,
                      share: Share | None = None) -> tuple[dict, dict]:
    """EASE and item-kNN fitted on the training positives, each with the setting the validation pairs prefer.

    Returns ({name: ReferenceScorer}, {name: what was chosen and tried, or why it was skipped}).
    Implicit runs only (a rating run has no ranking to compare them on). share: data-parallel evaluation
    (shares.py); with a divided log the co-occurrence counts are summed over processes, and each
    process's history rows are its own users'.
    """
    ev = cfg.evaluation
    if cfg.training.rating_loss or not ev.references:
        return {}, {}
    if not len(data.test) and share is None:  # scored on the warm test pairs alone (the warm note says there are none)
        return {}, {}
    known = data.train.positives()  # the history, and what validation leaves out of each ranking
    history = R.History.from_pairs(known.query, known.candidate, n_queries, n_items, include_self=data.item_item)
    if share is not None and share.divided:
        history.everywhere = _summed_sparse
    metric = cfg.stop_metric

    def judge(scorer) -> float:
        got = ranking_metrics(scorer, data.valid, known, data.warm_items, ev.top_k, tie_seed=cfg.run.seed,
                              max_queries=cfg.training.validate_queries, exclude_self=data.item_item,
                              share=share).get(metric)
        return got if got is not None and math.isfinite(got) else -math.inf

    scorers, info = {}, {}
    # without validation pairs there is nothing to choose by: each reference takes its middle setting
    validated = bool(len(data.valid)) or share is not None
    chosen = (lambda what: f"choosing its {what} by validation {metric}") if validated else \
        (lambda what: f"its {what}: the default setting (no validation pairs)")  # noqa: E731
    if n_items > ev.ease_max_items:
        info[R.EASE] = {"skipped": f"{n_items:,} items exceed evaluation.ease_max_items ({ev.ease_max_items:,}); EASE "
                                   f"would need about {R.ease_bytes(n_items) / 2**30:.1f} GiB"}
    else:
        if log is not None:
            log(f"ease: {n_items:,} items, about {R.ease_bytes(n_items) / 2**30:.2f} GiB while fitting; "
                f"{chosen('penalty')}")
        scorers[R.EASE], tries = R.choose_ease(history, judge)
        info[R.EASE] = {**scorers[R.EASE].setting, "by": f"validation {metric}", "tries": tries}
    if log is not None:
        log(f"item_knn: {chosen('neighbour count')}")
    scorers[R.ITEM_KNN], tries = R.choose_knn(history, judge)
    info[R.ITEM_KNN] = {**scorers[R.ITEM_KNN].setting, "by": f"validation {metric}", "tries": tries}
    for name in scorers:
        if not validated:
            info[name]["by"] = "no validation pairs: the default setting"
        for t in info[name]["tries"]:  # JSON has no infinity: an unjudged try is null
            t["score"] = t["score"] if math.isfinite(t["score"]) else None
    return scorers, info


def _summed_sparse(c: torch.Tensor) -> torch.Tensor:
    """A sparse COO matrix summed over processes (their entries joined, then coalesced)."""
    (rows, cols), values = c.indices(), c.values()
    return torch.sparse_coo_tensor(torch.stack([joined(rows), joined(cols)]), joined(values), c.shape,
                                   check_invariants=False).coalesce()


def _empty_reason(slice_name: str, n_pairs: int, cfg: Config) -> str:
    """Why a slice of n_pairs held-out pairs (of every process) has nothing to score, in words a user can act on."""
    ev = cfg.evaluation
    if not n_pairs:
        if slice_name == "warm" and ev.test_fraction == 0:
            return "no test pairs: evaluation.test_fraction is 0; raise it to measure the models"
        return "no test pairs: the split held none out; raise evaluation.test_fraction or add data"
    return ("no test pairs left to rank: every held-out pair is also a training or validation pair, or its item "
            "has no training history")


def _ranks_and_lists(scorer, h: HeldOut, k_max: int):
    """(ahead, tied, candidates, top): rank_positives plus each query's top-k_max columns (level scores in
    catalog order), a reference model's from the same pass over its score blocks."""
    if isinstance(scorer, ReferenceScorer):
        return _reference_ranks(scorer, h, k_max)
    top, _ = scorer.over_items(h.cand_rows).for_queries(h.queries).top(k_max, h.ex_rows, h.ex_cols)
    return (*rank_positives(scorer, h), top)


def _list_metrics(top: torch.Tensor, n_columns: int, ks, counts: torch.Tensor) -> dict[str, float]:
    """Catalog coverage@K and the mean popularity percentile@K of each query's top-K list."""
    out = {}
    for k in ks:
        out[f"coverage@{k}"] = M.catalog_coverage(top[:, :k], n_columns)
        out[f"popularity_pct@{k}"] = M.popularity_percentile(top[:, :k], counts)
    return out


def _summed_metrics(per_q: dict, top: torch.Tensor, n_columns: int, ks, counts: torch.Tensor, n_queries: int) -> dict:
    """mean_over_queries and _list_metrics of every process's queries from this process's own (a divided log's
    final evaluation): each metric's sum and count, each list's shown columns and percentile sums, summed over
    processes, so no process holds another's rankings. Equal to the one-process figures up to summation order."""
    pct = M.percentiles(counts)
    parts, shown = [], []
    for values in per_q.values():
        v = values.to(torch.float64)
        ok = ~torch.isnan(v)
        parts += [float(v[ok].sum()), float(ok.sum())]
    for k in ks:
        flat = M.recommended(top[:, :k], n_columns)
        parts += [float(pct[flat].sum()), float(flat.numel())]
        mask = torch.zeros(n_columns, dtype=torch.bool)
        mask[flat] = True
        shown.append(mask)
    total = summed(torch.tensor(parts + [float(n_queries)], dtype=torch.float64)).tolist()
    shown = summed(torch.stack(shown)) if shown else shown
    mean = lambda s, n: s / n if n else math.nan  # noqa: E731
    out = {name: mean(total[2 * i], total[2 * i + 1]) for i, name in enumerate(per_q)}
    at = 2 * len(per_q)
    for j, k in enumerate(ks):
        out[f"coverage@{k}"] = float(shown[j].sum()) / n_columns if n_columns else math.nan
        out[f"popularity_pct@{k}"] = mean(total[at + 2 * j], total[at + 2 * j + 1])
    out["queries"] = int(total[-1])
    return out


def _group_metrics(groups: list[Groups], h: HeldOut, per_q: dict, ahead, tied, n_candidates, ks) -> dict:
    """{column: {group name: {recall@K, ndcg@K, queries}}} of one model on one slice.

    A user column groups the queries; an item column keeps, for each group, only the positives of
    its items (every query still ranks the whole catalog), so it asks how well each category's
    items are found.
    """
    wanted = [f"{m}@{k}" for k in ks for m in ("recall", "ndcg")]
    out = {}
    for g in groups:
        rows = {}
        if g.side == "user":
            means = M.mean_by_group({m: per_q[m] for m in wanted}, g.codes.index_select(0, h.queries), len(g.names))
            for c, name in enumerate(g.names):
                if int(means["queries"][c]):
                    rows[name] = {m: float(means[m][c]) for m in wanted} | {"queries": int(means["queries"][c])}
        else:
            labels = g.codes.index_select(0, h.items)
            for c in torch.unique(labels).tolist():
                sel = labels == c
                part = M.per_query_ranking(ahead[sel], h.q_index[sel], len(h.queries), n_candidates, ks, tied=tied[sel])
                n = int(torch.unique(h.q_index[sel]).numel())
                rows[g.names[c]] = {m: float(torch.nanmean(part[m])) for m in wanted} | {"queries": n}
        out[g.column] = rows
    return out


def evaluate_slices(scorers: dict, data: SplitPairs, cfg: Config, event_vectors: dict | None = None,
                    reference_info: dict | None = None, groups: list[Groups] | None = None,
                    share: Share | None = None) -> dict:
    """{slice: {model: {metric: value}}} for the warm test pairs and, if any, the cold ones, plus "notes".

    Implicit runs also get each model's catalog coverage@K and popularity percentile@K. The
    history-based references (EASE, item-kNN) are scored on the warm slice only: items or users with
    no history give them nothing to score. A slice with nothing to score is empty, and "notes" says why.
    With context columns each held-out event is its own query (context.py); event_vectors maps a
    model name to a function giving its query vectors for a slice's events (context-aware towers).
    groups: columns whose groups get warm-slice metrics of their own, under "groups". share: data-parallel
    with a divided log (shares.py): every process ranks its own users' queries, every process gets the
    whole result.
    """
    explicit = cfg.training.rating_loss
    ks, seed = cfg.evaluation.top_k, cfg.run.seed
    empty = Pairs(torch.zeros(0, dtype=torch.int64), torch.zeros(0, dtype=torch.int64))
    # with context columns the known pairs become events (event_pairs): joined, else read part by part
    known = data.known() if data.test.context is not None else data.known_parts()
    slices = {"warm": (data.test, known, data.warm_items)}
    everywhere = across(share is not None and share.divided)  # a process's own part summed with the others'
    pairs_in = lambda p: everywhere(len(p))  # noqa: E731
    if pairs_in(data.cold_test):
        slices["cold"] = (data.cold_test, empty, data.cold_items)
    if pairs_in(data.cold_user_test):  # users held out whole: ranked over the warm items, nothing known of them
        slices["cold_users"] = (data.cold_user_test, empty, data.warm_items)
    n_items = len(data.warm_items)
    counts = torch.bincount(data.train.positives().candidate, minlength=n_items).double()
    if data.item_item:
        counts += torch.bincount(data.train.positives().query, minlength=n_items).double()
    counts = everywhere(counts)
    test_queries = cfg.evaluation.test_queries or None
    out: dict = {name: {} for name in slices}
    notes: dict = {}
    by_group: dict = {}
    for slice_name, (pairs, known, candidates) in slices.items():
        users = None
        raw = pairs
        if pairs.context is not None:
            pairs, known, users = event_pairs(pairs, known)
        h = None if explicit else held_out(pairs, known, candidates, seed, test_queries,
                                           exclude_self=data.item_item, share=share)
        # a divided log without group columns: each process's figures summed, no process holds all rankings
        summing = share is not None and share.divided and not groups and not explicit
        if summing and h is None:
            h = _empty_held_out(candidates)
        for name in MODEL_ORDER:
            if name not in scorers or (isinstance(scorers[name], ReferenceScorer) and slice_name != "warm"):
                continue
            s = scorers[name]
            if users is not None:
                fn = (event_vectors or {}).get(name)
                s = s.for_queries(users, fn(raw) if fn else None)
            k_max = min(max(ks), int(candidates.sum()))
            if summing:
                ahead, tied, n_candidates, top = _ranks_and_lists(s, h, k_max)
                per_q = M.per_query_ranking(ahead, h.q_index, len(h.queries), n_candidates, ks, tied=tied)
                got = _summed_metrics(per_q, top, len(h.cand_rows), ks, counts.index_select(0, h.cand_rows),
                                      len(h.queries))
                out[slice_name][name] = got if got["queries"] else {}
                continue
            ranked = None if explicit else _ranked(s, h, candidates, share, k_max)
            if explicit:
                out[slice_name][name] = rating_metrics(s, pairs, share)
            elif ranked is not None:
                hr, ahead, tied, n_candidates, top = ranked
                per_q = M.per_query_ranking(ahead, hr.q_index, len(hr.queries), n_candidates, ks, tied=tied)
                out[slice_name][name] = M.mean_over_queries(per_q) | _list_metrics(
                    top, len(hr.cand_rows), ks, counts.index_select(0, hr.cand_rows))
                out[slice_name][name]["queries"] = int(len(hr.queries))
                if groups and slice_name == "warm" and users is None:
                    for column, rows in _group_metrics(groups, hr, per_q, ahead, tied, n_candidates, ks).items():
                        by_group.setdefault(column, {})[name] = rows
            else:
                out[slice_name][name] = {}
        if not any(out[slice_name].values()):
            notes[slice_name] = _empty_reason(slice_name, pairs_in(raw), cfg)
        elif not explicit and int(candidates.sum()) <= 2 * max(ks):
            n, k = int(candidates.sum()), max(ks)
            notes[f"{slice_name}_size"] = (
                f"the {slice_name} slice ranks only {n} items: a random order already finds about "
                f"{min(1.0, k / n):.2f} of the held-out items in the top {k}, so recall@{k} says little there; "
                + ("hold out more items whole (evaluation.cold_item_fraction)" if slice_name == "cold" else
                   "use a smaller evaluation.top_k, or a larger catalog"))
    new_users = _untrained_test_queries(data, everywhere, cfg)
    if new_users is not None:
        notes["warm_new_queries"] = new_users
    behind = None if explicit else _towers_behind(out.get("warm", {}), min(ks))
    if behind is not None:
        notes["towers_behind"] = behind
    if groups and explicit:
        notes["group_metrics_by"] = ("evaluation.group_metrics_by: the per-group metrics are ranking metrics "
                                     "(recall@K, ndcg@K, ...); a squared-loss run ranks nothing, so it has none")
    for name, info in (reference_info or {}).items():
        if "skipped" in info:
            notes[name] = f"{name} skipped: {info['skipped']}"
    if by_group:
        out["groups"] = by_group
    if notes:
        out["notes"] = notes
    if reference_info:
        out["references"] = reference_info
    return out


BEHIND = 0.95  # the towers' warm recall below this share of the best other model's gets a note (common practice)


def _towers_behind(warm: dict, k: int) -> str | None:
    """A note when the towers' warm recall@k is below BEHIND x the best other model's (popularity, the linear
    factor model, EASE, item-kNN; not the oracle): what closed such gaps elsewhere. None otherwise."""
    metric = f"recall@{k}"
    towers = warm.get("towers", {}).get(metric)
    others = {name: row[metric] for name, row in warm.items() if name not in ("towers", "oracle") and metric in row}
    if towers is None or not others:
        return None
    best = max(others, key=others.get)
    if not others[best] or towers >= BEHIND * others[best]:
        return None
    return (f"towers: warm {metric} {towers:.4f} is {towers / others[best]:.2f} of {best}'s {others[best]:.4f}; on "
            "other data a user history (model.history_length), a longer patience, `towers tune`, or normalised "
            "vectors where they were off (model.normalize: true) closed such gaps (README, Limits)")


def _untrained_test_queries(data: SplitPairs, everywhere, cfg: Config) -> str | None:
    """A note when a fifth or more of the warm test users have no training events (a split by time holds out the
    users who arrived late; a random split of groups, the users whose events share one group): the history-based
    and id-based models know nothing of them, so the warm slice is partly a cold-user slice. None otherwise, and
    in item_item runs (there the queries are items)."""
    if data.item_item:
        return None
    tq = torch.unique(data.test.query)
    size = max(int(tq.max()) if len(tq) else -1, int(data.train.query.max()) if len(data.train.query) else -1) + 1
    trained = torch.zeros(size, dtype=torch.bool)
    trained[data.train.query] = True
    new, total = everywhere(int((~trained[tq]).sum())), everywhere(len(tq))
    if not total or new < 0.2 * total:
        return None
    group = cfg.interactions.group_column
    if cfg.evaluation.split == "time":
        cause = "a split by time holds out the users who came late"
    elif group is not None:
        cause = (f"the split holds out whole {group} groups, so a user whose events share one group has all of them "
                 "in the test slice")
    else:
        cause = "the split can hold out every event of a user with few events"
    return (f"{new:,} of the warm slice's {total:,} test users ({new / total:.0%}) have no training events ({cause}): "
            "EASE, item-kNN and the linear factor model know nothing of them and rank them by chance or popularity, "
            "so this slice is partly a cold-user one; a per-user split (evaluation.split: user_recent or user_share) "
            "keeps every test user's past in training")


def format_table(metrics: dict) -> str:
    """The metrics as a plain text table, one block per slice, then the notes."""
    lines = []
    notes = metrics.get("notes", {})
    for slice_name in [s for s in SLICES if s in metrics]:
        models = metrics[slice_name]
        names = [m for m in models if models[m]]
        if not names:
            lines += [f"[{slice_name}]  {notes.get(slice_name, 'nothing to score')}", ""]
            continue
        cols = [c for c in next(iter(models[n] for n in names)) if c != "queries"]
        width = max(len(n) for n in names) + 2
        first = models[names[0]]
        lines.append(f"[{slice_name}]" + (f"  ({first['queries']} queries)" if "queries" in first else ""))
        lines.append("model".ljust(width) + "".join(c.rjust(max(11, len(c) + 2)) for c in cols))
        for n in names:
            lines.append(n.ljust(width) + "".join(f"{models[n].get(c, float('nan')):{max(11, len(c) + 2)}.4f}"
                                                  for c in cols))
        lines.append("")
    for column, models in metrics.get("groups", {}).items():
        lines += _group_table(column, models)
    for name, text in notes.items():
        if name not in SLICES:
            lines.append(f"note: {text}")
    chosen = [f"{n} {', '.join(f'{k} {v:g}' for k, v in info.items() if k not in ('by', 'tries'))} (by {info['by']})"
              for n, info in metrics.get("references", {}).items() if "skipped" not in info]
    if chosen:
        lines.append("references: " + "; ".join(chosen))
    return "\n".join(lines).rstrip() + "\n"


def _group_table(column: str, models: dict) -> list[str]:
    """Warm-slice metrics per group of one column: a row per group, the first metric of each model in columns."""
    names = list(models)
    groups = list(dict.fromkeys(g for rows in models.values() for g in rows))
    if not groups:
        return []
    metric = next(iter(next(iter(models[names[0]].values()))), "recall@20") if models[names[0]] else "recall@20"
    width = max(len(column) + 2, max(len(g) for g in groups) + 2)
    lines = [f"[warm by {column}]  {metric}", column.ljust(width) + "queries".rjust(9)
             + "".join(n.rjust(max(11, len(n) + 2)) for n in names)]
    for g in groups:
        q = next((models[n][g]["queries"] for n in names if g in models[n]), 0)
        lines.append(g.ljust(width) + f"{q:9d}" + "".join(
            f"{models[n][g][metric]:{max(11, len(n) + 2)}.4f}" if g in models[n] else "-".rjust(max(11, len(n) + 2))
            for n in names))
    return lines + [""]


def validation_metrics(scorer: Scorer, data: Prepared, cfg: Config, pairs: Pairs,
                       model: TwoTowerModel | None = None, share: Share | None = None) -> dict[str, float]:
    """Metrics of `pairs` (validation or test) in the warm setting.

    With context columns every pair is its own query event (see context.py); `model` then gives the
    events' query vectors when its query tower reads the context. share: in data-parallel training,
    this process ranks only its share of the queries and every process gets the whole result
    (shares.py); rating errors cost one product a pair, no more than gathering them, so every process
    computes them whole.
    """
    known = data.train.positives()
    if pairs.context is not None:
        vectors = None
        if model is not None and reads_context(model.query_tower, data):
            vectors = vectors_with_context(model.query_tower, data.queries.block, pairs.query, pairs.context)
        pairs, known, users = event_pairs(pairs, known)
        scorer = scorer.for_queries(users, vectors)
    if cfg.training.rating_loss:
        return rating_metrics(scorer, pairs, share)
    return ranking_metrics(scorer, pairs, known, data.warm_items, cfg.evaluation.top_k,
                           tie_seed=cfg.run.seed, max_queries=cfg.training.validate_queries,
                           exclude_self=data.item_item, share=share, cache=data.rankings)
