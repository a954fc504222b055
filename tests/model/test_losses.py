"""Losses against torch's own implementations (torch.nn.functional), extreme logits included."""

from __future__ import annotations

import pytest
import torch
import torch.nn.functional as F

from towers.model import losses
from towers.model.losses import in_batch_softmax_loss


def _random_logits(gen, dtype):
    bulk = torch.randn(500, generator=gen, dtype=torch.float64) * 6
    extreme = torch.tensor([-80.0, -50.0, -20.0, -1e-3, 0.0, 1e-3, 20.0, 50.0, 80.0], dtype=torch.float64)
    return torch.cat([bulk, extreme]).to(dtype)


@pytest.mark.parametrize("dtype", [torch.float32, torch.float64])
@pytest.mark.parametrize("kind", ["hard", "soft"])
def test_logistic_loss_matches_torch_bce(dtype, kind):
    gen = torch.Generator().manual_seed(3)
    logits = _random_logits(gen, dtype)
    if kind == "hard":
        target = torch.randint(0, 2, logits.shape, generator=gen).to(dtype)
    else:
        target = torch.rand(logits.shape, generator=gen, dtype=torch.float64).to(dtype)
    got = losses.logistic_loss(logits, target)
    want = F.binary_cross_entropy_with_logits(logits, target, reduction="none")
    assert got.shape == logits.shape and got.dtype == dtype
    assert torch.isfinite(got).all()
    # reference: torch.nn.functional.binary_cross_entropy_with_logits(reduction='none')
    tol = 1e-5 if dtype == torch.float32 else 1e-12
    torch.testing.assert_close(got, want, rtol=tol, atol=tol)


def test_logistic_loss_extremes_exact_values():
    logits = torch.tensor([80.0, -80.0, 80.0, -80.0, 0.0], dtype=torch.float64)
    target = torch.tensor([1.0, 0.0, 0.0, 1.0, 0.3], dtype=torch.float64)
    got = losses.logistic_loss(logits, target)
    # Confident and right costs ~exp(-80); confident and wrong costs ~80; at 0 it is log 2.
    assert got[0] < 1e-30 and got[1] < 1e-30
    torch.testing.assert_close(got[2:4], torch.tensor([80.0, 80.0], dtype=torch.float64))
    torch.testing.assert_close(got[4], torch.log(torch.tensor(2.0, dtype=torch.float64)))


def test_logistic_loss_accurate_for_small_losses():
    # softplus(x) - x would round to 0 or lose all digits here; the loss is ~exp(-x).
    logits = torch.tensor([15.0, 30.0], dtype=torch.float32)
    got = losses.logistic_loss(logits, torch.ones(2))
    want = torch.exp(-logits.double()).float()
    torch.testing.assert_close(got, want, rtol=1e-5, atol=0.0)


def test_logistic_loss_gradient_is_sigmoid_minus_target():
    gen = torch.Generator().manual_seed(4)
    logits = _random_logits(gen, torch.float64).requires_grad_(True)
    target = torch.rand(logits.shape, generator=gen, dtype=torch.float64)
    losses.logistic_loss(logits, target).sum().backward()
    assert torch.isfinite(logits.grad).all()
    # d/dx [softplus(x) - t x] = sigmoid(x) - t, including at x = 0.
    torch.testing.assert_close(logits.grad, torch.sigmoid(logits.detach()) - target)


def test_squared_loss_hand_computed():
    pred = torch.tensor([1.0, -2.0, 0.5, 3.0])
    target = torch.tensor([0.0, 2.0, 0.5, 1.0])
    # hand computation: 0.5 * [1, 16, 0, 4]
    torch.testing.assert_close(losses.squared_loss(pred, target), torch.tensor([0.5, 8.0, 0.0, 2.0]))


def test_squared_loss_gradient_is_residual():
    pred = torch.tensor([1.0, -2.0, 0.5, 3.0], requires_grad=True)
    target = torch.tensor([0.0, 2.0, 0.5, 1.0])
    losses.squared_loss(pred, target).sum().backward()
    assert torch.isfinite(pred.grad).all()
    # The 1/2 makes the gradient exactly pred - target.
    torch.testing.assert_close(pred.grad, pred.detach() - target)


def test_weighted_mean():
    values = torch.tensor([1.0, 2.0, 3.0, 10.0])
    weight = torch.tensor([1.0, 1.0, 2.0, 0.0])
    torch.testing.assert_close(losses.weighted_mean(values), torch.tensor(4.0))
    # hand computation: (1 + 2 + 6 + 0) / 4
    torch.testing.assert_close(losses.weighted_mean(values, weight), torch.tensor(9.0 / 4.0))
    # A scalar weight leaves the plain mean.
    torch.testing.assert_close(losses.weighted_mean(values, torch.tensor(3.0)), torch.tensor(4.0))


def test_weighted_mean_gradients_finite():
    values = torch.randn(6, requires_grad=True)
    weight = torch.rand(6) + 0.1
    losses.weighted_mean(losses.squared_loss(values, torch.zeros(6)), weight).backward()
    assert torch.isfinite(values.grad).all()
    torch.testing.assert_close(values.grad, weight * values.detach() / weight.sum())


def test_softmax_loss_equals_cross_entropy_without_duplicates():
    g = torch.Generator().manual_seed(0)
    logits = torch.randn(6, 6, generator=g)
    cands = torch.arange(6)
    log_q = torch.log(torch.rand(6, generator=g))
    ours = in_batch_softmax_loss(logits, cands, log_q)
    # reference: torch's cross_entropy with the diagonal as the label, on logits minus log q
    ref = F.cross_entropy(logits - log_q.unsqueeze(0), torch.arange(6), reduction="none")
    assert torch.allclose(ours, ref, atol=1e-6)


def test_softmax_loss_drops_duplicate_positives_from_negatives():
    logits = torch.tensor([[2.0, 5.0, 0.0], [1.0, 3.0, 0.5], [0.0, 0.0, 1.0]])
    cands = torch.tensor([7, 7, 9])  # rows 0 and 1 share item 7: column 1 is not a negative for row 0
    ours = in_batch_softmax_loss(logits, cands)
    # row 0 by hand: only columns 0 (its own) and 2 compete
    row0 = -2.0 + float(torch.logsumexp(torch.tensor([2.0, 0.0]), 0))
    assert ours[0].item() == pytest.approx(row0, abs=1e-6)
    row2 = -1.0 + float(torch.logsumexp(torch.tensor([0.0, 0.0, 1.0]), 0))
    assert ours[2].item() == pytest.approx(row2, abs=1e-6)


def test_softmax_with_drawn_columns_equals_cross_entropy_over_the_kept_columns():
    # reference: torch.nn.functional.cross_entropy over each row's own columns, built one row at a time,
    # with a drawn column holding the row's own item removed and log q subtracted per column
    gen = torch.Generator().manual_seed(11)
    b, extra = 6, 5
    own = torch.tensor([3, 7, 3, 1, 9, 4])
    drawn = torch.tensor([7, 2, 3, 8, 9])  # 7, 3 and 9 are also some rows' own items
    columns = torch.cat([own, drawn])
    logits = torch.randn(b, b + extra, generator=gen, dtype=torch.float64)
    log_q = torch.randn(b + extra, generator=gen, dtype=torch.float64)
    got = in_batch_softmax_loss(logits, columns, log_q)
    for i in range(b):
        keep = [j for j in range(b + extra) if j == i or columns[j] != own[i]]
        row = (logits[i] - log_q)[keep]
        want = F.cross_entropy(row.unsqueeze(0), torch.tensor([keep.index(i)]))
        torch.testing.assert_close(got[i], want, rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize("block_cells", [1 << 20, 13 * 3])  # one block; row blocks of 3 rows (and a short last one)
def test_blocked_softmax_equals_the_dense_one_in_value_and_gradient(monkeypatch, block_cells):
    # reference: the dense in_batch_softmax_loss above (itself checked against F.cross_entropy) under torch
    # autograd, on the same logits built from vectors, biases and log q; duplicates among own and drawn columns
    monkeypatch.setattr(losses, "BLOCK_CELLS", block_cells)
    gen = torch.Generator().manual_seed(5)
    b, extra, k, scale = 8, 5, 4, 1.7
    own = torch.tensor([3, 7, 3, 1, 9, 4, 7, 2])
    columns = torch.cat([own, torch.tensor([7, 2, 3, 8, 9])])
    q = torch.randn(b, k, generator=gen, dtype=torch.float64)
    c = torch.randn(b + extra, k, generator=gen, dtype=torch.float64)
    bias = torch.randn(b + extra, generator=gen, dtype=torch.float64)
    log_q = torch.randn(b + extra, generator=gen, dtype=torch.float64)
    weight = torch.rand(b, generator=gen, dtype=torch.float64)
    results = []
    for blocked in (False, True):
        leaves = [t.clone().requires_grad_(True) for t in (q, c, bias)]
        if blocked:
            loss = losses.blocked_in_batch_softmax_loss(*leaves, columns, scale, log_q)
        else:
            logits = scale * leaves[0] @ leaves[1].T + leaves[2].unsqueeze(0)
            loss = in_batch_softmax_loss(logits, columns, log_q)
        (loss * weight).sum().backward()
        results.append([loss.detach()] + [t.grad for t in leaves])
    for dense, blocked in zip(*results):
        torch.testing.assert_close(blocked, dense, rtol=1e-10, atol=1e-12)
