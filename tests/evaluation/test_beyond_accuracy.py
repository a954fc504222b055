"""Beyond-accuracy measures in towers/evaluation/metrics.py: catalog coverage and popularity percentile of
top-K lists against numpy brute force and scipy, and per-group means against pandas."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
import torch
from scipy.stats import percentileofscore

from towers.evaluation import metrics as M


def top_lists(seed: int, nq: int, k: int, n: int) -> torch.Tensor:
    """Random (nq, k) top-K lists of distinct columns in [0, n), a few rows cut short with -1 padding."""
    rng = np.random.default_rng(seed)
    top = np.stack([rng.permutation(n)[:k] for _ in range(nq)]).astype(np.int64)
    for q in rng.choice(nq, nq // 3, replace=False):
        top[q, rng.integers(0, k + 1):] = -1
    return torch.from_numpy(top)


def test_coverage_hand_worked():
    # columns 0, 2, 3 appear (the -1s are padding) among 5 candidates: 3/5
    top = torch.tensor([[2, 0, -1], [2, 3, 0]])
    assert M.catalog_coverage(top, 5) == pytest.approx(3 / 5, abs=1e-15)
    assert M.catalog_coverage(torch.full((2, 3), -1), 5) == 0.0
    assert math.isnan(M.catalog_coverage(torch.full((1, 2), -1), 0))


@pytest.mark.parametrize("seed", range(3))
def test_coverage_against_numpy(seed):
    n = [30, 200, 1000][seed]
    top = top_lists(seed, nq=25, k=10, n=n)
    flat = top.numpy().ravel()
    want = len(np.unique(flat[flat >= 0])) / n  # reference: numpy brute force (distinct shown columns)
    assert M.catalog_coverage(top, n) == pytest.approx(want, abs=1e-15)


def test_popularity_percentile_hand_worked():
    # counts [0, 0, 5, 10]: column 0 has none below and 2 at or below: 100 x (0 + 2)/2/4 = 25;
    # column 2: 2 below, 3 at or below: 62.5; column 3: 3 and 4: 87.5. Slots 0, 2, 3, 3: mean 65.625
    counts = torch.tensor([0, 0, 5, 10])
    top = torch.tensor([[0, 2, -1], [3, 3, -1]])
    assert M.popularity_percentile(top, counts) == pytest.approx((25 + 62.5 + 87.5 + 87.5) / 4, abs=1e-12)
    assert math.isnan(M.popularity_percentile(torch.full((2, 2), -1), counts))


@pytest.mark.parametrize("seed", range(3))
def test_popularity_percentile_against_scipy(seed):
    n = [40, 300, 1000][seed]
    rng = np.random.default_rng(10 + seed)
    counts = rng.poisson([0.5, 3.0, 20.0][seed], n)  # small counts: many ties, zeros included
    top = top_lists(seed, nq=30, k=8, n=n)
    flat = top.numpy().ravel()
    flat = flat[flat >= 0]
    # reference: scipy.stats.percentileofscore(kind="mean"), one recommended slot at a time
    want = np.mean([percentileofscore(counts, counts[c], kind="mean") for c in flat])
    assert M.popularity_percentile(top, torch.from_numpy(counts)) == pytest.approx(want, rel=1e-12)


def test_bad_top_items_are_refused():
    with pytest.raises(ValueError, match="2-D"):
        M.catalog_coverage(torch.tensor([1, 2]), 5)
    with pytest.raises(ValueError, match=r"\[0, 5\)"):
        M.catalog_coverage(torch.tensor([[1, 5]]), 5)
    with pytest.raises(ValueError, match=r"\[0, 3\)"):
        M.popularity_percentile(torch.tensor([[1, -2]]), torch.tensor([1, 2, 3]))
    with pytest.raises(ValueError, match="1-D"):
        M.popularity_percentile(torch.tensor([[1]]), torch.ones(2, 2))


def test_mean_by_group_against_pandas():
    rng = np.random.default_rng(20)
    nq, n_groups = 300, 7  # group 6 gets no query
    group = rng.integers(0, 6, nq)
    values = {"recall@10": rng.random(nq), "mrr": rng.random(nq), "auc": rng.random(nq)}
    values["mrr"][rng.random(nq) < 0.3] = np.nan  # queries where a metric is undefined
    values["auc"][group == 2] = np.nan  # a group where it is undefined for every query
    got = M.mean_by_group({k: torch.from_numpy(v) for k, v in values.items()}, torch.from_numpy(group), n_groups)
    frame = pd.DataFrame(values).assign(group=group)
    # reference: pandas groupby mean (skips NaN) and size, with the empty group added
    want = frame.groupby("group").mean().reindex(range(n_groups))
    sizes = frame.groupby("group").size().reindex(range(n_groups), fill_value=0)
    for name in values:
        np.testing.assert_allclose(got[name].numpy(), want[name].to_numpy(), rtol=1e-13, equal_nan=True)
    assert got["queries"].tolist() == sizes.tolist()
    assert got["queries"].dtype == torch.int64 and got["mrr"].dtype == torch.float64


def test_mean_by_group_refuses_bad_input():
    v = {"mrr": torch.tensor([0.5, 1.0])}
    with pytest.raises(ValueError, match=r"\[0, 2\)"):
        M.mean_by_group(v, torch.tensor([0, 2]), 2)
    with pytest.raises(ValueError, match="shape of group"):
        M.mean_by_group(v, torch.tensor([0, 1, 1]), 2)
    with pytest.raises(ValueError, match="'queries'"):
        M.mean_by_group({"queries": torch.tensor([1.0, 2.0])}, torch.tensor([0, 1]), 2)
