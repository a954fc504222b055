"""Towers, retrieval, evaluation protocol, exports and bundles, checked against brute force and references."""

from __future__ import annotations

import pickle
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import torch

from towers import config as C
from towers.data.embeddings_file import read_embeddings, write_embeddings
from towers.data.pairs import Pairs
from towers.errors import TowersError
from towers.evaluation.protocol import ranking_metrics
from towers.model.bundle import load_payload
from towers.model.towers import TwoTowerModel
from towers.search.retrieval import top_n
from towers.search.scorer import Scorer


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


def test_top_n_matches_brute_force_with_exclusions():
    g = torch.Generator().manual_seed(1)
    q, items = torch.randn(37, 8, generator=g), torch.randn(501, 8, generator=g)
    bias = torch.randn(501, generator=g)
    ex_r = torch.sort(torch.randint(0, 37, (200,), generator=g)).values
    ex_c = torch.randint(0, 501, (200,), generator=g)
    idx, val = top_n(q, items, 10, bias, ex_r, ex_c)
    full = (q @ items.T + bias).numpy()
    full[ex_r.numpy(), ex_c.numpy()] = -np.inf
    expect = np.argsort(-full, axis=1)[:, :10]  # reference: numpy argsort brute force
    assert np.array_equal(idx.numpy(), expect)
    np.testing.assert_allclose(val.numpy(), np.take_along_axis(full, expect, 1), rtol=1e-5)


def test_ranking_metrics_match_brute_force_recall():
    g = torch.Generator().manual_seed(2)
    nq, ni, k = 30, 80, 4
    scorer = Scorer(torch.randn(nq, k, generator=g), torch.randn(ni, k, generator=g))
    train = Pairs(torch.randint(0, nq, (300,), generator=g), torch.randint(0, ni, (300,), generator=g))
    test = Pairs(torch.randint(0, nq, (150,), generator=g), torch.randint(0, ni, (150,), generator=g))
    mask = torch.ones(ni, dtype=torch.bool)
    mask[:10] = False
    got = ranking_metrics(scorer, test, train, mask, [5, 10])
    # brute force in numpy: per query, drop known items and non-candidates, rank, count hits
    s = (scorer.query_vectors @ scorer.item_vectors.T).numpy()
    known = set(zip(train.query.tolist(), train.candidate.tolist()))
    recalls = {5: [], 10: []}
    for u in range(nq):
        pos = {c for (qq, c) in zip(test.query.tolist(), test.candidate.tolist()) if qq == u and c >= 10 and (u, c) not in known}
        if not pos:
            continue
        cand = [c for c in range(10, ni) if (u, c) not in known]
        order = sorted(cand, key=lambda c: -s[u, c])
        for kk in recalls:
            recalls[kk].append(len(pos & set(order[:kk])) / len(pos))
    assert got["recall@5"] == pytest.approx(np.mean(recalls[5]))
    assert got["recall@10"] == pytest.approx(np.mean(recalls[10]))
    assert got["queries"] == len(recalls[5])


def test_embeddings_parquet_round_trip(tmp_path):
    ids = np.array(["a", "b", "c"], dtype=object)
    vec = torch.randn(3, 4)
    path = write_embeddings(tmp_path / "e.parquet", ids, vec, torch.tensor([0.1, 0.2, 0.3]), {"normalized": "false"})
    t = pq.read_table(path)
    assert t.schema.field("embedding").type == pa.list_(pa.float32(), 4)  # reference: Arrow fixed_size_list
    got_ids, got_vec, got_bias, meta = read_embeddings(path)
    assert list(got_ids) == ["a", "b", "c"] and torch.equal(got_vec, vec) and meta["k"] == "4"
    assert not list(tmp_path.glob(".*.tmp"))  # the atomic write left no temp file


class _Boom:
    def __reduce__(self):
        return (exec, ("open('PWNED', 'w').write('x')",))


def test_bundle_with_pickled_code_is_refused(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    path = tmp_path / "model.pt"
    torch.save({"format": "towers-model", "evil": _Boom()}, path)
    with pytest.raises(TowersError, match="refused"):
        load_payload(path)
    assert not (tmp_path / "PWNED").exists()  # nothing ran


def test_truncated_bundle_is_reported(tmp_path):
    path = tmp_path / "model.pt"
    torch.save({"format": "towers-model", "w": torch.randn(100, 100)}, path)
    path.write_bytes(path.read_bytes()[:2000])
    with pytest.raises(TowersError, match="corrupt or truncated"):
        load_payload(path)


def test_plain_pickle_is_not_a_bundle(tmp_path):
    path = tmp_path / "model.pt"
    path.write_bytes(pickle.dumps({"a": 1}))
    with pytest.raises(TowersError):
        load_payload(path)
