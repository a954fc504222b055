"""Data-parallel training on torch.distributed (gloo, CPU): started by torchrun or `towers train --workers N`.

Every process reads the same log and tables and builds the same catalogs, encoders and split from the
same seed, so ids and vocabularies agree without any exchange. Each epoch's shuffled order is the same
on every process; each takes every N-th pair of each global batch, and GradientExchange averages
the gradients (sparse id-table gradients included) after each backward pass, so the processes step in
lockstep with the single-process batch size. Each round's validation is divided too: every process ranks its share
of the validation queries and the exact counts are gathered (evaluation/shares.py), so every process
holds the one-process metric and all stop at the same round. Only process 0 writes files.
"""

from __future__ import annotations

import datetime
import os
import signal
import socket
import subprocess
import sys

import torch
import torch.distributed as dist
import torch.nn as nn

from towers.collective import as_words, from_first, from_words, gather_all, rank_and_size, reset_capacity, summed
from towers.errors import TowersError
from towers.evaluation.shares import Share

TIMEOUT = datetime.timedelta(minutes=30)  # a peer silent this long counts as gone


def start() -> bool:
    """Join the process group when launched by torchrun (WORLD_SIZE > 1); returns whether distributed."""
    if int(os.environ.get("WORLD_SIZE", "1")) <= 1:
        return False
    if not dist.is_initialized():
        dist.init_process_group("gloo", timeout=TIMEOUT)
        reset_capacity()
    return True


def stop() -> None:
    if dist.is_initialized():
        dist.destroy_process_group()


def is_primary() -> bool:
    return rank_and_size()[0] == 0


def mean_over_processes(value: float) -> float:
    """The mean of a number over all processes (the epoch loss each one saw on its shard)."""
    if not dist.is_initialized():
        return value
    return summed(float(value)) / dist.get_world_size()


def evaluation_share(divided: bool = False) -> Share | None:
    """This process's share of evaluation work when several processes train, else None (it does it all).
    divided: the log is divided by user (data/shards.py), so each process ranks its own queries."""
    rank, world = rank_and_size()
    return Share(rank, world, gather_all, divided) if world > 1 else None


def threads_per_process(configured: int) -> int:
    """torch threads for each of N processes on this machine: the cores shared out, unless configured."""
    if configured:
        return configured
    world = int(os.environ.get("LOCAL_WORLD_SIZE", os.environ.get("WORLD_SIZE", "1")))
    return max(1, (os.cpu_count() or 1) // max(1, world))


class GradientExchange:
    """After each backward pass, every process's gradients summed and divided by the processes, in one exchange.

    What DistributedDataParallel does, in the shape this trainer's gradients have: a few small dense
    tensors (the networks) and sparse ones (id and bias tables: one entry per id a step looked up).
    Every parameter's gradient goes into one flat float32 buffer per process: dense ones whole, sparse
    ones as their raw entries (indices carried bit for bit as pairs of float32 words, then values),
    uncoalesced: the optimiser coalesces them once, as it does in one process. One gather_all of the
    buffers (point to point, each with its length in front) replaces DDP's per-bucket all-reduces and its sparse
    all-reduce, which coalesces before and after sending; on 2 cores that took an epoch from 2.97 s
    to 2.07-2.33 s (scripts/bench two_nodes's config, 1M events; with no exchange at all the two took 1.50 s).
    A parameter no process gave a gradient (the query biases under the softmax, which cancel) keeps
    none, so the optimiser leaves it alone, as DDP's find_unused_parameters does.

    `owned`: sparse tables whose rows each belong to one process (a divided log's user rows, see
    Trainer.owned_tables). Their entries stay where they were made, divided by the processes as the
    average would divide them (the other processes' entries for those rows are none); only their row 0,
    the unknown id every process's id dropout writes to, is exchanged. So each step sends about a third
    less, and each process updates only its own users' rows: Trainer.share_owned_rows makes every
    process whole again after each epoch.
    """

    def __init__(self, model: nn.Module, owned: list[nn.Parameter] = ()):
        self.params = list(model.parameters())
        sparse = {id(q) for q in model.sparse_parameters()} if hasattr(model, "sparse_parameters") else set()
        self.sparse = [id(q) in sparse for q in self.params]
        mine = {id(q) for q in owned}
        self.owned = [id(q) in mine for q in self.params]
        self.dense_at: dict[int, tuple[int, int]] = {}  # each dense parameter's place in the summed dense part
        self.dense_size = 0
        for k, (q, sparse) in enumerate(zip(self.params, self.sparse)):
            if not sparse:
                self.dense_at[k] = (self.dense_size, q.numel())
                self.dense_size += q.numel()
        with torch.no_grad():  # every process starts from process 0's weights, as DDP makes sure of
            for q in self.params:
                from_first(q.data)

    def __call__(self) -> None:
        world = dist.get_world_size()
        header, dense, parts = [], [], []
        kept: dict[int, tuple[torch.Tensor, torch.Tensor]] = {}  # owned tables' entries that stay here
        for k, (q, sparse, owned) in enumerate(zip(self.params, self.sparse, self.owned)):
            g = q.grad
            if not sparse:  # every dense gradient in its place (zeros for none), so all are summed in one
                header.append(-1 if g is None else g.numel())
                dense.append(torch.zeros(q.numel()) if g is None else g.reshape(-1).float())
                continue
            if g is None:
                header.append(-1)
                continue
            idx, val = g._indices()[0], g._values()
            if owned:
                kept[k] = (idx, val)
                unknown = idx == 0
                if bool(unknown.any()):  # row 0 is sent, and left here as zeros
                    idx, val = idx[unknown], val[unknown]
                    kept[k][1].masked_fill_(unknown.view(-1, *[1] * (val.dim() - 1)), 0.0)
                else:
                    idx, val = idx[:0], val[:0]
            header.append(len(idx))
            parts += [as_words(idx), val.reshape(-1)]
        # the header (each parameter's entry count, -1 for none) leads the buffer, as int64 bits in float32 words
        head = as_words(torch.tensor(header))
        start = len(head) + self.dense_size
        buffers = gather_all([head, *dense, *parts])
        counts = [from_words(b[:len(head)]).tolist() for b in buffers]
        total = buffers[0][len(head):start].clone()
        for b in buffers[1:]:
            total += b[len(head):start]
        total /= world
        pieces: list[list] = [[] for _ in self.params]
        for b, count in zip(buffers, counts):
            at = start
            for k, (q, n) in enumerate(zip(self.params, count)):
                if n < 0 or not self.sparse[k]:
                    continue
                width = q[0].numel()
                idx = from_words(b[at:at + 2 * n])
                at += 2 * n
                pieces[k].append((idx, b[at:at + n * width].view(n, *q.shape[1:])))
                at += n * width
        for k, (q, sparse) in enumerate(zip(self.params, self.sparse)):
            if not sparse:
                if any(count[k] >= 0 for count in counts):  # else no process has a gradient for it
                    at, n = self.dense_at[k]
                    q.grad = total[at:at + n].view_as(q).to(q.dtype)
                continue
            if k in kept:  # row 0's entries as one, summed in rank order: the very row every process then holds
                unknown = torch.cat([v for _, v in pieces[k]]) if pieces[k] else kept[k][1][:0]
                pieces[k] = [kept[k]] + ([(torch.zeros(1, dtype=torch.int64), unknown.sum(0, keepdim=True))]
                                         if len(unknown) else [])
            if pieces[k]:  # else no process has a gradient for it
                idx = torch.cat([i for i, _ in pieces[k]])
                val = torch.cat([v for _, v in pieces[k]]).div_(world)
                q.grad = torch.sparse_coo_tensor(idx.unsqueeze(0), val, q.shape, check_invariants=False)


def usable_cores() -> int:
    """The cores this process may run on (its CPU affinity where the platform tells it)."""
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # not Linux
        return os.cpu_count() or 1


def crowding_note(n: int, cores: int, load: float) -> str | None:
    """One line when n processes would have fewer free cores than processes, else None.

    Free cores are the usable ones less the load average of the last minute (work already running). With
    fewer free cores than processes they take turns on the cores, and each step also waits for the
    slowest process's gradients, so training is slower than in one process.
    """
    free = max(0, cores - round(load))
    if n <= free:
        return None
    return (f"note: --workers {n} starts {n} processes but {free} of this machine's {cores} cores are free (load "
            f"{load:.1f}), so they will share cores and wait for each other at every step: expect it to be slower "
            f"than one process; data-parallel training pays off with a free core per process, or across machines")


def node_command(node_rank: int, nodes: int, endpoint: str, argv: list[str]) -> list[str]:
    """torchrun's command for one machine of `nodes`, one process each, meeting at endpoint HOST:PORT.

    The README's two-machine commands; the tests and scripts/bench start both on one machine (127.0.0.1)
    as a rehearsal. c10d rendezvous ignores node_rank (torchrun prints a warning saying so) and numbers
    the machines by host name, then process id: process 0, which writes the run, is on the first.
    """
    return [sys.executable, "-m", "torch.distributed.run", "--nnodes", str(nodes), "--nproc-per-node", "1",
            "--node-rank", str(node_rank), "--rdzv-backend", "c10d", "--rdzv-endpoint", endpoint, "-m", "towers", *argv]


def rehearsal_endpoint() -> str:
    """A rendezvous endpoint on this machine (127.0.0.1 and a port free now) for node_command's rehearsal."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return f"127.0.0.1:{s.getsockname()[1]}"


FORWARDED = tuple(getattr(signal, name) for name in ("SIGINT", "SIGTERM", "SIGHUP") if hasattr(signal, name))


def launch_workers(n: int, argv: list[str]) -> int:
    """Run `towers train` in n local processes through torchrun (torch.distributed.run); returns its exit code.

    torchrun runs in a session of its own and gets each signal this command gets, once: Ctrl-C, SIGTERM (a
    scheduler's stop) and SIGHUP reach the workers through torchrun, which starts them in sessions of their own
    (so a terminal's Ctrl-C, sent to a process group, would reach none of them directly). On Linux torchrun is
    also stopped with SIGTERM if this command is killed outright, so no worker trains on unseen.
    """
    if n < 1:
        raise TowersError(f"--workers {n}: give 1 or more processes")
    note = crowding_note(n, usable_cores(), os.getloadavg()[0] if hasattr(os, "getloadavg") else 0.0)
    if note:
        print(note, file=sys.stderr)
    env = dict(os.environ)
    env.setdefault("OMP_NUM_THREADS", str(max(1, (os.cpu_count() or 1) // n)))  # the cores shared out
    proc = subprocess.Popen(torchrun_command(n, argv), env=env, start_new_session=True, preexec_fn=_stop_with_parent)
    received: list[int] = []

    def forward(sig, _frame):
        received.append(sig)
        proc.send_signal(sig)
    before = {sig: signal.signal(sig, forward) for sig in FORWARDED}
    try:
        code = proc.wait()
    finally:
        for sig, handler in before.items():
            signal.signal(sig, handler)
    if received and code != 0:
        name = signal.Signals(received[0]).name
        print(f"interrupted: {name} passed on to the {n} processes; the last checkpoint is kept: run the same "
              "command with --resume to continue", file=sys.stderr)
        return 130
    return code


def torchrun_command(n: int, argv: list[str]) -> list[str]:
    """torchrun on this machine starting `towers ARGV` in n processes."""
    return [sys.executable, "-m", "torch.distributed.run", "--standalone", f"--nproc-per-node={n}", "-m", "towers", *argv]


def _stop_with_parent() -> None:
    """In the child before it starts (Linux): SIGTERM when the parent dies, whatever killed it (prctl
    PR_SET_PDEATHSIG); elsewhere nothing."""
    if not sys.platform.startswith("linux"):
        return
    import ctypes

    PR_SET_PDEATHSIG = 1  # linux/prctl.h
    ctypes.CDLL(None, use_errno=True).prctl(PR_SET_PDEATHSIG, signal.SIGTERM, 0, 0, 0)
