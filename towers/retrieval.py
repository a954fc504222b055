"""Blocked top-N retrieval: score queries against all items block by block, keeping only top N.

The full query x item score matrix is never built; memory is bounded by the block size.
"""

from __future__ import annotations

import torch

BLOCK_ENTRIES = 1 << 22  # scores per block (16 MB of float32)


def top_n(query_vectors: torch.Tensor, item_vectors: torch.Tensor, n: int, item_bias: torch.Tensor | None = None,
          exclude_rows: torch.Tensor | None = None, exclude_cols: torch.Tensor | None = None,
          scale: float = 1.0) -> tuple[torch.Tensor, torch.Tensor]:
    """Top-n item indices and scores (q, n) for each query row; excluded (row, col) pairs never appear.

    exclude_rows/exclude_cols: parallel index tensors of (query row, item column) pairs to skip,
    sorted by row. Rows with fewer than n eligible items are padded with index -1 and score -inf.
    """
    nq, ni = query_vectors.shape[0], item_vectors.shape[0]
    n_eff = min(n, ni)
    per_block = max(1, BLOCK_ENTRIES // max(1, ni))
    out_idx = torch.empty(nq, n_eff, dtype=torch.int64)
    out_score = torch.empty(nq, n_eff, dtype=torch.float32)
    items_t = item_vectors.T.contiguous()
    for lo in range(0, nq, per_block):
        hi = min(nq, lo + per_block)
        s = query_vectors[lo:hi] @ items_t
        if scale != 1.0:
            s.mul_(scale)
        if item_bias is not None:
            s.add_(item_bias)
        if exclude_rows is not None and len(exclude_rows):
            a, b = torch.searchsorted(exclude_rows, lo), torch.searchsorted(exclude_rows, hi)
            if b > a:
                s[exclude_rows[a:b] - lo, exclude_cols[a:b]] = float("-inf")
        val, idx = torch.topk(s, n_eff, dim=1)
        idx[torch.isinf(val) & (val < 0)] = -1
        out_idx[lo:hi], out_score[lo:hi] = idx, val
    return out_idx, out_score
