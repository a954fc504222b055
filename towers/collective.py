"""The few exchanges between data-parallel processes that data, evaluation and training need.

torch.distributed (gloo, CPU) carries them once training/distributed.py has joined the process
group; with one process every function returns its input, so callers run one piece of code. Each is
a collective: every process must call it, in the same order. A peer that is gone surfaces as
peer_failure's one line instead of gloo's error.
"""

from __future__ import annotations

import numpy as np
import torch
import torch.distributed as dist

from towers.errors import TowersError
from towers.memory import index_dtype


def rank_and_size() -> tuple[int, int]:
    """(this process's number, the number of processes); (0, 1) outside a process group."""
    if dist.is_available() and dist.is_initialized():
        return dist.get_rank(), dist.get_world_size()
    return 0, 1


def peer_failure(exc: BaseException) -> TowersError:
    rank, size = rank_and_size()
    return TowersError(f"training process {rank} of {size}: another process stopped ({str(exc).splitlines()[0][:160]}); "
                       "no run was written; see that process's error above, fix it and start again")


def _collective(call):
    try:
        return call()
    except RuntimeError as exc:  # only collectives are in here: gloo reports a peer gone this way
        raise peer_failure(exc) from None


# Bytes of a process's message that every other process is ready to receive in one round: each message
# carries its own length in front (HEAD bytes), so a message that fits needs no exchange of lengths first.
# Every process raises it alike, from the lengths all of them saw (capacity_after), and join resets it.
FIRST_CAPACITY = 1 << 20
HEAD = 8
_capacity = [FIRST_CAPACITY]


def reset_capacity() -> None:
    """Back to FIRST_CAPACITY, as in every other process of a new process group."""
    _capacity[0] = FIRST_CAPACITY


def capacity_after(capacity: int, sizes: list[int]) -> int:
    """The next capacity: room for the longest message seen and an eighth more, never less than before."""
    longest = max(sizes)
    return max(capacity, longest + longest // 8)


def gather_all(part: torch.Tensor | list[torch.Tensor]) -> list[torch.Tensor]:
    """Every process's 1-D tensor (lengths may differ), in rank order; this process's is `part` itself.

    A list of tensors (of one dtype) is sent joined, copied once, straight into the message: this process's
    piece is then the joined tensor.

    Sent point to point, each process to each other one at once, as bytes with the length in front: a
    message of up to the agreed capacity arrives in one round, a longer one's rest in a second. Between two
    processes on one 2-core machine, one round of 1.4 MB took 1.9 ms on average after 16 ms of work, and
    the earlier two (the lengths first, then the data) 4.9 ms: each small round waits for the other side
    to be scheduled. gloo's all_gather was slower still and pads to the longest (the gradient exchange
    calls this every training step).
    """
    rank, world = rank_and_size()
    if world == 1:
        return [torch.cat(part) if isinstance(part, list) else part]
    others = [k for k in range(world) if k != rank]

    def swap(send: torch.Tensor | None, receive: list[torch.Tensor | None]) -> None:
        waiting = []
        for k in others:
            if send is not None:
                waiting.append(dist.isend(send, k))
            if receive[k] is not None:
                waiting.append(dist.irecv(receive[k], k))
        for request in waiting:
            request.wait()

    given = part if isinstance(part, list) else [part]
    dtype = given[0].dtype
    size = sum(p.numel() for p in given) * given[0].element_size()
    message = torch.empty(HEAD + size, dtype=torch.uint8)
    message[:HEAD].view(torch.int64)[0] = size
    joined_here = torch.cat([p.reshape(-1) for p in given], out=message[HEAD:].view(dtype))
    if isinstance(part, list):
        part = joined_here

    def call():
        capacity = _capacity[0]
        first = [None if k == rank else torch.empty(HEAD + capacity, dtype=torch.uint8) for k in range(world)]
        swap(message[:HEAD + capacity], first)
        sizes = [size if k == rank else int(first[k][:HEAD].view(torch.int64)[0]) for k in range(world)]
        received = [None if b is None else b[HEAD:] for b in first]
        if max(sizes) > capacity:  # the rest of each longer message (a process with none sends nothing)
            rest = [None if k == rank or sizes[k] <= capacity else torch.empty(sizes[k] - capacity, dtype=torch.uint8)
                    for k in range(world)]
            swap(message[HEAD + capacity:] if size > capacity else None, rest)
            received = [b if r is None else torch.cat([b, r]) for b, r in zip(received, rest)]
        _capacity[0] = capacity_after(capacity, sizes)
        # a piece far shorter than its buffer is copied out, so a caller who keeps it does not keep the buffer
        return [part if k == rank else _own_storage(received[k][:sizes[k]], len(received[k])).view(dtype)
                for k in range(world)]
    return _collective(call)


def _own_storage(piece: torch.Tensor, buffer_bytes: int) -> torch.Tensor:
    """The piece itself, or a copy when it fills less than half of the buffer it was received into."""
    return piece.clone() if 2 * len(piece) < buffer_bytes else piece


def joined(part: torch.Tensor) -> torch.Tensor:
    """Every process's 1-D tensor one after another, in rank order."""
    pieces = gather_all(part)
    return pieces[0] if len(pieces) == 1 else torch.cat(pieces)


def summed(values):
    """The sum over processes of a number, or the element-wise sum of a numpy array or tensor (a copy; bool
    arrays: any process's True)."""
    if rank_and_size()[1] == 1:
        return values
    if isinstance(values, (int, float)):
        return type(values)(summed(torch.tensor([values], dtype=torch.float64))[0])
    as_numpy = isinstance(values, np.ndarray)
    t = torch.from_numpy(np.ascontiguousarray(values)) if as_numpy else values
    kind = t.dtype
    work = t.to(torch.int32 if kind == torch.bool else kind).clone()
    _collective(lambda: dist.all_reduce(work))
    out = work > 0 if kind == torch.bool else work
    return out.numpy() if as_numpy else out


def from_first(tensor: torch.Tensor) -> None:
    """Overwrite the tensor in place with process 0's (every process starts from the same weights)."""
    if rank_and_size()[1] > 1:
        _collective(lambda: dist.broadcast(tensor, 0))


def largest(value: int) -> int:
    """The largest of one whole number over processes."""
    if rank_and_size()[1] == 1:
        return value
    t = torch.tensor([value], dtype=torch.int64)
    _collective(lambda: dist.all_reduce(t, op=dist.ReduceOp.MAX))
    return int(t)


def gather_objects(value) -> list:
    """Every process's value (plain data: arrays of ids and numbers), in rank order. Pickled between the
    processes of one run only, never read from a file."""
    rank, world = rank_and_size()
    if world == 1:
        return [value]
    out = [None] * world
    _collective(lambda: dist.all_gather_object(out, value))
    return out


class Exchange:
    """Rows sent to the process that owns them: each process gets the rows it owns from every process,
    in rank order, each process's rows in their order there (one all_to_all a column)."""

    def __init__(self, owner: np.ndarray):
        rank, world = rank_and_size()
        self.order = np.argsort(owner, kind="stable").astype(index_dtype(len(owner)))  # 4 bytes a row where it fits
        self.send = np.bincount(owner, minlength=world).tolist()
        sent = gather_all(torch.tensor(self.send, dtype=torch.int64))  # what every process sends to every process
        self.receive = [int(counts[rank]) for counts in sent]

    def __call__(self, values: np.ndarray) -> np.ndarray:
        part = torch.from_numpy(np.ascontiguousarray(values[self.order]))
        out = torch.empty(sum(self.receive), dtype=part.dtype)
        _collective(lambda: dist.all_to_all_single(out, part, self.receive, self.send))
        return out.numpy()


def parts_at_first(part: torch.Tensor) -> list[torch.Tensor] | None:
    """Every process's 1-D tensor at process 0, in rank order, one tensor a process (None elsewhere): what only
    process 0 writes. Process 0's own is kept as it is and the others' are received into tensors of their
    exact length, so process 0 holds the whole once (joined, or gathered into padded buffers, it would
    hold its own part twice and the whole again while joining)."""
    rank, world = rank_and_size()
    if world == 1:
        return [part]

    def call():
        lengths = [int(n) for n in gather_all(torch.tensor([len(part)], dtype=torch.int64))]
        if rank:
            if len(part):
                dist.send(part.contiguous(), dst=0)
            return None
        parts = [part]
        for source in range(1, world):
            received = torch.empty(lengths[source], dtype=part.dtype)
            if len(received):
                dist.recv(received, src=source)
            parts.append(received)
        return parts
    return _collective(call)


def as_words(ints: torch.Tensor) -> torch.Tensor:
    """Whole numbers as float32 words, two a number, bit for bit: how row numbers and counts travel in one
    float32 buffer beside the values (from_words reads them back)."""
    return ints.to(torch.int64).contiguous().view(torch.float32)


def from_words(words: torch.Tensor) -> torch.Tensor:
    """as_words' numbers back from a slice of a buffer (copied first: a slice at an odd word cannot be viewed
    as int64)."""
    return words.clone().view(torch.int64)


SHARE_CHUNK = 1 << 16  # rows a process sends in one share_rows exchange: bounds what it holds at once


def share_rows(tensors: list[torch.Tensor], rows: torch.Tensor) -> None:
    """Each process's `rows` of every tensor written into every process's copy of it, in place.

    For tables whose rows each belong to one process (a divided log's users): after it every process holds
    every owner's rows. The tensors are float32, with rows along their first dimension; the processes' row
    sets must not overlap. Sent SHARE_CHUNK rows at a time, as many rounds as the process with the most rows needs.
    """
    rank, world = rank_and_size()
    if world == 1 or not tensors:
        return
    widths = [t[0].numel() for t in tensors]
    rounds = -(-largest(len(rows)) // SHARE_CHUNK)
    for r in range(rounds):
        part = rows[r * SHARE_CHUNK:(r + 1) * SHARE_CHUNK].to(torch.int64)
        # row numbers carried bit for bit as pairs of float32 words, then each tensor's rows
        payload = torch.cat([as_words(part), *(t.index_select(0, part).reshape(-1) for t in tensors)])
        for source, b in enumerate(gather_all(payload)):
            if source == rank:
                continue
            n = len(b) // (2 + sum(widths))
            at, got = 2 * n, from_words(b[:2 * n])
            for t, w in zip(tensors, widths):
                t.index_copy_(0, got, b[at:at + n * w].view(n, *t.shape[1:]))
                at += n * w


def _as_is(values):
    return values


def across(divided: bool):
    """`summed` when each process holds its own part of the data (a divided log), else the identity:
    processes that each hold everything already have the whole value."""
    return summed if divided else _as_is
