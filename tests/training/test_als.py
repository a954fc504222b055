"""Alternating least squares for the linear factor model, checked against outside references.

Row solves are compared with scikit-learn's Ridge and with dense numpy solves of the normal equations
of Hu, Koren & Volinsky (ICDM 2008); whole runs go through the real config -> prepare -> baseline
path and are compared with the gradient trainer on the same objective.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import torch
import yaml
from sklearn.linear_model import Ridge

from towers import config as C
from towers.errors import TowersError
from towers.training.als import (
    Cells,
    Factors,
    als_sweep,
    cells_of,
    fit_als,
    half_step,
    objective,
)
from towers.training.loop import Trainer, fit

from ..helpers import prepared_baseline

F64 = torch.float64


pytestmark = pytest.mark.usefixtures("one_thread")  # tiny problems: threads only add overhead


def _random_pairs(seed: int, n_q: int = 30, n_c: int = 25, n: int = 500, weights: bool = True):
    """Pairs over id rows 1.. (row 0 is the unknown id), with repeats, ratings and weights."""
    g = torch.Generator().manual_seed(seed)
    q = torch.randint(1, n_q, (n,), generator=g)
    c = torch.randint(1, n_c, (n,), generator=g)
    y = torch.randn(n, generator=g, dtype=F64) + 3.0
    w = torch.rand(n, generator=g, dtype=F64) + 0.2 if weights else None
    return q, c, y, w, n_q, n_c


def _random_factors(n_q: int, n_c: int, k: int, seed: int, biases: bool = True) -> Factors:
    g = torch.Generator().manual_seed(seed)
    u = torch.randn(n_q, k, generator=g, dtype=F64) * 0.3
    v = torch.randn(n_c, k, generator=g, dtype=F64) * 0.3
    if not biases:
        return Factors(u, v)
    return Factors(u, v, torch.randn(n_q, generator=g, dtype=F64) * 0.2, torch.randn(n_c, generator=g, dtype=F64) * 0.2, 0.7)


@pytest.mark.parametrize("biases", [True, False])
def test_half_step_equals_sklearn_ridge_row_by_row(biases):
    q, c, y, w, n_q, n_c = _random_pairs(1)
    cells = Cells.build(q, c, y, w, n_q, n_c, dtype=F64)
    f = _random_factors(n_q, n_c, 4, seed=2, biases=biases)
    lam = 0.7
    v, bc, g = f.candidate.clone(), None if not biases else f.candidate_bias.clone(), f.global_bias
    half_step(f, cells, lam, "query", cg_steps=0)
    for row in (1, 5, 17, 29):
        mine = (q == row).nonzero().flatten()  # the raw pairs of this row, repeats not merged
        x = v[c[mine]].numpy()
        target = y[mine].numpy()
        if biases:
            x = np.hstack([x, np.ones((len(mine), 1))])
            target = target - bc[c[mine]].numpy() - g
        # Our row objective sum 1/2 w (x.f - t)^2 + lam/2 ||x||^2, times 2, is Ridge's
        # sum w (t - f.x)^2 + alpha ||x||^2 with alpha = lam: reference scikit-learn's Ridge.
        ref = Ridge(alpha=lam, fit_intercept=False, solver="cholesky").fit(x, target, sample_weight=w[mine].numpy())
        got = f.query[row].numpy() if not biases else np.append(f.query[row].numpy(), f.query_bias[row].item())
        np.testing.assert_allclose(got, ref.coef_, rtol=1e-9, atol=1e-10)  # reference: sklearn Ridge


def test_candidate_half_step_equals_sklearn_ridge():
    q, c, y, w, n_q, n_c = _random_pairs(3)
    cells = Cells.build(q, c, y, w, n_q, n_c, dtype=F64)
    f = _random_factors(n_q, n_c, 3, seed=4)
    lam = 1.3
    u, bq, g = f.query.clone(), f.query_bias.clone(), f.global_bias
    half_step(f, cells, lam, "candidate", cg_steps=0)
    for row in (2, 11, 24):
        mine = (c == row).nonzero().flatten()
        x = np.hstack([u[q[mine]].numpy(), np.ones((len(mine), 1))])
        target = y[mine].numpy() - bq[q[mine]].numpy() - g
        ref = Ridge(alpha=lam, fit_intercept=False, solver="cholesky").fit(x, target, sample_weight=w[mine].numpy())
        got = np.append(f.candidate[row].numpy(), f.candidate_bias[row].item())
        np.testing.assert_allclose(got, ref.coef_, rtol=1e-9, atol=1e-10)  # reference: sklearn Ridge


@pytest.mark.parametrize("implicit", [False, True])
def test_conjugate_gradient_agrees_with_cholesky(implicit):
    q, c, y, w, n_q, n_c = _random_pairs(5)
    cells = Cells.build(q, c, None if implicit else y, w, n_q, n_c, implicit=implicit, alpha=3.0, dtype=F64)
    k = 5
    exact, approx, few = (_random_factors(n_q, n_c, k, seed=6) for _ in range(3))
    half_step(exact, cells, 0.4, "query", cg_steps=0)
    # CG on a d x d positive definite system is exact after d steps in exact arithmetic
    # (Hestenes & Stiefel 1952); 3 d steps leave only rounding error.
    half_step(approx, cells, 0.4, "query", cg_steps=3 * (k + 1))
    torch.testing.assert_close(approx.query, exact.query, rtol=1e-8, atol=1e-8)  # Hestenes & Stiefel (1952)
    torch.testing.assert_close(approx.query_bias, exact.query_bias, rtol=1e-8, atol=1e-8)
    half_step(few, cells, 0.4, "query", cg_steps=2)
    assert not torch.allclose(few.query, exact.query, atol=1e-6)  # two steps alone are not the exact solve


def _dense_hkv(q, c, w, n_q, n_c, alpha):
    """Dense R, C = 1 + alpha R, P = 1[R > 0] over all cells (row 0, the unknown id, has no pairs)."""
    r = np.zeros((n_q, n_c))
    np.add.at(r, (q.numpy(), c.numpy()), w.numpy())
    return 1.0 + alpha * r, (r > 0).astype(float)


@pytest.mark.parametrize("biases", [False, True])
def test_weighted_als_half_step_equals_dense_hkv_normal_equations(biases):
    q, c, _, w, n_q, n_c = _random_pairs(7, n=300)
    alpha, lam = 2.5, 0.8
    cells = Cells.build(q, c, None, w, n_q, n_c, implicit=True, alpha=alpha, dtype=F64)
    f = _random_factors(n_q, n_c, 4, seed=8, biases=biases)
    conf, pref = _dense_hkv(q, c, w, n_q, n_c, alpha)
    active = cells.candidate_active.numpy()
    y_mat = f.candidate.numpy()[active]
    offset = np.zeros(active.sum())
    if biases:
        y_mat = np.hstack([y_mat, np.ones((len(y_mat), 1))])
        offset = f.candidate_bias.numpy()[active] + f.global_bias
    half_step(f, cells, lam, "query", cg_steps=0)
    for row in (1, 9, 20):
        cu = conf[row, active]
        # Hu, Koren & Volinsky (2008), eq. (4): x_u = (Y^T C^u Y + lambda I)^-1 Y^T C^u p(u), here with the
        # target p(u) shifted by the item biases and g when biases are on (the same least-squares problem).
        lhs = y_mat.T @ (cu[:, None] * y_mat) + lam * np.eye(y_mat.shape[1])
        want = np.linalg.solve(lhs, y_mat.T @ (cu * (pref[row, active] - offset)))
        got = f.query[row].numpy() if not biases else np.append(f.query[row].numpy(), f.query_bias[row].item())
        np.testing.assert_allclose(got, want, rtol=1e-9, atol=1e-10)  # Hu, Koren & Volinsky (2008)


def test_weighted_als_objective_equals_dense_sum_over_all_cells():
    q, c, _, w, n_q, n_c = _random_pairs(9, n=300)
    alpha, lam = 4.0, 0.3
    cells = Cells.build(q, c, None, w, n_q, n_c, implicit=True, alpha=alpha, dtype=F64)
    f = _random_factors(n_q, n_c, 3, seed=10)
    conf, pref = _dense_hkv(q, c, w, n_q, n_c, alpha)
    s = f.query.numpy() @ f.candidate.numpy().T + f.query_bias.numpy()[:, None] + f.candidate_bias.numpy()[None] + f.global_bias
    qa, ca = cells.query_active.numpy(), cells.candidate_active.numpy()
    dense = 0.5 * (conf * (pref - s) ** 2)[np.ix_(qa, ca)].sum() + 0.5 * lam * (
        (f.query.numpy()[qa] ** 2).sum() + (f.candidate.numpy()[ca] ** 2).sum()
        + (f.query_bias.numpy()[qa] ** 2).sum() + (f.candidate_bias.numpy()[ca] ** 2).sum())
    # Hu, Koren & Volinsky (2008), eq. (3): the cost over all user-item cells, brute force in numpy.
    assert objective(f, cells, lam) == pytest.approx(dense, rel=1e-12)  # Hu, Koren & Volinsky (2008)


@pytest.mark.parametrize("implicit,cg_steps,non_negative", [
    (False, 0, False), (False, 2, False), (True, 0, False), (True, 2, False), (False, 0, True)])
def test_objective_never_increases_across_sweeps(implicit, cg_steps, non_negative):
    q, c, y, w, n_q, n_c = _random_pairs(11)
    cells = Cells.build(q, c, None if implicit else y, w, n_q, n_c, implicit=implicit, alpha=2.0, dtype=F64)
    f = _random_factors(n_q, n_c, 6, seed=12)
    if non_negative:
        f.query.abs_()
        f.candidate.abs_()
    values = [objective(f, cells, 0.5)]
    for _ in range(25):
        als_sweep(f, cells, 0.5, cg_steps, non_negative)
        values.append(objective(f, cells, 0.5))
    steps = np.diff(values)
    # Block coordinate descent with exact (or CG, which lowers the quadratic every step) block
    # minimisation cannot increase the objective: common practice (no source) for ALS.
    assert np.all(steps <= 1e-9 * values[0])
    assert values[-1] < 0.8 * values[0]
    if non_negative:
        assert float(f.query.min()) >= 0 and float(f.candidate.min()) >= 0


def test_objective_is_the_gradient_trainers_objective(tmp_path):
    """N J from the ALS code equals Trainer.objective() * N on the same model (weights, repeats, biases)."""
    df = _matrix_frame(_gapped_matrix(), repeat=True)
    cfg = _write_config(tmp_path, df, {"loss": "squared", "id_l2": 0.6}, {"dim": 4, "hidden": [], "biases": True},
                        weights=True)
    data, model, preset = prepared_baseline(cfg)
    trainer = Trainer(model, data, preset, "linear_factor")
    f = Factors.of_model(model, F64)
    assert objective(f, cells_of(data, dtype=F64), 0.6) == pytest.approx(trainer.objective() * len(data.train), rel=1e-5)


def _matrix_frame(y: np.ndarray, repeat: bool = False, seed: int = 0) -> pd.DataFrame:
    rows = [(f"r{i}", f"c{j}", float(y[i, j])) for i in range(y.shape[0]) for j in range(y.shape[1])]
    if repeat:  # a second, shifted rating for some pairs: repeated rows of one pair
        rows += [(f"r{i}", f"c{j}", float(y[i, j]) + 0.5) for i in range(0, y.shape[0], 3) for j in range(0, y.shape[1], 4)]
    order = np.random.default_rng(seed).permutation(len(rows))
    return pd.DataFrame([rows[k] for k in order], columns=["row_id", "col_id", "value"])


def _write_config(tmp_path, df: pd.DataFrame, training: dict, model: dict, evaluation: dict | None = None,
                  weights: bool = False) -> dict:
    interactions = {"path": "matrix.csv", "query_column": "row_id", "candidate_column": "col_id", "target_column": "value"}
    if weights:
        df = df.assign(w=np.random.default_rng(1).uniform(0.2, 2.0, len(df)))
        interactions["weight_column"] = "w"
    df.to_csv(tmp_path / "matrix.csv", index=False, float_format="%.17g")
    raw = {"run": {"seed": 0, "threads": 1}, "interactions": interactions, "model": model,
           "training": dict({"batch_size": len(df), "weight_decay": 0.0, "progress": "plain", "patience": 1}, **training),
           "evaluation": dict({"test_fraction": 0.0, "validation_fraction": 0.0}, **(evaluation or {})),
           "report": {"enabled": False}}
    (tmp_path / "config.yaml").write_text(yaml.safe_dump(raw, sort_keys=False), encoding="utf-8")
    return C.load(tmp_path / "config.yaml")


def _gapped_matrix() -> np.ndarray:
    """16 x 12, singular values 8, 6, 5 then a tail below 1, plus an offset of 2 for the biases to take."""
    rng = np.random.default_rng(7)
    p, _ = np.linalg.qr(rng.standard_normal((16, 12)))
    q, _ = np.linalg.qr(rng.standard_normal((12, 12)))
    return (p * np.array([8, 6, 5, .8, .6, .4, .3, .2, .1, .05, .02, .01])) @ q.T + 2.0


def _summed(model, data, lam: float) -> float:
    """N J of a trained model (a fresh Trainer would reset the global bias to the mean rating)."""
    return objective(Factors.of_model(model, F64), cells_of(data, dtype=F64), lam)


def test_als_and_gradient_training_reach_the_same_objective(tmp_path):
    y = _gapped_matrix()
    lam, k, n = 2.0, 5, y.size
    df = _matrix_frame(y)
    # full batch: every epoch is one gradient step on N J with step 0.04 for the id tables
    grad_cfg = _write_config(tmp_path, df, {"loss": "squared", "id_l2": lam, "epochs": 400, "id_optimizer": "sgd",
                                            "id_learning_rate": 0.04 * n, "learning_rate": 0.05},
                             {"dim": k, "hidden": [], "biases": True})
    data, grad_model, preset = prepared_baseline(grad_cfg)
    fit(grad_model, data, preset, None, "linear_factor")
    gradient_objective = _summed(grad_model, data, lam)

    als_cfg = _write_config(tmp_path, df, {"loss": "squared", "id_l2": lam},
                            {"dim": k, "hidden": [], "biases": True},
                            {"baseline_solver": "als", "baseline_rounds": 100, "baseline_row_steps": 0})
    data, als_model, preset = prepared_baseline(als_cfg)
    result = fit_als(als_model, data, preset, None, "linear_factor")
    assert len(result.history) == 100 and all(set(r) == {"epoch", "loss", "pairs_per_s"} for r in result.history)
    als_objective = _summed(als_model, data, lam)
    assert result.history[-1]["loss"] == pytest.approx(als_objective / n, rel=1e-6)
    # Both minimise the same objective, whose factored form has no spurious local minimum once k >=
    # the rank of the optimum (Srebro, Rennie & Jaakkola 2005: it equals the trace-norm problem), so
    # gradient descent and ALS run to convergence reach the same value.
    assert als_objective == pytest.approx(gradient_objective, rel=1e-6)  # Srebro et al. (2005)
    # ALS wrote its result into the model's own tables, biases included
    assert float(als_model.global_bias.detach()) != 0.0 and float(als_model.query_bias.weight.detach().abs().sum()) > 0
    # and after one sweep it is not there yet: the comparison above is not trivially true
    assert result.history[0]["loss"] > als_objective / n * (1 + 1e-4)


def test_conjugate_gradient_sweeps_reach_the_cholesky_optimum(tmp_path):
    df = _matrix_frame(_gapped_matrix())
    values = []
    for steps in (0, 3):
        cfg = _write_config(tmp_path, df, {"loss": "squared", "id_l2": 2.0}, {"dim": 5, "hidden": [], "biases": True},
                            {"baseline_solver": "als", "baseline_rounds": 100, "baseline_row_steps": steps})
        data, model, preset = prepared_baseline(cfg)
        fit_als(model, data, preset, None, "linear_factor")
        values.append(_summed(model, data, 2.0))
    # common practice (no source): warm-started CG sweeps (Takacs, Pilaszy & Tikk 2011) converge to the same optimum
    assert values[1] == pytest.approx(values[0], rel=1e-6)


def test_weighted_als_fits_through_the_run_path(tmp_path):
    rng = np.random.default_rng(3)
    rows = [(f"u{rng.integers(40)}", f"i{rng.integers(30)}", 1.0) for _ in range(400)]
    df = pd.DataFrame(rows, columns=["row_id", "col_id", "value"])
    df.to_csv(tmp_path / "events.csv", index=False)
    raw = {"run": {"seed": 0, "threads": 1},
           "interactions": {"path": "events.csv", "query_column": "row_id", "candidate_column": "col_id"},
           "model": {"dim": 4, "hidden": []}, "training": {"loss": "logistic", "id_l2": 1.0, "progress": "plain"},
           "evaluation": {"baseline_solver": "weighted_als", "baseline_rounds": 6, "baseline_row_steps": 2,
                          "baseline_event_weight": 5.0, "validation_fraction": 0.2, "test_fraction": 0.0,
                          "top_k": [5]},
           "report": {"enabled": False}}
    (tmp_path / "c.yaml").write_text(yaml.safe_dump(raw), encoding="utf-8")
    cfg = C.load(tmp_path / "c.yaml")
    data, model, preset = prepared_baseline(cfg)
    result = fit_als(model, data, preset, None, "linear_factor")
    losses = [r["loss"] for r in result.history]
    assert all("valid_recall@5" in r for r in result.history)
    assert all(b <= a * (1 + 1e-6) for a, b in zip(losses, losses[1:]))  # monotone, as above (no source)
    # the count r of a user-item cell is the number of its events (no target or weight column)
    cells = cells_of(data, implicit=True, alpha=5.0)
    pairs = df.groupby(["row_id", "col_id"]).size()
    assert len(cells.rows) == len(set(zip(data.train.query.tolist(), data.train.candidate.tolist())))
    assert float(cells.weight.max()) <= 5.0 * pairs.max()


@pytest.mark.parametrize("evaluation,training,message", [
    ({"baseline_solver": "als"}, {"loss": "logistic"}, "expected gradient or weighted_als"),
    ({"baseline_solver": "weighted_als"}, {"loss": "squared"}, "expected gradient or als"),
    ({"baseline_solver": "als"}, {"loss": "squared", "id_l2": 0.0}, "need lambda > 0"),
    ({"baseline_non_negative": True}, {"loss": "squared"}, "baseline_non_negative"),
    ({"baseline_non_negative": True, "baseline_solver": "weighted_als"}, {"loss": "logistic"}, "baseline_non_negative"),
    ({"baseline_row_steps": -1}, {}, "baseline_row_steps"),
    ({"baseline_solver": "lbfgs"}, {}, "one of gradient, als, weighted_als"),
])
def test_solver_config_errors_are_one_clear_line(tmp_path, evaluation, training, message):
    raw = {"interactions": {"path": "x.csv", "query_column": "u", "candidate_column": "i", "target_column": "r"},
           "training": training, "evaluation": evaluation}
    with pytest.raises(TowersError, match=message) as err:
        C.resolve(raw, tmp_path)
    assert "\n" not in str(err.value)


def test_shared_tower_refuses_als(tmp_path):
    raw = {"run": {"mode": "item_item"}, "interactions": {"path": "x.csv", "query_column": "a", "candidate_column": "b"},
           "model": {"shared_tower": True}, "evaluation": {"baseline_solver": "weighted_als"}}
    with pytest.raises(TowersError, match="shared_tower: false"):
        C.resolve(raw, tmp_path)
