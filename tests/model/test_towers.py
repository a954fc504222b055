"""The towers: output options, the id-only tower of the linear factor model, id dropout, parameter groups."""

from __future__ import annotations

from pathlib import Path

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
    m = TwoTowerModel([], 6, [], 4, _model_cfg(hidden=[], dim=3)).eval()
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


