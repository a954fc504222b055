import math

import numpy as np
import pytest
import torch
from sklearn.metrics import (
    mean_absolute_error,
    mean_squared_error,
    ndcg_score,
    roc_auc_score,
)

from towers.evaluation import metrics as metrics

KS = (1, 3, 5, 10, 100)
NAMES = [f"{m}@{k}" for m in ("recall", "ndcg") for k in KS] + ["mrr", "auc"]


def make_case(case, num_queries=9, n=40, exclude_rate=0.25, pos_counts=None):
    """Random continuous scores (no ties), varied positives per query, some -inf exclusions."""
    gen = torch.Generator().manual_seed(1000 + case)
    scores = torch.randn(num_queries, n, generator=gen, dtype=torch.float64)
    if pos_counts is None:
        # Includes a query with no positives and one with many.
        pos_counts = [1, 2, 3, 5, 0, 8, 1, 4, 12][:num_queries]
    rows, items = [], []
    for u, m in enumerate(pos_counts):
        perm = torch.randperm(n, generator=gen)
        pos = perm[:m]
        rest = perm[m:]
        excluded = rest[torch.rand(len(rest), generator=gen) < exclude_rate]
        scores[u, excluded] = -math.inf
        rows += [u] * m
        items += pos.tolist()
    rows = torch.tensor(rows, dtype=torch.long)
    items = torch.tensor(items, dtype=torch.long)
    # Shuffle the positives so that nothing relies on them being grouped by query.
    shuffle = torch.randperm(len(rows), generator=gen)
    return scores, rows[shuffle], items[shuffle]


def evaluate(scores, rows, items, ks=KS):
    ahead, tied = metrics.ranks_of_positives(scores, rows, items)
    num_cand = metrics.candidates_per_row(scores)
    return ahead, metrics.per_query_ranking(ahead, rows, scores.shape[0], num_cand, ks, tied)


def query_view(scores, rows, items, u):
    """Numpy scores and 0/1 labels over the non-excluded candidates of query u."""
    s = scores[u].numpy()
    labels = np.zeros(s.shape[0], dtype=int)
    labels[items[rows == u].numpy()] = 1
    keep = np.isfinite(s)
    return s[keep], labels[keep]


CASES = range(6)


@pytest.mark.parametrize("case", CASES)
def test_ranks_match_bruteforce_argsort(case):
    scores, rows, items = make_case(case)
    ranks, tied = metrics.ranks_of_positives(scores, rows, items)
    assert ranks.dtype == torch.long and ranks.shape == rows.shape
    assert tied.dtype == torch.long and tied.shape == rows.shape
    for p in range(len(rows)):
        s = scores[rows[p]].numpy()
        cand = np.flatnonzero(np.isfinite(s))
        order = cand[np.argsort(-s[cand], kind="stable")]
        # reference: position in a numpy argsort of the non-excluded candidates
        assert ranks[p].item() == int(np.flatnonzero(order == items[p].item())[0])
        # reference: numpy.unique (continuous random scores: no two candidates of a row are equal)
        assert tied[p].item() == 0 and len(np.unique(s[cand])) == len(cand)


@pytest.mark.parametrize("case", CASES)
def test_auc_matches_sklearn(case):
    scores, rows, items = make_case(case)
    _, out = evaluate(scores, rows, items)
    for u in range(scores.shape[0]):
        s, y = query_view(scores, rows, items, u)
        if y.sum() == 0:
            assert math.isnan(out["auc"][u])
            continue
        # reference: sklearn.metrics.roc_auc_score
        assert out["auc"][u].item() == pytest.approx(roc_auc_score(y, s), abs=1e-12)


@pytest.mark.parametrize("case", CASES)
def test_ndcg_matches_sklearn(case):
    scores, rows, items = make_case(case)
    _, out = evaluate(scores, rows, items)
    for u in range(scores.shape[0]):
        s, y = query_view(scores, rows, items, u)
        for k in KS:
            if y.sum() == 0:
                assert math.isnan(out[f"ndcg@{k}"][u])
                continue
            # reference: sklearn.metrics.ndcg_score (one query at a time, binary relevance)
            want = ndcg_score(y[None, :], s[None, :], k=k)
            assert out[f"ndcg@{k}"][u].item() == pytest.approx(want, abs=1e-12)


@pytest.mark.parametrize("case", CASES)
def test_recall_and_mrr_match_bruteforce(case):
    scores, rows, items = make_case(case)
    _, out = evaluate(scores, rows, items)
    for u in range(scores.shape[0]):
        s, y = query_view(scores, rows, items, u)
        if y.sum() == 0:
            assert all(math.isnan(out[name][u]) for name in NAMES)
            continue
        sorted_labels = y[np.argsort(-s)]
        pos_ranks = np.flatnonzero(sorted_labels)
        for k in KS:
            # reference: brute-force numpy argsort (hits in top k / positives)
            assert out[f"recall@{k}"][u].item() == pytest.approx(sorted_labels[:k].sum() / y.sum(), abs=1e-12)
        # reference: brute-force numpy argsort (1 / (1 + first positive position))
        assert out["mrr"][u].item() == pytest.approx(1.0 / (1.0 + pos_ranks[0]), abs=1e-12)


def test_output_shapes_dtypes_and_keys():
    scores, rows, items = make_case(0)
    _, out = evaluate(scores, rows, items)
    assert set(out) == set(NAMES)
    for name in NAMES:
        assert out[name].shape == (scores.shape[0],) and out[name].dtype == torch.float64


@pytest.mark.parametrize("case", CASES)
def test_all_metrics_within_unit_interval(case):
    scores, rows, items = make_case(case, num_queries=9, n=25, exclude_rate=0.5)
    _, out = evaluate(scores, rows, items)
    for name in NAMES:
        v = out[name][~torch.isnan(out[name])]
        assert len(v) > 0
        assert ((v >= 0) & (v <= 1)).all(), name


def test_zero_negatives_gives_nan_auc_only():
    # Query 0: every non-excluded candidate is a positive; query 1: ordinary.
    scores = torch.tensor([[0.3, -math.inf, 0.9, -math.inf], [0.1, 0.5, 0.2, 0.7]], dtype=torch.float64)
    rows = torch.tensor([0, 0, 1])
    items = torch.tensor([0, 2, 1])
    _, out = evaluate(scores, rows, items)
    assert math.isnan(out["auc"][0])
    assert out["mrr"][0] == 1.0 and out["recall@3"][0] == 1.0 and out["ndcg@3"][0] == pytest.approx(1.0)
    # Query 1: positive at rank 1 with two of three negatives below it.
    assert out["auc"][1].item() == pytest.approx(2.0 / 3.0)


def test_perfect_and_worst_rankings():
    gen = torch.Generator().manual_seed(7)
    num_queries, n = 6, 30
    pos_counts = torch.tensor([1, 2, 4, 7, 3, 10])
    scores = torch.rand(num_queries, n, generator=gen, dtype=torch.float64)
    rows = torch.repeat_interleave(torch.arange(num_queries), pos_counts)
    items = torch.cat([torch.randperm(n, generator=gen)[:m] for m in pos_counts.tolist()])

    perfect = scores.clone()
    perfect[rows, items] += 10.0  # every positive above every negative
    _, out = evaluate(perfect, rows, items)
    for k in KS:
        torch.testing.assert_close(out[f"ndcg@{k}"], torch.ones(num_queries, dtype=torch.float64))
        # With more positives than k, even a perfect ranking only recalls k of them.
        want = pos_counts.clamp(max=k).double() / pos_counts.double()
        torch.testing.assert_close(out[f"recall@{k}"], want)
    torch.testing.assert_close(out["mrr"], torch.ones(num_queries, dtype=torch.float64))
    torch.testing.assert_close(out["auc"], torch.ones(num_queries, dtype=torch.float64))

    worst = scores.clone()
    worst[rows, items] -= 10.0  # every positive below every negative
    _, out = evaluate(worst, rows, items)
    torch.testing.assert_close(out["auc"], torch.zeros(num_queries, dtype=torch.float64))
    torch.testing.assert_close(out["mrr"], 1.0 / (1.0 + (n - pos_counts).double()))
    torch.testing.assert_close(out["recall@1"], torch.zeros(num_queries, dtype=torch.float64))


def test_excluded_entries_never_counted():
    scores, rows, items = make_case(2, exclude_rate=0.0)
    before, _ = metrics.ranks_of_positives(scores, rows, items)
    # Exclude the best-scoring non-positive of every query: each positive's rank
    # must drop by exactly one, and the candidate count by one.
    is_pos = torch.zeros_like(scores, dtype=torch.bool)
    is_pos[rows, items] = True
    top_neg = scores.masked_fill(is_pos, -math.inf).argmax(dim=1)
    hidden = scores.clone()
    hidden[torch.arange(scores.shape[0]), top_neg] = -math.inf
    after, _ = metrics.ranks_of_positives(hidden, rows, items)
    ahead = scores[rows, top_neg[rows]] > scores[rows, items]
    torch.testing.assert_close(after, before - ahead.long())
    assert (ahead.sum() > 0).item()
    torch.testing.assert_close(metrics.candidates_per_row(hidden), metrics.candidates_per_row(scores) - 1)

    # Excluded entries, equal to each other at -inf, count for nothing, neither ahead nor tied.
    row = torch.tensor([[-math.inf, -math.inf, 0.5, 0.2]])
    ahead, tied = metrics.ranks_of_positives(row, torch.tensor([0, 0]), torch.tensor([2, 3]))
    assert ahead.tolist() == [0, 1] and tied.tolist() == [0, 0]
    assert metrics.candidates_per_row(row).tolist() == [2]


def test_excluded_positive_is_rejected():
    scores = torch.tensor([[0.1, -math.inf, 0.3]])
    with pytest.raises(ValueError):
        metrics.ranks_of_positives(scores, torch.tensor([0]), torch.tensor([1]))


def test_equal_scores_are_counted_as_tied():
    n = 20
    scores = torch.full((1, n), 0.25)
    ahead, tied = metrics.ranks_of_positives(scores, torch.zeros(n, dtype=torch.long), torch.arange(n))
    # hand-worked: with one score for all, nothing is above anyone and each ties the other n - 1
    assert ahead.tolist() == [0] * n and tied.tolist() == [n - 1] * n

    # Ties only among equal scores; a higher score is ahead. Hand-worked for scores [1, 2, 1, 1]:
    # item 1 (score 2) has nothing ahead and no tie; items 0, 2, 3 have item 1 ahead and tie the other two.
    s = torch.tensor([[1.0, 2.0, 1.0, 1.0]])
    ahead, tied = metrics.ranks_of_positives(s, torch.zeros(4, dtype=torch.long), torch.arange(4))
    assert ahead.tolist() == [1, 0, 1, 1] and tied.tolist() == [2, 0, 2, 2]


def test_constant_model_scores_chance_exactly():
    # One constant score for all 50 candidates, 5 positives: each positive has a = 0, t = 49.
    n = 50
    items = torch.randperm(n, generator=torch.Generator().manual_seed(12))[:5]
    _, out = evaluate(torch.zeros(1, n), torch.zeros(5, dtype=torch.long), items, ks=(10,))
    # hand-worked: every (positive, negative) pair is tied, half credit each: auc = 1/2
    assert out["auc"][0].item() == pytest.approx(0.5, abs=1e-15)
    # hand-worked: each positive lands in the top 10 with probability 10/50
    assert out["recall@10"][0].item() == pytest.approx(10 / 50, abs=1e-15)
    # hand-worked: each positive's expected gain is D(10)/50, five of them over the ideal D(5)
    d = np.cumsum(1 / np.log2(np.arange(10) + 2.0))
    assert out["ndcg@10"][0].item() == pytest.approx(5 * d[9] / 50 / d[4], rel=1e-12)


def test_tied_auc_equals_sklearn_half_credit():
    # With coarse scores (many ties) the expected AUC over random tie orders gives each tied
    # (positive, negative) pair half credit, which is how roc_auc_score scores ties.
    gen = torch.Generator().manual_seed(13)
    nq, n = 6, 30
    scores = torch.randint(0, 3, (nq, n), generator=gen).to(torch.float64)
    rows = torch.arange(nq).repeat_interleave(6)
    items = torch.stack([torch.randperm(n, generator=gen)[:6] for _ in range(nq)]).flatten()
    _, out = evaluate(scores, rows, items, ks=(5,))
    for u in range(nq):
        s, y = query_view(scores, rows, items, u)
        # reference: sklearn.metrics.roc_auc_score (ties count 1/2)
        assert out["auc"][u].item() == pytest.approx(roc_auc_score(y, s), abs=1e-12)


def test_permutation_invariance():
    scores, rows, items = make_case(4)
    _, out = evaluate(scores, rows, items)
    gen = torch.Generator().manual_seed(21)
    perm = torch.randperm(scores.shape[0], generator=gen)  # new row i holds old query perm[i]
    inverse = torch.argsort(perm)
    shuffle = torch.randperm(len(rows), generator=gen)  # also reorder the positives
    _, out_perm = evaluate(scores[perm], inverse[rows][shuffle], items[shuffle])
    for name in NAMES:
        torch.testing.assert_close(out_perm[name], out[name][perm], equal_nan=True)
    means, means_perm = metrics.mean_over_queries(out), metrics.mean_over_queries(out_perm)
    assert means.keys() == means_perm.keys()
    for name in NAMES:
        assert means_perm[name] == pytest.approx(means[name], abs=1e-12)


def test_mean_over_queries_ignores_nan():
    scores, rows, items = make_case(1)
    _, out = evaluate(scores, rows, items)
    assert torch.isnan(out["mrr"]).sum() == 1  # the query with no positives
    means = metrics.mean_over_queries(out)
    for name in NAMES:
        assert isinstance(means[name], float)
        # reference: numpy.nanmean
        assert means[name] == pytest.approx(float(np.nanmean(out[name].numpy())), abs=1e-12)
    assert math.isnan(metrics.mean_over_queries({"x": torch.tensor([math.nan])})["x"])


def test_no_positives_at_all():
    out = metrics.per_query_ranking(
        torch.zeros(0, dtype=torch.long), torch.zeros(0, dtype=torch.long), 3, torch.tensor([5, 5, 5]), (1, 4)
    )
    for values in out.values():
        assert values.shape == (3,) and torch.isnan(values).all()


def test_bad_inputs_rejected():
    with pytest.raises(ValueError):
        metrics.per_query_ranking(torch.tensor([0]), torch.tensor([3]), 3, torch.tensor([5, 5, 5]), (1,))
    with pytest.raises(ValueError):
        metrics.per_query_ranking(torch.tensor([0]), torch.tensor([0]), 1, torch.tensor([5]), (0,))
    with pytest.raises(ValueError):  # more positives than candidates
        metrics.per_query_ranking(torch.tensor([0, 1]), torch.tensor([0, 0]), 1, torch.tensor([1]), (1,))
    one = (torch.tensor([0]), torch.tensor([0]), 1, torch.tensor([5]), (1,))
    with pytest.raises(ValueError, match=">= 0"):
        metrics.per_query_ranking(*one, tied=torch.tensor([-1]))
    with pytest.raises(ValueError, match="shape of ahead"):
        metrics.per_query_ranking(*one, tied=torch.tensor([0, 0]))
    with pytest.raises(ValueError, match="more candidates ahead"):  # 2 ahead + itself + 3 tied > 5
        metrics.per_query_ranking(torch.tensor([2]), *one[1:], tied=torch.tensor([3]))
    two = (torch.tensor([1, 1]), torch.tensor([0, 0]), 1, torch.tensor([9]), (1,))
    with pytest.raises(ValueError, match="tied counts must agree"):  # equal ahead, so one score, one group
        metrics.per_query_ranking(*two, tied=torch.tensor([2, 3]))
    with pytest.raises(ValueError, match="tied counts must agree"):  # two positives in a group of one
        metrics.per_query_ranking(*two, tied=torch.tensor([0, 0]))


def test_positives_per_query():
    counts = metrics.positives_per_query(torch.tensor([2, 0, 2, 2]), 4)
    assert counts.tolist() == [1, 0, 3, 0]


@pytest.mark.parametrize("weighted", [False, True])
def test_rmse_mae_match_sklearn(weighted):
    gen = torch.Generator().manual_seed(31)
    pred = torch.randn(200, generator=gen) * 2 + 3
    target = torch.randint(1, 6, (200,), generator=gen).to(torch.float32)
    weight = torch.rand(200, generator=gen) * 3 if weighted else None
    sw = None if weight is None else weight.numpy()
    got_rmse = metrics.rmse(pred, target, weight)
    got_mae = metrics.mae(pred, target, weight)
    assert isinstance(got_rmse, float) and isinstance(got_mae, float)
    # reference: sklearn.metrics.mean_squared_error (square root taken here)
    assert got_rmse == pytest.approx(math.sqrt(mean_squared_error(target.numpy(), pred.numpy(), sample_weight=sw)), rel=1e-6)
    # reference: sklearn.metrics.mean_absolute_error
    assert got_mae == pytest.approx(mean_absolute_error(target.numpy(), pred.numpy(), sample_weight=sw), rel=1e-6)


def test_rmse_mae_weights_matter_and_shapes_checked():
    pred = torch.tensor([0.0, 0.0])
    target = torch.tensor([1.0, 3.0])
    assert metrics.mae(pred, target) == pytest.approx(2.0)
    assert metrics.mae(pred, target, torch.tensor([3.0, 1.0])) == pytest.approx(1.5)
    assert metrics.rmse(pred, target, torch.tensor([0.0, 1.0])) == pytest.approx(3.0)
    with pytest.raises(ValueError):
        metrics.rmse(pred, target[:1])
