"""The planted generators (towers/synthetic/planted.py): rank-r ratings plus noise, and events drawn by a
softmax over true scores, checked from their files alone."""

from __future__ import annotations

import json
import math

import numpy as np
import pyarrow.parquet as pq
import pytest

from towers.errors import TowersError
from towers.synthetic.planted import generate_explicit

from ..helpers import read_vectors
from ..sizes import PLANTED_EXPLICIT as EXPLICIT
from ..sizes import PLANTED_IMPLICIT as IMPLICIT


def test_explicit_data_is_rank_r_plus_noise_sigma(planted_explicit):
    data = planted_explicit
    info = json.loads((data / "truth" / "planted.json").read_text())
    ratings = pq.read_table(data / "ratings.parquet").to_pandas()
    users, u, bu = read_vectors(data / "truth" / "user_vectors.parquet")
    items, v, bi = read_vectors(data / "truth" / "item_vectors.parquet")
    # the planted mean matrix (minus its biases) has rank exactly r: numpy's SVD-based rank
    assert np.linalg.matrix_rank(u @ v.T) == EXPLICIT["rank"]
    r_of = {x: i for i, x in enumerate(users)}
    c_of = {x: i for i, x in enumerate(items)}
    qi = ratings.user_id.map(r_of).to_numpy()
    ci = ratings.item_id.map(c_of).to_numpy()
    # entries drawn without replacement, as many as oversampling * r (n+m) ln(max(n, m))
    assert len(np.unique(qi * len(items) + ci)) == len(ratings) == info["n_ratings"]
    n, m, r = EXPLICIT["n_users"], EXPLICIT["n_items"], EXPLICIT["rank"]
    assert info["n_ratings"] == math.ceil(EXPLICIT["oversampling"] * r * (n + m) * math.log(max(n, m)))
    resid = ratings.rating.to_numpy() - ((u[qi] * v[ci]).sum(1) + bu[qi] + bi[ci])
    # the residuals are the noise: mean 0 (se sigma/sqrt(N)) and sd sigma (se about sigma/sqrt(2N)),
    # standard errors of the normal sample mean and sd (from memory); 5 se leaves room
    se = EXPLICIT["noise"] / math.sqrt(len(resid))
    assert abs(resid.mean()) < 5 * se
    assert abs(resid.std() - EXPLICIT["noise"]) < 5 * se / math.sqrt(2)


def test_implicit_data_draws_distinct_items_by_true_scores(planted_implicit):
    data = planted_implicit
    events = pq.read_table(data / "events.parquet").to_pandas()
    assert not events.duplicated().any()  # without replacement
    per_user = events.groupby("user_id").size()
    assert per_user.min() >= IMPLICIT["min_events"]
    # users pick items they score higher: the mean true logit of drawn items is above the catalog's
    users, u, _ = read_vectors(data / "truth" / "user_vectors.parquet")
    items, v, b = read_vectors(data / "truth" / "item_vectors.parquet")
    logits = u @ v.T + b
    qi = events.user_id.map({x: i for i, x in enumerate(users)}).to_numpy()
    ci = events.item_id.map({x: i for i, x in enumerate(items)}).to_numpy()
    assert logits[qi, ci].mean() > logits.mean() + 1.0
    # but far from a deterministic top list: if users took their n_u best items, every draw would rank
    # inside the user's own top n_u by true logit; softmax draws put only about half there (0.53 measured)
    n_u = np.bincount(qi)
    rank = np.argsort(np.argsort(-logits, axis=1), axis=1)
    assert (rank[qi, ci] < n_u[qi]).mean() < 0.7


def test_generators_refuse_bad_sizes(tmp_path):
    with pytest.raises(TowersError, match="rank must be an integer >= 1"):
        generate_explicit(tmp_path, rank=0)
    with pytest.raises(TowersError, match="more than half"):
        generate_explicit(tmp_path, n_users=20, n_items=10, rank=3)
