"""Bounded id tables (model.id_table_rows): the quotient-remainder map, the composed vectors, the unknown id,
sparse gradients, the parameter count, warm starts and the places that need one row per id.

Reference: Shi, Mudigere, Naumov & Yang, "Compositional Embeddings Using Complementary Partitions for
Memory-Efficient Recommendation Systems" (KDD 2020), id j -> (j // m, j % m), each checked against a
brute-force numpy enumeration or computation written here.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
import torch

from towers import config as C
from towers.errors import TowersError
from towers.model.grow import grow_weights
from towers.model.id_tables import QRTable, describe, id_table, least_rows, stored_rows
from towers.model.towers import TwoTowerModel

INPUTS = [{"name": "colour", "kind": "categorical", "size": 4}]


def _model_cfg(**changes) -> C.ModelSection:
    cfg = C.resolve({"interactions": {"path": "x.csv", "query_column": "u", "candidate_column": "i"}}, Path("."))
    return cfg.with_section("model", **changes).model


def _grid(ids: int, cap: int) -> np.ndarray:
    """Brute force: the (quotient, remainder) cells of a grid of quotient rows x (cap - 1) remainder rows, 1-based
    past the unknown row 0, walked row by row; the unknown id first at (0, 0), then one cell per known id."""
    cells = [(0, 0)]
    for q in range(1, ids + 1):
        for r in range(1, cap):
            cells.append((q, r))
    return np.array(cells[:ids])


@pytest.mark.parametrize("ids,cap", [(2, 2), (5, 3), (50, 8), (101, 11), (1000, 33), (1000, 900)])
def test_each_id_gets_its_own_pair_of_rows(ids, cap):
    table = id_table(ids, 3, cap, "product", 0.1)
    if ids <= cap:
        assert isinstance(table, torch.nn.Embedding) and table.num_embeddings == ids  # within the cap: one row per id
        return
    q, r = (t.numpy() for t in table.rows(torch.arange(ids)))
    pairs = np.stack([q, r], 1)
    np.testing.assert_array_equal(pairs, _grid(ids, cap))  # reference: the enumeration above
    assert len(np.unique(pairs, axis=0)) == ids  # distinct ids, distinct (q, r)
    assert q.max() < table.quotient.num_embeddings and r.max() < table.remainder.num_embeddings
    assert table.remainder.num_embeddings == cap and table.quotient.num_embeddings <= cap
    assert ((q == 0) == (np.arange(ids) == 0)).all() and ((r == 0) == (np.arange(ids) == 0)).all()  # rows 0: unknown only


@pytest.mark.parametrize("combine", ["product", "sum"])
def test_composed_vectors_match_numpy(combine):
    torch.manual_seed(0)
    table = id_table(60, 4, 9, combine, 0.1)
    with torch.no_grad():
        table.quotient.weight.normal_()
        table.remainder.weight.normal_()
    ids = torch.tensor([0, 1, 2, 8, 9, 17, 30, 59, 59, 0])
    got = table(ids).detach().numpy()
    a, b = table.quotient.weight.detach().numpy(), table.remainder.weight.detach().numpy()
    m = 8  # remainder classes: the cap less the unknown row

    def row(i):  # reference: numpy rows by the paper's map, written out per id
        q, r = (0, 0) if i == 0 else (1 + (i - 1) // m, 1 + (i - 1) % m)
        return a[q] * b[r] if combine == "product" else a[q] + b[r]

    want = np.stack([row(i) for i in ids.tolist()])
    np.testing.assert_allclose(got, want, rtol=1e-6)
    assert len({tuple(v) for v in got[1:-1].round(6)}) == len(set(ids[1:-1].tolist()))  # distinct ids, distinct vectors


@pytest.mark.parametrize("combine", ["product", "sum"])
def test_unknown_id_starts_at_zero_and_learns_like_a_plain_row(combine):
    torch.manual_seed(1)
    table = id_table(60, 4, 9, combine, 0.1)
    plain = id_table(60, 4, 0, combine, 0.1)
    assert torch.equal(table(torch.tensor([0]))[0], torch.zeros(4)) and torch.equal(plain.weight[0], torch.zeros(4))
    g = torch.tensor([0.5, -1.0, 2.0, 0.25])
    (table(torch.tensor([0])) * g).sum().backward()
    # reference: a full table's row 0 gets the gradient g itself; here the remainder's unknown row gets g
    # (product: times the quotient's unknown row of ones; sum: directly)
    torch.testing.assert_close(table.remainder.weight.grad.to_dense()[0], g)


def test_gradients_stay_sparse_and_touch_only_the_rows_used():
    table = id_table(200, 3, 20, "product", 0.1)
    ids = torch.tensor([1, 5, 150])
    table(ids).sum().backward()
    gq, gr = table.quotient.weight.grad, table.remainder.weight.grad
    assert gq.is_sparse and gr.is_sparse
    q, r = table.rows(ids)
    assert set(gq.coalesce().indices()[0].tolist()) == set(q.tolist())
    assert set(gr.coalesce().indices()[0].tolist()) == set(r.tolist())


@pytest.mark.parametrize("query_ids,item_ids,cap,dim", [(1001, 301, 40, 8), (5000, 40, 100, 6), (30, 20, 0, 5)])
def test_parameter_count_is_the_formula(query_ids, item_ids, cap, dim):
    m = TwoTowerModel(INPUTS, query_ids, INPUTS, item_ids, _model_cfg(dim=dim, id_table_rows=cap, biases=False))

    def rows(n):  # the formula: cap remainder rows + 1 + ceil((n - 1) / (cap - 1)) quotient rows, or n within the cap
        return n if cap == 0 or n <= cap else cap + 1 + math.ceil((n - 1) / (cap - 1))

    for tower, n in ((m.query_tower, query_ids), (m.candidate_tower, item_ids)):
        assert sum(p.numel() for p in tower.ids.parameters()) == rows(n) * dim
        assert stored_rows(tower.ids) == rows(n)
    # every sparse table (id tables only, biases off) is in the sparse optimiser's list
    assert sum(p.numel() for p in m.sparse_parameters()) == (rows(query_ids) + rows(item_ids)) * dim


def test_a_cap_below_the_square_root_is_refused_naming_the_key_and_the_least_cap():
    assert least_rows(1001) == 33  # (33 - 1)^2 = 1024 >= 1000 ids > 31^2
    id_table(1001, 4, 33, "product", 0.1)
    with pytest.raises(TowersError, match=r"^config key 'model.id_table_rows': got 32; expected at least 33 for the "
                                          r"1,000 query-side ids"):
        id_table(1001, 4, 32, "product", 0.1, "query-side id")


def test_the_log_line_says_how_many_rows_hold_how_many_ids():
    m = TwoTowerModel(INPUTS, 1001, INPUTS, 31, _model_cfg(id_table_rows=40))
    line = describe({"users": m.query_tower.ids, "items": m.candidate_tower.ids})
    assert line.startswith("id tables (model.id_table_rows): users: 1,000 ids in 67 rows (27 quotient + 40 remainder")
    assert "items: 30 ids, one row each" in line and "README" in line
    plain = TwoTowerModel(INPUTS, 1001, INPUTS, 31, _model_cfg())
    assert describe({"users": plain.query_tower.ids, "items": plain.candidate_tower.ids}) is None


def test_warm_start_keeps_every_earlier_id_and_grows_the_quotient_table():
    torch.manual_seed(2)
    cfg = _model_cfg(hidden=[], id_table_rows=12)
    old = TwoTowerModel([], 100, [], 60, cfg)
    new = TwoTowerModel([], 120, [], 60, cfg)
    done = grow_weights(new, old.state_dict(), Path("old/model.pt"))
    assert done["rows_added"] == {"query_tower.ids.quotient.weight": 2, "query_bias.weight": 20}
    ids = torch.arange(100)
    torch.testing.assert_close(new.query_tower({"id": ids}), old.query_tower({"id": ids}), rtol=0, atol=0)
    assert isinstance(new.query_tower.ids, QRTable)


@pytest.mark.parametrize("old_cap,new_cap,old_ids,pattern", [
    (12, 20, 100, r"bounded query-side id tables have 12 remainder rows, this one 20; keep model.id_table_rows"),
    (0, 12, 100, r"keeps its query-side ids one row per id, this one bounded"),
    (200, 12, 100, r"keeps its query-side ids one row per id, this one bounded"),  # grew past the cap
    (12, 0, 100, r"keeps its query-side ids bounded, this one one row per id"),
])
def test_warm_start_refuses_tables_that_would_move_earlier_ids(old_cap, new_cap, old_ids, pattern):
    old = TwoTowerModel([], old_ids, [], 10, _model_cfg(hidden=[], id_table_rows=old_cap))
    new = TwoTowerModel([], 120, [], 10, _model_cfg(hidden=[], id_table_rows=new_cap))
    with pytest.raises(TowersError, match=pattern):
        grow_weights(new, old.state_dict(), Path("old/model.pt"))


def test_als_and_the_certificate_need_one_row_per_id():
    from towers.training.als import check_linear
    from towers.training.certificate import certify

    m = TwoTowerModel([], 100, [], 60, _model_cfg(hidden=[], id_table_rows=12))
    with pytest.raises(TowersError, match=r"^config key 'model.id_table_rows': ALS solves one row per id"):
        check_linear(m)
    cfg = C.resolve({"interactions": {"path": "x.csv", "query_column": "u", "candidate_column": "i",
                                      "target_column": "y"},
                     "training": {"loss": "squared"}, "model": {"id_table_rows": 12}}, Path("."))
    cert = certify(m, None, cfg)  # decided before any data is read
    assert cert["applies"] is False and "model.id_table_rows" in cert["reason"]
