"""`towers train --init-from`: warm starts on new logs keep every earlier index and weight.

Checks are exact identities of the construction (old rows copied bit for bit, vocabularies
extended as prefixes) plus one planted comparison: after one epoch on the full log, the warm-started
model scores better on validation than the same model started fresh (both seeded alike).
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import torch
import yaml

from towers import cli
from towers.api import load
from towers.runs.train import train_run

pytestmark = pytest.mark.slow  # three runs, one warm-started from another

HELD_CUSTOMERS = 60
HELD_ITEMS = 40


def _config(folder, store, log, epochs, dim=16):
    cfg = {
        "run": {"seed": 2, "threads": 1},
        "interactions": {"path": str(log), "query_column": "customer_id", "candidate_column": "item_id",
                         "time_column": "purchased_at"},
        "users": {"path": str(store / "customers.csv"), "id_column": "customer_id",
                  "features": [{"name": "age_band", "kind": "categorical"},
                               {"name": "household_size", "kind": "numeric"}]},
        "items": {"path": str(store / "items.parquet"), "id_column": "item_id",
                  "features": [{"name": "department", "kind": "categorical"}, {"name": "brand", "kind": "categorical"},
                               {"name": "price", "kind": "numeric"}, {"name": "tags", "kind": "tokens"}]},
        "model": {"dim": dim, "hidden": [32], "id_dropout": 0.2},
        "training": {"epochs": epochs, "batch_size": 512, "negatives": 2, "progress": "plain", "patience": 10},
        # each customer's latest purchases held out: nearly the same pairs with and without a warm start
        "evaluation": {"top_k": [20], "baseline": True, "split": "user_recent"},
    }
    path = folder / f"cfg_{log.stem}_{epochs}_{dim}.yaml"
    path.write_text(yaml.safe_dump(cfg))
    return str(path)


@pytest.fixture(scope="module")
def runs(small_store, tmp_path_factory):
    folder = tmp_path_factory.mktemp("warm")
    log = pd.read_parquet(small_store / "baskets.parquet")
    customers = np.sort(log["customer_id"].unique())
    items = np.sort(log["item_id"].unique())
    early = log[~log["customer_id"].isin(customers[-HELD_CUSTOMERS:]) & ~log["item_id"].isin(items[-HELD_ITEMS:])]
    early.to_parquet(folder / "early.parquet")
    log.to_parquet(folder / "full.parquet")
    first = train_run(_config(folder, small_store, folder / "early.parquet", 4), folder / "first")
    warm = train_run(_config(folder, small_store, folder / "full.parquet", 1), folder / "warm", init_from=folder / "first")
    fresh = train_run(_config(folder, small_store, folder / "full.parquet", 1), folder / "fresh")
    return folder, first, warm, fresh


def test_encoders_extend_without_renumbering(runs):
    _, first, warm, _ = runs
    a, b = load(first["out"]).bundle, load(warm["out"]).bundle
    for side in ("query_encoders", "candidate_encoders"):
        old, new = getattr(a, side), getattr(b, side)
        n = len(old.id_encoder.ids)
        assert list(new.id_encoder.ids[:n]) == list(old.id_encoder.ids)
        assert len(new.id_encoder.ids) > n  # the held-back customers and items are new
        for o, w in zip(old.encoders, new.encoders):
            if hasattr(o, "vocab"):
                assert list(w.vocab[:len(o.vocab)]) == list(o.vocab)
            else:
                assert o.state() == w.state()  # numeric scaling kept as it was
    started = json.loads((warm["out"] / "started_from.json").read_text())
    assert started["run"] == str(first["out"].resolve())
    for side, key, held in (("users", "query_encoders", HELD_CUSTOMERS), ("items", "candidate_encoders", HELD_ITEMS)):
        old, new = getattr(a, key).id_encoder.ids, getattr(b, key).id_encoder.ids
        added = started["encoders"][side]["new_ids"]
        # new = the held-back entities plus a few that the first run saw only in its held-out pairs
        assert added == len(new) - len(old) and held <= added <= held + 10
        assert not set(new[len(old):]) & set(old)
    assert started["towers"]["rows_added"]["candidate_tower.ids.weight"] == started["encoders"]["items"]["new_ids"]
    assert "linear_factor" in started


def test_grown_model_starts_where_the_earlier_run_ended(runs, small_store):
    folder, first, _, _ = runs
    from towers import config as C
    from towers.data.prepare import prepare
    from towers.model.build import build_model
    from towers.model.embed import embed_all
    from towers.model.grow import grow_weights
    from towers.runs.train import load_previous

    previous = load_previous(first["out"])
    cfg = C.load(_config(folder, small_store, folder / "full.parquet", 1))
    data = prepare(cfg, previous)
    model = build_model(data, cfg)
    grow_weights(model, previous.model.state_dict(), previous.path)
    new_vecs = embed_all(model.candidate_tower, data.candidates.block)
    # the earlier run's vectors for the same items, from its own features and (old) id rows
    old_run = load(first["out"])
    items = pd.read_parquet(small_store / "items.parquet")
    rows = items.set_index("item_id").loc[data.candidates.ids].reset_index()
    old_vecs = old_run.embed_items(rows)["embedding"]
    old_vecs = torch.from_numpy(np.stack(old_vecs.to_numpy()))
    # every item, old or new, starts exactly where the earlier run would embed it: old ones from their
    # copied id rows, new ones from the unknown row and their features (its cold-start vector)
    assert torch.allclose(new_vecs, old_vecs, atol=1e-5)


def test_warm_start_beats_a_fresh_start_after_one_epoch(runs):
    # scored on the pairs both runs held out (the warm run keeps the earlier run's training pairs in training,
    # so the two runs' splits differ): no model, earlier or new, trained on them
    from towers.runs.folder import RunFolder

    folder, _, warm, fresh = runs
    both = {}
    for run in (warm, fresh):
        saved = RunFolder(run["out"]).read_pairs()
        both[run["out"]] = _pair_ids(saved, saved.split.test)
    shared = sorted(set.intersection(*both.values()))
    assert len(shared) > 200
    log = pd.read_parquet(folder / "full.parquet")
    log.merge(pd.DataFrame(shared, columns=["customer_id", "item_id"])).to_parquet(folder / "held_by_both.parquet")
    w, f = (load(run["out"]).evaluate(folder / "held_by_both.parquet")["metrics"]["warm"]["towers"]["recall@20"]
            for run in (warm, fresh))
    assert w > f, (w, f)


def test_mismatched_configs_are_refused_in_one_line(runs, small_store, capsys):
    folder, first, _, _ = runs
    other_dim = _config(folder, small_store, folder / "full.parquet", 1, dim=8)
    assert cli.main(["train", other_dim, "--out", str(folder / "bad"), "--init-from", str(first["out"])]) == 2
    err = [line for line in capsys.readouterr().err.splitlines() if line.startswith(("error", "Traceback"))]
    assert len(err) == 1 and "keep model.dim" in err[0]
    # the widths are named apart from the row counts, which a warm start may grow (dim 8 here, 16 there)
    assert "numbers a row there but 8 here" in err[0] and "shape" not in err[0], err[0]
    assert not (folder / "bad").exists() and not (folder / "bad.partial").exists()
    assert cli.main(["train", other_dim, "--out", str(folder / "bad"), "--init-from", str(folder)]) == 2
    assert "needs a finished run folder" in capsys.readouterr().err


def _pair_ids(saved, pairs) -> set:
    return set(zip(saved.query_ids[pairs.query.numpy()].tolist(), saved.item_ids[pairs.candidate.numpy()].tolist()))


def test_pairs_the_earlier_run_trained_on_are_never_held_out(runs):
    # an earlier run's training pair held out again would be scored by weights that learned it: every such
    # pair of the new log trains, and the held-out slices come from the rest
    from towers.runs.folder import RunFolder

    _, first, warm, fresh = runs
    before = RunFolder(first["out"]).read_pairs()
    after = RunFolder(warm["out"]).read_pairs()
    learned = _pair_ids(before, before.split.train)
    held = set().union(*(_pair_ids(after, getattr(after.split, s)) for s in ("valid", "test", "cold_test")))
    assert learned and held and not learned & held
    assert learned <= _pair_ids(after, after.split.train)
    # the fresh run, split without the earlier run, holds out many of them: the check above can fail
    again = RunFolder(fresh["out"]).read_pairs()
    assert len(learned & _pair_ids(again, again.split.test)) > 100
