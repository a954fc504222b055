"""Compiled (numba) kernels that keep each row's best n scores while a score tile is still in the cache.

Why compiled: selection must cost a small fraction of the matrix product that made the scores. In
torch or numpy each step of it is a separate pass over memory plus a dispatch; here one pass over a
tile does it. For each row, blocks of SPAN scores are first tested against the row's floor with one
vectorised count (almost every block has no score at the floor, and is done); in a block with some,
the scores at the floor are appended one by one. When a row's
candidate buffer fills, a three-way quickselect keeps its n best and the floor rises to the n-th
of them, so the floor is always a lower bound on the row's final n-th best. Compiled once per
machine and cached next to this file (numba's cache=True).
"""

from __future__ import annotations

import numba
import numpy as np

SPAN = 64  # scores tested together first
# unsigned, as the tile indices are: unsigned index arithmetic must not meet signed numbers (numba
# would make their sum a float)
_U = np.uint64
_U_SPAN = _U(SPAN)


@numba.njit(boundscheck=False, cache=True, nogil=True)
def _keep_best(s, it, c, n):
    """Reorder s[:c] (and it[:c] with it) so that s[:n] hold the n largest; three-way quickselect.

    Three-way partitions keep equal scores together, so many ties cost no more than distinct ones.
    """
    lo, hi = 0, c - 1
    while lo < hi:
        a, b, d = s[lo], s[(lo + hi) // 2], s[hi]
        p = max(min(a, b), min(max(a, b), d))  # median of three
        lt, i, gt = lo, lo, hi  # [lo, lt) > p, [lt, i) == p, (gt, hi] < p
        while i <= gt:
            v = s[i]
            if v > p:
                s[i] = s[lt]
                s[lt] = v
                t = it[i]
                it[i] = it[lt]
                it[lt] = t
                lt += 1
                i += 1
            elif v < p:
                s[i] = s[gt]
                s[gt] = v
                t = it[i]
                it[i] = it[gt]
                it[gt] = t
                gt -= 1
            else:
                i += 1
        if n - 1 < lt:
            hi = lt - 1
        elif n - 1 > gt:
            lo = gt + 1
        else:
            return


@numba.njit(boundscheck=False, cache=True, nogil=True)
def _shrink(s, it, c, n, f):
    """Keep the n best of c candidates; the new floor is max(f, the n-th best)."""
    _keep_best(s, it, c, n)
    m = s[0]
    for k in range(1, n):
        m = min(m, s[k])
    return n, max(f, m)


@numba.njit(boundscheck=False, cache=True, nogil=True)
def scan_rows(tile, r0, r1, first_item, n, floor, count, cand_s, cand_i):
    """Append every score of tile rows r0..r1 at or above the row's floor to its candidates.

    tile (rows, width) float32, column j is item first_item + j; floor (rows,) float32 and count
    (rows,) int64 are updated in place; cand_s / cand_i (rows, cap) hold the candidates, cap >= n + SPAN.
    Tile indices are unsigned: with signed ones numba must allow for negative (wrap-around) indices,
    and the compiler then reads the tile with gathers instead of plain vector loads (twice as slow).
    """
    w = _U(tile.shape[1])
    whole = w // _U_SPAN * _U_SPAN
    cap = cand_s.shape[1]
    first = _U(first_item)
    for i in range(r0, r1):
        row = _U(i)
        f = floor[i]
        c = count[i]
        cs = cand_s[i]
        ci = cand_i[i]
        for j0 in range(_U(0), whole, _U_SPAN):
            hits = 0
            for j in range(_U_SPAN):  # vectorised: one count per span
                hits += tile[row, j0 + j] >= f
            if hits == 0:
                continue  # the common case: nothing in this span reaches the floor
            if c + hits > cap:  # room for the whole span first, so the loop below needs no check
                c, f = _shrink(cs, ci, c, n, f)
            for j in range(j0, j0 + _U_SPAN):
                v = tile[row, j]
                if v >= f:
                    cs[c] = v
                    ci[c] = np.int64(first + j)
                    c += 1
        for j in range(whole, w):  # the last scores of a width that is not a multiple of SPAN
            v = tile[row, j]
            if v >= f:
                if c == cap:
                    c, f = _shrink(cs, ci, c, n, f)
                cs[c] = v
                ci[c] = np.int64(first + j)
                c += 1
        count[i] = c
        floor[i] = f


@numba.njit(boundscheck=False, cache=True, parallel=True)
def scan_tile_parallel(tile, first_item, n, floor, count, cand_s, cand_i, parts):
    """scan_rows over all rows of tile, the rows cut into `parts` ranges run on numba's threads."""
    r = tile.shape[0]
    for p in numba.prange(parts):
        scan_rows(tile, r * p // parts, r * (p + 1) // parts, first_item, n, floor, count, cand_s, cand_i)
