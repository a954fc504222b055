"""Score tiles of queries x catalog without the full score matrix: the shared driver of blocked work.

Top-N retrieval (retrieval.py) and full-catalog ranks of held-out positives (rank_counts.py) both
walk blocks of queries over a catalog cut into chunks of SUB_TILE items. Each chunk is scored with
one matrix product into a reused buffer, excluded pairs are set to -inf, and a compiled kernel
consumes the tile while it is still in the cache. The extra memory is bounded by BLOCK_ENTRIES,
not by the catalog.

With several threads and enough queries, each thread takes whole blocks and does their products
(on one core) and their kernels itself: a tile is read in the cache of the core that wrote it, and
no thread waits for another between chunks. Otherwise blocks go one by one, each product spread
over all of torch's threads.
"""

from __future__ import annotations

import threading
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor

import torch

BLOCK_ENTRIES = 1 << 22  # scores in the reused buffers (16 MB of float32), all workers together
SUB_TILE = 2048  # items per chunk, one matrix product each (rounded up to whole groups)
SUB_TILES = 4  # chunks in a step (the first step is the sample retrieval starts its floor from)
GROUP = 16  # chunk widths are whole groups of this many items
MIN_ROWS_PER_THREAD = 64  # fewer rows than this per thread are not worth a thread


class Layout:
    """How a catalog is cut: chunks of `sub_width` items, SUB_TILES chunks a step, the first step spread out.

    Every chunk is a full `sub_width` wide: the last, partial one is scored from a zero-padded copy
    whose padding items have bias -inf, so padding never enters a result or a count.
    """

    def __init__(self, item_vectors: torch.Tensor, item_bias: torch.Tensor | None):
        self.items = item_vectors.detach().float().contiguous()
        self.bias = None if item_bias is None else item_bias.detach().float().contiguous()
        ni = self.ni = self.items.shape[0]
        self.sub_width = min(round_up(SUB_TILE, GROUP), round_up(ni, GROUP))
        n_chunks = -(-ni // self.sub_width)
        self.padded = n_chunks * self.sub_width  # items including the padding of the last chunk
        self.sub_tiles = max(1, min(SUB_TILES, n_chunks))
        self.step_width = self.sub_width * self.sub_tiles
        starts = [c * self.sub_width for c in range(n_chunks)]
        # the first step takes chunks spread evenly over the catalog, so that its scores are a fair
        # sample of the catalog even when it is ordered (by popularity, say)
        first = sorted({starts[(c * n_chunks) // self.sub_tiles] for c in range(self.sub_tiles)})
        taken = set(first)
        rest = [a for a in starts if a not in taken]
        self.steps = [first] + [rest[i:i + self.sub_tiles] for i in range(0, len(rest), self.sub_tiles)]
        self._tiles = {}
        for a in starts:
            stop = a + self.sub_width
            if stop <= ni:
                self._tiles[a] = (self.items[a:stop], None if self.bias is None else self.bias[a:stop])
            else:  # the partial last chunk, padded to full width
                c = ni - a
                items = torch.zeros(self.sub_width, self.items.shape[1])
                items[:c] = self.items[a:]
                bias = torch.full((self.sub_width,), float("-inf"))
                bias[:c] = 0.0 if self.bias is None else self.bias[a:]
                self._tiles[a] = (items, bias)

    def rows_per_block(self, nq: int, workers: int, entries_per_row: int) -> int:
        """Query rows per block, so that each worker's buffers of entries_per_row a row fit its share of BLOCK_ENTRIES."""
        share = BLOCK_ENTRIES // workers
        return max(1, min(-(-nq // workers), share // max(self.step_width, entries_per_row)))

    def tile(self, start: int) -> tuple[torch.Tensor, torch.Tensor | None]:
        """Item vectors (sub_width, k) and bias (or None) of the chunk starting at item `start`."""
        return self._tiles[start]


def round_up(x: int, multiple: int) -> int:
    return -(-x // multiple) * multiple


def score_tile(queries: torch.Tensor, items: torch.Tensor, bias: torch.Tensor | None, out: torch.Tensor) -> torch.Tensor:
    """out = queries @ items.T (+ bias per item), written into the given buffer."""
    if bias is None:
        return torch.mm(queries, items.T, out=out)
    return torch.addmm(bias, queries, items.T, out=out)


class Exclusions:
    """One block's excluded (row, item) pairs, sorted by item, as flat offsets into a chunk's tile.

    starts[a] / ends[a]: the range of pairs inside the chunk starting at item a, found with one
    searchsorted for the whole block rather than two per chunk.
    """

    def __init__(self, rows: torch.Tensor, cols: torch.Tensor, layout: Layout):
        w = layout.sub_width
        self.flat = rows.long() * w + cols % w  # chunks start at multiples of w; index_fill_ takes int64
        first = sorted(a for step in layout.steps for a in step)
        edges = torch.searchsorted(cols, torch.tensor(first + [layout.ni], dtype=cols.dtype)).tolist()
        self.starts = dict(zip(first, edges[:-1]))
        self.ends = dict(zip(first, edges[1:]))

    def apply(self, start: int, tile: torch.Tensor) -> None:
        """Set the excluded scores of the chunk starting at item `start` to -inf in its tile (rows, width)."""
        lo, hi = self.starts[start], self.ends[start]
        if hi > lo:
            tile.view(-1).index_fill_(0, self.flat[lo:hi], float("-inf"))


def block_exclusions(rows: torch.Tensor | None, cols: torch.Tensor | None, lo: int, hi: int,
                     layout: Layout) -> Exclusions | None:
    """The exclusions (sorted by row) of query rows lo..hi as Exclusions of local rows, or None."""
    if rows is None or len(rows) == 0:
        return None
    a, b = int(torch.searchsorted(rows, lo)), int(torch.searchsorted(rows, hi))
    if b <= a:
        return None
    r, c = rows[a:b] - lo, cols[a:b]
    order = torch.argsort(c)
    return Exclusions(r.index_select(0, order), c.index_select(0, order), layout)


def scored_chunk(q: torch.Tensor, layout: Layout, start: int, ex: Exclusions | None, out: torch.Tensor) -> torch.Tensor:
    """The tile of block queries q against the chunk starting at item `start`, exclusions at -inf."""
    items, bias = layout.tile(start)
    return score_excluded(q, items, bias, start, ex, out)


def score_excluded(q: torch.Tensor, items: torch.Tensor, bias: torch.Tensor | None, start: int,
                   ex: Exclusions | None, out: torch.Tensor) -> torch.Tensor:
    """score_tile of the chunk starting at item `start` given as `items` (any dtype), exclusions at -inf."""
    score_tile(q, items, bias, out)
    if ex is not None:
        ex.apply(start, out)
    return out


def workers_for(nq: int) -> int:
    """Threads that take whole blocks of nq queries: torch's thread count, if each gets enough rows."""
    return max(1, min(torch.get_num_threads(), nq // (2 * MIN_ROWS_PER_THREAD)))


def run_blocks(nq: int, rows: int, workers: int, start_worker: Callable[[int], Callable[[int, int], None]]) -> None:
    """Run every block of `rows` queries (lo, hi) through a worker's block function.

    start_worker(threads) is called once on each worker's own thread and returns its block
    function: threads is what that worker's products and kernels may use (1 on a worker of many).
    Blocks are handed out one at a time, so a slow worker takes fewer.
    """
    blocks = iter(range(0, nq, rows))
    lock = threading.Lock()

    def drain(threads: int) -> None:
        do_block = start_worker(threads)
        while True:
            with lock:
                lo = next(blocks, None)
            if lo is None:
                return
            do_block(lo, min(nq, lo + rows))

    threads = torch.get_num_threads()
    if workers <= 1:
        drain(threads)
        return

    def one_core() -> None:
        torch.set_num_threads(1)  # this thread's products on its own core (OpenMP and MKL settings are per thread)
        drain(1)

    try:
        with ThreadPoolExecutor(workers) as pool:
            for done in [pool.submit(one_core) for _ in range(workers)]:
                done.result()
    finally:
        torch.set_num_threads(threads)  # the shared count, which the workers' calls also set
