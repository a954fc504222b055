"""The global-optimality certificate of the linear factor model, checked against known optima.

References: singular-value soft-thresholding (Mazumder, Hastie & Tibshirani 2010) gives the optimum
of a fully observed problem in closed form; numpy and scipy give spectral norms; an accelerated
proximal-gradient solve in numpy (Beck & Teboulle 2009, with the singular-value shrinkage prox of
Cai, Candes & Shen 2010) gives the optimum with biases and missing entries.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import scipy.sparse
import scipy.sparse.linalg
import torch
import yaml

from towers import config as C
from towers.model.build import baseline_model
from towers.runs.train import train_run
from towers.training.als import Cells, Factors, als_sweep, cells_of, fit_als
from towers.training.certificate import certificate, certify, describe, spectral_norm, validation_course
from towers.training.loop import fit

from ..helpers import prepared_baseline

F64 = torch.float64


pytestmark = pytest.mark.usefixtures("one_thread")  # tiny problems: threads only add overhead


def _spectrum_matrix(n: int, m: int, spectrum, seed: int = 7) -> np.ndarray:
    rng = np.random.default_rng(seed)
    p, _ = np.linalg.qr(rng.standard_normal((n, len(spectrum))))
    q, _ = np.linalg.qr(rng.standard_normal((m, len(spectrum))))
    return (p * np.asarray(spectrum)) @ q.T


def _full_cells(y: np.ndarray) -> Cells:
    """Every cell of y observed once; matrix row i is id row i + 1 (row 0 is the unknown id)."""
    n, m = y.shape
    rows, cols = np.meshgrid(np.arange(n), np.arange(m), indexing="ij")
    return Cells.build(torch.from_numpy(rows.ravel() + 1), torch.from_numpy(cols.ravel() + 1),
                       torch.from_numpy(y.ravel()), None, n + 1, m + 1, dtype=F64)


def _pad(a: np.ndarray) -> torch.Tensor:
    return torch.from_numpy(np.vstack([np.zeros((1, a.shape[1])), a]))


def _soft_threshold_optimum(y: np.ndarray, lam: float):
    p, s, qt = np.linalg.svd(y, full_matrices=False)
    shrunk = np.maximum(s - lam, 0.0)
    w = (p * shrunk) @ qt
    return p, shrunk, qt, 0.5 * np.sum((y - w) ** 2) + lam * shrunk.sum()


def test_known_optimum_passes_and_its_gap_is_zero():
    y = _spectrum_matrix(30, 20, [10, 8, 6, 1, .9, .8, .7, .6, .5, .4, .3, .2, .1])
    lam, k = 2.0, 6
    p, shrunk, qt, best = _soft_threshold_optimum(y, lam)
    # Mazumder, Hastie & Tibshirani (2010): the optimum is the SVD of Y with singular values
    # max(sigma - lambda, 0); balanced factors U = P sqrt(S), V = Q sqrt(S) reach it in N J.
    root = np.sqrt(shrunk[:k])
    f = Factors(_pad(p[:, :k] * root), _pad(qt[:k].T * root))
    cert = certificate(f, _full_cells(y), lam)
    assert cert["objective"] == pytest.approx(best, rel=1e-12)  # Mazumder et al. (2010)
    # at the optimum ||P_Omega(W - Y)||_2 = lambda exactly (the residual's top singular values are lambda)
    assert cert["ratio"] == pytest.approx(1.0, abs=1e-9)  # Mazumder et al. (2010)
    assert cert["gradient_norm"] < 1e-9
    assert cert["gap"] < 1e-9 * best and cert["passed"]
    assert cert["lanczos_converged"]


def test_gap_is_exact_for_unbalanced_factors_of_the_optimal_product():
    y = _spectrum_matrix(25, 18, [9, 7, 5, 1, .8, .5, .3])
    lam, k = 1.5, 4
    p, shrunk, qt, best = _soft_threshold_optimum(y, lam)
    # the optimal W split unevenly: the same product, a larger penalty than the trace norm
    f = Factors(_pad(p[:, :k] * shrunk[:k]), _pad(qt[:k].T))
    cert = certificate(f, _full_cells(y), lam)
    # The residual is the optimal one, so the dual point is the optimal dual point and the bound is
    # exact: gap = F - P*, with P* from Mazumder, Hastie & Tibshirani (2010).
    assert cert["gap"] == pytest.approx(cert["objective"] - best, rel=1e-9)  # Mazumder et al. (2010)
    assert cert["ratio"] == pytest.approx(1.0, abs=1e-9)
    assert cert["gradient_norm"] > 1.0 and not cert["passed"]  # not stationary, although ||G||_2 = lambda


@pytest.mark.parametrize("shape,repeated", [((40, 30), False), ((15, 60), True), ((70, 9), True)])
def test_spectral_norm_matches_numpy_and_scipy(shape, repeated):
    n, m = shape
    rng = np.random.default_rng(n * m)
    count = n * m // 3
    rows, cols = rng.integers(0, n, count), rng.integers(0, m, count)
    if repeated:  # repeated entries are summed, as scipy.sparse.coo_matrix sums them
        rows, cols = np.concatenate([rows, rows[:50]]), np.concatenate([cols, cols[:50]])
    vals = rng.standard_normal(len(rows))
    sigma, steps, converged = spectral_norm(torch.from_numpy(rows), torch.from_numpy(cols), torch.from_numpy(vals), shape)
    ref_sparse = scipy.sparse.coo_matrix((vals, (rows, cols)), shape=shape)
    top = scipy.sparse.linalg.svds(ref_sparse.tocsr(), k=1, return_singular_vectors=False)[0]
    dense = ref_sparse.toarray()
    assert converged and steps <= min(n, m)
    assert sigma == pytest.approx(np.linalg.norm(dense, 2), rel=1e-8)  # reference: numpy.linalg.norm(ord=2)
    assert sigma == pytest.approx(top, rel=1e-8)  # reference: scipy.sparse.linalg.svds


def test_spectral_norm_with_a_repeated_top_singular_value():
    y = _spectrum_matrix(30, 25, [3, 3, 3, 2, 1])  # the top value has multiplicity three
    rows, cols = np.nonzero(np.ones_like(y))
    sigma, _, _ = spectral_norm(torch.from_numpy(rows), torch.from_numpy(cols), torch.from_numpy(y[rows, cols]), y.shape)
    assert sigma == pytest.approx(np.linalg.norm(y, 2), rel=1e-9)  # reference: numpy.linalg.norm(ord=2)


# --- through the run path --------------------------------------------------------------------------

def _write(tmp_path, df: pd.DataFrame, training: dict, model: dict, evaluation: dict | None = None, weights=False) -> dict:
    interactions = {"path": "ratings.csv", "query_column": "u", "candidate_column": "i", "target_column": "r"}
    if weights:
        interactions["weight_column"] = "w"
    df.to_csv(tmp_path / "ratings.csv", index=False, float_format="%.17g")
    raw = {"run": {"seed": 0, "threads": 1}, "interactions": interactions, "model": model,
           "training": dict({"weight_decay": 0.0, "progress": "plain", "patience": 1, "loss": "squared"}, **training),
           "evaluation": dict({"test_fraction": 0.0, "validation_fraction": 0.0}, **(evaluation or {})),
           "report": {"enabled": False}}
    (tmp_path / "config.yaml").write_text(yaml.safe_dump(raw, sort_keys=False), encoding="utf-8")
    return C.load(tmp_path / "config.yaml")


def _frame(y: np.ndarray, keep: np.ndarray | None = None, weights: np.ndarray | None = None) -> pd.DataFrame:
    rows, cols = np.nonzero(np.ones_like(y) if keep is None else keep)
    df = pd.DataFrame({"u": [f"u{i:02d}" for i in rows], "i": [f"i{j:02d}" for j in cols], "r": y[rows, cols]})
    if weights is not None:
        df["w"] = weights[rows, cols]
    return df


def _matrix_order(model, data, y):
    """The matrix-ordered product U V^T of the learned id tables (ids u00.., i00..)."""
    uid = {name: r + 1 for r, name in enumerate(data.queries.encoders.id_encoder.ids.tolist())}
    iid = {name: r + 1 for r, name in enumerate(data.candidates.encoders.id_encoder.ids.tolist())}
    u = model.query_tower.ids.weight.detach().double().numpy()[[uid[f"u{i:02d}"] for i in range(y.shape[0])]]
    v = model.candidate_tower.ids.weight.detach().double().numpy()[[iid[f"i{j:02d}"] for j in range(y.shape[1])]]
    return u, v


@pytest.mark.parametrize("how", ["gradient", "als"])
def test_stopped_early_fails_and_the_bound_covers_the_true_gap(tmp_path, how):
    y = _spectrum_matrix(30, 20, [10, 8, 6, 1, .9, .8, .7, .6, .5, .4])
    lam, k = 2.0, 6
    evaluation = {"baseline_solver": "als", "baseline_rounds": 1, "baseline_row_steps": 0} if how == "als" else {}
    cfg = _write(tmp_path, _frame(y), {"id_l2": lam, "epochs": 2, "id_optimizer": "sgd", "id_learning_rate": 10.0,
                                       "batch_size": 600}, {"dim": k, "hidden": [], "biases": False}, evaluation)
    data, model, preset = prepared_baseline(cfg)
    (fit if how == "gradient" else fit_als)(model, data, preset, None, "linear_factor")
    cert = certify(model, data, preset)
    u, v = _matrix_order(model, data, y)
    trained = 0.5 * np.sum((y - u @ v.T) ** 2) + 0.5 * lam * (np.sum(u ** 2) + np.sum(v ** 2))
    best = _soft_threshold_optimum(y, lam)[3]
    assert cert["objective"] == pytest.approx(trained, rel=1e-5)
    assert not cert["passed"] and cert["ratio"] > 1.0 and cert["relative_gap"] > 1e-2
    # weak duality: the reported gap bounds the true distance to the optimum of Mazumder et al. (2010)
    assert cert["gap"] >= (trained - best) * (1 - 1e-6)  # Mazumder, Hastie & Tibshirani (2010)
    assert "not passed" in describe(cert) and "train longer" in describe(cert)


def _prox_gradient_optimum(y, observed, weights, lam, iters=4000):
    """min sum_obs 1/2 w (W + bq + bc + g - y)^2 + lam ||W||_* + lam/2 (||bq||^2 + ||bc||^2), in numpy.

    FISTA (Beck & Teboulle 2009) with the prox of lam ||.||_*: shrink the singular values by
    step * lam (Cai, Candes & Shen 2010). Returns the optimal value.
    """
    n, m = y.shape
    wmask = np.where(observed, weights, 0.0)
    # Lipschitz constant of the smooth part: ||A^T diag(w) A||_2 + lam, A the linear map to scores
    rows, cols = np.nonzero(observed)
    a = np.zeros((len(rows), n * m + n + m + 1))
    a[np.arange(len(rows)), rows * m + cols] = 1
    a[np.arange(len(rows)), n * m + rows] = 1
    a[np.arange(len(rows)), n * m + n + cols] = 1
    a[:, -1] = 1
    lip = np.linalg.norm(a.T @ (wmask[rows, cols][:, None] * a), 2) + lam
    step = 1.0 / lip
    x = [np.zeros((n, m)), np.zeros(n), np.zeros(m), 0.0]
    z, t = [c.copy() if isinstance(c, np.ndarray) else c for c in x], 1.0

    def value(w, bq, bc, g):
        r = (w + bq[:, None] + bc[None, :] + g - y) * observed
        return 0.5 * np.sum(wmask * r ** 2) + lam * np.linalg.svd(w, compute_uv=False).sum() + 0.5 * lam * (bq @ bq + bc @ bc)

    for _ in range(iters):
        w, bq, bc, g = z
        r = wmask * (w + bq[:, None] + bc[None, :] + g - y)
        p, s, qt = np.linalg.svd(w - step * r, full_matrices=False)
        new = [(p * np.maximum(s - step * lam, 0)) @ qt, bq - step * (r.sum(1) + lam * bq),
               bc - step * (r.sum(0) + lam * bc), g - step * r.sum()]
        t_next = (1 + np.sqrt(1 + 4 * t * t)) / 2
        z = [nw + (t - 1) / t_next * (nw - old) for nw, old in zip(new, x)]
        x, t = new, t_next
    return value(*x)


@pytest.mark.slow
def test_als_to_convergence_passes_with_biases_weights_and_missing_ratings(tmp_path):
    rng = np.random.default_rng(4)
    n, m = 14, 11
    y = _spectrum_matrix(n, m, [6, 4, 3, .5, .3], seed=5) + 3.0 + rng.normal(0, 0.3, (n, m))
    observed = rng.random((n, m)) < 0.7
    weights = rng.uniform(0.5, 2.0, (n, m))
    lam = 1.5
    cfg = _write(tmp_path, _frame(y, observed, weights), {"id_l2": lam}, {"dim": 6, "hidden": [], "biases": True},
                 {"baseline_solver": "als", "baseline_rounds": 400, "baseline_row_steps": 0}, weights=True)
    data, model, preset = prepared_baseline(cfg)
    fit_als(model, data, preset, None, "linear_factor")
    cert = certify(model, data, preset)
    assert cert["passed"] and cert["ratio"] <= 1 + 1e-3 and cert["relative_gap"] < 1e-5
    assert "certificate: passed" in describe(cert)
    best = _prox_gradient_optimum(y, observed, weights, lam)
    # the ALS optimum is the convex problem's optimum (Srebro, Rennie & Jaakkola 2005), computed
    # independently by proximal gradient (Beck & Teboulle 2009; Cai, Candes & Shen 2010)
    assert cert["objective"] == pytest.approx(best, rel=1e-5)  # Beck & Teboulle (2009)

    # two sweeps from the same start: the certificate fails, and its gap covers the true distance
    torch.manual_seed(0)
    early, _ = baseline_model(data, cfg)
    f = Factors.of_model(early, F64)
    cells = cells_of(data, dtype=F64)
    for _ in range(2):
        als_sweep(f, cells, lam)
    cert_early = certificate(f, cells, lam)
    assert not cert_early["passed"]
    assert cert_early["gap"] >= (cert_early["objective"] - best) * (1 - 1e-6)  # weak duality, Beck & Teboulle reference
    assert cert_early["objective"] - best > 1e-3 * best


def test_training_run_writes_the_certificate(tmp_path, capfd):
    rng = np.random.default_rng(2)
    y = _spectrum_matrix(24, 16, [5, 4, 3], seed=3) + 3.0
    keep = rng.random(y.shape) < 0.8
    cfg = _write(tmp_path, _frame(y, keep), {"id_l2": 1.0, "epochs": 1},
                 {"dim": 4, "hidden": [8], "biases": True},
                 {"baseline_solver": "als", "baseline_rounds": 60, "baseline_row_steps": 3,
                  "validation_fraction": 0.1, "test_fraction": 0.1})
    out = tmp_path / "run"
    train_run(tmp_path / "config.yaml", out)
    cert = json.loads((out / "linear_factor" / "certificate.json").read_text(encoding="utf-8"))
    assert cert["applies"] and set(cert) >= {"ratio", "gradient_norm", "gap", "relative_gap", "passed", "advice",
                                             "validation", "penalty_search"}
    assert cert["validation"]["metric"] == "rmse" and cert["advice"]["kind"] in (
        "none", "larger_penalty", "train_longer", "raise_dim_or_train_longer")
    history = json.loads((out / "history.json").read_text(encoding="utf-8"))["epochs"]["linear_factor"]
    assert history and all(set(r) == {"epoch", "loss", "pairs_per_s", "valid_rmse"} for r in history)
    err = capfd.readouterr().err
    assert "linear_factor certificate:" in err and "linear_factor round 1/60" in err
    assert cfg.evaluation.baseline_solver == "als"


# --- the advice: not converged, overfit, or as the certificate says -------------------------------

def _valid_rmse(model, data) -> float:
    """Validation RMSE of a linear factor model, scored in numpy from its id and bias tables."""
    q = data.queries.block["id"].index_select(0, data.valid.query).numpy()
    c = data.candidates.block["id"].index_select(0, data.valid.candidate).numpy()
    u = model.query_tower.ids.weight.detach().double().numpy()
    v = model.candidate_tower.ids.weight.detach().double().numpy()
    bq = model.query_bias.weight.detach().double().numpy()[:, 0]
    bc = model.candidate_bias.weight.detach().double().numpy()[:, 0]
    s = np.einsum("ij,ij->i", u[q], v[c]) + bq[q] + bc[c] + float(model.global_bias.detach())
    return float(np.sqrt(np.mean((s - data.valid.target.double().numpy()) ** 2)))


def _noisy_rank_two(tmp_path, lam: float, rounds: int, row_steps: int):
    """Rank 2 (entries about 1.5) plus noise sigma 1, half the 40 x 30 cells observed, a quarter of them held
    out for validation: a small penalty overfits it within a few rounds."""
    rng = np.random.default_rng(11)
    y = _spectrum_matrix(40, 30, [60, 45], seed=11) + rng.normal(0, 1.0, (40, 30))
    keep = rng.random(y.shape) < 0.5
    return _write(tmp_path, _frame(y, keep), {"id_l2": lam, "patience": 2}, {"dim": 8, "hidden": [], "biases": True},
                  {"baseline_solver": "als", "baseline_rounds": rounds, "baseline_row_steps": row_steps,
                   "validation_fraction": 0.25})


def test_an_overfitting_run_is_told_the_larger_penalty_validation_prefers(tmp_path):
    # Regression: an ALS run that overfitted from its first rounds (validation RMSE rising while the
    # objective fell; early stopping kept an early round) was told to train longer or raise model.dim.
    cfg = _noisy_rank_two(tmp_path, 0.3, rounds=15, row_steps=0)
    data, model, preset = prepared_baseline(cfg)
    result = fit_als(model, data, preset, None, "linear_factor")
    cert = certify(model, data, preset, result.history)
    course = cert["validation"]
    assert course["overfit"] and course["last_value"] > course["best_value"]
    assert course["last_objective"] < course["best_objective"]
    assert not cert["passed"] and cert["advice"]["kind"] == "larger_penalty"
    named = cert["penalty_search"]["best_id_l2"]
    assert named > 0.3
    line = describe(cert)
    assert f"raise training.id_l2 from 0.3 to {named:g}" in line and "train longer" not in line
    json.dumps(cert)  # certificate.json holds the same facts
    # Refit by hand with the named penalty and more rounds: its validation RMSE, computed in numpy from
    # the learned tables (a brute-force reference), beats the overfitted run's kept model.
    kept = _valid_rmse(model, data)
    assert kept == pytest.approx(course["best_value"], rel=1e-4)  # reference: the numpy RMSE above
    refit_cfg = _noisy_rank_two(tmp_path, named, rounds=30, row_steps=0)
    data2, model2, preset2 = prepared_baseline(refit_cfg)
    fit_als(model2, data2, preset2, None, "linear_factor")
    assert _valid_rmse(model2, data2) < kept - 0.1  # reference: the numpy RMSE above


def test_a_run_stopped_before_converging_is_told_to_train_longer(tmp_path):
    cfg = _noisy_rank_two(tmp_path, 1.0, rounds=2, row_steps=1)  # two rounds of one CG step per row
    data, model, preset = prepared_baseline(cfg)
    result = fit_als(model, data, preset, None, "linear_factor")
    cert = certify(model, data, preset, result.history)
    assert cert["validation"]["still_improving"] and not cert["validation"]["overfit"]
    assert cert["penalty_search"] is None  # no refits when validation did not rise
    assert not cert["passed"] and cert["advice"]["kind"] == "train_longer"
    assert "not converged" in describe(cert) and "raise evaluation.baseline_rounds" in describe(cert)


@pytest.mark.parametrize("values,losses,best,overfit,improving", [
    ([1.0, 0.9, 0.95], [3, 2, 1], 2, True, False),  # rose while the objective fell
    ([1.0, 0.9, 0.95, 0.9001], [4, 3, 2, 1], 2, True, False),  # rose, then came back: a rise all the same
    ([1.0, 1.05, 0.9, 0.9004], [4, 3, 2, 1], 3, False, False),  # a rise before the best round is no overfit
    ([1.0, 0.9, 0.95], [3, 2, 2], 2, False, False),  # rose, but the objective did not fall
    ([1.0, 0.9, 0.9005], [3, 2, 1], 2, False, False),  # a rise within FLAT (0.1%) of the best is flat
    ([1.0, 0.9, 0.8], [3, 2, 1], 3, False, True),  # still improving at the last round
])
def test_validation_course_reads_the_history(values, losses, best, overfit, improving):
    history = [{"epoch": i + 1, "loss": loss, "pairs_per_s": 1.0, "valid_rmse": v}
               for i, (v, loss) in enumerate(zip(values, losses))]
    course = validation_course(history, "rmse")
    # worked by hand from the rows above: rmse is lower-is-better
    assert (course["best_round"], course["overfit"], course["still_improving"]) == (best, overfit, improving)
    assert validation_course([{"epoch": 1, "loss": 1.0, "pairs_per_s": 1.0}], "rmse") is None
    recall = [dict(r, **{"valid_recall@20": 1 - r["valid_rmse"]}) for r in history]  # higher is better
    assert validation_course(recall, "recall@20")["best_round"] == best
