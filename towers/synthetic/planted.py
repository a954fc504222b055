"""Planted benchmark data with a known accuracy limit: explicit ratings and implicit events.

Synthetic data for measuring how close a trained model gets to what its data allow (not the demo
store, which is a fictional shop). Every table is drawn from true vectors that are written next to
it, in the embeddings layout the `oracle` rows read (`evaluation.oracle_users` / `oracle_items`).

Explicit (``generate_explicit``): a rank-r matrix plus Gaussian noise,

    rating(u, i) = mu + b_u + b_i + u_u . v_i + sigma * eps,    eps ~ N(0, 1),

observed at entries drawn uniformly without replacement, ``oversampling`` times
r (n_users + n_items) ln(max(n_users, n_items)), the order of the number of entries matrix
completion needs (Candes & Recht 2009; Candes & Tao 2010). The best possible predictor of a held-out
rating is the true mean, whose expected squared error is sigma^2 (the Bayes risk of squared loss is
the noise variance), so sigma is the floor of any model's test RMSE. Item vectors are part features
(a random tanh map of a group and an attribute vector), part per-item residual; users have ids only.

Implicit (``generate_implicit``): each user draws a few dozen distinct items without replacement
from softmax_i(u_u . v_i + b_i) (Gumbel top-k, i.e. Plackett-Luce sampling), so positives are noisy
draws, not the top of a ranking. Item vectors and biases are exact functions of the item features,
so an item held out whole can be ranked from its features alone; users have ids only. The oracle
ranks by the true logit u_u . v_i + b_i, which orders items by their chance of being drawn.

Truth files: ``truth/user_vectors.parquet`` (id, u, b_u) and ``truth/item_vectors.parquet``
(id, v, bias); for ratings the item bias holds mu + b_i, so dot plus biases is the true mean rating.
``truth/planted.json`` records the parameters, including sigma and the sampling threshold.
"""

from __future__ import annotations

import argparse
import json
import math
import pathlib
import sys

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from towers.atomic import write_atomic, write_text_atomic
from towers.errors import TowersError
from towers.synthetic.truth import write_truth

ITEM_PREFIX = "item-"
_CHUNK = 1024  # users per sampling chunk: bounds memory to CHUNK x n_items


# ---------------------------------------------------------------- writing helpers

def _write_parquet(path: pathlib.Path, table: pa.Table) -> pathlib.Path:
    return write_atomic(path, lambda tmp: pq.write_table(table, tmp))


def _items_table(ids: np.ndarray, group: np.ndarray, attrs: np.ndarray) -> pa.Table:
    d = attrs.shape[1]
    offsets = pa.array((np.arange(len(ids) + 1) * d).astype(np.int32), pa.int32())
    return pa.table({
        "item_id": pa.array(ids.tolist(), pa.string()),
        "group": pa.array([f"g{g:02d}" for g in group], pa.string()),
        "attributes": pa.ListArray.from_arrays(offsets, pa.array(attrs.astype(np.float32).reshape(-1), pa.float32())),
    })


def _item_ids(n: int) -> np.ndarray:
    return np.char.add(ITEM_PREFIX, np.char.zfill(np.arange(n).astype(str), 5))


def _check_sizes(**sizes) -> None:
    for label, (value, least) in sizes.items():
        if isinstance(value, bool) or not isinstance(value, (int, float)) or value < least or \
                (isinstance(least, int) and int(value) != value):
            raise TowersError(f"planted data: {label} must be {'an integer' if isinstance(least, int) else 'a number'} "
                              f">= {least}, got {value!r}")


# ---------------------------------------------------------------- the planted item model

def _random_tanh_map(rng, x: np.ndarray, hidden: int, out: int, gain: float) -> np.ndarray:
    """A fixed random 2-layer map tanh(gain * x W1 + c) W2 with unit-variance output columns."""
    w1 = rng.normal(size=(x.shape[1], hidden)) / math.sqrt(x.shape[1])
    c = rng.normal(scale=0.5, size=hidden)
    h = np.tanh(gain * (x @ w1) + c)
    y = h @ (rng.normal(size=(hidden, out)) / math.sqrt(hidden))
    return (y - y.mean(0)) / np.where(y.std(0) > 0, y.std(0), 1.0)


def _item_features(rng, n_items: int, groups: int, attr_dim: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """A group (categorical) and an attribute vector per item; x is their numeric form [one-hot, attrs]."""
    group = rng.integers(0, groups, size=n_items)
    centres = rng.normal(size=(groups, attr_dim))
    attrs = 0.7 * centres[group] + 0.7 * rng.normal(size=(n_items, attr_dim))
    x = np.hstack([np.eye(groups)[group], attrs])
    return group, attrs, x


def _gumbel_top(rng, logits: np.ndarray, k: np.ndarray) -> np.ndarray:
    """Boolean mask of k[row] distinct picks per row without replacement, each step proportional to
    exp(logit) (Gumbel top-k; Yellott 1977, Kool et al. 2019)."""
    keys = logits + rng.gumbel(size=logits.shape)
    order = np.argsort(-keys, axis=1)
    mask = np.zeros(logits.shape, dtype=bool)
    cols = np.arange(logits.shape[1])[None, :] < k[:, None]
    np.put_along_axis(mask, order, cols, axis=1)
    return mask


# ---------------------------------------------------------------- explicit ratings

def generate_explicit(out_dir, seed: int = 0, n_users: int = 1500, n_items: int = 600, rank: int = 3,
                      noise: float = 0.5, oversampling: float = 4.0, groups: int = 12, attr_dim: int = 6,
                      feature_share: float = 0.5, mean_rating: float = 3.5) -> dict[str, pathlib.Path]:
    """Write a planted rank-`rank` rating matrix with Gaussian noise `noise` under ``out_dir``.

    Files: ratings.parquet (user_id, item_id, rating), items.parquet (item_id, group, attributes),
    truth/user_vectors.parquet, truth/item_vectors.parquet, truth/planted.json. The signal u.v has
    standard deviation 1 over random pairs, the biases 0.3 each. `feature_share` of each item
    vector's variance comes from its features, the rest is the item's own. Deterministic in `seed`.
    """
    _check_sizes(n_users=(n_users, 2), n_items=(n_items, 2), rank=(rank, 1), groups=(groups, 1),
                 attr_dim=(attr_dim, 1), noise=(noise, 0.0), oversampling=(oversampling, 0.0))
    if not 0.0 <= feature_share <= 1.0:
        raise TowersError(f"planted data: feature_share must lie in [0, 1], got {feature_share!r}")
    rng = np.random.default_rng(seed)
    group, attrs, x = _item_features(rng, n_items, groups, attr_dim)
    f = _random_tanh_map(rng, x, hidden=32, out=rank, gain=1.0)
    v = math.sqrt(feature_share) * f + math.sqrt(1.0 - feature_share) * rng.normal(size=(n_items, rank))
    u = rng.normal(size=(n_users, rank))
    scale = 1.0 / math.sqrt(rank)  # then u.v has variance ~1 over random pairs
    u, v = u * math.sqrt(scale), v * math.sqrt(scale)
    b_user = rng.normal(0.0, 0.3, size=n_users)
    b_item = rng.normal(0.0, 0.3, size=n_items)

    threshold = rank * (n_users + n_items) * math.log(max(n_users, n_items))
    n_obs = int(math.ceil(oversampling * threshold))
    if n_obs > n_users * n_items // 2:
        raise TowersError(f"planted data: {n_obs} ratings would fill more than half of the {n_users} x {n_items} "
                          "matrix; lower oversampling or rank, or enlarge the matrix")
    flat = np.sort(rng.choice(n_users * n_items, size=n_obs, replace=False))
    uu, ii = flat // n_items, flat % n_items
    mean = mean_rating + b_user[uu] + b_item[ii] + np.einsum("ij,ij->i", u[uu], v[ii])
    rating = mean + noise * rng.normal(size=n_obs)

    out = pathlib.Path(out_dir)
    user_ids = np.arange(1, n_users + 1, dtype=np.int64)
    item_ids = _item_ids(n_items)
    item_col = pa.array(item_ids.tolist(), pa.string())
    paths = {
        "ratings": _write_parquet(out / "ratings.parquet", pa.table({
            "user_id": pa.array(user_ids[uu], pa.int64()), "item_id": item_col.take(pa.array(ii)),
            "rating": pa.array(rating, pa.float64())})),
        "items": _write_parquet(out / "items.parquet", _items_table(item_ids, group, attrs)),
        "truth_users": write_truth(out / "truth" / "user_vectors.parquet", user_ids, u, b_user, "user"),
        "truth_items": write_truth(out / "truth" / "item_vectors.parquet", item_ids, v, mean_rating + b_item, "item"),
    }
    info = {"kind": "explicit", "seed": seed, "n_users": n_users, "n_items": n_items, "rank": rank, "noise": noise,
            "n_ratings": n_obs, "threshold": threshold, "oversampling": oversampling,
            "density": n_obs / (n_users * n_items), "feature_share": feature_share,
            "signal_std": float(np.std(mean - mean_rating))}
    paths["planted"] = write_text_atomic(out / "truth" / "planted.json", json.dumps(info, indent=2) + "\n")
    return paths


# ---------------------------------------------------------------- implicit events

def generate_implicit(out_dir, seed: int = 0, n_users: int = 2000, n_items: int = 1200, rank: int = 4,
                      events_per_user: float = 100.0, min_events: int = 20, taste: float = 2.0,
                      popularity: float = 0.8, groups: int = 16, attr_dim: int = 8,
                      gain: float = 1.0) -> dict[str, pathlib.Path]:
    """Write planted implicit events under ``out_dir``: each user draws distinct items by softmax.

    User u draws n_u = min_events + Poisson(events_per_user - min_events) distinct items without
    replacement, each step in proportion to exp(u_u . v_i + b_i). v_i is a random tanh map of the
    item's features (a group and an attribute vector), scaled so u.v has standard deviation
    `taste` over random pairs; b_i (standard deviation `popularity`) is a linear function of the
    same features. Files: events.parquet (user_id, item_id), items.parquet (item_id, group,
    attributes), truth/user_vectors.parquet, truth/item_vectors.parquet, truth/planted.json.
    """
    _check_sizes(n_users=(n_users, 1), n_items=(n_items, 2), rank=(rank, 1), min_events=(min_events, 1),
                 events_per_user=(events_per_user, float(min_events)), groups=(groups, 1), attr_dim=(attr_dim, 1),
                 taste=(taste, 0.0), popularity=(popularity, 0.0), gain=(gain, 0.0))
    rng = np.random.default_rng(seed)
    group, attrs, x = _item_features(rng, n_items, groups, attr_dim)
    v = _random_tanh_map(rng, x, hidden=32, out=rank, gain=gain)
    u = rng.normal(size=(n_users, rank))
    spread = float(np.std(u[:512] @ v.T))
    u *= taste / spread if spread > 0 else 1.0
    b = x @ rng.normal(size=x.shape[1])
    b = popularity * (b - b.mean()) / (b.std() if b.std() > 0 else 1.0)

    n_events = np.minimum(min_events + rng.poisson(events_per_user - min_events, size=n_users), n_items // 2)
    users, items = [], []
    for lo in range(0, n_users, _CHUNK):  # a loop over user chunks, not over events
        hi = min(n_users, lo + _CHUNK)
        mask = _gumbel_top(rng, u[lo:hi] @ v.T + b, n_events[lo:hi])
        r, c = np.nonzero(mask)
        users.append(r + lo)
        items.append(c)
    uu, ii = np.concatenate(users), np.concatenate(items)
    order = rng.permutation(len(uu))  # a log in no particular order
    uu, ii = uu[order], ii[order]

    out = pathlib.Path(out_dir)
    user_ids = np.arange(1, n_users + 1, dtype=np.int64)
    item_ids = _item_ids(n_items)
    item_col = pa.array(item_ids.tolist(), pa.string())
    paths = {
        "events": _write_parquet(out / "events.parquet", pa.table({
            "user_id": pa.array(user_ids[uu], pa.int64()), "item_id": item_col.take(pa.array(ii))})),
        "items": _write_parquet(out / "items.parquet", _items_table(item_ids, group, attrs)),
        "truth_users": write_truth(out / "truth" / "user_vectors.parquet", user_ids, u, np.zeros(n_users), "user"),
        "truth_items": write_truth(out / "truth" / "item_vectors.parquet", item_ids, v, b, "item"),
    }
    info = {"kind": "implicit", "seed": seed, "n_users": n_users, "n_items": n_items, "rank": rank,
            "n_events": int(len(uu)), "events_per_user": events_per_user, "min_events": min_events,
            "taste": taste, "popularity": popularity, "gain": gain,
            "threshold": rank * (n_users + n_items) * math.log(max(n_users, n_items))}
    paths["planted"] = write_text_atomic(out / "truth" / "planted.json", json.dumps(info, indent=2) + "\n")
    return paths


def main(argv=None) -> int:
    """CLI: ``python -m towers.synthetic.planted {explicit,implicit} OUT_DIR [--seed N]``; prints each file written."""
    parser = argparse.ArgumentParser(prog="python -m towers.synthetic.planted",
                                     description="Write planted benchmark data with known truth vectors.")
    parser.add_argument("kind", choices=("explicit", "implicit"))
    parser.add_argument("out_dir")
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args(argv)
    make = generate_explicit if args.kind == "explicit" else generate_implicit
    try:
        paths = make(args.out_dir, seed=args.seed)
    except TowersError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return TowersError.exit_code
    for name, path in paths.items():
        print(f"{name:<12} {path}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
