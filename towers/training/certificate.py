"""A global-optimality certificate for the linear factor model trained under squared loss.

The objective. For the id-only model, N J (training/loop.py) is, over the cells of the training pairs
(repeated pairs merged: weight omega = sum of their weights, target ybar = their weighted mean,
C = the part of the loss no score can remove),

    F(U, V, b, g) = sum_cells 1/2 omega (s - ybar)^2 + C + lambda/2 (||U||^2 + ||V||^2 + ||b||^2),
    s = (U V^T)_qc + b_q + b_c + g.

Because min over U V^T = W of (||U||^2 + ||V||^2)/2 is the trace norm ||W||_* (Srebro, Rennie &
Jaakkola 2005), F(U, V, b, g) >= P(W, b, g) with W = U V^T and the convex problem

    P(W, b, g) = L(W, b, g) + lambda ||W||_* + lambda/2 ||b||^2,   L = sum_cells 1/2 omega (s - ybar)^2 + C,

whose minimum P* is also the least value of F over factors of any rank (Recht, Fazel & Parrilo 2010;
Mazumder, Hastie & Tibshirani 2010). The biases are folded in: P is jointly convex in (W, b, g), so
the certificate speaks about the whole objective, biases and global bias included.

The ratio. Let G be the sparse matrix of the loss gradient, G_qc = omega (s - ybar) on the cells (for
unit weights and no biases, P_Omega(W - Y)). The optimality condition 0 in G + lambda d||W||_*
requires ||G||_2 <= lambda, with equality when W != 0; at a stationary point of F (gradient norm 0)
it is also sufficient. `ratio` = ||G||_2 / lambda: above 1 the model is not at the global optimum.

The gap bound (Fenchel duality). Write P = L(A x) + R(x) with x = (W, b, g), A x the cell scores and
R = lambda ||W||_* + lambda/2 ||b||^2. For every theta on the cells, P* >= D(theta) = -L*(theta) -
R*(-A^T theta), where L*(theta) = sum theta ybar + theta^2 / (2 omega) - C, and R* is finite only if
the trace-norm part ||Theta||_2 <= lambda and the global-bias part sum theta = 0, adding
(||B_q theta||^2 + ||B_c theta||^2) / (2 lambda) for the per-row sums B theta that meet the biases.
We take theta = t * omega (s - ybar - delta), delta the weighted mean residual (so sum theta = 0;
delta = 0 without biases), which is the gradient of L at the optimum, and choose t in
[0, lambda / ||Theta||_2] maximising the concave quadratic D(t) = C - t a - t^2 c. Then

    F(U, V, b, g) - P*  <=  gap = F(U, V, b, g) - D(t),

a bound on how far the trained objective is from the best any linear factor model (of any rank) can
reach, in the units of N J. It is 0 exactly at a global optimum (t = 1 there). The certificate
passes when gap / F <= evaluation.certificate_gap.

Advice. The certificate speaks about the training objective; whether more training or a different
lambda helps is a question for validation, so the advice reads the run's history (one row per epoch or
ALS round: the objective per pair `loss` and the validation metric) as well:

  overfit        after its best round validation got worse (its worst value after the best by more
                 than FLAT, 0.1%, of the best, so that a converged run's wobble does not count) while
                 the objective per pair went on falling (from the best round to the last): later rounds
                 fit the training pairs at validation's expense, and early stopping keeps an early
                 round far from this lambda's optimum (so the certificate fails). A larger lambda is
                 what helps, and which one is measured, not guessed: `als.penalty_search` refits the
                 model by ALS from a fresh start at 1, 3, 10 and 30 times lambda (then 100, 300, 1000
                 while the largest so far is best), each for at most als.PENALTY_ROUNDS rounds, keeping
                 each refit's best validation value, and names the penalty with the best one. The
                 current lambda is refitted too, so every candidate is judged by the same start, solver
                 and round budget. When no larger lambda validates better, the line says so and the
                 advice below applies.
  not converged  the certificate fails and validation was still improving at the last round: train
                 longer (more ALS rounds or epochs, and patience).
  otherwise      as without validation: with a large gradient norm the model has not converged (train
                 longer); with a gradient norm near 0 and a ratio above 1 it sits at a stationary point
                 of rank k that is not the global optimum, so k = model.dim is too small for this lambda.

Spectral norms come from Golub-Kahan-Lanczos bidiagonalisation with full reorthogonalisation on
sparse index tensors (never a dense n x m matrix); its estimate approaches ||G||_2 from below.
"""

from __future__ import annotations

import math

import numpy as np
import torch

from towers.config import Config, lower_is_better
from towers.data.prepare import Prepared
from towers.model.id_tables import is_bounded
from towers.model.towers import TwoTowerModel
from towers.training.als import Cells, Factors, cell_scores, cells_of, penalty_search

LANCZOS_STEPS = 100
LANCZOS_MEMORY = 2 ** 25  # doubles kept for the Lanczos bases (256 MB)
LANCZOS_TOL = 1e-9
FLAT = 1e-3  # a validation value within this share of the best counts as no worse (converged runs wobble)


def _sparse(rows: torch.Tensor, cols: torch.Tensor, values: torch.Tensor, shape: tuple[int, int]):
    """The matrix and its transpose as CSR (repeated entries summed)."""
    coo = torch.sparse_coo_tensor(torch.stack([rows, cols]), values.double(), shape, check_invariants=False).coalesce()
    return coo.to_sparse_csr(), coo.t().coalesce().to_sparse_csr()


def spectral_norm(rows: torch.Tensor, cols: torch.Tensor, values: torch.Tensor, shape: tuple[int, int],
                  steps: int = LANCZOS_STEPS, tol: float = LANCZOS_TOL, seed: int = 0) -> tuple[float, int, bool]:
    """Largest singular value of the sparse matrix given by (rows, cols, values) triplets.

    Golub-Kahan-Lanczos with full reorthogonalisation. Returns (estimate, steps taken, converged):
    converged means the top Ritz value's residual is below tol times the estimate.
    """
    n, m = shape
    if len(values) == 0 or float(values.abs().max()) == 0.0:
        return 0.0, 0, True
    a, at = _sparse(rows, cols, values, shape)
    steps = max(1, min(steps, n, m, LANCZOS_MEMORY // max(1, n + m)))
    gen = torch.Generator().manual_seed(seed)
    us = torch.zeros(steps, n, dtype=torch.float64)
    vs = torch.zeros(steps + 1, m, dtype=torch.float64)
    v = torch.randn(m, generator=gen, dtype=torch.float64)
    vs[0] = v / v.norm()
    alphas, betas = [], []
    beta, estimate, converged = 0.0, 0.0, False
    for j in range(steps):
        u = a @ vs[j] - (beta * us[j - 1] if j else 0.0)
        for _ in range(2):  # reorthogonalise twice ("twice is enough")
            u = u - us[:j].t() @ (us[:j] @ u)
        alpha = float(u.norm())
        if alpha <= 1e-300:
            converged = True
            break
        us[j] = u / alpha
        w = at @ us[j] - alpha * vs[j]
        for _ in range(2):
            w = w - vs[:j + 1].t() @ (vs[:j + 1] @ w)
        beta = float(w.norm())
        alphas.append(alpha)
        betas.append(beta)
        bidiag = np.diag(alphas) + np.diag(betas[:-1], 1)
        left, sing, _ = np.linalg.svd(bidiag)
        estimate = float(sing[0])
        # residual of the top Ritz triple: ||A^T u - sigma v|| = beta_j |last entry of its left vector|
        if beta * abs(left[-1, 0]) <= tol * estimate or beta <= 1e-300:
            converged = True
            break
        vs[j + 1] = w / beta
    return estimate, len(alphas), converged


def not_applicable(reason: str) -> dict:
    return {"applies": False, "reason": reason}


def certify(model: TwoTowerModel, data: Prepared, cfg: Config, history: list[dict] | None = None) -> dict:
    """The certificate of a trained linear factor model (a dict for certificate.json).

    `history` is the training history (TrainResult.history); with validation in it the certificate
    also says whether the run overfitted or stopped before converging, and what to change ("advice").
    """
    tcfg, ev = cfg.training, cfg.evaluation
    if tcfg.loss != "squared":
        return not_applicable(f"training.loss is {tcfg.loss}; the certificate is for squared loss")
    if tcfg.id_l2 <= 0:
        return not_applicable("training.id_l2 is 0: without the trace-norm penalty there is no certificate")
    if ev.baseline_non_negative:
        return not_applicable("non-negative factors: the certificate covers unconstrained factors only")
    if model.shared:
        return not_applicable("a shared tower scores u_i . u_j, which is not a free product U V^T")
    if is_bounded(model.query_tower.ids) or is_bounded(model.candidate_tower.ids):
        return not_applicable("model.id_table_rows: id rows composed from two shared tables are not free factors "
                              "U, V; the certificate covers one row per id")
    cells = cells_of(data, dtype=torch.float64)
    factors = Factors.of_model(model, torch.float64)
    cert = certificate(factors, cells, tcfg.id_l2, ev.certificate_gap)
    course = validation_course(history or [], cfg.stop_metric)
    search = None
    if course is not None and course["overfit"] and len(data.valid):
        search = penalty_search(model, data, cfg)
    more = "evaluation.baseline_rounds" if ev.baseline_solver != "gradient" else "training.epochs"
    cert["validation"] = course
    cert["penalty_search"] = search
    cert["advice"] = advice(cert, course, search, more)
    return cert


def validation_course(history: list[dict], metric: str) -> dict | None:
    """How validation and the objective moved over the rounds of a training history (None without
    validation): the best round, the worst after it, the last, and whether the run overfitted (after its
    best round validation got worse, by more than FLAT of the best value, while the objective per pair
    fell from the best round to the last).
    """
    key = f"valid_{metric}"
    rows = [r for r in history if r.get(key) is not None and math.isfinite(r[key])]
    if not rows:
        return None
    lower = lower_is_better(metric)
    sign = 1.0 if lower else -1.0  # sign * value: lower is better
    at = min(range(len(rows)), key=lambda i: sign * rows[i][key])  # the first best round
    best, last = rows[at], rows[-1]
    worst = max(rows[at:], key=lambda r: sign * r[key])
    rise = sign * (worst[key] - best[key])
    return {"metric": metric, "best_round": best["epoch"], "best_value": best[key], "best_objective": best["loss"],
            "worst_round_after_best": worst["epoch"], "worst_value_after_best": worst[key],
            "last_round": last["epoch"], "last_value": last[key], "last_objective": last["loss"],
            "still_improving": best is last,
            "overfit": bool(rise > FLAT * abs(best[key]) and last["loss"] < best["loss"])}


def advice(cert: dict, course: dict | None, search: dict | None, more: str) -> dict:
    """What to change, as {"kind", "text"}: kind is larger_penalty, train_longer, raise_dim_or_train_longer
    or none (see the module docstring); text is the advice's words for the log line."""
    note = ""
    if search is not None:
        m, key = search["metric"], f"valid_{search['metric']}"
        tried = ", ".join(f"{r['id_l2']:g}: " + ("-" if r[key] is None else f"{r[key]:.4f}") for r in search["tried"])
        rose = (f"validation {m} rose from {course['best_value']:.4f} (round {course['best_round']}) to "
                f"{course['worst_value_after_best']:.4f} (round {course['worst_round_after_best']}) while the "
                f"objective fell from {course['best_objective']:.6g} to {course['last_objective']:.6g} (round "
                f"{course['last_round']})")
        refits = f"ALS refits of at most {search['rounds']} rounds, {m} by id_l2 {tried}"
        if search["best_factor"] > 1.0:
            best = next(r for r in search["tried"] if r["id_l2"] == search["best_id_l2"])
            text = (f"overfit: {rose}; raise training.id_l2 from {cert['lambda']:g} to {search['best_id_l2']:g}, "
                    f"which validation prefers ({m} {best[key]:.4f}; {refits})")
            if search["best_factor"] == search["tried"][-1]["factor"]:
                text += "; the largest tried was best, so a larger one may help still"
            return {"kind": "larger_penalty", "text": text}
        note = f"{rose}, but no larger training.id_l2 validated better ({refits}); "
    if cert["passed"]:
        return {"kind": "none", "text": note.rstrip("; ")}
    if course is not None and course["still_improving"]:
        return {"kind": "train_longer",
                "text": (f"not converged: validation {course['metric']} was still improving at the last round "
                         f"({course['last_value']:.4f}, round {course['last_round']}); train longer (raise {more} "
                         "and training.patience)")}
    return {"kind": "raise_dim_or_train_longer",
            "text": (f"{note}train longer (more epochs or ALS rounds), and if the gradient norm is already near 0, "
                     "raise model.dim")}


def certificate(f: Factors, cells: Cells, lam: float, tolerance: float = 1e-3) -> dict:
    """Ratio, stationarity and gap bound of factors on explicit cells (see the module docstring)."""
    f = f.to(torch.float64)
    qa, ca = cells.query_active, cells.candidate_active
    w, y = cells.weight.double(), cells.target.double()
    residual = cell_scores(f, cells) - y
    grad = w * residual
    shape = (len(f.query), len(f.candidate))
    sigma, steps, converged = spectral_norm(cells.rows, cells.cols, grad, shape)

    def row_sums(rows, values, n):
        return torch.zeros(n, dtype=torch.float64).index_add_(0, rows, values)

    gq_mat, gc_mat = _sparse(cells.rows, cells.cols, grad, shape)
    on_q, on_c = qa.double().unsqueeze(1), ca.double().unsqueeze(1)
    parts = [((gq_mat @ f.candidate + lam * f.query) * on_q).pow(2).sum(),
             ((gc_mat @ f.query + lam * f.candidate) * on_c).pow(2).sum()]
    penalty = f.query[qa].pow(2).sum() + f.candidate[ca].pow(2).sum()
    if f.biases:
        parts += [((row_sums(cells.rows, grad, shape[0]) + lam * f.query_bias) * qa).pow(2).sum(),
                  ((row_sums(cells.cols, grad, shape[1]) + lam * f.candidate_bias) * ca).pow(2).sum(),
                  grad.sum().pow(2)]
        penalty = penalty + f.query_bias[qa].pow(2).sum() + f.candidate_bias[ca].pow(2).sum()
    grad_norm = float(torch.stack(parts).sum().sqrt())
    value = float((0.5 * w * residual ** 2).sum()) + cells.constant + 0.5 * lam * float(penalty)

    # the dual point: theta = t * omega * (residual - delta), feasible for the global bias when sum theta = 0
    shifted = residual
    if f.biases and float(w.sum()) > 0:
        shifted = residual - float((w * residual).sum()) / float(w.sum())
    theta = w * shifted
    a = float((theta * y).sum())
    c = 0.5 * float((w * shifted ** 2).sum())
    if f.biases:
        c += (float(row_sums(cells.rows, theta, shape[0]).pow(2).sum()) +
              float(row_sums(cells.cols, theta, shape[1]).pow(2).sum())) / (2.0 * lam)
    sigma_theta = sigma if shifted is residual else spectral_norm(cells.rows, cells.cols, theta, shape)[0]
    t_max = lam / sigma_theta if sigma_theta > 0 else math.inf
    t = 0.0 if c <= 0 else min(max(-a / (2.0 * c), 0.0), t_max)
    dual = cells.constant - t * a - t * t * c
    gap = max(0.0, value - dual)
    relative = gap / value if value > 0 else 0.0
    return {"applies": True, "lambda": lam, "spectral_norm": sigma, "ratio": sigma / lam,
            "gradient_norm": grad_norm, "objective": value, "objective_per_pair": value / max(1, cells.n_pairs),
            "dual_bound": dual, "gap": gap, "relative_gap": relative, "tolerance": tolerance,
            "passed": bool(relative <= tolerance), "lanczos_steps": steps, "lanczos_converged": converged}


def describe(cert: dict, label: str = "linear_factor") -> str:
    """One line for the training log: the verdict, the numbers, and the advice (certificate.json holds the
    same facts under "advice", "validation" and "penalty_search")."""
    if not cert["applies"]:
        return f"{label} certificate: not computed ({cert['reason']})"
    facts = (f"||G||_2 / lambda = {cert['ratio']:.4f}, gradient norm {cert['gradient_norm']:.3g}, "
             f"objective within {cert['gap']:.3g} (relative {cert['relative_gap']:.2e}) of the global optimum")
    verdict = "passed" if cert["passed"] else "not passed"
    said = cert.get("advice") or advice(cert, None, None, "training.epochs")
    return f"{label} certificate: {verdict}; {facts}" + (f"; {said['text']}" if said["text"] else "")
