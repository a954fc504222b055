"""The towers: output options, the id-only tower of the linear factor model, id dropout, parameter groups."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import torch

from towers import config as C
from towers.model.towers import TwoTowerModel


def _model_cfg(**changes) -> C.ModelSection:
    cfg = C.resolve({"interactions": {"path": "x.csv", "query_column": "u", "candidate_column": "i"}}, Path("."))
    return cfg.with_section("model", **changes).model


def _block(n: int, generator: torch.Generator) -> dict:
    return {"id": torch.arange(n) % 5, "colour": torch.randint(0, 4, (n,), generator=generator),
            "tags": torch.randint(0, 6, (n, 3), generator=generator), "price": torch.randn(n, 2, generator=generator)}


INPUTS = [{"name": "colour", "kind": "categorical", "size": 4}, {"name": "tags", "kind": "tokens", "size": 6},
          {"name": "price", "kind": "numeric", "width": 2}]


def test_tower_output_options():
    g = torch.Generator().manual_seed(0)
    block = _block(12, g)
    for changes, check in [
        ({"normalize": True}, lambda e: torch.allclose(e.norm(dim=1), torch.ones(12), atol=1e-5)),
        ({"non_negative": True}, lambda e: bool((e >= 0).all())),
        ({"dim": 7}, lambda e: e.shape == (12, 7)),
    ]:
        m = TwoTowerModel(INPUTS, 5, INPUTS, 5, _model_cfg(**changes)).eval()
        assert check(m.candidate_tower(block))


def test_id_only_tower_is_the_id_table():
    # the linear factor preset: with ids only and no hidden layer the embedding is the table row itself
    m = TwoTowerModel([], 6, [], 4, _model_cfg(hidden=[], dim=3, normalize=False)).eval()
    ids = torch.tensor([0, 2, 3])
    assert torch.equal(m.query_tower({"id": ids}), m.query_tower.ids.weight[ids])
    assert torch.equal(m.query_tower.ids.weight[0], torch.zeros(3))  # the unknown row starts at zero
    assert len(m.query_tower.mlp) == 0


def test_id_dropout_only_in_training():
    m = TwoTowerModel(INPUTS, 5, INPUTS, 5, _model_cfg(id_dropout=1.0))
    block = {"id": torch.tensor([1, 2, 3, 4])}
    assert (m.query_tower.id_rows(block) == 0).all()
    m.eval()
    assert torch.equal(m.query_tower.id_rows(block), block["id"])


def test_sparse_and_dense_parameters_partition_the_model():
    m = TwoTowerModel(INPUTS, 5, INPUTS, 5, _model_cfg())
    sparse, dense = m.sparse_parameters(), m.dense_parameters()
    ids = {id(p) for p in sparse} | {id(p) for p in dense} | {id(m.global_bias)}
    assert ids == {id(p) for p in m.parameters()}
    assert len(sparse) == 4  # two id tables, two bias tables




def test_history_decay_pools_the_latest_items_with_geometric_weights():
    from towers.data.history import HISTORY
    from towers.model.towers import Tower

    bags = torch.tensor([[3, 1, 4, 0, 0], [2, 0, 5, 6, 1], [0, 0, 0, 0, 0]])  # latest first; 0 pads, inner 0 a taken-out target
    spec = [{"name": HISTORY, "kind": "tokens", "size": 7, "dim": 4}]
    for decay in (1.0, 0.5):
        tower = Tower(spec, 1, _model_cfg(use_ids=False, hidden=[], history_decay=decay, normalize=False)).eval()
        table = tower.tables["f0"].weight.detach().numpy()
        # reference: a numpy weighted average, weights decay**position over each bag's items, summing to 1
        pos = np.arange(bags.shape[1])
        want = []
        for row in bags.numpy():
            w = np.where(row != 0, decay ** pos, 0.0)
            want.append((w[:, None] * table[row]).sum(0) / w.sum() if w.sum() else np.zeros(4))
        pooled = torch.from_numpy(np.asarray(want, dtype=np.float32))
        with torch.no_grad():
            got = tower({HISTORY: bags})
            expected = tower.mlp(pooled)
        assert torch.allclose(got, expected, atol=1e-5)
