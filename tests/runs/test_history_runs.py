"""A run whose query tower reads each user's history: trained, exported, reloaded, and used for new users."""

import json

import numpy as np
import pandas as pd
import pytest
import torch

import towers
from towers.data.history import HISTORY, history_column
from towers.runs.folder import RunFolder


@pytest.fixture(scope="module")
def history_run(tiny_runs):
    return tiny_runs.train(model={"history_length": 4}, training={"loss": "softmax", "negatives": 32})


@pytest.mark.slow  # trains a tiny run
def test_exported_user_vectors_are_the_tower_of_features_and_history(history_run):
    run = towers.load(history_run)
    tower = run.bundle.model.query_tower
    assert any(i["name"] == HISTORY for i in tower.inputs)
    saved = RunFolder(history_run).read_pairs()
    rows = torch.arange(len(saved.query_ids))
    block = run._user_block(rows)
    bags = history_column(saved.split.train, len(saved.query_ids), len(saved.item_ids), 4)
    assert torch.equal(block[HISTORY], bags)  # the training history, rebuilt from the saved split
    tower.eval()
    with torch.no_grad():
        again = tower(block)
    ids, vectors, _, _ = run.embeddings("user")
    np.testing.assert_allclose(vectors.numpy(), again.numpy(), atol=1e-5)  # the exported vectors, recomputed
    assert json.loads((history_run / "metrics.json").read_text())["warm"]["towers"]["queries"] > 0


@pytest.mark.slow
def test_new_users_are_embedded_from_features_with_an_empty_history(history_run, small_store):
    run = towers.load(history_run)
    users = pd.read_csv(small_store / "customers.csv").head(5).assign(customer_id=lambda d: d.customer_id + 10**7)
    out = run.embed_users(users)
    assert len(out) == 5 and np.isfinite(np.stack(out["embedding"].to_numpy())).all()
