"""Blocked exact top-N retrieval: score tiles of queries x items, keep each query's best N.

The full query x item score matrix is never built: tiles.py walks blocks of queries over chunks of
the catalog in reused buffers, and for each tile the compiled kernels of kernels.py keep each
row's candidates at or above its floor while the tile is still in the cache; the floor rises to the
n-th best kept whenever a row's candidates fill up.

The starting floor comes from the first step, SUB_TILES chunks spread over the catalog (a fair
sample even when the catalog is ordered by popularity, say). The n-th best of its group maxima
(groups of GROUP items) is a lower bound on the final n-th best score, since n distinct items are
that high: a safe floor. Its j-th best, with j chosen so that the whole catalog should hold well
over n items above it, is a far tighter guess; once a quarter of the catalog is seen, the guess is
made again from the candidates, a larger sample. The search runs with the guesses; a row whose
n-th best found score ends below its highest guess is searched again with the safe floor, so the
result is exact either way.

Where bfloat16 products are fast (screen.py decides), the chunks after the first step are scored
in bfloat16 and only the items whose screened score reaches the floor less a proven error bound
are rescored in float32: the same candidates as a float32 search, from products twice as fast.
"""

from __future__ import annotations

import math

import numba
import numpy as np
import torch

from towers.search import kernels as K
from towers.search import screen as S
from towers.search import tiles as T

CANDIDATES = 4  # candidate room per row, in multiples of n (when full, the n best are kept)
GUESS_SIGMAS = 3.0  # how far below the expected count a guess may fall before it fails (common practice)
LOWEST = torch.finfo(torch.float32).min


def top_n(query_vectors: torch.Tensor, item_vectors: torch.Tensor, n: int, item_bias: torch.Tensor | None = None,
          exclude_rows: torch.Tensor | None = None, exclude_cols: torch.Tensor | None = None,
          scale: float = 1.0) -> tuple[torch.Tensor, torch.Tensor]:
    """Top-n item indices and scores (q, n) for each query row, best first; excluded pairs never appear.

    score(q, i) = scale * query_vectors[q] . item_vectors[i] + item_bias[i]. exclude_rows/exclude_cols:
    parallel index tensors of (query row, item column) pairs to skip, sorted by row. Rows with fewer
    than n eligible items are padded with index -1 and score -inf.
    """
    nq, ni = query_vectors.shape[0], item_vectors.shape[0]
    n_eff = min(n, ni)
    if nq == 0 or n_eff == 0:
        return torch.full((nq, n_eff), -1, dtype=torch.int64), torch.full((nq, n_eff), float("-inf"))
    queries = query_vectors.detach().float().contiguous()
    if scale != 1.0:
        queries = queries * scale  # folded into the queries: one pass over q, not over every score
    layout = T.Layout(item_vectors, item_bias)
    screened = S.catalog_for(layout, nq)
    val, idx, missed = _search(queries, n_eff, layout, screened, exclude_rows, exclude_cols, guess=True)
    if len(missed):  # a guessed floor was too high for these rows: search them again from safe floors
        ex_r, ex_c = _rows_of_exclusions(exclude_rows, exclude_cols, missed, nq)
        again = _search(queries.index_select(0, missed), n_eff, layout, screened, ex_r, ex_c, False)
        val[missed], idx[missed] = again[0], again[1]
    return idx, val  # _best_first already gave -inf scores the index -1


def _search(queries: torch.Tensor, n: int, layout: T.Layout, screened: S.ScreenedCatalog | None, exclude_rows,
            exclude_cols, guess: bool) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor]:
    """Top-n (values, indices) of every query, block by block, and the rows whose guessed floor failed.

    screened: score the chunks after the first step in bfloat16 and rescore what may reach the floor
    (screen.py), or None for float32 products throughout.
    """
    nq = queries.shape[0]
    workers = T.workers_for(nq)
    rows = layout.rows_per_block(nq, workers, CANDIDATES * n + K.SPAN)
    val = torch.empty((nq, n), dtype=torch.float32)
    idx = torch.empty((nq, n), dtype=torch.int64)
    missed = []

    def start_worker(threads: int):
        work = Workspace(layout, rows, n, threads, screened)

        def do_block(lo: int, hi: int) -> None:
            ex = T.block_exclusions(exclude_rows, exclude_cols, lo, hi, layout)
            val[lo:hi], idx[lo:hi], block_missed = _search_block(queries[lo:hi], n, layout, work, ex, guess)
            missed.append(block_missed + lo)
        return do_block

    T.run_blocks(nq, rows, workers, start_worker)
    return val, idx, torch.sort(torch.cat(missed)).values if missed else torch.zeros(0, dtype=torch.int64)


def buffer_bytes(layout: T.Layout, nq: int, n: int, screened: bool) -> int:
    """The memory a search of nq queries for n items each takes for its buffers, all workers together
    (with the screen: its bfloat16 tiles, not the bfloat16 copy of the catalog)."""
    workers = T.workers_for(nq)
    cap = CANDIDATES * n + K.SPAN
    rows = layout.rows_per_block(nq, workers, cap)
    tiles = layout.sub_tiles * layout.sub_width * 4 + (layout.sub_width * 2 if screened else 0)
    return workers * rows * (tiles + cap * (4 + 8))


class Workspace:
    """The reusable buffers of one search: the first step's scores and each row's candidates."""

    def __init__(self, layout: T.Layout, rows: int, n: int, threads: int, screened: S.ScreenedCatalog | None = None):
        self.rows = rows  # query rows per block
        self.scores = torch.empty(layout.sub_tiles, rows, layout.sub_width)
        self.screened = screened
        if screened is not None:  # the bfloat16 tile, and its bits as int16 and uint16 for the kernel
            self.tile16 = torch.empty(rows, layout.sub_width, dtype=torch.bfloat16)
            self.bits_s = self.tile16.view(torch.int16).numpy()
            self.bits_u = self.bits_s.view(np.uint16)
        cap = CANDIDATES * n + K.SPAN  # room for a whole span after the n best are kept
        self.cand_s = np.empty((rows, cap), np.float32)
        self.cand_i = np.empty((rows, cap), np.int64)
        # threads for the scan: torch's number (so `run.threads` holds here too), run by numba's pool
        self.threads = max(1, min(threads, numba.config.NUMBA_NUM_THREADS))
        if self.threads > 1:
            numba.set_num_threads(self.threads)

    def scan(self, tile: np.ndarray, first_item: int, n: int, floor: np.ndarray, count: np.ndarray) -> None:
        """Candidates of every row of tile (rows, width), whose columns are items first_item onwards.

        The rows are split over the threads; below MIN_ROWS_PER_THREAD rows a thread is not worth starting.
        """
        parts = self._parts(tile.shape[0])
        if parts > 1:
            K.scan_tile_parallel(tile, first_item, n, floor, count, self.cand_s, self.cand_i, parts)
        else:
            K.scan_rows(tile, 0, tile.shape[0], first_item, n, floor, count, self.cand_s, self.cand_i)

    def scan_screened(self, q: np.ndarray, q16: torch.Tensor, row_bound: np.ndarray, first_item: int, n: int,
                      floor: np.ndarray, count: np.ndarray, ex: T.Exclusions | None) -> None:
        """Score the chunk at first_item in bfloat16 (exclusions at -inf) and scan it, rescoring in float32."""
        r = q.shape[0]
        items16, item_norm, real, items, bias = self.screened.chunks[first_item]
        T.score_excluded(q16, items16, None, first_item, ex, self.tile16[:r])
        t_s, t_u = self.bits_s[:r], self.bits_u[:r]
        parts = self._parts(r)
        if parts > 1:
            K.scan_screened_parallel(t_s, t_u, real, q, items, bias, row_bound, item_norm, first_item, n, floor,
                                     count, self.cand_s, self.cand_i, parts)
        else:
            K.scan_screened_rows(t_s, t_u, 0, r, real, q, items, bias, row_bound, item_norm, first_item, n, floor,
                                 count, self.cand_s, self.cand_i)

    def _parts(self, rows: int) -> int:
        return min(self.threads, rows // T.MIN_ROWS_PER_THREAD)


def _rows_of_exclusions(rows: torch.Tensor | None, cols: torch.Tensor | None, keep: torch.Tensor, nq: int):
    """The exclusions of the query rows `keep` (increasing, of nq), renumbered 0..len(keep)-1."""
    if rows is None or len(rows) == 0:
        return None, None
    new = torch.full((nq,), -1, dtype=torch.int64)
    new[keep] = torch.arange(len(keep))
    mapped = new.index_select(0, rows)
    mine = mapped >= 0
    return mapped[mine], cols[mine]  # still sorted by row: the renumbering keeps the order


def _search_block(q: torch.Tensor, n: int, layout: T.Layout, work: Workspace, ex: T.Exclusions | None, guess: bool):
    """Top-n (values, indices) over all items for one block of queries, and the rows not proven exact.

    guess: start from a guessed floor; a row whose n-th best found score ends below its guess is
    returned as missed. False starts from the safe floor, and nothing is missed.
    """
    r, w = q.shape[0], layout.sub_width
    floor = np.full(r, LOWEST, np.float32)
    count = np.zeros(r, np.int64)
    guessed = None
    refine_at = layout.ni // 4  # items seen when the guess is made again from the candidates
    seen = 0
    if work.screened is not None:
        q16, row_bound = work.screened.queries(q)
        q32 = q.numpy()
    for step, starts in enumerate(layout.steps):
        for t, a in enumerate(starts):
            if step and work.screened is not None:
                work.scan_screened(q32, q16, row_bound, a, n, floor, count, ex)
                continue
            s = T.scored_chunk(q, layout, a, ex, work.scores[t if step == 0 else 0, :r])
            if step:  # scanned at once, while the tile is in the cache
                work.scan(s.numpy(), a, n, floor, count)
        if step == 0:  # the first step sets the floor before any of it is scanned
            sample = work.scores[:len(starts), :r]
            guessed = _start_floor(sample, n, _guess_rank(n, sample.shape[0] * w, layout.ni) if guess else None, floor)
            for t, a in enumerate(starts):
                work.scan(sample[t].numpy(), a, n, floor, count)
        seen += len(starts) * w
        if guessed is not None and seen - len(starts) * w < refine_at <= seen:
            guessed = _refine_guess(work.cand_s[:r], count, _guess_rank(n, seen, layout.ni), n, guessed, floor)
    val, idx = _best_first(work.cand_s[:r], work.cand_i[:r], count, n)
    missed = np.zeros(0, np.int64) if guessed is None else np.flatnonzero(val[:, -1] < guessed)
    return torch.from_numpy(val), torch.from_numpy(idx), torch.from_numpy(missed)


def _start_floor(sample: torch.Tensor, n: int, guess_rank: int | None, floor: np.ndarray) -> np.ndarray | None:
    """Raise floor (in place) from the first step's group maxima; the guessed values, or None.

    sample: (chunks, rows, width) scores. The safe floor is the n-th best group maximum; with a
    guess_rank below n, the guess_rank-th best (at least as high) is used and returned.
    """
    t_n, r, w = sample.shape
    if t_n * (w // T.GROUP) < n:
        return None  # fewer than n groups in the first step (a tiny catalog): start from the lowest floor
    maxima = torch.amax(sample.view(t_n, r, T.GROUP, w // T.GROUP), 2).permute(1, 0, 2).reshape(r, -1)
    ranked = np.sort(maxima.numpy(), axis=1)  # numpy's sort is many times faster than torch.topk here
    np.maximum(floor, ranked[:, -n], out=floor)
    if guess_rank is None or guess_rank >= n:
        return None
    guessed = ranked[:, -guess_rank].copy()
    np.maximum(floor, guessed, out=floor)
    return guessed


def _refine_guess(cand_s: np.ndarray, count: np.ndarray, rank: int, n: int, guessed: np.ndarray,
                  floor: np.ndarray) -> np.ndarray:
    """A new guess from a larger sample: each row's rank-th best candidate so far, if above the old one.

    The candidates hold every score seen so far at or above the floor, so where a row has rank of
    them, the rank-th best of them is the rank-th best of all items seen.
    """
    if rank >= n:
        return guessed
    used = np.arange(cand_s.shape[1]) < count[:, None]
    kth = np.partition(np.where(used, cand_s, -np.inf), -rank, axis=1)[:, -rank]
    guessed = np.maximum(guessed, kth)
    np.maximum(floor, guessed, out=floor)
    return guessed


def _guess_rank(n: int, seen: int, ni: int) -> int:
    """j such that fewer than n of the ni items beat the j-th best of `seen` only GUESS_SIGMAS sd below the mean.

    The share of the catalog above the j-th best of a sample is Beta(j, seen - j + 1) distributed, of
    mean j / seen and relative sd about 1 / sqrt(j) (order statistics of a uniform sample; a normal
    approximation, standard result). So ni * j / seen * (1 - z / sqrt(j)) >= n, solved for sqrt(j).
    """
    x = (GUESS_SIGMAS + math.sqrt(GUESS_SIGMAS ** 2 + 4 * n * seen / ni)) / 2
    return max(1, min(n, math.ceil(x * x)))


# A (score, item) pair as one int64 whose order is the order of scores, then of items: the float's
# bits made monotone (negative floats have their magnitude bits flipped) in the high half, the item
# in the low half. numpy sorts such keys several times faster than torch.topk or an argsort.
_LOW = np.int64(0xFFFFFFFF)
_FLIP = np.int64(0x7FFFFFFF)


def encode(score: np.ndarray, item: np.ndarray) -> np.ndarray:
    """Sortable int64 keys of float32 scores and non-negative item indices (< 2**32)."""
    b = score.astype(np.float32, copy=False).view(np.int32).astype(np.int64)
    return (np.where(b < 0, b ^ _FLIP, b) << 32) | item


def decode(keys: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(float32 scores, int64 items) of keys made by encode."""
    high = keys >> 32
    return np.where(high < 0, high ^ _FLIP, high).astype(np.int32).view(np.float32), keys & _LOW


def _best_first(cand_s: np.ndarray, cand_i: np.ndarray, count: np.ndarray, n: int) -> tuple[np.ndarray, np.ndarray]:
    """Each row's n best candidates (scores, items), best first; -inf / -1 where a row has fewer than n."""
    r, cap = cand_s.shape
    used = np.arange(cap) < count[:, None]
    keys = np.where(used, encode(cand_s, np.maximum(cand_i, 0)), _PAD_KEY)
    best = np.partition(keys, cap - n, axis=1)[:, cap - n:]  # the n largest keys, then only they are sorted
    score, item = decode(np.ascontiguousarray(np.sort(best, axis=1)[:, ::-1]))
    item[np.isneginf(score)] = -1
    return score, item


_PAD_KEY = encode(np.array([-np.inf], np.float32), np.array([0], np.int64))[0]
