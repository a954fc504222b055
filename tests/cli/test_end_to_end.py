"""End to end on the demo store: train, evaluate, export, embed, recommend, through the CLI and the API."""

from __future__ import annotations

import importlib.util
import json
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import torch
import yaml

import towers
from towers.cli import main as cli
from towers.data.embeddings_file import true_vectors
from towers.evaluation.protocol import SLICES

from ..helpers import score_scale

pytestmark = pytest.mark.slow  # every test reads a run trained on the default-size demo store


@pytest.fixture(scope="module")
def folder(tmp_path_factory) -> Path:
    """This file's own folder for configs and runs."""
    return tmp_path_factory.mktemp("end_to_end")


def _script(name: str):
    """A module of scripts/ (not a package), imported from its file."""
    path = Path(__file__).resolve().parents[2] / "scripts" / f"{name}.py"
    spec = importlib.util.spec_from_file_location(f"{name}_script", path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def _config(tiny_runs, folder: Path, name: str, **changes) -> Path:
    """A shipped config on the default demo store, as shipped but for one thread and `changes`.

    One thread: on two cores shared with other jobs, two threads of one run mostly wait on each other.
    """
    # a sample of 500 validation and 1,000 test queries a slice (of about 3,000): the suite's time goes to
    # what each test checks, not to ranking every customer (reference penalties are chosen on validation)
    training = {"validate_queries": 500, **changes.pop("training", {})}
    evaluation = {"test_queries": 1000, **changes.pop("evaluation", {})}
    return tiny_runs.config(folder, name, config=name, store="default", tiny=False, run={"threads": 1},
                            training=training, evaluation=evaluation, **changes)


@pytest.fixture(scope="module")
def basket_run(tiny_runs, folder) -> Path:
    out = folder / "runs" / "baskets"
    # fewer epochs than the shipped config keeps the suite quick; the comparisons below still hold
    assert cli(["train", str(_config(tiny_runs, folder, "store_baskets.yaml", training={"epochs": 3})), "--out", str(out)]) == 0
    return out


def test_run_folder_has_every_output(basket_run):
    for name in ("config.yaml", "model.pt", "metrics.json", "history.json", "pairs.pt", "item_embeddings.parquet",
                 "user_embeddings.parquet", "checkpoints/best.pt", "checkpoints/last.pt",
                 "linear_factor/model.pt", "linear_factor/item_embeddings.parquet"):
        assert (basket_run / name).is_file(), name
    assert not (basket_run.parent / "baskets.partial").exists()


def test_run_folder_is_owner_only(basket_run):
    # a run folder holds personal data (README "Personal data"): folders 0700, files 0600, whatever the umask
    entries = [basket_run, *basket_run.rglob("*")]
    assert len(entries) > 10
    for path in entries:
        mode = path.stat().st_mode & 0o777
        assert mode == (0o700 if path.is_dir() else 0o600), (path, oct(mode))


def test_metrics_shape_and_towers_beat_popularity(basket_run):
    metrics = json.loads((basket_run / "metrics.json").read_text())
    assert [s for s in metrics if s in SLICES] == ["warm", "cold"]
    assert {"ease", "item_knn"} <= set(metrics["warm"]) and set(metrics["references"]) == {"ease", "item_knn"}
    for slice_name in ("warm", "cold"):
        assert {"popularity", "linear_factor", "towers", "oracle"} <= set(metrics[slice_name])
        for model in metrics[slice_name].values():
            for m in ("recall@20", "ndcg@20", "mrr", "auc", "coverage@20"):
                assert 0.0 <= model[m] <= 1.0
            assert 0.0 <= model["popularity_pct@20"] <= 100.0
    warm, cold = metrics["warm"], metrics["cold"]
    assert warm["towers"]["recall@20"] > warm["popularity"]["recall@20"]
    assert cold["towers"]["recall@20"] > 2 * cold["popularity"]["recall@20"]
    # the id-only model has nothing to go on for items never seen: every cold item gets the unknown row
    assert cold["linear_factor"]["recall@20"] == pytest.approx(cold["popularity"]["recall@20"], abs=0.02)
    # the planted truth ranks best: no model beats the oracle by much on this data
    assert warm["oracle"]["recall@20"] > warm["towers"]["recall@20"]


def test_parquet_schema_reads_back_with_pyarrow(basket_run):
    table = pq.read_table(basket_run / "item_embeddings.parquet")
    k = yaml.safe_load((basket_run / "config.yaml").read_text())["model"]["dim"]
    # reference: Arrow type system (pyarrow) for the stated schema
    assert table.schema.field("id").type == pa.string()
    assert table.schema.field("embedding").type == pa.list_(pa.float32(), k)
    assert table.schema.field("bias").type == pa.float32()
    meta = table.schema.metadata
    normalized = yaml.safe_load((basket_run / "config.yaml").read_text())["model"]["normalize"]
    assert normalized is True  # the softmax's default from dim 8, written out as a plain value
    assert meta[b"k"] == str(k).encode() and meta[b"normalized"] == b"true" and b"dot" in meta[b"score"]
    users = pq.read_table(basket_run / "user_embeddings.parquet")
    assert users.schema.field("id").type == pa.int64()  # customer ids keep their integer type
    assert users.num_rows == 4000 and table.num_rows == 3000


def test_bundle_loads_with_weights_only(basket_run):
    payload = torch.load(basket_run / "model.pt", weights_only=True)
    assert payload["format"] == "towers-model"
    json.dumps({k: v for k, v in payload.items() if k != "state_dict"})  # everything but tensors is plain JSON


def test_cli_embed_of_catalog_equals_in_memory_tower_output(basket_run, demo_store, tmp_path):
    # item_embeddings.parquet was written from the model in memory at the end of training;
    # re-embedding the same catalog rows from the saved bundle must give the same vectors.
    out = tmp_path / "catalog.parquet"
    assert cli(["embed", str(basket_run), "--items", str(demo_store / "items.parquet"), "--out", str(out)]) == 0
    a = pq.read_table(basket_run / "item_embeddings.parquet").to_pandas().set_index("id")
    b = pq.read_table(out).to_pandas().set_index("id").loc[a.index]
    np.testing.assert_allclose(np.stack(b["embedding"]), np.stack(a["embedding"]), atol=1e-5)
    np.testing.assert_allclose(b["bias"].to_numpy(), a["bias"].to_numpy(), atol=1e-6)


def test_new_arrivals_embed_from_features_alone(basket_run, demo_store, tmp_path):
    new = pd.read_parquet(demo_store / "new_items.parquet")
    run = towers.load(basket_run)
    api = run.embed_items(new)
    out = tmp_path / "new.parquet"
    assert cli(["embed", str(basket_run), "--items", str(demo_store / "new_items.parquet"), "--out", str(out)]) == 0
    cli_vecs = np.stack(pq.read_table(out).to_pandas()["embedding"])
    np.testing.assert_allclose(cli_vecs, np.stack(api["embedding"]), atol=1e-6)
    # unseen ids fall back to the shared unknown row, so vectors differ only through the features; so do
    # biases: the unknown row's plus the one the item tower predicts from the features (model.feature_bias)
    assert np.linalg.matrix_rank(cli_vecs) > 5
    np.testing.assert_allclose(pq.read_table(out).column("bias").to_numpy(), api["bias"].to_numpy(), atol=1e-6)
    assert api["bias"].nunique() > len(api) // 2
    model = run.bundle.model
    assert model.candidate_tower.bias_head is not None
    unknown = float(model.candidate_bias.weight[0, 0])
    assert not np.allclose(api["bias"].to_numpy(), unknown)


def test_recommend_excludes_training_positives_and_matches_scores(basket_run, demo_store):
    run = towers.load(basket_run)
    baskets = pd.read_parquet(demo_store / "baskets.parquet")
    users = baskets["customer_id"].value_counts().index[:5].tolist()
    recs = run.recommend(users, top=30)
    assert set(recs.columns) == {"query_id", "rank", "item_id", "score"}
    p = run.pairs
    q_ids, i_ids = np.asarray(p["query_ids"]), np.asarray(p["item_ids"], dtype=object)
    known = set(zip(q_ids[p["train"]["query"].numpy()], i_ids[p["train"]["candidate"].numpy()]))
    assert not any((u, i) in known for u, i in zip(recs["query_id"], recs["item_id"]))
    for _, group in recs.groupby("query_id"):
        assert group["score"].is_monotonic_decreasing and len(group) == 30
    # scores equal the dot product of the exported parquet vectors plus biases (brute force, numpy)
    ue = pq.read_table(basket_run / "user_embeddings.parquet").to_pandas().set_index("id")
    ie = pq.read_table(basket_run / "item_embeddings.parquet").to_pandas().set_index("id")
    scale, gb = score_scale(basket_run / "item_embeddings.parquet")
    row = recs.iloc[0]
    expect = np.dot(ue.loc[row["query_id"], "embedding"], ie.loc[row["item_id"], "embedding"]) * scale \
        + ue.loc[row["query_id"], "bias"] + ie.loc[row["item_id"], "bias"] + gb
    assert row["score"] == pytest.approx(expect, abs=1e-4)


def test_similar_and_recommend_through_cli(basket_run, capsys, tmp_path):
    items = pq.read_table(basket_run / "item_embeddings.parquet").column("id").to_pylist()[:2]
    assert cli(["similar", str(basket_run), "--items", *items, "--top", "4"]) == 0
    shown = capsys.readouterr().out
    assert items[0] in shown and "score" in shown
    out = tmp_path / "sim.csv"
    assert cli(["similar", str(basket_run), "--items", *items, "--top", "4", "--out", str(out)]) == 0
    sim = pd.read_csv(out)
    assert len(sim) == 8 and not (sim["query_id"] == sim["item_id"]).any()
    assert cli(["recommend", str(basket_run), "--users", "999999999", "--top", "3"]) == 2
    assert "unknown user id" in capsys.readouterr().err


def test_evaluate_reproduces_saved_metrics(basket_run, tiny_runs, capsys):
    saved = json.loads((basket_run / "metrics.json").read_text())
    again = towers.load(basket_run).evaluate()["metrics"]
    for slice_name in [s for s in saved if s in SLICES]:
        for model in saved[slice_name]:
            for metric, value in saved[slice_name][model].items():
                assert again[slice_name][model][metric] == pytest.approx(value, abs=1e-5), (slice_name, model, metric)
    assert cli(["evaluate", str(tiny_runs.train())]) == 0  # the command prints the same tables (a small run: quick)
    assert "[warm]" in capsys.readouterr().out


def test_evaluate_on_a_new_interaction_file(basket_run, demo_store, tmp_path):
    baskets = pd.read_parquet(demo_store / "baskets.parquet").tail(3000)
    path = tmp_path / "later.csv"
    baskets.to_csv(path, index=False)
    result = towers.load(basket_run).evaluate(path)["metrics"]
    assert "towers" in result["warm"] and result["warm"]["towers"]["queries"] > 0


def test_existing_run_folder_is_refused(basket_run, tiny_runs, tmp_path, capsys):
    code = cli(["train", str(_config(tiny_runs, tmp_path, "store_baskets.yaml")), "--out", str(basket_run)])
    assert code == 2
    assert "already exists" in capsys.readouterr().err


def test_ratings_and_copurchase_modes(tiny_runs, demo_store, tmp_path):
    ratings = tmp_path / "ratings"
    assert cli(["train", str(_config(tiny_runs, tmp_path, "store_ratings.yaml", training={"epochs": 4})), "--out",
                str(ratings)]) == 0
    m = json.loads((ratings / "metrics.json").read_text())
    assert {"rmse", "mae"} <= set(m["warm"]["towers"])
    # stars lie in 1..5: a sane model is far better than the spread of the stars themselves
    stars = pd.read_csv(demo_store / "ratings.csv")["stars"]
    assert m["warm"]["towers"]["rmse"] < stars.std()
    assert m["warm"]["oracle"]["rmse"] < m["warm"]["popularity"]["rmse"]

    pairs_run = tmp_path / "copurchase"
    # one epoch and no references: what is checked here is the item-item run's outputs, not their accuracy
    assert cli(["train", str(_config(tiny_runs, tmp_path, "store_copurchase.yaml", training={"epochs": 1},
                                     evaluation={"references": False, "baseline": False})), "--out",
                str(pairs_run)]) == 0
    assert (pairs_run / "item_embeddings.parquet").is_file()
    m = json.loads((pairs_run / "metrics.json").read_text())
    # the planted customers' expected co-occurrence (embeddings_file.co_occurrence_truth) finds the held-out
    # pairs far better than chance, which is what popularity scores on cold items
    assert m["cold"]["oracle"]["recall@20"] > 3 * m["cold"]["popularity"]["recall@20"]
    assert m["warm"]["oracle"]["recall@20"] > m["warm"]["popularity"]["recall@20"]
    assert not (pairs_run / "user_embeddings.parquet").exists()
    run = towers.load(pairs_run)
    sim = run.similar(["TR-00001"], top=5)
    assert len(sim) == 5 and "TR-00001" not in set(sim["item_id"])

    # scripts/feature_ceiling.py: given the planted rows themselves as the "feature part", the features oracle
    # is the oracle to the last bit; given the generator's feature part, it prints its row and the share
    ceiling = _script("feature_ceiling")
    planted, same = ceiling.feature_truth(run, str(demo_store / "truth" / "item_vectors.parquet"))
    assert torch.equal(planted.item_vectors, same.item_vectors)
    planted, features = ceiling.feature_truth(run, str(demo_store / "truth" / "item_feature_vectors.parquet"))
    saved = run.folder.read_pairs()
    assert torch.equal(planted.item_vectors, true_vectors(run.config, saved.query_ids, saved.item_ids, True).item_vectors)
    assert not torch.equal(planted.item_vectors, features.item_vectors)
    assert ceiling.main([str(pairs_run)]) == 0
    shutil.rmtree(pairs_run)
