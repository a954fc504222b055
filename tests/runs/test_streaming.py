"""Tables embedded in pieces give exactly what embedding them whole gives.

`towers embed` reads a parquet table EMBED_CHUNK rows at a time; these tests shrink the piece so a
small table spans many pieces, and compare against the whole-table path (`Run.embed_items` on a
frame read by pandas), including error rows and unseen-value counts.
"""

from __future__ import annotations

import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest

import towers
import towers.runs.run as run_module
from towers.errors import TowersError


@pytest.fixture(scope="module")
def run(tiny_runs):
    """The shared tiny run (tests/conftest.py)."""
    out = tiny_runs.train()
    return towers.load(out)


@pytest.fixture(scope="module")
def table(small_store, tmp_path_factory) -> Path:
    """New arrivals (unseen ids) then the catalog (known ids) in one parquet table of 220 rows."""
    frame = pd.concat([pd.read_parquet(small_store / "new_items.parquet"), pd.read_parquet(small_store / "items.parquet")],
                      ignore_index=True)
    path = tmp_path_factory.mktemp("streaming") / "arrivals_and_catalog.parquet"
    frame.to_parquet(path, index=False)
    return path


def test_embed_file_in_pieces_equals_embedding_the_whole_frame(run, table, tmp_path, monkeypatch):
    r, path = run, table
    whole = r.embed_items(pd.read_parquet(path), str(path))  # reference: the frame read whole by pandas
    monkeypatch.setattr(run_module, "EMBED_CHUNK", 23)
    out = tmp_path / "vectors.parquet"
    assert r.embed_file(path, out, "items") == len(whole)
    got = pq.read_table(out)
    assert got.column("id").to_pylist() == whole["id"].tolist()
    np.testing.assert_array_equal(np.stack(got.column("embedding").to_pylist()), np.stack(whole["embedding"]))
    np.testing.assert_array_equal(got.column("bias").to_numpy(), whole["bias"].to_numpy())
    meta = got.schema.metadata
    assert meta[b"side"] == b"item" and meta[b"source"] == str(path).encode()


def test_unseen_values_are_counted_over_all_pieces(run, table, tmp_path, monkeypatch):
    r = run
    frame = pd.read_parquet(table)
    frame["brand"] = [f"never-seen-{i % 3}" if i % 2 else b for i, b in enumerate(frame["brand"])]
    path = tmp_path / "odd_brands.parquet"
    frame.to_parquet(path)
    monkeypatch.setattr(run_module, "EMBED_CHUNK", 10)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        r.embed_file(path, tmp_path / "v.parquet", "items")
    # reference: the count written out by hand, every odd row of the frame
    assert any(f"brand: {len(frame) // 2}" in str(w.message) for w in caught)


def test_an_error_in_a_later_piece_names_the_row_of_the_file(run, table, tmp_path, monkeypatch):
    r = run
    frame = pd.read_parquet(table)
    vectors = list(frame["description_vector"])
    vectors[101] = np.array([1.0, 2.0], dtype=vectors[0].dtype)  # wrong length in file row 102
    frame["description_vector"] = vectors
    path = tmp_path / "bad_vector.parquet"
    frame.to_parquet(path)
    monkeypatch.setattr(run_module, "EMBED_CHUNK", 25)
    out = tmp_path / "never.parquet"
    with pytest.raises(TowersError, match=r"column 'description_vector', row 102: vector of length 2"):
        r.embed_file(path, out, "items")
    assert not out.exists()  # nothing half-written


@pytest.mark.parametrize("suffix", ["parquet", "csv"])
def test_a_table_of_no_rows_gives_an_empty_embeddings_file(run, table, tmp_path, suffix):
    # a night with no new items: the nightly job's embed succeeds with an empty file of the usual columns
    empty = pd.read_parquet(table).head(0)
    path = tmp_path / f"no_new_items.{suffix}"
    empty.to_parquet(path) if suffix == "parquet" else empty.to_csv(path, index=False)
    out = tmp_path / "vectors.parquet"
    with pytest.warns(UserWarning, match=r"header but no rows; .*holds no vectors"):
        assert run.embed_file(path, out, "items") == 0
    got, usual = pq.read_table(out), pq.read_table(run.dir / "item_embeddings.parquet")
    assert got.num_rows == 0 and got.column_names == usual.column_names
    for name in usual.column_names:  # the same types: nightly files read together share one schema
        assert got.schema.field(name).type == usual.schema.field(name).type
    # a missing column is still an error, rows or none
    with pytest.raises(TowersError, match=r"column 'brand': no such column"):
        run.embed_file(_without(empty, "brand", tmp_path, suffix), tmp_path / "never.parquet", "items")


def _without(frame: pd.DataFrame, column: str, folder: Path, suffix: str) -> Path:
    path = folder / f"without_{column}.{suffix}"
    part = frame.drop(columns=[column])
    part.to_parquet(path) if suffix == "parquet" else part.to_csv(path, index=False)
    return path


def test_no_new_users_keep_the_runs_whole_number_id_type(run, small_store, tmp_path):
    path = tmp_path / "no_new_users.csv"
    pd.read_csv(small_store / "customers.csv").head(0).to_csv(path, index=False)
    out = tmp_path / "users.parquet"
    with pytest.warns(UserWarning, match=r"header but no rows"):
        assert run.embed_file(path, out, "users") == 0
    usual = pq.read_table(run.dir / "user_embeddings.parquet").schema.field("id").type
    assert pq.read_table(out).schema.field("id").type == usual == "int64"
