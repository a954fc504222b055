"""Tests for the fictional demo store generator (towers.synthetic.demo_store) at small sizes."""

import hashlib

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from towers.errors import TowersError
from towers.search.scorer import FORMULA
from towers.synthetic.demo_store import STORE_NAME, generate_store, main

SMALL = dict(n_items=300, n_customers=400, n_new_items=60)
RANK, DESC = 8, 16

FILES = {
    "items": "items.parquet",
    "new_items": "new_items.parquet",
    "customers": "customers.csv",
    "baskets": "baskets.parquet",
    "ratings": "ratings.csv",
    "co_purchases": "co_purchases.parquet",
    "orders": "orders.csv",
    "views": "views.csv",
    "truth_customer_vectors": "truth/customer_vectors.parquet",
    "truth_item_vectors": "truth/item_vectors.parquet",
    "truth_rating_customer_vectors": "truth/rating_customer_vectors.parquet",
    "truth_rating_item_vectors": "truth/rating_item_vectors.parquet",
    "truth_item_feature_vectors": "truth/item_feature_vectors.parquet",
}
ITEM_SCHEMA = pa.schema([
    ("item_id", pa.string()), ("name", pa.string()), ("department", pa.string()),
    ("brand", pa.string()), ("price", pa.float64()), ("tags", pa.list_(pa.string())),
    ("description_vector", pa.list_(pa.float32())), ("in_stock", pa.bool_()),
])


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    out = tmp_path_factory.mktemp("store")
    return out, generate_store(out, seed=7, **SMALL)


@pytest.fixture(scope="module")
def tables(store):
    _, paths = store
    t = {k: pq.read_table(p) for k, p in paths.items() if p.suffix == ".parquet"}
    t["customers"] = pd.read_csv(paths["customers"])
    t["ratings"] = pd.read_csv(paths["ratings"])
    t["orders"] = pd.read_csv(paths["orders"], parse_dates=["ordered_at"])
    t["views"] = pd.read_csv(paths["views"], parse_dates=["viewed_at"])
    return t


def _vectors(table):
    ids = table["id"].to_pylist()
    emb = np.stack(table["embedding"].to_numpy(zero_copy_only=False)).astype(np.float64)
    return ids, emb, table["bias"].to_numpy().astype(np.float64)


def _digest(paths):
    return {k: hashlib.sha256(p.read_bytes()).hexdigest() for k, p in paths.items()}


def test_every_file_written_where_promised(store):
    out, paths = store
    assert set(paths) == set(FILES)
    for name, rel in FILES.items():
        assert paths[name] == out / rel and paths[name].is_file()
    # Atomic writes must leave no temporary files behind.
    assert not [p for p in out.rglob("*") if ".tmp-" in p.name]
    assert "Hardware" in STORE_NAME


def test_item_tables_schema_and_content(tables):
    for key in ("items", "new_items"):
        t = tables[key]
        assert t.schema.remove_metadata() == ITEM_SCHEMA
        df = t.to_pandas()
        assert df.item_id.is_unique
        assert df.department.nunique() <= 8 and df.brand.notna().all()
        assert df.tags.map(len).between(1, 5).all()
        assert (df.description_vector.map(len) == DESC).all()
        assert df.name.str.startswith(tuple(df.brand.unique())).all()
    items = tables["items"].to_pandas()
    assert len(items) == SMALL["n_items"] and len(tables["new_items"]) == SMALL["n_new_items"]
    assert items.department.nunique() == 8
    assert 0.0 < items.price.isna().mean() < 0.08 and (items.price.dropna() > 0).all()
    vocab = {t for ts in items.tags for t in ts}
    assert 30 <= len(vocab) <= 60
    # Brands live mostly in one or two departments.
    top2 = items.groupby("brand").department.agg(
        lambda s: s.value_counts(normalize=True).iloc[:2].sum())
    assert top2.median() >= 0.8


def test_new_item_ids_disjoint_from_catalog(tables):
    assert not set(tables["items"]["item_id"].to_pylist()) & set(
        tables["new_items"]["item_id"].to_pylist())


def test_customers_csv(tables):
    c = tables["customers"]
    assert list(c.columns) == ["customer_id", "age_band", "neighbourhood", "household_size",
                               "has_garden", "member_since"]
    assert len(c) == SMALL["n_customers"] and c.customer_id.is_unique
    assert c.customer_id.dtype == np.int64
    assert set(c.age_band) <= {"18-29", "30-44", "45-59", "60+"}
    assert 5 <= c.neighbourhood.nunique() <= 10
    assert c.household_size.between(1, 6).all()
    assert set(c.has_garden) == {"yes", "no"}
    missing = c.member_since.isna().mean()
    assert 0.0 < missing < 0.1
    years = c.member_since.dropna()
    assert (years == years.round()).all() and years.between(2000, 2026).all()


def test_baskets_schema_volume_and_ids(tables):
    b = tables["baskets"]
    assert b.schema.remove_metadata() == pa.schema([
        ("customer_id", pa.int64()), ("item_id", pa.string()), ("quantity", pa.int64()),
        ("purchased_at", pa.timestamp("ms"))])
    df = b.to_pandas()
    # About 31 lines per customer at any size (100k-150k at the default 4000 customers).
    assert 25 * SMALL["n_customers"] <= len(df) <= 40 * SMALL["n_customers"]
    assert set(df.customer_id) <= set(tables["customers"].customer_id)
    assert set(df.item_id) <= set(tables["items"]["item_id"].to_pylist())
    assert (df.quantity >= 1).all() and (df.quantity == 1).mean() > 0.5
    assert df.purchased_at.dt.year.eq(2026).all()
    # Heavy-tailed activity: the busiest tenth of customers buy far more than a tenth.
    per_c = df.groupby("customer_id").size().sort_values(ascending=False)
    assert per_c.iloc[: len(per_c) // 10].sum() / per_c.sum() > 0.25


def test_popularity_is_skewed(tables):
    counts = tables["baskets"].to_pandas().item_id.value_counts()
    counts = counts.reindex(tables["items"]["item_id"].to_pylist(), fill_value=0)
    top = np.sort(counts.to_numpy())[::-1][: len(counts) // 10]
    assert top.sum() / counts.sum() > 0.25


def test_outdoor_departments_peak_in_spring_and_summer(tables):
    b = tables["baskets"].to_pandas().merge(
        tables["items"].select(["item_id", "department"]).to_pandas(), on="item_id")
    outdoor = b.department.isin(["Garden", "Outdoor Living"])
    month = b.purchased_at.dt.month
    assert outdoor[month.isin([5, 6, 7])].mean() > 1.3 * outdoor[month.isin([11, 12, 1])].mean()


def test_ratings_csv(tables):
    r = tables["ratings"]
    assert list(r.columns) == ["customer_id", "item_id", "stars", "rated_at"]
    n_lines = len(tables["baskets"])
    assert 0.18 < len(r) / n_lines < 0.32
    assert r.stars.between(1, 5).all() and r.stars.nunique() >= 4
    assert set(r.customer_id) <= set(tables["customers"].customer_id)
    assert set(r.item_id) <= set(tables["items"]["item_id"].to_pylist())
    dates = pd.to_datetime(r.rated_at, format="%Y-%m-%d")
    assert dates.min() >= pd.Timestamp("2026-01-01")
    # Every rating refers to a bought (customer, item) on or before the rating day.
    bought = tables["baskets"].to_pandas().groupby(["customer_id", "item_id"]).purchased_at.min()
    first = bought.reindex(pd.MultiIndex.from_frame(r[["customer_id", "item_id"]]))
    assert first.notna().all() and (first.dt.normalize().to_numpy() <= dates.to_numpy()).all()


def test_co_purchases_match_baskets(tables):
    co = tables["co_purchases"]
    assert co.schema.remove_metadata() == pa.schema([
        ("item_a", pa.string()), ("item_b", pa.string()), ("times", pa.int64())])
    co = co.to_pandas()
    assert (co.item_a != co.item_b).all() and (co.times >= 1).all()
    ids = set(tables["items"]["item_id"].to_pylist())
    assert set(co.item_a) <= ids and set(co.item_b) <= ids
    # Both directions, with the same count.
    back = co.rename(columns={"item_a": "item_b", "item_b": "item_a"})
    both = co.merge(back, on=["item_a", "item_b"], suffixes=("", "_back"))
    assert len(both) == len(co) and (both.times == both.times_back).all()
    # Recount independently: a basket is one customer's lines at one timestamp.
    b = tables["baskets"].to_pandas()[["customer_id", "purchased_at", "item_id"]].drop_duplicates()
    pairs = b.merge(b, on=["customer_id", "purchased_at"])
    pairs = pairs[pairs.item_id_x != pairs.item_id_y]
    recount = pairs.groupby(["item_id_x", "item_id_y"]).size().rename("n").reset_index()
    recount.columns = ["item_a", "item_b", "n"]
    check = co.merge(recount, on=["item_a", "item_b"], how="outer")
    assert check.n.notna().all() and check.times.notna().all()
    assert (check.n == check.times).all()


def test_orders_export_is_the_baskets(tables):
    o = tables["orders"]
    assert list(o.columns) == ["order_id", "customer_id", "product_id", "quantity", "price", "ordered_at"]
    # the same lines as baskets.parquet: an order is one customer's lines at one time (pandas merge)
    b = tables["baskets"].to_pandas().rename(columns={"item_id": "product_id", "purchased_at": "ordered_at"})
    both = o.merge(b, on=["customer_id", "product_id", "ordered_at"], suffixes=("", "_b"), how="outer", indicator=True)
    assert (both["_merge"] == "both").all() and (both.quantity == both.quantity_b).all()
    per_order = o.groupby("order_id")[["customer_id", "ordered_at"]].nunique()
    assert (per_order == 1).all().all()
    assert o.groupby(["customer_id", "ordered_at"]).order_id.nunique().eq(1).all()
    # order numbers count up with time; prices are the shelf prices, present on every line
    first = o.groupby("order_id").ordered_at.first().sort_index()
    assert first.is_monotonic_increasing
    shelf = tables["items"].to_pandas().set_index("item_id").price
    known = shelf.reindex(o.product_id).to_numpy()
    assert o.price.notna().all() and np.allclose(o.price[~np.isnan(known)], known[~np.isnan(known)])


def test_views_are_sessions_before_orders(tables):
    v, o = tables["views"], tables["orders"]
    assert list(v.columns) == ["session_id", "customer_id", "product_id", "viewed_at"]
    assert v.groupby("session_id").customer_id.nunique().eq(1).all()
    span = v.groupby("session_id").viewed_at.agg(lambda t: (t.max() - t.min()).total_seconds() / 60)
    assert span.max() <= 25.0 and span.median() > 1.0  # a session spans minutes (datetime arithmetic)
    # about half the orders were browsed first, and most bought lines of those orders were viewed
    assert 0.4 < v.session_id.nunique() / o.order_id.nunique() < 0.7
    seen = v.merge(o, on=["customer_id", "product_id"])
    gap = (seen.ordered_at - seen.viewed_at).dt.total_seconds() / 60
    near = seen[(gap > 0) & (gap <= 26)].drop_duplicates(["session_id", "product_id", "viewed_at"])
    assert 0.3 < len(near) / len(v) < 0.8  # the rest are views of items not bought (pandas datetime arithmetic)
    assert v.product_id.isin(tables["items"]["item_id"].to_pylist()).all()


def test_stock_flags(tables):
    for key in ("items", "new_items"):
        stock = tables[key]["in_stock"].to_numpy(zero_copy_only=False)
        assert stock.dtype == bool and 0.8 < stock.mean() < 1.0


def test_truth_files_layout_and_coverage(tables):
    cust_ids = set(tables["customers"].customer_id)
    item_ids = set(tables["items"]["item_id"].to_pylist()) | set(
        tables["new_items"]["item_id"].to_pylist())
    for name, id_type, ids in (
            ("truth_customer_vectors", pa.int64(), cust_ids),
            ("truth_rating_customer_vectors", pa.int64(), cust_ids),
            ("truth_item_vectors", pa.string(), item_ids),
            ("truth_rating_item_vectors", pa.string(), item_ids),
            ("truth_item_feature_vectors", pa.string(), item_ids)):
        t = tables[name]
        assert t.schema.remove_metadata() == pa.schema([
            ("id", id_type), ("embedding", pa.list_(pa.float32(), RANK)),
            ("bias", pa.float32())])
        assert t.schema.metadata[b"k"] == str(RANK).encode()
        # the same layout and score metadata as a run's exported embeddings, so the oracle reads them alike
        assert t.schema.metadata[b"score"] == FORMULA.encode() and t.schema.metadata[b"model"] == b"planted truth"
        assert set(t["id"].to_pylist()) == ids and t.num_rows == len(ids)
        _, emb, bias = _vectors(t)
        assert np.isfinite(emb).all() and np.isfinite(bias).all()
        if "customer" in name:
            assert (bias == 0).all()
    # Rating truth = (s * u, v, a + s * b) with one positive s for everybody.
    _, u, _ = _vectors(tables["truth_customer_vectors"])
    _, ru, _ = _vectors(tables["truth_rating_customer_vectors"])
    _, v, b = _vectors(tables["truth_item_vectors"])
    _, rv, rb = _vectors(tables["truth_rating_item_vectors"])
    s = np.median(ru / u)
    assert s > 0
    np.testing.assert_allclose(ru, s * u, rtol=1e-5, atol=1e-6)
    np.testing.assert_array_equal(rv, v)
    a = np.median(rb - s * b)
    np.testing.assert_allclose(rb, a + s * b, rtol=1e-5, atol=1e-5)


def test_stars_follow_rating_truth(tables):
    # Reference: the star rule in towers/synthetic/demo_store.py's module docstring, stars =
    # clip(round(u'.v' + b' + noise), 1, 5): mean stars must track the planted expectation.
    cid, ru, _ = _vectors(tables["truth_rating_customer_vectors"])
    iid, rv, rb = _vectors(tables["truth_rating_item_vectors"])
    r = tables["ratings"]
    ci = pd.Index(cid).get_indexer(r.customer_id)
    ii = pd.Index(iid).get_indexer(r.item_id)
    expected = np.einsum("ij,ij->i", ru[ci], rv[ii]) + rb[ii]
    assert np.corrcoef(expected, r.stars)[0, 1] > 0.6
    assert abs(np.clip(expected, 1, 5).mean() - r.stars.mean()) < 0.25


def test_purchase_counts_follow_planted_softmax(tables):
    # Reference: the planted model in towers/synthetic/demo_store.py's module docstring (each line is a
    # draw from softmax_i(u_c . v_i + b_i), season aside); rank correlation from
    # scipy.stats.spearmanr. Each item's expected share is the activity-weighted mean of
    # the customers' softmax probabilities.
    from scipy.stats import spearmanr

    cid, u, _ = _vectors(tables["truth_customer_vectors"])
    iid, v, b = _vectors(tables["truth_item_vectors"])
    catalog = tables["items"]["item_id"].to_pylist()
    rows = pd.Index(iid).get_indexer(catalog)
    logits = u @ v[rows].T + b[rows]
    p = np.exp(logits - logits.max(axis=1, keepdims=True))
    p /= p.sum(axis=1, keepdims=True)
    baskets = tables["baskets"].to_pandas()
    lines = baskets.customer_id.value_counts().reindex(cid, fill_value=0).to_numpy()
    expected = lines @ p / lines.sum()
    counts = baskets.item_id.value_counts().reindex(catalog, fill_value=0).to_numpy()
    rho = spearmanr(counts, expected).statistic
    assert rho > 0.85, rho
    # Same check against a shuffled truth must fail, so the statistic has teeth.
    shuffled = np.random.default_rng(0).permutation(expected)
    assert spearmanr(counts, shuffled).statistic < 0.3


def _attribute_matrix(df, catalog):
    """Rebuild x = [dept, brand, std log price, tags, description] from the files alone."""
    depts = sorted(catalog.department.unique())
    brands = sorted(catalog.brand.unique())
    tags = sorted({t for ts in catalog.tags for t in ts})

    def onehot(col, cats):
        return (df[col].to_numpy()[:, None] == np.array(cats)[None]).astype(float)

    ref = np.log(catalog.price.dropna().to_numpy())
    z = np.nan_to_num((np.log(df.price.to_numpy()) - ref.mean()) / ref.std())
    tag_hot = np.array([[t in set(ts) for t in tags] for ts in df.tags], dtype=float)
    desc = np.stack(df.description_vector.to_numpy()).astype(float)
    return np.hstack([onehot("department", depts), onehot("brand", brands), z[:, None],
                      tag_hot, desc])


@pytest.mark.slow
def test_attributes_predict_true_item_vectors_of_new_items(tables):
    # Reference: scikit-learn's MLPRegressor and r2_score. A small neural net fitted on the
    # catalog's attributes -> true vectors must predict the unseen new arrivals' vectors;
    # with the rows shuffled (attributes no longer matching vectors) it must not.
    # Measured when written (seed 7, these sizes): R^2 about 0.6 true, below 0 shuffled.
    from sklearn.metrics import r2_score
    from sklearn.neural_network import MLPRegressor

    catalog = tables["items"].to_pandas()
    new = tables["new_items"].to_pandas()
    iid, v, _ = _vectors(tables["truth_item_vectors"])
    index = pd.Index(iid)
    x_cat, x_new = _attribute_matrix(catalog, catalog), _attribute_matrix(new, catalog)
    v_cat, v_new = v[index.get_indexer(catalog.item_id)], v[index.get_indexer(new.item_id)]

    def fitted_r2(targets):
        net = MLPRegressor(hidden_layer_sizes=(64,), alpha=1e-2, max_iter=2000, random_state=0)
        net.fit(x_cat, targets)
        return r2_score(v_new, net.predict(x_new))

    r2 = fitted_r2(v_cat)
    assert r2 > 0.35, r2
    assert fitted_r2(np.random.default_rng(1).permutation(v_cat)) < 0.1


def test_feature_part_is_the_truth_less_its_noise(tables):
    # Reference: the planted model in towers/synthetic/demo_store.py's module docstring: v_i = f(x_i) + noise
    # of scale _ITEM_NOISE, b_i = (department, brand and price terms) + N(0, 0.7); the feature-part file holds
    # f(x_i) and the bias without its noise, so the truth less the feature part is the noise alone.
    from towers.synthetic.demo_store import _ITEM_NOISE

    iid, v, b = _vectors(tables["truth_item_vectors"])
    fid, vf, bf = _vectors(tables["truth_item_feature_vectors"])
    assert fid == iid
    noise, bias_noise = v - vf, b - bf
    assert abs(noise.std() / _ITEM_NOISE - 1) < 0.05, noise.std()  # 360 x 8 draws: 2.6% is two standard errors
    assert abs(noise.mean()) < 0.03
    assert abs(bias_noise.std() / 0.7 - 1) < 0.12, bias_noise.std()  # 360 draws: 7.5% is two standard errors
    # the noise is drawn per item, apart from the features: it is not shared by the items of a department
    dept = pd.concat([tables["items"].to_pandas(), tables["new_items"].to_pandas()]).set_index("item_id").loc[iid, "department"]
    by_dept = pd.Series(bias_noise).groupby(dept.to_numpy()).mean()
    assert (by_dept.abs() < 0.35).all(), by_dept


def test_same_seed_same_bytes_other_seed_differs(store, tmp_path):
    _, paths = store
    again = generate_store(tmp_path / "again", seed=7, **SMALL)
    other = generate_store(tmp_path / "other", seed=8, **SMALL)
    first = _digest(paths)
    assert _digest(again) == first
    changed = _digest(other)
    for name in ("items", "customers", "baskets", "ratings", "co_purchases",
                 "truth_item_vectors"):
        assert changed[name] != first[name], name


def test_bad_sizes_raise_towers_error(tmp_path):
    with pytest.raises(TowersError, match="n_items"):
        generate_store(tmp_path, n_items=0)
    with pytest.raises(TowersError, match="true_rank"):
        generate_store(tmp_path, true_rank=0)
    assert not list(tmp_path.iterdir())


def test_cli_writes_and_lists_files(tmp_path, capsys):
    out = tmp_path / "cli"
    assert main([str(out), "--seed", "3", "--items", "120", "--customers", "150",
                 "--new-items", "10"]) == 0
    printed = capsys.readouterr().out
    for rel in FILES.values():
        assert (out / rel).is_file()
        assert str(out / rel) in printed
    assert main([str(out), "--items", "0"]) == 2
