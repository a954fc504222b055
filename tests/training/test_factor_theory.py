"""Known closed-form optima of matrix factorisation, reached through the real towers training path.

Each test writes a small, fully observed matrix as an interaction CSV (row id, column id, value),
resolves a YAML config with towers.config, prepares it with towers.data.prepare, builds the
linear factor model with towers.model.build.baseline_model and trains it with towers.training.loop (full batch,
so every epoch is one exact gradient step on the objective). The learned id tables are then
compared with the answer that linear algebra gives for the same matrix.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import torch
import torch.nn.functional as F
import yaml

from towers import config as C
from towers.data.prepare import prepare
from towers.model.build import baseline_model
from towers.model.losses import logistic_loss
from towers.runs.train import apply_threads
from towers.training.loop import Trainer, fit

N_ROWS, N_COLS = 30, 20
N_PAIRS = N_ROWS * N_COLS
# Prescribed singular values: three strong directions, then a slowly decaying tail.
SPECTRUM = np.array([10.0, 8.0, 6.0, 1.0, 0.9, 0.8, 0.7, 0.6, 0.55, 0.5,
                     0.45, 0.4, 0.35, 0.3, 0.25, 0.2, 0.15, 0.1, 0.05, 0.02])
# Full-batch SGD on the per-pair mean J is gradient descent on N * J with step LR_SUM:
# the gradient of the mean is the gradient of the summed objective divided by N.
LR_SUM = 0.03


def _matrix(seed: int = 7) -> np.ndarray:
    """Y = P diag(SPECTRUM) Q^T with random orthonormal P (30 x 20) and Q (20 x 20)."""
    rng = np.random.default_rng(seed)
    p, _ = np.linalg.qr(rng.standard_normal((N_ROWS, N_COLS)))
    q, _ = np.linalg.qr(rng.standard_normal((N_COLS, N_COLS)))
    return (p * SPECTRUM) @ q.T


# Ids are strings whose sorted order differs from the matrix order, and the CSV rows are shuffled,
# so a wrong mapping from id-table rows back to matrix rows cannot pass by accident.
ROW_IDS = [f"r{(7 * i) % N_ROWS:02d}x{i}" for i in range(N_ROWS)]
COL_IDS = [f"c{(11 * j) % N_COLS:02d}y{j}" for j in range(N_COLS)]


def _write_run(tmp_path, y: np.ndarray, training: dict, model: dict, seed: int = 0) -> dict:
    """Write the matrix as a CSV log and a YAML config next to it; return the resolved config."""
    rows = [(ROW_IDS[i], COL_IDS[j], float(y[i, j])) for i in range(y.shape[0]) for j in range(y.shape[1])]
    order = np.random.default_rng(seed + 100).permutation(len(rows))
    df = pd.DataFrame([rows[k] for k in order], columns=["row_id", "col_id", "value"])
    df.to_csv(tmp_path / "matrix.csv", index=False, float_format="%.17g")
    raw = {
        # one thread: tiny sparse updates are far slower with several (OpenMP overhead), and it
        # keeps the float reductions in a fixed order
        "run": {"seed": seed, "threads": 1},
        "interactions": {"path": "matrix.csv", "query_column": "row_id", "candidate_column": "col_id",
                         "target_column": "value"},
        "model": model,
        "training": dict({"batch_size": len(rows), "weight_decay": 0.0, "progress": "plain",
                          "patience": 1}, **training),
        "evaluation": {"test_fraction": 0.0, "validation_fraction": 0.0, "baseline": True},
    }
    (tmp_path / "config.yaml").write_text(yaml.safe_dump(raw, sort_keys=False), encoding="utf-8")
    resolved = C.resolve(yaml.safe_load((tmp_path / "config.yaml").read_text(encoding="utf-8")), tmp_path)
    assert resolved == C.load(tmp_path / "config.yaml")
    return resolved


def _prepared_baseline(cfg: C.Config):
    apply_threads(cfg)
    torch.manual_seed(cfg.run.seed)
    data = prepare(cfg)
    assert len(data.train) == N_PAIRS and len(data.valid) == 0 and len(data.test) == 0
    model, preset = baseline_model(data, cfg)
    assert not model.use_biases and model.query_tower.direct and model.candidate_tower.direct
    return data, model, preset


def _factors(model, data) -> tuple[np.ndarray, np.ndarray]:
    """Learned U (rows in matrix order) and V (columns in matrix order) from the id tables.

    Row r + 1 of an id table belongs to id encoder.ids[r]; row 0 is the unknown id.
    """
    def side(table, encoder, names):
        weights = table.weight.detach()[1:].double().numpy()
        where = {name: r for r, name in enumerate(encoder.ids.tolist())}
        assert sorted(where) == sorted(names)
        return weights[[where[name] for name in names]]

    u = side(model.query_tower.ids, data.queries.encoders.id_encoder, ROW_IDS)
    v = side(model.candidate_tower.ids, data.candidates.encoders.id_encoder, COL_IDS)
    return u, v


def _check_mapping(model, data, y: np.ndarray, u: np.ndarray, v: np.ndarray) -> None:
    """The matrix-ordered factors predict exactly what the model scores for each training pair."""
    with torch.no_grad():
        q = model.query_tower.ids(data.queries.block["id"][data.train.query])
        c = model.candidate_tower.ids(data.candidates.block["id"][data.train.candidate])
        scores = (q * c).sum(1).double().numpy()
    qi = [ROW_IDS.index(n) for n in data.queries.ids[data.train.query.numpy()]]
    cj = [COL_IDS.index(n) for n in data.candidates.ids[data.train.candidate.numpy()]]
    np.testing.assert_allclose(scores, (u @ v.T)[qi, cj], rtol=1e-5, atol=1e-5)
    np.testing.assert_allclose(data.train.target.double().numpy(), y[qi, cj], rtol=1e-6, atol=1e-6)


def test_unregularised_rank3_factors_reach_truncated_svd_residual(tmp_path):
    y = _matrix()
    k = 3
    cfg = _write_run(tmp_path, y, {"loss": "squared", "id_l2": 0.0, "epochs": 800, "id_optimizer": "sgd",
                                   "id_learning_rate": LR_SUM * N_PAIRS},
                     {"dim": k, "hidden": [], "biases": False})
    data, model, preset = _prepared_baseline(cfg)
    result = fit(model, data, preset, None, "linear_factor")
    assert len(result.history) == cfg.training.epochs

    u, v = _factors(model, data)
    _check_mapping(model, data, y, u, v)
    learned = np.linalg.norm(y - u @ v.T)
    sv = np.linalg.svd(y, compute_uv=False)
    best = np.sqrt(np.sum(sv[k:] ** 2))
    # Eckart & Young (1936), Mirsky (1960): the truncated SVD is the best rank-k approximation
    # in Frobenius norm, so the rank-3 product can at best match its residual ||Y - Y_3||_F.
    assert learned >= best * (1 - 1e-5)
    assert (learned - best) / best < 0.01  # Eckart & Young (1936); Mirsky (1960)
    # Far from the optimum a rank-3 product misses the strong directions: the start is much worse.
    assert np.linalg.norm(y) > 5 * best


def _soft_threshold(y: np.ndarray, lam: float) -> np.ndarray:
    p, s, qt = np.linalg.svd(y, full_matrices=False)
    return (p * np.maximum(s - lam, 0.0)) @ qt


@pytest.mark.slow
def test_l2_penalised_factors_soft_threshold_singular_values(tmp_path):
    y = _matrix()
    lam, k = 2.0, 6
    sv = np.linalg.svd(y, compute_uv=False)
    assert np.sum(sv > lam) == 3 and k >= 3
    cfg = _write_run(tmp_path, y, {"loss": "squared", "id_l2": lam, "epochs": 1, "id_optimizer": "sgd",
                                   "id_learning_rate": LR_SUM * N_PAIRS},
                     {"dim": k, "hidden": [], "biases": False})
    data, model, preset = _prepared_baseline(cfg)
    trainer = Trainer(model, data, preset, "linear_factor")
    for epoch in range(1, 1501):
        trainer.run_epoch(epoch, bar=False)

    u, v = _factors(model, data)
    _check_mapping(model, data, y, u, v)
    w = u @ v.T
    got = np.linalg.svd(w, compute_uv=False)
    want = np.maximum(sv - lam, 0.0)[: len(got)]
    # Srebro, Rennie & Jaakkola (2005): min over U V^T = W of (||U||^2 + ||V||^2)/2 is the trace norm
    # ||W||_*; Mazumder, Hastie & Tibshirani (2010): the minimiser of 1/2||Y - W||^2 + lam ||W||_* is
    # the SVD of Y with singular values soft-thresholded, max(sigma_i - lam, 0).
    np.testing.assert_allclose(got, want, rtol=0, atol=1e-3 * sv[0])  # Mazumder, Hastie & Tibshirani (2010)
    np.testing.assert_allclose(w, _soft_threshold(y, lam), rtol=0, atol=1e-3 * sv[0])  # same source

    s_y = _soft_threshold(y, lam)
    optimum = 0.5 * np.linalg.norm(y - s_y) ** 2 + lam * np.linalg.svd(s_y, compute_uv=False).sum()
    summed = 0.5 * np.linalg.norm(y - w) ** 2 + 0.5 * lam * (np.sum(u ** 2) + np.sum(v ** 2))
    towers_summed = trainer.objective() * N_PAIRS
    # towers' per-pair mean J times N is the summed objective (the penalty of each id row is spread
    # over its pairs), so its own objective and ours agree.
    assert towers_summed == pytest.approx(summed, rel=1e-4)
    # Srebro, Rennie & Jaakkola (2005): the factored problem's minimum (k >= rank of the optimum) equals
    # the convex trace-norm problem's minimum, which Mazumder, Hastie & Tibshirani (2010) solve in closed form.
    assert summed >= optimum * (1 - 1e-5)
    assert (towers_summed - optimum) / optimum < 0.005  # Srebro et al. (2005); Mazumder et al. (2010)
    assert (summed - optimum) / optimum < 0.005  # Srebro et al. (2005); Mazumder et al. (2010)


def test_logistic_loss_is_torch_bce_on_a_training_batch(tmp_path):
    y = (_matrix() > 0).astype(float)
    n_neg = 2
    cfg = _write_run(tmp_path, y, {"loss": "logistic", "id_l2": 0.0, "epochs": 30, "negatives": n_neg,
                                   "id_optimizer": "adam", "id_learning_rate": 0.05, "batch_size": 64},
                     {"dim": 4, "hidden": [], "biases": True}, seed=3)
    apply_threads(cfg)
    torch.manual_seed(cfg.run.seed)
    data = prepare(cfg)
    model, preset = baseline_model(data, cfg)
    trainer = Trainer(model, data, preset, "linear_factor")
    for epoch in range(1, 31):
        trainer.run_epoch(epoch, bar=False)

    # One real minibatch, drawn the way run_epoch draws it.
    idx = torch.randperm(len(data.train), generator=trainer.generator)[:64]
    state = trainer.generator.get_state()
    got_mean = trainer.batch_loss(idx)
    trainer.generator.set_state(state)
    negatives = trainer.sampler(len(idx) * n_neg)

    with torch.no_grad():
        q_ids = data.queries.block["id"][data.train.query[idx]]
        c_ids = data.candidates.block["id"][data.train.candidate[idx]]
        n_ids = data.candidates.block["id"][negatives].view(len(idx), n_neg)
        qe = model.query_tower.ids(q_ids)
        g = model.global_bias
        qb = model.query_bias(q_ids).squeeze(1)
        pos = (qe * model.candidate_tower.ids(c_ids)).sum(1) + qb + model.candidate_bias(c_ids).squeeze(1) + g
        neg = (qe.unsqueeze(1) * model.candidate_tower.ids(n_ids)).sum(2) + qb.unsqueeze(1) \
            + model.candidate_bias(n_ids).squeeze(2) + g
        target = data.train.target[idx]
        assert pos.abs().max() > 1.0  # trained scores, not the near-zero start
        assert 0 < float(target.sum()) < len(idx)  # both labels present
        ref_pos = F.binary_cross_entropy_with_logits(pos, target, reduction="none")
        ref_neg = F.binary_cross_entropy_with_logits(neg, torch.zeros_like(neg), reduction="none")
        # PyTorch documentation, torch.nn.functional.binary_cross_entropy_with_logits:
        # -[t log sigmoid(x) + (1 - t) log(1 - sigmoid(x))].
        torch.testing.assert_close(logistic_loss(pos, target), ref_pos, rtol=1e-6, atol=1e-6)  # torch docs
        torch.testing.assert_close(logistic_loss(neg, torch.zeros_like(neg)), ref_neg, rtol=1e-6, atol=1e-6)  # torch docs
        want_mean = (ref_pos + ref_neg.sum(1)).mean()
    # The training objective of this batch (id_l2 = 0) is the BCE of the positive plus its negatives.
    torch.testing.assert_close(got_mean.detach(), want_mean, rtol=1e-5, atol=1e-6)  # torch docs
