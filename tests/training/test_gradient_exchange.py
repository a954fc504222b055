"""The data-parallel gradient exchange (distributed.GradientExchange): after it, every process holds the mean
of all processes' gradients, for dense weights and for sparse id tables alike.

Reference: the same losses backpropagated in one process and the gradients averaged by hand (dense
tensors added with torch, sparse ones densified first), the definition of data-parallel averaging.
Two gloo processes are started with torch.multiprocessing, as torchrun would start them.
"""

from __future__ import annotations

import os
import socket

import pytest
import torch
import torch.distributed as dist
import torch.multiprocessing as mp
import torch.nn as nn

from towers.training.distributed import GradientExchange

pytestmark = pytest.mark.slow  # starts processes

WORLD = 2


class Tiny(nn.Module):
    """A sparse id table, a dense layer, and a weight no loss reaches (like the query biases under softmax)."""

    def __init__(self):
        super().__init__()
        self.ids = nn.Embedding(30, 4, sparse=True)
        self.layer = nn.Linear(4, 3)
        self.unused = nn.Parameter(torch.zeros(2))

    def sparse_parameters(self):
        return [self.ids.weight]

    def loss(self, rank: int) -> torch.Tensor:
        # the processes look up different ids, in different numbers, some twice: raw sparse entries differ
        g = torch.Generator().manual_seed(100 + rank)
        ids = torch.randint(0, 30, (7 + 5 * rank,), generator=g)
        return self.layer(self.ids(ids)).pow(2).mean()


def _model() -> Tiny:
    torch.manual_seed(0)
    return Tiny()


def _worker(rank: int, port: int, out: dict) -> None:
    os.environ.update(MASTER_ADDR="127.0.0.1", MASTER_PORT=str(port))
    dist.init_process_group("gloo", rank=rank, world_size=WORLD)
    model = _model()
    if rank == 1:  # a process that starts from other weights is given process 0's
        with torch.no_grad():
            model.layer.weight.add_(1.0)
    exchange = GradientExchange(model)
    model.loss(rank).backward()
    exchange()
    out[rank] = {"ids": model.ids.weight.grad.to_dense(), "layer": model.layer.weight.grad.clone(),
                 "bias": model.layer.bias.grad.clone(), "unused": model.unused.grad,
                 "start": model.layer.weight.detach().clone()}
    dist.destroy_process_group()


def test_every_process_holds_the_mean_of_all_gradients():
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    with mp.Manager() as manager:
        out = manager.dict()
        mp.spawn(_worker, args=(port, out), nprocs=WORLD, join=True)
        got = dict(out)
    reference = {"ids": 0, "layer": 0, "bias": 0}
    for rank in range(WORLD):
        model = _model()
        model.loss(rank).backward()
        reference["ids"] = reference["ids"] + model.ids.weight.grad.to_dense() / WORLD
        reference["layer"] = reference["layer"] + model.layer.weight.grad / WORLD
        reference["bias"] = reference["bias"] + model.layer.bias.grad / WORLD
    start = _model().layer.weight.detach()
    for rank in range(WORLD):
        for name, want in reference.items():
            torch.testing.assert_close(got[rank][name], want, rtol=1e-6, atol=1e-7)
        assert got[rank]["unused"] is None  # no process had a gradient for it: it keeps none
        assert torch.equal(got[rank]["start"], start)  # process 0's weights everywhere
    for name in reference:  # and the processes agree to the bit
        assert torch.equal(got[0][name], got[1][name])
