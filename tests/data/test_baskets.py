"""Pairs derived from order exports and clickstreams (towers/data/baskets.py): counts against pandas and
an independent DuckDB query, the session window against brute force, whole baskets per side, cold
items, repeats counted, errors."""

from __future__ import annotations

from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import pytest

from towers import config as C
from towers.data.baskets import collapse_repeats, derive_pairs
from towers.data.prepare import prepare
from towers.errors import TowersError

ITEMS = [f"TR-{i:03d}" for i in range(40)]


def orders(seed: int = 0, n_orders: int = 120, big: int = 0) -> pd.DataFrame:
    """A small order export: 1-6 lines an order, a few repeated lines, distinct order times; `big` extra
    orders of 30 items each."""
    rng = np.random.default_rng(seed)
    size = np.r_[rng.integers(1, 7, n_orders), np.full(big, 30)]
    order = np.repeat(np.arange(len(size)) + 5000, size)
    item = np.concatenate([rng.choice(40, s, replace=s > 6) for s in size])  # small orders may repeat an item
    start = np.datetime64("2026-03-01T08:00:00")
    when = start + (rng.permutation(len(size)) * 3600).astype("timedelta64[s]")
    return pd.DataFrame({"order_id": order, "customer_id": 100 + order % 17, "product_id": np.array(ITEMS)[item],
                         "quantity": rng.integers(1, 4, len(order)), "ordered_at": when[order - 5000]})


def resolve(path: Path, **interactions) -> C.Config:
    ev = interactions.pop("evaluation", {})
    base = {"path": str(path), "candidate_column": "product_id", "group_column": "order_id", "pairs_from": "baskets"}
    return C.resolve({"run": {"mode": "item_item"}, "interactions": base | interactions, "evaluation": ev,
                      "training": {"progress": "plain"}}, path.parent)


def frame(d) -> pd.DataFrame:
    out = pd.DataFrame({"a": d.ids[d.query], "b": d.ids[d.candidate], "w": d.weight, "side": d.side})
    return out.sort_values(["side", "a", "b"]).reset_index(drop=True)


def pandas_pairs(df: pd.DataFrame, quantity: bool = False) -> pd.DataFrame:
    """Reference: a pandas self-join on the order id, one count per order (or min of summed quantities)."""
    lines = df.groupby(["order_id", "product_id"], as_index=False).quantity.sum()
    j = lines.merge(lines, on="order_id")
    j = j[j.product_id_x != j.product_id_y]
    j["w"] = np.minimum(j.quantity_x, j.quantity_y) if quantity else 1
    out = j.groupby(["product_id_x", "product_id_y"], as_index=False).w.sum()
    return out.set_axis(["a", "b", "w"], axis=1).sort_values(["a", "b"]).reset_index(drop=True)


@pytest.fixture(scope="module")
def export(tmp_path_factory):
    folder = tmp_path_factory.mktemp("orders")
    df = orders()
    df.to_csv(folder / "orders.csv", index=False)
    df.to_parquet(folder / "orders.parquet")
    return folder, df


@pytest.mark.parametrize("suffix", ["csv", "parquet"])
@pytest.mark.parametrize("quantity", [False, True])
def test_basket_counts_equal_pandas_and_duckdb(export, suffix, quantity):
    folder, df = export
    path = folder / f"orders.{suffix}"
    got = frame(derive_pairs(resolve(path, quantity_column="quantity" if quantity else None), split=False))
    assert (got.side == 0).all()
    ref = pandas_pairs(df, quantity)
    pd.testing.assert_frame_equal(got[["a", "b", "w"]], ref, check_dtype=False)  # reference: pandas self-join
    # reference: DuckDB SQL written here, independently: distinct lines per order, then a self-join
    weight = "sum(least(x.q, y.q))" if quantity else "count(*)"
    sql = duckdb.sql(f"""
        WITH l AS (SELECT order_id, product_id, sum(quantity) AS q FROM read_parquet('{folder / "orders.parquet"}')
                   GROUP BY ALL)
        SELECT x.product_id AS a, y.product_id AS b, {weight} AS w FROM l x, l y
        WHERE x.order_id = y.order_id AND x.product_id != y.product_id GROUP BY ALL ORDER BY a, b""").df()
    pd.testing.assert_frame_equal(got[["a", "b", "w"]], sql, check_dtype=False)
    assert (got.a != got.b).all()


def test_big_baskets_keep_a_sample_of_cap_items(tmp_path):
    df = orders(seed=1, n_orders=60, big=3)
    df.to_csv(tmp_path / "orders.csv", index=False)
    got = frame(derive_pairs(resolve(tmp_path / "orders.csv", group_item_cap=8), split=False))
    small = df[df.order_id.map(df.groupby("order_id").product_id.nunique()) <= 8]
    ref = pandas_pairs(small)
    # what the big orders add, by difference from the pandas count of the small ones: 8 x 7 each
    merged = got.merge(ref, on=["a", "b"], how="left", suffixes=("", "_small")).fillna({"w_small": 0})
    extra = merged.w - merged.w_small
    assert (extra >= 0).all() and extra.sum() == 3 * 8 * 7  # from memory: n items give n (n - 1) ordered pairs
    uncapped = frame(derive_pairs(resolve(tmp_path / "orders.csv", group_item_cap=30), split=False))
    pd.testing.assert_frame_equal(uncapped[["a", "b", "w"]], pandas_pairs(df), check_dtype=False)  # pandas


def views(seed: int = 0) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    n = 400
    session = rng.integers(0, 40, n)
    minutes = rng.uniform(0, 120, n).round(1)  # sessions up to two hours; repeated views of an item happen
    return pd.DataFrame({"session_id": np.char.add("S", session.astype(str)), "product_id": np.array(ITEMS)[
        rng.integers(0, 15, n)], "viewed_at": np.datetime64("2026-05-01T09:00:00") + (minutes * 60).astype(
            "timedelta64[s]")})


@pytest.mark.parametrize("window", [10.0, 45.0])
def test_session_window_against_brute_force(tmp_path, window):
    df = views()
    df.to_csv(tmp_path / "views.csv", index=False)
    cfg = resolve(tmp_path / "views.csv", pairs_from="sessions", group_column="session_id", time_column="viewed_at",
                  session_minutes=window)
    got = frame(derive_pairs(cfg, split=False))
    # reference: brute force in numpy, every two views of each session compared
    seen = set()
    t = df.viewed_at.to_numpy().astype("datetime64[s]").astype(np.int64)
    for s in df.session_id.unique():
        rows = np.flatnonzero(df.session_id.to_numpy() == s)
        close = np.abs(t[rows][:, None] - t[rows][None, :]) <= window * 60
        items = df.product_id.to_numpy()[rows]
        for i, j in zip(*np.nonzero(close)):
            if items[i] != items[j]:
                seen.add((s, items[i], items[j]))
    ref = pd.Series([(a, b) for _, a, b in seen]).value_counts()
    assert dict(zip(zip(got.a, got.b), got.w)) == {k: float(v) for k, v in ref.items()}


def test_time_split_places_whole_baskets_and_drops_known_pairs(export):
    folder, df = export
    ev = {"split": "time", "test_fraction": 0.2, "validation_fraction": 0.25}
    d = derive_pairs(resolve(folder / "orders.csv", time_column="ordered_at", evaluation=ev), split=True)
    got = frame(d)
    # reference: pandas, orders sorted by time; the latest round(0.2 n) test, the next round(0.25 rest) validation
    first = df.groupby("order_id").ordered_at.min().sort_values()
    n = len(first)
    n_test = round(0.2 * n)
    n_valid = round(0.25 * (n - n_test))
    side = pd.Series(0, index=first.index)
    side.iloc[n - n_test:] = 2
    side.iloc[n - n_test - n_valid:n - n_test] = 1
    per_side = [pandas_pairs(df[df.order_id.map(side) == s]).assign(side=s) for s in range(3)]
    allp = pd.concat(per_side)
    earliest = allp.groupby(["a", "b"]).side.transform("min")
    ref = allp[allp.side == earliest].sort_values(["side", "a", "b"]).reset_index(drop=True)
    pd.testing.assert_frame_equal(got, ref[["a", "b", "w", "side"]], check_dtype=False)
    dropped = int((allp.side != earliest).sum())
    assert dropped > 0 and any(f"dropped {int(((allp.side != earliest) & (allp.side == 2)).sum()):,} test" in note
                               for note in d.notes)
    # no held-out pair is also a training pair (set algebra)
    train = set(zip(got.a[got.side == 0], got.b[got.side == 0]))
    assert not train & set(zip(got.a[got.side > 0], got.b[got.side > 0]))


@pytest.mark.parametrize("quantity", [False, True])
def test_min_pair_count_leaves_out_rare_training_pairs_only(export, quantity):
    folder, df = export
    ev = {"split": "time", "test_fraction": 0.2, "validation_fraction": 0.25}
    extra = {"time_column": "ordered_at", "quantity_column": "quantity" if quantity else None, "evaluation": ev}
    full = frame(derive_pairs(resolve(folder / "orders.csv", **extra), split=True))
    d = derive_pairs(resolve(folder / "orders.csv", min_pair_count=3, **extra), split=True)
    got = frame(d)
    # reference: pandas, the number of training orders holding both items of each training pair
    first = df.groupby("order_id").ordered_at.min().sort_values()
    n_train = len(first) - round(0.2 * len(first))
    n_train -= round(0.25 * n_train)
    training = df[df.order_id.isin(first.index[:n_train])]
    orders_per_pair = pandas_pairs(training.assign(quantity=1))  # a count of 1 per order: orders holding the pair
    common = orders_per_pair[orders_per_pair.w >= 3][["a", "b"]]
    want_train = full[full.side == 0].merge(common, on=["a", "b"]).reset_index(drop=True)
    pd.testing.assert_frame_equal(got[got.side == 0].reset_index(drop=True), want_train, check_dtype=False)
    pd.testing.assert_frame_equal(got[got.side > 0].reset_index(drop=True), full[full.side > 0].reset_index(drop=True))
    left_out = int((full.side == 0).sum() - len(want_train))
    assert left_out > 0 and any(f"left out {left_out:,} training pairs" in note for note in d.notes)


def test_random_split_counts_baskets_and_is_seeded(export):
    folder, df = export
    cfg = resolve(folder / "orders.csv", evaluation={"test_fraction": 0.2, "validation_fraction": 0.1})
    a, b = derive_pairs(cfg, split=True), derive_pairs(cfg, split=True)
    pd.testing.assert_frame_equal(frame(a), frame(b))
    n = df.order_id.nunique()
    n_test = round(0.2 * n)
    expect = f"(training {n - n_test - round(0.1 * (n - n_test))}, validation {round(0.1 * (n - n_test))}, test {n_test})"
    assert expect in a.notes[0]  # from memory: the fractions count units, test first (README, Evaluation protocol)
    # each pair of the export is kept once, on one side (pandas self-join over all orders)
    got = frame(a)
    assert not got.duplicated(["a", "b"]).any()
    assert set(zip(got.a, got.b)) == set(zip(*pandas_pairs(df)[["a", "b"]].to_numpy().T))
    train = set(zip(got.a[got.side == 0], got.b[got.side == 0]))
    assert len(train) and not train & set(zip(got.a[got.side > 0], got.b[got.side > 0]))


def test_cold_items_pairs_go_to_the_cold_slice_only(export, tmp_path):
    folder, df = export
    items = pd.DataFrame({"item_id": ITEMS, "shelf": np.arange(40) % 5})
    items.to_csv(tmp_path / "items.csv", index=False)
    cfg = C.resolve({"run": {"mode": "item_item"},
                     "interactions": {"path": str(folder / "orders.csv"), "candidate_column": "product_id",
                                      "group_column": "order_id", "pairs_from": "baskets"},
                     "items": {"path": str(tmp_path / "items.csv"), "id_column": "item_id",
                               "features": [{"name": "shelf", "kind": "categorical"}]},
                     "evaluation": {"cold_item_fraction": 0.2}, "training": {"progress": "plain"}}, tmp_path)
    data = prepare(cfg)
    cold = data.cold_items.numpy()
    assert cold.sum() == round(0.2 * df.product_id.nunique())  # from memory: round(share x items in the log)
    for part in (data.train, data.valid, data.test):
        assert not cold[part.query.numpy()].any() and not cold[part.candidate.numpy()].any()
    assert len(data.cold_test) and cold[data.cold_test.candidate.numpy()].all()
    assert not cold[data.cold_test.query.numpy()].any()
    # the cold slice holds each pair once: its pairs are the pandas pairs with one cold item as candidate
    ids = data.candidates.ids
    ref = pandas_pairs(df)
    ref = ref[ref.b.isin(ids[cold]) & ~ref.a.isin(ids[cold])]
    got = set(zip(ids[data.cold_test.query.numpy()], ids[data.cold_test.candidate.numpy()]))
    assert got == set(zip(ref.a, ref.b)) and len(got) == len(data.cold_test)


def test_count_repeats_equals_pandas_groupby(export):
    folder, df = export
    cfg = C.resolve({"interactions": {"path": str(folder / "orders.csv"), "query_column": "customer_id",
                                      "candidate_column": "product_id", "time_column": "ordered_at",
                                      "count_repeats": True}}, folder)
    r = collapse_repeats(cfg)
    got = pd.DataFrame({"c": r.query_ids[r.query], "p": r.candidate_ids[r.candidate], "w": r.weight,
                        "t": r.time.astype("datetime64[ns]")})
    ref = df.groupby(["customer_id", "product_id"]).agg(w=("order_id", "size"), t=("ordered_at", "max")).reset_index()
    ref.columns = ["c", "p", "w", "t"]  # reference: pandas groupby, the count and the latest time
    pd.testing.assert_frame_equal(got, ref, check_dtype=False)


def test_count_repeats_keeps_orders_whole_in_the_split(export):
    folder, df = export
    cfg = C.resolve({"interactions": {"path": str(folder / "orders.csv"), "query_column": "customer_id",
                                      "candidate_column": "product_id", "group_column": "order_id",
                                      "quantity_column": "quantity", "count_repeats": True},
                     "evaluation": {"test_fraction": 0.3}, "training": {"progress": "plain"}}, folder)
    data = prepare(cfg)
    side = {}
    for s, part in enumerate((data.train, data.valid, data.test)):
        for q, c in zip(data.queries.ids[part.query.numpy()], data.candidates.ids[part.candidate.numpy()]):
            side[(q, c)] = s
    assert len(side) == len(data.train) + len(data.valid) + len(data.test)  # one row per pair
    df = df.assign(side=[side[(q, c)] for q, c in zip(df.customer_id, df.product_id)])
    assert df.groupby("order_id").side.nunique().eq(1).all()  # reference: pandas groupby, one side per order
    assert {0, 2} <= set(side.values())
    total = df.groupby(["customer_id", "product_id"]).quantity.sum()  # reference: pandas, summed quantity
    w = pd.Series(data.train.weight.numpy(), index=pd.MultiIndex.from_arrays(
        [data.queries.ids[data.train.query.numpy()], data.candidates.ids[data.train.candidate.numpy()]]))
    assert np.allclose(w.to_numpy(), total.loc[w.index].to_numpy())


def test_bad_rows_name_file_column_and_row(tmp_path):
    df = orders(n_orders=10)
    bad = df.astype({"order_id": object, "quantity": object})
    bad.loc[6, "order_id"] = None
    bad.to_csv(tmp_path / "orders.csv", index=False)
    with pytest.raises(TowersError, match=r"orders.csv, column 'order_id', row 7: missing basket"):
        derive_pairs(resolve(tmp_path / "orders.csv"), split=False)
    bad = df.astype({"quantity": object})
    bad.loc[3, "quantity"] = "two"
    bad.to_csv(tmp_path / "q.csv", index=False)
    with pytest.raises(TowersError, match=r"q.csv, column 'quantity', row 4: 'two' is not a number"):
        derive_pairs(resolve(tmp_path / "q.csv", quantity_column="quantity"), split=False)
    with pytest.raises(TowersError, match=r"column 'basket'.*no such column"):
        derive_pairs(resolve(tmp_path / "q.csv", group_column="basket"), split=False)
    returns = df.copy()
    returns.loc[5, "quantity"] = -2  # a refund line of an order export
    returns.to_csv(tmp_path / "returns.csv", index=False)
    with pytest.raises(TowersError, match=r"returns.csv, column 'quantity', row 6: negative or infinite quantity -2.*"
                                          r"a return or refund line: leave such lines out of the export"):
        derive_pairs(resolve(tmp_path / "returns.csv", quantity_column="quantity"), split=False)


@pytest.mark.parametrize("suffix", ["csv", "parquet"])
def test_a_folder_of_daily_exports_gives_the_pairs_of_one_export(export, tmp_path, suffix):
    """Reference: pandas' self-join of the whole export (pandas_pairs), as for one file."""
    _, df = export
    days = tmp_path / "days"
    days.mkdir()
    cut = df.order_id.isin(df.order_id.unique()[:50])  # whole orders per file, as a daily export has them
    for name, part in (("a", df[cut]), ("b", df[~cut])):
        part.to_csv(days / f"{name}.csv", index=False) if suffix == "csv" else part.to_parquet(days / f"{name}.parquet")
    got = frame(derive_pairs(resolve(days), split=False))
    pd.testing.assert_frame_equal(got[["a", "b", "w"]], pandas_pairs(df), check_dtype=False)


def test_a_bad_row_in_the_second_file_of_a_folder_names_that_file_and_its_row(tmp_path):
    df = orders(n_orders=10)
    days = tmp_path / "days"
    days.mkdir()
    df.iloc[:20].to_csv(days / "a.csv", index=False)
    bad = df.iloc[20:].reset_index(drop=True).astype({"order_id": object})
    bad.loc[4, "order_id"] = None
    bad.to_csv(days / "b.csv", index=False)
    with pytest.raises(TowersError, match=r"days/b\.csv, column 'order_id', row 5: missing basket"):
        derive_pairs(resolve(days), split=False)


def test_a_file_of_a_folder_with_another_header_is_named(tmp_path):
    # a day's export with a renamed column: named with the column, not DuckDB's "schema mismatch between globbed files"
    df = orders(n_orders=10)
    days = tmp_path / "days"
    days.mkdir()
    df.iloc[:20].to_csv(days / "a.csv", index=False)
    df.iloc[20:].rename(columns={"product_id": "sku"}).to_csv(days / "b.csv", index=False)
    with pytest.raises(TowersError, match=r"days/b\.csv, column 'product_id': no such column"):
        derive_pairs(resolve(days), split=False)


@pytest.mark.parametrize("change, message", [
    ({"run": {"mode": "user_item"}}, "expected rows in user_item mode"),
    ({"interactions": {"group_column": None}}, "'interactions.group_column' is missing"),
    ({"interactions": {"pairs_from": "sessions"}}, "'interactions.time_column' is missing"),
    ({"interactions": {"query_column": "customer_id"}}, "'interactions.query_column'.*expected it empty"),
    ({"interactions": {"pairs_from": "rows", "query_column": "a", "quantity_column": "quantity"}},
     "'interactions.quantity_column'"),
])
def test_config_rules(change, message):
    raw = {"run": {"mode": "item_item"}, "interactions": {"path": "orders.csv", "candidate_column": "product_id",
                                                          "group_column": "order_id", "pairs_from": "baskets"}}
    for section, keys in change.items():
        raw[section] = raw.get(section, {}) | keys
    with pytest.raises(TowersError, match=message):
        C.resolve(raw, Path("."))


SHELF = [{"name": "shelf", "kind": "categorical"}]


def with_items(folder: Path, log: str, features=SHELF, **interactions) -> C.Config:
    """A run over folder/log (an order export, user -> item unless pairs are derived from baskets) with the item
    table folder/items.csv."""
    mode = "item_item" if interactions.get("pairs_from") == "baskets" else "user_item"
    return C.resolve({"run": {"mode": mode},
                      "interactions": {"path": str(folder / log), "candidate_column": "product_id", **interactions},
                      "items": {"path": str(folder / "items.csv"), "id_column": "item_id", "features": features},
                      "training": {"progress": "plain"}}, folder)


@pytest.mark.parametrize("derived", [{"pairs_from": "baskets"}, {"pairs_from": "rows", "count_repeats": True}])
def test_an_item_without_a_feature_row_is_named_by_id_not_by_a_derived_row(tmp_path, derived):
    # counted pairs are not the export's rows, so the error names the column and the id (which a user can
    # search the export for), not a row number the file does not have
    df = orders(n_orders=30)
    df.loc[17, "product_id"] = "P9999"
    df.to_csv(tmp_path / "orders.csv", index=False)
    items = pd.DataFrame({"item_id": ITEMS, "shelf": [f"s{i % 3}" for i in range(len(ITEMS))]})
    items.to_csv(tmp_path / "items.csv", index=False)
    mode = {"query_column": "customer_id"} if derived["pairs_from"] == "rows" else {}
    cfg = with_items(tmp_path, "orders.csv", group_column="order_id", **derived, **mode)
    with pytest.raises(TowersError, match=r"orders\.csv, column 'product_id': id 'P9999' has no row in "):
        prepare(cfg)


def test_a_csv_export_with_a_wrong_header_gets_the_usual_one_line_errors(tmp_path):
    df = orders(n_orders=10)
    df.to_csv(tmp_path / "orders.csv", index=False)
    with pytest.raises(TowersError, match=r"orders\.csv, column 'qty': no such column; did you mean 'quantity'\?"):
        derive_pairs(resolve(tmp_path / "orders.csv", quantity_column="qty"), split=False)
    (tmp_path / "empty.csv").write_text("")
    with pytest.raises(TowersError, match=r"empty\.csv: the file is empty; it needs a header row"):
        derive_pairs(resolve(tmp_path / "empty.csv", quantity_column="quantity"), split=False)
    df.to_csv(tmp_path / "semi.csv", index=False, sep=";")
    with pytest.raises(TowersError, match=r"semi\.csv, column 'order_id': no such column; the header reads as one "
                                          r"column, .*: the file looks ';'-separated; save it with commas"):
        derive_pairs(resolve(tmp_path / "semi.csv", quantity_column="quantity"), split=False)


def test_an_id_without_a_feature_row_in_a_folder_log_is_named_by_id(tmp_path):
    # the rows of a folder's files one after another are no one file's rows: the error names the id
    (tmp_path / "days").mkdir()
    df = orders(n_orders=20)
    df.iloc[:40].to_csv(tmp_path / "days" / "a.csv", index=False)
    late = df.iloc[40:].copy()
    late.iloc[3, late.columns.get_loc("product_id")] = "P9999"
    late.to_csv(tmp_path / "days" / "b.csv", index=False)
    pd.DataFrame({"item_id": ITEMS, "shelf": "s"}).to_csv(tmp_path / "items.csv", index=False)
    cfg = with_items(tmp_path, "days", query_column="customer_id")
    with pytest.raises(TowersError, match=r"days, column 'product_id': id 'P9999' has no row in "):
        prepare(cfg)


def test_features_with_one_value_in_every_row_are_named_in_a_warning(tmp_path):
    df = orders(n_orders=20)
    df.to_csv(tmp_path / "orders.csv", index=False)
    items = pd.DataFrame({"item_id": ITEMS, "shelf": "s", "tags": "garden|tools",
                          "aisle": [f"a{i % 4}" for i in range(len(ITEMS))]})
    items.to_csv(tmp_path / "items.csv", index=False)

    def notes(features):
        cfg = with_items(tmp_path, "orders.csv", features, query_column="customer_id")
        return [n for n in prepare(cfg).notes if "one value in every row" in n]

    shelf, tags = {"name": "shelf", "kind": "categorical"}, {"name": "tags", "kind": "tokens"}
    aisle = {"name": "aisle", "kind": "categorical"}
    assert notes([shelf, tags]) == [f"warning: {tmp_path / 'items.csv'}: every feature of items ('shelf', 'tags') has "
                                    "one value in every row, so new items all get one vector and are ranked alike; "
                                    "check the table"]
    assert notes([shelf, aisle]) == [f"warning: {tmp_path / 'items.csv'}: items.features 'shelf': one value in every "
                                     "row, so it tells no two items apart; check the column or drop it"]
    assert notes([aisle]) == []
