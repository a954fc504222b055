"""Property-based checks (hypothesis) of the ranking metrics: every per-query value lies in [0, 1], the
mean does not depend on the order of the queries, and all of it agrees with a brute-force computation:
the plain metrics of every sorted ranking the ties allow, averaged."""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
import torch
from hypothesis import given, settings
from hypothesis import strategies as st

from towers.evaluation import metrics as M

FAST = settings(max_examples=40, deadline=None)

KS = (1, 2, 3, 7)


@st.composite
def ranking_cases(draw):
    """Small score matrices with ties (integer scores), excluded candidates and 0+ positives per query."""
    nq = draw(st.integers(1, 5))
    n = draw(st.integers(2, 9))
    scores = np.asarray(draw(st.lists(st.lists(st.integers(0, 3), min_size=n, max_size=n), min_size=nq, max_size=nq)),
                        dtype=np.float64)
    rows, items = [], []
    for q in range(nq):
        flags = draw(st.lists(st.sampled_from(["pos", "neg", "excluded"]), min_size=n, max_size=n))
        for c, flag in enumerate(flags):
            if flag == "pos":
                rows.append(q)
                items.append(c)
            elif flag == "excluded":
                scores[q, c] = -math.inf
    shuffle = draw(st.permutations(range(len(rows)))) if rows else []
    rows = np.asarray(rows, dtype=np.int64)[list(shuffle)] if rows else np.zeros(0, np.int64)
    items = np.asarray(items, dtype=np.int64)[list(shuffle)] if len(items) else np.zeros(0, np.int64)
    return scores, rows, items


def towers_metrics(scores, rows, items):
    s = torch.from_numpy(scores)
    ahead, tied = M.ranks_of_positives(s, torch.from_numpy(rows), torch.from_numpy(items))
    per_query = M.per_query_ranking(ahead, torch.from_numpy(rows), s.shape[0], M.candidates_per_row(s), KS, tied)
    return {k: v.numpy() for k, v in per_query.items()}


def plain_metrics(labels: list[bool], n_pos: int) -> dict[str, float]:
    """The metrics of one sorted ranking, labels[r] telling whether rank r holds a positive.

    Definitions: recall@k and binary-relevance nDCG@k with ideal DCG over min(k, m) positives
    (Jarvelin & Kekalainen, 2002, cumulated gain); MRR of the first positive; AUC as the share of
    (positive, negative) pairs ordered correctly (the Mann-Whitney form of the ROC area).
    """
    out = {}
    for k in KS:
        out[f"recall@{k}"] = sum(labels[:k]) / n_pos
        dcg = sum(1.0 / math.log2(p + 2) for p, hit in enumerate(labels[:k]) if hit)
        out[f"ndcg@{k}"] = dcg / sum(1.0 / math.log2(p + 2) for p in range(min(k, n_pos)))
    out["mrr"] = 1.0 / (1 + labels.index(True))
    n_neg = len(labels) - n_pos
    right = sum(1 for i, a in enumerate(labels) if a for b in labels[i + 1:] if not b)
    out["auc"] = right / (n_pos * n_neg) if n_neg else math.nan
    return out


def brute_force(scores, rows, items) -> dict[str, np.ndarray]:
    """Expected metrics over random orders of ties: every arrangement of positives within each group of equal
    scores (all equally likely), each ranking's metrics computed from the sorted labels, averaged."""
    nq, n = scores.shape
    out = {f"{m}@{k}": np.full(nq, np.nan) for m in ("recall", "ndcg") for k in KS}
    out["mrr"], out["auc"] = np.full(nq, np.nan), np.full(nq, np.nan)
    for q in range(nq):
        pos = set(items[rows == q].tolist())
        if not pos:
            continue
        values = sorted({scores[q, c] for c in range(n) if np.isfinite(scores[q, c])}, reverse=True)
        groups = [[c in pos for c in range(n) if scores[q, c] == v] for v in values]  # best group first
        # within a group only where its positives sit matters: each choice of places equally likely
        choices = [list(itertools.combinations(range(len(g)), sum(g))) for g in groups]
        totals: dict[str, float] = {}
        arrangements = 0
        for pick in itertools.product(*choices):
            labels = [i in places for g, places in zip(groups, pick) for i in range(len(g))]
            for name, value in plain_metrics(labels, len(pos)).items():
                totals[name] = totals.get(name, 0.0) + value
            arrangements += 1
        for name, total in totals.items():
            out[name][q] = total / arrangements
    return out


@FAST
@given(case=ranking_cases())
def test_metrics_agree_with_brute_force_and_lie_in_0_1(case):
    got = towers_metrics(*case)
    want = brute_force(*case)
    assert set(got) == set(want)
    for name in want:
        np.testing.assert_array_equal(np.isnan(got[name]), np.isnan(want[name]), err_msg=name)
        ok = ~np.isnan(want[name])
        np.testing.assert_allclose(got[name][ok], want[name][ok], rtol=1e-12, atol=1e-12, err_msg=name)
        assert ((got[name][ok] >= 0) & (got[name][ok] <= 1)).all(), name


@FAST
@given(case=ranking_cases(), data=st.data())
def test_mean_metrics_do_not_depend_on_the_order_of_queries(case, data):
    scores, rows, items = case
    perm = np.asarray(data.draw(st.permutations(range(scores.shape[0]))), dtype=np.int64)
    new_row_of = np.argsort(perm)  # query q moves to position new_row_of[q]
    before = M.mean_over_queries({k: torch.from_numpy(v) for k, v in towers_metrics(scores, rows, items).items()})
    after = M.mean_over_queries({k: torch.from_numpy(v) for k, v in
                                 towers_metrics(scores[perm], new_row_of[rows], items).items()})
    for name, value in before.items():
        if math.isnan(value):
            assert math.isnan(after[name]), name
        else:
            assert after[name] == pytest.approx(value, rel=1e-12, abs=1e-15), name
            assert 0.0 <= value <= 1.0
