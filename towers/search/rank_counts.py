"""Full-catalog standing of held-out positives, counted tile by tile without the query x item score matrix.

For each positive it counts its query's candidates with a strictly higher score (`ahead`, other
positives included) and those with exactly its score (`tied`, the positive itself left out); excluded
candidates (-inf) never count. metrics.per_query_ranking turns the two counts into the metrics'
expected values over random orders of the ties; metrics.ranks_of_positives makes the same counts on
a whole block of scores in plain tensors. Here tiles.py walks blocks of queries over chunks of the
catalog, and a compiled (numba) kernel counts each chunk's tile while it is still in the cache. One
vectorised pass per row finishes the scores (scale, then item, query and global bias, each rounded in
float32), counts the row's candidates and the scores that reach its lowest positive; when none do,
the row is done. Otherwise each positive, lowest first, takes one vectorised pass (two compares a
score; a positive whose score equals the previous one reuses its counts) until one is out of reach.
A row with many positives instead searches each column that reaches its lowest positive among its
sorted positives, when that is cheaper than a pass per positive: one binary search for the positives
strictly below the column, and a second, only when the column equals a positive's score, for those
at or below it.

A positive's own score must be the very float32 value its tile holds, or a last-bit difference moves
it out of (or into) a tie. So each block first scores its positives with the same product (the same
query rows against a chunk-wide tile of the positives' items), and the kernel records what the tiles
really held; a block where the two differ is counted again with the tiles' values.
"""

from __future__ import annotations

import numba
import numpy as np
import torch

from towers.search import tiles as T

# A row with at least MANY positives is counted by one pass over the columns that reach its lowest
# positive, each searched among the sorted positives, instead of one pass per positive, where that
# is cheaper: a search step costs about SEARCH_COST scores of a pass (measured: some 6 ns against 0.09)
MANY = 32
SEARCH_COST = 64
# MKL computes products of fewer than 12 rows (not a multiple of 4) with other kernels, whose last
# bits differ; smaller blocks are padded with zero rows, so that a query's scores, and so its ranks,
# do not depend on how the queries were cut into blocks (thread count, buffer size)
PRODUCT_ROWS = 16
_U = np.uint64  # unsigned tile indices, as in kernels.py: numba then reads tiles with vector loads
_NEG = np.float32(-np.inf)
_ONE, _ZERO = np.float32(1.0), np.float32(0.0)


@numba.njit(boundscheck=False, cache=True, nogil=True)
def _score(v, scale, item_bias, query_bias, global_bias):
    """A raw product v finished as an evaluation score: scale, then each bias, rounded in float32 in that order."""
    return ((v * scale + item_bias) + query_bias) + global_bias


@numba.njit(boundscheck=False, cache=True, nogil=True)
def finish_scores(raw, item_bias, query_bias, scale, global_bias, out):
    """out[p] = _score(raw[p], ...) with per-entry biases: the positives' own scores, as the tiles make them."""
    for p in range(raw.shape[0]):
        out[p] = _score(raw[p], scale, item_bias[p], query_bias[p], global_bias)


# fastmath's reassociation lets the sums vectorise; they add 0s and 1s (below 2**24), so any order is exact
@numba.njit(boundscheck=False, cache=True, nogil=True, fastmath={"reassoc"})
def _above_and_equal(tile, row, s):
    """How many scores of the tile row are above s, and how many equal it (float32 counts)."""
    above = _ZERO
    equal = _ZERO
    for j in range(_U(tile.shape[1])):
        v = tile[row, j]
        above += _ONE if v > s else _ZERO
        equal += _ONE if v == s else _ZERO
    return above, equal


@numba.njit(boundscheck=False, cache=True, nogil=True)
def _below(v, own, first, m):
    """How many of the positives first..first+m-1 (m >= 1, sorted by score) score below v.

    A binary search whose steps depend on m only and move by a product, not a jump: nothing to
    mispredict, and the searches of successive columns overlap in the processor.
    """
    base, n = first, m
    while n > 1:
        half = n >> 1
        base += half * (v > own[base + half])
        n -= half
    return base - first + (v > own[base])


@numba.njit(boundscheck=False, cache=True, nogil=True)
def _at_or_below(v, own, first, m):
    """How many of the positives first..first+m-1 (m >= 1, sorted by score) score v or below; as _below."""
    base, n = first, m
    while n > 1:
        half = n >> 1
        base += half * (v >= own[base + half])
        n -= half
    return base - first + (v >= own[base])


@numba.njit(boundscheck=False, cache=True, nogil=True)
def count_tile(tile, first_item, item_bias, scale, query_bias, global_bias,
               starts, items, own, ahead, tied, seen, candidates, many, search_cost):
    """Count, for each positive of the tile's rows, the tile's columns scoring above it and those scoring the same.

    tile (rows, width) float32: raw products of the rows' queries with items first_item onwards,
    excluded pairs and padding items at -inf; finished in place (scale, item_bias (width,), the
    row's query_bias, global_bias; NaN becomes -inf, so that it counts nowhere, as in
    ranks_of_positives). Positives of row i are starts[i]..starts[i+1], sorted by score: catalog
    column items[p], score own[p]. Adds to ahead[p] (int64) the columns scoring above positive p,
    to tied[p] those scoring exactly own[p] (its own column included: the caller takes it off), and
    to candidates[i] the row's scores above -inf; sets seen[p] to the tile's score at p's own
    column when it is here. many, search_cost: MANY and SEARCH_COST (arguments, since numba would
    freeze globals into the cached machine code).
    """
    r = tile.shape[0]
    width = tile.shape[1]
    w = _U(width)
    most = 0
    for i in range(r):
        most = max(most, starts[i + 1] - starts[i])
    below = np.zeros(most + 1, np.int64)  # columns by how many of the row's positives score below them
    at_or_below = np.zeros(most + 1, np.int64)  # ... and by how many score at or below them
    for i in range(r):
        row = _U(i)
        first, m = starts[i], starts[i + 1] - starts[i]
        low = own[first] if m else np.float32(np.inf)  # the row's lowest positive score
        qb = query_bias[i]
        n = 0
        reach = 0
        for j in range(w):  # vectorised: finish the scores, count candidates and those reaching `low`
            v = tile[row, j]
            t = _score(v, scale, item_bias[j], qb, global_bias)
            t = t if (v > _NEG) & (t == t) else _NEG
            tile[row, j] = t
            n += t > _NEG
            reach += t >= low
        candidates[i] += n
        for p in range(first, first + m):
            col = items[p] - first_item
            if 0 <= col < width:
                seen[p] = tile[row, col]
        if reach == 0:
            continue  # no column reaches even the lowest positive: none is above or tied with any of them
        levels = 1
        while (1 << levels) <= m:
            levels += 1
        if m >= many and reach * levels * search_cost < m * width:
            below[:m + 1] = 0
            at_or_below[:m + 1] = 0
            for j in range(w):  # only the columns that reach the lowest positive are searched
                v = tile[row, j]
                if v >= low:
                    b = _below(v, own, first, m)
                    c = b
                    if b < m and own[first + b] == v:  # the column ties positive b (and maybe more)
                        c = b + _at_or_below(v, own, first + b, m - b)
                    below[b] += 1
                    at_or_below[c] += 1
            n_above = 0
            n_reach = 0
            for k in range(m - 1, -1, -1):
                # positive k: above it the columns with more than k positives below them, at or
                # above it those with more than k at or below them
                n_above += below[k + 1]
                n_reach += at_or_below[k + 1]
                ahead[first + k] += n_above
                tied[first + k] += n_reach - n_above
            continue
        prev = np.float32(np.nan)  # never equal: the first positive always takes a pass
        above, equal = _ZERO, _ZERO
        for p in range(first, first + m):  # one pass per distinct score, lowest first
            s = own[p]
            if s != prev:
                above, equal = _above_and_equal(tile, row, s)
                prev = s
            if above + equal == 0:
                break  # nothing reaches this positive, so nothing reaches the higher ones either
            ahead[p] += np.int64(above)
            tied[p] += np.int64(equal)


def rank_counts(query_vectors: torch.Tensor, item_vectors: torch.Tensor, rows: torch.Tensor, items: torch.Tensor,
                item_bias: torch.Tensor | None = None, query_bias: torch.Tensor | None = None,
                global_bias: float = 0.0, scale: float = 1.0, exclude_rows: torch.Tensor | None = None,
                exclude_cols: torch.Tensor | None = None) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor]:
    """For each positive (rows[p], items[p]), its row's candidates scoring above it and those tied with it.

    score(q, i) = ((scale * query_vectors[q] . item_vectors[i] + item_bias[i]) + query_bias[q]) + global_bias,
    in float32 and rounded in that order. Pairs (exclude_rows, exclude_cols) are no candidates.
    Returns int64 ahead (P,): candidates with a strictly higher score (other positives included);
    int64 tied (P,): candidates with exactly the positive's score, itself not counted; int64
    candidates (n_queries,): the scores above -inf in each row. Every positive must have a finite
    score (ValueError otherwise, as ranks_of_positives).
    """
    nq, ni = query_vectors.shape[0], item_vectors.shape[0]
    rows, items = rows.long(), items.long()
    if rows.shape != items.shape or rows.dim() != 1:
        raise ValueError(f"rows and items must be 1-D of equal length, got {tuple(rows.shape)} and {tuple(items.shape)}")
    if len(rows) and (rows.min() < 0 or rows.max() >= nq or items.min() < 0 or items.max() >= ni):
        raise ValueError(f"positives must lie in [0, {nq}) x [0, {ni})")
    ahead = np.zeros(len(rows), np.int64)
    tied = np.zeros(len(rows), np.int64)
    candidates = np.zeros(nq, np.int64)
    if nq == 0 or ni == 0:
        return torch.from_numpy(ahead), torch.from_numpy(tied), torch.from_numpy(candidates)

    queries = query_vectors.detach().float().contiguous()
    # item biases are added in the kernel, after the scale, as the score is defined (an addmm would
    # add them before): the layout gets none, and only its padding items have bias -inf
    layout = T.Layout(item_vectors, None)
    w = layout.sub_width
    i_bias = np.zeros(layout.padded, np.float32)
    if item_bias is not None:
        i_bias[:ni] = item_bias.detach().float().numpy()
    q_bias = np.zeros(nq, np.float32) if query_bias is None else query_bias.detach().float().numpy()

    order = torch.argsort(rows, stable=True)  # positives grouped by row
    p_rows = rows.index_select(0, order).numpy()
    p_items = items.index_select(0, order).numpy()
    starts = np.concatenate([[0], np.cumsum(np.bincount(p_rows, minlength=nq))]).astype(np.int64)
    above = np.zeros(len(rows), np.int64)  # in the grouped order
    same = np.zeros(len(rows), np.int64)
    if exclude_rows is not None and len(exclude_rows):
        ex_rows, ex_cols = exclude_rows, exclude_cols
        if not bool((exclude_rows[1:] >= exclude_rows[:-1]).all()):  # block_exclusions wants them by row
            ex_order = torch.argsort(exclude_rows, stable=True)
            ex_rows, ex_cols = exclude_rows[ex_order], exclude_cols[ex_order]
    else:
        ex_rows = ex_cols = None
    finish = (i_bias, q_bias, np.float32(scale), np.float32(global_bias))

    workers = T.workers_for(nq)
    rows_per_block = layout.rows_per_block(nq, workers, w)

    def start_worker(threads: int):
        tile = torch.empty(max(rows_per_block, PRODUCT_ROWS), w)
        padded_q = torch.zeros(PRODUCT_ROWS, queries.shape[1])
        own_items = torch.zeros(w, queries.shape[1])

        def do_block(lo: int, hi: int) -> None:
            r, p0, p1 = hi - lo, int(starts[lo]), int(starts[hi])
            q = queries[lo:hi]
            if r < PRODUCT_ROWS:
                padded_q[:r] = q
                padded_q[r:] = 0.0
                q = padded_q
            out = tile[:q.shape[0]]
            ex = T.block_exclusions(ex_rows, ex_cols, lo, hi, layout)
            local = p_rows[p0:p1] - lo
            own = _own_scores(q, layout, local, p_items[p0:p1], lo, finish, own_items, out)
            sweep = (q, layout, ex, out, lo, local, p_items[p0:p1], finish, candidates[lo:hi])
            above[p0:p1], same[p0:p1], seen = _count_block(own, *sweep)
            if not np.isfinite(seen).all():
                # an excluded or NaN positive has no meaningful rank (as in ranks_of_positives)
                raise ValueError("every positive must have a finite score (is a held-out positive also excluded?)")
            if not np.array_equal(seen, own):  # the two products rounded differently: count with the tiles' values
                above[p0:p1], same[p0:p1], again = _count_block(seen, *sweep)
                if not np.array_equal(again, seen):
                    raise RuntimeError("the same products gave different scores twice")
        return do_block

    T.run_blocks(nq, rows_per_block, workers, start_worker)
    ahead[order.numpy()] = above
    tied[order.numpy()] = same
    return torch.from_numpy(ahead), torch.from_numpy(tied), torch.from_numpy(candidates)


def _own_scores(q: torch.Tensor, layout: T.Layout, local: np.ndarray, p_items: np.ndarray, lo: int, finish: tuple,
                own_items: torch.Tensor, out: torch.Tensor) -> np.ndarray:
    """The block's positives' scores from products of the same shape as the tiles' (its rows x a chunk width).

    The positives' distinct items fill tiles of at most sub_width columns, whole groups of GROUP
    (zero-padded): the same query rows and such widths make the same product kernels run, so the
    scores equal the tiles' to the last bit (and where they do not, the block is counted again).
    local: the positives' rows in the block; finish: (item bias, query bias, scale, global bias).
    """
    w = layout.sub_width
    distinct, where = np.unique(p_items, return_inverse=True)
    raw = np.empty(len(p_items), np.float32)
    for c0 in range(0, len(distinct), w):
        part = torch.from_numpy(distinct[c0:c0 + w])
        width = min(w, T.round_up(len(part), T.GROUP))  # whole groups, as every chunk of the layout
        own_items[:len(part)] = layout.items.index_select(0, part)
        own_items[len(part):width] = 0.0
        tile = out.view(-1)[:out.shape[0] * width].view(out.shape[0], width)
        s = T.score_tile(q, own_items[:width], None, tile).numpy()
        mine = (where >= c0) & (where < c0 + w)
        raw[mine] = s[local[mine], where[mine] - c0]
    i_bias, q_bias, scale, global_bias = finish
    own = np.empty(len(p_items), np.float32)
    finish_scores(raw, i_bias[p_items], q_bias[lo + local], scale, global_bias, own)
    return own


def _count_block(own: np.ndarray, q: torch.Tensor, layout: T.Layout, ex: T.Exclusions | None, out: torch.Tensor,
                 lo: int, local: np.ndarray, p_items: np.ndarray, finish: tuple,
                 candidates: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """One sweep of a block over every chunk, its positives (grouped by row) scored `own`.

    Returns the positives' ahead and tied counts and the scores their tiles held, in the given
    order; sets the block's candidates (n_rows,) in place.
    """
    r, w = len(candidates), layout.sub_width
    i_bias, q_bias, scale, global_bias = finish
    by_score = np.lexsort((own, local))  # the kernel's order: by row, then score
    items_s, own_s = p_items[by_score], own[by_score]
    starts = np.searchsorted(local, np.arange(r + 1)).astype(np.int64)
    above = np.zeros(len(own), np.int64)
    same = np.zeros(len(own), np.int64)
    seen = np.full(len(own), np.nan, np.float32)
    candidates[:] = 0
    for step in layout.steps:
        for a in step:
            s = T.scored_chunk(q, layout, a, ex, out).numpy()[:r]
            count_tile(s, a, i_bias[a:a + w], scale, q_bias[lo:lo + r], global_bias,
                       starts, items_s, own_s, above, same, seen, candidates, MANY, SEARCH_COST)
    same -= (seen == own_s).astype(np.int64)  # a positive's own column tied with it wherever its tile held its score
    ahead, tied, tile_scores = np.empty_like(above), np.empty_like(same), np.empty_like(seen)
    ahead[by_score], tied[by_score], tile_scores[by_score] = above, same, seen
    return ahead, tied, tile_scores
