"""evaluate_slices end to end on small tensors: reference rows, exact ties, list metrics, groups and notes.

The references are checked against brute-force numpy counts of the expected metrics; ties against a
closed form worked by hand; list metrics against numpy over the same top-K lists.
"""

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import torch

from towers import config as C
from towers.data.groups import Groups
from towers.data.pairs import Pairs, SplitPairs
from towers.evaluation import references as R
from towers.evaluation.protocol import (
    evaluate_slices,
    format_table,
    held_out,
    popularity_scorer,
    ranking_metrics,
    reference_scorers,
)
from towers.search.scorer import Scorer


def _cfg(**evaluation) -> C.Config:
    raw = {"interactions": {"path": "log.csv", "query_column": "user", "candidate_column": "item"},
           "training": {"loss": "softmax"}, "evaluation": {"top_k": [5], **evaluation}}
    return C.resolve(raw, Path("."))


def _pairs(q, c) -> Pairs:
    return Pairs(torch.as_tensor(q, dtype=torch.int64), torch.as_tensor(c, dtype=torch.int64))


def _split(n_q=30, n_i=40, seed=0, n_train=300, n_valid=60, n_test=80) -> SplitPairs:
    rng = np.random.default_rng(seed)
    tq, tc = rng.integers(0, n_q, n_train), rng.integers(0, n_i // 2, n_train)  # the first half of items is popular
    tc[: n_train // 3] = rng.integers(0, n_i, n_train // 3)
    train = _pairs(tq, tc)
    valid = _pairs(rng.integers(0, n_q, n_valid), rng.integers(0, n_i, n_valid))
    test = _pairs(rng.integers(0, n_q, n_test), rng.integers(0, n_i, n_test))
    warm = torch.zeros(n_i, dtype=torch.bool)
    warm[train.candidate] = True
    empty = _pairs([], [])
    return SplitPairs(train, valid, test, empty, warm, torch.zeros(n_i, dtype=torch.bool), False, empty,
                      torch.zeros(n_q, dtype=torch.bool))


def _random_scorer(rng) -> Scorer:
    """Vectors for 30 queries and 40 items, normal entries: a model with no level scores."""
    return Scorer(torch.from_numpy(rng.normal(size=(30, 4)).astype(np.float32)),
                  torch.from_numpy(rng.normal(size=(40, 4)).astype(np.float32)))


def _expected_recall_brute(scores: np.ndarray, split: SplitPairs, k: int) -> float:
    """Per positive: a above, t level (itself not counted) among non-excluded warm items; hit chance
    clamp(k - a, 0, t + 1) / (t + 1); mean per query, then over queries. Plain numpy loops."""
    known = set(zip(split.known().query.tolist(), split.known().candidate.tolist()))
    warm = split.warm_items.numpy()
    per_query: dict[int, list[float]] = {}
    for q, c in sorted(set(zip(split.test.query.tolist(), split.test.candidate.tolist()))):
        if (q, c) in known or not warm[c]:
            continue
        ok = warm.copy()
        for kq, kc in known:
            if kq == q:
                ok[kc] = False
        row, own = scores[q][ok], scores[q, c]
        a, t = int((row > own).sum()), int((row == own).sum()) - 1
        per_query.setdefault(q, []).append(min(max(k - a, 0), t + 1) / (t + 1))
    return float(np.mean([np.mean(v) for v in per_query.values()]))


@pytest.mark.parametrize("kind", ["ease", "knn"])
def test_reference_ranking_equals_brute_force_expected_recall(kind):
    split = _split()
    tr = split.train
    history = R.History.from_pairs(tr.query, tr.candidate, 30, 40)
    scorer = R.EaseFit(history).solve(3.0) if kind == "ease" else R.KnnFit(history).solve(3)  # kNN: many level zeros
    scores = scorer.score_rows(torch.arange(30)).numpy()
    got = ranking_metrics(scorer, split.test, split.known(), split.warm_items, [5])["recall@5"]
    assert got == pytest.approx(_expected_recall_brute(scores, split, 5), abs=1e-12)


def test_a_model_that_ties_everything_recalls_k_over_n():
    # worked by hand: every item level with every other, n competing items, so any positive lands in the
    # top K with chance K / n, whatever the query's other positives; here n = 8 cold items, K = 5
    cold = torch.zeros(40, dtype=torch.bool)
    cold[32:] = True
    test = _pairs([0, 0, 1, 2, 2, 2], [32, 33, 39, 34, 35, 36])
    flat = popularity_scorer(_pairs([0, 1], [0, 1]), 3, 40, explicit=False)  # cold items all have count 0
    got = ranking_metrics(flat, test, _pairs([], []), cold, [5])
    assert got["recall@5"] == pytest.approx(5 / 8, abs=1e-12)
    assert got["auc"] == pytest.approx(0.5, abs=1e-12)  # every ordering of the level items equally likely


def test_references_join_the_warm_slice_with_their_chosen_settings():
    split = _split()
    cfg = _cfg()
    refs, info = reference_scorers(split, 30, 40, cfg)
    assert set(refs) == {"ease", "item_knn"}
    chosen = max(info["ease"]["tries"], key=lambda t: t["score"])
    assert info["ease"]["penalty"] == chosen["penalty"] and info["ease"]["by"] == "validation recall@5"
    metrics = evaluate_slices({"popularity": popularity_scorer(split.train, 30, 40, False)} | refs, split, cfg,
                              reference_info=info)
    assert list(metrics["warm"]) == ["popularity", "item_knn", "ease"]
    assert metrics["references"]["item_knn"]["neighbours"] == info["item_knn"]["neighbours"]
    assert "references: ease penalty" in format_table(metrics)


def test_without_validation_pairs_the_references_say_they_took_their_default():
    split = _split()
    split.valid = _pairs([], [])
    said = []
    refs, info = reference_scorers(split, 30, 40, _cfg(), said.append)
    assert set(refs) == {"ease", "item_knn"}
    assert info["ease"]["by"] == info["item_knn"]["by"] == "no validation pairs: the default setting"
    assert said and all("no validation pairs" in line and "by validation" not in line for line in said)
    assert said[-1] == "item_knn: its neighbour count: the default setting (no validation pairs)"


def test_without_warm_test_pairs_the_references_are_not_fitted():
    split = _split()
    split.test = _pairs([], [])  # test_fraction 0: nothing to score them on
    refs, info = reference_scorers(split, 30, 40, _cfg())
    assert refs == {} and info == {}  # the warm slice's note says there are no test pairs


def test_ease_is_skipped_above_its_catalog_limit_with_a_note():
    split = _split()
    cfg = _cfg(ease_max_items=39)
    refs, info = reference_scorers(split, 30, 40, cfg)
    assert "ease" not in refs and "exceed evaluation.ease_max_items" in info["ease"]["skipped"]
    metrics = evaluate_slices(refs, split, cfg, reference_info=info)
    assert "ease skipped" in metrics["notes"]["ease"] and "note: ease skipped" in format_table(metrics)


def test_an_empty_test_slice_says_why():
    split = _split()
    split.test = _pairs([], [])
    cfg = _cfg(test_fraction=0.0)
    metrics = evaluate_slices({"popularity": popularity_scorer(split.train, 30, 40, False)}, split, cfg)
    assert metrics["warm"] == {"popularity": {}}
    assert "test_fraction is 0" in metrics["notes"]["warm"]
    assert "[warm]  no test pairs: evaluation.test_fraction is 0" in format_table(metrics)


def test_list_metrics_equal_numpy_over_the_same_top_lists():
    split = _split(seed=2)
    rng = np.random.default_rng(3)
    scorer = _random_scorer(rng)
    m = evaluate_slices({"towers": scorer}, split, _cfg())["warm"]["towers"]
    h = held_out(split.test, split.known(), split.warm_items)
    top, _ = scorer.over_items(h.cand_rows).for_queries(h.queries).top(5, h.ex_rows, h.ex_cols)
    top = top.numpy()
    listed = np.unique(top[top >= 0])
    assert m["coverage@5"] == pytest.approx(len(listed) / len(h.cand_rows))  # numpy: distinct listed columns
    counts = np.bincount(split.train.candidate.numpy(), minlength=40)[h.cand_rows.numpy()]
    below = (counts[None, :] < counts[:, None]).sum(1)
    level = (counts[None, :] == counts[:, None]).sum(1)
    pct = 100.0 * (below + 0.5 * level) / len(counts)  # percentile with ties at the mean rank
    assert m["popularity_pct@5"] == pytest.approx(pct[top[top >= 0]].mean())


def test_user_groups_average_the_queries_of_each_group_as_pandas_does():
    split = _split(seed=4)
    rng = np.random.default_rng(5)
    scorer = _random_scorer(rng)
    codes = torch.from_numpy(rng.integers(0, 3, 30))
    groups = [Groups("segment", "user", codes, ["a", "b", "c"])]
    metrics = evaluate_slices({"towers": scorer}, split, _cfg(), groups=groups)
    per_group = metrics["groups"]["segment"]["towers"]
    # reference: each query's own recall from ranking_metrics on that query alone, grouped by pandas
    rows = []
    for q in torch.unique(split.test.query).tolist():
        mine = split.test.query == q
        one = ranking_metrics(scorer, split.test.subset(torch.nonzero(mine).flatten()), split.known(),
                              split.warm_items, [5])
        if one:
            rows.append({"group": ["a", "b", "c"][int(codes[q])], "recall@5": one["recall@5"]})
    expected = pd.DataFrame(rows).groupby("group")["recall@5"].agg(["mean", "size"])
    for name, row in expected.iterrows():
        assert per_group[name]["recall@5"] == pytest.approx(row["mean"], abs=1e-12)
        assert per_group[name]["queries"] == row["size"]
    assert "[warm by segment]  recall@5" in format_table(metrics)


def test_item_groups_rank_the_whole_catalog_but_count_only_their_positives():
    split = _split(seed=6)
    rng = np.random.default_rng(7)
    scorer = _random_scorer(rng)
    codes = torch.from_numpy(rng.integers(0, 2, 40))
    metrics = evaluate_slices({"towers": scorer}, split, _cfg(), groups=[Groups("shelf", "item", codes, ["s1", "s2"])])
    for c, name in enumerate(["s1", "s2"]):
        # reference: the test pairs of that group's items alone, ranked by ranking_metrics over the same catalog
        mine = codes.index_select(0, split.test.candidate) == c
        alone = ranking_metrics(scorer, split.test.subset(torch.nonzero(mine).flatten()), split.known(),
                                split.warm_items, [5])
        got = metrics["groups"]["shelf"]["towers"][name]
        assert got["recall@5"] == pytest.approx(alone["recall@5"], abs=1e-12)
        assert got["ndcg@5"] == pytest.approx(alone["ndcg@5"], abs=1e-12)
        assert got["queries"] == alone["queries"]


def test_a_squared_loss_run_says_it_has_no_group_metrics():
    split = _split(seed=8)
    split.test = Pairs(split.test.query, split.test.candidate, torch.full((len(split.test),), 4.0))
    cfg = C.resolve({"interactions": {"path": "log.csv", "query_column": "user", "candidate_column": "item",
                                      "target_column": "stars"}, "training": {"loss": "squared"},
                     "evaluation": {"top_k": [5]}}, Path("."))
    codes = torch.zeros(40, dtype=torch.int64)
    metrics = evaluate_slices({"towers": _random_scorer(np.random.default_rng(9))}, split, cfg,
                              groups=[Groups("shelf", "item", codes, ["s1"])])
    assert "groups" not in metrics and "rmse" in metrics["warm"]["towers"]
    assert "a squared-loss run ranks nothing" in metrics["notes"]["group_metrics_by"]
    assert "note: evaluation.group_metrics_by" in format_table(metrics)


def test_a_warm_slice_of_users_without_training_events_says_so():
    # a helper's split: time on MovieLens: 72 of 81 test users had no training events, and EASE and item-kNN
    # looked broken beside popularity; the note counts them (reference: numpy's set difference)
    split = _split(n_q=30)
    split.test = _pairs(np.r_[np.arange(30, 40), [0, 1]], np.arange(12))  # 10 new users (rows 30..39), 2 known ones
    metrics = evaluate_slices({"popularity": popularity_scorer(split.train, 40, 40, False)}, split, _cfg())
    new = np.setdiff1d(split.test.query.numpy(), split.train.query.numpy())
    assert len(new) == 10
    assert metrics["notes"]["warm_new_queries"].startswith("10 of the warm slice's 12 test users (83%) have no "
                                                          "training events")
    assert "warm_new_queries" not in evaluate_slices({}, _split(), _cfg()).get("notes", {})
    # the cause it names is the split's: a random split of rows, of orders, or a split by time
    assert "a user with few events" in metrics["notes"]["warm_new_queries"]
    grouped = C.resolve({"interactions": {"path": "log.csv", "query_column": "user", "candidate_column": "item",
                                          "group_column": "order"}, "evaluation": {"top_k": [5]}}, Path("."))
    by_time = C.resolve(
        {"interactions": {"path": "log.csv", "query_column": "user", "candidate_column": "item", "time_column": "t"},
         "evaluation": {"top_k": [5], "split": "time"}}, Path("."))
    for cfg, cause in ((grouped, "whole order groups"), (by_time, "users who came late")):
        note = evaluate_slices({"popularity": popularity_scorer(split.train, 40, 40, False)}, split, cfg)["notes"]
        assert cause in note["warm_new_queries"], note


def test_towers_behind_a_reference_on_warm_items_get_a_note():
    from towers.evaluation.protocol import _towers_behind

    warm = {"popularity": {"recall@20": 0.08}, "ease": {"recall@20": 0.20}, "towers": {"recall@20": 0.17},
            "oracle": {"recall@20": 0.40}}
    assert _towers_behind(warm, 20).startswith("towers: warm recall@20 0.1700 is 0.85 of ease's 0.2000")
    assert _towers_behind(warm | {"towers": {"recall@20": 0.195}}, 20) is None  # within 5%
    assert _towers_behind({"popularity": {"recall@20": 0.1}}, 20) is None  # no towers row
    assert _towers_behind(warm | {"oracle": {"recall@20": 0.9}, "ease": {"recall@20": 0.1}}, 20) is None  # not the oracle
