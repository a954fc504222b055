"""Reading and validating input tables (towers/data/tables.py), whole and in pieces."""

from __future__ import annotations

import re

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from towers.data import tables as T
from towers.errors import TowersError


def write_csv(path, text: str, encoding: str = "utf-8"):
    path.write_bytes(text.encode(encoding))
    return path


def write_parquet(path, frame: pd.DataFrame):
    pq.write_table(pa.Table.from_pandas(frame, preserve_index=False), path)
    return path


# ---------------------------------------------------------------- read_table: formats


def test_csv_is_read(tmp_path):
    df = T.read_table(write_csv(tmp_path / "log.csv", "user,item,rating\n1,10,4.5\n2,20,3\n"))
    assert df.columns.tolist() == ["user", "item", "rating"]
    assert df["user"].tolist() == [1, 2] and df["rating"].tolist() == [4.5, 3.0]


def test_parquet_is_read_with_its_types(tmp_path):
    frame = pd.DataFrame({"item": ["a", "b"], "price": [1.5, 2.0], "tags": [["x", "y"], []]})
    df = T.read_table(write_parquet(tmp_path / "items.parquet", frame))
    assert df["item"].tolist() == ["a", "b"]
    assert [list(v) for v in df["tags"]] == [["x", "y"], []]


@pytest.mark.parametrize("name", ["t.pq", "T.PARQUET"])
def test_other_parquet_extensions(tmp_path, name):
    df = T.read_table(write_parquet(tmp_path / name, pd.DataFrame({"a": [1, 2]})))
    assert df["a"].tolist() == [1, 2]


def test_tsv_is_split_on_tabs(tmp_path):
    df = T.read_table(write_csv(tmp_path / "t.tsv", "a\tb\n1,5\t2\n"))
    assert df.columns.tolist() == ["a", "b"] and df["a"].tolist() == ["1,5"]


def test_format_follows_the_extension_not_the_content(tmp_path):
    # CSV text under a parquet name is read as parquet, and fails as such.
    f = write_csv(tmp_path / "log.parquet", "a,b\n1,2\n")
    with pytest.raises(TowersError, match=r"log\.parquet: cannot be read as parquet"):
        T.read_table(f)
    # parquet bytes under a CSV name are read as CSV, fail as such, and are named for what they are
    g = tmp_path / "log.csv"
    g.write_bytes((write_parquet(tmp_path / "x.parquet", pd.DataFrame({"a": [1]}))).read_bytes())
    with pytest.raises(TowersError, match=r"log\.csv: holds parquet data under a \.csv name; rename it to \.parquet"):
        T.read_table(g)


@pytest.mark.parametrize("name,shown", [("data.xlsx", "'.xlsx'"), ("data.json", "'.json'"), ("data", "'(none)'")])
def test_unsupported_extension(tmp_path, name, shown):
    f = write_csv(tmp_path / name, "a,b\n1,2\n")
    fix = r"save the table as \.csv, \.tsv, \.parquet or \.pq"
    with pytest.raises(TowersError, match=rf"unsupported format {re.escape(shown)}; {fix}"):
        T.read_table(f)


def test_missing_file(tmp_path):
    with pytest.raises(TowersError, match=r"nope\.csv: file not found"):
        T.read_table(tmp_path / "nope.csv")


def test_folder_instead_of_file(tmp_path):
    (tmp_path / "d.csv").mkdir()
    with pytest.raises(TowersError, match="is a folder"):
        T.read_table(tmp_path / "d.csv")


@pytest.mark.parametrize("content", ["", "\n\n"])
def test_empty_csv(tmp_path, content):
    with pytest.raises(TowersError, match="the file is empty; it needs a header row"):
        T.read_table(write_csv(tmp_path / "e.csv", content))


def test_empty_parquet_file(tmp_path):
    (tmp_path / "e.parquet").write_bytes(b"")
    with pytest.raises(TowersError, match="cannot be read as parquet"):
        T.read_table(tmp_path / "e.parquet")


def test_header_only_csv(tmp_path):
    with pytest.raises(TowersError, match="has a header but no rows"):
        T.read_table(write_csv(tmp_path / "h.csv", "user,item\n"))


def test_parquet_without_rows(tmp_path):
    f = write_parquet(tmp_path / "h.parquet", pd.DataFrame({"a": pd.Series([], dtype="int64")}))
    with pytest.raises(TowersError, match="has a header but no rows"):
        T.read_table(f)


def test_bom_quoted_delimiter_and_crlf(tmp_path):
    # RFC 4180 CSV: quoted fields may hold the delimiter; lines end in CRLF. Excel adds a UTF-8 BOM.
    text = '\ufeffid,name,note\r\n1,"a, b",first\r\n2,"c ""q""",second\r\n'
    df = T.read_table(write_csv(tmp_path / "excel.csv", text))
    assert df.columns.tolist() == ["id", "name", "note"]  # no '\ufeff' glued to 'id'
    assert df["id"].tolist() == [1, 2]
    assert df["name"].tolist() == ["a, b", 'c "q"']  # "" inside quotes is one quote (RFC 4180)
    assert df["note"].tolist() == ["first", "second"]  # no stray '\r' on the last column
    assert len(df) == 2


def test_header_names_are_stripped(tmp_path):
    df = T.read_table(write_csv(tmp_path / "s.csv", "user , item\n1,2\n"))
    assert df.columns.tolist() == ["user", "item"]


def test_bad_encoding_is_a_clear_error(tmp_path):
    # a spreadsheet's Latin-1 export: 0xe9 is 'é' in Latin-1 and not a UTF-8 sequence here
    f = write_csv(tmp_path / "latin.csv", "id,name\n1,caf\xe9\n", encoding="latin-1")
    with pytest.raises(TowersError, match=r"latin\.csv: line 2 is not UTF-8 text \(byte 0xe9\); save the file as UTF-8"):
        T.read_table(f)


def test_ragged_csv_is_a_clear_error(tmp_path):
    f = write_csv(tmp_path / "r.csv", "a,b\n1,2\n3,4,5,6\n")
    with pytest.raises(TowersError, match=r"r\.csv: cannot be read as csv"):
        T.read_table(f)


# ---------------------------------------------------------------- columns


@pytest.mark.parametrize("suffix", [".csv", ".parquet"])
def test_missing_column_suggests_close_names(tmp_path, suffix):
    frame = pd.DataFrame({"user_id": [1], "item_id": [2], "rating": [3.0]})
    f = tmp_path / f"log{suffix}"
    if suffix == ".csv":
        frame.to_csv(f, index=False)
    else:
        write_parquet(f, frame)
    with pytest.raises(TowersError) as err:
        T.read_table(f, columns=["user_id", "userid"])
    msg = str(err.value)
    assert f"{f}, column 'userid': no such column" in msg
    assert "did you mean 'user_id'" in msg


def test_missing_column_without_close_names_lists_the_columns(tmp_path):
    with pytest.raises(TowersError, match=r"column 'zzz': no such column; columns present: a, b"):
        T.require_columns(["a", "b"], ["a", "zzz"], "f.csv")


def test_parquet_reads_only_the_requested_columns(tmp_path):
    f = write_parquet(tmp_path / "w.parquet", pd.DataFrame({"a": [1], "b": [2], "c": [3]}))
    assert T.read_table(f, columns=["c", "a"]).columns.tolist() == ["c", "a"]


# ---------------------------------------------------------------- ids


def test_integer_ids_stay_int64():
    out = T.normalise_ids(pd.Series([3, 1, 2], dtype="int32"), "f", "id")
    assert out.dtype == np.int64 and out.tolist() == [3, 1, 2]


def test_nullable_integer_ids_without_gaps_become_int64():
    out = T.normalise_ids(pd.Series([5, 6], dtype="Int64"), "f", "id")
    assert out.dtype == np.int64 and out.tolist() == [5, 6]


def test_whole_float_ids_become_int64():
    out = T.normalise_ids(pd.Series([1.0, 2.0, 30.0]), "f", "id")
    assert out.dtype == np.int64 and out.tolist() == [1, 2, 30]


@pytest.mark.parametrize("bad,shown", [(2.5, "2.5"), (np.inf, "inf"), (-np.inf, "-inf"), (1e20, "1e+20")])
def test_fractional_infinite_or_huge_float_ids_error_with_the_row(bad, shown):
    with pytest.raises(TowersError) as err:
        T.normalise_ids(pd.Series([1.0, 2.0, bad]), "items.csv", "item")
    assert str(err.value).startswith(f"items.csv, column 'item', row 3: id {shown} is not a whole")


def test_infinite_id_read_from_csv_is_rejected(tmp_path):
    # pandas' CSV reader turns the text 'inf' into a float infinity.
    df = T.read_table(write_csv(tmp_path / "l.csv", "item\n1\ninf\n"))
    with pytest.raises(TowersError, match="row 2: id inf"):
        T.normalise_ids(df["item"], "l.csv", "item")


@pytest.mark.parametrize("series", [
    pd.Series([1, None, 3]),
    pd.Series(["a", None, "c"]),
    pd.Series(["a", np.nan, "c"], dtype=object),
    pd.Series([1, pd.NA, 3], dtype="Int64"),
])
def test_missing_ids_error_with_the_1_based_row(series):
    with pytest.raises(TowersError, match=r"^log\.csv, column 'user', row 2: missing id"):
        T.normalise_ids(series, "log.csv", "user")


def test_missing_id_row_from_a_csv_counts_data_rows_from_1(tmp_path):
    df = T.read_table(write_csv(tmp_path / "l.csv", "user,item\n1,a\n2,b\n,c\n"))
    with pytest.raises(TowersError, match="row 3: missing id"):
        T.normalise_ids(df["user"], "l.csv", "user")


def test_text_ids_are_object_strings():
    out = T.normalise_ids(pd.Series(["b", "a"]), "f", "id")
    assert out.dtype == object and out.tolist() == ["b", "a"]
    assert all(type(v) is str for v in out)


def test_mixed_text_and_number_ids_error():
    with pytest.raises(TowersError, match=r"row 2: mixed id types \(found int among strings\)"):
        T.normalise_ids(pd.Series(["a", 7, "c"], dtype=object), "f", "id")


def test_boolean_ids_error():
    with pytest.raises(TowersError, match="ids are true/false values"):
        T.normalise_ids(pd.Series([True, False]), "f", "id")


def test_check_unique_ids_names_the_duplicate_row_and_value():
    T.check_unique_ids(np.array([1, 2, 3]), "f", "id")  # no error
    with pytest.raises(TowersError) as err:
        T.check_unique_ids(np.array([5, 6, 7, 6]), "items.csv", "item")
    assert str(err.value).startswith("items.csv, column 'item', row 4: duplicate id 6;")
    with pytest.raises(TowersError, match=r"row 3: duplicate id 'a';"):
        T.check_unique_ids(np.array(["a", "b", "a"], dtype=object), "f", "id")


def test_align_id_types():
    ref_int = np.array([1, 2], dtype=np.int64)
    got = T.align_id_types(np.array(["2", "x"], dtype=object), ref_int)
    assert got.dtype == np.int64 and got[0] == 2 and got[1] not in ref_int
    got = T.align_id_types(np.array([1, 2], dtype=np.int64), np.array(["1"], dtype=object))
    assert got.dtype == object and got.tolist() == ["1", "2"]


# ---------------------------------------------------------------- numeric columns


def test_numeric_column_values():
    out = T.numeric_column(pd.Series(["1.5", "2", None]), "f", "x")
    assert out.dtype == np.float64
    assert out[:2].tolist() == [1.5, 2.0] and np.isnan(out[2])
    assert T.numeric_column(pd.Series([True, False]), "f", "x").tolist() == [1.0, 0.0]
    assert np.isnan(T.numeric_column(pd.Series([1.0, pd.NA], dtype="Float64"), "f", "x")[1])


def test_numeric_column_rejects_text_naming_the_row():
    with pytest.raises(TowersError, match=r"^f\.csv, column 'price', row 3: 'cheap' is not a number"):
        T.numeric_column(pd.Series(["1", "2", "cheap"]), "f.csv", "price")


def test_numeric_column_rejects_text_read_from_csv(tmp_path):
    df = T.read_table(write_csv(tmp_path / "p.csv", "price\n1.5\nn/a?\n"))
    with pytest.raises(TowersError, match="row 2: 'n/a\\?' is not a number"):
        T.numeric_column(df["price"], "p.csv", "price")


@pytest.mark.parametrize("bad", [np.inf, -np.inf])
def test_numeric_column_rejects_infinities(bad):
    with pytest.raises(TowersError, match=r"row 2: infinite value"):
        T.numeric_column(pd.Series([1.0, bad]), "f", "x")


def test_numeric_column_missing_values_only_when_asked():
    s = pd.Series([1.0, 2.0, np.nan])
    assert np.isnan(T.numeric_column(s, "f", "x", allow_missing=True)[2])
    with pytest.raises(TowersError, match=r"column 'x', row 3: missing value"):
        T.numeric_column(s, "f", "x", allow_missing=False)


# ---------------------------------------------------------------- time columns

NS = 10**9


def test_time_column_parses_iso_strings():
    s = pd.Series(["2026-03-14 09:30:00", "2026-03-14T09:30:01", "2026-03-15"])
    got = T.time_column(s, "f", "t")
    # numpy's own ISO 8601 parser as the reference
    want = np.array(["2026-03-14T09:30:00", "2026-03-14T09:30:01", "2026-03-15T00:00:00"],
                    dtype="datetime64[ns]").astype(np.int64)
    assert got.dtype == np.int64 and got.tolist() == want.tolist()


def test_time_column_converts_offsets_to_utc():
    got = T.time_column(pd.Series(["2026-03-14T10:30:00+01:00", "2026-03-14T09:30:00Z"]), "f", "t")
    assert got[0] == got[1]
    assert got[0] == np.datetime64("2026-03-14T09:30:00", "ns").astype(np.int64)


def test_time_column_from_csv_text(tmp_path):
    df = T.read_table(write_csv(tmp_path / "t.csv", "t\n2026-01-01 00:00:00\n2026-01-01 00:00:10\n"))
    got = T.time_column(df["t"], "t.csv", "t")
    assert got[1] - got[0] == 10 * NS


def test_time_column_keeps_datetime_columns():
    s = pd.Series(pd.to_datetime(["2026-01-01", "2026-01-02"]).as_unit("s"))
    got = T.time_column(s, "f", "t")
    assert got[1] - got[0] == 86400 * NS  # seconds-resolution input still comes out in nanoseconds
    aware = pd.Series(pd.to_datetime(["2026-01-01T01:00:00"]).tz_localize("Europe/Berlin"))
    assert T.time_column(aware, "f", "t")[0] == np.datetime64("2026-01-01T00:00:00", "ns").astype(np.int64)


def test_time_column_takes_numbers_as_given():
    assert T.time_column(pd.Series([3, 1, 2]), "f", "t").tolist() == [3, 1, 2]
    with pytest.raises(TowersError, match="row 2: missing value"):
        T.time_column(pd.Series([1.0, np.nan]), "f", "t")


@pytest.mark.parametrize("bad, says", [("not a date", "'not a date' is not an ISO 8601 date or time"),
                                       ("2026-13-45", "'2026-13-45' is not an ISO 8601"), (None, "missing time"),
                                       # day first: a guessed format would read this row as 5 May, the next as 13 March
                                       ("05/03/2026 10:00", "'05/03/2026 10:00' is not an ISO 8601 date or time")])
def test_time_column_rejects_unparsable_dates_with_the_row(bad, says):
    with pytest.raises(TowersError) as err:
        T.time_column(pd.Series(["2026-03-14", "2026-03-15", bad, "13/03/2026 09:00"], dtype=object), "log.csv", "when")
    msg = str(err.value)
    assert msg.startswith("log.csv, column 'when', row 3: " + says) and "year first" in msg


def test_time_column_reads_iso_text_with_and_without_zones():
    got = T.time_column(pd.Series([" 2026-03-14 09:30:00", "2026-03-14T09:30", "2026-03-14T10:30:00+01:00",
                                   "2026-03-14"]), "f", "t")
    want = np.array(["2026-03-14T09:30", "2026-03-14T09:30", "2026-03-14T09:30", "2026-03-14"], dtype="datetime64[ns]")
    assert got.tolist() == want.astype(np.int64).tolist()


# ---------------------------------------------------------------- parquet in pieces


def test_parquet_pieces_equal_the_whole_table(small_store):
    path = small_store / "items.parquet"
    whole = T.read_table(path)
    cols = ["item_id", "price", "tags"]
    pieces = list(T.read_table_chunks(path, cols, 17))
    assert [start for start, _ in pieces] == list(range(0, len(whole), 17))
    joined = pd.concat([p for _, p in pieces], ignore_index=True)
    # reference: pandas' own read of the whole file
    pd.testing.assert_frame_equal(joined, whole[cols])


def test_pieces_refuse_a_missing_column(small_store):
    with pytest.raises(TowersError, match="column 'colour': no such column"):
        list(T.read_table_chunks(small_store / "items.parquet", ["item_id", "colour"], 10))


def test_table_columns_reads_the_header_alone_as_read_table_names_it(tmp_path):
    """Reference: the columns of the table read whole (read_table), for CSV with a byte-order mark and padded
    names, TSV and parquet."""
    (tmp_path / "a.csv").write_bytes("\ufeffid, colour ,in_stock\n1,red,true\n".encode("utf-8"))
    (tmp_path / "a.tsv").write_text("id\tcolour\n1\tred\n")
    pd.DataFrame({"id": [1], "colour": ["red"]}).to_parquet(tmp_path / "a.parquet")
    for name in ("a.csv", "a.tsv", "a.parquet"):
        assert T.table_columns(tmp_path / name) == list(T.read_table(tmp_path / name).columns)
    with pytest.raises(TowersError, match="file not found"):
        T.table_columns(tmp_path / "missing.csv")


@pytest.mark.parametrize("sep, said", [(";", "';'"), ("|", "'|'"), ("\t", "tab")])
def test_a_header_read_as_one_column_points_at_the_separator(tmp_path, sep, said):
    path = tmp_path / "log.csv"
    pd.DataFrame({"user": [1, 2], "item": [3, 4]}).to_csv(path, index=False, sep=sep)
    with pytest.raises(TowersError, match=rf"log\.csv, column 'user': no such column; the header reads as one column, "
                                          rf".*: the file looks {re.escape(said)}-separated"):
        T.read_table(path, columns=["user", "item"])


@pytest.mark.parametrize("name, text, tail", [
    # a trial's ';'-separated recipe table with commas inside titles: pandas stops at the first such row
    # ("Expected 1 fields in line 3, saw 2"); the error now names the separator the header shows
    ("recipes.csv", "recipe_id;title;cuisine\nFF-1;Fig tart;french\nFF-2;Beans, greens;italian\n",
     r"the header reads as one column, recipe_id;title;cuisine: the file looks ';'-separated"),
    # the file's own separator is in its header: the cause is the row, not the separator
    ("items.csv", "item_id,title,price\nA,Fig tart,3\nB,Beans, greens,4\n", r"check the file is a valid csv table$"),
])
def test_a_row_too_long_names_the_separator_only_when_the_header_lacks_the_files_own(tmp_path, name, text, tail):
    path = tmp_path / name
    path.write_text(text)
    with pytest.raises(TowersError, match=rf"{re.escape(name)}: cannot be read as csv \(.*\); {tail}"):
        T.read_table(path)


def test_a_group_column_in_a_table_of_another_separator_names_the_separator(tmp_path):
    # group_metrics_by is checked from the tables' headers before the log is read: the cause is the separator
    from pathlib import Path

    from towers import config as C
    from towers.data.groups import check_group_columns

    (tmp_path / "recipes.csv").write_text("recipe_id;cuisine\nFF-1;french\n")
    cfg = C.resolve({"interactions": {"path": "log.csv", "query_column": "user", "candidate_column": "recipe"},
                     "items": {"path": "recipes.csv", "id_column": "recipe_id"},
                     "evaluation": {"group_metrics_by": ["cuisine"]}}, Path(tmp_path))
    with pytest.raises(TowersError, match=r"column 'cuisine' is not in the items table \(.*recipes\.csv\); the header "
                                          r"reads as one column, recipe_id;cuisine: the file looks ';'-separated"):
        check_group_columns(cfg)


def test_words_for_missing_warn_in_text_columns_and_stay_quiet_in_numbers(tmp_path):
    # pandas takes NA, null, n/a, ... as missing by default (its STR_NA_VALUES); in a text column such a word may be
    # a value (NA: North America), so it is still taken as missing, with a warning naming the column and first row
    path = tmp_path / "customers.csv"
    path.write_text("customer_id,region,spend\n1,EU,12.5\n2,NA,n/a\n3,NA,7\n4,,\n")
    with pytest.warns(UserWarning, match=r"customers\.csv, column 'region', row 2: 2 cells hold 'NA' or another word "
                                         r"for missing and are taken as missing") as seen:
        df = T.read_table(path)
    assert len(seen) == 1  # nothing about spend: a column of numbers with n/a is a column of numbers
    assert df["region"].isna().tolist() == [False, True, True, True]
    assert df["spend"].dtype == np.float64 and np.isnan(df["spend"].to_numpy()[[1, 3]]).all()
    assert df["customer_id"].dtype == np.int64
    # outside reference: what pandas itself reads with its defaults
    pd.testing.assert_frame_equal(df, pd.read_csv(path))


def test_words_for_missing_warn_only_in_the_columns_watched(tmp_path, recwarn):
    path = tmp_path / "items.csv"
    path.write_text("item_id,notes,shelf\n1,None,a\n2,fragile,b\n")
    df = T.read_table(path, watch=["item_id", "shelf"])  # notes is not a feature: read alike, no warning
    assert df["notes"].isna().tolist() == [True, False] and not [w for w in recwarn if "missing" in str(w.message)]


def test_ids_keep_their_leading_zeros_and_plain_numbers_stay_numbers(tmp_path):
    # an SKU or ISBN written 0007 is the id 0007: read as a number it became 7 and merged with 07 and 7
    path = tmp_path / "items.csv"
    path.write_text("sku,code,shelf\n0007,17,1\n07,18,2\n7,19,3\n")
    df = T.read_table(path, ids=["sku", "code"])
    assert df["sku"].tolist() == ["0007", "07", "7"] and df["sku"].dtype == object
    assert df["code"].dtype == np.int64 and df["code"].tolist() == [17, 18, 19]  # written as numbers print
    assert df["shelf"].dtype == np.int64  # not an id: read as pandas reads it
    pieces = [piece for _, piece in T.read_table_chunks(path, ["sku", "code"], 2, ids=["sku", "code"])]
    # the second piece alone is written as a number prints, and IdPieces joins numbers beside text as text: '7'
    assert [p["sku"].tolist() for p in pieces] == [["0007", "07"], [7]]
    ids = T.IdPieces()
    for piece in pieces:
        ids.add(piece["sku"], path, "sku")
    codes, uniques = ids.finish()
    assert list(uniques) == ["0007", "07", "7"] and codes.tolist() == [0, 1, 2]



def test_table_rows_leave_ids_that_match_nothing_unmatched_without_colliding():
    # '0007' and 'abc' can match no whole-number id; two such ids in one table raised pandas'
    # InvalidIndexError when the table's ids were indexed (reference: the rows written out by hand)
    catalog = np.array([1, 7, 8], dtype=np.int64)
    table = np.array(["0007", "0008", "1", "abc", "xyz", "8"], dtype=object)
    assert T.table_rows(table, catalog).tolist() == [2, -1, 5]
    assert T.table_rows(np.array(["b", "a"], dtype=object), np.array(["a", "c"], dtype=object)).tolist() == [1, -1]


def test_a_column_named_in_another_case_is_suggested():
    # difflib's ratio of 'isbn' and 'ISBN' is 0, so the case-folded match comes first
    with pytest.raises(TowersError, match=r"column 'isbn': no such column; did you mean 'ISBN'\?"):
        T.require_columns(["order_id", "customer_id", "ISBN", "quantity"], ["isbn"], "orders.csv")


def test_padded_form_finds_an_id_whose_leading_zeros_were_dropped():
    catalog = np.array(["001095", "000417", "A-7", "12"], dtype=object)
    assert T.padded_form(np.array([1095, "x"], dtype=object), catalog) == ("1095", "001095")
    assert T.padded_form(np.array(["417"], dtype=object), catalog) == ("417", "000417")
    assert T.padded_form(np.array(["12", "7"], dtype=object), catalog) is None  # '12' is not padded, '7' is no id
    assert T.padded_form(np.array(["5"], dtype=object), np.array([5, 6])) is None  # whole-number catalogs keep no zeros


def test_a_utf16_csv_is_named_as_such(tmp_path):
    # a spreadsheet's "Unicode Text" export: UTF-16 with its byte-order mark (Unicode Standard, section 23.8)
    path = tmp_path / "readers.csv"
    path.write_bytes("id,region\n1,north\n".encode("utf-16"))
    with pytest.raises(TowersError, match=r"readers\.csv: is UTF-16 text; save it as CSV UTF-8"):
        T.read_table(path)


def test_whole_number_text_ids_match_exactly_up_to_19_digits():
    # 19-digit ids (snowflake-style) went through float64 and matched a neighbouring id; '-0' merged with '0'
    catalog = np.array([1234567890123456768, 1234567890123456789, 0, 9223372036854775807], dtype=np.int64)
    asked = np.array(["1234567890123456789", "1234567890123456768", "-0", "0", "9223372036854775808", "1.2e18"],
                     dtype=object)
    assert T.positions_in(catalog, asked).tolist() == [1, 0, -1, 2, -1, -1]
    assert T.positions_in(catalog, np.array(["9223372036854775807"], dtype=object)).tolist() == [3]
