"""The exported embeddings read from SQL: DuckDB ranks neighbours exactly as `towers similar` does.

The queries are the README's recipe ("Reading the embeddings from SQL"), run by DuckDB on the
parquet files alone; towers is only the thing checked. Runs are tiny (200 items, k = 8, one epoch;
tests/conftest.py).
"""

from __future__ import annotations

from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import pytest

import towers

TOP = 10
TIE = 1e-5  # scores closer than this may swap places: float32 in towers, double in SQL

# The README's recipes. The vectors arrive as FLOAT[] (a LIST), so the list functions apply; the cast
# to DOUBLE[] makes DuckDB sum in double precision.
COSINE = """
WITH items AS (
  SELECT id, CAST(embedding AS DOUBLE[]) AS v FROM read_parquet($items)),
unit AS (
  SELECT id, v, sqrt(list_inner_product(v, v)) AS norm FROM items),
pairs AS (
  SELECT a.id AS query_id, b.id AS item_id, list_inner_product(a.v, b.v) / (a.norm * b.norm) AS score
  FROM unit a JOIN unit b ON a.id <> b.id),
ranked AS (
  SELECT *, row_number() OVER (PARTITION BY query_id ORDER BY score DESC) AS rank FROM pairs)
SELECT query_id, rank, item_id, score FROM ranked WHERE rank <= $top ORDER BY query_id, rank
"""

PAIR_SCORE = """
WITH meta AS (
  SELECT max(CASE WHEN decode(key) = 'temperature' THEN CAST(decode(value) AS DOUBLE) END) AS temperature,
         max(CASE WHEN decode(key) = 'global_bias' THEN CAST(decode(value) AS DOUBLE) END) AS global_bias
  FROM parquet_kv_metadata($items)),
pairs AS (
  SELECT q.id AS query_id, c.id AS item_id,
         list_inner_product(CAST(q.embedding AS DOUBLE[]), CAST(c.embedding AS DOUBLE[])) / meta.temperature
           + q.bias + c.bias + meta.global_bias AS score
  FROM read_parquet($queries) q JOIN read_parquet($items) c ON q.id <> c.id, meta),
ranked AS (
  SELECT *, row_number() OVER (PARTITION BY query_id ORDER BY score DESC) AS rank FROM pairs)
SELECT query_id, rank, item_id, score FROM ranked WHERE rank <= $top ORDER BY query_id, rank
"""


@pytest.fixture(scope="module")
def basket_run(tiny_runs) -> Path:
    return tiny_runs.train()


@pytest.fixture(scope="module")
def pairs_run(tiny_runs) -> Path:
    # two towers, so queries come from query_embeddings.parquet; a temperature that is not 1
    return tiny_runs.train(config="store_copurchase.yaml", model={"shared_tower": False, "temperature": 0.5},
                           evaluation={"baseline": False})


def _same_ranking(sql: pd.DataFrame, api_all: pd.DataFrame) -> None:
    """SQL's top-TOP lists equal towers' row for row, except where two scores tie within TIE.

    `api_all` is towers' full ranking (every eligible item), so every pair SQL returns can be looked up.
    """
    api = api_all[api_all["rank"] <= TOP]
    key = ["query_id", "rank"]
    sql, api = sql.set_index(key).sort_index(), api.set_index(key).sort_index()
    assert sql.index.equals(api.index)
    # each pair is scored the same (towers' score of the pair SQL put there)
    pair = api_all.set_index(["query_id", "item_id"])["score"]
    theirs = pair.loc[list(zip(sql.index.get_level_values(0), sql["item_id"]))].to_numpy()
    np.testing.assert_allclose(sql["score"].to_numpy(), theirs, atol=TIE)
    # and ranked the same: at each rank the same item, or two items whose scores tie
    np.testing.assert_allclose(sql["score"].to_numpy(), api["score"].to_numpy(), atol=TIE)
    differ = sql["item_id"].to_numpy() != api["item_id"].to_numpy()
    assert differ.mean() < 0.01  # ties are rare: nearly every row agrees outright


def test_embedding_column_arrives_as_a_float_list(basket_run):
    # reference: DuckDB's parquet reader; an Arrow fixed_size_list is stored as a parquet LIST
    con = duckdb.connect()
    types = dict(con.execute("SELECT column_name, column_type FROM (DESCRIBE SELECT * FROM read_parquet($p))",
                             {"p": str(basket_run / "item_embeddings.parquet")}).fetchall())
    assert types == {"id": "VARCHAR", "embedding": "FLOAT[]", "bias": "FLOAT"}
    k = con.execute("SELECT min(len(embedding)), max(len(embedding)) FROM read_parquet($p)",
                    {"p": str(basket_run / "item_embeddings.parquet")}).fetchone()
    assert k == (8, 8)


def test_cosine_neighbours_in_sql_match_similar(basket_run):
    # user_item runs: `similar` is the cosine of the item vectors, no biases, the item itself left out
    items = str(basket_run / "item_embeddings.parquet")
    sql = duckdb.connect().execute(COSINE, {"items": items, "top": TOP}).df()
    run = towers.load(basket_run)
    ids = run.embeddings("item")[0]
    assert (np.linalg.norm(run.embeddings("item")[1].numpy(), axis=1) > 0).all()  # every cosine is defined
    api = run.similar(ids, top=len(ids))
    assert len(sql) == len(ids) * TOP
    _same_ranking(sql, api)


@pytest.mark.slow
def test_pair_score_neighbours_in_sql_match_similar(pairs_run):
    # item_item runs: `similar` is the trained pair score dot(q, v) / temperature + b_q + b_v + g
    params = {"items": str(pairs_run / "item_embeddings.parquet"), "queries": str(pairs_run / "query_embeddings.parquet"),
              "top": TOP}
    sql = duckdb.connect().execute(PAIR_SCORE, params).df()
    run = towers.load(pairs_run)
    api = run.similar(run.embeddings("item")[0], top=200)
    assert len(sql) == 200 * TOP
    _same_ranking(sql, api)


def test_user_scores_in_sql_match_recommend(basket_run):
    # the same pair-score query on users x items gives `recommend` without its exclusions
    params = {"items": str(basket_run / "item_embeddings.parquet"), "queries": str(basket_run / "user_embeddings.parquet"),
              "top": TOP}
    sql = duckdb.connect().execute(PAIR_SCORE.replace("ON q.id <> c.id", "ON true"), params).df()
    run = towers.load(basket_run)
    api = run.recommend(run.embeddings("user")[0], top=200, exclude_known=False)
    sql["query_id"] = sql["query_id"].astype(np.int64)
    _same_ranking(sql, api)
