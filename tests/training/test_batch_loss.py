"""Trainer.batch_loss, value and gradients, against the objective written out naively.

batch_loss takes shortcuts for speed (the id penalty reuses the rows the tower already gathered,
negatives are scored elementwise, positives and negatives are split rather than sliced); the
reference below looks every row up again and uses torch's own binary cross-entropy, so any
shortcut that changed the objective or its gradient fails here.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import torch
import torch.nn.functional as F

from towers import config as C
from towers.data.prepare import prepare
from towers.model.build import build_model
from towers.model.losses import in_batch_softmax_loss
from towers.training.loop import Trainer
from towers.training.negatives import NegativeSampler


def _data(tmp_path, hidden, features: bool, sampling: str = "popularity", id_table_rows: int = 0):
    rng = np.random.default_rng(0)
    n = 600
    pd.DataFrame({"u": rng.integers(0, 40, n), "i": rng.integers(0, 30, n)}).to_parquet(tmp_path / "log.parquet")
    pd.DataFrame({"i": np.arange(30), "shade": rng.choice(["red", "teal", "ochre"], 30),
                  "weight": rng.normal(size=30)}).to_parquet(tmp_path / "items.parquet")
    raw = {
        "interactions": {"path": str(tmp_path / "log.parquet"), "query_column": "u", "candidate_column": "i"},
        "model": {"dim": 6, "hidden": hidden, "id_dropout": 0.0, "id_table_rows": id_table_rows},
        "training": {"loss": "logistic", "negatives": 3, "id_l2": 0.7, "negative_sampling": sampling},
        "evaluation": {"test_fraction": 0.0, "validation_fraction": 0.0, "baseline": False},
    }
    if features:
        raw["items"] = {"path": str(tmp_path / "items.parquet"), "id_column": "i",
                        "features": [{"name": "shade", "kind": "categorical"}, {"name": "weight", "kind": "numeric"}]}
    cfg = C.resolve(raw, tmp_path)
    return cfg, prepare(cfg)


def _reference(trainer: Trainer, idx: torch.Tensor, negatives: torch.Tensor) -> torch.Tensor:
    """The minibatch objective of towers/training/loop.py's docstring, every row looked up afresh."""
    m, d = trainer.model, trainer.data
    b, n_neg = len(idx), trainer.n_neg
    q_rows, c_rows = d.train.query[idx], d.train.candidate[idx]
    qb = {k: v[q_rows] for k, v in d.queries.block.items()}
    cb = {k: v[torch.cat([c_rows, negatives])] for k, v in d.candidates.block.items()}
    qe, ce = m.query_tower(qb, qb["id"]), m.candidate_tower(cb, cb["id"])
    bq, bc = m.query_bias(qb["id"]).squeeze(1), m.candidate_bias(cb["id"]).squeeze(1) + _feature_bias(m.candidate_tower, cb)
    s = torch.cat([qe, qe.repeat_interleave(n_neg, 0)]) * torch.cat([ce[:b], ce[b:]])
    scores = s.sum(1) + torch.cat([bq, bq.repeat_interleave(n_neg)]) + bc + m.global_bias
    labels = torch.cat([torch.ones(b), torch.zeros(b * n_neg)])
    # reference: torch's binary cross-entropy on logits, summed over each pair's positive and negatives
    bce = F.binary_cross_entropy_with_logits(scores, labels, reduction="none")
    per_pair = bce[:b] + bce[b:].view(b, n_neg).sum(1)
    return (per_pair + _penalty(trainer, qb["id"], cb["id"][:b])).mean()


def _feature_bias(tower, block: dict) -> torch.Tensor | float:
    """The item tower's feature bias written out: its bias head applied on its own to what the output layer
    reads, the last hidden activations caught by a hook (0 for a tower without a head)."""
    if tower.bias_head is None:
        return 0.0
    seen = []
    handle = tower.mlp[-2].register_forward_hook(lambda module, inputs, output: seen.append(output))
    tower(block, block["id"])
    handle.remove()
    return tower.bias_head(seen[0]).squeeze(1)


def _penalty(trainer: Trainer, uq: torch.Tensor, uc: torch.Tensor) -> torch.Tensor:
    """Each pair's id penalty, lambda/2 (||row||^2 + b^2) / n_row on both sides, every row looked up afresh."""
    m = trainer.model
    penalty_q = (m.query_tower.ids(uq).pow(2).sum(1) + m.query_bias(uq).squeeze(1) ** 2) * trainer.q_inv[uq]
    penalty_c = (m.candidate_tower.ids(uc).pow(2).sum(1) + m.candidate_bias(uc).squeeze(1) ** 2) * trainer.c_inv[uc]
    return 0.5 * trainer.lam * (penalty_q + penalty_c)


def _assert_same(model, got: torch.Tensor, got_grads: dict, want: torch.Tensor) -> None:
    """The objective and, after its backward pass, every gradient equal batch_loss's."""
    want.backward()
    want_grads = _grads(model)
    torch.testing.assert_close(got, want, rtol=1e-5, atol=1e-6)
    assert got_grads.keys() == want_grads.keys()
    for name in want_grads:
        torch.testing.assert_close(got_grads[name], want_grads[name], rtol=1e-4, atol=1e-6, msg=name)


def _trainer(cfg, data, batch: int):
    """A seeded model with its biases away from their zero start (so their penalty and gradients count), its
    Trainer, and a batch of training pairs."""
    torch.manual_seed(0)
    model = build_model(data, cfg)
    with torch.no_grad():
        model.query_bias.weight.normal_(0, 0.3)
        model.candidate_bias.weight.normal_(0, 0.3)
    trainer = Trainer(model, data, cfg)
    model.train()
    return model, trainer, torch.randperm(len(data.train), generator=torch.Generator().manual_seed(1))[:batch]


def _grads(model) -> dict[str, torch.Tensor]:
    out = {}
    for name, p in model.named_parameters():
        if p.grad is not None:
            out[name] = (p.grad.to_dense() if p.grad.is_sparse else p.grad).clone()
    model.zero_grad(set_to_none=True)
    return out


@pytest.mark.parametrize("hidden,features,id_table_rows", [([], False, 0), ([8], True, 0), ([], False, 8), ([8], True, 8)],
                         ids=["linear-factor", "mlp-with-features", "linear-factor-bounded-ids",
                              "mlp-with-features-bounded-ids"])
def test_batch_loss_and_gradients_match_the_written_out_objective(tmp_path, hidden, features, id_table_rows):
    # bounded ids (model.id_table_rows 8 for 40 users and 30 items): the reference penalises each id's
    # composed vector, looked up afresh through the two tables
    cfg, data = _data(tmp_path, hidden, features, id_table_rows=id_table_rows)
    model, trainer, idx = _trainer(cfg, data, 50)
    assert (type(model.query_tower.ids).__name__ == "QRTable") == bool(id_table_rows)
    assert (model.candidate_tower.bias_head is not None) == features  # model.feature_bias: on by default
    state = trainer.generator.get_state()
    got = trainer.batch_loss(idx)
    got.backward()
    if not id_table_rows:  # each table read once a lookup: one sparse gradient entry each, none added twice
        assert model.query_tower.ids.weight.grad._nnz() == len(idx)
        assert model.candidate_tower.ids.weight.grad._nnz() == len(idx) * (1 + trainer.n_neg)
    got_grads = _grads(model)
    trainer.generator.set_state(state)
    negatives = trainer.sampler(len(idx) * trainer.n_neg)  # the same draws batch_loss made
    _assert_same(model, got, got_grads, _reference(trainer, idx, negatives))


def test_softmax_batch_loss_and_gradients_match_the_written_out_objective(tmp_path):
    # the in-batch softmax with drawn extra columns and the log-share correction, its penalty on the rows the
    # towers read: against the dense softmax (model/losses.py's reference) and every row looked up afresh
    cfg, _ = _data(tmp_path, [8], True)
    cfg = cfg.with_section("training", loss="softmax", negatives=7)  # 7 drawn columns beside the batch
    data = prepare(cfg)
    model, trainer, idx = _trainer(cfg, data, 40)
    state = trainer.negative_generator.get_state()
    got = trainer.batch_loss(idx)
    got.backward()
    assert model.candidate_tower.ids.weight.grad._nnz() == len(idx) + 7
    assert model.query_tower.ids.weight.grad._nnz() == len(idx)
    got_grads = _grads(model)
    trainer.negative_generator.set_state(state)
    pick = torch.randint(len(trainer.warm_rows), (7,), generator=trainer.negative_generator)  # batch_loss's draw
    d = data
    q_rows = d.train.query[idx]
    columns = torch.cat([d.train.candidate[idx], trainer.warm_rows[pick]])
    qb = {k: v[q_rows] for k, v in d.queries.block.items()}
    cb = {k: v[columns] for k, v in d.candidates.block.items()}
    logits = model.query_tower(qb, qb["id"]) @ model.candidate_tower(cb, cb["id"]).T
    assert model.candidate_tower.bias_head is not None
    logits = logits + model.candidate_bias(cb["id"]).squeeze(1) + _feature_bias(model.candidate_tower, cb)
    log_q = torch.log(len(idx) * trainer.log_q[columns].double().exp() + 7 / len(trainer.warm_rows)).float()
    want = (in_batch_softmax_loss(logits, columns, log_q) + _penalty(trainer, qb["id"], cb["id"][:len(idx)])).mean()
    _assert_same(model, got, got_grads, want)


def test_uniform_sampler_draws_warm_items_uniformly(tmp_path):
    cfg, data = _data(tmp_path, [], False, sampling="uniform")
    warm = torch.zeros(30, dtype=torch.bool)
    warm[torch.arange(0, 30, 3)] = True
    sampler = NegativeSampler(data.train, 30, warm, cfg.training, torch.Generator().manual_seed(2))
    draws = sampler(200_000)
    counts = torch.bincount(draws, minlength=30).double()
    assert counts[~warm].sum() == 0
    share = counts[warm] / len(draws)
    # reference: a uniform draw over 10 items has standard deviation sqrt(0.1 * 0.9 / n) per share
    assert (share - 0.1).abs().max() < 5 * (0.1 * 0.9 / len(draws)) ** 0.5


@pytest.mark.parametrize("loss,negatives,biases,id_l2,id_table_rows",
                         [("logistic", 2, True, 0.4, 0), ("logistic", 0, False, 0.0, 0), ("squared", 0, True, 0.3, 0),
                          ("logistic", 2, True, 0.4, 7)],
                         ids=["logistic-soft-labels", "logistic-no-negatives", "squared", "bounded-ids"])
def test_closed_form_id_row_objective_equals_the_general_path(tmp_path, loss, negatives, biases, id_l2, id_table_rows):
    # reference: the general autograd path of batch_loss (itself checked against torch's BCE above),
    # on a log with targets in [0, 1] (or ratings) and pair weights, so every term is present
    rng = np.random.default_rng(5)
    n = 500
    target = rng.random(n) if loss == "logistic" else rng.integers(1, 6, n).astype(float)
    pd.DataFrame({"u": rng.integers(0, 35, n), "i": rng.integers(0, 25, n), "y": target,
                  "w": rng.uniform(0.2, 2.0, n)}).to_parquet(tmp_path / "log.parquet")
    cfg = C.resolve({
        "interactions": {"path": str(tmp_path / "log.parquet"), "query_column": "u", "candidate_column": "i",
                         "target_column": "y", "weight_column": "w"},
        "model": {"dim": 5, "hidden": [], "id_dropout": 0.0, "biases": biases, "id_table_rows": id_table_rows},
        "training": {"loss": loss, "negatives": negatives, "id_l2": id_l2},
        "evaluation": {"test_fraction": 0.0, "validation_fraction": 0.0, "baseline": False},
    }, tmp_path)
    data = prepare(cfg)
    torch.manual_seed(0)
    model = build_model(data, cfg)
    if biases:
        with torch.no_grad():
            model.query_bias.weight.normal_(0, 0.3)
            model.candidate_bias.weight.normal_(0, 0.3)
            model.global_bias.fill_(0.2)
    trainer = Trainer(model, data, cfg)
    assert trainer.id_rows_only
    idx = torch.randperm(len(data.train), generator=torch.Generator().manual_seed(3))[:64]
    results = []
    for fused in (True, False):
        trainer.id_rows_only = fused
        state = trainer.generator.get_state()
        value = trainer.batch_loss(idx)
        value.backward()
        trainer.generator.set_state(state)  # the same negatives for both paths
        results.append((value.detach(), _grads(model)))
    (got, got_grads), (want, want_grads) = results
    torch.testing.assert_close(got, want, rtol=1e-5, atol=1e-6)
    assert got_grads.keys() == want_grads.keys()
    for name in want_grads:
        torch.testing.assert_close(got_grads[name], want_grads[name], rtol=1e-4, atol=1e-6, msg=name)


def test_closed_form_id_row_gradient_passes_gradcheck():
    # reference: torch.autograd.gradcheck, central finite differences in float64
    from towers.training.objectives import IdRowObjective as _IdRowObjective

    g = torch.Generator().manual_seed(6)
    b, k, n_neg = 5, 3, 2

    def leaf(*shape):
        return torch.randn(*shape, generator=g, dtype=torch.float64).requires_grad_(True)

    q, c, qb, cb, gb = leaf(b, k), leaf(b * (1 + n_neg), k), leaf(b), leaf(b * (1 + n_neg)), leaf(())
    y = torch.rand(b, generator=g, dtype=torch.float64)
    w = torch.rand(b, generator=g, dtype=torch.float64) + 0.5
    pq = torch.rand(b, generator=g, dtype=torch.float64)
    pc = torch.rand(b, generator=g, dtype=torch.float64)
    for logistic, neg in ((True, n_neg), (False, 0)):
        cc, cbb = (c, cb) if neg else (c[:b].detach().clone().requires_grad_(True), cb[:b].detach().clone().requires_grad_(True))
        assert torch.autograd.gradcheck(
            lambda *x, neg=neg, logistic=logistic: _IdRowObjective.apply(*x, y, w, pq, pc, 0.7, neg, logistic),
            (q, cc, qb, cbb, gb))
