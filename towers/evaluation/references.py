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
        """c = X^T X as a coalesced sparse COO float32 tensor (n_items, n_items): queries holding both items."""
        idx = torch.from_numpy(np.stack([self.rows(), self.items]))
        x = torch.sparse_coo_tensor(idx, torch.ones(idx.shape[1]), (self.n_queries, self.n_items),
                                    is_coalesced=True, check_invariants=False)
        with warnings.catch_warnings():  # torch calls its sparse product "beta"; it is exact, and tested here
            warnings.simplefilter("ignore", UserWarning)
            return torch.sparse.mm(x.t().coalesce(), x).coalesce()


def ease_bytes(n_items: int) -> int:
    """Peak memory of fitting EASE: about three float32 item x item matrices (the Gram matrix, its factor, B)."""
    return 3 * 4 * n_items * n_items


@dataclass
class ReferenceScorer:
    """A history-based reference model: score rows are X[rows] W, W dense (EASE) or sparse (item-kNN)."""

    name: str
    history: History
    weights: torch.Tensor  # EASE: dense B (n_items, n_items); item-kNN: sparse S, row i = i's neighbours
    setting: dict  # the hyperparameter chosen, as reported

    def for_queries(self, rows: torch.Tensor, vectors: torch.Tensor | None = None) -> "ReferenceScorer":
        """The same model for some query rows (one per event in context runs); it has no query vectors to take."""
        return ReferenceScorer(self.name, self.history.take(rows), self.weights, self.setting)

    def score_rows(self, query_rows: torch.Tensor) -> torch.Tensor:
        """Scores of some query rows against every item: float32 (len(query_rows), n_items)."""
        x = self.history.dense(query_rows)
        if self.weights.layout == torch.strided:
            return x @ self.weights
        return torch.sparse.mm(self.weights, x.t()).t().contiguous()


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


def knn_similarity(history: History, neighbours: int) -> torch.Tensor:
    """Cosine similarity of the items' history columns, each row keeping its `neighbours` largest (not itself).

    Returns a sparse COO float32 (n_items, n_items) tensor, row i holding i's neighbours j and s(i, j).
    Ties at the k-th place are broken by the smaller item index, so the result is deterministic.
    """
    c = history.cooccurrence()
    (rows, cols), vals = c.indices(), c.values()
    diag = torch.zeros(history.n_items).index_add_(0, rows[rows == cols], vals[rows == cols])
    off = rows != cols
    rows, cols, vals = rows[off], cols[off], vals[off]
    sims = vals / torch.sqrt(diag[rows] * diag[cols])
    order = np.lexsort((cols.numpy(), -sims.numpy(), rows.numpy()))  # by row, then similarity descending
    r = rows.numpy()[order]
    starts = np.searchsorted(r, r, side="left")
    keep = order[(np.arange(len(r)) - starts) < neighbours]
    keep = torch.from_numpy(np.sort(keep))
    idx = torch.stack([rows[keep], cols[keep]])
    return torch.sparse_coo_tensor(idx, sims[keep], (history.n_items, history.n_items), check_invariants=False).coalesce()


def knn_scorer(history: History, neighbours: int) -> ReferenceScorer:
    return ReferenceScorer(ITEM_KNN, history, knn_similarity(history, neighbours), {"neighbours": neighbours})


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
    """item-kNN with the neighbour count the validation pairs prefer, among NEIGHBOUR_CHOICES below the catalog."""
    choices = [k for k in NEIGHBOUR_CHOICES if k < history.n_items] or [max(1, history.n_items - 1)]
    tries, best = [], None
    for k in choices:
        s = knn_scorer(history, k)
        score = judge(s)
        tries.append({"neighbours": k, "score": score})
        if best is None or score > best[0]:
            best = (score, s)
    if not math.isfinite(best[0]):  # nothing to judge by (no validation pairs): the middle choice
        k = choices[len(choices) // 2]
        return knn_scorer(history, k), tries
    return best[1], tries
