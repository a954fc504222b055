"""Tile-by-tile counts of the candidates above and tied with held-out positives (towers/search/rank_counts.py)
against numpy brute force and the dense tensor reference (towers.evaluation.metrics.ranks_of_positives)."""

from __future__ import annotations

import numpy as np
import pytest
import torch

import towers.search.rank_counts as RC
import towers.search.tiles as T
from towers.evaluation import metrics as M


def make_case(seed: int, nq: int, ni: int, pos_per_row: int = 3, ex_per_row: int = 4, many_rows: int = 0,
              scale: float = 1.0, biases: bool = True, k: int = 6, zero_rows: int = 0):
    """Integer-valued vectors (products exact in any summation order, so many ties), half-integer item
    biases, float query biases; distinct positives and exclusions per row, disjoint. The first
    zero_rows queries have all-zero vectors: without biases they tie every candidate."""
    g = torch.Generator().manual_seed(seed)
    q = torch.randint(-2, 3, (nq, k), generator=g).float()
    q[:zero_rows] = 0.0
    items = torch.randint(-2, 3, (ni, k), generator=g).float()
    ib = torch.randint(-3, 4, (ni,), generator=g).float() * 0.5 if biases else None
    qb = torch.randn(nq, generator=g) if biases else None
    gb = 0.3 if biases else 0.0
    rows, cols, ex_r, ex_c = [], [], [], []
    for u in range(nq):
        perm = torch.randperm(ni, generator=g)
        n_pos = min(ni, 60 if u < many_rows else pos_per_row)
        n_ex = min(ni - n_pos, ex_per_row)
        rows += [u] * n_pos
        cols += perm[:n_pos].tolist()
        ex_r += [u] * n_ex
        ex_c += perm[n_pos:n_pos + n_ex].tolist()
    shuffle = torch.randperm(len(rows), generator=g)  # nothing may rely on positives grouped by row
    rows = torch.tensor(rows, dtype=torch.int64)[shuffle]
    cols = torch.tensor(cols, dtype=torch.int64)[shuffle]
    ex_shuffle = torch.randperm(len(ex_r), generator=g)
    ex_r = torch.tensor(ex_r, dtype=torch.int64)[ex_shuffle]
    ex_c = torch.tensor(ex_c, dtype=torch.int64)[ex_shuffle]
    return dict(query_vectors=q, item_vectors=items, rows=rows, items=cols, item_bias=ib,
                query_bias=qb, global_bias=gb, scale=scale, exclude_rows=ex_r, exclude_cols=ex_c)


def dense_scores(case) -> np.ndarray:
    """The float32 score matrix, finished in rank_counts' order of roundings, exclusions at -inf."""
    prod = (case["query_vectors"].double() @ case["item_vectors"].double().T).numpy().astype(np.float32)
    s = prod * np.float32(case["scale"])
    if case["item_bias"] is not None:
        s = s + case["item_bias"].numpy()
    if case["query_bias"] is not None:
        s = s + case["query_bias"].numpy()[:, None]
    s = s + np.float32(case["global_bias"])
    s[case["exclude_rows"].numpy(), case["exclude_cols"].numpy()] = -np.inf
    return s


def numpy_counts(s: np.ndarray, rows: np.ndarray, cols: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Reference: per positive, the scores of its row above its own and those equal to it, itself left out."""
    ahead, tied = np.empty(len(rows), np.int64), np.empty(len(rows), np.int64)
    for p, (r, c) in enumerate(zip(rows, cols)):
        others = np.delete(s[r], c)  # excluded (-inf) scores are never above or equal to a finite one
        ahead[p] = int((others > s[r, c]).sum())
        tied[p] = int((others == s[r, c]).sum())
    return ahead, tied


def check_case(case):
    ahead, tied, cands = RC.rank_counts(**case)
    s = dense_scores(case)
    want_ahead, want_tied = numpy_counts(s, case["rows"].numpy(), case["items"].numpy())
    assert np.array_equal(ahead.numpy(), want_ahead)  # reference: numpy brute force per positive
    assert np.array_equal(tied.numpy(), want_tied)  # reference: numpy brute force per positive
    dense_ahead, dense_tied = M.ranks_of_positives(torch.from_numpy(s), case["rows"], case["items"])
    assert torch.equal(ahead, dense_ahead) and torch.equal(tied, dense_tied)  # reference: the dense count in metrics.py
    assert np.array_equal(cands.numpy(), (s > -np.inf).sum(1))  # reference: numpy count of finite scores
    return ahead, tied


def test_hand_worked_counts():
    # one query (vector [1]), items [1], [1], [2], [1], [0], [1] score 1, 1, 2, 1, 0, 1; item 5 excluded.
    # positive item 0: ahead = {item 2} = 1, tied = {items 1, 3} = 2 (itself and excluded item 5 left out);
    # positive item 4: ahead = {0, 1, 2, 3} = 4, tied = none = 0; candidates: 6 items - 1 excluded = 5
    q = torch.tensor([[1.0]])
    x = torch.tensor([[1.0], [1.0], [2.0], [1.0], [0.0], [1.0]])
    ahead, tied, cands = RC.rank_counts(q, x, torch.tensor([0, 0]), torch.tensor([0, 4]),
                                        exclude_rows=torch.tensor([0]), exclude_cols=torch.tensor([5]))
    assert ahead.tolist() == [1, 4] and tied.tolist() == [2, 0] and cands.tolist() == [5]  # hand-worked above


@pytest.mark.parametrize("seed", range(4))
def test_ranks_equal_numpy_and_dense_reference(count_tiles, seed):
    # ties everywhere (integer products, half-integer biases), exclusions, a padded last chunk
    check_case(make_case(seed, nq=25 + 9 * seed, ni=300 + 37 * seed, scale=[1.0, 1 / 0.07, 0.5, 3.0][seed],
                         biases=seed != 2))


@pytest.mark.parametrize("ni", [1, 3, 15, 17, 40])
def test_catalogs_smaller_than_one_chunk(ni):
    check_case(make_case(100 + ni, nq=7, ni=ni, pos_per_row=min(2, ni), ex_per_row=ni // 3))


def test_one_query():
    # a block of one row: its product is padded to PRODUCT_ROWS rows
    check_case(make_case(5, nq=1, ni=500, pos_per_row=4))


@pytest.mark.parametrize("biases", [True, False])
@pytest.mark.parametrize("path", ["default", "passes", "search"])
def test_many_positives_per_row(count_tiles, monkeypatch, path, biases):
    # rows of 60 positives among 150 items, many tied with each other and with other columns; without
    # biases the two all-zero rows tie every candidate (the many-positives search's second search)
    if path == "passes":
        monkeypatch.setattr(RC, "MANY", 10 ** 9)
    elif path == "search":
        monkeypatch.setattr(RC, "MANY", 2)
        monkeypatch.setattr(RC, "SEARCH_COST", 0)
    ahead, tied = check_case(make_case(7, nq=12, ni=150, many_rows=8, k=3, biases=biases, zero_rows=2))
    assert int((tied > 0).sum()) > len(tied) // 2  # ties are the common case here, not an accident


def test_search_and_passes_agree_on_continuous_scores(monkeypatch):
    g = torch.Generator().manual_seed(8)
    nq, ni = 20, 700
    rows = torch.arange(nq).repeat_interleave(50)
    cols = torch.stack([torch.randperm(ni, generator=g)[:50] for _ in range(nq)]).flatten()
    args = (torch.randn(nq, 5, generator=g), torch.randn(ni, 5, generator=g), rows, cols)
    monkeypatch.setattr(RC, "MANY", 10 ** 9)
    passes = RC.rank_counts(*args)
    monkeypatch.setattr(RC, "MANY", 2)
    monkeypatch.setattr(RC, "SEARCH_COST", 0)
    search = RC.rank_counts(*args)
    assert all(torch.equal(x, y) for x, y in zip(passes, search))
    assert int(passes[0].max()) > 400  # low positives too, not only the top of each row
    assert int(passes[1].max()) == 0  # reference: continuous random scores have no ties (almost surely)


@pytest.mark.parametrize("seed", range(2))
def test_worker_threads(count_tiles, two_threads, seed):
    # enough queries that each of two threads takes whole blocks; the thread count is restored
    check_case(make_case(40 + seed, nq=300 + 60 * seed, ni=260 + 90 * seed, many_rows=3))
    assert torch.get_num_threads() == 2


def test_same_ranks_whatever_the_blocks(two_threads, monkeypatch):
    # ranks must not move with the cut into blocks (one thread, two, blocks of one row): items come in
    # near-copies, so their order is decided by the last bits of the products, which MKL rounds
    # differently for products of few rows unless they are padded to PRODUCT_ROWS
    g = torch.Generator().manual_seed(9)
    nq, ni = 300, 3000
    base = torch.randn(ni // 10, 16, generator=g)
    items = base.repeat_interleave(10, 0) * (1 + 1e-6 * torch.randn(ni, 1, generator=g))
    args = (torch.randn(nq, 16, generator=g), items, torch.arange(nq).repeat(4),
            torch.randint(0, ni, (4 * nq,), generator=g))
    two = RC.rank_counts(*args)
    torch.set_num_threads(1)
    one = RC.rank_counts(*args)
    monkeypatch.setattr(T, "BLOCK_ENTRIES", 1 << 13)  # blocks of one row
    torch.set_num_threads(2)
    tiny = RC.rank_counts(*args)
    assert all(torch.equal(x, y) and torch.equal(x, z) for x, y, z in zip(one, two, tiny))


def test_positive_scores_that_differ_from_the_tiles_are_counted_again(monkeypatch):
    # own scores one float step too high: every block is counted a second time with the tiles' values
    own_scores = RC._own_scores
    monkeypatch.setattr(RC, "_own_scores", lambda *a: np.nextafter(own_scores(*a), np.float32(np.inf)))
    sweeps = []
    count_block = RC._count_block
    monkeypatch.setattr(RC, "_count_block", lambda *a: sweeps.append(1) or count_block(*a))
    monkeypatch.setattr(T, "BLOCK_ENTRIES", 1 << 11)  # several blocks
    monkeypatch.setattr(T, "SUB_TILE", 64)
    check_case(make_case(11, nq=40, ni=300))
    assert len(sweeps) >= 4 and len(sweeps) % 2 == 0


def test_excluded_positive_is_refused():
    case = make_case(12, nq=5, ni=50)
    case["exclude_rows"] = torch.cat([case["exclude_rows"], case["rows"][:1]])
    case["exclude_cols"] = torch.cat([case["exclude_cols"], case["items"][:1]])
    with pytest.raises(ValueError, match="finite score"):
        RC.rank_counts(**case)
