"""The score of a pair, for every model and every path (evaluation, top-N lists, exports, the API).

score(q, c) = scale * q_vec . c_vec + q_bias + c_bias + global_bias, with scale = 1 / temperature.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import torch

from towers.search.retrieval import top_n

FORMULA = "dot(query, item) / temperature + query bias + item bias + global bias"
FORMULA_NO_BIAS = "dot(query, item) / temperature"


@dataclass
class Scorer:
    """Any model as vectors: score(q, c) = scale * q_vec . c_vec + q_bias + c_bias + global_bias."""

    query_vectors: torch.Tensor
    item_vectors: torch.Tensor
    query_bias: torch.Tensor | None = None
    item_bias: torch.Tensor | None = None
    global_bias: float = 0.0
    scale: float = 1.0
    # when given, query_vectors and query_bias hold only some queries: catalog row r is their row
    # query_place[r] (-1: not held); a process of a divided log evaluates only its own users (runs/train.py)
    query_place: torch.Tensor | None = None

    def over_items(self, item_rows: torch.Tensor) -> "Scorer":
        """The same model restricted to some items (column j is item_rows[j]): selected once, not per block."""
        bias = None if self.item_bias is None else self.item_bias.index_select(0, item_rows)
        return Scorer(self.query_vectors, self.item_vectors.index_select(0, item_rows), self.query_bias, bias,
                      self.global_bias, self.scale, self.query_place)

    def for_queries(self, rows: torch.Tensor, vectors: torch.Tensor | None = None) -> "Scorer":
        """The same model for some query rows (row i is rows[i]; rows may repeat, one per event), with their own
        vectors where given (context-aware towers) and their biases."""
        at = self._held(rows)
        qv = vectors if vectors is not None else self.query_vectors.index_select(0, at)
        qb = None if self.query_bias is None else self.query_bias.index_select(0, at)
        return Scorer(qv, self.item_vectors, qb, self.item_bias, self.global_bias, self.scale)

    def _held(self, rows: torch.Tensor) -> torch.Tensor:
        """Where catalog query rows are in query_vectors."""
        if self.query_place is None:
            return rows
        at = self.query_place.index_select(0, rows)
        if bool((at < 0).any()):
            raise RuntimeError("a query whose vector this scorer does not hold was asked for")  # a bug, not bad input
        return at

    def top(self, n: int, exclude_rows: torch.Tensor | None = None, exclude_cols: torch.Tensor | None = None):
        """Each query's n best items as (item rows, scores), both (queries, n), best first; padding rows are -1.

        Exact top-N over the whole catalog (retrieval.py) of scale * q.x + item bias, then the query and
        global biases, which shift a query's scores alike and so never change its order. Excluded
        (query, item) cells are given sorted by query. Rows are query_vectors' rows (after for_queries,
        the rows asked for).
        """
        idx, scores = top_n(self.query_vectors, self.item_vectors, n, self.item_bias, exclude_rows, exclude_cols,
                            self.scale)
        if self.query_bias is not None:
            scores = scores + self.query_bias.unsqueeze(1)
        return idx, scores + self.global_bias

    def formula(self, biases: bool = True) -> str:
        """The score function in words, as exported files record it."""
        return FORMULA if biases else FORMULA_NO_BIAS

    def pairs(self, q: torch.Tensor, c: torch.Tensor) -> torch.Tensor:
        q = self._held(q)
        s = (self.query_vectors.index_select(0, q) * self.item_vectors.index_select(0, c)).sum(1) * self.scale
        if self.item_bias is not None:
            s = s + self.item_bias.index_select(0, c)
        if self.query_bias is not None:
            s = s + self.query_bias.index_select(0, q)
        return s + self.global_bias


CELLS_CHUNK = 1 << 20  # known pairs looked at a time: a log's known pairs may be longer than memory (spill.py)
_ROW = 31  # a cell's key: ranking row << _ROW | column (columns and rows below 2^31)


def known_chunks(known: list[tuple[torch.Tensor, torch.Tensor]]):
    """(query rows, item rows) numpy arrays of known pairs given as parts of (query, item) tensors, CELLS_CHUNK
    at a time, part after part."""
    for q, c in known:
        for lo in range(0, len(q), CELLS_CHUNK):
            yield q[lo:lo + CELLS_CHUNK].numpy(), c[lo:lo + CELLS_CHUNK].numpy()


def excluded_cells(query_rows: torch.Tensor, known: list[tuple[torch.Tensor, torch.Tensor]],
                   item_column: torch.Tensor | None = None, exclude_self: bool = False):
    """The (ranking row, column) cells a ranking leaves out: distinct, sorted by row then column, as int32.

    Row i of the ranking is catalog query row query_rows[i] (distinct, any order). A known pair of a
    ranked query (known: parts of (query rows, item rows)) excludes its item; with exclude_self
    (item-to-item runs) each query item excludes itself. item_column maps catalog items to ranking
    columns (-1 for items that do not compete); None means every item competes, in catalog order.

    A warm evaluation ranks nearly every user, so its cells are nearly every known pair: two passes
    over the known pairs (count, then fill) leave one 8-byte key a cell, sorted and made distinct in
    place, as the only array of that length.
    """
    rows = query_rows.numpy()
    known = known if len(rows) else []
    row_of = np.full(int(rows.max()) + 1 if len(rows) else 0, -1, np.int64)  # catalog query row -> ranking row
    row_of[rows] = np.arange(len(rows))
    columns = None if item_column is None else item_column.numpy()

    def cells_of(q: np.ndarray, c: np.ndarray):  # (ranking rows, columns, which pairs are cells) of a chunk
        r = row_of[np.minimum(q, len(row_of) - 1)]
        r[q >= len(row_of)] = -1
        col = c.astype(np.int64) if columns is None else columns[c]
        return r, col, (r >= 0) & (col >= 0)

    own = (rows if columns is None else columns[rows]) if exclude_self else np.zeros(0, np.int64)
    own_rows = np.flatnonzero(own >= 0)
    count = sum(int(np.count_nonzero(cells_of(q, c)[2])) for q, c in known_chunks(known))
    cells = np.empty(len(own_rows) + count, np.int64)
    cells[:len(own_rows)] = (own_rows << _ROW) | own[own_rows]
    at = len(own_rows)
    for q, c in known_chunks(known):
        r, col, kept = cells_of(q, c)
        n = int(np.count_nonzero(kept))
        cells[at:at + n] = (r[kept] << _ROW) | col[kept]
        at += n
    cells.sort()
    if len(cells) > 1:  # a pair known twice (in training and validation) is one cell
        first = np.empty(len(cells), bool)
        first[0] = True
        np.not_equal(cells[1:], cells[:-1], out=first[1:])
        cells = cells[first]
    ex_rows, ex_cols = np.empty(len(cells), np.int32), np.empty(len(cells), np.int32)  # both below 2^31 (_ROW)
    for lo in range(0, len(cells), CELLS_CHUNK):
        part = cells[lo:lo + CELLS_CHUNK]
        ex_rows[lo:lo + len(part)] = part >> _ROW
        ex_cols[lo:lo + len(part)] = part & ((1 << _ROW) - 1)
    return torch.from_numpy(ex_rows), torch.from_numpy(ex_cols)
