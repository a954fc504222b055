"""Blocked exact top-N retrieval: score tiles of queries x items, keep each query's best N.

The full query x item score matrix is never built: one buffer of BLOCK_ENTRIES scores is reused for
the whole search, so the extra memory is bounded by that buffer, not by the catalog.

Selection costs little next to the matrix products because most scores are pruned before any
sorting. Scores are computed SUB_TILE items at a time (a product whose output still sits in the
cache), and each sub-tile is cut at once into groups of GROUP items (every n_groups-th column, so the
group maxima are one vectorised reduction over the cached scores). A selection step looks at the
group maxima of SUB_TILES sub-tiles together: only groups whose maximum reaches the query's floor,
a lower bound on its final n-th best score, are gathered, and their scores at or above the floor
wait to be merged into the running top-n with one topk every few steps. The floor is the running
n-th best, raised on the first steps by the n-th best group maximum (n distinct scores are that
high). A step where most groups pass falls back to a plain topk, so the result is exact either way.
"""

from __future__ import annotations

import torch

BLOCK_ENTRIES = 1 << 22  # scores in the reusable buffer (16 MB of float32): the extra memory of a search
SUB_TILE = 2048  # items per matrix product (a multiple of GROUP)
SUB_TILES = 4  # sub-tiles per selection step
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
    layout = Layout(ni)
    rows = max(1, min(nq, BLOCK_ENTRIES // layout.step_width))
    buffer = torch.empty(layout.sub_tiles, rows, layout.sub_width)
    has_ex = exclude_rows is not None and len(exclude_rows) > 0
    for lo in range(0, nq, rows):
        hi = min(nq, lo + rows)
        ex = _block_exclusions(exclude_rows, exclude_cols, lo, hi) if has_ex else None
        val, idx = _search_block(queries[lo:hi], items, bias, n_eff, buffer, layout, ex)
        out_score[lo:hi], out_idx[lo:hi] = val, idx
    out_idx[torch.isneginf(out_score)] = -1
    return out_idx, out_score


class Layout:
    """How a catalog of ni items is cut: steps of up to SUB_TILES sub-tiles of up to SUB_TILE items."""

    def __init__(self, ni: int):
        self.ni = ni
        # a small catalog is one step of one sub-tile, rounded up to whole groups
        self.sub_width = min(-(-SUB_TILE // GROUP) * GROUP, -(-ni // GROUP) * GROUP)
        self.sub_tiles = max(1, min(SUB_TILES, -(-ni // self.sub_width)))
        self.step_width = self.sub_width * self.sub_tiles

    def sub_tiles_of(self, j0: int):
        """(first item, items) of each sub-tile of the step starting at item j0."""
        for t in range(self.sub_tiles):
            a = j0 + t * self.sub_width
            if a >= self.ni:
                return
            yield a, min(self.ni, a + self.sub_width) - a


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


def _search_block(q: torch.Tensor, items: torch.Tensor, bias: torch.Tensor | None, n: int, buffer: torch.Tensor,
                  layout: Layout, ex) -> tuple[torch.Tensor, torch.Tensor]:
    """Exact top-n over all items for one block of queries, one selection step at a time."""
    r = q.shape[0]
    best = _Running(r, n)
    n_groups = layout.sub_width // GROUP
    tops = torch.empty(layout.sub_tiles, r, n_groups)  # group maxima of one step: (sub-tile, row, group)
    for j0 in range(0, layout.ni, layout.step_width):
        widths = []
        for t, (a, c) in enumerate(layout.sub_tiles_of(j0)):
            width = -(-c // GROUP) * GROUP
            s = buffer[t].view(-1)[:r * width].view(r, width)
            score_tile(q, items[a:a + c], None if bias is None else bias[a:a + c], s[:, :c])
            if width > c:
                s[:, c:] = float("-inf")
            if ex is not None:
                lo, hi = int(torch.searchsorted(ex[1], a)), int(torch.searchsorted(ex[1], a + c))
                if hi > lo:
                    s[ex[0][lo:hi], ex[1][lo:hi] - a] = float("-inf")
            # group maxima now, while this sub-tile's scores are still in the cache; group g of a
            # sub-tile of width w holds its columns g, g + w/GROUP, g + 2w/GROUP, ...
            if width == layout.sub_width:
                torch.amax(s.view(r, GROUP, n_groups), 1, out=tops[t])
            else:
                tops[t, :, :width // GROUP] = s.view(r, GROUP, -1).amax(1)
                tops[t, :, width // GROUP:] = float("-inf")
            widths.append(width)
        best.add_step(tops[:len(widths)], widths, j0, buffer, layout.sub_width)
    best.flush()
    return best.val, best.idx


class _Running:
    """Each query's running top-n (sorted, best first), plus candidates waiting to be merged into it.

    `floor` is a lower bound on each row's final n-th best score, so no score below it can be in the
    result. Candidates at or above the floor are collected over several steps and merged with one
    topk, because a topk per step would cost more than the steps' few candidates.
    """

    def __init__(self, rows: int, n: int):
        self.n = n
        self.val = torch.full((rows, n), float("-inf"))
        self.idx = torch.full((rows, n), -1, dtype=torch.int64)
        self.floor = torch.full((rows, 1), LOWEST)  # LOWEST, not -inf: excluded (-inf) entries never pass
        self.pending: list[tuple[torch.Tensor, torch.Tensor, torch.Tensor]] = []
        self.waiting = 0
        self.weak = True  # no score seen yet

    def add_step(self, tops: torch.Tensor, widths: list[int], j0: int, buffer: torch.Tensor, sub_width: int) -> None:
        """Collect the scores of one step that can still reach the top n.

        tops: (sub-tiles, rows, groups) group maxima; sub-tile t holds the items j0 + t * sub_width
        onwards, its scores (rows, widths[t]) at the start of buffer[t].
        """
        r, n = self.val.shape
        n_sub, _, ng = tops.shape
        can_raise = n_sub * ng >= n
        if self.weak and can_raise:  # nothing seen yet: start from this step's n-th best group maximum
            self._raise_floor(tops)
        found = (tops >= self.floor).nonzero(as_tuple=True)
        if len(found[0]) * 8 > tops.numel() and can_raise and not self.weak:
            # still a weak floor (the first steps): raise it to the n-th best group maximum of this step
            self._raise_floor(tops)
            found = (tops >= self.floor).nonzero(as_tuple=True)
        self.weak = False
        if len(found[0]) == 0:
            return
        if len(found[0]) * 2 > tops.numel():
            # most groups pass (many equal scores, rows with few finite ones, or a tiny step): plain topk
            for t, width in enumerate(widths):
                s = buffer[t].view(-1)[:r * width].view(r, width)
                v, i = torch.topk(s, min(n, width), dim=1)
                keep = v > float("-inf")  # padding columns past the catalog end are -inf
                self._merge(torch.arange(r), v, torch.where(keep, i + j0 + t * sub_width, -1))
            return
        t_of, rows, group = found  # in sub-tile order (nonzero is row-major over (sub-tile, row, group))
        # gather each passing group's members: advanced indexing of a (row, group, member) view of each
        # sub-tile, many times faster than building one flat index per member
        per_sub = torch.bincount(t_of, minlength=len(widths)).tolist()
        parts = []
        for t, (width, rows_t, group_t) in enumerate(zip(widths, rows.split(per_sub), group.split(per_sub))):
            if len(rows_t):
                s = buffer[t].view(-1)[:r * width].view(r, width)
                parts.append(s.view(r, GROUP, width // GROUP).permute(0, 2, 1)[rows_t, group_t])
        vals = torch.cat(parts) if len(parts) > 1 else parts[0]  # (passing groups, GROUP)
        at, k = (vals >= self.floor.index_select(0, rows)).nonzero(as_tuple=True)
        stride = (torch.tensor(widths, dtype=torch.int64) // GROUP).index_select(0, t_of.index_select(0, at))
        self.pending.append((rows.index_select(0, at),
                             j0 + t_of.index_select(0, at) * sub_width + group.index_select(0, at) + k * stride,
                             vals[at, k]))
        self.waiting += len(at)
        if self.waiting > self.val.numel() // 2:
            self.flush()

    def _raise_floor(self, tops: torch.Tensor) -> None:
        """floor = max(floor, n-th best group maximum of this step): n distinct scores are that high."""
        per_row = tops.permute(1, 0, 2).reshape(tops.shape[1], -1)
        kth = torch.topk(per_row, self.n, dim=1, sorted=False).values.amin(1, keepdim=True)
        torch.maximum(self.floor, kth, out=self.floor)

    def flush(self) -> None:
        """Merge the waiting candidates: pack each row's left into (rows with any, most), -inf elsewhere."""
        if not self.pending:
            return
        rows, cols, score = (torch.cat(t) for t in zip(*self.pending)) if len(self.pending) > 1 else self.pending[0]
        order = torch.argsort(rows, stable=True)  # grouped by row for the packing below
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
