"""Elementwise training losses and their weighted reduction.

All functions are pure functions of tensors and keep the autograd graph, so
they can be used directly inside a training step.
"""

from __future__ import annotations

import torch
import torch.nn.functional as F


def squared_loss(pred: torch.Tensor, target: torch.Tensor) -> torch.Tensor:
    """Elementwise half squared error, 0.5 * (pred - target)**2.

    Returns a tensor of the broadcast shape of `pred` and `target`, in squared
    units of the target.
    """
    # The factor 1/2 makes the gradient exactly (pred - target), so a penalty
    # weight lambda on the nuclear norm is the soft-thresholding level of the
    # singular values, with no stray factor of 2.
    diff = pred - target
    return 0.5 * diff * diff


def logistic_loss(logits: torch.Tensor, target: torch.Tensor) -> torch.Tensor:
    """Elementwise binary cross-entropy on logits, softplus(logits) - target * logits.

    `target` may be any value in [0, 1] (soft labels allowed). Returns a tensor
    of the broadcast shape, in nats; finite for every finite logit.
    """
    # softplus(x) = x + softplus(-x), so for x >= 0 the loss equals
    # (1 - t) * x + softplus(-x). Using that branch for positive logits avoids
    # subtracting two large, nearly equal numbers (softplus(x) and t * x when
    # t is close to 1), and the negative branch never overflows. Both branches
    # are finite everywhere, so torch.where leaks no NaN into the gradient, and
    # the gradient is sigmoid(x) - t on both sides, including x = 0.
    target = target.to(logits.dtype)
    positive = logits >= 0
    upper = (1.0 - target) * logits + F.softplus(-logits)
    lower = F.softplus(logits) - target * logits
    return torch.where(positive, upper, lower)


def in_batch_softmax_loss(logits: torch.Tensor, candidates: torch.Tensor,
                          log_q: torch.Tensor | None = None) -> torch.Tensor:
    """Per-row cross-entropy of each query's own candidate against the other candidates of the batch.

    The dense form, holding the (B, C) logits: training computes the same loss a block of rows at a time
    (blocked_in_batch_softmax_loss); this one is the reference its tests and scripts/bench compare it with.

    logits: (B, C) scores of query i with column j, C >= B; the first B columns are the pairs' own
    candidates (the positive is the diagonal), any further ones items drawn for the whole batch.
    candidates: (C,) the columns' item ids; a column holding the same item as row i's positive is not
    a negative for row i and is left out. log_q: (C,) log of each column item's expected count among
    the columns; subtracting it is the sampling-bias correction of Yi et al. (RecSys 2019), without
    which popular items are pushed down simply for appearing as negatives more often (with drawn
    columns the count is B x the item's share of events + C - B over the items drawn from, as in
    Yang et al., WWW 2020). Returns (B,) in nats.
    """
    b = logits.shape[0]
    if log_q is not None:
        logits = logits - log_q.unsqueeze(0)
    same = candidates[:b].unsqueeze(1) == candidates.unsqueeze(0)
    same[:, :b].fill_diagonal_(False)
    logits = logits.masked_fill(same, float("-inf"))
    return torch.logsumexp(logits, dim=1) - logits.diagonal()


BLOCK_CELLS = 1 << 20  # logits a row block of the blocked softmax holds at once: 4 MiB of float32, cache-sized


def blocked_in_batch_softmax_loss(queries: torch.Tensor, columns: torch.Tensor, column_bias: torch.Tensor,
                                  candidates: torch.Tensor, scale: float,
                                  log_q: torch.Tensor | None = None) -> torch.Tensor:
    """in_batch_softmax_loss of logits = scale * queries @ columns.T + column_bias, computed a block of rows at a
    time in forward and backward (the backward pass scores each block again), so no (B, C) matrix is ever held.

    A (B, C) matrix of a large batch outgrows the allocator's reusable blocks: at B = 4,096 every step mapped
    and faulted in fresh pages for each of the several such matrices autograd keeps, and ran 8 x slower a pair
    than at B = 1,024. Returns (B,) in nats, with gradients for queries, columns and column_bias.
    """
    shift = column_bias if log_q is None else column_bias - log_q
    return _BlockedInBatchSoftmax.apply(queries, columns, shift, candidates, float(scale))


def _block_logits(q: torch.Tensor, c: torch.Tensor, shift: torch.Tensor, candidates: torch.Tensor, start: int,
                  scale: float) -> tuple[torch.Tensor, torch.Tensor]:
    """Rows start.. of the masked logits (the same item as a row's positive, other than itself, at -inf) and
    the positives' columns."""
    logits = torch.addmm(shift.unsqueeze(0), q, c.T, alpha=scale)
    rows = torch.arange(len(q))
    own = rows + start
    same = candidates[start:start + len(q)].unsqueeze(1) == candidates.unsqueeze(0)
    same[rows, own] = False
    return logits.masked_fill_(same, float("-inf")), own


class _BlockedInBatchSoftmax(torch.autograd.Function):
    @staticmethod
    def forward(ctx, q, c, shift, candidates, scale):
        b = len(q)
        step = max(1, BLOCK_CELLS // max(1, len(c)))
        out, lse = torch.empty(b, dtype=q.dtype), torch.empty(b, dtype=q.dtype)
        for i in range(0, b, step):
            logits, own = _block_logits(q[i:i + step], c, shift, candidates, i, scale)
            lse[i:i + step] = torch.logsumexp(logits, dim=1)
            out[i:i + step] = lse[i:i + step] - logits[torch.arange(len(own)), own]
        ctx.save_for_backward(q, c, shift, candidates, lse)
        ctx.scale, ctx.step = scale, step
        return out

    @staticmethod
    def backward(ctx, grad):
        q, c, shift, candidates, lse = ctx.saved_tensors
        scale, step = ctx.scale, ctx.step
        gq, gc, gs = torch.empty_like(q), torch.zeros_like(c), torch.zeros_like(shift)
        for i in range(0, len(q), step):
            logits, own = _block_logits(q[i:i + step], c, shift, candidates, i, scale)
            g = grad[i:i + step]
            # d loss / d logits: the softmax weighted by each row's gradient, less it at the positive
            p = logits.sub_(lse[i:i + step].unsqueeze(1)).exp_().mul_(g.unsqueeze(1))
            p[torch.arange(len(own)), own] -= g
            torch.mm(p, c, out=gq[i:i + step]).mul_(scale)
            gc.addmm_(p.T, q[i:i + step], alpha=scale)
            gs += p.sum(0)
        return gq, gc, gs, None, None


def weighted_mean(values: torch.Tensor, weight: torch.Tensor | None = None) -> torch.Tensor:
    """Mean of `values`, or sum(weight * values) / sum(weight) when `weight` is given.

    `weight` must broadcast to the shape of `values`. Returns a 0-d tensor in
    the unit of `values`; NaN when there are no values or the weights sum to 0.
    """
    if weight is None:
        return values.mean()
    # Broadcast first so that sum(weight) counts every element it multiplies,
    # e.g. a scalar weight gives the plain mean rather than n times it.
    weight = torch.broadcast_to(weight.to(values.dtype), values.shape)
    return (weight * values).sum() / weight.sum()
