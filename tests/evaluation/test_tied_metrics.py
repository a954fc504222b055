"""Ranking metrics under ties (towers/evaluation/metrics.py per_query_ranking with `tied`): exact expected
values over random orders of the tied candidates, against hand-worked examples, enumeration of every
placement, high-precision decimal sums and Monte Carlo over random tie-breaks."""

from __future__ import annotations

import itertools
import math
from decimal import Decimal, getcontext
from fractions import Fraction

import numpy as np
import pytest
import torch

from towers.evaluation import metrics as M

KS = (1, 2, 5, 8)


def test_hand_worked_expectations():
    # Query 0, 7 candidates scored A=3, B=2, C=2, D=2, E=1, F=1, G=0; positives B and E.
    #   B: a = 1 (A), t = 2 (C, D); E: a = 4 (A, B, C, D), t = 1 (F); m = 2, 5 negatives.
    # Query 1, 4 candidates all scored 5, two of them positive: a = 0, t = 3 each; 2 negatives.
    scores = torch.tensor([[3.0, 2, 2, 2, 1, 1, 0], [5, 5, 5, 5, -math.inf, -math.inf, -math.inf]])
    rows, items = torch.tensor([0, 0, 1, 1]), torch.tensor([1, 4, 0, 2])
    ahead, tied = M.ranks_of_positives(scores, rows, items)
    assert ahead.tolist() == [1, 4, 0, 0] and tied.tolist() == [2, 1, 3, 3]
    out = M.per_query_ranking(ahead, rows, 2, M.candidates_per_row(scores), (1, 2, 5), tied)
    disc = [1 / math.log2(r + 2) for r in range(6)]
    # recall@2, query 0: B in the top 2 with P = clamp(2-1, 0, 3)/3 = 1/3, E never (a = 4): (1/3)/2 = 1/6
    assert out["recall@2"][0].item() == pytest.approx(1 / 6, abs=1e-15)
    # recall@5, query 0: B surely (clamp(4, 0, 3)/3 = 1), E with clamp(1, 0, 2)/2 = 1/2: (1 + 1/2)/2 = 3/4
    assert out["recall@5"][0].item() == pytest.approx(3 / 4, abs=1e-15)
    # ndcg@5, query 0: B at ranks 1..3 each w.p. 1/3: (d1 + d2 + d3)/3; E at rank 4 or 5 w.p. 1/2, only
    # rank 4 inside the cut: d4/2; ideal: d0 + d1 (two positives at the top)
    want = ((disc[1] + disc[2] + disc[3]) / 3 + disc[4] / 2) / (disc[0] + disc[1])
    assert out["ndcg@5"][0].item() == pytest.approx(want, rel=1e-14)
    # mrr, query 0: the best positive is B (smallest a), alone in its group of 3, at rank 1, 2 or 3:
    # (1/2 + 1/3 + 1/4)/3 = 13/36
    assert out["mrr"][0].item() == pytest.approx(13 / 36, rel=1e-14)
    # auc, query 0 by pairs: B beats F, G and ties C, D (half each): 3; E ties F (half) and beats G: 1.5;
    # (3 + 1.5) / (2 x 5) = 0.45
    assert out["auc"][0].item() == pytest.approx(0.45, abs=1e-15)
    # query 1: two positives placed at a random 2-subset of ranks {0, 1, 2, 3}; the first of them is at
    # 0 in 3 of the 6 subsets, at 1 in 2, at 2 in 1: mrr = (3 x 1 + 2 x 1/2 + 1 x 1/3)/6 = 13/18
    assert out["mrr"][1].item() == pytest.approx(13 / 18, rel=1e-14)
    # query 1: each positive in the top 1 w.p. 1/4; all pairs tied: auc = 1/2
    assert out["recall@1"][1].item() == pytest.approx(1 / 4, abs=1e-15)
    assert out["auc"][1].item() == pytest.approx(0.5, abs=1e-15)


def test_no_ties_give_the_plain_metrics():
    # tied all 0 must give the plain metrics of rank `ahead` (tied=None), bit for bit, and those match
    # sklearn and argsort brute force in test_metrics.py
    g = torch.Generator().manual_seed(3)
    nq = 50
    counts = torch.randint(0, 6, (nq,), generator=g)  # some queries without positives
    rows = torch.arange(nq).repeat_interleave(counts)
    # distinct ranks within each query, as a ranking without ties has
    ahead = torch.cat([torch.randperm(60, generator=g)[:int(m)] for m in counts])
    cands = torch.full((nq,), 200)
    plain = M.per_query_ranking(ahead, rows, nq, cands, KS)
    zero = M.per_query_ranking(ahead, rows, nq, cands, KS, torch.zeros_like(ahead))
    for name in plain:
        assert torch.equal(torch.nan_to_num(plain[name], 7.0), torch.nan_to_num(zero[name], 7.0)), name


def enumerated_expectation(a: int, size: int, m: int) -> Fraction:
    """Reference: E[1 / (1 + best rank)] by enumerating every m-subset of places in a group of `size`."""
    subsets = list(itertools.combinations(range(size), m))
    return sum((Fraction(1, a + 1 + min(s)) for s in subsets), Fraction(0)) / len(subsets)


def test_mrr_equals_enumeration_of_every_placement(monkeypatch):
    # (a, T, m): the m = 1 digamma form, m = T (J = 0 surely), and the m > 1 sum; several share a triple,
    # and tiny chunks make the sum cross chunk and triple boundaries
    monkeypatch.setattr(M, "MRR_CHUNK", 5)
    cases = [(0, 1, 1), (3, 1, 1), (0, 9, 1), (12, 5, 1), (0, 4, 2), (2, 7, 3), (0, 10, 4), (5, 6, 6),
             (1, 11, 2), (2, 7, 3), (40, 12, 5)]
    ahead, tied, rows = [], [], []
    for q, (a, size, m) in enumerate(cases):
        ahead += [a] * m
        tied += [size - 1] * m
        rows += [q] * m
    cands = torch.tensor([a + size + 3 for a, size, _ in cases])
    out = M.per_query_ranking(torch.tensor(ahead), torch.tensor(rows), len(cases), cands, (1,), torch.tensor(tied))
    for q, case in enumerate(cases):
        want = float(enumerated_expectation(*case))
        assert out["mrr"][q].item() == pytest.approx(want, rel=1e-13), case  # reference: exact enumeration


@pytest.mark.parametrize("a, size, m", [(0, 100_000, 1), (10 ** 6, 50_000, 1), (0, 20_000, 2), (7, 20_000, 3),
                                        (1000, 3000, 40)])
def test_mrr_of_large_groups_against_decimal_sums(a, size, m):
    # reference: 50-digit decimal sums over j of C(T-1-j, m-1) / C(T, m) / (a + 1 + j) (math.comb, exact
    # integers); the harmonic sum for m = 1. Tolerance 1e-9 relative: the float64 log-gamma terms of
    # arguments near T carry about T log(T) 2^-53 (2e-11 at T = 20,000); the digamma form far less
    getcontext().prec = 50
    if m == 1:
        want = sum(Decimal(1) / (a + 1 + j) for j in range(size)) / size
    else:
        want = sum(Decimal(math.comb(size - 1 - j, m - 1)) / (a + 1 + j) for j in range(size - m + 1))
        want /= math.comb(size, m)
    got = M.per_query_ranking(torch.full((m,), a), torch.zeros(m, dtype=torch.long), 1,
                              torch.tensor([a + size]), (1,), torch.full((m,), size - 1))["mrr"][0].item()
    assert got == pytest.approx(float(want), rel=1e-9)


def random_tie_case(seed: int):
    """Integer scores 0..3 (many ties), some exclusions, varied positives; query 0 ties all its candidates,
    query 1 has its two best positives in one group (the m > 1 case of mrr), query 2 has no ties."""
    rng = np.random.default_rng(seed)
    nq, n = 6, 14
    scores = rng.integers(0, 4, (nq, n)).astype(np.float64)
    scores[0] = 1.0
    scores[1, :4] = 3.0  # items 0..3 at the top score: positives 0 and 1 share the best group
    scores[1, 4:] = rng.integers(0, 3, n - 4)
    scores[2] = rng.permutation(n)
    rows, items = [], []
    for q, m in enumerate([3, 3, 2, 1, 4, 5]):
        pos = [0, 1, 9] if q == 1 else rng.permutation(n)[:m].tolist()
        rows += [q] * m
        items += pos
        rest = [c for c in range(n) if c not in pos]
        scores[q, rng.permutation(rest)[:2]] = -np.inf  # two excluded candidates a query
    return scores, np.array(rows), np.array(items)


def plain_metrics(ranks: np.ndarray, rows: np.ndarray, nq: int, cands: np.ndarray) -> dict[str, np.ndarray]:
    """Reference, in numpy: the plain metrics of tie-free ranks (draws, P), each draw apart, (draws, nq) each.

    recall@k: share of positives with rank < k; ndcg@k: sum of 1/log2(rank + 2) over those, over the
    same for ranks 0..min(m, k)-1 (Jarvelin & Kekalainen, 2002); mrr: 1/(1 + smallest rank); auc:
    the share of (positive, negative) pairs in the right order, from the rank sum (Mann-Whitney).
    """
    draws = ranks.shape[0]
    m = np.bincount(rows, minlength=nq).astype(float)
    neg = cands - m

    def per_query(values):
        out = np.zeros((draws, nq))
        np.add.at(out, (slice(None), rows), values)
        return out

    out = {}
    for k in KS:
        hit = ranks < k
        out[f"recall@{k}"] = per_query(hit) / m
        ideal = np.array([sum(1 / np.log2(r + 2) for r in range(min(int(mq), k))) for mq in m])
        out[f"ndcg@{k}"] = per_query(np.where(hit, 1 / np.log2(ranks + 2), 0.0)) / ideal
    best = np.full((draws, nq), np.iinfo(np.int64).max)
    np.minimum.at(best, (slice(None), rows), ranks)
    out["mrr"] = 1.0 / (1.0 + best)
    out["auc"] = 1.0 - (per_query(ranks) - m * (m - 1) / 2) / (m * neg)
    return out


def test_expectations_equal_the_mean_over_random_tie_breaks():
    # Monte Carlo: 20,000 draws of independent random priorities per query; in each draw a positive's
    # rank is `ahead` plus the tied candidates with a smaller priority (the old single-draw counting),
    # and the plain metrics of those ranks (numpy, plain_metrics) are averaged over the draws. Each
    # per-query mean must lie within 4 standard errors (std over draws / sqrt(20,000)) of the exact
    # expectation: a deviation that large has probability about 6e-5 per check; the seed is fixed.
    scores, rows, items = random_tie_case(5)
    nq, n = scores.shape
    s = torch.from_numpy(scores)
    ahead, tied = M.ranks_of_positives(s, torch.from_numpy(rows), torch.from_numpy(items))
    cands = M.candidates_per_row(s)
    exact = M.per_query_ranking(ahead, torch.from_numpy(rows), nq, cands, KS, tied)
    assert tied.sum() > 0 and int(tied[torch.from_numpy(rows) == 0].min()) == int(cands[0]) - 1
    assert int(tied[torch.from_numpy(rows) == 2].max()) == 0

    draws = 20_000
    rng = np.random.default_rng(6)
    priority = rng.random((draws, nq, n))
    own = scores[rows, items]  # (P,)
    same = (scores[rows] == own[:, None]) & (np.arange(n)[None, :] != items[:, None])  # (P, n) tied candidates
    before = priority[:, rows, :] < priority[:, rows, items][:, :, None]  # (draws, P, n)
    ranks = ahead.numpy()[None, :] + (before & same[None]).sum(2)  # (draws, P)
    sampled = plain_metrics(ranks, rows, nq, cands.numpy())
    assert set(sampled) == set(exact)
    for name, want in exact.items():
        for q in range(nq):
            per_draw = sampled[name][:, q]
            if math.isnan(want[q]):
                assert np.isnan(per_draw).all(), (name, q)
                continue
            mean, se = per_draw.mean(), per_draw.std() / math.sqrt(draws)
            # reference: Monte Carlo mean of random tie-breaks, 4 standard errors (+1e-12 where no tie varies)
            assert abs(mean - want[q].item()) <= 4 * se + 1e-12, (name, q, mean, want[q].item(), se)
    # the check has teeth: the tie-heavy queries really vary from draw to draw
    assert sampled["mrr"][:, :2].std(0).min() > 0.05
