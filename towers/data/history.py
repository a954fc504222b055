"""Each user's training items as a query-tower input: the history a user is known by.

The query tower averages embeddings of these items (a bag, like a token feature), as in Covington,
Adams & Sargin, "Deep Neural Networks for YouTube Recommendations" (RecSys 2016). The block column
holds item rows + 1, 0 padding. While training, each pair's own item is taken out of its user's bag
(`without_targets`): otherwise the model learns to find an item in the bag instead of what goes with it.
"""

from __future__ import annotations

import numpy as np
import torch

from towers.data.pairs import Pairs

HISTORY = "(history)"  # the block column; the parentheses keep it apart from any table column name


def history_column(train: Pairs, n_queries: int, n_items: int, limit: int) -> torch.Tensor:
    """(n_queries, L) int64: each query's distinct training items (row + 1), at most `limit`, 0-padded.

    With event times the latest `limit` items are kept, else those seen last in the log. L is the
    longest kept history (at least 1).
    """
    pos = train.positives()
    q, c = pos.query.numpy().astype(np.int64), pos.candidate.numpy().astype(np.int64)
    when = pos.time.numpy() if pos.time is not None else np.arange(len(q))
    order = np.lexsort((-when, q))  # by query, latest first
    q, c = q[order], c[order]
    keys = q * n_items + c
    _, first = np.unique(keys, return_index=True)  # each (query, item) once, at its latest event
    first = np.sort(first)
    q, c = q[first], c[first]
    starts = np.searchsorted(q, q, side="left")
    place = np.arange(len(q)) - starts
    keep = place < limit
    width = max(1, int(place[keep].max(initial=-1)) + 1)
    out = torch.zeros(n_queries, width, dtype=torch.int64)
    out[torch.from_numpy(q[keep]), torch.from_numpy(place[keep])] = torch.from_numpy(c[keep] + 1)
    return out


def without_targets(bags: torch.Tensor, items: torch.Tensor) -> torch.Tensor:
    """The bags with each row's own item (a catalog row) taken out (set to padding)."""
    return bags.masked_fill(bags == (items + 1).unsqueeze(1), 0)


def empty_history(n: int) -> torch.Tensor:
    """Bags for n queries with no known items (new users embedded from features alone)."""
    return torch.zeros(n, 1, dtype=torch.int64)
