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


def _model(kind: type = Tiny) -> Tiny:
    torch.manual_seed(0)
    return kind()


def _join(rank: int, port: int) -> None:
    os.environ.update(MASTER_ADDR="127.0.0.1", MASTER_PORT=str(port))
    dist.init_process_group("gloo", rank=rank, world_size=WORLD)


def _worker(rank: int, port: int, out: dict) -> None:
    _join(rank, port)
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


def _run(worker) -> dict:
    """worker(rank, port, out) in WORLD gloo processes; what each put in out[rank]."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    with mp.Manager() as manager:
        out = manager.dict()
        mp.spawn(worker, args=(port, out), nprocs=WORLD, join=True)
        return dict(out)


def test_every_process_holds_the_mean_of_all_gradients():
    got = _run(_worker)
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


class Owned(Tiny):
    """Tiny plus a table of user rows, each user's rows looked up by one process only (a divided log's users):
    rank r reads the rows of its own parity, and row 0 (the unknown id) now and then, as id dropout does."""

    def __init__(self):
        super().__init__()
        self.users = nn.Embedding(20, 4, sparse=True)

    def sparse_parameters(self):
        return [self.ids.weight, self.users.weight]

    def loss(self, rank: int) -> torch.Tensor:
        g = torch.Generator().manual_seed(200 + rank)
        users = 2 * torch.randint(1, 10, (9 + 4 * rank,), generator=g) - rank  # odd rows for rank 1, even for 0
        users[::4] = 0  # the unknown row, in both processes
        return super().loss(rank) + (self.users(users) * self.layer.weight[0]).sum().pow(2)


def _owned_worker(rank: int, port: int, out: dict) -> None:
    import towers.collective as collective

    _join(rank, port)
    model = _model(Owned)
    exchange = GradientExchange(model, owned=[model.users.weight])
    model.loss(rank).backward()
    exchange()
    grad = {"users": model.users.weight.grad.to_dense(), "ids": model.ids.weight.grad.to_dense(),
            "layer": model.layer.weight.grad.clone()}
    # each process writes its own rows (and their optimiser-state rows), then share_rows makes them whole,
    # three rows a round (more rounds for the process with more rows; the other joins them with none left)
    collective.SHARE_CHUNK = 3
    mine = torch.arange(2, 20, 2) if rank == 0 else torch.arange(1, 20, 2)[:4]
    table, state = model.users.weight.detach().clone(), torch.zeros(20, 4)
    table[mine] = 100.0 + mine.unsqueeze(1).float()
    state[mine] = -mine.unsqueeze(1).float()
    collective.share_rows([table, state], mine)
    pieces = collective.gather_all(torch.arange(3 * rank, dtype=torch.float64))  # rank 0 sends none
    out[rank] = {**grad, "table": table, "state": state, "pieces": [p.clone() for p in pieces]}
    dist.destroy_process_group()


def test_owned_rows_stay_with_their_process_and_are_shared_back_whole():
    """GradientExchange(owned=...): an owned table's rows keep this process's gradient over the processes (the
    others have none for them), row 0 the mean of every process's, to the bit alike; share_rows then gives
    every process every owner's rows. Reference: the gradients averaged by hand, as above."""
    got = _run(_owned_worker)
    reference = {"users": 0, "ids": 0, "layer": 0}
    for rank in range(WORLD):
        model = _model(Owned)
        model.loss(rank).backward()
        reference["users"] = reference["users"] + model.users.weight.grad.to_dense() / WORLD
        reference["ids"] = reference["ids"] + model.ids.weight.grad.to_dense() / WORLD
        reference["layer"] = reference["layer"] + model.layer.weight.grad / WORLD
    for rank in range(WORLD):
        own = torch.arange(20) % 2 == rank
        own[0] = False
        torch.testing.assert_close(got[rank]["users"][own], reference["users"][own], rtol=1e-6, atol=1e-7)
        assert not got[rank]["users"][~own][1:].any()  # the other process's users: no gradient here
        torch.testing.assert_close(got[rank]["users"][0], reference["users"][0], rtol=1e-6, atol=1e-7)
        for name in ("ids", "layer"):
            torch.testing.assert_close(got[rank][name], reference[name], rtol=1e-6, atol=1e-7)
    assert torch.equal(got[0]["users"][0], got[1]["users"][0])  # row 0 to the bit alike
    assert reference["users"][0].abs().sum() > 0  # both processes wrote to row 0
    for name in ("ids", "layer"):
        assert torch.equal(got[0][name], got[1][name])
    owners = {0: torch.arange(2, 20, 2), 1: torch.arange(1, 20, 2)[:4]}
    for rank in range(WORLD):
        for rows in owners.values():
            assert torch.equal(got[rank]["table"][rows], 100.0 + rows.unsqueeze(1).float().expand(-1, 4))
            assert torch.equal(got[rank]["state"][rows], -rows.unsqueeze(1).float().expand(-1, 4))
        assert [p.tolist() for p in got[rank]["pieces"]] == [[], [0.0, 1.0, 2.0]]
    assert torch.equal(got[0]["table"], got[1]["table"])  # rows no process owns: the same start everywhere


def _sent(rank: int, call: int) -> torch.Tensor:
    """What process `rank` sends in gather_all call number `call` of _gather_worker."""
    lengths = [(3, 5), (2, 40), (50, 60), (0, 7), (9, 0), (4, 4), (30, 3)][call]
    n = lengths[rank]
    dtype = [torch.int64, torch.float32, torch.float64, torch.int64, torch.bool, torch.float32, torch.float32][call]
    values = torch.arange(1000 * call + 100 * rank, 1000 * call + 100 * rank + n)
    if dtype == torch.bool:
        return values % 3 == 0
    return values.to(dtype)


def _gather_worker(rank: int, port: int, out: dict) -> None:
    import towers.collective as collective

    _join(rank, port)
    collective._capacity[0] = 64  # bytes: most of these messages need the second round, and it grows
    got, capacities = [], []
    for call in range(7):
        part = _sent(rank, call)
        if call == 5:  # a strided view, not a tensor of its own
            part = torch.stack([part, -part], 1)[:, 0]
        if call == 6:  # a list, sent joined
            pieces = collective.gather_all([part[:2], part[2:].view(-1, 1)])
            assert torch.equal(pieces[rank], part)
        else:
            pieces = collective.gather_all(part)
            assert pieces[rank] is part
        got.append([p.clone() for p in pieces])
        capacities.append(collective._capacity[0])
        # a received piece holds no more than twice its own bytes (and the length in front): a short one is a
        # copy, not a view of a buffer of the whole capacity
        for k, p in enumerate(pieces):
            if k != rank:
                assert p.untyped_storage().nbytes() <= 2 * p.numel() * p.element_size() + collective.HEAD, (call, k)
    out[rank] = {"got": got, "capacities": capacities}
    dist.destroy_process_group()


def test_gather_all_gives_every_process_every_part_whatever_its_length():
    """collective.gather_all with a small capacity: parts shorter and longer than it, on one process or both,
    empty ones, int64, float32, float64 and bool, a strided view, a list sent joined. Reference: the definition of an all-gather
    (every process ends with every process's part, in rank order); the capacity grows alike everywhere."""
    got = _run(_gather_worker)
    for rank in range(WORLD):
        for call, pieces in enumerate(got[rank]["got"]):
            for source, piece in enumerate(pieces):
                want = _sent(source, call)
                assert piece.dtype == want.dtype and torch.equal(piece, want), (rank, call, source)
    assert got[0]["capacities"] == got[1]["capacities"]
    assert got[0]["capacities"][2] >= 60 * 8  # the longest message so far, float64
