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
k up to 4096, with room to spare). An item can reach the floor f only if its screened score is
at least f - ERROR_BOUND * |q'| * max|x'| over its chunk, so screening with that threshold drops
no item that the float32 search would keep.
"""

from __future__ import annotations

import math
import time

import numpy as np
import torch

_U = 2.0 ** -8  # unit roundoff of bfloat16 (8 significant bits)
ERROR_BOUND = 2 * _U + _U ** 2 + _U * (1 + _U) ** 3 + 2.0 ** -12
MODE = "auto"  # "auto": screen when bfloat16 products prove fast here; "always" / "never" (tests)
MIN_SCORES = 1 << 22  # searches with fewer query x item scores than this are not worth a screen
MIN_SPEEDUP = 1.5  # bfloat16 products must be this much faster than float32 ones to be used

_measured: dict[str, bool] = {}


def wanted(n_queries: int, n_items: int, queries: torch.Tensor, items: torch.Tensor,
           bias: torch.Tensor | None) -> bool:
    """Whether a search of this size should screen in bfloat16 (finite inputs only: the bound needs them)."""
    if MODE == "never" or (MODE == "auto" and n_queries * n_items < MIN_SCORES):
        return False
    # a float64 sum is finite only if every value is (inf and NaN carry through); no temporary copies
    if not all(math.isfinite(float(t.sum(dtype=torch.float64))) for t in (queries, items, bias) if t is not None):
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
    """Per chunk of a tiles.Layout: what the screened scan needs besides the tile.

    chunks[a] = (bfloat16 x' of the chunk (sub_width rows, padding rows zero), the largest |x'|
    of its real items, the number of real items, float32 item vectors and bias for rescoring).
    """

    def __init__(self, layout):
        self.has_bias = layout.bias is not None
        k = layout.items.shape[1]
        self.width = padded_width(k, self.has_bias)
        zero_bias = np.zeros(layout.sub_width, np.float32)
        self.chunks = {}
        for step in layout.steps:
            for a in step:
                items, bias = layout.tile(a)  # the last chunk comes padded; only its real items are scanned
                real = min(layout.sub_width, layout.ni - a)
                aug = torch.zeros(layout.sub_width, self.width)
                aug[:real] = augment(items[:real], bias[:real] if self.has_bias else None, self.width)
                norm = float(torch.linalg.vector_norm(aug[:real], dim=1).max())
                rescore_bias = bias.numpy() if self.has_bias else zero_bias
                self.chunks[a] = (aug.to(torch.bfloat16), norm, real, items.numpy(), rescore_bias)

    def queries(self, q: torch.Tensor) -> tuple[torch.Tensor, np.ndarray]:
        """A block's q' in bfloat16, and ERROR_BOUND * |q'| per row (float32): the row's part of the bound."""
        aug = augment(q, 1.0 if self.has_bias else None, self.width)
        return aug.to(torch.bfloat16), (torch.linalg.vector_norm(aug, dim=1) * ERROR_BOUND).numpy()
