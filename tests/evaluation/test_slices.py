"""The slices of evaluate_slices (towers/evaluation/protocol.py): the cold_users slice, users held out whole,
ranked over the warm items with nothing known of them, against a numpy brute force."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import torch

from towers import config as C
from towers.data.pairs import Pairs, SplitPairs
from towers.evaluation.protocol import evaluate_slices
from towers.search.scorer import Scorer

N_USERS, N_ITEMS, K = 40, 60, 5


def split_with_cold_users(n_cold_pairs: int) -> SplitPairs:
    g = torch.Generator().manual_seed(3)
    cold_users = torch.zeros(N_USERS, dtype=torch.bool)
    cold_users[30:] = True
    warm_items = torch.ones(N_ITEMS, dtype=torch.bool)
    warm_items[50:] = False  # items without training pairs: never candidates of the warm or cold_users slices
    train = Pairs(torch.randint(0, 30, (300,), generator=g), torch.randint(0, 50, (300,), generator=g))
    test = Pairs(torch.randint(0, 30, (60,), generator=g), torch.randint(0, 50, (60,), generator=g))
    cold_user_test = Pairs(torch.randint(30, N_USERS, (n_cold_pairs,), generator=g),
                           torch.randint(0, N_ITEMS, (n_cold_pairs,), generator=g))
    none = torch.zeros(0, dtype=torch.int64)
    return SplitPairs(train, Pairs(none, none), test, Pairs(none, none), warm_items, torch.zeros(N_ITEMS, dtype=torch.bool),
                      False, cold_user_test, cold_users)


@pytest.fixture
def cfg(tmp_path: Path) -> C.Config:
    raw = {"interactions": {"path": "log.csv", "query_column": "user", "candidate_column": "item"},
           "evaluation": {"top_k": [K]}}
    return C.resolve(raw, tmp_path)


def test_cold_users_are_ranked_over_the_warm_items_with_nothing_excluded(cfg):
    data = split_with_cold_users(50)
    g = torch.Generator().manual_seed(4)
    scorer = Scorer(torch.randn(N_USERS, 3, generator=g), torch.randn(N_ITEMS, 3, generator=g))
    out = evaluate_slices({"towers": scorer}, data, cfg)
    assert list(out) == ["warm", "cold_users"]
    got = out["cold_users"]["towers"]
    # reference: numpy brute force; every warm item competes, the user's training pairs (it has none) exclude nothing
    s = (scorer.query_vectors @ scorer.item_vectors.T).numpy()
    warm = np.flatnonzero(data.warm_items.numpy())
    q, c = data.cold_user_test.query.numpy(), data.cold_user_test.candidate.numpy()
    recalls = []
    for u in np.unique(q):  # per query, as the metric is defined
        pos = set(c[(q == u) & data.warm_items.numpy()[c]].tolist())
        if pos:
            top = warm[np.argsort(-s[u, warm])[:K]]
            recalls.append(len(pos & set(top.tolist())) / len(pos))
    assert got["recall@5"] == pytest.approx(np.mean(recalls))
    assert got["queries"] == len(recalls)


def test_no_cold_users_no_slice(cfg):
    data = split_with_cold_users(0)
    scorer = Scorer(torch.ones(N_USERS, 2), torch.ones(N_ITEMS, 2))
    assert list(evaluate_slices({"towers": scorer}, data, cfg)) == ["warm"]


def _warm_split(n_train: int = 3000) -> SplitPairs:
    g = torch.Generator().manual_seed(7)
    train = Pairs(torch.randint(0, 30, (n_train,), generator=g), torch.randint(0, 50, (n_train,), generator=g))
    valid = Pairs(torch.randint(0, 30, (200,), generator=g), torch.randint(0, 50, (200,), generator=g))
    test = Pairs(torch.randint(0, 30, (200,), generator=g), torch.randint(0, 50, (200,), generator=g))
    none = torch.zeros(0, dtype=torch.int64)
    return SplitPairs(train, valid, test, Pairs(none, none), torch.ones(N_ITEMS, dtype=torch.bool),
                      torch.zeros(N_ITEMS, dtype=torch.bool), False, Pairs(none, none), torch.zeros(N_USERS, dtype=torch.bool))


def test_known_pairs_read_in_chunks_exclude_what_the_whole_list_excludes(cfg, monkeypatch):
    """Reference: the same ranking with the known pairs read whole (one chunk), and a numpy brute force."""
    from towers.search import scorer as scoring

    data = _warm_split()
    g = torch.Generator().manual_seed(8)
    scorer = Scorer(torch.randn(N_USERS, 3, generator=g), torch.randn(N_ITEMS, 3, generator=g))
    whole = evaluate_slices({"towers": scorer}, data, cfg)["warm"]["towers"]
    monkeypatch.setattr(scoring, "CELLS_CHUNK", 97)  # training pairs read 97 at a time, then validation's
    assert evaluate_slices({"towers": scorer}, data, cfg)["warm"]["towers"] == whole
    s = (scorer.query_vectors @ scorer.item_vectors.T).numpy()
    known = {(int(a), int(b)) for p in (data.train, data.valid) for a, b in zip(p.query, p.candidate)}
    recalls = []
    q, c = data.test.query.numpy(), data.test.candidate.numpy()
    for u in np.unique(q):
        pos = {int(i) for i in c[q == u] if (int(u), int(i)) not in known}
        if pos:
            allowed = np.array([i for i in range(N_ITEMS) if (int(u), i) not in known])
            top = allowed[np.argsort(-s[u, allowed], kind="stable")[:K]]
            recalls.append(len(pos & set(top.tolist())) / len(pos))
    assert whole["recall@5"] == pytest.approx(np.mean(recalls))


def test_test_queries_ranks_a_seeded_sample_of_that_many_queries(tmp_path):
    raw = {"interactions": {"path": "log.csv", "query_column": "user", "candidate_column": "item"},
           "evaluation": {"top_k": [K], "test_queries": 7}}
    cfg = C.resolve(raw, tmp_path)
    data = _warm_split(300)
    g = torch.Generator().manual_seed(9)
    scorer = Scorer(torch.randn(N_USERS, 3, generator=g), torch.randn(N_ITEMS, 3, generator=g))
    first = evaluate_slices({"towers": scorer}, data, cfg)["warm"]["towers"]
    assert first["queries"] == 7
    assert evaluate_slices({"towers": scorer}, data, cfg)["warm"]["towers"] == first  # the same sample again
