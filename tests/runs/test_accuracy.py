"""Accuracy against the limit on planted data (towers/synthetic/planted.py), at test size.

The full benchmark is scripts/accuracy (README "Accuracy against the limit"); these are the same
checks on smaller data with looser bounds. Each bound names the full-benchmark target it loosens
and the figure measured there. Training goes through towers.api.train, as a user's would. The
MovieLens case (scripts/accuracy --movielens) is checked here up to its training: the files it
writes, its config and the split, against pandas on the source.
"""

from __future__ import annotations

import importlib.util
import json
import math
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import towers
from towers import config as C
from towers.data.encoders import make_encoder
from towers.data.prepare import prepare
from towers.model.bundle import load_payload

from ..helpers import read_vectors
from ..sizes import PLANTED_EXPLICIT, PLANTED_IMPLICIT

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT / "scripts"))
_spec = importlib.util.spec_from_file_location("accuracy_script", ROOT / "scripts" / "accuracy.py")
acc = importlib.util.module_from_spec(_spec)
_spec.loader.exec_module(acc)
from accuracy_ratios import ratio_rows  # noqa: E402

EXPLICIT, IMPLICIT = PLANTED_EXPLICIT, PLANTED_IMPLICIT  # the planted data of tests/conftest.py
# one thread: on two cores shared with other jobs, two threads of one run mostly wait on each other
ONE_THREAD = {"run": {"threads": 1}}


# ---------------------------------------------------------------- helpers

def _aligned(path: Path, ids: list):
    """Vectors and biases of `path` in the order of `ids`."""
    own, vec, bias = read_vectors(path)
    row = {v: i for i, v in enumerate(own)}
    pick = np.array([row[i] for i in ids])
    return vec[pick], bias[pick]


def _pairs(run: Path) -> dict:
    return load_payload(run / "pairs.pt", "pairs file")


def _brute_recall(scores: np.ndarray, test_q, test_c, known_q, known_c, candidates: np.ndarray, k: int) -> float:
    """recall@k by brute force with numpy: full score matrix, known pairs and non-candidates set to -inf,
    each query's top k by argsort, hits / positives averaged over queries (README "Ranking metrics")."""
    s = scores.copy()
    s[:, ~candidates] = -np.inf
    s[known_q, known_c] = -np.inf
    test = {(q, c) for q, c in zip(test_q.tolist(), test_c.tolist()) if candidates[c]}
    test -= set(zip(known_q.tolist(), known_c.tolist()))
    pos = np.zeros(s.shape, dtype=bool)
    for q, c in test:
        pos[q, c] = True
    queries = np.flatnonzero(pos.any(1))
    top = np.argsort(-s[queries], axis=1, kind="stable")[:, :k]
    hits = np.take_along_axis(pos[queries], top, axis=1).sum(1)
    return float(np.mean(hits / pos[queries].sum(1)))


# ---------------------------------------------------------------- fixtures

@pytest.fixture(scope="module")
def explicit(planted_explicit, tmp_path_factory):
    out = tmp_path_factory.mktemp("accuracy_explicit")
    # smaller batches than the benchmark's 4096: this log is a quarter the size, so 1024 keeps the steps per epoch
    cfg = acc.planted_config("explicit", planted_explicit, out,
                             {"model": {"dim": EXPLICIT["rank"]}, "training": {"batch_size": 1024, "epochs": 25}, **ONE_THREAD})
    result = towers.train(cfg, out / "run")
    info = json.loads((planted_explicit / "truth" / "planted.json").read_text())
    return out, result["metrics"], info


@pytest.fixture(scope="module")
def implicit(planted_implicit, tmp_path_factory):
    out = tmp_path_factory.mktemp("accuracy_implicit")
    cfg = acc.planted_config("implicit", planted_implicit, out,
                             {"model": {"dim": IMPLICIT["rank"]}, "training": {"epochs": 12}, **ONE_THREAD})
    result = towers.train(cfg, out / "run")
    return out, result["metrics"]


# ---------------------------------------------------------------- ratings against the noise floor

@pytest.mark.slow
def test_oracle_lands_on_the_noise_floor(explicit, planted_explicit):
    out, metrics, info = explicit
    pairs = _pairs(out / "run")
    test = pairs["test"]
    n_test = len(test["query"])
    u, bu = _aligned(planted_explicit / "truth" / "user_vectors.parquet", pairs["query_ids"])
    v, bi = _aligned(planted_explicit / "truth" / "item_vectors.parquet", pairs["item_ids"])
    q, c = test["query"].numpy(), test["candidate"].numpy()
    rmse = math.sqrt(np.mean(((u[q] * v[c]).sum(1) + bu[q] + bi[c] - test["target"].numpy()) ** 2))
    # reference: numpy brute force from the truth files gives the oracle row
    assert metrics["warm"]["oracle"]["rmse"] == pytest.approx(rmse, rel=1e-5)
    # the Bayes risk of squared loss is the noise variance (from memory): the true mean's held-out RMSE
    # is sigma, within 4 standard errors sqrt(1/(2n)) (full benchmark: the same band)
    band = acc.noise_band(info["noise"], n_test)
    assert abs(rmse / info["noise"] - 1.0) < band


@pytest.mark.slow
def test_no_model_beats_the_noise(explicit):
    out, metrics, info = explicit
    band = acc.noise_band(info["noise"], len(_pairs(out / "run")["test"]["query"]))
    for model, m in metrics["warm"].items():
        # held-out RMSE below sigma (beyond sampling error) would mean test pairs leaked into training
        assert m["rmse"] / info["noise"] > 1.0 - band, model


@pytest.mark.slow
def test_factor_model_and_towers_reach_the_floor(explicit):
    out, metrics, info = explicit
    # full benchmark target 1.05 sigma (measured there: linear_factor 1.037, towers 1.040); at this
    # size (half the ratings per user) the bound is 1.08 sigma (measured here: 1.026 and 1.031)
    for model in ("linear_factor", "towers"):
        assert metrics["warm"][model]["rmse"] / info["noise"] <= 1.08, model
    # and popularity (item means), which ignores the user, is far off: the signal u.v has sd ~1 = 2 sigma
    assert metrics["warm"]["popularity"]["rmse"] / info["noise"] > 1.8


@pytest.mark.slow
def test_the_bound_catches_a_broken_model(explicit, planted_explicit, tmp_path):
    _, _, info = explicit
    cfg = acc.planted_config("explicit", planted_explicit, tmp_path,
                             {"model": {"dim": EXPLICIT["rank"]}, "training": {"id_l2": 1e5, "epochs": 3},
                              "evaluation": {"baseline": False}, **ONE_THREAD})
    metrics = towers.train(cfg, tmp_path / "run")["metrics"]
    rows, missed = acc.explicit_report(metrics, info, len(_pairs(tmp_path / "run")["test"]["query"]), max_ratio=1.08)
    # id rows crushed to zero leave only the global mean plus feature effects: far above the floor
    assert any(m.startswith("explicit towers") for m in missed), rows


# ---------------------------------------------------------------- events against the oracle

@pytest.mark.slow
def test_recall_matches_numpy_brute_force(implicit, planted_implicit):
    out, metrics = implicit
    run, pairs = out / "run", _pairs(out / "run")
    known_q = np.concatenate([pairs["train"]["query"].numpy(), pairs["valid"]["query"].numpy()])
    known_c = np.concatenate([pairs["train"]["candidate"].numpy(), pairs["valid"]["candidate"].numpy()])
    warm, cold = pairs["warm_items"].numpy(), pairs["cold_items"].numpy()
    # towers: scores from the exported parquet files alone (README "Using the exported vectors elsewhere")
    u, _ = _aligned(run / "user_embeddings.parquet", pairs["query_ids"])
    v, bv = _aligned(run / "item_embeddings.parquet", pairs["item_ids"])
    scores = u @ v.T + bv
    # oracle: the true logits from the truth files
    tu, _ = _aligned(planted_implicit / "truth" / "user_vectors.parquet", pairs["query_ids"])
    tv, tb = _aligned(planted_implicit / "truth" / "item_vectors.parquet", pairs["item_ids"])
    truth = tu @ tv.T + tb
    t, ct = pairs["test"], pairs["cold_test"]
    none = np.zeros(0, dtype=np.int64)
    for model, s in (("towers", scores), ("oracle", truth)):
        # reference: brute-force recall@20 in numpy (float scores: no ties at the cut, almost surely)
        w = _brute_recall(s, t["query"].numpy(), t["candidate"].numpy(), known_q, known_c, warm, 20)
        c = _brute_recall(s, ct["query"].numpy(), ct["candidate"].numpy(), none, none, cold, 20)
        assert metrics["warm"][model]["recall@20"] == pytest.approx(w, abs=1e-6), model
        assert metrics["cold"][model]["recall@20"] == pytest.approx(c, abs=1e-6), model


@pytest.mark.slow
def test_warm_recall_near_the_oracle(implicit):
    _, metrics = implicit
    w = metrics["warm"]
    # the task is not trivial: the oracle itself misses most held-out positives in its top 20
    assert w["oracle"]["recall@20"] < 0.6
    # full benchmark target 0.9 x oracle (measured there: towers 0.94, linear_factor 0.94). This data has
    # 3/5 of the events per user and 12 epochs: towers >= 0.85 (measured here 0.94); the linear factor
    # model, with half the events per item and no features, >= 0.75 (measured here 0.81, its plateau)
    assert w["towers"]["recall@20"] >= 0.85 * w["oracle"]["recall@20"]
    assert w["linear_factor"]["recall@20"] >= 0.75 * w["oracle"]["recall@20"]
    assert w["towers"]["recall@20"] <= 1.05 * w["oracle"]["recall@20"]  # the oracle is the limit


@pytest.mark.slow
def test_cold_items_ranked_from_features_alone(implicit):
    out, metrics = implicit
    c = metrics["cold"]
    # full benchmark targets 0.8 x oracle (measured 0.91) and 2 x popularity (measured 6.2); here 0.75
    # (measured 0.94) and 2 (measured 3.9: only 90 cold items, so chance is already 20/90)
    assert c["towers"]["recall@20"] >= 0.75 * c["oracle"]["recall@20"]
    assert c["towers"]["recall@20"] >= 2.0 * c["popularity"]["recall@20"]
    # ids only: every cold item gets the same unknown row, so the linear factor model ties them all,
    # exactly like popularity (no cold item has a training count); ties count at their expected value
    assert c["linear_factor"]["recall@20"] == c["popularity"]["recall@20"]
    # which is chance: the mean recall of random orders (numpy simulation, below)
    pairs = _pairs(out / "run")
    cold = np.flatnonzero(pairs["cold_items"].numpy())
    q, it = pairs["cold_test"]["query"].numpy(), pairs["cold_test"]["candidate"].numpy()
    rng = np.random.default_rng(0)
    sims = []
    for _ in range(200):
        rank = np.empty(len(pairs["item_ids"]), dtype=np.int64)
        rank[cold[rng.permutation(len(cold))]] = np.arange(len(cold))
        hit = (rank[it] < 20).astype(float)
        per_q = np.bincount(q, hit) / np.maximum(np.bincount(q), 1)
        sims.append(per_q[np.bincount(q) > 0].mean())
    # reference: the simulation's mean, within 4 standard errors of a mean of 200 (std / sqrt(200))
    assert abs(c["linear_factor"]["recall@20"] - np.mean(sims)) < 4 * np.std(sims) / np.sqrt(len(sims))
    # hand-worked: each positive is in the top 20 of the len(cold) tied items with probability 20 / len(cold)
    assert c["linear_factor"]["recall@20"] == pytest.approx(20 / len(cold), rel=1e-12)


# ---------------------------------------------------------------- ratio rows

def test_ratio_rows_by_hand():
    metrics = {"warm": {"popularity": {"recall@20": 0.1}, "linear_factor": {"recall@20": 0.3},
                        "towers": {"recall@20": 0.4}, "oracle": {"recall@20": 0.5}},
               "cold": {"popularity": {"recall@20": 0.1}, "towers": {"recall@20": 0.25}}}
    text = ratio_rows(metrics)
    # hand-computed: 0.4/0.5, 0.4/0.1, 0.3/0.5; the cold slice has no oracle
    assert "[warm] recall@20 ratios" in text
    assert "towers/oracle         0.800" in text and "towers/popularity     4.000" in text
    assert "linear_factor/oracle  0.600" in text
    assert "towers/popularity     2.500" in text and "n/a" in text.split("[cold]")[1]


# ---------------------------------------------------------------- MovieLens latest-small: the data, not the training


@pytest.fixture(scope="module")
def movielens(tmp_path_factory):
    """The script's MovieLens files and a config pointing at them (seed 2), next to the source read by pandas."""
    out = tmp_path_factory.mktemp("movielens")
    info = acc.prepare_movielens(out)
    ratings = pd.read_pickle(acc.movielens_source(), compression="xz")
    return out, info, ratings, acc.movielens_config(out, out, seed=2)


def test_movielens_events_are_the_ratings_of_four_and_up(movielens):
    out, info, ratings, _ = movielens
    events = pd.read_parquet(out / "events.parquet")
    liked = ratings[ratings.rating >= 4]  # reference: pandas boolean selection on the source
    assert len(events) == info["events"] == len(liked) == 51568  # 51,568 of the 100,004 ratings
    assert list(events.columns) == ["userId", "movieId", "timestamp"]  # no target column: every row an event
    key = ["userId", "movieId", "timestamp"]
    assert events.sort_values(key).reset_index(drop=True).equals(liked[key].sort_values(key).reset_index(drop=True))
    items = pd.read_parquet(out / "items.parquet")
    # one row per movie with an event, genres and year as the source gives them (reference: pandas groupby first)
    first = liked.groupby("movieId")[["genres", "year"]].first()
    assert items.movieId.is_unique and set(items.movieId) == set(liked.movieId) and len(items) == info["movies"]
    mine = items.set_index("movieId").loc[first.index]
    assert (mine.genres == first.genres.astype(str)).all()
    assert mine.year.equals(first.year) and mine.year.isna().sum() == info["movies_without_year"] > 0


def test_movielens_genres_are_read_as_tokens(movielens):
    out, _, _, config = movielens
    spec = next(f for f in C.load(config).items.features if f.name == "genres")
    items = pd.read_parquet(out / "items.parquet")
    encoder = make_encoder(spec).fit(items.genres, "items.parquet")
    codes = encoder.transform(items.genres, "items.parquet").numpy()
    # reference: pandas str.split on '|', the separator MovieLens uses
    expected = items.genres.str.split("|")
    assert set(encoder.vocab) == set(expected.explode()) and len(encoder.vocab) >= 19
    vocab = np.array(["", "?"] + list(encoder.vocab), dtype=object)  # index 0 pads, 1 is unknown
    decoded = [list(vocab[row[row > 0]]) for row in codes[:300]]
    assert decoded == expected.iloc[:300].tolist()
    assert (codes > 0).sum() == expected.str.len().sum()  # every token kept (none over token_limit)


def test_movielens_config_points_at_the_written_data(movielens):
    out, _, _, config = movielens
    cfg = C.load(config)
    # the paths rewritten into the script's folder, the seed set; the rest as configs/movielens.yaml says
    assert Path(cfg.interactions.path) == out / "events.parquet" and Path(cfg.items.path) == out / "items.parquet"
    assert Path(cfg.interactions.path).is_file() and Path(cfg.items.path).is_file()
    assert cfg.run.seed == 2 and cfg.evaluation.split == "user_recent" and cfg.interactions.time_column == "timestamp"
    ev = cfg.evaluation
    assert (ev.test_fraction, ev.validation_fraction, ev.cold_item_fraction) == (0.2, 0.1, 0.1)
    assert cfg.interactions.target_column is None and cfg.training.loss == "softmax"
    committed = C.load(ROOT / "configs" / "movielens.yaml")  # where scripts/accuracy --movielens writes by default
    assert Path(committed.interactions.path) == ROOT / "build" / "movielens" / "events.parquet"
    assert Path(committed.items.path) == ROOT / "build" / "movielens" / "items.parquet"


def test_movielens_split_holds_out_each_users_latest_fifth(movielens):
    _, info, ratings, config = movielens
    data = prepare(C.load(config))
    users, movies = data.queries.ids, data.candidates.ids
    frame = pd.concat([pd.DataFrame({"u": users[p.query.numpy()], "m": movies[p.candidate.numpy()], "t": p.time.numpy(),
                                     "side": side}) for side, p in (("train", data.train), ("valid", data.valid),
                                                                    ("test", data.test), ("cold", data.cold_test))])
    cold = set(movies[data.cold_items.numpy()])
    # reference: pandas on the source; 10% of the movies (617 of 6,170) held out with all their events
    liked = ratings[ratings.rating >= 4]
    assert len(cold) == round(0.1 * info["movies"]) and (frame.side == "cold").sum() == liked.movieId.isin(cold).sum()
    warm = frame[frame.side != "cold"]
    k = warm.groupby("u").size()  # reference: pandas groupby
    n_test = np.minimum(np.floor(0.2 * k + 0.5), k - 1)
    n_valid = np.minimum(np.floor(0.1 * (k - n_test) + 0.5), k - n_test - 1)
    per = warm.groupby(["u", "side"]).size().unstack(fill_value=0)
    assert (per.test == n_test).all() and (per.valid == n_valid).all()
    # by time: no training event of a user after the user's validation ones, none of those after the test ones
    t = warm.groupby(["u", "side"]).t.agg(["min", "max"]).unstack()
    assert (t[("max", "train")] <= t[("min", "valid")].fillna(np.inf)).all()
    assert (t[("max", "valid")].fillna(-np.inf) <= t[("min", "test")].fillna(np.inf)).all()
    assert (t[("max", "train")] <= t[("min", "test")].fillna(np.inf)).all()


def test_movielens_targets_by_hand():
    warm = {"popularity": {"recall@20": 0.08, "ndcg@20": 0.07}, "linear_factor": {"recall@20": 0.12, "ndcg@20": 0.09},
            "item_knn": {"recall@20": 0.13, "ndcg@20": 0.11}, "ease": {"recall@20": 0.14, "ndcg@20": 0.10},
            "towers": {"recall@20": 0.135, "ndcg@20": 0.105}}
    cold = {"popularity": {"recall@20": 0.03}, "towers": {"recall@20": 0.15}}
    rows, missed = acc.movielens_report({"warm": warm, "cold": cold})
    # hand-worked: the best reference is ease on recall (0.14 > 0.135: missed), item_knn on ndcg (0.11 > 0.105:
    # missed); cold 0.15 >= 4 x 0.03 = 0.12 (met, ratio 5)
    assert [r["ok"] for r in rows] == [False, False, True]
    assert "(ease)" in rows[0]["target"] and "(item_knn)" in rows[1]["target"]
    assert rows[0]["ratio"] == pytest.approx(0.135 / 0.14) and rows[2]["ratio"] == pytest.approx(5.0)
    assert missed == ["movielens warm recall@20 towers >= best reference (ease): 0.1350 < 0.1400",
                      "movielens warm ndcg@20 towers >= best reference (item_knn): 0.1050 < 0.1100"]
    warm["towers"] = {"recall@20": 0.14, "ndcg@20": 0.12}  # a tie with the best counts as met
    assert acc.movielens_report({"warm": warm, "cold": cold})[1] == []
    runs = [{"metrics": {"warm": {"towers": {"recall@20": 0.1, "ndcg@20": 0.2}}, "cold": {}}},
            {"metrics": {"warm": {"towers": {"recall@20": 0.3, "ndcg@20": 0.4}}, "cold": {}}}]
    assert acc._mean_metrics(runs)["warm"]["towers"] == pytest.approx({"recall@20": 0.2, "ndcg@20": 0.3})
