"""Blocked exact top-N retrieval: score tiles of queries x items, keep each query's best N.

The full query x item score matrix is never built: one tile of BLOCK_ENTRIES scores is reused for
the whole search, so the extra memory is bounded by the tile, not by the catalog.

Selection costs little next to the matrix product because most of each tile is pruned before any
sorting: after the first tile every query has a running N-th best score, and a later tile is cut
into groups of GROUP consecutive items whose maximum is one cheap reduction. Only groups whose
maximum beats the query's running N-th best are gathered and merged with topk; on real and random
data that is a small share of the tile after the first few tiles. A tile where many groups pass
falls back to a plain topk over the tile, so the result is exact either way.
"""

from __future__ import annotations

import torch

BLOCK_ENTRIES = 1 << 22  # scores per tile (16 MB of float32): the extra memory of one search
ITEM_TILE = 8192  # items per tile when the catalog is larger (a multiple of GROUP)
GROUP = 32  # items per group in the pre-filter
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
    out_idx = torch.full((nq, n_eff), -1, dtype=torch.int64)
    out_score = torch.full((nq, n_eff), float("-inf"), dtype=torch.float32)
    if nq == 0 or n_eff == 0:
        return out_idx, out_score
    queries = query_vectors.float()
    if scale != 1.0:
        queries = queries * scale  # folded into the queries: one pass over q, not over every score
    items = item_vectors.float().contiguous()
    bias = None if item_bias is None else item_bias.float().contiguous()
    cols = ni if ni <= 2 * ITEM_TILE else ITEM_TILE
    rows = max(1, min(nq, BLOCK_ENTRIES // cols))
    tile = torch.empty(rows * cols)
    has_ex = exclude_rows is not None and len(exclude_rows) > 0
    for lo in range(0, nq, rows):
        hi = min(nq, lo + rows)
        ex = _block_exclusions(exclude_rows, exclude_cols, lo, hi) if has_ex else None
        val, idx = _search_block(queries[lo:hi], items, bias, n_eff, tile, cols, ex)
        out_score[lo:hi], out_idx[lo:hi] = val, idx
    out_idx[torch.isneginf(out_score)] = -1
    return out_idx, out_score


def _block_exclusions(rows: torch.Tensor, cols: torch.Tensor, lo: int, hi: int):
    """The exclusions of query rows lo..hi as (local row, column), sorted by column, or None."""
    a, b = int(torch.searchsorted(rows, lo)), int(torch.searchsorted(rows, hi))
    if b <= a:
        return None
    r, c = rows[a:b] - lo, cols[a:b]
    order = torch.argsort(c)
    return r.index_select(0, order), c.index_select(0, order)


def score_tile(queries: torch.Tensor, items: torch.Tensor, bias: torch.Tensor | None, out: torch.Tensor) -> torch.Tensor:
    """out = queries @ items.T (+ bias per item), written into the given buffer."""
    if bias is None:
        return torch.mm(queries, items.T, out=out)
    return torch.addmm(bias, queries, items.T, out=out)


def _search_block(q: torch.Tensor, items: torch.Tensor, bias: torch.Tensor | None, n: int, tile: torch.Tensor,
                  cols: int, ex) -> tuple[torch.Tensor, torch.Tensor]:
    """Exact top-n over all items for one block of queries, one item tile at a time."""
    r, ni = q.shape[0], items.shape[0]
    best = _Running(r, n)
    for j0 in range(0, ni, cols):
        j1 = min(ni, j0 + cols)
        c = j1 - j0
        s = tile[:r * c].view(r, c)  # contiguous, whatever the tile's shape
        score_tile(q, items[j0:j1], None if bias is None else bias[j0:j1], s)
        if ex is not None:
            a, b = int(torch.searchsorted(ex[1], j0)), int(torch.searchsorted(ex[1], j1))
            if b > a:
                s[ex[0][a:b], ex[1][a:b] - j0] = float("-inf")
        if c % GROUP or c // GROUP < n:
            # a tile that is not whole groups, or has fewer groups than n: a plain topk
            best.merge_tile(s, j0)
        else:
            best.add_pruned(s, j0)
    best.flush()
    return best.val, best.idx


class _Running:
    """Each query's running top-n (sorted, best first), plus candidates waiting to be merged into it.

    `floor` is a lower bound on each row's final n-th best score, so no score below it can be in the
    result: the running n-th best, raised by the n-th best group maximum of any tile seen (n distinct
    scores were that high). Candidates at or above the floor are collected from several tiles and
    merged with one topk, because a topk per tile would cost more than the tiles' few candidates.
    """

    def __init__(self, rows: int, n: int):
        self.n = n
        self.val = torch.full((rows, n), float("-inf"))
        self.idx = torch.full((rows, n), -1, dtype=torch.int64)
        self.floor = torch.full((rows, 1), LOWEST)  # LOWEST, not -inf: excluded (-inf) entries never pass
        self.pending: list[tuple[torch.Tensor, torch.Tensor, torch.Tensor]] = []
        self.waiting = 0

    def merge_tile(self, s: torch.Tensor, j0: int) -> None:
        """Merge a whole tile with a plain topk."""
        v, i = torch.topk(s, min(self.n, s.shape[1]), dim=1)
        self._merge(torch.arange(s.shape[0]), v, i + j0)

    def add_pruned(self, s: torch.Tensor, j0: int) -> None:
        """Collect the scores of a tile (width a multiple of GROUP) that can still reach the top n."""
        r, width = s.shape
        groups = s.view(r, width // GROUP, GROUP)
        tops = groups.amax(2)  # (r, groups): each group's best score
        hit = tops >= self.floor
        if int(hit.sum()) * 8 > hit.numel():  # a weak floor (the first tiles): raise it with this tile
            kth = torch.topk(tops, self.n, dim=1, sorted=False).values.amin(1, keepdim=True)
            torch.maximum(self.floor, kth, out=self.floor)
            hit = tops >= self.floor
        hit_rows, hit_groups = hit.nonzero(as_tuple=True)  # row-major order
        if len(hit_rows) == 0:
            return
        if len(hit_rows) * 2 > hit.numel():
            # most groups pass (many equal scores, or rows with few finite ones): a plain topk
            self.merge_tile(s, j0)
            return
        # flat index_select rather than advanced indexing: the same gathers, several times faster
        vals = groups.view(-1, GROUP).index_select(0, hit_rows * tops.shape[1] + hit_groups)
        g_at, offset = (vals >= self.floor.index_select(0, hit_rows)).nonzero(as_tuple=True)  # row order kept
        self.pending.append((hit_rows.index_select(0, g_at), hit_groups.index_select(0, g_at) * GROUP + offset + j0,
                             vals.view(-1).index_select(0, g_at * GROUP + offset)))
        self.waiting += len(g_at)
        if self.waiting > self.val.numel() // 2:
            self.flush()

    def flush(self) -> None:
        """Merge the waiting candidates: pack each row's left into (rows with any, most), -inf elsewhere."""
        if not self.pending:
            return
        if len(self.pending) == 1:
            rows, cols, score = self.pending[0]
        else:  # concatenated tiles: sort by row (stable keeps each row's order) for the packing below
            rows, cols, score = (torch.cat(t) for t in zip(*self.pending))
            order = torch.argsort(rows, stable=True)
            rows, cols, score = rows.index_select(0, order), cols.index_select(0, order), score.index_select(0, order)
        self.pending, self.waiting = [], 0
        r = self.val.shape[0]
        per_row = torch.bincount(rows, minlength=r)
        rows_hit = torch.nonzero(per_row).flatten()
        local = torch.zeros(r, dtype=torch.int64)
        local[rows_hit] = torch.arange(len(rows_hit))
        slot = torch.arange(len(rows)) - (torch.cumsum(per_row, 0) - per_row).index_select(0, rows)
        most = int(per_row.max())
        packed_v = torch.full((len(rows_hit), most), float("-inf"))
        packed_i = torch.full((len(rows_hit), most), -1, dtype=torch.int64)
        at = local.index_select(0, rows) * most + slot
        packed_v.view(-1).index_copy_(0, at, score)
        packed_i.view(-1).index_copy_(0, at, cols)
        self._merge(rows_hit, packed_v, packed_i)

    def _merge(self, rows: torch.Tensor, v: torch.Tensor, cols: torch.Tensor) -> None:
        """best[rows] = top-n of (best[rows], new candidates v / cols of those rows)."""
        all_v = torch.cat([self.val.index_select(0, rows), v], 1)
        all_i = torch.cat([self.idx.index_select(0, rows), cols], 1)
        top_v, pos = torch.topk(all_v, self.n, dim=1)
        self.val[rows] = top_v
        self.idx[rows] = all_i.gather(1, pos)
        torch.maximum(self.floor, self.val[:, -1:], out=self.floor)
