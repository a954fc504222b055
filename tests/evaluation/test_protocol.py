"""The evaluation protocol (towers/evaluation/protocol.py): ranking_metrics, which counts ranks tile by tile,
against numpy brute force, a dense per-query reference and scikit-learn's ndcg_score."""

from __future__ import annotations

import numpy as np
import pytest
import torch
from sklearn.metrics import ndcg_score

from towers.data.pairs import Pairs
from towers.evaluation import metrics as M
from towers.evaluation.protocol import popularity_scorer, ranking_metrics
from towers.search.scorer import Scorer


def test_ranking_metrics_match_brute_force_recall():
    g = torch.Generator().manual_seed(2)
    nq, ni, k = 30, 80, 4
    scorer = Scorer(torch.randn(nq, k, generator=g), torch.randn(ni, k, generator=g))
    train = Pairs(torch.randint(0, nq, (300,), generator=g), torch.randint(0, ni, (300,), generator=g))
    test = Pairs(torch.randint(0, nq, (150,), generator=g), torch.randint(0, ni, (150,), generator=g))
    mask = torch.ones(ni, dtype=torch.bool)
    mask[:10] = False
    got = ranking_metrics(scorer, test, train, mask, [5, 10])
    # brute force in numpy: per query, drop known items and non-candidates, rank, count hits
    s = (scorer.query_vectors @ scorer.item_vectors.T).numpy()
    known = set(zip(train.query.tolist(), train.candidate.tolist()))
    recalls = {5: [], 10: []}
    for u in range(nq):
        pos = {c for (qq, c) in zip(test.query.tolist(), test.candidate.tolist()) if qq == u and c >= 10 and (u, c) not in known}
        if not pos:
            continue
        cand = [c for c in range(10, ni) if (u, c) not in known]
        order = sorted(cand, key=lambda c: -s[u, c])
        for kk in recalls:
            recalls[kk].append(len(pos & set(order[:kk])) / len(pos))
    assert got["recall@5"] == pytest.approx(np.mean(recalls[5]))
    assert got["recall@10"] == pytest.approx(np.mean(recalls[10]))
    assert got["queries"] == len(recalls[5])


def dense_block(scorer: Scorer, q_rows: torch.Tensor, item_rows: torch.Tensor) -> torch.Tensor:
    """A dense score block: scale * q.x, then item, query and global bias."""
    s = scorer.query_vectors.index_select(0, q_rows) @ scorer.item_vectors.index_select(0, item_rows).T
    if scorer.scale != 1.0:
        s = s * scorer.scale
    if scorer.item_bias is not None:
        s = s + scorer.item_bias.index_select(0, item_rows)
    if scorer.query_bias is not None:
        s = s + scorer.query_bias.index_select(0, q_rows).unsqueeze(1)
    return s + scorer.global_bias if scorer.global_bias else s


def dense_ranking_metrics(scorer: Scorer, test: Pairs, known: Pairs, mask: torch.Tensor, ks,
                          exclude_self: bool) -> dict:
    """Reference: ranking metrics the dense way, written per query: the full dense_block matrix, exclusions
    at -inf, metrics.ranks_of_positives, per_query_ranking."""
    n_items = len(mask)
    cols = torch.nonzero(mask).flatten()
    col_of = {int(c): j for j, c in enumerate(cols)}
    known_set = set(zip(known.query.tolist(), known.candidate.tolist()))
    pos = test.positives()
    by_query: dict[int, set] = {}
    for u, c in zip(pos.query.tolist(), pos.candidate.tolist()):
        if mask[c] and (u, c) not in known_set and not (exclude_self and u == c):
            by_query.setdefault(u, set()).add(c)
    queries = sorted(by_query)
    scores = dense_block(scorer, torch.tensor(queries), cols).float()
    rows, items = [], []
    for r, u in enumerate(queries):
        for c in range(n_items):
            if mask[c] and ((u, c) in known_set or (exclude_self and u == c)):
                scores[r, col_of[c]] = float("-inf")
        for c in sorted(by_query[u]):
            rows.append(r)
            items.append(col_of[c])
    rows, items = torch.tensor(rows), torch.tensor(items)
    ahead, tied = M.ranks_of_positives(scores, rows, items)
    out = M.mean_over_queries(M.per_query_ranking(ahead, rows, len(queries), M.candidates_per_row(scores), ks, tied))
    out["queries"] = len(queries)
    return out


@pytest.mark.parametrize("exclude_self", [False, True])
def test_ranking_metrics_equal_the_dense_path(count_tiles, exclude_self):
    g = torch.Generator().manual_seed(13)
    n = 120  # item-item: queries and items are one catalog
    scorer = Scorer(torch.randint(-2, 3, (n, 4), generator=g).float(), torch.randint(-2, 3, (n, 4), generator=g).float(),
                    torch.randn(n, generator=g), torch.randn(n, generator=g), 0.25, 1 / 0.07)
    test = Pairs(torch.randint(0, n, (600,), generator=g), torch.randint(0, n, (600,), generator=g))
    known = Pairs(torch.randint(0, n, (900,), generator=g), torch.randint(0, n, (900,), generator=g))
    mask = torch.rand(n, generator=g) < 0.8
    got = ranking_metrics(scorer, test, known, mask, [1, 5, 20], tie_seed=4, exclude_self=exclude_self)
    assert got == dense_ranking_metrics(scorer, test, known, mask, [1, 5, 20], exclude_self)  # reference: dense path
    assert ranking_metrics(scorer, test, known, mask, [5], tie_seed=4, max_queries=9)["queries"] == 9


def test_ranking_metrics_against_sklearn():
    g = torch.Generator().manual_seed(14)
    nq, ni = 40, 200
    # integer products plus distinct continuous biases: no ties, so the expectation over tie orders plays no part
    scorer = Scorer(torch.randint(-3, 4, (nq, 5), generator=g).float(), torch.randint(-3, 4, (ni, 5), generator=g).float(),
                    item_bias=torch.rand(ni, generator=g))
    test = Pairs(torch.randint(0, nq, (160,), generator=g), torch.randint(0, ni, (160,), generator=g))
    known = Pairs(torch.randint(0, nq, (400,), generator=g), torch.randint(0, ni, (400,), generator=g))
    mask = torch.ones(ni, dtype=torch.bool)
    got = ranking_metrics(scorer, test, known, mask, [5, 10])
    s = ((scorer.query_vectors.double() @ scorer.item_vectors.double().T).float() + scorer.item_bias).numpy()
    known_set = set(zip(known.query.tolist(), known.candidate.tolist()))
    ndcg = {5: [], 10: []}
    recall = {5: [], 10: []}
    for u in range(nq):
        pos = {c for q, c in zip(test.query.tolist(), test.candidate.tolist()) if q == u and (u, c) not in known_set}
        if not pos:
            continue
        cand = np.array([c for c in range(ni) if (u, c) not in known_set])
        assert len(np.unique(s[u, cand])) == len(cand)  # no ties in this case
        relevant = np.isin(cand, list(pos)).astype(float)
        top = cand[np.argsort(-s[u, cand])]
        for k in (5, 10):
            ndcg[k].append(ndcg_score([relevant], [s[u, cand]], k=k))
            recall[k].append(len(pos & set(top[:k].tolist())) / len(pos))
    for k in (5, 10):
        assert got[f"ndcg@{k}"] == pytest.approx(np.mean(ndcg[k]), abs=1e-12)  # reference: sklearn.metrics.ndcg_score
        assert got[f"recall@{k}"] == pytest.approx(np.mean(recall[k]), abs=1e-12)  # reference: numpy argsort top-k
    assert got["queries"] == len(ndcg[5])


def test_a_model_tying_every_candidate_scores_chance_exactly():
    # Regression: ranks used one seeded tie order shared by every query, so a model tying every candidate
    # (popularity where no item has a training pair) scored one random draw of that order, not chance.
    g = torch.Generator().manual_seed(15)
    nq, ni = 40, 90
    none = Pairs(torch.zeros(0, dtype=torch.int64), torch.zeros(0, dtype=torch.int64))
    scorer = popularity_scorer(none, nq, ni, explicit=False)  # every count 0: one score for all
    test = Pairs(torch.randint(0, nq, (200,), generator=g), torch.randint(0, ni, (200,), generator=g))
    got = ranking_metrics(scorer, test, none, torch.ones(ni, dtype=torch.bool), [10])
    # hand-worked: each positive has 0 candidates ahead and 89 tied, so it is in the top 10 with
    # probability 10/90 in every query; every (positive, negative) pair is tied: auc 1/2
    assert got["recall@10"] == pytest.approx(10 / 90, rel=1e-12)
    assert got["auc"] == pytest.approx(0.5, abs=1e-12)


@pytest.mark.parametrize("exclude_self", [False, True])
def test_held_out_excludes_each_known_cell_once(monkeypatch, exclude_self):
    # outside reference: the cells written out with Python sets, from the definition (a query's known items
    # that compete, and with exclude_self the query item itself), distinct and sorted by (row, column)
    from towers.evaluation import protocol
    from towers.search import scorer

    monkeypatch.setattr(scorer, "CELLS_CHUNK", 53)  # the known pairs read in small chunks, across parts
    rng = np.random.default_rng(4)
    n_items = 40
    n_queries = n_items if exclude_self else 60  # item-item data: the queries are items
    train = Pairs(torch.from_numpy(rng.integers(0, n_queries, 700)), torch.from_numpy(rng.integers(0, n_items, 700)))
    valid = Pairs(train.query[:90].clone(), train.candidate[:90].clone())  # pairs known twice: one cell each
    test = Pairs(torch.from_numpy(rng.integers(0, n_queries - 5, 200)), torch.from_numpy(rng.integers(0, n_items, 200)))
    mask = torch.from_numpy(rng.random(n_items) < 0.7)  # some items do not compete
    h = protocol.held_out(test, [train, valid], mask, exclude_self=exclude_self)

    column = {int(item): j for j, item in enumerate(torch.nonzero(mask).flatten())}
    row = {int(q): i for i, q in enumerate(h.queries)}
    want = {(row[q], column[c]) for q, c in zip(train.query.tolist(), train.candidate.tolist())
            if q in row and c in column}
    if exclude_self:
        want |= {(i, column[q]) for q, i in row.items() if q in column}
    assert list(zip(h.ex_rows.tolist(), h.ex_cols.tolist())) == sorted(want)
    assert h.ex_rows.dtype == torch.int32  # 4 bytes a number: these are nearly every known pair
