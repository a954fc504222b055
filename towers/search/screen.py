"""Screening score tiles in bfloat16 with a proven error bound, so top-N retrieval stays exact.

On processors with bfloat16 dot-product instructions (AVX512-BF16, AMX, recent ARM cores) a
bfloat16 matrix product runs 2 to 2.5 times as fast as a float32 one, and its tile is half the
bytes to scan. Retrieval then scores each chunk in bfloat16 and rescores in float32 only the items
that could reach a row's floor, so the answer is the same as an all-float32 search.

The bound. The bias rides in the product as one more coordinate (query 1, item b), padded to an
even width: q' = [q, 1, 0...], x' = [x, b, 0...], so q'.x' = q.x + b. Rounding each coordinate to
bfloat16 (8 significant bits, unit roundoff u = 2^-8) changes each product q'_i x'_i by at most
(2u + u^2) |q'_i x'_i|; the float32 accumulation adds at most k 2^-24 sum |q'_i x'_i| (standard
forward error of a sum, Higham, "Accuracy and Stability of Numerical Algorithms", 2nd ed., 3.1);
rounding the result to bfloat16 adds u |s|. With sum |q'_i x'_i| <= |q'| |x'| (Cauchy-Schwarz):

    |screened score - q.x - b| <= ERROR_BOUND * |q'| * |x'|

with ERROR_BOUND = 2u + u^2 + u (1 + u)^3 + 2^-12 (the last term covers the accumulation for
k up to 4096, with room to spare). bfloat16 instructions may also flush values below 2^-126 to
zero, inputs and result alike: each flushed product term is below 2^-126 times a coordinate of
the other vector, so an absolute term 2^-126 (sqrt(k') (|q'| + |x'|) + 1) covers them, doubled
for the float32 rounding of the margin itself. An item can reach the floor f only if its
screened score is at least f - (ERROR_BOUND |q'| max|x'| + that term), the maximum over its chunk,
so screening with that threshold drops no item that the float32 search would keep.
"""

from __future__ import annotations

import math
import time

import numpy as np
import torch

_U = 2.0 ** -8  # unit roundoff of bfloat16 (8 significant bits)
ERROR_BOUND = 2 * _U + _U ** 2 + _U * (1 + _U) ** 3 + 2.0 ** -12
FLUSHED = 2.0 ** -126  # below this, bfloat16 instructions may read or write zero
MODE = "auto"  # "auto": screen when bfloat16 products prove fast here; "always" / "never" (tests)
MIN_SCORES = 1 << 22  # searches with fewer query x item scores than this are not worth a screen
MIN_SPEEDUP = 1.5  # bfloat16 products must be this much faster than float32 ones to be used

_measured: dict[str, bool] = {}


def catalog_for(layout, n_queries: int) -> ScreenedCatalog | None:
    """The screened catalog for a search of n_queries over layout's items, or None to stay in float32."""
    if not wanted(n_queries, layout.ni):
        return None
    catalog = ScreenedCatalog(layout)
    return catalog if catalog.usable else None


def wanted(n_queries: int, n_items: int) -> bool:
    """Whether a search of this size should screen in bfloat16 here (MODE, size, measured speed)."""
    if MODE == "never" or (MODE == "auto" and n_queries * n_items < MIN_SCORES):
        return False
    return MODE == "always" or bf16_products_are_fast()


def bf16_products_are_fast() -> bool:
    """True if a bfloat16 product here is MIN_SPEEDUP times as fast as float32 (measured once a process).

    Without bfloat16 instructions torch converts element by element, many times slower than float32;
    a few milliseconds of measurement decide it rather than a list of processor flags.
    """
    if "fast" not in _measured:
        g = torch.Generator().manual_seed(0)
        q, x = torch.randn(256, 66, generator=g), torch.randn(2048, 66, generator=g)
        times = {}
        for dtype in (torch.float32, torch.bfloat16):
            a, b = q.to(dtype), x.to(dtype)
            out = torch.empty(256, 2048, dtype=dtype)
            torch.mm(a, b.T, out=out)  # first call: library set-up, not measured
            best = math.inf
            for _ in range(5):
                t = time.perf_counter()
                torch.mm(a, b.T, out=out)
                best = min(best, time.perf_counter() - t)
            times[dtype] = best
        _measured["fast"] = times[torch.float32] >= MIN_SPEEDUP * times[torch.bfloat16]
    return _measured["fast"]


def padded_width(k: int, bias: bool) -> int:
    """Width of the augmented vectors: k, one more for the bias, rounded up to even (bfloat16 pairs)."""
    return k + 1 + (k % 2 == 0) if bias else k + k % 2


def augment(vectors: torch.Tensor, extra: torch.Tensor | float | None, width: int) -> torch.Tensor:
    """[v, extra, 0...] in float32, `width` wide: items take their bias as extra, queries take 1."""
    out = torch.zeros(vectors.shape[0], width)
    out[:, :vectors.shape[1]] = vectors
    if extra is not None:
        out[:, vectors.shape[1]] = extra
    return out


class ScreenedCatalog:
    """What the screened scan needs besides the tile, for every chunk of a tiles.Layout.

    chunks[a] = (bfloat16 x' of the chunk's sub_width items (padding rows zero), the largest |x'| of
    its real items, the number of real items, float32 item vectors and bias for rescoring).
    usable is False when an item vector or bias is not finite: the bound needs finite values, and
    such a catalog is searched in float32 throughout.
    """

    def __init__(self, layout):
        self.has_bias = layout.bias is not None
        ni, k = layout.items.shape
        self.width = padded_width(k, self.has_bias)
        aug = torch.zeros(layout.padded, self.width, dtype=torch.bfloat16)
        aug[:ni, :k] = layout.items  # rounded to bfloat16 on the copy: no float32 copy of the catalog
        sq_norm = torch.linalg.vector_norm(layout.items, dim=1) ** 2
        bias = np.zeros(layout.padded, np.float32)
        if self.has_bias:
            aug[:ni, k] = layout.bias
            sq_norm += layout.bias ** 2
            bias[:ni] = layout.bias.numpy()
        norm = torch.zeros(layout.padded)
        norm[:ni] = sq_norm.sqrt()  # norms of the float32 x', not of its rounding: the bound is about x'
        w = layout.sub_width
        chunk_norm = norm.view(-1, w).amax(1).tolist()
        self.usable = all(math.isfinite(v) for v in chunk_norm)
        self.largest_norm = max(chunk_norm)
        self.chunks = {}
        for step in layout.steps:
            for a in step:
                real = min(w, ni - a)  # the last chunk's padding is never scanned
                self.chunks[a] = (aug[a:a + w], chunk_norm[a // w], real, layout.tile(a)[0].numpy(), bias[a:a + w])

    def queries(self, q: torch.Tensor) -> tuple[torch.Tensor, np.ndarray]:
        """A block's q' in bfloat16, and its rows' parts of the bound (rows, 2) float32: the margin
        of row i in a chunk whose largest |x'| is m is bound[i, 0] * m + bound[i, 1].

        A row with a value that is not finite gets an infinite margin: every finite screened score
        then passes, and its exact float32 scores decide, as in a float32 search.
        """
        aug = augment(q, 1.0 if self.has_bias else None, self.width)
        norm = torch.linalg.vector_norm(aug.double(), dim=1)
        bound = torch.stack([norm * ERROR_BOUND,
                             2 * FLUSHED * (math.sqrt(self.width) * (norm + self.largest_norm) + 1)], 1)
        return aug.to(torch.bfloat16), torch.nan_to_num(bound, nan=math.inf).float().numpy()
