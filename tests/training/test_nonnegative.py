"""Non-negative factors for the linear factor model (HALS), against scipy's NNLS and scikit-learn's NMF."""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
import scipy.optimize
import torch
import yaml
from sklearn.datasets import load_digits
from sklearn.decomposition import NMF

from towers import config as C
from towers.data.prepare import prepare
from towers.model.build import baseline_model
from towers.runs.train import apply_threads
from towers.training.als import Cells, Factors, als_sweep, fit_als, half_step
from towers.training.certificate import certify

F64 = torch.float64


pytestmark = pytest.mark.usefixtures("one_thread")  # tiny problems: threads only add overhead


def test_repeated_non_negative_half_steps_reach_scipy_nnls():
    g = torch.Generator().manual_seed(0)
    n_q, n_c, n, k, lam = 20, 15, 220, 4, 0.3
    q, c = torch.randint(1, n_q, (n,), generator=g), torch.randint(1, n_c, (n,), generator=g)
    y = torch.randn(n, generator=g, dtype=F64) + 0.5
    w = torch.rand(n, generator=g, dtype=F64) + 0.3
    cells = Cells.build(q, c, y, w, n_q, n_c, dtype=F64)
    f = Factors(torch.rand(n_q, k, generator=g, dtype=F64), torch.randn(n_c, k, generator=g, dtype=F64))
    v = f.candidate.clone()
    for _ in range(60):  # coordinate descent on one strictly convex quadratic converges to its minimiser
        half_step(f, cells, lam, "query", non_negative=True)
    assert float(f.query.min()) >= 0.0
    bound = 0
    for row in range(1, n_q):
        mine = (q == row).nonzero().flatten()
        if len(mine) == 0:
            continue
        root = w[mine].sqrt().numpy()[:, None]
        # min sum w (v.x - y)^2 + lam ||x||^2 over x >= 0 is NNLS on [sqrt(w) V; sqrt(lam) I], [sqrt(w) y; 0]
        a = np.vstack([root * v[c[mine]].numpy(), np.sqrt(lam) * np.eye(k)])
        b = np.concatenate([root[:, 0] * y[mine].numpy(), np.zeros(k)])
        want, _ = scipy.optimize.nnls(a, b)
        np.testing.assert_allclose(f.query[row].numpy(), want, rtol=1e-6, atol=1e-8)  # reference: scipy.optimize.nnls
        bound += int((want == 0).sum())
    assert bound > 0  # some constraints are active, so this is not plain ridge regression


@pytest.mark.slow
def test_digits_nmf_within_five_percent_of_sklearn(tmp_path):
    # scikit-learn's bundled copy of the UCI optical-recognition digits: 1797 images x 64 pixels (0..16)
    x = load_digits().data
    n, m = x.shape
    rows, cols = np.meshgrid(np.arange(n), np.arange(m), indexing="ij")
    pd.DataFrame({"image": rows.ravel(), "pixel": cols.ravel(), "ink": x.ravel()}).to_csv(tmp_path / "digits.csv", index=False)
    raw = {"run": {"seed": 0, "threads": 1},
           "interactions": {"path": "digits.csv", "query_column": "image", "candidate_column": "pixel", "target_column": "ink"},
           "model": {"dim": 16, "hidden": [], "biases": False},
           "training": {"loss": "squared", "id_l2": 1e-3, "progress": "plain"},
           "evaluation": {"test_fraction": 0.0, "validation_fraction": 0.0, "baseline_solver": "als",
                          "baseline_non_negative": True, "baseline_rounds": 60},
           "report": {"enabled": False}}
    (tmp_path / "digits.yaml").write_text(yaml.safe_dump(raw), encoding="utf-8")
    cfg = C.load(tmp_path / "digits.yaml")
    apply_threads(cfg)
    torch.manual_seed(0)
    data = prepare(cfg)
    model, preset = baseline_model(data, cfg)
    result = fit_als(model, data, preset, None, "linear_factor")
    assert len(result.history) == 60

    u = model.query_tower.ids.weight.detach().double().numpy()
    v = model.candidate_tower.ids.weight.detach().double().numpy()
    assert u.min() >= 0.0 and v.min() >= 0.0  # every factor entry is non-negative
    # id row r + 1 belongs to encoder id r; put both back in matrix order
    ui = data.queries.encoders.id_encoder.transform(np.arange(n)).numpy()
    vi = data.candidates.encoders.id_encoder.transform(np.arange(m)).numpy()
    ours = np.linalg.norm(x - u[ui] @ v[vi].T)

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # ConvergenceWarning at max_iter is expected and harmless here
        nmf = NMF(n_components=16, init="nndsvda", max_iter=200, random_state=0)
        w = nmf.fit_transform(x)
    theirs = np.linalg.norm(x - w @ nmf.components_)
    # reference: scikit-learn NMF (coordinate descent, init="nndsvda", max_iter=200), Frobenius error
    assert ours <= 1.05 * theirs
    assert ours >= 0.8 * theirs  # a sanity floor: the same k cannot do much better than sklearn's NMF
    # the constraint binds: unconstrained factors of the same k fit better and go negative
    cells = Cells.build(torch.from_numpy(rows.ravel() + 1), torch.from_numpy(cols.ravel() + 1),
                        torch.from_numpy(x.ravel()), None, n + 1, m + 1)
    free = Factors(torch.from_numpy(u).float().clone(), torch.from_numpy(v).float().clone())
    for _ in range(5):
        als_sweep(free, cells, 1e-3, cg_steps=0)
    assert float(free.query.min()) < 0 or float(free.candidate.min()) < 0
    assert certify(model, data, preset)["applies"] is False  # the certificate is for unconstrained factors
