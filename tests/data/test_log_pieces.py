"""The interaction log read in pieces, from one file or a folder of files (tables.read_table_chunks,
table_files, IdPieces; prepare.read_interactions).

Reference for every check: the same log read whole by pandas (read_csv / read_parquet) and factorized
by pandas.factorize, the in-memory reading this replaces.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from towers import config as C
from towers.data import prepare as P
from towers.data.tables import IdPieces
from towers.errors import TowersError


def _log(n: int, seed: int, text_items: bool = True) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    items = rng.integers(0, 40, n)
    return pd.DataFrame({
        "user": rng.integers(0, 25, n) * 7,  # whole numbers, not 0..n-1, so codes and ids differ
        "item": [f"sku-{i}" for i in items] if text_items else items,
        "stars": rng.integers(1, 6, n).astype(float),
        "weight": rng.random(n),
        "when": pd.Timestamp("2026-01-01") + pd.to_timedelta(rng.integers(0, 10 ** 6, n), unit="s"),
        "basket": rng.integers(0, 30, n),
    })


def _config(folder, log: str) -> C.Config:
    raw = {"interactions": {"path": log, "query_column": "user", "candidate_column": "item", "target_column": "stars",
                            "weight_column": "weight", "time_column": "when", "group_column": "basket"},
           "training": {"loss": "squared"}}
    return C.resolve(raw, folder)


def _same(a: P.Log, b: P.Log) -> None:
    for name in ("query_ids", "candidate_ids"):
        x, y = getattr(a, name), getattr(b, name)
        np.testing.assert_array_equal(x.codes, y.codes)
        assert x.uniques.dtype == y.uniques.dtype
        np.testing.assert_array_equal(x.uniques, y.uniques)
    for name in ("target", "weight", "time"):
        np.testing.assert_array_equal(getattr(a, name), getattr(b, name))
    # groups: equal values, equal codes (the numbering is free), checked as a partition
    assert pd.crosstab(a.group, b.group).astype(bool).sum(axis=1).eq(1).all()
    assert len(np.unique(a.group)) == len(np.unique(b.group))


@pytest.mark.parametrize("suffix", [".csv", ".parquet"])
def test_a_log_read_in_small_pieces_equals_the_log_read_whole(tmp_path, monkeypatch, suffix):
    log = _log(500, seed=1)
    path = tmp_path / f"log{suffix}"
    log.to_csv(path, index=False) if suffix == ".csv" else log.to_parquet(path, index=False)
    whole = P.read_interactions(_config(tmp_path, path.name))
    monkeypatch.setattr(P, "LOG_PIECE_ROWS", 37)  # 14 pieces, the last one short
    pieces = P.read_interactions(_config(tmp_path, path.name))
    _same(pieces, whole)
    # and both equal pandas' own reading of the file
    read = pd.read_csv(path) if suffix == ".csv" else pd.read_parquet(path)
    np.testing.assert_array_equal(pieces.query, read["user"].to_numpy())
    np.testing.assert_array_equal(pieces.candidate.astype(str), read["item"].to_numpy().astype(str))
    codes, uniques = pd.factorize(read["item"])
    np.testing.assert_array_equal(pieces.candidate_ids.codes, codes)
    np.testing.assert_array_equal(pieces.candidate_ids.uniques, np.asarray(uniques, dtype=object))


@pytest.mark.parametrize("suffix", [".csv", ".parquet"])
def test_a_folder_of_files_reads_as_their_rows_one_after_another(tmp_path, monkeypatch, suffix):
    log = _log(300, seed=2)
    whole = tmp_path / f"whole{suffix}"
    folder = tmp_path / "days"
    folder.mkdir()
    write = (lambda df, p: df.to_csv(p, index=False)) if suffix == ".csv" else (lambda df, p: df.to_parquet(p, index=False))
    write(log, whole)
    for day, part in enumerate(np.array_split(np.arange(len(log)), 3)):  # name order is read order
        write(log.iloc[part], folder / f"day-{day:02d}{suffix}")
    (folder / "_SUCCESS").write_text("")  # markers a job writes beside its files are skipped
    monkeypatch.setattr(P, "LOG_PIECE_ROWS", 64)
    _same(P.read_interactions(_config(tmp_path, "days")), P.read_interactions(_config(tmp_path, whole.name)))


def test_files_of_numbers_and_of_text_merge_as_text(tmp_path):
    """One day's export wrote the item ids as numbers, another as text: all are read as text, as pandas
    reads a single CSV holding both."""
    folder = tmp_path / "days"
    folder.mkdir()
    _log(50, seed=3, text_items=False).to_parquet(folder / "a.parquet", index=False)
    _log(50, seed=4, text_items=True).to_parquet(folder / "b.parquet", index=False)
    got = P.read_interactions(_config(tmp_path, "days")).candidate_ids
    assert got.uniques.dtype == object
    both = pd.concat([pd.read_parquet(folder / "a.parquet"), pd.read_parquet(folder / "b.parquet")])
    codes, uniques = pd.factorize(both["item"].astype(str))
    np.testing.assert_array_equal(got.codes, codes)
    np.testing.assert_array_equal(got.uniques, np.asarray(uniques, dtype=object))


def test_id_pieces_of_one_piece_and_of_none():
    one = IdPieces()
    one.add(pd.Series([5, 3, 5]), "log.csv", "user")
    codes, uniques = one.finish()
    np.testing.assert_array_equal(codes, [0, 1, 0])
    np.testing.assert_array_equal(uniques, [5, 3])


def test_an_error_in_a_later_piece_of_a_later_file_names_that_file_and_its_row(tmp_path, monkeypatch):
    folder = tmp_path / "days"
    folder.mkdir()
    _log(40, seed=5).to_csv(folder / "day-1.csv", index=False)
    bad = _log(40, seed=6)
    bad["weight"] = bad["weight"].astype(object)
    bad.loc[29, "weight"] = -2.0  # the file's data row 30
    bad.to_csv(folder / "day-2.csv", index=False)
    monkeypatch.setattr(P, "LOG_PIECE_ROWS", 8)
    with pytest.raises(TowersError, match=r"day-2\.csv, column 'weight', row 30: negative weight -2\.0"):
        P.read_interactions(_config(tmp_path, "days"))


def test_a_folder_without_tables_or_with_mixed_formats_is_refused(tmp_path):
    empty = tmp_path / "empty"
    empty.mkdir()
    (empty / "notes.txt").write_text("x")
    with pytest.raises(TowersError, match=r"empty: the folder holds no \.csv, \.tsv, \.parquet or \.pq files; put"):
        P.read_interactions(_config(tmp_path, "empty"))
    (empty / "month=2026-11").mkdir()  # a partitioned layout: files one level down
    _log(10, seed=7).to_parquet(empty / "month=2026-11" / "part-0.parquet", index=False)
    with pytest.raises(TowersError, match=r"holds no .* files; its subfolders \(month=2026-11\) are not read: move "
                                          r"their files into one folder"):
        P.read_interactions(_config(tmp_path, "empty"))
    mixed = tmp_path / "mixed"
    mixed.mkdir()
    _log(10, seed=7).to_csv(mixed / "a.csv", index=False)
    _log(10, seed=8).to_parquet(mixed / "b.parquet", index=False)
    with pytest.raises(TowersError, match="mixes parquet and CSV files; convert them to one format"):
        P.read_interactions(_config(tmp_path, "mixed"))
