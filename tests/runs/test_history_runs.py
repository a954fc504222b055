"""A run whose query tower reads each user's history: trained, exported, reloaded, and used for new users
(from features, from a given history, or from a few items alone)."""

import json
import warnings

import numpy as np
import pandas as pd
import pytest
import torch

import towers
from towers.data.history import HISTORY, history_column
from towers.errors import TowersError
from towers.runs.folder import RunFolder

from ..helpers import read_vectors


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


# ---------------------------------------------------------------- users not in the run, given a short history

def _own_histories(history_run, count: int = 6):
    """(user rows, their feature rows, their training histories as item-id lists, oldest first) of run users."""
    saved = RunFolder(history_run).read_pairs()
    bags = history_column(saved.split.train, len(saved.query_ids), len(saved.item_ids), 4)
    rows = torch.nonzero((bags > 0).sum(1) >= 2).flatten()[:count].numpy()
    lists = [[str(saved.item_ids[j - 1]) for j in bags[r].tolist() if j > 0][::-1] for r in rows]  # last = latest
    return rows, saved, lists


def _feature_rows(small_store, ids) -> pd.DataFrame:
    users = pd.read_csv(small_store / "customers.csv")
    return users.set_index("customer_id").loc[list(ids)].reset_index()


@pytest.mark.slow
def test_a_run_user_given_its_own_history_gets_its_exported_vector(history_run, small_store):
    run = towers.load(history_run)
    rows, _, lists = _own_histories(history_run)
    ids, vectors, _ = read_vectors(history_run / "user_embeddings.parquet")  # reference: pyarrow alone
    df = _feature_rows(small_store, [ids[r] for r in rows])
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # every id is the run's, every item trained: no warning
        got = run.embed_users(df, history=lists)
    np.testing.assert_allclose(np.stack(got["embedding"].to_numpy()), vectors[rows], atol=1e-5)
    # the same histories as a text column, full bags (history_length 4) with two older items before them:
    # only the latest 4 count, so those are cut
    _, saved, _ = _own_histories(history_run)
    in_bags = history_column(saved.split.train, len(saved.query_ids), len(saved.item_ids), 4).unique()
    trained = [str(saved.item_ids[j - 1]) for j in in_bags.tolist() if j > 0]  # items whose history rows learned
    spare = [v for v in trained if not any(v in h for h in lists)][:2]
    longer = ["|".join(spare + h if len(h) == 4 else h) for h in lists]
    assert len(spare) == 2 and any(len(h) == 4 for h in lists)
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # the spare items are known and trained: cut for their age alone
        again = run.embed_users(df.assign(recent=longer), history_column="recent")
    np.testing.assert_allclose(np.stack(again["embedding"].to_numpy()), vectors[rows], atol=1e-5)


@pytest.mark.slow
def test_an_empty_history_is_the_features_only_vector(history_run, small_store):
    run = towers.load(history_run)
    users = pd.read_csv(small_store / "customers.csv").head(4).assign(customer_id=lambda d: d.customer_id + 10**7)
    plain = np.stack(run.embed_users(users)["embedding"].to_numpy())  # today's features-only vectors
    empty = np.stack(run.embed_users(users, history=[[], [], [], []])["embedding"].to_numpy())
    missing = np.stack(run.embed_users(users.assign(h=[None, "", np.nan, None]), history_column="h")["embedding"])
    np.testing.assert_array_equal(empty, plain)
    np.testing.assert_array_equal(missing, plain)
    given = np.stack(run.embed_users(users, history=[[], [], [], ["TR-00001", "TR-00002"]])["embedding"].to_numpy())
    np.testing.assert_array_equal(given[:3], plain[:3])
    assert np.abs(given[3] - plain[3]).max() > 1e-4  # a history moves the vector


@pytest.mark.slow
def test_unknown_and_untrained_items_are_left_out_with_a_warning(history_run, small_store):
    run = towers.load(history_run)
    rows, saved, lists = _own_histories(history_run, 2)
    never = str(saved.item_ids[~saved.split.warm_items.numpy()][0])  # a held-out (cold) item: in no training bag
    ids = run.embeddings("user")[0]
    df = _feature_rows(small_store, [ids[r] for r in rows])
    clean = np.stack(run.embed_users(df, history=lists)["embedding"].to_numpy())
    noisy = [["NOT-AN-ITEM"] + lists[0] + ["ALSO-NOT", never], lists[1]]
    with pytest.warns(UserWarning, match=r"users: left out of the histories 2 item ids not in this run's items "
                                         r"\(e.g. 'NOT-AN-ITEM'\) and 1 item that no training history held"):
        got = np.stack(run.embed_users(df, history=noisy)["embedding"].to_numpy())
    np.testing.assert_array_equal(got, clean)


@pytest.mark.slow
def test_recommend_from_a_history_ranks_as_the_embedded_vector_scores(history_run):
    run = towers.load(history_run)
    _, _, lists = _own_histories(history_run, 1)
    history = lists[0]
    top = run.recommend_history(history, top=8)
    assert len(top) == 8 and set(top["query_id"]) == {"(history)"} and not set(top["item_id"]) & set(history)
    # reference: numpy scores of the vector embed_users gives a new user with every feature missing and this
    # history, over the exported item vectors read with pyarrow, the history items excluded
    names = [e.name for e in run.bundle.query_encoders.encoders]
    stranger = pd.DataFrame({"customer_id": [10**9], **{n: [None] for n in names}})
    user = run.embed_users(stranger, history=[history])
    q, qb = np.stack(user["embedding"].to_numpy())[0].astype(np.float64), float(user["bias"].iloc[0])
    item_ids, item_vecs, item_bias = read_vectors(history_run / "item_embeddings.parquet")
    meta = run.embeddings("item")[3]
    scores = item_vecs @ q / float(meta.get("temperature", 1.0)) + item_bias + qb + float(meta.get("global_bias", 0.0))
    scores[np.isin(np.asarray(item_ids, dtype=object), history)] = -np.inf
    best = np.argsort(-scores, kind="stable")[:8]
    assert top["item_id"].tolist() == [item_ids[i] for i in best]
    np.testing.assert_allclose(top["score"].to_numpy(), scores[best], rtol=1e-5, atol=1e-5)


@pytest.mark.slow
def test_history_requests_that_cannot_be_met_are_one_line_errors(history_run, tiny_runs, small_store):
    run = towers.load(history_run)
    users = pd.read_csv(small_store / "customers.csv").head(3)
    with pytest.raises(TowersError, match=r"history= has 2 lists for 3 user rows; give one list"):
        run.embed_users(users, history=[[], []])
    with pytest.raises(TowersError, match=r"either as lists \(history=\) or as a column"):
        run.embed_users(users.assign(h=""), history=[[], [], []], history_column="h")
    with pytest.raises(TowersError, match=r"users, column 'recent': no such column"):
        run.embed_users(users, history_column="recent")
    with pytest.raises(TowersError, match=r"a history needs at least one item id"):
        run.recommend_history([])
    plain = towers.load(tiny_runs.train())  # trained without history (model.history_length 0)
    fix = r"trained without user histories \(model.history_length is 0\).*retrain with model.history_length > 0"
    with pytest.raises(TowersError, match=fix):
        plain.embed_users(users, history=[[], [], []])
    with pytest.raises(TowersError, match=fix):
        plain.recommend_history(["TR-00001"])


def test_one_id_or_one_column_where_a_list_was_meant(history_run):
    # run.similar("TR-00001") once iterated the string ('T', 'R', ...); one id, one column name, are taken as such
    run = towers.load(history_run)
    item = run.embeddings("item")[0][0]
    assert run.similar(item, top=3).equals(run.similar([item], top=3))
    user = run.embeddings("user")[0][0]
    assert run.recommend(user, top=3).equals(run.recommend([user], top=3))
    with pytest.raises(TowersError, match=r"no embeddings side 'items'; give 'item', 'user' or 'query'"):
        run.embeddings("items")
