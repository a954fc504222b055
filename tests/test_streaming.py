"""Tables read and embedded in pieces give exactly what reading them whole gives.

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
import yaml

import towers
import towers.runs.run as run_module
from towers.data.tables import read_table, read_table_chunks
from towers.errors import TowersError
from towers.synthetic.demo_store import generate_store

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    base = tmp_path_factory.mktemp("streaming")
    generate_store(base / "data", n_items=200, n_customers=300, n_new_items=130)
    cfg = yaml.safe_load((ROOT / "configs" / "store_baskets.yaml").read_text())
    for side in ("users", "items"):
        cfg[side]["path"] = str(base / "data" / Path(cfg[side]["path"]).name)
    cfg["interactions"]["path"] = str(base / "data" / "baskets.parquet")
    cfg["evaluation"].update(oracle_users=None, oracle_items=None, baseline=False, cold_item_fraction=0.0)
    cfg["run"]["threads"] = 1
    cfg["training"].update(epochs=1, progress="plain")
    (base / "config.yaml").write_text(yaml.safe_dump(cfg))
    towers.train(base / "config.yaml", base / "run")
    return towers.load(base / "run"), base


def test_parquet_pieces_equal_the_whole_table(run, tmp_path):
    _, base = run
    path = base / "data" / "new_items.parquet"
    whole = read_table(path)
    cols = ["item_id", "price", "tags"]
    pieces = list(read_table_chunks(path, cols, 17))
    assert [start for start, _ in pieces] == list(range(0, len(whole), 17))
    joined = pd.concat([p for _, p in pieces], ignore_index=True)
    # reference: pandas' own read of the whole file
    pd.testing.assert_frame_equal(joined, whole[cols])


def test_pieces_refuse_a_missing_column(run):
    _, base = run
    with pytest.raises(TowersError, match="column 'colour': no such column"):
        list(read_table_chunks(base / "data" / "new_items.parquet", ["item_id", "colour"], 10))


def test_embed_file_in_pieces_equals_embedding_the_whole_frame(run, tmp_path, monkeypatch):
    r, base = run
    path = base / "data" / "new_items.parquet"
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


def test_unseen_values_are_counted_over_all_pieces(run, tmp_path, monkeypatch):
    r, base = run
    frame = pd.read_parquet(base / "data" / "new_items.parquet")
    frame["brand"] = [f"never-seen-{i % 3}" if i % 2 else b for i, b in enumerate(frame["brand"])]
    path = tmp_path / "odd_brands.parquet"
    frame.to_parquet(path)
    monkeypatch.setattr(run_module, "EMBED_CHUNK", 10)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        r.embed_file(path, tmp_path / "v.parquet", "items")
    # reference: the count written out by hand, every odd row of the frame
    assert any(f"brand: {len(frame) // 2}" in str(w.message) for w in caught)


def test_an_error_in_a_later_piece_names_the_row_of_the_file(run, tmp_path, monkeypatch):
    r, base = run
    frame = pd.read_parquet(base / "data" / "new_items.parquet")
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
