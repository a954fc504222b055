"""Fictional demo data: a year of trade at Thimbleroot Lane Hardware & Garden.

Thimbleroot Lane is an invented neighbourhood shop selling garden supplies, tools, paint,
plumbing and electrical parts under made-up brands to a few thousand loyalty-card holders
across ten invented neighbourhoods. Every sale, rating and customer is drawn from a planted
two-tower taste model whose true vectors are written next to the data, so a trainer can be
checked against the answer, including on new arrivals that have no history at all.

Planted model (all weights drawn once from ``numpy.random.default_rng(seed)``):

* item attributes ``x_i`` = [department one-hot, brand one-hot, standardised log price
  (0 when missing), tag multi-hot, description vector], all recomputable from the files;
* item vector ``v_i = f(x_i) + small noise`` with ``f`` a random tanh two-layer map, so
  attributes drive the vectors nonlinearly and ids add only a little on warm items;
* item bias ``b_i`` from department, brand and price plus noise (a long popularity tail);
* customer vector ``u_c = g(attributes_c) + larger personal noise``, ``g`` also nonlinear;
* each basket line is one draw from ``softmax_i(u_c . v_i + b_i + season_t * outdoor_i)``.

The truth files hold ``u_c``, ``v_i`` and ``b_i``, and (``item_feature_vectors.parquet``) the parts
of ``v_i`` and ``b_i`` the attributes determine, ``f(x_i)`` and the bias without its noise. They omit the season term: it only
touches Garden and Outdoor Living items, peaks in late spring and averages to zero over the
365-day year, so ``u_c . v_i + b_i`` is the year-average purchase logit. Star ratings are
``clip(round(a + s * (u_c . v_i + b_i) + noise), 1, 5)`` and the rating truth files hold
``s * u_c``, ``v_i`` and ``a + s * b_i``, whose dot plus bias is exactly the expected star
value before rounding.
"""

from __future__ import annotations

import argparse
import pathlib
import sys

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from towers.atomic import write_atomic
from towers.errors import TowersError
from towers.synthetic.truth import write_truth

STORE_NAME = "Thimbleroot Lane Hardware & Garden"
ITEM_PREFIX = "TR-"
YEAR_START = np.datetime64("2026-01-01", "D")

DEPARTMENTS = (
    "Garden", "Hand Tools", "Power Tools", "Paint",
    "Plumbing", "Electrical", "Outdoor Living", "Fasteners",
)
# Share of the catalog per department, and which departments a brand may spill into.
_DEPT_SHARE = np.array([0.16, 0.14, 0.09, 0.11, 0.12, 0.12, 0.10, 0.16])
_RELATED = {
    0: (6,), 1: (2, 7), 2: (1, 5), 3: (1,), 4: (7, 5), 5: (4, 2), 6: (0, 5), 7: (1, 4),
}
# Typical shelf price per department (log-normal centre), in store currency.
_DEPT_PRICE = np.array([12.0, 18.0, 85.0, 16.0, 14.0, 11.0, 45.0, 5.0])
# Seasonal departments: the ones whose sales swell in spring and summer.
_OUTDOOR = np.array([1, 0, 0, 0, 0, 0, 1, 0], dtype=bool)
# Chance of stopping at one unit per line; fasteners and paint are bought in multiples.
_DEPT_SINGLE = np.array([0.88, 0.92, 0.96, 0.70, 0.85, 0.85, 0.93, 0.45])

BRANDS = (
    "Fernwhistle", "Copperwren", "Stoutbeam", "Mossgable", "Tallowick", "Brindlecraft",
    "Ironpetal", "Quarrel & Pike", "Wickerby", "Thistlebrook", "Haybarrow", "Norrowfield",
    "Pebblecroft", "Ashgrove Forge", "Larchmere", "Dunnock Tools", "Grimsel & Hart",
    "Oakhollow", "Rookstead", "Mirefield", "Saltmarsh Supply", "Kestrelline", "Bramblecote",
    "Tinderly", "Cobwright", "Hollowmast", "Quillsby", "Verdigrove", "Ravelstone",
    "Cinderwick", "Pallisade Co", "Glimmerhaus", "Tenterhook", "Boltsworth", "Lanternby",
    "Rushwater", "Ploverworks", "Dray & Dovecote", "Marlpit", "Sprocketty",
)

_NOUNS = (
    ("Trowel", "Watering Can", "Hose Reel", "Pruning Shears", "Compost Bin", "Plant Pot",
     "Potting Mix", "Raised Bed Kit", "Garden Twine", "Bulb Planter", "Leaf Rake", "Grow Light"),
    ("Claw Hammer", "Screwdriver Set", "Spirit Level", "Tape Measure", "Hand Saw", "Pliers",
     "Utility Knife", "Chisel Set", "Socket Set", "Adjustable Wrench", "Mallet", "Hex Key Set"),
    ("Cordless Drill", "Orbital Sander", "Jigsaw", "Circular Saw", "Impact Driver", "Heat Gun",
     "Rotary Tool", "Angle Grinder", "Battery Pack", "Router", "Planer", "Multi-Tool"),
    ("Interior Emulsion", "Exterior Gloss", "Primer", "Paint Roller", "Brush Set",
     "Masking Tape", "Drop Cloth", "Wood Stain", "Spray Paint", "Paint Tray", "Filler", "Varnish"),
    ("Pipe Wrench", "Basin Tap", "Sealing Tape", "Shower Head", "Sink Trap", "Push-Fit Elbow",
     "Plunger", "Flexible Hose", "Float Valve", "Drain Unblocker", "Pipe Cutter", "Cistern Kit"),
    ("Extension Lead", "LED Bulb", "Junction Box", "Light Switch", "Cable Ties",
     "Socket Tester", "Wire Stripper", "Outdoor Socket", "Fuse Set", "Sensor Light",
     "Doorbell Kit", "Dimmer"),
    ("Patio Chair", "Parasol", "Fire Pit", "String Lights", "Bird Feeder", "Hammock",
     "Charcoal Grill", "Garden Bench", "Solar Lantern", "Outdoor Rug", "Planter Box", "Windbreak"),
    ("Wood Screws", "Wall Plugs", "Hex Bolts", "Round Nails", "Washers", "Cavity Anchors",
     "Picture Hooks", "Cable Clips", "Pop Rivets", "Threaded Rod", "Coach Screws", "Staples"),
)
_VARIANTS = ("", "", "", "Pro", "Classic", "Compact", "Heavy-Duty", "Lite", "Twin-Pack",
             "XL", "Mini", "Studio", "Field")

# Six tags per department (same order as DEPARTMENTS), then twelve shared ones: 60 in all.
_DEPT_TAGS = (
    ("watering", "pruning", "soil-care", "planters", "pest-control", "lawn"),
    ("measuring", "cutting", "striking", "gripping", "woodwork", "precision"),
    ("cordless", "corded", "drilling", "sanding", "sawing", "battery-platform"),
    ("interior", "exterior", "primer", "quick-dry", "low-odour", "decorating"),
    ("pipework", "taps", "drainage", "sealing", "bathroom", "kitchen"),
    ("lighting", "wiring", "switches", "safety-tested", "smart-home", "outdoor-rated"),
    ("patio", "furniture", "barbecue", "weatherproof", "solar", "wildlife"),
    ("screws", "anchors", "bolts", "nails", "stainless", "bulk-pack"),
)
_SHARED_TAGS = ("eco", "value-range", "premium", "beginner-friendly", "trade-grade", "compact",
                "child-safe", "pet-safe", "gift-idea", "refill", "repair", "storage")
TAGS = tuple(t for group in _DEPT_TAGS for t in group) + _SHARED_TAGS

AGE_BANDS = ("18-29", "30-44", "45-59", "60+")
_AGE_SHARE = np.array([0.17, 0.32, 0.30, 0.21])
NEIGHBOURHOODS = (
    "Cinderfield", "Wrenmoor", "Old Tannery", "Harrow Flats", "Quayside Rise",
    "Bellweather Park", "Ostler's Green", "Marsh End", "Kettle Hill", "Linden Cross",
)
# Log-odds of a garden per neighbourhood: the Flats and the Rise are mostly apartments.
_NEIGH_GARDEN = np.array([0.8, 1.2, -0.2, -1.8, -1.4, 1.6, 2.0, 0.6, 1.0, 0.3])
_HOUSEHOLD_SHARE = np.array([0.28, 0.34, 0.16, 0.14, 0.06, 0.02])

# Model scale knobs, chosen so per-customer softmaxes are peaked but not degenerate.
_TASTE_SPREAD = 1.5      # std of u.v over random (customer, item) pairs
_ITEM_NOISE = 0.30       # id-only part of v, relative to unit-variance f(x)
_ITEM_GAIN = 1.5         # tanh gain of f: higher bends the attribute map harder
_CUSTOMER_ATTR = 0.60    # weight of g(attributes) in u before scaling
_CUSTOMER_NOISE = 0.85   # weight of the personal part of u (larger: attributes explain less)
_SEASON_AMPLITUDE = 0.6  # logit swing of outdoor items between spring peak and winter
_SEASON_PEAK_DAY = 150   # day of year (about 30 May) where outdoor buying peaks
_BASKETS_PER_YEAR = 12.5
_STAR_MEAN, _STAR_SPREAD, _STAR_NOISE = 3.7, 0.9, 0.7
_RATED_SHARE = 0.25
_CHUNK = 512             # customers per sampling chunk: bounds memory to CHUNK x n_items
_OUT_OF_STOCK = 0.07     # share of items out of stock on the day the files are written
_ONLINE_SHARE = 0.55     # share of baskets with a browsing session on the shop's website before them
_EXTRA_VIEWS = 3.0       # mean views of items not bought in such a session (drawn from the same taste model)
_SESSION_MINUTES = 25.0  # a session's views spread over up to this many minutes before the order
_FIRST_ORDER = 260_001   # order numbers count up from here in time order

# ---------------------------------------------------------------- writing helpers

def _write_parquet(path: pathlib.Path, table: pa.Table) -> pathlib.Path:
    return write_atomic(path, lambda tmp: pq.write_table(table, tmp))


def _write_csv(path: pathlib.Path, frame: pd.DataFrame) -> pathlib.Path:
    return write_atomic(path, lambda tmp: frame.to_csv(tmp, index=False))


def _list_array(offsets: np.ndarray, values: pa.Array) -> pa.ListArray:
    return pa.ListArray.from_arrays(pa.array(offsets.astype(np.int32), pa.int32()), values)


# ---------------------------------------------------------------- small numeric helpers

def _gumbel_top(rng, log_weights: np.ndarray, k: np.ndarray) -> np.ndarray:
    """Boolean mask of k[i] distinct picks per row, drawn without replacement (Gumbel top-k)."""
    keys = log_weights + rng.gumbel(size=log_weights.shape)
    rank = np.argsort(np.argsort(-keys, axis=1), axis=1)
    return rank < k[:, None]


def _standardise_columns(a: np.ndarray, ref: np.ndarray) -> np.ndarray:
    """Centre and scale columns of ``a`` by the statistics of ``ref`` (a fixed affine map)."""
    sd = ref.std(axis=0)
    return (a - ref.mean(axis=0)) / np.where(sd > 0, sd, 1.0)


def _random_tanh_map(rng, x: np.ndarray, ref_rows: np.ndarray, hidden: int, out: int,
                     gain: float) -> np.ndarray:
    """A fixed random 2-layer map tanh(x W1 + c1) W2, unit-variance outputs on ref_rows."""
    w1 = rng.normal(size=(x.shape[1], hidden))
    c1 = rng.normal(scale=0.5, size=hidden)
    pre = x @ w1
    # Standardising the pre-activations keeps tanh in its bent range whatever the input scale.
    h = np.tanh(gain * _standardise_columns(pre, pre[ref_rows]) + c1)
    w2 = rng.normal(size=(hidden, out)) / np.sqrt(hidden)
    y = h @ w2
    return _standardise_columns(y, y[ref_rows])


# ---------------------------------------------------------------- the catalog

def item_attributes(department: np.ndarray, brand: np.ndarray, price: np.ndarray,
                    tag_hot: np.ndarray, desc: np.ndarray, ref_rows: np.ndarray) -> np.ndarray:
    """Attribute matrix x = [dept one-hot, brand one-hot, std log price, tag multi-hot, desc].

    ``price`` holds NaN where missing; the log price is standardised with the mean and
    standard deviation of the present prices among ``ref_rows`` (the catalog), 0 if missing.
    """
    n = len(department)
    dept_hot = np.zeros((n, len(DEPARTMENTS)))
    dept_hot[np.arange(n), department] = 1.0
    brand_hot = np.zeros((n, len(BRANDS)))
    brand_hot[np.arange(n), brand] = 1.0
    logp = np.log(price)
    ref = logp[ref_rows]
    ref = ref[~np.isnan(ref)]
    z = (logp - ref.mean()) / (ref.std() if ref.std() > 0 else 1.0)
    z = np.where(np.isnan(z), 0.0, z)
    return np.hstack([dept_hot, brand_hot, z[:, None], tag_hot, desc.astype(np.float64)])


def _make_items(rng, n_all: int, n_catalog: int, desc_dim: int) -> dict:
    """Draw catalog and new arrivals together from one process; new ones are the tail."""
    n_dept, n_brand, n_tag = len(DEPARTMENTS), len(BRANDS), len(TAGS)

    # Brands: a home department (round-robin so each has five) and maybe one related one.
    home = np.arange(n_brand) % n_dept
    affinity = np.full((n_dept, n_brand), 0.02)
    affinity[home, np.arange(n_brand)] = 1.0
    has_second = rng.random(n_brand) < 0.5
    pick = rng.integers(0, 2, size=n_brand)
    for b in np.flatnonzero(has_second):  # a loop over at most 40 brands
        rel = _RELATED[int(home[b])]
        affinity[rel[pick[b] % len(rel)], b] = 0.45
    brand_size = rng.lognormal(0.0, 0.5, size=n_brand)  # some brands stock wider ranges

    department = rng.choice(n_dept, size=n_all, p=_DEPT_SHARE)
    brand_logw = np.log(affinity * brand_size)[department]
    brand = np.argmax(brand_logw + rng.gumbel(size=brand_logw.shape), axis=1)

    # Tags: mostly the department's own, some shared, a few from related departments.
    tag_w = np.full((n_dept, n_tag), 0.02)
    for d in range(n_dept):
        tag_w[d, 6 * d:6 * d + 6] = 1.0
        for r in _RELATED[d]:
            tag_w[d, 6 * r:6 * r + 6] = 0.15
    tag_w[:, 6 * n_dept:] = 0.30
    n_tags = 1 + rng.binomial(4, 0.4, size=n_all)
    tag_hot = _gumbel_top(rng, np.log(tag_w)[department], n_tags).astype(np.float64)

    # Price: log-normal around the department's level, shifted by a brand premium.
    premium = rng.normal(0.0, 0.3, size=n_brand)
    raw = np.exp(np.log(_DEPT_PRICE)[department] + premium[brand]
                 + rng.normal(0.0, 0.55, size=n_all))
    price = np.maximum(np.ceil(raw) - 0.01, 0.49).round(2)  # shelf prices end in .99
    price[rng.random(n_all) < 0.02] = np.nan

    # Description vector "from a text model": department and tag meaning plus wording noise,
    # unit length like most sentence embeddings.
    dept_emb = rng.normal(size=(n_dept, desc_dim))
    tag_emb = rng.normal(size=(n_tag, desc_dim))
    desc = (dept_emb[department] + 0.8 * (tag_hot @ tag_emb) / np.sqrt(n_tags)[:, None]
            + rng.normal(0.0, 0.6, size=(n_all, desc_dim)))
    desc = (desc / np.linalg.norm(desc, axis=1, keepdims=True)).astype(np.float32)

    noun_pick = rng.integers(0, len(_NOUNS[0]), size=n_all)
    variant = np.array(_VARIANTS, dtype=object)[rng.integers(0, len(_VARIANTS), size=n_all)]
    noun = np.array(_NOUNS, dtype=object)[department, noun_pick]
    brand_names = np.array(BRANDS, dtype=object)[brand]
    name = np.where(variant == "", brand_names + " " + noun,
                    brand_names + " " + variant + " " + noun)

    ids = np.char.add(ITEM_PREFIX, np.char.zfill(np.arange(n_all).astype(str), 5))
    ref_rows = np.arange(n_catalog)
    x = item_attributes(department, brand, price, tag_hot, desc, ref_rows)
    return dict(ids=ids, name=name, department=department, brand=brand, price=price,
                tag_hot=tag_hot, desc=desc, x=x, brand_size=brand_size)


def _items_table(items: dict, rows: np.ndarray) -> pa.Table:
    tag_hot = items["tag_hot"][rows] > 0
    counts = tag_hot.sum(axis=1)
    offsets = np.concatenate([[0], np.cumsum(counts)])
    tag_values = pa.array(np.array(TAGS, dtype=object)[np.nonzero(tag_hot)[1]], pa.string())
    desc = items["desc"][rows]
    d = desc.shape[1]
    desc_values = pa.array(desc.reshape(-1), pa.float32())
    price = items["price"][rows]
    return pa.table({
        "item_id": pa.array(items["ids"][rows].tolist(), pa.string()),
        "name": pa.array(items["name"][rows].tolist(), pa.string()),
        "department": pa.array(np.array(DEPARTMENTS, dtype=object)[items["department"][rows]],
                               pa.string()),
        "brand": pa.array(np.array(BRANDS, dtype=object)[items["brand"][rows]], pa.string()),
        "price": pa.array(price, pa.float64(), mask=np.isnan(price)),
        "tags": _list_array(offsets, tag_values),
        "description_vector": _list_array(np.arange(len(rows) + 1) * d, desc_values),
        "in_stock": pa.array(items["in_stock"][rows], pa.bool_()),
    })


# ---------------------------------------------------------------- customers

def _make_customers(rng, n: int) -> dict:
    ids = np.sort(rng.choice(np.arange(100_000, 1_000_000), size=n, replace=False))
    age = rng.choice(len(AGE_BANDS), size=n, p=_AGE_SHARE)
    hood_share = rng.dirichlet(np.full(len(NEIGHBOURHOODS), 4.0))
    hood = rng.choice(len(NEIGHBOURHOODS), size=n, p=hood_share)
    household = 1 + rng.choice(6, size=n, p=_HOUSEHOLD_SHARE)
    garden_logit = _NEIGH_GARDEN[hood] + 0.35 * (household - 2) + 0.3 * (age - 1)
    garden = rng.random(n) < 1.0 / (1.0 + np.exp(-garden_logit))
    # Older customers tend to have held a card longer; the scheme started in 2006.
    since = np.clip(2026 - np.round(rng.exponential(2.0 + 2.5 * age)), 2006, 2026).astype(int)
    since_missing = rng.random(n) < 0.04

    a = np.hstack([
        np.eye(len(AGE_BANDS))[age],
        np.eye(len(NEIGHBOURHOODS))[hood],
        ((household - household.mean()) / max(household.std(), 1e-9))[:, None],
        garden[:, None].astype(float),
        np.where(since_missing, 0.0, (since - 2018) / 6.0)[:, None],
        since_missing[:, None].astype(float),
    ])
    return dict(ids=ids, age=age, hood=hood, household=household, garden=garden,
                since=since, since_missing=since_missing, a=a)


def _customers_frame(c: dict) -> pd.DataFrame:
    return pd.DataFrame({
        "customer_id": c["ids"].astype(np.int64),
        "age_band": np.array(AGE_BANDS, dtype=object)[c["age"]],
        "neighbourhood": np.array(NEIGHBOURHOODS, dtype=object)[c["hood"]],
        "household_size": c["household"].astype(np.int64),
        "has_garden": np.where(c["garden"], "yes", "no"),
        # Nullable ints so a missing year is written as an empty field, not "nan".
        "member_since": pd.Series(c["since"], dtype="Int64").mask(c["since_missing"]),
    })


# ---------------------------------------------------------------- the planted model

def _plant_vectors(rng, items: dict, cust: dict, n_catalog: int, rank: int) -> tuple:
    """Return (u, v, b, v_features, b_features) as float32, scaled so logits u.v + b have a sensible
    spread. v_features and b_features are the parts of v and b the item's attributes determine (the
    noise of each left out): the most a model that sees only an item's features can know of it."""
    ref = np.arange(n_catalog)
    f = _random_tanh_map(rng, items["x"], ref, hidden=48, out=rank, gain=_ITEM_GAIN)
    v = f + _ITEM_NOISE * rng.normal(size=f.shape)

    g = _random_tanh_map(rng, cust["a"], np.arange(len(cust["ids"])), hidden=16, out=rank,
                         gain=1.2)
    u = _CUSTOMER_ATTR * g + _CUSTOMER_NOISE * rng.normal(size=g.shape)

    # A readable axis on top of the random maps: garden owners lean to outdoor departments.
    axis = rng.normal(size=rank)
    axis /= np.linalg.norm(axis)
    outdoor = _OUTDOOR[items["department"]].astype(float)
    lean = 0.8 * np.outer(outdoor - outdoor[ref].mean(), axis)
    v += lean
    f += lean
    u += 0.6 * np.outer(cust["garden"] - cust["garden"].mean(), axis)

    spread = np.std(u @ v[ref].T)
    u *= _TASTE_SPREAD / spread if spread > 0 else 1.0  # spread is 0 only for toy sizes

    n_dept = len(DEPARTMENTS)
    dept_pop = rng.normal(0.0, 0.35, size=n_dept)
    brand_pop = rng.normal(0.0, 0.5, size=len(BRANDS)) + 0.3 * np.log(items["brand_size"])
    zprice = items["x"][:, n_dept + len(BRANDS)]
    b_features = dept_pop[items["department"]] + brand_pop[items["brand"]] - 0.3 * zprice
    b = b_features + rng.normal(0.0, 0.7, size=len(zprice))
    shift = b[ref].mean()
    b -= shift
    b_features = b_features - shift
    return tuple(a.astype(np.float32) for a in (u, v, b, f, b_features))


def _season(day_of_year: np.ndarray) -> np.ndarray:
    """Logit boost for outdoor departments on a given day of the year (zero-mean over a year)."""
    return _SEASON_AMPLITUDE * np.cos(2 * np.pi * (day_of_year - _SEASON_PEAK_DAY) / 365.0)


def _draw_lines(rng, u64, v64, b64, outdoor, line_cust, line_season) -> np.ndarray:
    """Draw one catalog item per line from softmax(u.v + b + season * outdoor).

    Because the season term only scales the outdoor group by exp(season), each draw is exact
    in two steps: choose indoor/outdoor by their season-weighted masses, then invert that
    group's cumulative weights. Items are ordered indoor-first so each group is contiguous.
    """
    n_items = v64.shape[0]
    order = np.argsort(outdoor, kind="stable")
    n_in = int((~outdoor).sum())
    vo, bo = v64[order], b64[order]
    out = np.empty(len(line_cust), dtype=np.int64)
    bounds = np.searchsorted(line_cust, np.arange(0, len(u64) + _CHUNK, _CHUNK))
    for k in range(len(bounds) - 1):  # a loop over customer chunks, not over lines
        lo, hi = bounds[k], bounds[k + 1]
        if lo == hi:
            continue
        c0 = k * _CHUNK
        logits = u64[c0:c0 + _CHUNK] @ vo.T + bo
        w = np.exp(logits - logits.max(axis=1, keepdims=True))
        cum = np.cumsum(w, axis=1)
        total = cum[:, -1]
        w_in = cum[:, n_in - 1] if n_in > 0 else np.zeros_like(total)
        w_out = total - w_in
        rows = line_cust[lo:hi] - c0
        boost = np.exp(line_season[lo:hi])
        p_out = boost * w_out[rows] / (boost * w_out[rows] + w_in[rows])
        go_out = rng.random(hi - lo) < p_out
        r = rng.random(hi - lo)
        target = np.where(go_out, w_in[rows] + r * w_out[rows], r * w_in[rows]) / total[rows]
        # One searchsorted for the whole chunk: row j's cumulative shares live in [j, j+1].
        flat = (cum / total[:, None] + np.arange(len(cum))[:, None]).reshape(-1)
        pos = np.searchsorted(flat, rows + target, side="right") - rows * n_items
        out[lo:hi] = order[np.clip(pos, 0, n_items - 1)]
    return out


# ---------------------------------------------------------------- raw exports

def _write_exports(out: pathlib.Path, rng, items: dict, cust_ids: np.ndarray, u64, v64, b64, outdoor,
                   basket_cust, basket_time, basket_day, line_basket, line_item, quantity, doy) -> dict:
    """The shop's own exports of the same sales: orders.csv (one line per basket line, as the till
    exports them) and views.csv (a clickstream: a browsing session before some baskets, viewing the
    items bought plus a few others drawn from the customer's taste)."""
    n_b = len(basket_cust)
    # order numbers in time order; a line's price is the shelf price (the department's typical
    # price where the catalog has none)
    rank = np.empty(n_b, dtype=np.int64)
    rank[np.lexsort((basket_cust, basket_time))] = np.arange(n_b)
    order_id = _FIRST_ORDER + rank
    shelf = items["price"][:len(v64)]
    shelf = np.where(np.isnan(shelf), np.ceil(_DEPT_PRICE[items["department"][:len(v64)]]) - 0.01, shelf)
    line_time = basket_time[line_basket]
    ordl = np.lexsort((line_item, basket_cust[line_basket], line_time))
    paths = {"orders": _write_csv(out / "orders.csv", pd.DataFrame({
        "order_id": order_id[line_basket[ordl]],
        "customer_id": cust_ids[basket_cust[line_basket[ordl]]],
        "product_id": items["ids"][line_item[ordl]],
        "quantity": quantity[ordl].astype(np.int64),
        "price": shelf[line_item[ordl]],
        "ordered_at": np.char.replace(np.datetime_as_string(line_time[ordl], unit="s"), "T", " "),
    }))}

    online = np.flatnonzero(rng.random(n_b) < _ONLINE_SHARE)  # ascending, so by customer as _draw_lines needs
    n_extra = rng.poisson(_EXTRA_VIEWS, size=len(online))
    extra_basket = np.repeat(online, n_extra)
    extra_item = _draw_lines(rng, u64, v64, b64, outdoor, basket_cust[extra_basket],
                             _season(doy[basket_day[extra_basket]]))
    bought = np.isin(line_basket, online)
    view_basket = np.concatenate([line_basket[bought], extra_basket])
    view_item = np.concatenate([line_item[bought], extra_item])
    length = rng.uniform(2.0, _SESSION_MINUTES, size=n_b)  # minutes from a session's first view to its order
    offset = rng.random(len(view_basket)) * length[view_basket] + 0.5
    view_time = basket_time[view_basket] - (offset * 60).astype("timedelta64[s]")
    session = np.empty(n_b, dtype=np.int64)
    session[online] = np.arange(len(online))
    ordv = np.lexsort((view_item, view_time, session[view_basket]))
    paths["views"] = _write_csv(out / "views.csv", pd.DataFrame({
        "session_id": np.char.add("S", np.char.zfill(session[view_basket[ordv]].astype(str), 7)),
        "customer_id": cust_ids[basket_cust[view_basket[ordv]]],
        "product_id": items["ids"][view_item[ordv]],
        "viewed_at": np.char.replace(np.datetime_as_string(view_time[ordv], unit="s"), "T", " "),
    }))
    return paths


# ---------------------------------------------------------------- main entry

def generate_store(out_dir, seed: int = 7, n_items: int = 3000, n_customers: int = 4000,
                   n_new_items: int = 300, days: int = 365, desc_dim: int = 16,
                   true_rank: int = 8) -> dict[str, pathlib.Path]:
    """Write the demo store's files under ``out_dir``; return {name: path} of every file.

    Sales run for ``days`` days from 1 January 2026. Exactly deterministic for a given
    ``seed``; default sizes give about 124k basket lines in one or two seconds.
    """
    for label, value, least in (("n_items", n_items, 1), ("n_customers", n_customers, 1),
                                ("n_new_items", n_new_items, 0), ("days", days, 1),
                                ("desc_dim", desc_dim, 1), ("true_rank", true_rank, 1)):
        if int(value) != value or value < least:
            raise TowersError(f"demo store: {label} must be an integer >= {least}, got {value!r}")
    out = pathlib.Path(out_dir)
    rng = np.random.default_rng(seed)
    n_all = n_items + n_new_items

    items = _make_items(rng, n_all, n_items, desc_dim)
    # The raw exports and the stock flags draw from a generator of their own, so every draw of `rng`
    # (and so every other file) is what it was before they existed.
    export_rng = np.random.default_rng([seed, 1])
    items["in_stock"] = export_rng.random(n_all) >= _OUT_OF_STOCK
    cust = _make_customers(rng, n_customers)
    u, v, b, v_features, b_features = _plant_vectors(rng, items, cust, n_items, true_rank)
    u64, v64, b64 = u.astype(np.float64), v.astype(np.float64), b.astype(np.float64)

    # Baskets: heavy-tailed activity per customer (log-normal Poisson rate), busier weekends
    # and a spring bulge in visits on top of the outdoor boost inside each basket.
    n_c = n_customers
    activity = np.exp(rng.normal(0.0, 1.0, size=n_c) - 0.5) * (1 + 0.08 * (cust["household"] - 2))
    n_baskets = rng.poisson(_BASKETS_PER_YEAR * days / 365.0 * activity)
    basket_cust = np.repeat(np.arange(n_c), n_baskets)
    n_b = len(basket_cust)
    day = np.arange(days)
    dates = YEAR_START + day
    weekday = (dates.astype(np.int64) + 3) % 7  # 1970-01-01 was a Thursday; Monday = 0
    doy = day % 365
    day_w = np.where(weekday >= 5, 1.55, 1.0) * (1 + 0.35 * np.cos(2 * np.pi * (doy - 135) / 365))
    basket_day = np.searchsorted(np.cumsum(day_w) / day_w.sum(), rng.random(n_b), side="right")
    basket_day = np.minimum(basket_day, days - 1)
    basket_sec = (rng.triangular(7.0, 11.5, 20.0, size=n_b) * 3600).astype(np.int64)
    basket_time = (dates[basket_day].astype("datetime64[s]")
                   + basket_sec.astype("timedelta64[s]"))
    basket_size = 1 + rng.binomial(5, 0.3, size=n_b)

    line_basket = np.repeat(np.arange(n_b), basket_size)
    line_cust = basket_cust[line_basket]
    outdoor = _OUTDOOR[items["department"][:n_items]]
    line_item = _draw_lines(rng, u64, v64[:n_items], b64[:n_items], outdoor, line_cust,
                            _season(doy[basket_day[line_basket]]))

    # The same item drawn twice in one basket is one line with a larger quantity.
    key, dup = np.unique(line_basket * n_items + line_item, return_counts=True)
    line_basket, line_item = key // n_items, key % n_items
    line_cust = basket_cust[line_basket]
    single = _DEPT_SINGLE[items["department"][line_item]]
    quantity = dup + rng.geometric(single) - 1

    # (customer, purchased_at) must identify a basket in the file: nudge rare same-second
    # clashes of one customer forward a second at a time (loop runs a handful of times).
    while True:
        ordk = np.lexsort((basket_time, basket_cust))
        clash = np.flatnonzero((basket_cust[ordk][1:] == basket_cust[ordk][:-1])
                               & (basket_time[ordk][1:] == basket_time[ordk][:-1]))
        if len(clash) == 0:
            break
        basket_time[ordk[clash + 1]] += np.timedelta64(1, "s")

    paths: dict[str, pathlib.Path] = {}
    item_ids = pa.array(items["ids"].tolist(), pa.string())
    paths["items"] = _write_parquet(out / "items.parquet", _items_table(items, np.arange(n_items)))
    paths["new_items"] = _write_parquet(out / "new_items.parquet",
                                        _items_table(items, np.arange(n_items, n_all)))
    paths["customers"] = _write_csv(out / "customers.csv", _customers_frame(cust))

    # Baskets file in till order: by time, then customer, then item.
    line_time = basket_time[line_basket]
    ordl = np.lexsort((line_item, line_cust, line_time))
    cust_ids = cust["ids"].astype(np.int64)
    paths["baskets"] = _write_parquet(out / "baskets.parquet", pa.table({
        "customer_id": pa.array(cust_ids[line_cust[ordl]], pa.int64()),
        "item_id": item_ids.take(pa.array(line_item[ordl])),
        "quantity": pa.array(quantity[ordl].astype(np.int64), pa.int64()),
        # Parquet has no seconds unit; milliseconds is the coarsest it stores exactly.
        "purchased_at": pa.array(line_time[ordl].astype("datetime64[ms]"),
                                 pa.timestamp("ms")),
    }))

    # Ratings: the rating truth is built first and the stars are drawn from it, so its
    # dot + bias is exactly the expected star value. a and s are fitted to the bought lines'
    # logits so the stars use the whole 1..5 scale.
    line_logit = np.einsum("ij,ij->i", u64[line_cust], v64[line_item]) + b64[line_item]
    s = _STAR_SPREAD / max(line_logit.std(), 1e-9)
    a = _STAR_MEAN - s * line_logit.mean()
    ru = (s * u64).astype(np.float32)
    rb = (a + s * b64).astype(np.float32)
    propensity = rng.beta(2.0, 6.0, size=n_c)  # some customers rate far more than others
    rated = np.flatnonzero(rng.random(len(line_item)) < propensity[line_cust])
    rated = rated[np.argsort(line_time[rated], kind="stable")]
    rc, ri = line_cust[rated], line_item[rated]
    expected = (np.einsum("ij,ij->i", ru[rc].astype(np.float64), v64[ri])
                + rb[ri].astype(np.float64))
    stars = np.clip(np.round(expected + rng.normal(0.0, _STAR_NOISE, size=len(rated))), 1, 5)
    rated_day = line_time[rated].astype("datetime64[D]") + np.minimum(
        rng.geometric(0.25, size=len(rated)) - 1, 60)
    paths["ratings"] = _write_csv(out / "ratings.csv", pd.DataFrame({
        "customer_id": cust_ids[rc],
        "item_id": items["ids"][ri],
        "stars": stars.astype(np.int64),
        "rated_at": np.datetime_as_string(rated_day, unit="D"),
    }))

    # Co-purchases: lines are sorted by basket with distinct items, so pairs within a basket
    # sit at most (largest basket - 1) positions apart; loop over that offset only.
    pair_a, pair_b = [], []
    for off in range(1, int(basket_size.max()) if n_b else 1):
        same = line_basket[off:] == line_basket[:-off]
        pair_a.append(line_item[:-off][same])
        pair_b.append(line_item[off:][same])
    pa_, pb_ = (np.concatenate(pair_a) if pair_a else np.zeros(0, np.int64),
                np.concatenate(pair_b) if pair_b else np.zeros(0, np.int64))
    both_a, both_b = np.concatenate([pa_, pb_]), np.concatenate([pb_, pa_])
    pair_key, times = np.unique(both_a * n_items + both_b, return_counts=True)
    paths["co_purchases"] = _write_parquet(out / "co_purchases.parquet", pa.table({
        "item_a": item_ids.take(pa.array(pair_key // n_items)),
        "item_b": item_ids.take(pa.array(pair_key % n_items)),
        "times": pa.array(times.astype(np.int64), pa.int64()),
    }))

    paths.update(_write_exports(out, export_rng, items, cust_ids, u64, v64[:n_items], b64[:n_items], outdoor,
                                basket_cust, basket_time, basket_day, line_basket, line_item, quantity, doy))

    truth = out / "truth"
    cust = np.asarray(cust_ids, dtype=np.int64)
    item_text = np.asarray(item_ids.to_pylist(), dtype=object)
    zeros = np.zeros(n_c, dtype=np.float32)
    paths["truth_customer_vectors"] = write_truth(truth / "customer_vectors.parquet", cust, u, zeros, "user")
    paths["truth_item_vectors"] = write_truth(truth / "item_vectors.parquet", item_text, v, b, "item")
    paths["truth_rating_customer_vectors"] = write_truth(
        truth / "rating_customer_vectors.parquet", cust, ru, zeros, "user")
    paths["truth_rating_item_vectors"] = write_truth(truth / "rating_item_vectors.parquet", item_text, v, rb, "item")
    paths["truth_item_feature_vectors"] = write_truth(
        truth / "item_feature_vectors.parquet", item_text, v_features, b_features, "item")
    return paths


def main(argv=None) -> int:
    """CLI: ``python -m towers.synthetic.demo_store OUT_DIR [--seed N]``; prints each file written."""
    parser = argparse.ArgumentParser(
        prog="python -m towers.synthetic.demo_store",
        description=f"Write the fictional {STORE_NAME} demo data set.")
    parser.add_argument("out_dir")
    parser.add_argument("--seed", type=int, default=7)
    parser.add_argument("--items", type=int, default=3000, help="catalog size")
    parser.add_argument("--customers", type=int, default=4000)
    parser.add_argument("--new-items", type=int, default=300)
    args = parser.parse_args(argv)
    try:
        paths = generate_store(args.out_dir, seed=args.seed, n_items=args.items,
                               n_customers=args.customers, n_new_items=args.new_items)
    except TowersError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return TowersError.exit_code
    for name, path in paths.items():
        print(f"{name:<30} {path}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
