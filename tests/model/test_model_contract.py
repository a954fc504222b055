"""The contract every model kind keeps: its exported embeddings files score exactly as the model in memory.

For the towers, the bilinear model and the linear factor model, in user_item and item_item mode, with two
towers and with one shared tower, with and without context columns: a model trained one epoch on small
data is exported as a run exports it (towers.runs.train.export_run), read back with
towers.data.embeddings_file.read_embeddings, and scored with towers.search.scorer.Scorer. Every pair's
score equals the in-memory model's (towers.model.embed.model_scorer), which in turn equals the towers'
own forward pass on the prepared feature blocks.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import torch

from towers import config as C
from towers.data.embeddings_file import read_embeddings
from towers.data.prepare import prepare
from towers.model.build import baseline_model, build_model
from towers.model.embed import model_scorer, reads_context
from towers.runs.folder import RunFolder
from towers.runs.train import export_run
from towers.search.scorer import Scorer
from towers.training.loop import fit

pytestmark = pytest.mark.usefixtures("one_thread")  # tiny models: threads only add overhead

N_USERS, N_ITEMS, N_EVENTS = 50, 40, 1500

# kind: (data, model family, model settings)
KINDS = {
    "towers": ("user_item", "towers", {"temperature": 0.5}),
    "towers-normalized": ("user_item", "towers", {"normalize": True, "temperature": 0.2}),
    "towers-without-biases": ("user_item", "towers", {"biases": False}),
    "towers-with-context": ("context", "towers", {}),
    "bilinear": ("user_item", "bilinear", {}),
    "linear-factor": ("user_item", "linear_factor", {}),
    "towers-item-item": ("item_item", "towers", {"shared_tower": False, "temperature": 0.5}),
    "towers-shared-tower": ("item_item", "towers", {"shared_tower": True}),
    "bilinear-item-item": ("item_item", "bilinear", {"shared_tower": False}),
    "bilinear-shared-tower": ("item_item", "bilinear", {"shared_tower": True}),
    "linear-factor-item-item": ("item_item", "linear_factor", {}),
    # bounded id tables (model/id_tables.py): 50 users and 40 items in two tables of at most 10 rows each
    "towers-bounded-ids": ("user_item", "towers", {"id_table_rows": 10}),
    "linear-factor-bounded-ids-sum": ("user_item", "linear_factor", {"id_table_rows": 10, "id_table_combine": "sum"}),
    "towers-shared-tower-bounded-ids": ("item_item", "towers", {"shared_tower": True, "id_table_rows": 10}),
}


@pytest.fixture(scope="module")
def files(tmp_path_factory) -> Path:
    """A random log with a context column, user and item tables with features, and co-occurring item pairs."""
    folder = tmp_path_factory.mktemp("model_contract")
    rng = np.random.default_rng(11)
    pd.DataFrame({"user": rng.integers(0, N_USERS, N_EVENTS), "item": rng.integers(0, N_ITEMS, N_EVENTS),
                  "channel": rng.choice(["shop", "web"], N_EVENTS)}).to_csv(folder / "log.csv", index=False)
    pd.DataFrame({"user": np.arange(N_USERS), "age_band": rng.choice(["young", "middle", "old"], N_USERS),
                  "household": rng.integers(1, 6, N_USERS)}).to_csv(folder / "users.csv", index=False)
    pd.DataFrame({"item": np.arange(N_ITEMS), "colour": rng.choice(["red", "teal", "ochre"], N_ITEMS),
                  "price": rng.gamma(2.0, 5.0, N_ITEMS),
                  "tags": ["|".join(rng.choice(list("abcdef"), 2, replace=False)) for _ in range(N_ITEMS)]}
                 ).to_csv(folder / "items.csv", index=False)
    a, b = rng.integers(0, N_ITEMS, N_EVENTS), rng.integers(0, N_ITEMS, N_EVENTS)
    keep = a != b
    pd.DataFrame({"item_a": a[keep], "item_b": b[keep], "times": rng.integers(1, 4, keep.sum())}
                 ).to_csv(folder / "pairs.csv", index=False)
    return folder


def _config(files: Path, data: str, model: dict) -> dict:
    items = {"path": "items.csv", "id_column": "item",
             "features": [{"name": "colour", "kind": "categorical"}, {"name": "price", "kind": "numeric"},
                          {"name": "tags", "kind": "tokens"}]}
    raw = {"run": {"seed": 3, "threads": 1},
           "model": {"dim": 6, "hidden": [12], **model},
           "training": {"epochs": 1, "batch_size": 256, "negatives": 2, "progress": "plain"},
           "evaluation": {"top_k": [5]},
           "items": items,
           "report": {"enabled": False}}
    if data == "item_item":
        raw["run"]["mode"] = "item_item"
        raw["interactions"] = {"path": "pairs.csv", "query_column": "item_a", "candidate_column": "item_b",
                               "weight_column": "times"}
    else:
        raw["interactions"] = {"path": "log.csv", "query_column": "user", "candidate_column": "item"}
        raw["users"] = {"path": "users.csv", "id_column": "user",
                        "features": [{"name": "age_band", "kind": "categorical"}, {"name": "household", "kind": "numeric"}]}
        if data == "context":
            raw["interactions"]["context"] = [{"name": "channel", "kind": "categorical"}]
    return C.resolve(raw, files)


def _trained(files: Path, kind: str):
    """(model, prepared data, the config it was built with, its label in a run folder), after one epoch."""
    data_kind, family, model_settings = KINDS[kind]
    cfg = _config(files, data_kind, model_settings)
    torch.manual_seed(cfg.run.seed)
    data = prepare(cfg)
    if family == "linear_factor":
        model, preset = baseline_model(data, cfg)
    else:
        preset = C.bilinear_preset(cfg) if family == "bilinear" else cfg
        model = build_model(data, preset)
    fit(model, data, preset, None, family)
    return model, data, preset, family


def _file_scorer(folder: Path, item_item: bool) -> tuple[Scorer, np.ndarray, np.ndarray]:
    """A Scorer built from the embeddings files alone, with the ids of its query and item rows."""
    item_ids, items, item_bias, meta = read_embeddings(folder / "item_embeddings.parquet")
    query_file = "user_embeddings.parquet" if not item_item else "query_embeddings.parquet"
    if item_item and not (folder / query_file).is_file():  # one shared tower: items query items
        query_file = "item_embeddings.parquet"
    query_ids, queries, query_bias, _ = read_embeddings(folder / query_file)
    scorer = Scorer(queries, items, query_bias, item_bias, float(meta["global_bias"]), 1.0 / float(meta["temperature"]))
    return scorer, query_ids, item_ids


@pytest.mark.parametrize("kind", list(KINDS))
def test_exported_files_score_as_the_model_in_memory(files, kind, tmp_path):
    model, data, preset, label = _trained(files, kind)
    run = RunFolder(tmp_path / "run")
    export_run(run, model, data, preset, label)
    from_files, query_ids, item_ids = _file_scorer(run.model_dir(label), data.item_item)
    assert list(query_ids) == list(data.queries.ids) and list(item_ids) == list(data.candidates.ids)
    in_memory = model_scorer(model, data)
    q, c = torch.meshgrid(torch.arange(len(query_ids)), torch.arange(len(item_ids)), indexing="ij")
    q, c = q.flatten(), c.flatten()
    expected = in_memory.pairs(q, c)
    assert expected.std() > 1e-3  # a trained model, not a constant one
    # reference: the model in memory (model_scorer); float32 vectors and biases pass through parquet unchanged
    torch.testing.assert_close(from_files.pairs(q, c), expected, rtol=1e-6, atol=1e-6)
    if reads_context(model.query_tower, data):
        return  # its query vectors are averages over a sample of contexts, checked above through the files
    with torch.no_grad():
        model.eval()
        queries, items = model.query_tower.encode(data.queries.block), model.candidate_tower.encode(data.candidates.block)
        forward = (queries.vectors[q] * items.vectors[c]).sum(1) / model.temperature
        if model.use_biases:
            forward = forward + model.query_bias_of(data.queries.block["id"])[q] \
                + model.candidate_bias_of(data.candidates.block["id"])[c] + model.global_bias
            for side, rows in ((queries, q), (items, c)):  # a shared tower's queries are items: theirs too
                if side.feature_bias is not None:
                    forward = forward + side.feature_bias[rows]
    # reference: the towers' own forward pass, score = q.c / temperature + biases, an item's id bias plus its
    # feature bias (TwoTowerModel's docstring)
    torch.testing.assert_close(expected, forward, rtol=1e-5, atol=1e-5)


@pytest.mark.parametrize("kind", ["towers", "towers-without-biases", "linear-factor", "towers-shared-tower"])
def test_a_scorer_of_some_queries_scores_them_as_the_whole_one(files, kind):
    """model_scorer(query_rows=...) embeds only those queries (a divided log's process, its own users): every
    pair of theirs, and every ranking row, equals the scorer of every query's; others are refused."""
    model, data, _, _ = _trained(files, kind)
    whole = model_scorer(model, data)
    rows = torch.arange(1, len(data.queries.ids), 3)  # every third query
    part = model_scorer(model, data, rows)
    assert len(part.query_vectors) == len(rows)
    q = rows.repeat_interleave(len(data.candidates.ids))
    c = torch.arange(len(data.candidates.ids)).repeat(len(rows))
    # reference: the scorer of every query (checked against the towers' forward pass above)
    torch.testing.assert_close(part.pairs(q, c), whole.pairs(q, c), rtol=1e-6, atol=1e-6)
    asked = rows.flip(0)[:5]
    got = part.over_items(torch.arange(4)).for_queries(asked).top(3)
    want = whole.over_items(torch.arange(4)).for_queries(asked).top(3)
    assert torch.equal(got[0], want[0])
    torch.testing.assert_close(got[1], want[1], rtol=1e-6, atol=1e-6)
    with pytest.raises(RuntimeError, match="does not hold"):
        part.for_queries(torch.tensor([0]))
