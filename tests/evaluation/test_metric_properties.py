"""Property-based checks (hypothesis) of the ranking metrics: every per-query value lies in [0, 1], the
mean does not depend on the order of the queries, and all of it agrees with a brute-force computation
from the sorted ranking."""

from __future__ import annotations

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
    tie_break = np.asarray(draw(st.permutations(range(n))), dtype=np.float64)
    shuffle = draw(st.permutations(range(len(rows)))) if rows else []
    rows = np.asarray(rows, dtype=np.int64)[list(shuffle)] if rows else np.zeros(0, np.int64)
    items = np.asarray(items, dtype=np.int64)[list(shuffle)] if len(items) else np.zeros(0, np.int64)
    return scores, rows, items, tie_break


def towers_metrics(scores, rows, items, tie_break):
    s = torch.from_numpy(scores)
    ranks = M.ranks_of_positives(s, torch.from_numpy(rows), torch.from_numpy(items), torch.from_numpy(tie_break))
    per_query = M.per_query_ranking(ranks, torch.from_numpy(rows), s.shape[0], M.candidates_per_row(s), KS)
    return {k: v.numpy() for k, v in per_query.items()}


def brute_force(scores, rows, items, tie_break) -> dict[str, np.ndarray]:
    """Sort each query's candidates (score descending, then tie_break ascending) and count directly.

    Definitions: recall@k and binary-relevance nDCG@k with ideal DCG over min(k, m) positives
    (Jarvelin & Kekalainen, 2002, cumulated gain); MRR of the first positive; AUC as the share of
    (positive, negative) pairs ordered correctly (the Mann-Whitney form of the ROC area).
    """
    nq, n = scores.shape
    out = {f"{m}@{k}": np.full(nq, np.nan) for m in ("recall", "ndcg") for k in KS}
    out["mrr"], out["auc"] = np.full(nq, np.nan), np.full(nq, np.nan)
    for q in range(nq):
        pos = set(items[rows == q].tolist())
        if not pos:
            continue
        order = sorted((c for c in range(n) if np.isfinite(scores[q, c])), key=lambda c: (-scores[q, c], tie_break[c]))
        is_pos = [c in pos for c in order]
        for k in KS:
            out[f"recall@{k}"][q] = sum(is_pos[:k]) / len(pos)
            dcg = sum(1.0 / math.log2(p + 2) for p, hit in enumerate(is_pos[:k]) if hit)
            ideal = sum(1.0 / math.log2(p + 2) for p in range(min(k, len(pos))))
            out[f"ndcg@{k}"][q] = dcg / ideal
        out["mrr"][q] = 1.0 / (1 + is_pos.index(True))
        n_neg = len(order) - len(pos)
        if n_neg:
            right = sum(1 for i, a in enumerate(is_pos) if a for b in is_pos[i + 1:] if not b)
            out["auc"][q] = right / (len(pos) * n_neg)
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
    scores, rows, items, tie_break = case
    perm = np.asarray(data.draw(st.permutations(range(scores.shape[0]))), dtype=np.int64)
    new_row_of = np.argsort(perm)  # query q moves to position new_row_of[q]
    before = M.mean_over_queries({k: torch.from_numpy(v) for k, v in towers_metrics(scores, rows, items, tie_break).items()})
    after = M.mean_over_queries({k: torch.from_numpy(v) for k, v in
                                 towers_metrics(scores[perm], new_row_of[rows], items, tie_break).items()})
    for name, value in before.items():
        if math.isnan(value):
            assert math.isnan(after[name]), name
        else:
            assert after[name] == pytest.approx(value, rel=1e-12, abs=1e-15), name
            assert 0.0 <= value <= 1.0
