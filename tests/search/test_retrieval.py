"""Blocked, pruned top-N retrieval against numpy brute force (exclusions, biases, ties, padding, tiles)."""

from __future__ import annotations

import numpy as np
import pytest
import torch

import towers.search.retrieval as R
import towers.search.screen as S
import towers.search.tiles as T
from towers.search.retrieval import top_n


def brute_force(q, items, bias, ex_r, ex_c, scale):
    """Reference: the full score matrix in float64 numpy, excluded pairs set to -inf."""
    full = (q.double().numpy() * scale) @ items.double().numpy().T
    if bias is not None:
        full = full + bias.double().numpy()
    if ex_r is not None:
        full[ex_r.numpy(), ex_c.numpy()] = -np.inf
    return full


def check_against_brute_force(q, items, n, bias=None, ex_r=None, ex_c=None, scale=1.0):
    idx, val = top_n(q, items, n, bias, ex_r, ex_c, scale)
    full = brute_force(q, items, bias, ex_r, ex_c, scale)
    n_eff = min(n, items.shape[0])
    expect = -np.sort(-full, axis=1)[:, :n_eff]  # reference: numpy sort of every score
    assert idx.shape == val.shape == (q.shape[0], n_eff)
    np.testing.assert_allclose(val.numpy(), expect, rtol=1e-5, atol=1e-5)
    found = idx.numpy() >= 0
    assert np.array_equal(found, np.isfinite(expect))  # -1 exactly where fewer than n items are eligible
    rows = np.arange(q.shape[0])[:, None]
    at = np.where(found, full[rows, np.maximum(idx.numpy(), 0)], -np.inf)
    np.testing.assert_allclose(at, expect, rtol=1e-5, atol=1e-5)  # each index really has its score
    for r in range(q.shape[0]):
        chosen = idx.numpy()[r][found[r]]
        assert len(set(chosen.tolist())) == len(chosen)
    return idx, val


@pytest.fixture(params=["never", "always"], ids=["float32", "bf16-screen"])
def screening(request, monkeypatch):
    """Both ways of scoring chunks after the first step: float32 products, and the bfloat16 screen
    with float32 rescoring (used where bfloat16 products are fast; forced here on any processor)."""
    monkeypatch.setattr(S, "MODE", request.param)


@pytest.fixture(params=[(1 << 22, 2048, 4), (1 << 10, 64, 2), (1 << 12, 48, 3), (1 << 9, 32, 1)],
                ids=["default", "tiny-tiles", "odd-tiles", "one-group-tiles"])
def tiles(request, monkeypatch, screening):
    """The default tiles, and tiles small enough that the pruned merge runs over many steps."""
    entries, sub_tile, sub_tiles = request.param
    monkeypatch.setattr(T, "BLOCK_ENTRIES", entries)
    monkeypatch.setattr(T, "SUB_TILE", sub_tile)
    monkeypatch.setattr(T, "SUB_TILES", sub_tiles)


@pytest.mark.parametrize("seed", [*range(5), pytest.param(5, marks=pytest.mark.slow)])  # seed 5: the largest case
def test_top_n_equals_brute_force(tiles, seed):
    g = torch.Generator().manual_seed(seed)
    nq, ni, k = 20 + 7 * seed, 300 + 170 * seed, 8
    q = torch.randn(nq, k, generator=g) * torch.rand(nq, 1, generator=g).add(0.2)
    items = torch.randn(ni, k, generator=g)
    bias = torch.randn(ni, generator=g) if seed % 2 else None
    m = 5 * nq
    ex_r = torch.sort(torch.randint(0, nq, (m,), generator=g)).values
    ex_c = torch.randint(0, ni, (m,), generator=g)
    n = [1, 7, 50, 120, 10, 300][seed]
    check_against_brute_force(q, items, n, bias, ex_r, ex_c, scale=0.5 if seed == 3 else 1.0)


def test_rows_with_few_eligible_items_are_padded(tiles):
    g = torch.Generator().manual_seed(11)
    q, items = torch.randn(5, 4, generator=g), torch.randn(300, 4, generator=g)
    # row 0: every item but 3 excluded; row 2: every item excluded
    ex_r = torch.cat([torch.zeros(297, dtype=torch.int64), torch.full((300,), 2)])
    ex_c = torch.cat([torch.arange(3, 300), torch.arange(300)])
    idx, val = check_against_brute_force(q, items, 10, None, ex_r, ex_c)
    assert (idx[0, 3:] == -1).all() and torch.isneginf(val[0, 3:]).all()
    assert (idx[2] == -1).all()


def test_ties_keep_n_items_of_the_best_score(tiles):
    # many equal scores: the answer must still hold n distinct items, each with the true top scores
    g = torch.Generator().manual_seed(12)
    q = torch.ones(6, 2)
    items = torch.randint(0, 3, (1000, 2), generator=g).float()
    check_against_brute_force(q, items, 40)


def test_more_asked_than_items(tiles):
    g = torch.Generator().manual_seed(13)
    check_against_brute_force(torch.randn(3, 4, generator=g), torch.randn(20, 4, generator=g), 50)


def test_empty_inputs():
    idx, val = top_n(torch.zeros(0, 4), torch.randn(10, 4), 5)
    assert idx.shape == (0, 5)
    idx, val = top_n(torch.randn(3, 4), torch.zeros(0, 4), 5)
    assert idx.shape == (3, 0)


def test_score_tile_matches_matmul():
    g = torch.Generator().manual_seed(14)
    q, items, bias = torch.randn(7, 5, generator=g), torch.randn(9, 5, generator=g), torch.randn(9, generator=g)
    out = torch.empty(7, 9)
    T.score_tile(q, items, bias, out)
    # reference: numpy matrix product plus the bias row
    np.testing.assert_allclose(out.numpy(), q.numpy() @ items.numpy().T + bias.numpy(), rtol=1e-5, atol=1e-5)


def test_a_guess_that_proves_too_high_is_searched_again(screening, monkeypatch):
    # a negative margin makes every guess far too high: the rows must be searched again from the safe
    # floor and still equal brute force
    monkeypatch.setattr(T, "SUB_TILE", 64)
    monkeypatch.setattr(R, "GUESS_SIGMAS", -30.0)
    calls = []
    search = R._search

    def spy(queries, n, layout, screened, ex_r, ex_c, guess):
        calls.append((guess, queries.shape[0]))
        return search(queries, n, layout, screened, ex_r, ex_c, guess)

    monkeypatch.setattr(R, "_search", spy)
    g = torch.Generator().manual_seed(21)
    q, items = torch.randn(40, 6, generator=g), torch.randn(3000, 6, generator=g)
    ex_r = torch.sort(torch.randint(0, 40, (200,), generator=g)).values
    ex_c = torch.randint(0, 3000, (200,), generator=g)
    check_against_brute_force(q, items, 10, torch.randn(3000, generator=g), ex_r, ex_c)
    assert calls[0] == (True, 40) and calls[1][0] is False and calls[1][1] > 0


@pytest.mark.parametrize("seed", [0, 1, pytest.param(2, marks=pytest.mark.slow)])  # seed 2: the largest case
def test_blocks_on_worker_threads_equal_brute_force(tiles, two_threads, seed):
    # enough queries that each of two threads takes whole blocks, does their products on one core
    # and scans them; the shared thread count is restored afterwards
    g = torch.Generator().manual_seed(40 + seed)
    nq, ni = 300 + 150 * seed, 900 + 400 * seed
    q, items = torch.randn(nq, 6, generator=g), torch.randn(ni, 6, generator=g)
    ex_r = torch.sort(torch.randint(0, nq, (4 * nq,), generator=g)).values
    ex_c = torch.randint(0, ni, (4 * nq,), generator=g)
    check_against_brute_force(q, items, [5, 40, 130][seed], torch.randn(ni, generator=g), ex_r, ex_c)
    assert torch.get_num_threads() == 2


def test_worker_threads_search_failed_guesses_again(two_threads, screening, monkeypatch):
    # every guess far too high, on the worker-thread path: the rows of every block are searched again
    monkeypatch.setattr(T, "SUB_TILE", 64)
    monkeypatch.setattr(T, "BLOCK_ENTRIES", 1 << 14)
    monkeypatch.setattr(R, "GUESS_SIGMAS", -30.0)
    g = torch.Generator().manual_seed(23)
    q, items = torch.randn(400, 6, generator=g), torch.randn(2000, 6, generator=g)
    check_against_brute_force(q, items, 12, torch.randn(2000, generator=g))


def test_same_answer_on_one_thread_and_on_two(two_threads, screening):
    g = torch.Generator().manual_seed(24)
    q, items = torch.randn(500, 8, generator=g), torch.randn(5000, 8, generator=g)
    two = top_n(q, items, 30)
    torch.set_num_threads(1)
    one = top_n(q, items, 30)
    assert torch.equal(one[0], two[0]) and torch.equal(one[1], two[1])


def test_inputs_that_require_grad_are_searched_without_it():
    # worker threads start with autograd on: the search must not try to record the products
    g = torch.Generator().manual_seed(25)
    q = torch.randn(300, 4, generator=g).requires_grad_()
    items = torch.randn(700, 4, generator=g).requires_grad_()
    idx, val = top_n(q, items, 9)
    assert not val.requires_grad
    check_against_brute_force(q.detach(), items.detach(), 9)


def test_catalog_ordered_by_score_still_exact(tiles):
    # items sorted so the best come first (a popularity-ordered catalog): the first step's spread
    # sample and the safe floor keep the answer exact
    g = torch.Generator().manual_seed(22)
    q = torch.randn(30, 5, generator=g).abs()
    items = torch.randn(2500, 5, generator=g).abs()
    items = items[torch.argsort(items.sum(1), descending=True)]
    check_against_brute_force(q, items, 25, torch.linspace(2.0, -2.0, 2500))


def test_keys_sort_as_scores_then_items():
    # reference: numpy's lexsort of (item, score) gives the order the int64 keys must have
    rng = np.random.default_rng(23)
    score = np.concatenate([rng.normal(size=500), [0.0, np.inf, -np.inf, 1e-40, -1e-40, 3.5, 3.5]]).astype(np.float32)
    item = rng.integers(0, 2 ** 31, len(score))
    keys = R.encode(score, item)
    order = np.argsort(keys, kind="stable")
    expect = np.lexsort((item, score))
    np.testing.assert_array_equal(score[order], score[expect])
    np.testing.assert_array_equal(item[order], item[expect])
    # -0.0 and +0.0 are equal scores; their keys put -0.0 first, a tie order like any other
    assert R.encode(np.float32([-0.0]), np.int64([5]))[0] < R.encode(np.float32([0.0]), np.int64([0]))[0]
    back_score, back_item = R.decode(keys)
    np.testing.assert_array_equal(back_score, score)
    np.testing.assert_array_equal(back_item, item)


@pytest.mark.parametrize("seed", range(4))
def test_kernel_keeps_the_n_largest(seed):
    from towers.search import kernels as K

    rng = np.random.default_rng(24 + seed)
    c, n = 400, [1, 37, 100, 399][seed]
    s = rng.integers(0, 20 if seed % 2 else 10 ** 6, c).astype(np.float32)  # odd seeds: many ties
    it = np.arange(c, dtype=np.int64)
    orig = s.copy()
    K._keep_best(s, it, c, n)
    # reference: numpy's partition gives the n largest values
    np.testing.assert_array_equal(np.sort(s[:n]), np.sort(np.partition(orig, c - n)[c - n:]))
    np.testing.assert_array_equal(orig[it], s)  # items moved with their scores


def test_top_n_matches_brute_force_with_exclusions():
    g = torch.Generator().manual_seed(1)
    q, items = torch.randn(37, 8, generator=g), torch.randn(501, 8, generator=g)
    bias = torch.randn(501, generator=g)
    ex_r = torch.sort(torch.randint(0, 37, (200,), generator=g)).values
    ex_c = torch.randint(0, 501, (200,), generator=g)
    idx, val = top_n(q, items, 10, bias, ex_r, ex_c)
    full = (q @ items.T + bias).numpy()
    full[ex_r.numpy(), ex_c.numpy()] = -np.inf
    expect = np.argsort(-full, axis=1)[:, :10]  # reference: numpy argsort brute force
    assert np.array_equal(idx.numpy(), expect)
    np.testing.assert_allclose(val.numpy(), np.take_along_axis(full, expect, 1), rtol=1e-5)

