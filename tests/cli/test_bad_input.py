"""A catalogue of bad inputs, each driven through the CLI entry point `towers.cli.main`.

Every error case checks the same contract: exit code 2; stderr is exactly one line, starting
with `error: `, that names the file, the column and (where it applies) the 1-based data row,
and says how to fix it; no traceback; and nothing half-written is left behind (no --out folder
or file, and for `train` no RUN.partial folder, so no checkpoint was ever started).

Inputs that are *not* errors (new categories at embed time, a BOM/CRLF/quoted CSV, NaN in a
numeric feature, k too large for the data, missing_rows drop/default) are checked to succeed.

All cases share one copy of the small demo store; only a handful of tiny runs are trained.
"""

from __future__ import annotations

import copy
import re
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import torch
import yaml

from towers.cli import main as cli

# ---------------------------------------------------------------- shared data and helpers

LOG_ROWS = 1500


@pytest.fixture(scope="module")
def store(small_store, tmp_path_factory) -> Path:
    """A copy of the small demo store plus a short interaction log and a short ratings file."""
    root = Path(shutil.copytree(small_store, tmp_path_factory.mktemp("bad_input") / "store"))
    pd.read_parquet(root / "baskets.parquet").head(LOG_ROWS).to_parquet(root / "log.parquet", index=False)
    pd.read_csv(root / "ratings.csv").head(800).to_csv(root / "stars.csv", index=False)
    return root


def base_config(store: Path) -> dict:
    """A tiny, fast run: one epoch, a small tower, no baseline, one thread."""
    return {
        "run": {"threads": 1, "seed": 0},
        "interactions": {"path": str(store / "log.parquet"), "query_column": "customer_id",
                         "candidate_column": "item_id", "weight_column": "quantity"},
        "users": {"path": str(store / "customers.csv"), "id_column": "customer_id",
                  "features": [{"name": "age_band", "kind": "categorical"},
                               {"name": "household_size", "kind": "numeric"}]},
        "items": {"path": str(store / "items.parquet"), "id_column": "item_id",
                  "features": [{"name": "department", "kind": "categorical"},
                               {"name": "price", "kind": "numeric"},
                               {"name": "tags", "kind": "tokens"},
                               {"name": "description_vector", "kind": "vector", "length": 16}]},
        "model": {"dim": 4, "hidden": [8]},
        "training": {"epochs": 1, "batch_size": 256, "progress": "plain", "validate_queries": 50},
        "evaluation": {"baseline": False, "top_k": [5]},
    }


def ratings_config(store: Path, stars: Path | None = None) -> dict:
    cfg = base_config(store)
    cfg["interactions"] = {"path": str(stars or store / "stars.csv"), "query_column": "customer_id",
                           "candidate_column": "item_id", "target_column": "stars"}
    cfg["training"]["loss"] = "squared"
    return cfg


def write_config(folder: Path, cfg: dict, name: str = "run.yaml") -> Path:
    path = folder / name
    path.write_text(yaml.safe_dump(cfg), encoding="utf-8")
    return path


def change(cfg: dict, section: str, **keys) -> dict:
    out = copy.deepcopy(cfg)
    out.setdefault(section, {}).update(keys)
    return out


def call(capsys, *argv) -> tuple[int, str, str]:
    try:
        code = cli([str(a) for a in argv])
    except SystemExit as exc:  # argparse refusals; never expected in these cases
        pytest.fail(f"argparse exited with {exc.code}: {capsys.readouterr().err}")
    except Exception as exc:  # anything but a TowersError escaping main is a bug
        pytest.fail(f"uncaught {type(exc).__name__} escaped the CLI: {exc}")
    out, err = capsys.readouterr()
    return code, out, err


def expect_error(capsys, argv, *names: str, fix: str, gone=()) -> str:
    """Run the CLI; check the one-line error contract; return the message."""
    code, out, err = call(capsys, *argv)
    assert "Traceback" not in out + err
    assert code == 2, f"exit {code}; stderr: {err}"
    lines = err.splitlines()
    assert len(lines) == 1, f"expected exactly one stderr line, got: {err!r}"
    msg = lines[0]
    assert msg.startswith("error: "), msg
    for name in names:
        assert name in msg, f"{name!r} not named in: {msg}"
    assert re.search(fix, msg), f"no fix matching {fix!r} in: {msg}"
    for path in gone:
        assert not Path(path).exists(), f"partial output left behind: {path}"
    return msg


def train_fails(capsys, tmp_path: Path, cfg: dict, *names: str, fix: str) -> str:
    """`towers train` refuses the config before any training: no run folder, no RUN.partial."""
    out = tmp_path / "run"
    partial = tmp_path / "run.partial"
    msg = expect_error(capsys, ["train", write_config(tmp_path, cfg), "--out", out], *names, fix=fix,
                       gone=[out, partial])
    assert not list(tmp_path.glob("*/checkpoints/*.pt"))
    return msg


def train_ok(capsys, tmp_path: Path, cfg: dict, name: str = "run") -> tuple[Path, str]:
    out = tmp_path / name
    code, stdout, err = call(capsys, "train", write_config(tmp_path, cfg, f"{name}.yaml"), "--out", out)
    assert code == 0, err
    assert "Traceback" not in stdout + err and "error: " not in err
    assert (out / "model.pt").is_file() and not (tmp_path / f"{name}.partial").exists()
    return out, err


def customers(store: Path) -> pd.DataFrame:
    return pd.read_csv(store / "customers.csv")


def log_frame(store: Path) -> pd.DataFrame:
    return pd.read_parquet(store / "log.parquet")


def items_frame(store: Path) -> pd.DataFrame:
    return pd.read_parquet(store / "items.parquet")


def write_items(path: Path, frame: pd.DataFrame, vector_type=None) -> Path:
    table = pa.Table.from_pandas(frame, preserve_index=False)
    if vector_type is not None:
        i = table.schema.get_field_index("description_vector")
        table = table.set_column(i, "description_vector",
                                 pa.array(frame["description_vector"].tolist(), type=vector_type))
    pq.write_table(table, path)
    return path


@pytest.fixture(scope="module")
def trained(store, tmp_path_factory) -> Path:
    """One tiny trained run, the source of every run-folder case."""
    folder = tmp_path_factory.mktemp("bad_input_run")
    out = folder / "run"
    assert cli(["train", str(write_config(folder, base_config(store))), "--out", str(out)]) == 0
    return out


@pytest.fixture
def run_copy(trained, tmp_path) -> Path:
    """A private copy of the trained run, free to damage."""
    return Path(shutil.copytree(trained, tmp_path / "copied_run"))


def listing(folder: Path) -> dict:
    return {str(p.relative_to(folder)): p.stat().st_size for p in sorted(folder.rglob("*"))}


# ---------------------------------------------------------------- files that cannot be read


def test_missing_file(store, tmp_path, capsys):
    cfg = change(base_config(store), "interactions", path=str(tmp_path / "no_such_log.csv"))
    train_fails(capsys, tmp_path, cfg, "no_such_log.csv", fix=r"file not found; check the path")


def test_feature_tables_are_read_before_the_log(store, tmp_path, capsys):
    # a wrong item table fails at once, not after an order export's pairs are counted (minutes for a long one)
    cfg = change(base_config(store), "interactions", path=str(store / "log.parquet"))
    cfg["items"]["path"] = str(tmp_path / "no_such_items.parquet")
    cfg["interactions"].update(pairs_from="baskets", group_column="customer_id", query_column=None, weight_column=None)
    cfg["run"] = {**cfg["run"], "mode": "item_item"}
    del cfg["users"]
    # one line on stderr (train_fails): no log line of pairs counted came before it
    train_fails(capsys, tmp_path, cfg, "no_such_items.parquet", fix=r"file not found; check the path")


def test_folder_given_as_a_feature_table(store, tmp_path, capsys):
    (tmp_path / "items_folder.parquet").mkdir()
    cfg = change(base_config(store), "items", path=str(tmp_path / "items_folder.parquet"))
    train_fails(capsys, tmp_path, cfg, "items_folder.parquet", fix=r"is a folder.*give a \.csv, \.tsv, \.parquet or \.pq file")


def test_log_folder_without_tables(store, tmp_path, capsys):
    """A folder is a valid log (one export a day, say), but it must hold some."""
    (tmp_path / "log_folder").mkdir()
    (tmp_path / "log_folder" / "readme.txt").write_text("exports land here")
    cfg = change(base_config(store), "interactions", path=str(tmp_path / "log_folder"))
    train_fails(capsys, tmp_path, cfg, "log_folder", fix=r"holds no \.csv, \.tsv, \.parquet or \.pq files; put the log's files")


def test_unsupported_extension(store, tmp_path, capsys):
    path = tmp_path / "log.xlsx"
    log_frame(store).to_csv(path, index=False)
    cfg = change(base_config(store), "interactions", path=str(path))
    train_fails(capsys, tmp_path, cfg, "log.xlsx", "'.xlsx'", fix=r"save the table as \.csv, \.tsv, \.parquet or \.pq")


def test_unreadable_parquet_garbage_bytes(store, tmp_path, capsys):
    path = tmp_path / "items_garbage.parquet"
    path.write_bytes(b"\x00\x17 not a parquet file at all \xff" * 40)
    cfg = change(base_config(store), "items", path=str(path))
    train_fails(capsys, tmp_path, cfg, "items_garbage.parquet", fix=r"cannot be read as parquet.*(re-export|check)")


def test_empty_file(store, tmp_path, capsys):
    path = tmp_path / "log_empty.csv"
    path.write_bytes(b"")
    cfg = change(base_config(store), "interactions", path=str(path))
    train_fails(capsys, tmp_path, cfg, "log_empty.csv", fix=r"empty; it needs a header row and at least one data row")


def test_header_only_csv(store, tmp_path, capsys):
    path = tmp_path / "log_header.csv"
    path.write_text("customer_id,item_id,quantity\n")
    cfg = change(base_config(store), "interactions", path=str(path))
    train_fails(capsys, tmp_path, cfg, "log_header.csv", fix=r"header but no rows; export the data rows")


def test_rows_with_more_fields_than_the_header(store, tmp_path, capsys):
    # pandas would silently take the first field as the index and shift every column one place
    frame = log_frame(store)[["customer_id", "item_id", "quantity"]].assign(extra="x")
    path = tmp_path / "log_shifted.csv"
    path.write_text("customer_id,item_id,quantity\n" + frame.to_csv(index=False, header=False))
    cfg = change(base_config(store), "interactions", path=str(path))
    train_fails(capsys, tmp_path, cfg, "log_shifted.csv", "row 1", fix=r"more fields than the header row.*"
                r"add the missing column names or remove trailing delimiters")


def test_a_column_named_twice(store, tmp_path, capsys):
    frame = customers(store)
    frame[" age_band"] = frame["age_band"]  # the same name once its padding is trimmed
    path = tmp_path / "customers_twice.csv"
    frame.to_csv(path, index=False)
    cfg = change(base_config(store), "users", path=str(path))
    train_fails(capsys, tmp_path, cfg, "customers_twice.csv", "column 'age_band'", fix=r"twice; rename one")


def test_config_file_missing(tmp_path, capsys):
    out = tmp_path / "run"
    expect_error(capsys, ["train", tmp_path / "absent_config.yaml", "--out", out], "absent_config.yaml",
                 fix=r"config file not found; give the path", gone=[out, tmp_path / "run.partial"])


def test_config_not_valid_yaml(tmp_path, capsys):
    path = tmp_path / "broken_config.yaml"
    path.write_text("run:\n  seed: 1\nmodel:\n  hidden: [8, 4\n")
    out = tmp_path / "run"
    expect_error(capsys, ["train", path, "--out", out], "broken_config.yaml", "line ", fix=r"fix the syntax",
                 gone=[out, tmp_path / "run.partial"])


# ---------------------------------------------------------------- columns and ids


def test_misnamed_interaction_column_suggests_the_closest(store, tmp_path, capsys):
    cfg = change(base_config(store), "interactions", query_column="customerid")
    train_fails(capsys, tmp_path, cfg, "log.parquet", "column 'customerid'", fix=r"did you mean 'customer_id'")


def test_misnamed_feature_column_suggests_the_closest(store, tmp_path, capsys):
    cfg = base_config(store)
    cfg["items"]["features"][0]["name"] = "departmnt"
    train_fails(capsys, tmp_path, cfg, "items.parquet", "column 'departmnt'", fix=r"did you mean 'department'")


def test_mixed_id_types_text_among_numbers(store, tmp_path, capsys):
    frame = log_frame(store)
    frame["customer_id"] = frame["customer_id"].astype(object)
    frame.loc[6, "customer_id"] = "C-0017"  # data row 7: text among whole-number customer ids
    path = tmp_path / "log_mixed.csv"
    frame.to_csv(path, index=False)
    cfg = change(base_config(store), "interactions", path=str(path))
    train_fails(capsys, tmp_path, cfg, "log_mixed.csv", "column 'customer_id'", "row 7", "'C-0017'",
                fix=r"mixed id types.*store every id")


def test_mixed_id_types_even_when_missing_rows_default(store, tmp_path, capsys):
    # With missing_rows: default a text id would otherwise become a made-up number in the catalog.
    frame = log_frame(store)
    frame["customer_id"] = frame["customer_id"].astype(object)
    frame.loc[11, "customer_id"] = "guest"
    path = tmp_path / "log_guest.csv"
    frame.to_csv(path, index=False)
    cfg = change(base_config(store), "interactions", path=str(path))
    cfg["users"]["missing_rows"] = "default"
    train_fails(capsys, tmp_path, cfg, "log_guest.csv", "column 'customer_id'", "row 12", "'guest'",
                fix=r"mixed id types.*store every id")


def test_a_zero_padded_text_id_against_whole_number_ids_is_not_merged(store, tmp_path, capsys):
    # '0123' and '123' would both read as 123: a new user's trial saw two SKUs merged into one without a word
    frame = log_frame(store)
    frame["customer_id"] = frame["customer_id"].astype(object)
    frame.loc[4, "customer_id"] = "0" + str(frame.loc[4, "customer_id"])  # data row 5, written with a leading zero
    path = tmp_path / "log_padded.csv"
    frame.to_csv(path, index=False)
    for missing in ("error", "drop"):
        cfg = change(base_config(store), "interactions", path=str(path))
        cfg["users"]["missing_rows"] = missing
        train_fails(capsys, tmp_path, cfg, "log_padded.csv", "column 'customer_id'", "row 5",
                    repr(frame.loc[4, "customer_id"]), fix=r"leading zero.*write the ids the same way in both files")


def test_whole_number_ids_against_zero_padded_text_ids_name_the_difference(store, tmp_path, capsys):
    customers = pd.read_csv(store / "customers.csv")
    customers["customer_id"] = customers["customer_id"].map(lambda i: f"{i:09d}")  # text with leading zeros
    path = tmp_path / "customers_padded.csv"
    customers.to_csv(path, index=False)
    cfg = base_config(store)
    cfg["users"]["path"] = str(path)
    msg = train_fails(capsys, tmp_path, cfg, "log.parquet", "column 'customer_id'", "customers_padded.csv",
                      fix=r"text with leading zeros \('0\d{8}'\).*write the ids the same way in both files")
    assert "missing_rows" not in msg  # dropping every row is not the fix


def test_ids_with_a_fraction(store, tmp_path, capsys):
    frame = log_frame(store)
    frame["customer_id"] = frame["customer_id"].astype(float)
    frame.loc[3, "customer_id"] += 0.5
    path = tmp_path / "log_fraction.csv"
    frame.to_csv(path, index=False)
    cfg = change(base_config(store), "interactions", path=str(path))
    # a CSV id is read as written (12.0 is the text 12.0): this one matches no whole-number id of the table
    train_fails(capsys, tmp_path, cfg, "log_fraction.csv", "column 'customer_id'", "row 4",
                fix=r"'\d+\.5' is text but the ids in .*customers\.csv are whole numbers; store every id as a number")
    frame.to_parquet(tmp_path / "log_fraction.parquet", index=False)  # a float column: the number is not whole
    cfg = change(base_config(store), "interactions", path=str(tmp_path / "log_fraction.parquet"))
    train_fails(capsys, tmp_path, cfg, "log_fraction.parquet", "column 'customer_id'", "row 4",
                fix=r"not a whole 64-bit number; ids must be integers or strings")


def test_missing_id(store, tmp_path, capsys):
    frame = customers(store)
    frame["customer_id"] = frame["customer_id"].astype("Int64")
    frame.loc[2, "customer_id"] = pd.NA
    path = tmp_path / "customers_gap.csv"
    frame.to_csv(path, index=False)
    cfg = change(base_config(store), "users", path=str(path))
    train_fails(capsys, tmp_path, cfg, "customers_gap.csv", "column 'customer_id'", "row 3",
                fix=r"missing id; every row needs an id")


def test_duplicate_ids_in_a_feature_table(store, tmp_path, capsys):
    frame = customers(store)
    frame.loc[5, "customer_id"] = frame.loc[1, "customer_id"]
    path = tmp_path / "customers_dup.csv"
    frame.to_csv(path, index=False)
    cfg = change(base_config(store), "users", path=str(path))
    msg = train_fails(capsys, tmp_path, cfg, "customers_dup.csv", "column 'customer_id'", "row 6",
                      fix=r"one row per id \(deduplicate it\)")
    assert f"duplicate id {int(frame.loc[1, 'customer_id'])}" in msg


def _log_with_stranger(store: Path, tmp_path: Path) -> tuple[Path, int]:
    frame = log_frame(store)
    row = 20
    frame.loc[row, "customer_id"] = 999  # no such customer in customers.csv
    path = tmp_path / "log_stranger.parquet"
    frame.to_parquet(path, index=False)
    return path, row + 1


def test_interaction_ids_without_a_feature_row(store, tmp_path, capsys):
    path, row = _log_with_stranger(store, tmp_path)
    cfg = change(base_config(store), "interactions", path=str(path))
    train_fails(capsys, tmp_path, cfg, "log_stranger.parquet", "column 'customer_id'", f"row {row}", "999",
                "customers.csv", fix=r"add feature rows, or set users.missing_rows: drop or default")


def test_item_item_missing_row_names_the_second_column(store, tmp_path, capsys):
    pairs = pd.read_parquet(store / "co_purchases.parquet").head(600)
    pairs.loc[9, "item_b"] = "TR-99999"
    path = tmp_path / "pairs_stranger.parquet"
    pairs.to_parquet(path, index=False)
    cfg = base_config(store)
    cfg["run"]["mode"] = "item_item"
    cfg["interactions"] = {"path": str(path), "query_column": "item_a", "candidate_column": "item_b",
                           "weight_column": "times"}
    del cfg["users"]
    train_fails(capsys, tmp_path, cfg, "pairs_stranger.parquet", "column 'item_b'", "row 10", "'TR-99999'",
                fix=r"missing_rows: drop or default")


@pytest.mark.slow
def test_missing_rows_drop_trains_with_a_note(store, tmp_path, capsys):
    path, _ = _log_with_stranger(store, tmp_path)
    cfg = change(base_config(store), "interactions", path=str(path))
    cfg["users"]["missing_rows"] = "drop"
    _, err = train_ok(capsys, tmp_path, cfg)
    assert "dropped 1 interaction rows whose ids have no feature row (missing_rows: drop)" in err


@pytest.mark.slow
def test_missing_rows_default_trains_and_nan_numeric_is_a_missing_value(store, tmp_path, capsys):
    path, _ = _log_with_stranger(store, tmp_path)
    frame = customers(store)
    frame["household_size"] = frame["household_size"].astype(float)
    frame.loc[[0, 4, 9], "household_size"] = np.nan  # NaN: a missing value, allowed for numeric features
    users = tmp_path / "customers_gaps.csv"
    frame.to_csv(users, index=False)
    cfg = change(base_config(store), "interactions", path=str(path))
    cfg["users"].update(missing_rows="default", path=str(users))
    out, _ = train_ok(capsys, tmp_path, cfg)
    ids = pq.read_table(out / "user_embeddings.parquet").column("id").to_pylist()
    assert 999 in ids and len(ids) == len(frame) + 1  # the stranger is embedded from all-missing features
    assert np.isfinite(np.stack(pq.read_table(out / "user_embeddings.parquet").column("embedding").to_pylist())).all()


# ---------------------------------------------------------------- values


def test_infinite_numeric_feature(store, tmp_path, capsys):
    frame = customers(store)
    frame["household_size"] = frame["household_size"].astype(float)
    frame.loc[4, "household_size"] = np.inf
    path = tmp_path / "customers_inf.csv"
    frame.to_csv(path, index=False)
    cfg = change(base_config(store), "users", path=str(path))
    train_fails(capsys, tmp_path, cfg, "customers_inf.csv", "column 'household_size'", "row 5",
                fix=r"infinite value; replace it with a finite number or leave it empty")


def test_text_in_a_numeric_feature(store, tmp_path, capsys):
    frame = customers(store)
    frame["household_size"] = frame["household_size"].astype(object)
    frame.loc[8, "household_size"] = "three"
    path = tmp_path / "customers_text.csv"
    frame.to_csv(path, index=False)
    cfg = change(base_config(store), "users", path=str(path))
    train_fails(capsys, tmp_path, cfg, "customers_text.csv", "column 'household_size'", "row 9", "'three'",
                fix=r"fix the value, or declare the feature as categorical in the config")


def test_non_numeric_target(store, tmp_path, capsys):
    frame = pd.read_csv(store / "stars.csv")
    frame["stars"] = frame["stars"].astype(object)
    frame.loc[2, "stars"] = "five"
    path = tmp_path / "stars_text.csv"
    frame.to_csv(path, index=False)
    train_fails(capsys, tmp_path, ratings_config(store, path), "stars_text.csv", "column 'stars'", "row 3",
                "'five'", fix=r"is not a number; fix the value; this column must hold numbers")
    assert "categorical" not in capsys.readouterr().err  # a target cannot be a category


def test_logistic_target_outside_0_1(store, tmp_path, capsys):
    cfg = change(ratings_config(store), "training", loss="logistic")
    first = int(np.flatnonzero((pd.read_csv(store / "stars.csv")["stars"] > 1).to_numpy())[0]) + 1
    train_fails(capsys, tmp_path, cfg, "stars.csv", "column 'stars'", f"row {first}",
                fix=r"logistic targets must lie in \[0, 1\].*use loss: squared")


def test_negative_weight(store, tmp_path, capsys):
    frame = log_frame(store)
    frame.loc[8, "quantity"] = -2
    path = tmp_path / "log_negative.parquet"
    frame.to_parquet(path, index=False)
    cfg = change(base_config(store), "interactions", path=str(path))
    train_fails(capsys, tmp_path, cfg, "log_negative.parquet", "column 'quantity'", "row 9",
                fix=r"negative weight.*weights must be >= 0")


def test_missing_weight(store, tmp_path, capsys):
    frame = log_frame(store)
    frame["quantity"] = frame["quantity"].astype(float)
    frame.loc[14, "quantity"] = np.nan
    path = tmp_path / "log_noweight.parquet"
    frame.to_parquet(path, index=False)
    cfg = change(base_config(store), "interactions", path=str(path))
    train_fails(capsys, tmp_path, cfg, "log_noweight.parquet", "column 'quantity'", "row 15",
                fix=r"missing value; every row needs a number here")


def test_timestamps_that_do_not_parse(store, tmp_path, capsys):
    frame = pd.read_csv(store / "stars.csv")
    frame.loc[3, "rated_at"] = "yesterday"
    path = tmp_path / "stars_when.csv"
    frame.to_csv(path, index=False)
    cfg = ratings_config(store, path)
    cfg["interactions"]["time_column"] = "rated_at"
    cfg["evaluation"]["split"] = "time"
    train_fails(capsys, tmp_path, cfg, "stars_when.csv", "column 'rated_at'", "row 4", "'yesterday'",
                fix=r"write times as ISO 8601 text")


def test_vector_of_the_wrong_length(store, tmp_path, capsys):
    frame = items_frame(store)
    frame.at[2, "description_vector"] = np.asarray(frame.at[2, "description_vector"])[:15]
    path = write_items(tmp_path / "items_short.parquet", frame)
    cfg = change(base_config(store), "items", path=str(path))
    train_fails(capsys, tmp_path, cfg, "items_short.parquet", "column 'description_vector'", "row 3",
                fix=r"length 15, expected 16; fix the row or the feature's length")


def test_vector_with_non_numbers(store, tmp_path, capsys):
    frame = items_frame(store)
    frame["description_vector"] = [[f"{x:.5f}" for x in v] for v in frame["description_vector"]]
    frame.at[4, "description_vector"] = ["n/a"] * 16
    path = write_items(tmp_path / "items_textvec.parquet", frame, pa.list_(pa.string()))
    cfg = change(base_config(store), "items", path=str(path))
    train_fails(capsys, tmp_path, cfg, "items_textvec.parquet", "column 'description_vector'", "row 5", "'n/a'",
                fix=r"vector entries are not numbers .*; store vectors as lists of floats")


def test_vector_with_nan_entries(store, tmp_path, capsys):
    frame = items_frame(store)
    vectors = [np.asarray(v, dtype=np.float64).tolist() for v in frame["description_vector"]]
    vectors[6][3] = float("nan")
    frame["description_vector"] = vectors
    path = write_items(tmp_path / "items_nanvec.parquet", frame, pa.list_(pa.float64()))
    cfg = change(base_config(store), "items", path=str(path))
    train_fails(capsys, tmp_path, cfg, "items_nanvec.parquet", "column 'description_vector'", "row 7",
                fix=r"NaN or infinite entries; replace them")


def test_token_column_neither_list_nor_text(store, tmp_path, capsys):
    frame = items_frame(store)
    frame["tags"] = np.where(np.arange(len(frame)) == 0, np.nan, np.arange(len(frame)) * 1.5)
    path = write_items(tmp_path / "items_numtags.parquet", frame)
    cfg = change(base_config(store), "items", path=str(path))
    train_fails(capsys, tmp_path, cfg, "items_numtags.parquet", "column 'tags'", "row 2",
                fix=r"not token lists; store tags as a list column or as text like 'a\|b'")


# ---------------------------------------------------------------- the config


def test_unknown_config_key_suggests_the_closest(store, tmp_path, capsys):
    cfg = change(base_config(store), "training", epocs=3)
    train_fails(capsys, tmp_path, cfg, "run.yaml", "'training.epocs'", fix=r"did you mean 'epochs'\?")


def test_a_group_column_in_no_table_names_the_config_file(store, tmp_path, capsys):
    cfg = change(base_config(store), "evaluation", group_metrics_by=["region"])
    msg = train_fails(capsys, tmp_path, cfg, "'evaluation.group_metrics_by'", "'region'",
                      fix=r"name a column of the users or items table")
    assert msg.startswith(f"error: {tmp_path / 'run.yaml'}: config key"), msg


def test_unknown_feature_key_suggests_the_closest(store, tmp_path, capsys):
    cfg = base_config(store)
    cfg["items"]["features"][2]["seperator"] = ";"
    train_fails(capsys, tmp_path, cfg, "run.yaml", "'items.features[2].seperator'", fix=r"did you mean 'separator'\?")


@pytest.mark.parametrize("section,key,value,expected", [
    ("model", "dim", 0, r"expected a number >= 1"),
    ("training", "weight_decay", -0.001, r"expected a number >= 0"),
    ("training", "learning_rate", 0, r"expected a number > 0"),
    ("training", "epochs", "ten", r"expected a number \(int\)"),
    ("model", "hidden", "wide", r"expected a list of positive whole numbers"),
])
def test_wrong_types_and_ranges(store, tmp_path, capsys, section, key, value, expected):
    cfg = change(base_config(store), section, **{key: value})
    train_fails(capsys, tmp_path, cfg, "run.yaml", f"'{section}.{key}'", f"got {value!r}", fix=expected)


def test_cold_start_split_without_item_features(store, tmp_path, capsys):
    cfg = change(base_config(store), "evaluation", cold_item_fraction=0.1)
    cfg["items"]["features"] = []
    train_fails(capsys, tmp_path, cfg, "run.yaml", "'evaluation.cold_item_fraction'",
                fix=r"set it to 0 or add features")


def test_time_split_without_a_time_column(store, tmp_path, capsys):
    cfg = change(base_config(store), "evaluation", split="time")
    train_fails(capsys, tmp_path, cfg, "run.yaml", "'evaluation.split'", fix=r"set it or use split: random")


def test_oracle_without_the_matching_ids_fails_before_training(store, tmp_path, capsys):
    truth = pd.read_parquet(store / "truth" / "item_vectors.parquet").iloc[1:]  # drops TR-00000
    pq.write_table(pa.Table.from_pandas(truth, preserve_index=False), tmp_path / "oracle_items.parquet")
    cfg = change(base_config(store), "evaluation", oracle_items=str(tmp_path / "oracle_items.parquet"),
                 oracle_users=str(store / "truth" / "customer_vectors.parquet"))
    train_fails(capsys, tmp_path, cfg, "oracle_items.parquet", "column 'id'", "'TR-00000'",
                fix=r"the oracle must cover every entity")


# ---------------------------------------------------------------- run folders


def test_existing_run_folder_is_refused(store, trained, capsys):
    before = listing(trained)
    cfg_path = write_config(trained.parent, base_config(store), "again.yaml")
    expect_error(capsys, ["train", cfg_path, "--out", trained], trained.name,
                 fix=r"already exists; choose another --out or pass --overwrite", gone=[trained.parent / "run.partial"])
    assert listing(trained) == before


def test_out_that_is_an_existing_file(store, tmp_path, capsys):
    target = tmp_path / "run_file"
    target.write_text("keep me")
    expect_error(capsys, ["train", write_config(tmp_path, base_config(store)), "--out", target], "run_file",
                 fix=r"not a folder; choose another --out", gone=[tmp_path / "run_file.partial"])
    assert target.read_text() == "keep me"


def test_not_a_run_folder(tmp_path, capsys):
    (tmp_path / "empty_folder").mkdir()
    out = tmp_path / "recs.csv"
    expect_error(capsys, ["recommend", tmp_path / "empty_folder", "--users", "1", "--out", out], "empty_folder",
                 fix=r"not a run folder \(no model.pt\); give the --out folder of `towers train`", gone=[out])


def test_corrupt_model_for_recommend(run_copy, capsys):
    (run_copy / "model.pt").write_bytes(b"definitely not a torch file " * 30)
    out = run_copy.parent / "recs.csv"
    expect_error(capsys, ["recommend", run_copy, "--users", "100493", "--out", out], "model.pt",
                 fix=r"corrupt or truncated.*retrain or restore the file", gone=[out])


def test_truncated_model_for_evaluate(run_copy, capsys):
    data = (run_copy / "model.pt").read_bytes()
    (run_copy / "model.pt").write_bytes(data[: len(data) // 2])
    before = listing(run_copy)
    expect_error(capsys, ["evaluate", run_copy], "model.pt", fix=r"corrupt or truncated.*retrain or restore the file")
    assert listing(run_copy) == before


def test_bundle_with_a_wrong_version(run_copy, capsys):
    payload = torch.load(run_copy / "model.pt", weights_only=True)
    payload["version"] = 99
    torch.save(payload, run_copy / "model.pt")
    out = run_copy.parent / "recs.parquet"
    expect_error(capsys, ["recommend", run_copy, "--users", "100493", "--out", out], "model.pt", "version 99",
                 fix=r"retrain with this version", gone=[out])


def test_corrupt_config_in_a_run_folder(run_copy, capsys):
    (run_copy / "config.yaml").write_text("model: {dim: [\n")
    expect_error(capsys, ["evaluate", run_copy], "config.yaml", fix=r"not valid YAML.*(retrain|restore)")


def test_top_zero_for_recommend(trained, tmp_path, capsys):
    out = tmp_path / "recs.csv"
    expect_error(capsys, ["recommend", trained, "--users", "100493", "--top", "0", "--out", out], "--top", "got 0",
                 fix=r"ask for at least 1", gone=[out])


def test_unknown_user_for_recommend(trained, tmp_path, capsys):
    out = tmp_path / "recs.csv"
    expect_error(capsys, ["recommend", trained, "--users", "424242424", "--out", out], f"{trained}: unknown user id",
                 "424242424", fix=r"check the id", gone=[out])


def test_recommend_output_with_an_unknown_format(trained, tmp_path, capsys):
    out = tmp_path / "recs.txt"
    expect_error(capsys, ["recommend", trained, "--users", "100493", "--out", out], "recs.txt",
                 fix=r"use \.csv, \.parquet or \.pq", gone=[out])


def test_evaluate_interactions_missing_a_column(trained, store, tmp_path, capsys):
    path = tmp_path / "later_log.csv"
    log_frame(store).drop(columns=["item_id"]).to_csv(path, index=False)
    expect_error(capsys, ["evaluate", trained, "--interactions", path], "later_log.csv", "column 'item_id'",
                 fix=r"fix the column name where it is given, or the file")


# ---------------------------------------------------------------- embed


def test_embed_input_missing_columns(trained, store, tmp_path, capsys):
    path = tmp_path / "new_items_noprice.parquet"
    pd.read_parquet(store / "new_items.parquet").drop(columns=["price"]).to_parquet(path, index=False)
    out = tmp_path / "embedded.parquet"
    expect_error(capsys, ["embed", trained, "--items", path, "--out", out], "new_items_noprice.parquet",
                 "column 'price'", fix=r"columns present|did you mean", gone=[out])


def test_embed_output_that_is_not_parquet(trained, store, tmp_path, capsys):
    out = tmp_path / "embedded.csv"
    expect_error(capsys, ["embed", trained, "--items", store / "new_items.parquet", "--out", out], "embedded.csv",
                 fix=r"\.parquet", gone=[out])


def test_embed_new_categories_go_to_the_unknown_bucket(trained, store, tmp_path, capsys):
    frame = pd.read_parquet(store / "new_items.parquet")
    frame["department"] = frame["department"].astype(object)
    frame.loc[[0, 3, 5], "department"] = "Aquariums"  # never seen in training
    path = tmp_path / "new_items_aquarium.parquet"
    frame.to_parquet(path, index=False)
    out = tmp_path / "embedded.parquet"
    code, stdout, err = call(capsys, "embed", trained, "--items", path, "--out", out)
    assert code == 0, err
    assert "Traceback" not in stdout + err and "error: " not in err
    warnings_ = [line for line in err.splitlines() if line.startswith("warning: ")]
    assert len(warnings_) == 1, err
    assert "new_items_aquarium.parquet" in warnings_[0] and "unknown bucket" in warnings_[0]
    assert "department: 3" in warnings_[0]
    got = pq.read_table(out).to_pandas()
    assert len(got) == len(frame) and np.isfinite(np.stack(got["embedding"])).all()


# ---------------------------------------------------------------- inputs that must be accepted


def test_parquet_with_the_id_saved_as_its_index_is_read(trained, store, tmp_path, capsys):
    path = tmp_path / "new_items_indexed.parquet"
    pd.read_parquet(store / "new_items.parquet").set_index("item_id").to_parquet(path)
    assert "item_id" not in pd.read_parquet(path).columns  # pandas hands it back as the index
    out = tmp_path / "embedded.parquet"
    code, stdout, err = call(capsys, "embed", trained, "--items", path, "--out", out)
    assert code == 0, err
    assert pq.read_table(out).column("id").to_pylist() == pd.read_parquet(store / "new_items.parquet")["item_id"].tolist()


@pytest.mark.slow
def test_csv_with_bom_quoted_delimiters_and_windows_line_ends_trains(store, tmp_path, capsys):
    frame = customers(store)
    frame["neighbourhood"] = frame["neighbourhood"].astype(object)
    frame.loc[frame["neighbourhood"] == "Marsh End", "neighbourhood"] = "Marsh End, North"
    frame = frame[[c for c in frame.columns if c != "has_garden"] + ["has_garden"]]  # a text column last
    path = tmp_path / "customers_windows.csv"
    path.write_bytes(frame.to_csv(index=False, lineterminator="\r\n").encode("utf-8-sig"))
    raw = path.read_bytes()
    assert raw.startswith(b"\xef\xbb\xbf") and b"\r\n" in raw and b'"Marsh End, North"' in raw
    cfg = change(base_config(store), "users", path=str(path))
    cfg["users"]["features"] = [{"name": "neighbourhood", "kind": "categorical"},
                                {"name": "has_garden", "kind": "categorical"}]
    out, _ = train_ok(capsys, tmp_path, cfg)
    state = torch.load(out / "model.pt", weights_only=True)["query_encoders"]
    assert state["id_column"] == "customer_id"
    vocab = {f["name"]: f["vocab"] for f in state["features"]}
    assert "Marsh End, North" in vocab["neighbourhood"]
    assert set(vocab["has_garden"]) == {"yes", "no"}  # no stray '\r' on the last column
    assert len(pq.read_table(out / "user_embeddings.parquet")) == len(frame)


@pytest.mark.slow
def test_k_larger_than_the_data_supports_warns_and_trains(store, tmp_path, capsys):
    cfg = change(base_config(store), "model", dim=250)
    _, err = train_ok(capsys, tmp_path, cfg)
    warn = [line for line in err.splitlines() if line.startswith("warning: ")]
    assert len(warn) == 1, err
    assert "model.dim = 250" in warn[0] and "min(#queries, #items) = 200" in warn[0]


def test_usage_mistakes_are_one_line(capsys):
    # argparse's own two-line usage message is replaced by the one-line `error:` form
    with pytest.raises(SystemExit) as stop:
        cli(["recommend", "somewhere", "--users", "1", "--top", "abc"])
    assert stop.value.code == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("error: towers recommend:") and "--top" in err[0]
