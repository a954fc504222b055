"""The bfloat16 screen of retrieval: its error bound, its threshold rounding, and exact results through it."""

from __future__ import annotations

import numpy as np
import pytest
import torch

import towers.search.kernels as K
import towers.search.screen as S
import towers.search.tiles as T
from towers.search.retrieval import top_n

# every bfloat16 bit pattern and its value (the high half of a float32), numpy's own conversion
ALL_BITS = np.arange(1 << 16, dtype=np.uint32)
ALL_VALUES = (ALL_BITS << 16).view(np.float32)
ORDERED = np.sort(ALL_VALUES[~np.isnan(ALL_VALUES)])
LOWEST_FINITE = ORDERED[1]  # ORDERED[0] is -inf


def rounded_down(x) -> np.float32:
    """The largest bfloat16 <= x, but never below the lowest finite one (a search of numpy's sorted list)."""
    return max(ORDERED[np.searchsorted(ORDERED, np.float32(x), side="right") - 1], LOWEST_FINITE)


def bf16_product_error(q: torch.Tensor, x: torch.Tensor, bias: torch.Tensor | None):
    """(|screened - exact|, ERROR_BOUND * |q'| * |x'|, the absolute term for flushed values) for every
    pair, the exact score in float64."""
    width = S.padded_width(q.shape[1], bias is not None)
    qa = S.augment(q, 1.0 if bias is not None else None, width)
    xa = S.augment(x, bias, width)
    screened = (qa.bfloat16() @ xa.bfloat16().T).double().numpy()
    exact = q.double().numpy() @ x.double().numpy().T  # reference: numpy float64 product
    if bias is not None:
        exact = exact + bias.double().numpy()
    qn, xn = qa.double().norm(dim=1).numpy(), xa.double().norm(dim=1).numpy()
    flushed = 2 * S.FLUSHED * (np.sqrt(width) * (qn[:, None] + xn[None, :]) + 1)
    return np.abs(screened - exact), S.ERROR_BOUND * np.outer(qn, xn), flushed


@pytest.mark.parametrize("k", [1, 7, 64, 65, 256])
@pytest.mark.parametrize("with_bias", [False, True])
def test_screened_scores_stay_within_the_bound(k, with_bias):
    g = torch.Generator().manual_seed(k + 1000 * with_bias)
    # magnitudes over six decades, and coordinates just off the bfloat16 grid (the worst rounding)
    q = torch.randn(40, k, generator=g) * torch.logspace(-3, 3, 40).unsqueeze(1)
    x = torch.randn(300, k, generator=g) * torch.logspace(-3, 3, 300)[torch.randperm(300, generator=g)].unsqueeze(1)
    x[:50] = 1.0 + 3 * 2.0 ** -10  # halfway between bfloat16 neighbours of 1: rounds by the full half step
    q[:5] = 1.0 + 3 * 2.0 ** -10
    bias = torch.randn(300, generator=g) * 100 if with_bias else None
    err, bound, _ = bf16_product_error(q, x, bias)
    assert (err <= bound).all()
    # the bound is not vacuous: the rounding really moves scores by a sizeable share of it
    assert (err / bound).max() > 0.05


def test_values_below_the_normal_range_are_covered_by_the_absolute_term(monkeypatch):
    # queries whose every coordinate is below 2^-126 (subnormal), items near 1e30: bfloat16 rounds
    # such values with an absolute, not a relative, error, so the relative bound alone fails
    g = torch.Generator().manual_seed(4)
    q = torch.randn(50, 8, generator=g) * 1e-39
    x = torch.randn(200, 8, generator=g) * 1e30
    err, bound, flushed = bf16_product_error(q, x, None)
    assert (err > bound).any()  # the relative bound alone is not enough here
    assert (err <= bound + flushed).all()
    # and through the search: the same answer as numpy float64 brute force
    monkeypatch.setattr(S, "MODE", "always")
    idx, val = top_n(q, x, 10)
    full = q.double().numpy() @ x.double().numpy().T  # reference: numpy float64
    expect = -np.sort(-full, axis=1)[:, :10]
    np.testing.assert_allclose(val.numpy(), expect, rtol=1e-5)
    np.testing.assert_allclose(np.take_along_axis(full, idx.numpy(), 1), expect, rtol=1e-5)


def test_rounding_is_the_largest_bfloat16_at_most_the_threshold():
    rng = np.random.default_rng(5)
    xs = np.concatenate([
        rng.normal(size=2000) * 10.0 ** rng.integers(-30, 30, 2000),
        [0.0, -0.0, 1e-45, -1e-45, 1.0, -1.0, 3.0, -3.0, np.finfo(np.float32).max, np.finfo(np.float32).min,
         -np.inf, np.inf],
        ORDERED[rng.integers(1, len(ORDERED) - 1, 500)],  # values on the grid stay where they are
    ]).astype(np.float32)
    scratch = np.empty(1, np.float32)
    for x in xs:
        up, ts, tu = K._bf16_at_most(np.float32(x), scratch, scratch.view(np.uint32))
        got = ALL_VALUES[np.uint16(tu if not up else np.uint16(ts))]
        expect = rounded_down(x)  # reference: numpy's sorted list of every bfloat16 value
        assert got == expect or (x == 0 and got == 0), (x, got, expect)  # -0 and +0 are the same threshold
        assert up == (expect > 0)


@pytest.mark.parametrize("threshold", [-np.inf, -1e30, -2.5, -1e-40, 0.0, 1e-40, 0.3, 7.0, 1e30])
def test_span_test_passes_exactly_the_scores_at_the_threshold(threshold):
    scratch = np.empty(1, np.float32)
    up, ts, tu = K._bf16_at_most(np.float32(threshold), scratch, scratch.view(np.uint32))
    passes = np.array([K._reaches(np.int16(np.uint16(b)), np.uint16(b), up, ts, tu) for b in ALL_BITS])
    value = ALL_VALUES
    real = ~np.isnan(value)
    floor_value = rounded_down(threshold)
    # reference: numpy's float comparison with the rounded threshold; -inf (excluded) never passes
    expect = (value >= floor_value) & (value != -np.inf)
    np.testing.assert_array_equal(passes[real], expect[real])


def test_search_through_the_screen_is_exact_where_bfloat16_cannot_tell_items_apart(monkeypatch):
    # every item rounds to the same bfloat16 vector, yet their float32 scores differ: only the
    # float32 rescoring of everything near the floor can order them
    monkeypatch.setattr(S, "MODE", "always")
    g = torch.Generator().manual_seed(8)
    ni, k = 3000, 16
    items = 1.0 + torch.rand(ni, k, generator=g) * 2.0 ** -9
    q = 1.0 + torch.rand(50, k, generator=g) * 2.0 ** -9
    bias = torch.rand(ni, generator=g) * 1e-3
    idx, val = top_n(q, items, 20, bias)
    full = q.double().numpy() @ items.double().numpy().T + bias.double().numpy()  # reference: numpy float64
    expect = -np.sort(-full, axis=1)[:, :20]
    np.testing.assert_allclose(val.numpy(), expect, rtol=1e-6)
    np.testing.assert_allclose(np.take_along_axis(full, idx.numpy(), 1), expect, rtol=1e-6)


def test_screened_and_float32_searches_agree(monkeypatch):
    g = torch.Generator().manual_seed(9)
    q, items = torch.randn(700, 24, generator=g), torch.randn(9000, 24, generator=g)
    bias = torch.randn(9000, generator=g)
    ex_r = torch.sort(torch.randint(0, 700, (7000,), generator=g)).values
    ex_c = torch.randint(0, 9000, (7000,), generator=g)
    monkeypatch.setattr(S, "MODE", "never")
    i32, v32 = top_n(q, items, 60, bias, ex_r, ex_c)
    monkeypatch.setattr(S, "MODE", "always")
    i16, v16 = top_n(q, items, 60, bias, ex_r, ex_c)
    np.testing.assert_allclose(v16.numpy(), v32.numpy(), rtol=1e-5, atol=1e-5)
    # the same items, up to the order of scores equal to float32 rounding
    assert all(set(a) == set(b) for a, b in zip(i16.tolist(), i32.tolist()))


def test_the_screen_is_used_only_where_it_can_help(monkeypatch):
    monkeypatch.setattr(S, "MODE", "auto")
    assert not S.wanted(4, 10)  # too small to be worth it
    monkeypatch.setattr(S, "MODE", "always")
    assert S.wanted(4, 10)
    monkeypatch.setattr(S, "MODE", "never")
    assert not S.wanted(4000, 100000)
    items = torch.randn(100, 8)
    assert S.ScreenedCatalog(T.Layout(items, None)).usable
    items[3, 2] = float("nan")  # the bound needs finite inputs
    assert not S.ScreenedCatalog(T.Layout(items, None)).usable
    assert not S.ScreenedCatalog(T.Layout(torch.randn(100, 8), torch.tensor([0.0] * 99 + [float("inf")]))).usable


@pytest.mark.parametrize("bad", [float("nan"), float("inf")])
def test_queries_and_items_that_are_not_finite_give_the_float32_answer(monkeypatch, bad):
    g = torch.Generator().manual_seed(10)
    q, items, bias = torch.randn(30, 6, generator=g), torch.randn(500, 6, generator=g), torch.randn(500, generator=g)
    q[4, 1] = bad  # one query row the bound cannot cover
    answers = {}
    for mode in ("never", "always"):
        monkeypatch.setattr(S, "MODE", mode)
        answers[mode] = top_n(q, items, 7, bias)
    torch.testing.assert_close(answers["always"][1], answers["never"][1], equal_nan=True)
    np.testing.assert_array_equal(answers["always"][0][np.arange(30) != 4], answers["never"][0][np.arange(30) != 4])
    items[17, 0] = bad  # a catalog the bound cannot cover is searched in float32 throughout
    monkeypatch.setattr(S, "MODE", "always")
    i16, v16 = top_n(q, items, 7, bias)
    monkeypatch.setattr(S, "MODE", "never")
    i32, v32 = top_n(q, items, 7, bias)
    assert torch.equal(i16, i32)
