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


# ---- screened scan: bfloat16 tiles, float32 rescoring (see screen.py for the bound) ----------------

@numba.njit(boundscheck=False, cache=True, nogil=True)
def _bf16_at_most(x, scratch_f, scratch_u):
    """The largest bfloat16 <= x as (is_positive, signed bits, unsigned bits) for the span tests.

    bfloat16 bits are the high half of float32 bits: truncation rounds toward zero, so a negative x
    with nonzero low bits takes the next bfloat16 away from zero. Below the lowest finite bfloat16 the
    threshold stays at it, so -inf (an excluded item) never passes while every finite score does.
    Above zero, bfloat16 order is the order of the bits as int16; at or below zero, a score passes when
    its bits as uint16 are at most the threshold's (every non-negative score has bits below 0x8000, and
    more negative means larger).
    """
    scratch_f[0] = x if x == x else -np.inf  # NaN (an unbounded margin): every finite score passes
    b = scratch_u[0]
    hi = b >> np.uint32(16)
    if (b >> np.uint32(31)) == 1 and (b & np.uint32(0xFFFF)) != 0:
        hi += np.uint32(1)
    if hi == 0:
        hi = np.uint32(0x8000)  # +0 as -0: every non-negative score passes, as it must
    elif hi >= 0xFF80:
        hi = np.uint32(0xFF7F)  # at most the lowest finite value: -inf marks excluded items, which never pass
    return hi < 0x8000, np.int16(np.uint16(hi)), np.uint16(hi)


@numba.njit(boundscheck=False, cache=True, nogil=True, inline="always")
def _reaches(v_s, v_u, up, ts, tu):
    """Whether a bfloat16 score (bits v_s as int16, v_u as uint16) is at least the threshold of _bf16_at_most."""
    return v_s >= ts if up else v_u <= tu


@numba.njit(boundscheck=False, cache=True, nogil=True)
def scan_screened_rows(t_s, t_u, r0, r1, real, q, items, bias, row_bound, item_norm, first_item, n, floor,
                       count, cand_s, cand_i):
    """Rows r0..r1 of a bfloat16 tile: items whose screened score reaches floor - bound are rescored
    in float32 and appended to the row's candidates when the exact score is at the floor.

    t_s / t_u: the tile's bits as int16 and as uint16 (two views of one buffer); only its first
    `real` columns are items. q (rows, k) and items (width, k) float32 with bias (width,): the exact
    score. row_bound[i, 0] * item_norm + row_bound[i, 1] bounds |screened - exact| for every item
    of the chunk (screen.py).
    """
    w = _U(real)
    cap = cand_s.shape[1]
    k = q.shape[1]
    first = _U(first_item)
    scratch_f = np.empty(1, np.float32)
    scratch_u = scratch_f.view(np.uint32)
    for i in range(r0, r1):
        row = _U(i)
        f = floor[i]
        c = count[i]
        cs = cand_s[i]
        ci = cand_i[i]
        margin = row_bound[i, 0] * item_norm + row_bound[i, 1]
        up, ts, tu = _bf16_at_most(f - margin, scratch_f, scratch_u)
        for j0 in range(_U(0), w, _U_SPAN):
            j1 = min(j0 + _U_SPAN, w)
            hit = np.int16(0)
            if j1 - j0 == _U_SPAN:  # vectorised: one any() per span
                if up:
                    for j in range(_U_SPAN):
                        hit |= np.int16(t_s[row, j0 + j] >= ts)
                else:
                    for j in range(_U_SPAN):
                        hit |= np.int16(t_u[row, j0 + j] <= tu)
            else:
                hit = np.int16(1)  # the last, partial span is tested item by item below
            if hit == 0:
                continue  # the common case
            if c + SPAN > cap:  # room for the whole span first
                c, f = _shrink(cs, ci, c, n, f)
                up, ts, tu = _bf16_at_most(f - margin, scratch_f, scratch_u)
            for j in range(j0, j1):
                if _reaches(t_s[row, j], t_u[row, j], up, ts, tu):
                    s = np.float32(0.0)
                    for d in range(k):
                        s += q[i, d] * items[j, d]
                    s += bias[j]
                    if s >= f:
                        cs[c] = s
                        ci[c] = np.int64(first + j)
                        c += 1
        count[i] = c
        floor[i] = f


@numba.njit(boundscheck=False, cache=True, parallel=True)
def scan_screened_parallel(t_s, t_u, real, q, items, bias, row_bound, item_norm, first_item, n, floor, count,
                           cand_s, cand_i, parts):
    """scan_screened_rows over all rows, cut into `parts` ranges run on numba's threads."""
    r = t_s.shape[0]
    for p in numba.prange(parts):
        scan_screened_rows(t_s, t_u, r * p // parts, r * (p + 1) // parts, real, q, items, bias, row_bound,
                           item_norm, first_item, n, floor, count, cand_s, cand_i)
