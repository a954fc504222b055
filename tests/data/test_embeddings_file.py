"""Embeddings files: the parquet schema other tools read, and the round trip through towers' reader."""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import torch

from towers.data.embeddings_file import co_occurrence_truth, read_embeddings, write_embeddings


def test_embeddings_parquet_round_trip(tmp_path):
    ids = np.array(["a", "b", "c"], dtype=object)
    vec = torch.randn(3, 4)
    path = write_embeddings(tmp_path / "e.parquet", ids, vec, torch.tensor([0.1, 0.2, 0.3]), {"normalized": "false"})
    t = pq.read_table(path)
    assert t.schema.field("embedding").type == pa.list_(pa.float32(), 4)  # reference: Arrow fixed_size_list
    got_ids, got_vec, got_bias, meta = read_embeddings(path)
    assert list(got_ids) == ["a", "b", "c"] and torch.equal(got_vec, vec) and meta["k"] == "4"
    assert not list(tmp_path.glob(".*.tmp"))  # the atomic write left no temp file




def _truth_files(tmp_path, users: np.ndarray, items: np.ndarray, bias: np.ndarray, item_ids: np.ndarray):
    up = write_embeddings(tmp_path / "u.parquet", np.arange(len(users)), torch.from_numpy(users).float(), None, {})
    ip = write_embeddings(tmp_path / "i.parquet", item_ids, torch.from_numpy(items).float(),
                          torch.from_numpy(bias).float(), {})
    return str(up), str(ip)


def test_co_occurrence_oracle_is_the_expected_pair_count_of_the_choice_model(tmp_path):
    # reference: scipy.special.softmax for each user's choice shares; the expected count of users choosing
    # both a and b in two independent picks is sum_u p_u(a) p_u(b) (independence of the picks).
    from scipy.special import softmax

    rng = np.random.default_rng(3)
    users, items, bias = rng.normal(size=(40, 3)), rng.normal(size=(7, 3)), rng.normal(size=7)
    item_ids = np.array([f"i{j}" for j in range(7)], dtype=object)
    up, ip = _truth_files(tmp_path, users, items, bias, item_ids)
    catalog = item_ids[[4, 0, 6, 2, 1, 5, 3]]  # the run's own item order
    truth = co_occurrence_truth(up, ip, catalog)
    order = [4, 0, 6, 2, 1, 5, 3]
    p = softmax(users.astype(np.float32).astype(np.float64) @ items.astype(np.float32).astype(np.float64).T
                + bias.astype(np.float32), axis=1)[:, order]
    expected = p.T @ p
    got = (truth.query_vectors.double() @ truth.item_vectors.double().T).numpy()
    np.testing.assert_allclose(got, expected, rtol=1e-5)
    assert truth.query_bias is None and truth.item_bias is None


def test_co_occurrence_oracle_worked_example(tmp_path):
    # Worked by hand: one user, k = 1, u = ln 3, two items v = (1, 0), no bias: choice shares 3/4 and 1/4,
    # so the pair counts are 9/16 (a, a), 3/16 (a, b) and 1/16 (b, b).
    up, ip = _truth_files(tmp_path, np.array([[np.log(3.0)]]), np.array([[1.0], [0.0]]), np.zeros(2),
                          np.array(["a", "b"], dtype=object))
    truth = co_occurrence_truth(up, ip, np.array(["a", "b"], dtype=object))
    got = truth.query_vectors @ truth.item_vectors.T
    torch.testing.assert_close(got, torch.tensor([[9 / 16, 3 / 16], [3 / 16, 1 / 16]]), rtol=1e-6, atol=1e-7)


def test_co_occurrence_oracle_refuses_mismatched_or_oversized_files(tmp_path, monkeypatch):
    import pytest

    from towers.data import embeddings_file
    from towers.errors import TowersError

    ids = np.array(["a", "b"], dtype=object)
    up, ip = _truth_files(tmp_path, np.ones((3, 2)), np.ones((2, 3)), np.zeros(2), ids)
    with pytest.raises(TowersError, match=r"u\.parquet: vectors of length 2, but .*i\.parquet has 3"):
        co_occurrence_truth(up, ip, ids)
    up, ip = _truth_files(tmp_path, np.ones((3, 2)), np.ones((2, 2)), np.zeros(2), ids)
    monkeypatch.setattr(embeddings_file, "CO_OCCURRENCE_CELLS", 5)
    with pytest.raises(TowersError, match=r"3 users x 2 items is more than the item_item oracle holds \(5 cells\)"):
        co_occurrence_truth(up, ip, ids)
    with pytest.raises(TowersError, match=r"i\.parquet, column 'id': no oracle vector for id 'c'"):
        co_occurrence_truth(up, ip, np.array(["a", "c"], dtype=object))
