"""Reference models a practitioner respects, scored beside the towers: EASE and item-based k-nearest neighbours.

Both score a query from its history: the items of its training events (for item-to-item runs, the
query item and the items paired with it in training). With X the binary query x item history
matrix and W an item x item weight matrix, score(q, i) = (X W)[q, i].

- EASE (Steck, "Embarrassingly Shallow Autoencoders for Sparse Data", WWW 2019): with
  P = (X^T X + lambda I)^-1, W = B = I - P diag(1 / diag P), so B_ij = -P_ij / P_jj and diag B = 0.
  Dense in the number of items: memory and time grow with items^2 and items^3.
- item-kNN (Sarwar, Karypis, Konstan & Riedl, "Item-Based Collaborative Filtering Recommendation
  Algorithms", WWW 2001): cosine similarity of the items' columns of X, s(i, j) = c_ij / sqrt(c_ii c_jj)
  with c = X^T X; each item keeps its k most similar other items, and score(q, i) sums s(i, j) over
  the items j of q's history among them. Sparse: any catalog size.

They are references, not exported models: they have no vectors, so they score dense blocks of
query rows (`score_rows`) that evaluation ranks block by block.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import torch

EASE = "ease"
ITEM_KNN = "item_knn"


@dataclass
class History:
    """The binary query x item history matrix, as sorted CSR arrays (row pointers and item columns)."""

    starts: np.ndarray  # int64 (n_queries + 1,)
    items: np.ndarray  # int64 (nnz,), sorted within each row, no repeats
    n_items: int
    # the co-occurrence counts of every process from this one's (a log divided among processes)
    everywhere: Callable[[torch.Tensor], torch.Tensor] = lambda c: c

    @classmethod
    def from_pairs(cls, query: torch.Tensor, item: torch.Tensor, n_queries: int, n_items: int,
                   include_self: bool = False) -> "History":
        """Distinct (query, item) cells of the given pairs; include_self adds (q, q) (item-to-item runs)."""
        q, i = query.numpy().astype(np.int64), item.numpy().astype(np.int64)
        if include_self:
            own = np.arange(min(n_queries, n_items), dtype=np.int64)
            q, i = np.concatenate([q, own]), np.concatenate([i, own])
        keys = np.unique(q * n_items + i)
        rows, cols = keys // n_items, keys % n_items
        starts = np.zeros(n_queries + 1, np.int64)
        np.cumsum(np.bincount(rows, minlength=n_queries), out=starts[1:])
        return cls(starts, cols, n_items)

    @property
    def n_queries(self) -> int:
        return len(self.starts) - 1

    def rows(self) -> np.ndarray:
        """The query row of every stored cell."""
        return np.repeat(np.arange(self.n_queries, dtype=np.int64), np.diff(self.starts))

    def take(self, query_rows: torch.Tensor) -> "History":
        """The histories of some query rows (row i is query_rows[i]; rows may repeat, one per event)."""
        r = query_rows.numpy().astype(np.int64)
        lengths = self.starts[r + 1] - self.starts[r]
        starts = np.zeros(len(r) + 1, np.int64)
        np.cumsum(lengths, out=starts[1:])
        return History(starts, self._cells(r, lengths), self.n_items)

    def _cells(self, r: np.ndarray, lengths: np.ndarray) -> np.ndarray:
        """The item columns of rows r, one row after another (lengths: their row lengths)."""
        if not lengths.sum():
            return self.items[:0]
        offsets = np.concatenate([[0], np.cumsum(lengths[:-1])])
        first = np.repeat(self.starts[r] - offsets, lengths)
        return self.items[first + np.arange(int(lengths.sum()), dtype=np.int64)]

    def dense(self, query_rows: torch.Tensor) -> torch.Tensor:
        """The history rows of some queries as a dense float32 block (len(query_rows), n_items)."""
        r = query_rows.numpy().astype(np.int64)
        lengths = self.starts[r + 1] - self.starts[r]
        local = np.repeat(np.arange(len(r), dtype=np.int64), lengths)
        cols = self._cells(r, lengths)
        block = torch.zeros(len(r), self.n_items)
        block[torch.from_numpy(local), torch.from_numpy(cols)] = 1.0
        return block

    def cooccurrence(self) -> torch.Tensor:
        """c = X^T X as a coalesced sparse COO float32 tensor (n_items, n_items): queries holding both items
        (of every process, when `everywhere` sums them)."""
        idx = torch.from_numpy(np.stack([self.rows(), self.items]))
        x = torch.sparse_coo_tensor(idx, torch.ones(idx.shape[1]), (self.n_queries, self.n_items),
                                    is_coalesced=True, check_invariants=False)
        with warnings.catch_warnings():  # torch calls its sparse product "beta"; it is exact, and tested here
            warnings.simplefilter("ignore", UserWarning)
            return self.everywhere(torch.sparse.mm(x.t().coalesce(), x).coalesce())


def ease_bytes(n_items: int) -> int:
    """Peak memory of fitting EASE: about three float32 item x item matrices (the Gram matrix, its factor, B)."""
    return 3 * 4 * n_items * n_items


@dataclass
class SparseRows:
    """A sparse item x item matrix W as CSR arrays: row j holds the items i with W[j, i] != 0."""

    starts: np.ndarray  # int64 (n_items + 1,)
    cols: torch.Tensor  # int64 (nnz,)
    values: torch.Tensor  # float32 (nnz,)

    @classmethod
    def from_coo(cls, rows: torch.Tensor, cols: torch.Tensor, values: torch.Tensor, n: int) -> "SparseRows":
        order = np.lexsort((cols.numpy(), rows.numpy()))
        starts = np.zeros(n + 1, np.int64)
        np.cumsum(np.bincount(rows.numpy(), minlength=n), out=starts[1:])
        pick = torch.from_numpy(order)
        return cls(starts, cols.index_select(0, pick), values.index_select(0, pick))

    def dense(self, n: int) -> torch.Tensor:
        rows = torch.from_numpy(np.repeat(np.arange(n, dtype=np.int64), np.diff(self.starts)))
        out = torch.zeros(n, n)
        out[rows, self.cols] = self.values
        return out


# Cells gathered at once when a sparse W is applied (memory: some 20 bytes a cell)
GATHER_CELLS = 1 << 23


@dataclass
class ReferenceScorer:
    """A history-based reference model: score rows are X[rows] W, W dense (n_items, n_items) or SparseRows."""

    name: str
    history: History
    weights: torch.Tensor | SparseRows  # EASE: B; item-kNN: W[j, i] = s(i, j) for j among i's neighbours
    setting: dict  # the hyperparameter chosen, as reported

    def for_queries(self, rows: torch.Tensor, vectors: torch.Tensor | None = None) -> "ReferenceScorer":
        """The same model for some query rows (one per event in context runs); it has no query vectors to take."""
        return ReferenceScorer(self.name, self.history.take(rows), self.weights, self.setting)

    def matrix(self) -> torch.Tensor:
        """W as a dense tensor (tests and small catalogs)."""
        w = self.weights
        return w if isinstance(w, torch.Tensor) else w.dense(self.history.n_items)

    def score_rows(self, query_rows: torch.Tensor) -> torch.Tensor:
        """Scores of some query rows against every item: float32 (len(query_rows), n_items).

        A dense W is one matrix product; a sparse one adds, for each history item j of a query, row j
        of W into the query's scores (a gather and one index_add, in pieces of GATHER_CELLS cells).
        """
        if isinstance(self.weights, torch.Tensor):
            return self.history.dense(query_rows) @ self.weights
        n = self.history.n_items
        out = torch.zeros(len(query_rows), n)
        h = self.history.take(query_rows)
        local = np.repeat(np.arange(len(query_rows), dtype=np.int64), np.diff(h.starts))
        w = self.weights
        fan = w.starts[h.items + 1] - w.starts[h.items]  # cells each history item adds
        ends = np.cumsum(fan)
        flat = out.view(-1)
        lo = 0
        while lo < len(h.items):
            hi = max(lo + 1, int(np.searchsorted(ends, (ends[lo - 1] if lo else 0) + GATHER_CELLS, side="right")))
            lengths = fan[lo:hi]
            first = np.repeat(w.starts[h.items[lo:hi]] - np.concatenate([[0], np.cumsum(lengths[:-1])]), lengths)
            pos = torch.from_numpy(first + np.arange(int(lengths.sum()), dtype=np.int64))
            target = torch.from_numpy(np.repeat(local[lo:hi], lengths)) * n + w.cols.index_select(0, pos)
            flat.index_add_(0, target, w.values.index_select(0, pos))
            lo = hi
        return out


class EaseFit:
    """EASE for several penalties from one Gram matrix: each penalty costs one Cholesky inverse."""

    def __init__(self, history: History):
        self.history = history
        self.gram = history.cooccurrence().to_dense()
        self.scale = float(self.gram.diagonal().mean()) if history.n_items else 1.0

    def solve(self, penalty: float) -> ReferenceScorer:
        g = self.gram.clone()
        g.diagonal().add_(penalty)
        p = torch.cholesky_inverse(torch.linalg.cholesky(g))
        del g
        b = p.div_(-p.diagonal().clone())  # column j divided by -P_jj
        b.diagonal().zero_()
        return ReferenceScorer(EASE, self.history, b, {"penalty": penalty})


class KnnFit:
    """item-kNN for several neighbour counts from one similarity pass: each count is a cut of one sort.

    Cosine similarity of the items' history columns, s(i, j) = c_ij / sqrt(c_ii c_jj); each item i's
    other items are ranked by similarity (ties: the smaller item index first, so results are
    deterministic), and k neighbours keep ranks below k.
    """

    def __init__(self, history: History):
        self.history = history
        c = history.cooccurrence()
        (rows, cols), vals = c.indices(), c.values()
        diag = torch.zeros(history.n_items).index_add_(0, rows[rows == cols], vals[rows == cols])
        off = rows != cols
        rows, cols, vals = rows[off], cols[off], vals[off]
        sims = vals / torch.sqrt(diag[rows] * diag[cols])
        order = np.lexsort((cols.numpy(), -sims.numpy(), rows.numpy()))  # by row, then similarity descending
        r = rows.numpy()[order]
        rank = np.empty(len(r), np.int64)
        rank[order] = np.arange(len(r)) - np.searchsorted(r, r, side="left")
        self.rows, self.cols, self.sims, self.rank = rows, cols, sims, torch.from_numpy(rank)

    def neighbours(self, k: int) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor]:
        """(i, j, s(i, j)) for every kept neighbour j of every item i."""
        keep = self.rank < k
        return self.rows[keep], self.cols[keep], self.sims[keep]

    def solve(self, k: int) -> ReferenceScorer:
        """score(q, i) = sum of s(i, j) over the items j of q's history among i's k neighbours: W[j, i] = s(i, j)."""
        i, j, sims = self.neighbours(k)
        n = self.history.n_items
        w = SparseRows.from_coo(j, i, sims, n)
        if n <= DENSE_ITEMS and len(sims) >= DENSE_SHARE * n * n:
            w = w.dense(n)
        return ReferenceScorer(ITEM_KNN, self.history, w, {"neighbours": k})


# W is kept dense (one matrix product per block) when at least this share of it is filled and it is small
DENSE_SHARE = 0.02
DENSE_ITEMS = 10000


# A geometric walk over penalties from the Gram matrix's mean diagonal (the mean item count), a
# quarter or four times at a step: common practice for a scale-free start (no source)
PENALTY_STEP = 4.0
MOST_TRIES = 6
NEIGHBOUR_CHOICES = (10, 25, 50, 100, 250, 1000)  # common practice (no source)


def choose_ease(history: History, judge) -> tuple[ReferenceScorer, list[dict]]:
    """EASE with the penalty the validation pairs prefer; judge(scorer) -> a validation score, higher better.

    Starts at the mean item count and walks by PENALTY_STEP towards the better side while it improves.
    Returns the chosen scorer and every try as {penalty, score}.
    """
    fit = EaseFit(history)
    tries: list[dict] = []
    cache: dict[float, tuple[float, ReferenceScorer]] = {}

    def value(penalty: float):
        if penalty not in cache:
            s = fit.solve(penalty)
            cache[penalty] = (judge(s), s)
            tries.append({"penalty": penalty, "score": cache[penalty][0]})
        return cache[penalty][0]

    best = max(fit.scale, 1e-3)
    up, down = value(best * PENALTY_STEP), value(best / PENALTY_STEP)
    here = value(best)
    step = PENALTY_STEP if up > max(here, down) else (1 / PENALTY_STEP if down > here else None)
    while step is not None and len(tries) < MOST_TRIES:
        nxt = best * step
        if not value(nxt) > value(best):
            break
        best = nxt
    best = max(cache, key=lambda p: (cache[p][0], -abs(math.log(p / max(fit.scale, 1e-3)))))
    return cache[best][1], tries


def choose_knn(history: History, judge) -> tuple[ReferenceScorer, list[dict]]:
    """item-kNN with the neighbour count the validation pairs prefer: NEIGHBOUR_CHOICES below the catalog size,
    and every other item."""
    every = max(1, history.n_items - 1)  # every other item may be a neighbour
    choices = [k for k in NEIGHBOUR_CHOICES if k < every] + [every]
    fit = KnnFit(history)
    tries, best = [], None
    for k in choices:
        s = fit.solve(k)
        score = judge(s)
        tries.append({"neighbours": k, "score": score})
        if best is None or score > best[0]:
            best = (score, s)
    if not math.isfinite(best[0]):  # nothing to judge by (no validation pairs): the middle choice
        return fit.solve(choices[len(choices) // 2]), tries
    return best[1], tries
