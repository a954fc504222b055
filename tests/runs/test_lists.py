"""Lists a person can use (towers/runs/lists.py): item columns, item filters inside the top-N, lists for
users and items given by feature rows, and the nightly batch streamed to parquet."""

from __future__ import annotations

import os
import stat
import warnings

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest
import torch
from hypothesis import given, settings
from hypothesis import strategies as st

import towers
from towers.cli import main as cli
from towers.errors import TowersError
from towers.runs.lists import ItemFilter, item_lists
from towers.search.scorer import Scorer

KEY = ["query_id", "rank"]


# ---------------------------------------------------------------- ItemFilter from plain data

def test_filter_from_dict_reads_every_key():
    f = ItemFilter.from_dict({"only_true": ["in_stock"], "only_values": {"department": ["garden", "tools"]},
                              "never_values": [["brand", "Acme"], ["price", 2.0]], "never_ids": [3, 4]})
    assert f.only_true == ("in_stock",)
    assert f.only_values == (("department", ("garden", "tools")),)
    assert f.never_values == (("brand", ("Acme",)), ("price", ("2",)))  # a whole float compares as its integer text
    assert f.never_ids == (3, 4)
    assert f.columns() == ["in_stock", "department", "brand", "price"]
    assert not ItemFilter.from_dict({}) and ItemFilter.from_dict(None) == ItemFilter()


@pytest.mark.parametrize("bad, words", [
    ({"only_in": ["x"]}, "unknown key 'only_in'"),
    ({"only_true": [3]}, "expected a list of column names"),
    ({"only_values": {"department": {"a": 1}}}, "expected a value or a list of values"),
    ({"never_values": [["brand"]]}, "expected {column: [values]}"),
    ({"never_ids": {"a": 1}}, "expected a value or a list of values"),
    (["in_stock"], "expected a mapping"),
])
def test_filter_from_dict_refuses_bad_data_in_one_line(bad, words):
    with pytest.raises(TowersError, match=None) as exc:
        ItemFilter.from_dict(bad)
    assert words in str(exc.value) and "\n" not in str(exc.value)


# ---------------------------------------------------------------- filters inside the top-N, against brute force

N_ITEMS = 60


@pytest.fixture(scope="module")
def shop_table(tmp_path_factory):
    """A fictional hardware-and-garden item table with a stock flag, a department and a brand; items 0..59."""
    rng = np.random.default_rng(5)
    table = pd.DataFrame({
        "item_id": np.arange(N_ITEMS, dtype=np.int64),
        "in_stock": rng.random(N_ITEMS) < 0.7,
        "department": rng.choice(["garden", "tools", "paint", "lighting"], N_ITEMS),
        "brand": rng.choice(["Fernleaf", "Boltwright", "Cobble & Co"], N_ITEMS),
        "price": np.round(rng.uniform(1, 90, N_ITEMS), 2),
    })
    path = tmp_path_factory.mktemp("shop") / "items.parquet"
    table.to_parquet(path, index=False)
    return path, table


filters = st.builds(
    lambda only_true, only, never, ids: ItemFilter.from_dict(
        {"only_true": ["in_stock"] * only_true, "only_values": {"department": only} if only else {},
         "never_values": {"brand": never} if never else {}, "never_ids": ids}),
    st.booleans(),
    st.lists(st.sampled_from(["garden", "tools", "paint", "lighting", "roofing"]), max_size=3),
    st.lists(st.sampled_from(["Fernleaf", "Boltwright", "Cobble & Co"]), max_size=2),
    st.lists(st.integers(0, N_ITEMS + 5), max_size=8),
)


@pytest.mark.slow  # about a second for its examples
@settings(max_examples=40, deadline=None)
@given(keep=filters, top=st.integers(1, 12), seed=st.integers(0, 2**16))
def test_filtered_top_equals_brute_force_over_the_allowed_items(shop_table, keep, top, seed):
    path, table = shop_table
    lists = item_lists(table["item_id"].to_numpy(), keep, (), path, "item_id", "no table")
    # outside reference: the filter written directly as pandas boolean indexing
    ok = np.ones(N_ITEMS, dtype=bool)
    if keep.only_true:
        ok &= table["in_stock"].to_numpy()
    for _, values in keep.only_values:
        ok &= table["department"].isin(values).to_numpy()
    for _, values in keep.never_values:
        ok &= ~table["brand"].isin(values).to_numpy()
    ok[[i for i in keep.never_ids if i < N_ITEMS]] = False
    rng = np.random.default_rng(seed)
    q, c, bias = rng.normal(size=(5, 4)), rng.normal(size=(N_ITEMS, 4)), rng.normal(size=N_ITEMS)
    known = rng.random((5, N_ITEMS)) < 0.2  # known pairs, excluded as recommend excludes them
    ex_r, ex_c = (torch.from_numpy(a.astype(np.int64)) for a in np.nonzero(known))
    scorer = Scorer(torch.tensor(q, dtype=torch.float32), torch.tensor(c, dtype=torch.float32), None,
                    torch.tensor(bias, dtype=torch.float32))
    idx, scores = lists.top(scorer, top, ex_r, ex_c)
    listed = idx.numpy()
    assert ok[listed[listed >= 0]].all()  # no filtered item ever gets through
    # outside reference: a brute-force numpy argsort of the float32 scores over the allowed, unknown items
    full = (np.float32(1) * (scorer.query_vectors @ scorer.item_vectors.T) + scorer.item_bias).numpy()
    for r in range(5):
        allowed = np.flatnonzero(ok & ~known[r])
        best = allowed[np.argsort(-full[r, allowed], kind="stable")[:top]]
        got = listed[r][listed[r] >= 0]
        assert got.tolist() == best.tolist()  # a full list whenever enough items pass
        np.testing.assert_allclose(scores.numpy()[r][:len(got)], full[r, best], rtol=1e-5, atol=1e-5)


def test_only_true_refuses_a_column_that_is_not_boolean(shop_table):
    path, table = shop_table
    with pytest.raises(TowersError, match=r"column 'department', row 1: .* is not true or false"):
        item_lists(table["item_id"].to_numpy(), ItemFilter(only_true=("department",)), (), path, "item_id", "")


def test_unknown_column_names_the_table_and_lists_its_columns(shop_table):
    path, table = shop_table
    with pytest.raises(TowersError) as exc:
        item_lists(table["item_id"].to_numpy(), None, ["colour"], path, "item_id", "")
    text = str(exc.value)
    assert str(path) in text and "'colour'" in text and "in_stock, department, brand, price" in text


# ---------------------------------------------------------------- a trained run

@pytest.fixture(scope="module")
def basket_run(tiny_runs):
    return tiny_runs.train()


@pytest.fixture(scope="module")
def today(basket_run, small_store, tmp_path_factory):
    """Today's item table: the run's items without the last five, and a stock flag (every third item out)."""
    items = pd.read_parquet(small_store / "items.parquet")
    items = items.iloc[:-5].assign(in_stock=np.arange(len(items) - 5) % 3 != 0)
    path = tmp_path_factory.mktemp("today") / "items_today.parquet"
    items.to_parquet(path, index=False)
    return path, items


@pytest.mark.slow  # trains the tiny run on first use
def test_item_columns_equal_a_pandas_merge(basket_run, small_store):
    run = towers.load(basket_run)
    users = run.embeddings("user")[0][:6]
    got = run.recommend(users, top=7, columns=["name", "department", "price"])
    plain = run.recommend(users, top=7)
    items = pd.read_parquet(small_store / "items.parquet")[["item_id", "name", "department", "price"]]
    expected = plain.merge(items, on="item_id", how="left")  # outside reference: a pandas left merge
    pd.testing.assert_frame_equal(got.reset_index(drop=True), expected.reset_index(drop=True), check_dtype=False)


@pytest.mark.slow
def test_columns_from_a_table_lacking_items_warn_and_ids_not_in_the_run_warn(basket_run, today):
    path, items = today
    run = towers.load(basket_run)
    users = run.embeddings("user")[0][:200]
    with pytest.warns(UserWarning, match=r"5 of the run's 200 items are not in this item table; their name are empty"):
        got = run.recommend(users, top=10, columns=["name"], item_table=path)
    missing = set(run.embeddings("item")[0]) - set(items["item_id"])
    assert got.loc[got["item_id"].isin(missing), "name"].isna().all()  # the blanks the warning counts
    with pytest.warns(UserWarning, match=r"never: 1 of the 2 ids given are not items of this run \(first: 'C-1'\)"):
        run.recommend(users[:2], top=3, keep=ItemFilter(never_ids=(str(items["item_id"].iloc[0]), "C-1")))


@pytest.mark.slow
def test_filter_from_todays_table_keeps_lists_full_and_leaves_out_items_it_lacks(basket_run, today):
    path, items = today
    run = towers.load(basket_run)
    users = run.embeddings("user")[0][:20]
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        got = run.recommend(users, top=10, columns=["in_stock"], keep=ItemFilter(only_true=("in_stock",)),
                            item_table=path)
    assert any("5 of the run's 200 items are not in this item table" in str(w.message) for w in caught)
    stocked = set(items.loc[items["in_stock"], "item_id"])
    assert set(got["item_id"]) <= stocked and got["in_stock"].all()
    assert (got.groupby("query_id").size() == 10).all()  # masked before selection: still 10 per user
    # common practice: the filtered list is the unfiltered full ranking with the filtered items skipped
    full = run.recommend(users, top=200)
    for user in users[:5]:
        ranked = full.loc[full["query_id"] == user, "item_id"]
        assert got.loc[got["query_id"] == user, "item_id"].tolist() == [i for i in ranked if i in stocked][:10]


@pytest.mark.slow
def test_similar_with_columns_and_never_values(basket_run, small_store):
    run = towers.load(basket_run)
    items = pd.read_parquet(small_store / "items.parquet")
    anchor = items["item_id"].iloc[0]
    dept = items["department"].iloc[0]
    keep = ItemFilter.from_dict({"never_values": {"department": [dept]}})
    got = run.similar([anchor], top=8, columns=["department"], keep=keep)
    assert len(got) == 8 and (got["department"] != dept).all() and anchor not in set(got["item_id"])


# ---------------------------------------------------------------- the nightly batch

@pytest.mark.slow
def test_batch_lists_equal_recommend_and_are_owner_only(basket_run, today, tmp_path, monkeypatch):
    import towers.runs.lists as L

    monkeypatch.setattr(L, "BATCH_USERS", 64)  # several blocks on the tiny run's users
    path, _ = today
    run = towers.load(basket_run)
    keep = ItemFilter(only_true=("in_stock",), never_values=(("department", ("paint",)),))
    out = tmp_path / "lists.pq"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        count = run.write_lists(out, top=6, columns=["name"], keep=keep, item_table=path)
        users = run.embeddings("user")[0]
        sample = np.random.default_rng(0).choice(users, 25, replace=False)
        expected = run.recommend(sample, top=6, columns=["name"], keep=keep, item_table=path)
    assert stat.S_IMODE(os.stat(out).st_mode) == 0o600  # user lists are personal data
    got = pd.read_parquet(out)
    assert count == len(got) and got["query_id"].nunique() == len(users)
    assert list(got.columns) == ["query_id", "rank", "item_id", "score", "name"]
    assert pq.ParquetFile(out).metadata.num_row_groups > 1  # streamed block by block
    part = got[got["query_id"].isin(sample)].set_index(KEY).sort_index()
    # outside reference: Run.recommend on the same users (its exclusions built by excluded_cells)
    pd.testing.assert_frame_equal(part, expected.set_index(KEY).sort_index(), check_dtype=False, atol=1e-5)


@pytest.mark.slow
def test_batch_for_the_users_of_a_file_skips_unknown_ids(basket_run, tmp_path, capsys):
    run = towers.load(basket_run)
    users = run.embeddings("user")[0][:4]
    ids = tmp_path / "tonight.txt"
    ids.write_text("\n".join(str(u) for u in users) + "\n999999999\n", encoding="utf-8")
    out = tmp_path / "tonight.parquet"
    assert cli(["lists", str(basket_run), "--out", str(out), "--users", str(ids), "--top", "3"]) == 0
    err = capsys.readouterr().err
    assert "1 of 5 user ids are not in this run (e.g. '999999999')" in err
    got = pd.read_parquet(out)
    assert got["query_id"].tolist() == np.repeat(users, 3).tolist()
    expected = run.recommend(users, top=3)  # outside reference: Run.recommend
    np.testing.assert_array_equal(got["item_id"], expected["item_id"])


# ---------------------------------------------------------------- the command line

@pytest.mark.slow
def test_cli_prints_and_writes_the_same_lists(basket_run, today, tmp_path, capsys):
    path, _ = today
    user = str(towers.load(basket_run).embeddings("user")[0][0])
    args = ["recommend", str(basket_run), "--users", user, "--top", "5", "--columns", "name", "in_stock",
            "--only-true", "in_stock", "--never", "department=paint", "--item-table", str(path)]
    assert cli(args) == 0
    printed = capsys.readouterr().out
    out = tmp_path / "recs.pq"  # .pq, as README lists it
    assert cli(args + ["--out", str(out)]) == 0
    written = pd.read_parquet(out)
    assert printed == written.to_string(index=False) + "\n"  # common practice: one frame, two renderings
    assert len(written) == 5 and written["in_stock"].all() and stat.S_IMODE(os.stat(out).st_mode) == 0o600


@pytest.mark.slow
def test_cli_never_ids_and_only_values(basket_run, small_store, tmp_path, capsys):
    items = pd.read_parquet(small_store / "items.parquet")
    anchor = items["item_id"].iloc[3]
    first = towers.load(basket_run).similar([anchor], top=3)["item_id"].tolist()
    banned = tmp_path / "banned.txt"
    banned.write_text("\n".join(first) + "\n", encoding="utf-8")
    dept = items["department"].value_counts().index[0]
    out = tmp_path / "sim.csv"
    assert cli(["similar", str(basket_run), "--items", anchor, "--top", "4", "--never-ids", str(banned),
                "--only", f"department={dept}", "--columns", "department", "--out", str(out)]) == 0
    got = pd.read_csv(out)
    assert not set(got["item_id"]) & set(first) and (got["department"] == dept).all() and len(got) == 4


@pytest.mark.slow
@pytest.mark.parametrize("args, words", [
    (["--columns", "colour"], "column 'colour': no such column in the item table; its columns are item_id, name"),
    (["--only", "department"], "--only 'department': expected COLUMN=VALUE"),
    (["--out", "recs.txt"], "unsupported output format; use .csv, .parquet or .pq"),
])
def test_cli_list_errors_are_one_line(basket_run, args, words, tmp_path, capsys):
    user = str(towers.load(basket_run).embeddings("user")[0][0])
    if "--out" in args:
        args = ["--out", str(tmp_path / args[1])]
    assert cli(["recommend", str(basket_run), "--users", user] + args) == 2
    err = capsys.readouterr().err
    assert words in err and err.count("\n") == 1


@pytest.mark.slow
def test_lists_out_must_be_parquet(basket_run, tmp_path, capsys):
    assert cli(["lists", str(basket_run), "--out", str(tmp_path / "lists.csv")]) == 2
    assert "give an --out ending in .parquet or .pq" in capsys.readouterr().err
    assert not (tmp_path / "lists.csv").exists()


# ---------------------------------------------------------------- users and items given by feature rows

@pytest.mark.slow
def test_similar_rows_of_catalog_items_equal_similar(basket_run, small_store):
    run = towers.load(basket_run)
    rows = pd.read_parquet(small_store / "items.parquet").head(4)
    got = run.similar_rows(rows, top=6, columns=["name"])
    # outside reference: Run.similar on the same ids (re-embedding the catalog reproduces its vectors)
    expected = run.similar(rows["item_id"], top=6, columns=["name"])
    assert got["item_id"].tolist() == expected["item_id"].tolist()
    np.testing.assert_allclose(got["score"], expected["score"], atol=1e-4)


@pytest.mark.slow
def test_recommend_rows_of_new_users(basket_run, small_store, today):
    path, items = today
    run = towers.load(basket_run)
    users = pd.read_csv(small_store / "customers.csv").head(3)
    new = users.drop(columns=["customer_id"])
    got = run.recommend_rows(new, top=4, columns=["in_stock"], keep=ItemFilter(only_true=("in_stock",)),
                             item_table=path)
    assert got["query_id"].unique().tolist() == ["row 1", "row 2", "row 3"] and got["in_stock"].all()
    # outside reference: the embedded vectors scored by hand with the exported item vectors
    vecs = run.embed_users(new.assign(customer_id=["row 1", "row 2", "row 3"]))
    _, iv, ib, meta = run.embeddings("item")
    q = torch.tensor(np.stack(vecs["embedding"]))
    full = (q @ iv.T / float(meta.get("temperature", 1.0)) + ib + torch.tensor(vecs["bias"].to_numpy())[:, None]
            + float(meta.get("global_bias", 0.0))).numpy()
    i_ids = run.embeddings("item")[0]
    ok = np.isin(i_ids, items.loc[items["in_stock"], "item_id"])
    for r in range(3):
        best = np.flatnonzero(ok)[np.argsort(-full[r, ok], kind="stable")[:4]]
        assert got.loc[got["query_id"] == f"row {r + 1}", "item_id"].tolist() == i_ids[best].tolist()


@pytest.mark.slow
def test_recommend_rows_of_known_users_leave_out_their_items_as_recommend_does(basket_run, small_store):
    # a row naming a customer of the run embeds as that customer (the learned row): a trial saw an article the
    # reader had read come first; reference: recommend on the same ids, which leaves the known pairs out
    run = towers.load(basket_run)
    users = pd.read_csv(small_store / "customers.csv").head(4)
    got = run.recommend_rows(users, top=10)
    want = run.recommend(users["customer_id"].tolist(), top=10)
    assert got["item_id"].tolist() == want["item_id"].tolist()
    np.testing.assert_allclose(got["score"], want["score"], rtol=1e-5, atol=1e-5)


@pytest.mark.slow
def test_new_items_are_listed_beside_the_run_items_with_their_embedded_scores(basket_run, small_store):
    # a magazine's new articles or a shop's arrivals, never trained on: embedded from features and ranked with the rest
    run = towers.load(basket_run)
    arrivals = pd.read_parquet(small_store / "new_items.parquet")
    grown = run.with_new_items(small_store / "new_items.parquet")
    i_ids = run.embeddings("item")[0]
    assert len(grown.embeddings("item")[0]) == len(i_ids) + len(arrivals)
    users = run.embeddings("user")[0][:3]
    every = len(i_ids) + len(arrivals)
    got = grown.recommend(users, top=every, columns=["name"])  # every item but the known ones
    # reference: the user vectors and `embed`'s vectors of the arrivals, scored by hand
    new = run.embed_items(arrivals)
    _, uv, ub, meta = run.embeddings("user")
    scale, g = 1.0 / float(meta.get("temperature", 1.0)), float(meta.get("global_bias", 0.0))
    hand = (uv[:3] @ torch.tensor(np.stack(new["embedding"])).T * scale + torch.tensor(new["bias"].to_numpy())
            + ub[:3, None] + g).numpy()
    for r, user in enumerate(users):
        mine = got[(got["query_id"] == user) & got["item_id"].isin(arrivals["item_id"])].set_index("item_id")
        assert len(mine) == len(arrivals)  # no arrival is a known item of anyone
        np.testing.assert_allclose(mine.loc[arrivals["item_id"], "score"], hand[r], rtol=1e-5, atol=1e-5)
        assert mine["name"].tolist() == arrivals.set_index("item_id").loc[mine.index, "name"].tolist()  # from the rows
        # the run's own items keep their lists and scores
        old = run.recommend([user], top=20)
        kept = got[(got["query_id"] == user) & ~got["item_id"].isin(arrivals["item_id"])].head(20)
        assert kept["item_id"].tolist() == old["item_id"].tolist()
    # an arrival is asked about by its id, as any item is
    assert len(grown.similar([arrivals["item_id"].iloc[0]], top=3)) == 3
    # rows naming items of the run keep their trained vectors, with a warning; the run itself is unchanged
    with pytest.warns(UserWarning, match=r"2 of the 22 rows are items of this run already"):
        again = run.with_new_items(pd.concat([arrivals, pd.read_parquet(small_store / "items.parquet").head(2)]))
    assert len(again.embeddings("item")[0]) == len(i_ids) + len(arrivals)
    assert len(run.embeddings("item")[0]) == len(i_ids)
    with pytest.raises(TowersError, match="duplicate id"):
        run.with_new_items(pd.concat([arrivals, arrivals.head(1)]))
    # whole numbers given to a text-id run are its text ids: their columns still come from their rows
    numbered = run.with_new_items(arrivals.head(3).assign(item_id=[900001, 900002, 900003]))
    listed = numbered.recommend(users[:1], top=every, columns=["name"]).set_index("item_id")
    assert listed.loc[["900001", "900002", "900003"], "name"].tolist() == arrivals["name"].head(3).tolist()


@pytest.mark.slow
def test_cli_lists_new_items(basket_run, small_store, tmp_path, capsys):
    arrivals = pd.read_parquet(small_store / "new_items.parquet")
    out = tmp_path / "tonight.parquet"
    assert cli(["lists", str(basket_run), "--out", str(out), "--top", "5", "--new-items",
                str(small_store / "new_items.parquet"), "--only", f"department={arrivals['department'].iloc[0]}",
                "--columns", "name"]) == 0
    got = pd.read_parquet(out)
    want = towers.load(basket_run).with_new_items(arrivals).recommend(
        towers.load(basket_run).embeddings("user")[0], top=5, columns=["name"],
        keep=ItemFilter.from_dict({"only_values": {"department": [arrivals["department"].iloc[0]]}}))
    assert got["item_id"].tolist() == want["item_id"].tolist() and got["item_id"].isin(arrivals["item_id"]).any()


@pytest.mark.slow  # trains a tiny run with histories on first use
def test_recommend_rows_with_a_history_column_equal_recommend_history(tiny_runs):
    run = towers.load(tiny_runs.train(model={"history_length": 4}, training={"loss": "softmax", "negatives": 32}))
    item_ids = run.embeddings("item")[0]
    histories = [list(item_ids[[3, 40, 7]]), list(item_ids[[11]])]
    names = [e.name for e in run.bundle.query_encoders.encoders]
    rows = pd.DataFrame({**{n: pd.Series([None, None], dtype=object) for n in names},
                         "recent": ["|".join(h) for h in histories]})
    got = run.recommend_rows(rows, top=len(item_ids), history_column="recent", columns=["name"])  # every item
    for r, history in enumerate(histories):
        # outside reference: Run.recommend_history, an empty feature row with the same history
        expected = run.recommend_history(history, top=len(item_ids), columns=["name"])
        mine = got[got["query_id"] == f"row {r + 1}"]
        assert mine["item_id"].tolist() == expected["item_id"].tolist()
        assert mine["name"].tolist() == expected["name"].tolist()
        np.testing.assert_allclose(mine["score"], expected["score"], rtol=1e-5, atol=1e-5)
        assert not set(mine["item_id"]) & set(history)  # the history's items are left out


@pytest.mark.slow  # trains a tiny item_item run on first use
def test_item_item_runs_batch_and_feature_rows(tiny_runs, small_store, tmp_path):
    run = towers.load(tiny_runs.train(config="store_copurchase.yaml", model={"shared_tower": False, "temperature": 0.5},
                                      evaluation={"baseline": False}))
    rows = pd.read_parquet(small_store / "items.parquet").head(5)
    # outside reference: Run.similar on the same ids (the query side re-embedded gives the exported query vectors)
    got = run.similar_rows(rows, top=7)
    expected = run.similar(rows["item_id"], top=7)
    assert got["item_id"].tolist() == expected["item_id"].tolist()
    np.testing.assert_allclose(got["score"], expected["score"], rtol=1e-4, atol=1e-4)
    # the batch of an item_item run: each query item's "bought together" list as similar gives it, only the item
    # itself left out; the pairs seen together in training stay (they are what such a list is for)
    queries = run.embeddings("query")[0][:30]
    out = tmp_path / "pairs.parquet"
    run.write_lists(out, queries, top=5)
    written = pd.read_parquet(out)
    np.testing.assert_array_equal(written["item_id"], run.similar(queries, top=5)["item_id"])
    assert (written["item_id"] != written["query_id"]).all()
    train = run.pairs["train"]
    q_ids, i_ids = run.embeddings("query")[0], run.embeddings("item")[0]
    seen = set(zip(q_ids[train["query"].numpy()].tolist(), i_ids[train["candidate"].numpy()].tolist()))
    assert any(pair in seen for pair in zip(written["query_id"], written["item_id"]))


@pytest.mark.slow
def test_cli_feature_rows(basket_run, small_store, tmp_path, capsys):
    new_items = small_store / "new_items.parquet"
    out = tmp_path / "arrivals.csv"
    assert cli(["similar", str(basket_run), "--item-rows", str(new_items), "--top", "2", "--columns", "name",
                "--out", str(out)]) == 0
    got = pd.read_csv(out)
    arrivals = pd.read_parquet(new_items)
    expected = towers.load(basket_run).similar_rows(arrivals, top=2, columns=["name"])  # the Python API
    assert got["query_id"].tolist() == expected["query_id"].tolist() and list(got.columns)[-1] == "name"
    # ids of a CSV are kept as written there too (a new user's trial saw 0039602919 come back as 39602919)
    padded = tmp_path / "walk_ins_padded.csv"
    customers = pd.read_csv(small_store / "customers.csv")
    customers.head(2).assign(customer_id=["0039602919", "0000007919"]).to_csv(padded, index=False)
    assert cli(["recommend", str(basket_run), "--user-rows", str(padded), "--top", "2", "--out",
                str(tmp_path / "padded.parquet")]) == 0
    assert pd.read_parquet(tmp_path / "padded.parquet")["query_id"].unique().tolist() == ["0039602919", "0000007919"]
    users = tmp_path / "walk_ins.csv"
    pd.read_csv(small_store / "customers.csv").head(2).drop(columns=["customer_id"]).to_csv(users, index=False)
    assert cli(["recommend", str(basket_run), "--user-rows", str(users), "--top", "3"]) == 0
    printed = capsys.readouterr().out
    assert "row 1" in printed and "row 2" in printed
    assert cli(["recommend", str(basket_run), "--users", "1", "--history-column", "recent"]) == 2
    assert "use it with --user-rows" in capsys.readouterr().err


@pytest.mark.slow
def test_a_rewritten_item_table_is_read_again(basket_run, small_store, tmp_path):
    run = towers.load(basket_run)
    items = pd.read_parquet(small_store / "items.parquet")[["item_id", "name"]]
    path = tmp_path / "stock.parquet"
    user = run.embeddings("user")[0][:1]
    keep = ItemFilter(only_true=("in_stock",))
    items.assign(in_stock=True).to_parquet(path, index=False)
    first = run.recommend(user, top=3, keep=keep, item_table=path)["item_id"].tolist()
    items.assign(in_stock=~items["item_id"].isin(first)).to_parquet(path, index=False)  # tonight they sold out
    os.utime(path, ns=(os.stat(path).st_atime_ns, os.stat(path).st_mtime_ns + 10**9))
    again = run.recommend(user, top=3, keep=keep, item_table=path)["item_id"].tolist()
    assert not set(first) & set(again)  # common practice: a cache keyed by the file's size and time


def test_a_value_filter_that_matches_no_item_warns_with_the_values_present(shop_table):
    path, table = shop_table
    keep = ItemFilter.from_dict({"only_values": {"department": ["Garden"]}})  # the table says "garden"
    with pytest.warns(UserWarning, match=r"column 'department': no item has 'Garden' \(did you mean 'garden'\?\), so "
                                         r"nothing passes this filter; values present: 'garden', 'lighting', 'paint', "
                                         r"'tools'"):
        lists = item_lists(table["item_id"].to_numpy(), keep, (), path, "item_id", "no table")
    assert lists.allowed is not None and len(lists.allowed) == 0


def test_each_filter_value_that_matches_no_item_is_named_never_values_too(shop_table):
    # a never filter that matches nothing removes nothing: silent, archived items would be listed
    path, table = shop_table
    ids = table["item_id"].to_numpy()
    keep = ItemFilter.from_dict({"only_values": {"department": ["garden", "roofing"]},
                                 "never_values": {"brand": ["fernleaf", "Boltwright"]}})
    with pytest.warns(UserWarning) as caught:
        lists = item_lists(ids, keep, (), path, "item_id", "no table")
    said = [str(w.message) for w in caught]
    assert any("no item has 'roofing', so only the other values pass" in m for m in said), said
    assert any("no item has 'fernleaf' (did you mean 'Fernleaf'?), so the never filter removes nothing for it" in m
               for m in said), said
    want = (table["department"] == "garden") & (table["brand"] != "Boltwright")  # reference: pandas
    assert set(ids[lists.allowed.numpy()]) == set(table.loc[want, "item_id"])


@pytest.mark.parametrize("written", ["True", "TRUE", "true", "1"])
def test_a_boolean_column_is_filtered_by_true_however_it_is_written(shop_table, written):
    # a CSV of True/False shows 'True' in --columns: --never in_stock=True must then leave those items out
    path, table = shop_table
    ids = table["item_id"].to_numpy()
    for kind, want in (("never_values", ~table["in_stock"]), ("only_values", table["in_stock"])):
        lists = item_lists(ids, ItemFilter.from_dict({kind: {"in_stock": [written]}}), (), path, "item_id", "no table")
        assert set(ids[lists.allowed.numpy()]) == set(table.loc[want, "item_id"]), kind


def test_an_id_file_of_several_columns_is_refused_before_its_cells_are_read(tmp_path):
    # a trial gave `lists --users` the whole readers table: a warning about its 'NA' country cells came first
    from towers.runs.lists import read_id_file

    path = tmp_path / "readers.csv"
    path.write_text("reader_id,country,tier\nR-1,NA,gold\nR-2,DE,free\n")
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # no warning before the error
        with pytest.raises(TowersError, match=r"readers.csv: has 3 columns; a file of user ids holds one column"):
            read_id_file(path, "user")
    one = tmp_path / "ids.csv"
    one.write_text("reader_id\nR-1\nR-2\n")
    assert read_id_file(one, "user").tolist() == ["R-1", "R-2"]


def test_an_id_file_may_be_a_pipe(tmp_path):
    # a trial's `--never-ids <(grep ...)` was refused as "no such file": the shell hands over a pipe, not a file
    from towers.runs.lists import read_id_file

    read_end, write_end = os.pipe()
    os.write(write_end, b"SKU-7\n\nSKU-9\n")
    os.close(write_end)
    try:
        assert read_id_file(f"/dev/fd/{read_end}", "item").tolist() == ["SKU-7", "SKU-9"]
    finally:
        os.close(read_end)
    with pytest.raises(TowersError, match="no such file"):
        read_id_file(tmp_path, "item")  # a folder is no id file


def test_an_id_file_without_a_header_row_is_named(tmp_path):
    # a trial's --never-ids file of two product codes and no header let the first code into the list, silently:
    # pandas read it as the column name. A header shaped like the ids below it now gets a warning
    from towers.runs.lists import read_id_file

    codes = tmp_path / "never.csv"
    codes.write_text("FF-0199\nFF-0475\nFF-0012\n")
    with pytest.warns(UserWarning, match=r"never.csv: its header 'FF-0199' looks like one of the item ids"):
        assert read_id_file(codes, "item").tolist() == ["FF-0475", "FF-0012"]
    numbers = tmp_path / "readers.csv"
    numbers.write_text("10732\n10001\n")
    with pytest.warns(UserWarning, match="header row"):
        read_id_file(numbers, "user")
    named = tmp_path / "named.csv"
    named.write_text("recipe_id\nFF-0199\nFF-0475\n")
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # a real header: no warning
        assert read_id_file(named, "item").tolist() == ["FF-0199", "FF-0475"]


def test_feature_rows_of_a_side_the_run_has_no_table_for_name_that_side(small_store, tmp_path):
    # a trial's `recommend --user-rows` on a run without a users table was told "no feature table for that side"
    import yaml

    cfg = {"run": {"threads": 1}, "model": {"dim": 4, "hidden": [8]}, "training": {"epochs": 1, "batch_size": 512},
           "interactions": {"path": str(small_store / "orders.csv"), "query_column": "customer_id",
                            "candidate_column": "product_id"},
           "items": {"path": str(small_store / "items.parquet"), "id_column": "item_id",
                     "features": [{"name": "department", "kind": "categorical"}]},
           "evaluation": {"references": False, "baseline": False}, "report": {"enabled": False}}
    (tmp_path / "c.yaml").write_text(yaml.safe_dump(cfg))
    run = towers.load(towers.train(tmp_path / "c.yaml", tmp_path / "run")["out"])
    with pytest.raises(TowersError, match=r"this run was trained without a users table, so new users cannot be "
                                          r"embedded from feature rows; train with one \(users.path and users.features\)"):
        run.embed_users(pd.DataFrame({"customer_id": [1]}))
