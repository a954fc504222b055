"""Runs with bounded id tables (model.id_table_rows): trained end to end, saved, loaded, warm-started, aligned.

Tiny runs on the small demo store (300 customers, 200 items, k = 8, one epoch) with a cap of 40 rows,
so both towers (and the linear factor model) compose their id rows from two tables. References:
the exported embeddings files, written from the model in memory at the end of training, against the
vectors the reloaded bundle computes; scipy.stats.ortho_group for a random rotation.
"""

from __future__ import annotations

import json
import math
import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import torch

import towers
from towers.model.bundle import load_payload
from towers.runs.align import align_run
from towers.runs.train import train_run

from ..helpers import read_vectors

pytestmark = pytest.mark.slow  # tiny training runs, one warm-started from another

CAP = 40
BOUNDED = {"id_table_rows": CAP}


@pytest.fixture(scope="module")
def run(tiny_runs) -> Path:
    return tiny_runs.train(model=BOUNDED)


def _rows(n: int) -> int:
    """Rows of an id table for n encoder rows: the cap's remainder table and the quotient table covering every id."""
    return CAP + 1 + math.ceil((n - 1) / (CAP - 1))


def test_bounded_run_saves_loads_and_scores_the_same(run, small_store):
    for folder in (run, run / "linear_factor"):
        payload = load_payload(folder / "model.pt")
        assert payload["model_config"]["id_table_rows"] == CAP
        state = payload["state_dict"]
        for tower, side in (("query_tower", "query_encoders"), ("candidate_tower", "candidate_encoders")):
            n = len(payload[side]["ids"]["ids"]) + 1
            assert f"{tower}.ids.weight" not in state
            stored = state[f"{tower}.ids.quotient.weight"].shape[0] + state[f"{tower}.ids.remainder.weight"].shape[0]
            assert n > CAP and stored == _rows(n)  # memory: the formula, not one row per id
    loaded = towers.load(run)
    items = pd.read_parquet(small_store / "items.parquet")
    customers = pd.read_csv(small_store / "customers.csv")
    for name, table, embed, id_column in (("item_embeddings.parquet", items, loaded.embed_items, "item_id"),
                                          ("user_embeddings.parquet", customers, loaded.embed_users, "customer_id")):
        ids, vectors, _ = read_vectors(run / name)  # reference: written from the model in memory after training
        rows = table.set_index(id_column).loc[ids].reset_index()
        again = np.stack(embed(rows)["embedding"].to_numpy())
        np.testing.assert_allclose(again, vectors, rtol=1e-5, atol=1e-6)
    metrics = json.loads((run / "metrics.json").read_text())
    assert 0 <= metrics["warm"]["towers"]["recall@20"] <= 1 and "linear_factor" in metrics["warm"]
    for _, listed in loaded.recommend(list(customers["customer_id"][:3]), top=5).groupby("query_id"):
        assert list(listed["rank"]) == [1, 2, 3, 4, 5] and listed["score"].is_monotonic_decreasing


def test_warm_start_from_a_bounded_run(run, tiny_runs, tmp_path, capfd):
    again = train_run(tiny_runs.config(tmp_path, model=BOUNDED), tmp_path / "warm", init_from=run)
    err = capfd.readouterr().err
    assert "id tables (model.id_table_rows): users: " in err and "README" in err  # the log line
    started = json.loads((again["out"] / "started_from.json").read_text())
    assert started["towers"]["tensors_copied"] > 0
    refused = tiny_runs.config(tmp_path, name="other.yaml", model={"id_table_rows": CAP + 5})
    with pytest.raises(towers.TowersError, match="keep model.id_table_rows the same to warm-start"):
        train_run(refused, tmp_path / "refused", init_from=run)


def test_align_rotates_the_towers_and_copies_a_product_linear_factor_unrotated(run, tiny_runs, tmp_path):
    other = tiny_runs.train(model=BOUNDED, run={"seed": 1})
    with pytest.warns(UserWarning, match="element-wise products"):
        record = align_run(other, run, tmp_path / "aligned")
    assert record["linear_factor"]["aligned"] is False
    ids, before, _ = read_vectors(other / "item_embeddings.parquet")
    _, after, _ = read_vectors(tmp_path / "aligned" / "item_embeddings.parquet")
    users_before = read_vectors(other / "user_embeddings.parquet")[1]
    users_after = read_vectors(tmp_path / "aligned" / "user_embeddings.parquet")[1]
    # reference: (U R)(V R)^T = U V^T for orthogonal R
    np.testing.assert_allclose(users_after @ after.T, users_before @ before.T, atol=1e-4)


def test_a_sum_id_only_tower_rotates_exactly():
    from scipy.stats import ortho_group

    from towers import config as C
    from towers.model.towers import TwoTowerModel
    from towers.runs.align import _rotate_tower

    cfg = C.resolve({"interactions": {"path": "x.csv", "query_column": "u", "candidate_column": "i"},
                     "model": {"hidden": [], "dim": 5, "id_table_rows": 9, "id_table_combine": "sum"}}, Path("."))
    m = TwoTowerModel([], 60, [], 50, cfg.model)
    r = torch.from_numpy(ortho_group.rvs(5, random_state=3))
    ids = torch.arange(60)
    with torch.no_grad():
        want = m.query_tower({"id": ids}).double() @ r
        _rotate_tower(m.query_tower, r, Path("model.pt"))
        torch.testing.assert_close(m.query_tower({"id": ids}).double(), want, atol=1e-6, rtol=1e-5)
    product = TwoTowerModel([], 60, [], 50, cfg.with_section("model", id_table_combine="product").model)
    with pytest.raises(towers.TowersError, match="no rotation of the tables reproduces"):
        _rotate_tower(product.query_tower, r, Path("model.pt"))


def test_the_measuring_script_prints_parameters_shares_and_memory(tmp_path):
    # scripts/id_tables (README, "Bounded id tables"): its memory part at a tiny size, each setting a child process
    import subprocess
    import sys

    root = Path(__file__).resolve().parents[2]
    out = subprocess.run([sys.executable, str(root / "scripts" / "id_tables.py"), "--skip-accuracy",
                          "--memory-users", "3000", "--memory-items", "300", "--work", str(tmp_path)],
                         capture_output=True, text=True, check=True, cwd=root).stdout.splitlines()
    users, items = (int(n.replace(",", "")) for n in re.search(r"([\d,]+) customer ids and ([\d,]+) item ids",
                                                                   out[0]).groups())
    rows = {line.split()[0]: line.split() for line in out[2:]}
    assert list(rows) == ["full", "1/4", "1/16", "smallest"]
    # reference: parameters by the formula, dim 32: the users composed from two tables, the items within the cap
    cap = math.ceil((users + 1) / 4)
    assert int(rows["1/4"][1].replace(",", "")) == cap and items + 1 <= cap
    assert int(rows["1/4"][2].replace(",", "")) == 32 * (cap + 1 + math.ceil(users / (cap - 1)) + items + 1)
    assert int(rows["full"][2].replace(",", "")) == 32 * (users + 1 + items + 1)
    assert float(rows["1/4"][3]) < 0.5 and all(float(r[4]) > 0 for r in rows.values())  # share, peak GiB
