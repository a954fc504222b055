"""EASE and item-kNN reference scorers against direct computations with numpy and scikit-learn."""

import numpy as np
import pytest
import torch
from sklearn.metrics.pairwise import cosine_similarity

from towers.evaluation import references as R


def _random_history(n_q=40, n_i=25, nnz=220, seed=0, include_self=False):
    rng = np.random.default_rng(seed)
    q = torch.from_numpy(rng.integers(0, n_q, nnz))
    i = torch.from_numpy(rng.integers(0, n_i, nnz))
    return R.History.from_pairs(q, i, n_q, n_i, include_self=include_self), q.numpy(), i.numpy()


def _dense_x(n_q, n_i, q, i, include_self=False):
    x = np.zeros((n_q, n_i))
    x[q, i] = 1.0  # repeats collapse: the history is binary
    if include_self:
        own = np.arange(min(n_q, n_i))
        x[own, own] = 1.0
    return x


@pytest.mark.parametrize("include_self", [False, True])
def test_history_dense_rows_equal_a_numpy_indicator_matrix(include_self):
    h, q, i = _random_history(include_self=include_self)
    x = _dense_x(40, 25, q, i, include_self)
    rows = torch.tensor([3, 0, 39, 3, 17])
    np.testing.assert_array_equal(h.dense(rows).numpy(), x[rows.numpy()])
    c = h.cooccurrence().to_dense().numpy()
    np.testing.assert_allclose(c, x.T @ x)  # X^T X by numpy


@pytest.mark.parametrize("penalty", [0.5, 7.0])
def test_ease_equals_the_closed_form_by_numpy_inverse(penalty):
    # Steck (WWW 2019), eq. for the closed form: P = (X^T X + lambda I)^-1, B = I - P diag(1/diag P)
    h, q, i = _random_history()
    x = _dense_x(40, 25, q, i)
    p = np.linalg.inv(x.T @ x + penalty * np.eye(25))
    b = np.eye(25) - p / np.diag(p)[None, :]
    s = R.EaseFit(h).solve(penalty)
    np.testing.assert_allclose(s.matrix().numpy(), b, atol=2e-5)
    assert np.all(np.diag(s.matrix().numpy()) == 0.0)  # the zero-diagonal constraint holds exactly
    rows = torch.arange(40)
    np.testing.assert_allclose(s.score_rows(rows).numpy(), x @ b, atol=1e-4)


@pytest.mark.parametrize("neighbours", [3, 24])
def test_knn_scores_equal_sklearn_cosine_products(neighbours):
    h, q, i = _random_history(seed=3)
    x = _dense_x(40, 25, q, i)
    sim = cosine_similarity(x.T)  # scikit-learn: item columns' cosine similarity
    np.fill_diagonal(sim, 0.0)
    kept = np.zeros_like(sim)
    for r in range(25):  # brute force: each item's `neighbours` most similar other items (ties: smaller index)
        order = sorted(range(25), key=lambda j: (-sim[r, j], j))
        order = [j for j in order if j != r and sim[r, j] > 0][:neighbours]
        kept[r, order] = sim[r, order]
    s = R.KnnFit(h).solve(neighbours)
    np.testing.assert_allclose(s.matrix().numpy(), kept.T, atol=1e-6)  # W[j, i] = s(i, j)
    np.testing.assert_allclose(s.score_rows(torch.arange(40)).numpy(), x @ kept.T, atol=1e-5)


@pytest.mark.parametrize("cells", [1, 7, 1 << 20])
def test_sparse_and_dense_knn_weights_score_alike(cells, monkeypatch):
    # the gather path (any piece size) against the dense product of the same W
    monkeypatch.setattr(R, "GATHER_CELLS", cells)
    monkeypatch.setattr(R, "DENSE_SHARE", 2.0)  # never dense
    h, q, i = _random_history(seed=8)
    s = R.KnnFit(h).solve(5)
    assert isinstance(s.weights, R.SparseRows)
    rows = torch.tensor([5, 0, 39, 5, 12])
    np.testing.assert_allclose(s.score_rows(rows).numpy(), h.dense(rows).numpy() @ s.matrix().numpy(), atol=1e-5)


def test_ease_penalty_is_the_one_the_judge_prefers():
    # the judge is any function of the scorer; here it prefers penalties near 50 on a log scale
    h, _, _ = _random_history(seed=5)
    target = 50.0
    chosen, tries = R.choose_ease(h, lambda s: -abs(np.log(s.setting["penalty"] / target)))
    assert len(tries) <= R.MOST_TRIES
    best = max(tries, key=lambda t: t["score"])
    assert chosen.setting["penalty"] == best["penalty"]
    assert abs(np.log(chosen.setting["penalty"] / target)) <= np.log(R.PENALTY_STEP) / 2 + 1e-9


def test_knn_neighbours_are_the_ones_the_judge_prefers():
    h, _, _ = _random_history(n_i=300, nnz=3000, seed=6)
    chosen, tries = R.choose_knn(h, lambda s: -abs(s.setting["neighbours"] - 50))
    assert chosen.setting["neighbours"] == 50
    assert [t["neighbours"] for t in tries] == [k for k in R.NEIGHBOUR_CHOICES if k < 299] + [299]
