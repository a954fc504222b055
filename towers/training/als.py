"""Alternating least squares for the linear factor model: exact row solves of the training objective.

The linear factor model scores a pair s = u_q . v_c + b_q + b_c + g. Under squared loss its summed
training objective (N * J, see training/loop.py) is

    N J = sum_p 1/2 w_p (s_p - y_p)^2 + lambda/2 sum_e (||e_e||^2 + b_e^2)

over the id rows e that have training pairs. With the candidate side fixed, N J splits into one
ridge regression per query row: append a constant 1 to every candidate vector and the bias to every
query vector, x_q = [u_q, b_q], f_c = [v_c, 1], and the target offset o_c = b_c + g; then

    (sum_{p of q} w_p f f^T + lambda I) x_q = sum_{p of q} w_p (y_p - o_c) f

is the exact minimiser of N J over (u_q, b_q), the bias penalised like the vector, exactly as the
gradient trainer penalises it. The candidate side is the same with the roles swapped. The global
bias g is not penalised: after each half step it is set to its exact minimiser, the weighted mean of
y - (s - g). Each step minimises N J exactly over a block of variables, so the objective never
increases from one sweep to the next. Repeated rows of one pair are merged into one cell with the
summed weight and the weighted mean target; that changes N J by a constant only (kept in
`Cells.constant`, so reported objectives are exactly N J).

Two row solvers, both batched over all rows at once:
  cholesky  the per-row (k+1) x (k+1) Gram matrices, built as segment sums (bmm over rows padded to
            similar counts), then torch.linalg.cholesky / cholesky_solve: the exact solution.
  cg        conjugate gradient (Takacs, Pilaszy & Tikk, "Applications of the conjugate gradient
            method for implicit feedback collaborative filtering", RecSys 2011), warm-started from
            the current rows, a few steps per half sweep. A x = F_r^T (w * (F_r x)) + lambda x is
            applied through the sparse pattern (a sampled dense-dense product, then a sparse-dense
            product), so no per-row matrix is ever built. CG lowers the quadratic at every step, so
            sweeps stay monotone.

Weighted ALS for implicit events (Hu, Koren & Volinsky, "Collaborative Filtering for Implicit
Feedback Datasets", ICDM 2008) minimises over ALL query x candidate cells of id rows with training
pairs

    sum_{q,c} 1/2 c_qc (p_qc - s_qc)^2 + lambda/2 sum_e (||e_e||^2 + b_e^2),

with r_qc = sum over the pair's rows of weight * target (1 and 1 without those columns), preference
p = 1[r > 0] and confidence c = 1 + alpha r. Its normal equations are
(F^T F + sum_{observed} (c - 1) f f^T + lambda I) x = -F^T o + sum_{observed} (c - (c - 1) o) f: the
shared F^T F (the "Y^T Y trick") makes the cost linear in the observed cells.

Non-negative factors use HALS (hierarchical ALS, Cichocki & Phan 2009): with every row's normal
equations built as for Cholesky, a few passes over the coordinates set each one, for all rows at once,
to its exact minimiser under x >= 0, max(0, unconstrained coordinate minimiser); again monotone. The
biases stay unconstrained. The start is the absolute value of the model's random initialisation.
"""

from __future__ import annotations

import copy
import math
import sys
import time
import warnings
from dataclasses import dataclass
from pathlib import Path

import torch
from tqdm import tqdm

from towers.config import Config, lower_is_better
from towers.data.prepare import Prepared
from towers.errors import TowersError
from towers.evaluation.protocol import validation_metrics
from towers.model.embed import model_scorer
from towers.model.id_tables import is_bounded
from towers.model.towers import ID_INIT_STD, TwoTowerModel
from towers.training.progress import log, show_bar
from towers.training.stopping import (
    EarlyStopping,
    StopRequest,
    TrainingDiverged,
    TrainingInterrupted,
    TrainResult,
)

GRAM_BUDGET = 2 ** 24  # floats in one padded block while building Gram matrices (64 MB in float32)


def _csr(crow: torch.Tensor, col: torch.Tensor, values: torch.Tensor, shape: tuple[int, int]) -> torch.Tensor:
    with warnings.catch_warnings():  # torch calls its sparse CSR support "beta"; the operations used here are stable
        warnings.simplefilter("ignore", UserWarning)
        return torch.sparse_csr_tensor(crow, col, values, shape, check_invariants=False)


@dataclass
class Pattern:
    """The cells in one orientation as a CSR pattern: row r holds entries crow[r]:crow[r+1]."""

    crow: torch.Tensor
    col: torch.Tensor  # the other side's row of each entry
    row: torch.Tensor  # this side's row of each entry
    order: torch.Tensor | None  # the cell behind each entry; None when entries are in cell order
    shape: tuple[int, int]

    @classmethod
    def build(cls, rows: torch.Tensor, cols: torch.Tensor, n_rows: int, n_cols: int, sort: bool) -> "Pattern":
        order = None
        if sort:
            order = torch.argsort(rows * n_cols + cols)
            rows, cols = rows.index_select(0, order), cols.index_select(0, order)
        crow = torch.zeros(n_rows + 1, dtype=torch.int64)
        crow[1:] = torch.cumsum(torch.bincount(rows, minlength=n_rows), 0)
        return cls(crow, cols.contiguous(), rows.contiguous(), order, (n_rows, n_cols))

    def values(self, cell_values: torch.Tensor) -> torch.Tensor:
        return cell_values if self.order is None else cell_values.index_select(0, self.order)

    def matrix(self, entry_values: torch.Tensor) -> torch.Tensor:
        """A sparse CSR matrix of this pattern with values given in entry order."""
        return _csr(self.crow, self.col, entry_values, self.shape)

    def sample(self, left: torch.Tensor, right: torch.Tensor) -> torch.Tensor:
        """left[row] . right[col] for every entry, in entry order (a sampled dense-dense product)."""
        zero = self.matrix(torch.zeros(len(self.col), dtype=left.dtype))
        return torch.sparse.sampled_addmm(zero, left, right.t(), beta=0.0).values()


@dataclass
class Cells:
    """Training pairs merged per (query id row, candidate id row) cell, in both CSR orientations.

    Explicit (squared loss): weight = summed pair weights, target = their weighted mean rating.
    Implicit (weighted ALS): weight = alpha * r = confidence - 1, target = 1 (the preference).
    """

    rows: torch.Tensor  # query id row of each cell, sorted (then by candidate row)
    cols: torch.Tensor  # candidate id row of each cell
    weight: torch.Tensor
    target: torch.Tensor
    constant: float  # explicit: sum over pairs of 1/2 w (y - cell mean)^2, which no model can remove
    n_pairs: int
    query_active: torch.Tensor  # bool: id rows with training pairs (penalised, and solved for)
    candidate_active: torch.Tensor
    by_query: Pattern
    by_candidate: Pattern
    implicit: bool = False

    @classmethod
    def build(cls, query_rows: torch.Tensor, candidate_rows: torch.Tensor, target: torch.Tensor | None,
              weight: torch.Tensor | None, n_query: int, n_candidate: int, implicit: bool = False,
              alpha: float = 1.0, dtype: torch.dtype = torch.float32) -> "Cells":
        """Cells from pair index tensors (id-table rows); target and weight default to 1."""
        n = len(query_rows)
        y = torch.ones(n, dtype=torch.float64) if target is None else target.double()
        w = torch.ones(n, dtype=torch.float64) if weight is None else weight.double()
        key = query_rows * n_candidate + candidate_rows
        uniq, inv = torch.unique(key, sorted=True, return_inverse=True)
        wsum = torch.zeros(len(uniq), dtype=torch.float64).index_add_(0, inv, w)
        wy = torch.zeros(len(uniq), dtype=torch.float64).index_add_(0, inv, w * y)
        if implicit:
            keep = wy > 0  # r = sum of weight * target; cells with r = 0 are plain unobserved cells
            cell_w, cell_y, constant = alpha * wy, torch.ones_like(wy), 0.0
        else:
            keep = wsum > 0  # pairs of weight 0 add nothing to the loss
            mean = torch.where(keep, wy / wsum.clamp(min=1e-300), torch.zeros_like(wy))
            constant = float(0.5 * (w * (y - mean.index_select(0, inv)) ** 2).sum())
            cell_w, cell_y = wsum, mean
        uniq, cell_w, cell_y = uniq[keep], cell_w[keep], cell_y[keep]
        rows, cols = uniq // n_candidate, uniq % n_candidate
        return cls(rows, cols, cell_w.to(dtype), cell_y.to(dtype), constant, n,
                   torch.bincount(query_rows, minlength=n_query) > 0,
                   torch.bincount(candidate_rows, minlength=n_candidate) > 0,
                   Pattern.build(rows, cols, n_query, n_candidate, sort=False),
                   Pattern.build(cols, rows, n_candidate, n_query, sort=True), implicit)


def cells_of(data: Prepared, implicit: bool = False, alpha: float = 1.0, dtype: torch.dtype = torch.float32) -> Cells:
    """The training pairs of a prepared run as cells of id-table rows."""
    tr = data.train
    return Cells.build(data.queries.block["id"].index_select(0, tr.query),
                       data.candidates.block["id"].index_select(0, tr.candidate), tr.target, tr.weight,
                       data.queries.encoders.id_encoder.size, data.candidates.encoders.id_encoder.size,
                       implicit, alpha, dtype)


@dataclass
class Factors:
    """The linear factor model's id and bias tables as plain tensors (biases None without biases)."""

    query: torch.Tensor  # (query id rows, k)
    candidate: torch.Tensor  # (candidate id rows, k)
    query_bias: torch.Tensor | None = None
    candidate_bias: torch.Tensor | None = None
    global_bias: float = 0.0

    @property
    def biases(self) -> bool:
        return self.query_bias is not None

    def to(self, dtype: torch.dtype) -> "Factors":
        conv = lambda t: None if t is None else t.to(dtype)  # noqa: E731
        return Factors(conv(self.query), conv(self.candidate), conv(self.query_bias), conv(self.candidate_bias),
                       self.global_bias)

    @classmethod
    def of_model(cls, model: TwoTowerModel, dtype: torch.dtype = torch.float32) -> "Factors":
        check_linear(model)
        grab = lambda t: t.weight.detach().to(dtype).clone()  # noqa: E731
        if not model.use_biases:
            return cls(grab(model.query_tower.ids), grab(model.candidate_tower.ids))
        return cls(grab(model.query_tower.ids), grab(model.candidate_tower.ids), grab(model.query_bias).squeeze(1),
                   grab(model.candidate_bias).squeeze(1), float(model.global_bias.detach()))

    @torch.no_grad()
    def write_to(self, model: TwoTowerModel) -> None:
        """Copy the factors into the model's id and bias tables (one model type, one bundle format)."""
        model.query_tower.ids.weight.copy_(self.query)
        model.candidate_tower.ids.weight.copy_(self.candidate)
        if self.biases:
            model.query_bias.weight.copy_(self.query_bias.unsqueeze(1))
            model.candidate_bias.weight.copy_(self.candidate_bias.unsqueeze(1))
            model.global_bias.fill_(self.global_bias)


def check_linear(model: TwoTowerModel) -> None:
    if not (model.query_tower.direct and model.candidate_tower.direct):
        raise TowersError("ALS solves the linear factor model only (ids only, no hidden layer, no features)")
    if is_bounded(model.query_tower.ids) or is_bounded(model.candidate_tower.ids):
        raise TowersError("config key 'model.id_table_rows': ALS solves one row per id, but this model composes id "
                          "rows from two shared tables; use evaluation.baseline_solver: gradient, or id_table_rows: 0")
    if model.shared or model.temperature != 1.0 or model.query_tower.normalize or model.query_tower.non_negative:
        raise TowersError("ALS needs separate query and item id tables, temperature 1, and no normalize or "
                          "softplus; set model.shared_tower: false or use evaluation.baseline_solver: gradient")


def solve_rows(pattern: Pattern, fixed: torch.Tensor, gram_coef: torch.Tensor, rhs_coef: torch.Tensor,
               lam: float, start: torch.Tensor, active: torch.Tensor | None = None, cg_steps: int = 0,
               base_gram: torch.Tensor | None = None, base_rhs: torch.Tensor | None = None,
               non_negative: int = 0) -> torch.Tensor:
    """Solve (base_gram + sum_{entries of r} a f f^T + lam I) x_r = base_rhs + sum_{entries of r} b f, all rows.

    f is fixed[col] of each entry, a = gram_coef and b = rhs_coef (in cell order, a >= 0). cg_steps = 0
    solves exactly with batched Cholesky; otherwise that many conjugate-gradient steps from `start`.
    non_negative = c > 0 instead minimises the same quadratic under x >= 0 for the first c coordinates,
    by exact coordinate descent from `start` (HALS). Rows outside `active` keep their start values.
    Returns the (rows, d) solution.
    """
    a, b = pattern.values(gram_coef), pattern.values(rhs_coef)
    rhs = pattern.matrix(b) @ fixed
    if base_rhs is not None:
        rhs = rhs + base_rhs
    if non_negative:
        x = _by_row_grams(pattern, fixed, a, rhs, lam, base_gram,
                          lambda gram, r, rows: _coordinate_passes(gram, r, start.index_select(0, rows), non_negative))
    elif cg_steps == 0:
        x = _by_row_grams(pattern, fixed, a, rhs, lam, base_gram, _cholesky_solve)
    else:
        x = _cg_rows(pattern, fixed, a, rhs, lam, start, active, cg_steps, base_gram)
    return x if active is None else torch.where(active.unsqueeze(1), x, start)


HALS_PASSES = 3  # coordinate passes per half step; each pass costs d^2 per row, far less than the Gram


def _cholesky_solve(gram: torch.Tensor, rhs: torch.Tensor, rows: torch.Tensor) -> torch.Tensor:
    chol, info = torch.linalg.cholesky_ex(gram)
    if bool((info > 0).any()):
        raise TowersError("ALS: a row's normal equations are not positive definite; raise training.id_l2")
    return torch.cholesky_solve(rhs.unsqueeze(2), chol).squeeze(2)


def _coordinate_passes(gram: torch.Tensor, rhs: torch.Tensor, x: torch.Tensor, constrained: int) -> torch.Tensor:
    """Exact coordinate minimisation of 1/2 x^T H x - b^T x, x_j >= 0 for j < constrained, every row at once."""
    x = x.clone()
    x[:, :constrained].clamp_(min=0.0)
    diag = torch.diagonal(gram, dim1=1, dim2=2)
    for _ in range(HALS_PASSES):
        for j in range(x.shape[1]):  # a loop over the k + 1 coordinates, never over rows
            others = (gram[:, j, :] * x).sum(1) - diag[:, j] * x[:, j]
            new = (rhs[:, j] - others) / diag[:, j]
            x[:, j] = new.clamp(min=0.0) if j < constrained else new
    return x


def _by_row_grams(pattern: Pattern, fixed: torch.Tensor, a: torch.Tensor, rhs: torch.Tensor, lam: float,
                  base_gram: torch.Tensor | None, solve) -> torch.Tensor:
    """Build every row's Gram matrix as a segment sum and hand blocks of rows to `solve(gram, rhs, rows)`.

    Rows are grouped by floor(log2(entry count)), so padding a block to its longest row at most
    doubles it, and blocks hold at most GRAM_BUDGET floats.
    """
    n, d = rhs.shape
    counts = pattern.crow[1:] - pattern.crow[:-1]
    level = torch.floor(torch.log2(counts.clamp(min=1).double())).long()
    by_level = torch.argsort(level, stable=True)
    sizes = torch.bincount(level).tolist()
    diag = lam * torch.eye(d, dtype=rhs.dtype) + (0 if base_gram is None else base_gram)
    root = a.clamp(min=0).sqrt()
    x = torch.empty_like(rhs)
    at = 0
    for size in sizes:  # a loop over count levels and blocks, never over rows
        group, at = by_level[at:at + size], at + size
        if size == 0:
            continue
        longest = max(1, int(counts.index_select(0, group).max()))
        per_block = max(1, GRAM_BUDGET // (longest * d))
        for begin in range(0, size, per_block):
            rows = group[begin:begin + per_block]
            cnt = counts.index_select(0, rows)
            local = torch.repeat_interleave(torch.arange(len(rows)), cnt)
            pos = torch.arange(int(cnt.sum())) - torch.repeat_interleave(torch.cumsum(cnt, 0) - cnt, cnt)
            entries = torch.repeat_interleave(pattern.crow.index_select(0, rows), cnt) + pos
            padded = torch.zeros(len(rows), longest, d, dtype=rhs.dtype)
            padded[local, pos] = fixed.index_select(0, pattern.col.index_select(0, entries)) \
                * root.index_select(0, entries).unsqueeze(1)  # sqrt(a) f for every entry
            gram = torch.bmm(padded.transpose(1, 2), padded) + diag
            x[rows] = solve(gram, rhs.index_select(0, rows), rows)
    return x


def _cg_rows(pattern: Pattern, fixed: torch.Tensor, a: torch.Tensor, rhs: torch.Tensor, lam: float,
             start: torch.Tensor, active: torch.Tensor | None, steps: int, base_gram: torch.Tensor | None) -> torch.Tensor:
    """Batched conjugate gradient, one independent system per row, without building any row matrix."""

    def apply(p: torch.Tensor) -> torch.Tensor:
        out = pattern.matrix(pattern.sample(p, fixed) * a) @ fixed + lam * p
        return out if base_gram is None else out + p @ base_gram

    x = start.clone()
    r = rhs - apply(x)
    if active is not None:
        r = r * active.unsqueeze(1).to(r.dtype)
    p = r.clone()
    rs = (r * r).sum(1)
    for _ in range(steps):
        ap = apply(p)
        curv = (p * ap).sum(1)
        alpha = torch.where(curv > 0, rs / curv.clamp(min=torch.finfo(rs.dtype).tiny), torch.zeros_like(rs))
        x.addcmul_(alpha.unsqueeze(1), p)
        r.addcmul_(alpha.unsqueeze(1), ap, value=-1.0)
        rs_new = (r * r).sum(1)
        beta = torch.where(rs > 0, rs_new / rs.clamp(min=torch.finfo(rs.dtype).tiny), torch.zeros_like(rs))
        p = r + beta.unsqueeze(1) * p
        rs = rs_new
    return x


def _augmented(vectors: torch.Tensor, bias: torch.Tensor | None) -> torch.Tensor:
    return vectors if bias is None else torch.cat([vectors, torch.ones(len(vectors), 1, dtype=vectors.dtype)], 1)


def _sides(f: Factors, cells: Cells, side: str):
    """(my vectors, my bias, fixed vectors, fixed bias, pattern, my active, fixed active, fixed row per cell)."""
    if side == "query":
        return f.query, f.query_bias, f.candidate, f.candidate_bias, cells.by_query, cells.query_active, \
            cells.candidate_active, cells.cols
    return f.candidate, f.candidate_bias, f.query, f.query_bias, cells.by_candidate, cells.candidate_active, \
        cells.query_active, cells.rows


def half_step(f: Factors, cells: Cells, lam: float, side: str, cg_steps: int = 0, non_negative: bool = False) -> None:
    """Solve every id row of one side ("query" or "candidate") with the other side fixed, in place.

    non_negative keeps the factor entries (not the bias) >= 0, by HALS coordinate passes.
    """
    mine, my_bias, other, other_bias, pattern, active, other_active, other_row = _sides(f, cells, side)
    fixed = _augmented(other, other_bias)
    offset = (other_bias + f.global_bias) if f.biases else torch.zeros(len(other), dtype=other.dtype)
    cell_offset = offset.index_select(0, other_row)
    start = mine if my_bias is None else torch.cat([mine, my_bias.unsqueeze(1)], 1)
    base_gram = base_rhs = None
    if cells.implicit:
        act = fixed[other_active]
        base_gram = act.t() @ act  # F^T F over every candidate (query) row: the Y^T Y trick
        base_rhs = -(act.t() @ offset[other_active])
        rhs_coef = 1.0 + cells.weight - cells.weight * cell_offset
    else:
        rhs_coef = cells.weight * (cells.target - cell_offset)
    k = mine.shape[1]
    x = solve_rows(pattern, fixed, cells.weight, rhs_coef, lam, start, active, cg_steps, base_gram, base_rhs,
                   non_negative=k if non_negative else 0)
    mine.copy_(x[:, :k])
    if my_bias is not None:
        my_bias.copy_(x[:, k])


def cell_scores(f: Factors, cells: Cells, with_global: bool = True) -> torch.Tensor:
    """The model's score of every cell, in cell order."""
    if not f.biases:
        return cells.by_query.sample(f.query, f.candidate)
    ones_q = torch.ones(len(f.query), 1, dtype=f.query.dtype)
    ones_c = torch.ones(len(f.candidate), 1, dtype=f.candidate.dtype)
    left = torch.cat([f.query, f.query_bias.unsqueeze(1), ones_q], 1)
    right = torch.cat([f.candidate, ones_c, f.candidate_bias.unsqueeze(1)], 1)
    s = cells.by_query.sample(left, right)
    return s + f.global_bias if with_global else s


def _all_cell_sums(f: Factors, cells: Cells, dtype: torch.dtype):
    """Over every active query x active candidate cell: (count, sum of s without g, sum of s^2), s with g."""
    qa, ca = cells.query_active, cells.candidate_active
    nq, nc = int(qa.sum()), int(ca.sum())
    u, v = f.query[qa].to(dtype), f.candidate[ca].to(dtype)
    if f.biases:
        bq, bc = f.query_bias[qa].to(dtype), f.candidate_bias[ca].to(dtype)
        left = torch.cat([u, bq.unsqueeze(1), torch.ones(nq, 1, dtype=dtype)], 1)
        right = torch.cat([v, torch.ones(nc, 1, dtype=dtype), (bc + f.global_bias).unsqueeze(1)], 1)
        plain = float(u.sum(0) @ v.sum(0) + nc * bq.sum() + nq * bc.sum())
    else:
        left, right, plain = u, v, float(u.sum(0) @ v.sum(0))
    squares = float(((left.t() @ left) * (right.t() @ right)).sum())  # sum_{q,c} (l_q . r_c)^2
    return nq * nc, plain, squares


def update_global_bias(f: Factors, cells: Cells) -> None:
    """Set g to its exact minimiser with everything else fixed (g is not penalised)."""
    if not f.biases:
        return
    s0 = cell_scores(f, cells, with_global=False).double()
    w = cells.weight.double()
    if cells.implicit:
        # minimise sum_all 1/2 c (p - s0 - g)^2: g = sum_all c (p - s0) / sum_all c
        count, plain, _ = _all_cell_sums(f, cells, torch.float64)
        num = float((1.0 + w).sum()) - plain - float((w * s0).sum())
        den = count + float(w.sum())
    else:
        num, den = float((w * (cells.target.double() - s0)).sum()), float(w.sum())
    if den > 0:
        f.global_bias = num / den


def _penalty(f: Factors, cells: Cells) -> float:
    qa, ca = cells.query_active, cells.candidate_active
    total = f.query[qa].double().pow(2).sum() + f.candidate[ca].double().pow(2).sum()
    if f.biases:
        total = total + f.query_bias[qa].double().pow(2).sum() + f.candidate_bias[ca].double().pow(2).sum()
    return float(total)


def objective(f: Factors, cells: Cells, lam: float) -> float:
    """The summed objective: N J for squared loss; the Hu-Koren-Volinsky objective for implicit cells."""
    f = f.to(torch.float64)
    s = cell_scores(f, cells)
    w, y = cells.weight.double(), cells.target.double()
    if cells.implicit:
        _, _, squares = _all_cell_sums(f, cells, torch.float64)
        loss = 0.5 * squares + float((0.5 * (1.0 + w) * (1.0 - s) ** 2 - 0.5 * s ** 2).sum())
    else:
        loss = float((0.5 * w * (s - y) ** 2).sum()) + cells.constant
    return loss + 0.5 * lam * _penalty(f, cells)


def als_sweep(f: Factors, cells: Cells, lam: float, cg_steps: int = 0, non_negative: bool = False) -> None:
    """One sweep, in place: all query rows, the global bias, all candidate rows, the global bias."""
    for side in ("query", "candidate"):
        half_step(f, cells, lam, side, cg_steps, non_negative)
        update_global_bias(f, cells)


def method_name(cfg: Config) -> str:
    ev = cfg.evaluation
    if ev.baseline_non_negative:
        return "non-negative ALS (HALS)"
    steps = ev.baseline_row_steps
    solve = f"conjugate gradient, {steps} step{'s' if steps > 1 else ''} per row" if steps else "Cholesky"
    kind = f"weighted ALS (alpha {ev.baseline_event_weight:g})" if ev.baseline_solver == "weighted_als" else "ALS"
    return f"{kind}, {solve}"


def fit_als(model: TwoTowerModel, data: Prepared, cfg: Config, checkpoint_dir: Path | None, label: str,
            resume: bool = False) -> TrainResult:
    """Train the linear factor model by ALS sweeps, with the same validation and early stopping as `fit`.

    Each sweep is one history entry (its `loss` is the objective after the sweep, per training pair).
    ALS is deterministic and quick, so a resumed run simply solves again from the same start
    (`resume` is accepted for the same call shape as `fit`).
    """
    ev, tcfg = cfg.evaluation, cfg.training
    implicit = ev.baseline_solver == "weighted_als"
    lam, sweeps, steps, non_negative = tcfg.id_l2, ev.baseline_rounds, ev.baseline_row_steps, ev.baseline_non_negative
    if lam <= 0:
        raise TowersError("config key 'training.id_l2': ALS needs lambda > 0; "
                          "raise it or use evaluation.baseline_solver: gradient")
    cells = cells_of(data, implicit, ev.baseline_event_weight)
    f = Factors.of_model(model)
    if non_negative:
        f.query.abs_()  # a non-negative start: the magnitudes of the usual random initialisation
        f.candidate.abs_()
    update_global_bias(f, cells)
    n = max(1, cells.n_pairs)
    result = TrainResult(stop_metric=cfg.stop_metric)
    stopping = EarlyStopping(result, tcfg.patience, label, "round", sweeps, "objective", 6)
    log(f"{label}: {method_name(cfg)} on {len(cells.rows):,} cells; objective {objective(f, cells, lam) / n:.6f} at the start")
    bar = show_bar(tcfg.progress)
    progress = tqdm(total=sweeps, desc=f"{label} rounds", unit="round", leave=False, file=sys.stderr, disable=not bar)
    try:
        with StopRequest() as stop:
            for sweep in range(1, sweeps + 1):
                started = time.perf_counter()
                als_sweep(f, cells, lam, steps, non_negative)
                rate = n / max(1e-9, time.perf_counter() - started)
                loss = objective(f, cells, lam) / n
                if not math.isfinite(loss):
                    raise TrainingDiverged(f"{label} ALS diverged at round {sweep} (objective {loss}); no model was "
                                           "written; raise training.id_l2")
                f.write_to(model)
                finished = stopping.after_round(model, data, cfg, sweep, loss, rate, checkpoint_dir)
                progress.update(1)
                progress.set_postfix(objective=f"{loss:.6f}")
                if stop.requested:
                    raise TrainingInterrupted(f"{label} ALS interrupted after round {sweep}; ALS starts again on resume")
                if finished:
                    break
    finally:
        progress.close()
    stopping.restore_best(model)
    return result


PENALTY_FACTORS = (1.0, 3.0, 10.0, 30.0)  # multiples of training.id_l2 each penalty search refits
PENALTY_FURTHER = (100.0, 300.0, 1000.0)  # tried in turn while the largest so far validates best
PENALTY_ROUNDS = 10  # most ALS rounds of one refit
PENALTY_PATIENCE = 2  # a refit stops after this many rounds without a better validation value


def _fresh_factors(like: Factors, seed: int) -> Factors:
    """Factors shaped like `like`, started as a new model is (id rows N(0, ID_INIT_STD^2), row 0 and biases
    zero), from a generator of their own so the caller's random state is left alone."""
    gen = torch.Generator().manual_seed(seed)

    def table(t: torch.Tensor) -> torch.Tensor:
        x = torch.randn(t.shape, generator=gen, dtype=torch.float64).mul_(ID_INIT_STD).to(t.dtype)
        x[0] = 0.0
        return x

    zeros = lambda t: None if t is None else torch.zeros_like(t)  # noqa: E731
    return Factors(table(like.query), table(like.candidate), zeros(like.query_bias), zeros(like.candidate_bias))


def refit_validation(model: TwoTowerModel, data: Prepared, cfg: Config, lam: float,
                     rounds: int = PENALTY_ROUNDS, cells: Cells | None = None) -> dict:
    """Refit the linear factor model by ALS from a fresh start with penalty `lam`, validating each round.

    Squared loss, the row solver of evaluation.baseline_row_steps; `model` is only a template (copied,
    never changed). Stops after PENALTY_PATIENCE rounds without a better validation value. Returns
    {"id_l2", "best_round", "rounds", "valid_<metric>"}: the best validation value and its round.
    """
    metric = cfg.stop_metric
    lower = lower_is_better(metric)
    cells = cells if cells is not None else cells_of(data)
    f = _fresh_factors(Factors.of_model(model), cfg.run.seed)
    update_global_bias(f, cells)
    scratch = copy.deepcopy(model)
    best, best_round, stale, done = None, 0, 0, 0
    for sweep in range(1, rounds + 1):
        als_sweep(f, cells, lam, cfg.evaluation.baseline_row_steps)
        f.write_to(scratch)
        value = validation_metrics(model_scorer(scratch, data), data, cfg, data.valid, scratch).get(metric)
        done = sweep
        if value is None or not math.isfinite(value):
            break
        if best is None or (value < best if lower else value > best):
            best, best_round, stale = value, sweep, 0
        else:
            stale += 1
            if stale >= PENALTY_PATIENCE:
                break
    return {"id_l2": lam, "best_round": best_round, "rounds": done, f"valid_{metric}": best}


def penalty_search(model: TwoTowerModel, data: Prepared, cfg: Config) -> dict:
    """The penalty validation prefers among multiples of training.id_l2, by cheap ALS refits.

    Refits at PENALTY_FACTORS x id_l2 (the current penalty included, so every candidate is judged by the
    same procedure: the same start, solver and round budget), then, while the largest penalty tried so far
    validates best, at PENALTY_FURTHER in turn. Returns {"metric", "rounds", "tried": [refit_validation
    rows with "factor"], "best_id_l2", "best_factor"}; the best is the current penalty when nothing
    larger validates better. Needs validation pairs.
    """
    metric, lam = cfg.stop_metric, cfg.training.id_l2
    lower = lower_is_better(metric)
    key = f"valid_{metric}"
    rounds = max(1, min(cfg.evaluation.baseline_rounds, PENALTY_ROUNDS))
    cells = cells_of(data)
    tried = []

    def better(a: dict, b: dict) -> bool:
        if a[key] is None:
            return False
        return b[key] is None or (a[key] < b[key] if lower else a[key] > b[key])

    def best_row() -> dict:
        top = tried[0]
        for row in tried[1:]:
            if better(row, top):
                top = row
        return top

    for factor in PENALTY_FACTORS:
        tried.append(dict(refit_validation(model, data, cfg, lam * factor, rounds, cells), factor=factor))
    for factor in PENALTY_FURTHER:
        if best_row() is not tried[-1]:
            break
        tried.append(dict(refit_validation(model, data, cfg, lam * factor, rounds, cells), factor=factor))
    top = best_row()
    return {"metric": metric, "rounds": rounds, "tried": tried, "best_id_l2": top["id_l2"], "best_factor": top["factor"]}
