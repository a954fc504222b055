"""Feature encoders: fitting, transforming, and saved state (towers/data/encoders.py)."""

from __future__ import annotations

import json
import os
import subprocess
import sys

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import torch
from sklearn.preprocessing import StandardScaler

from towers import config as C
from towers.data import encoders as E
from towers.data.tables import read_table
from towers.errors import TowersError

P = "items.csv"


def codes(t: torch.Tensor) -> list:
    return t.tolist()


# ---------------------------------------------------------------- numeric


def test_numeric_matches_standard_scaler_on_training_rows():
    rng = np.random.default_rng(3)
    train = rng.normal(5.0, 2.0, 200)
    train[[4, 17, 90]] = np.nan
    enc = E.NumericEncoder("x").fit(pd.Series(train), P)
    # Reference: scikit-learn's StandardScaler (population std, NaNs ignored when fitting).
    ref = StandardScaler().fit(train.reshape(-1, 1))
    assert enc.mean == pytest.approx(ref.mean_[0], rel=1e-12)
    assert enc.std == pytest.approx(ref.scale_[0], rel=1e-12)
    out = enc.transform(pd.Series(train), P).numpy()
    assert out.shape == (200, 2) and out.dtype == np.float32
    ok = ~np.isnan(train)
    np.testing.assert_allclose(out[ok, 0], ref.transform(train.reshape(-1, 1))[ok, 0], rtol=1e-5, atol=1e-6)
    assert (out[ok, 1] == 0).all()


def test_numeric_missing_is_zero_with_indicator():
    enc = E.NumericEncoder("x").fit(pd.Series([1.0, 2.0, 3.0]), P)
    out = enc.transform(pd.Series([np.nan, 2.0, None], dtype=object), P).numpy()
    assert out.tolist() == [[0.0, 1.0], [0.0, 0.0], [0.0, 1.0]]
    assert enc.width == 2


def test_numeric_serving_rows_use_training_statistics():
    train, serve = np.array([1.0, 2.0, 3.0, 4.0]), np.array([100.0, -50.0, 2.5])
    enc = E.NumericEncoder("x").fit(pd.Series(train), P)
    ref = StandardScaler().fit(train.reshape(-1, 1))  # fitted on the training rows only
    got = enc.transform(pd.Series(serve), P).numpy()[:, 0]
    np.testing.assert_allclose(got, ref.transform(serve.reshape(-1, 1))[:, 0], rtol=1e-6)
    assert enc.mean == 2.5  # refitting on serving rows would move it
    assert got[2] == 0.0


@pytest.mark.parametrize("train", [[7.0, 7.0, 7.0], [4.0], [np.nan, np.nan]])
def test_numeric_degenerate_columns_do_not_divide_by_zero(train):
    enc = E.NumericEncoder("x").fit(pd.Series(train), P)
    assert enc.std == 1.0
    assert np.isfinite(enc.transform(pd.Series([7.0, 8.0]), P).numpy()).all()


def test_numeric_rejects_text_naming_the_row():
    enc = E.NumericEncoder("price")
    with pytest.raises(TowersError, match=r"^items\.csv, column 'price', row 2: 'x' is not a number"):
        enc.fit(pd.Series(["1", "x"]), P)


# ---------------------------------------------------------------- categorical


def test_categorical_vocabulary_and_rare_values():
    enc = E.CategoricalEncoder("c", rare_below=2).fit(pd.Series(["a", "b", "a", "c", "c", "d", None, None]), P)
    assert enc.vocab == ["a", "c"]  # b, d seen once; missing never enters the vocabulary
    assert enc.size == 3
    got = codes(enc.transform(pd.Series(["a", "c", "b", "d", None, "a"]), P))
    assert got[0] == got[5] and got[0] != got[1]
    assert set(got[:2]) == {1, 2}
    assert got[2:5] == [0, 0, 0]  # rare -> 0, missing -> 0
    assert enc.unknown_seen == 2  # rare values count as unknown; missing ones do not


def test_categorical_unseen_values_go_to_zero_and_are_counted():
    enc = E.CategoricalEncoder("c").fit(pd.Series(["x", "y"]), P)
    got = codes(enc.transform(pd.Series(["y", "new", "newer", np.nan, "x"]), P))
    assert got == [2, 0, 0, 0, 1]
    assert enc.unknown_seen == 2
    enc.transform(pd.Series(["x"]), P)
    assert enc.unknown_seen == 0  # counts the last transform only


def test_categorical_numbers_match_whatever_their_storage():
    # the text of 2.0 must not depend on the rest of the column ('2.0' beside 2.5, '2' otherwise), or a value
    # fitted in one batch could be unknown in another
    enc = E.CategoricalEncoder("c").fit(pd.Series([1.0, 2.0, 2.5]), P)
    assert enc.vocab == ["1", "2", "2.5"]
    assert codes(enc.transform(pd.Series([2.0]), P)) == [2]
    assert codes(enc.transform(pd.Series([2]), P)) == [2]
    assert codes(enc.transform(pd.Series([2.5, np.nan]), P)) == [3, 0]
    ints = E.CategoricalEncoder("c").fit(pd.Series([10, 20]), P)
    assert codes(ints.transform(pd.Series([20.0, np.nan, 10.0]), P)) == [2, 0, 1]  # NaN made the column float
    assert codes(ints.transform(pd.Series(["20"]), P)) == [2]  # the same code read as text


def test_categorical_huge_or_infinite_floats_do_not_crash():
    enc = E.CategoricalEncoder("c").fit(pd.Series([1e20, np.inf, 3.0]), P)
    assert enc.vocab == sorted(["100000000000000000000", "inf", "3"])


def test_categorical_hashing_sends_missing_to_zero(tmp_path):
    # with pandas' string dtype a missing value arrives as NaN; it must not be hashed as the text 'nan'
    f = tmp_path / "items.csv"
    f.write_text("item,brand\n1,acme\n2,\n3,bolt\n", encoding="utf-8")
    column = read_table(f)["brand"]
    got = codes(E.CategoricalEncoder("brand", hashed_rows=50).transform(column, f))
    assert got[1] == 0 and got[0] >= 1 and got[2] >= 1
    assert codes(E.CategoricalEncoder("c", hashed_rows=50).transform(pd.Series([1.5, np.nan]), P))[1] == 0
    assert E._as_text(np.array(["a", np.nan], dtype=object)).tolist() == ["a", None]


def test_categorical_booleans():
    enc = E.CategoricalEncoder("c").fit(pd.Series([True, False, True]), P)
    assert codes(enc.transform(pd.Series([False, True]), P)) == [1, 2]


def test_categorical_hashing_range_and_missing():
    enc = E.CategoricalEncoder("c", hashed_rows=7).fit(pd.Series(["ignored"]), P)
    assert enc.vocab == [] and enc.size == 8
    values = [f"v{i}" for i in range(300)]
    got = np.array(codes(enc.transform(pd.Series(values + [None]), P)))
    assert got[-1] == 0
    assert got[:-1].min() >= 1 and got[:-1].max() <= 7
    assert len(set(got[:-1].tolist())) == 7  # 300 values fill all 7 buckets
    # Reference: pandas' SipHash with its fixed default key, which is what the encoder documents.
    ref = pd.util.hash_array(np.array(values, dtype=object), categorize=False) % np.uint64(7) + np.uint64(1)
    assert got[:-1].tolist() == ref.astype(np.int64).tolist()


HASH_SCRIPT = """
import json, sys
import pandas as pd
from towers.data.encoders import CategoricalEncoder, TokenEncoder
c = CategoricalEncoder("c", hashed_rows=1000).transform(pd.Series(["apple", "pear", "7", None]), "f")
t = TokenEncoder("t", hashed_rows=1000, token_limit=3).transform(pd.Series(["apple|pear", "kiwi"]), "f")
print(json.dumps([c.tolist(), t.tolist()]))
"""


@pytest.mark.slow
def test_hashing_is_stable_across_processes_and_instances():
    here = [E.CategoricalEncoder("c", hashed_rows=1000).transform(pd.Series(["apple", "pear", "7", None]), "f").tolist(),
            E.TokenEncoder("t", hashed_rows=1000, token_limit=3).transform(pd.Series(["apple|pear", "kiwi"]), "f").tolist()]
    again = E.CategoricalEncoder("other", hashed_rows=1000).transform(pd.Series(["apple", "pear", "7", None]), "g")
    assert again.tolist() == here[0]
    # A different PYTHONHASHSEED would change Python's hash(); the bucket of each value must not change.
    env = {**os.environ, "PYTHONHASHSEED": "12345"}
    out = subprocess.run([sys.executable, "-c", HASH_SCRIPT], capture_output=True, text=True, env=env, timeout=120)
    assert out.returncode == 0, out.stderr
    assert json.loads(out.stdout) == here


# ---------------------------------------------------------------- tokens


def test_token_list_and_delimited_text_encode_identically():
    lists = pd.Series([["red", "blue"], ["blue"], [], None, ["green", "red", "blue"]])
    text = pd.Series(["red|blue", "blue", "", None, "green|red|blue"])
    a = E.TokenEncoder("t").fit(lists, P)
    b = E.TokenEncoder("t").fit(text, P)
    assert a.vocab == b.vocab == ["blue", "green", "red"]
    assert torch.equal(a.transform(lists, P), b.transform(text, P))
    assert torch.equal(a.transform(text, P), b.transform(lists, P))


def test_token_padding_unknown_and_known_indices():
    enc = E.TokenEncoder("t", token_limit=4).fit(pd.Series(["a|b", "b|c"]), P)
    assert enc.size == 3 + 2
    out = codes(enc.transform(pd.Series(["a|zzz|c", "b"]), P))
    assert out[0][1] == 1  # unknown token
    assert out[0][0] >= 2 and out[0][2] >= 2 and out[0][0] != out[0][2]
    assert out[0][3] == 0 and out[1][1:] == [0, 0, 0]  # padding
    assert out[1][0] == enc.vocab.index("b") + 2
    assert enc.unknown_seen == 1


def test_token_max_tokens_keeps_the_first_tokens():
    enc = E.TokenEncoder("t", token_limit=2).fit(pd.Series(["a|b|c|d"]), P)
    out = codes(enc.transform(pd.Series(["d|c|b|a"]), P))
    assert out == [[enc.vocab.index("d") + 2, enc.vocab.index("c") + 2]]


@pytest.mark.parametrize("row,other", [(None, "a"), (np.nan, "a"), ("", "a"), (" ", "a"), ("|", "a"), (" | ", "a"),
                                       ([], ["a"]), (None, ["a"]), ([""], ["a"]), ([None], ["a"])])
def test_token_empty_rows_are_all_padding(row, other):
    enc = E.TokenEncoder("t", token_limit=3).fit(pd.Series(["a|b"]), P)
    out = enc.transform(pd.Series([row, other], dtype=object), P)
    assert out.shape == (2, 3)
    assert out[0].tolist() == [0, 0, 0]
    assert out[1, 0].item() == 2
    assert enc.unknown_seen == 0  # empty pieces are not unknown tokens


def test_token_whitespace_is_trimmed_and_separator_configurable():
    enc = E.TokenEncoder("t", separator=",").fit(pd.Series(["a,b"]), P)
    assert enc.vocab == ["a", "b"]
    assert codes(enc.transform(pd.Series([" a , b ", "b,  a"]), P))[0][:2] == [2, 3]
    assert codes(enc.transform(pd.Series(["b,  a"]), P))[0][:2] == [3, 2]
    assert codes(enc.transform(pd.Series(["a|b"]), P))[0][0] == 1  # '|' is not the separator here


def test_token_empty_pieces_take_no_slots():
    # 'a||b' holds two tokens: 'b' takes the second slot, so token_limit=2 keeps it
    enc = E.TokenEncoder("t", token_limit=2).fit(pd.Series(["a|b"]), P)
    assert codes(enc.transform(pd.Series(["a||b", "| |a", "a| |b|"]), P)) == [[2, 3], [2, 0], [2, 3]]


def test_token_min_count():
    enc = E.TokenEncoder("t", rare_below=2).fit(pd.Series(["a|b", "a|c", "a"]), P)
    assert enc.vocab == ["a"]
    assert codes(enc.transform(pd.Series(["b|a"]), P))[0][:2] == [1, 2]


def test_token_hashing_range():
    enc = E.TokenEncoder("t", hashed_rows=5, token_limit=50).fit(pd.Series(["x"]), P)
    assert enc.vocab == [] and enc.size == 7
    out = np.array(codes(enc.transform(pd.Series(["|".join(f"t{i}" for i in range(50)), None]), P)))
    assert out[0].min() >= 2 and out[0].max() <= 6  # 0 pads, 1 is unknown, hashed tokens 2..buckets+1
    assert (out[1] == 0).all()


def test_token_parquet_list_column_matches_text(tmp_path):
    # pandas reads a parquet list column as numpy arrays, not Python lists.
    f = tmp_path / "items.parquet"
    pq.write_table(pa.table({"tags": pa.array([["x", "y"], [], None, ["y"]], type=pa.list_(pa.string()))}), f)
    tags = read_table(f)["tags"]
    enc = E.TokenEncoder("tags").fit(tags, f)
    text = pd.Series(["x|y", "", None, "y"])
    assert torch.equal(enc.transform(tags, f), enc.transform(text, f))
    assert enc.vocab == ["x", "y"]


def test_token_numbers_and_text_agree():
    enc = E.TokenEncoder("t").fit(pd.Series([[1, 2]]), P)
    assert enc.vocab == ["1", "2"]
    assert torch.equal(enc.transform(pd.Series([[2, 1]]), P), enc.transform(pd.Series(["2|1"]), P))


def test_token_rejects_non_token_columns():
    with pytest.raises(TowersError, match=r"column 't', row 1: holds int64 values, not token lists"):
        E.TokenEncoder("t").fit(pd.Series([1, 2]), P)
    with pytest.raises(TowersError, match=r"column 't', row 2: 3 is neither a token list nor delimited text"):
        E.TokenEncoder("t").fit(pd.Series(["a", 3], dtype=object), P)


def test_token_mixing_lists_and_text_names_the_odd_row():
    # the message names the first row that breaks the column's form, and says lists and text are mixed
    with pytest.raises(TowersError, match=r"column 't', row 3: 'b' mixes token lists and delimited text"):
        E.TokenEncoder("t").fit(pd.Series([["a"], None, "b"], dtype=object), P)
    with pytest.raises(TowersError, match=r"column 't', row 2: \[\] mixes token lists and delimited text"):
        E.TokenEncoder("t").fit(pd.Series(["a", [], "c"], dtype=object), P)


# ---------------------------------------------------------------- vectors


def test_vector_standardises_each_dimension_like_standard_scaler():
    rng = np.random.default_rng(0)
    mat = rng.normal([0.0, 10.0, -5.0], [1.0, 3.0, 0.1], size=(50, 3))
    series = pd.Series(list(mat))
    enc = E.VectorEncoder("v", 3).fit(series, P)
    ref = StandardScaler().fit(mat)  # reference: per-column mean and population std
    np.testing.assert_allclose(enc.mean, ref.mean_, rtol=1e-12)
    np.testing.assert_allclose(enc.std, ref.scale_, rtol=1e-12)
    out = enc.transform(series, P)
    assert out.shape == (50, 3) and out.dtype == torch.float32 and enc.width == 3
    np.testing.assert_allclose(out.numpy(), ref.transform(mat), rtol=1e-5, atol=1e-5)


def test_vector_missing_rows_are_zero_and_ignored_when_fitting():
    enc = E.VectorEncoder("v", 2).fit(pd.Series([[1.0, 10.0], None, [3.0, 10.0]]), P)
    assert enc.mean.tolist() == [2.0, 10.0]
    assert enc.std.tolist() == [1.0, 1.0]  # the constant dimension keeps std 1
    assert enc.transform(pd.Series([None, [3.0, 12.0]]), P).tolist() == [[0.0, 0.0], [1.0, 2.0]]
    assert enc.transform(pd.Series([None, None]), P).tolist() == [[0.0, 0.0], [0.0, 0.0]]


def test_vector_wrong_length_names_the_row():
    enc = E.VectorEncoder("emb", 3)
    with pytest.raises(TowersError, match=r"^items\.csv, column 'emb', row 2: vector of length 2, expected 3"):
        enc.fit(pd.Series([[1, 2, 3], [1, 2], [1, 2, 3, 4]]), P)


@pytest.mark.parametrize("bad", [[1.0, np.nan], [np.inf, 0.0], [1.0, None]])
def test_vector_nan_entries_name_the_row(bad):
    with pytest.raises(TowersError, match=r"column 'emb', row 3: vector holds NaN or infinite entries"):
        E.VectorEncoder("emb", 2).fit(pd.Series([[1.0, 2.0], None, bad]), P)


def test_vector_rejects_non_list_columns():
    with pytest.raises(TowersError, match="expected a list column of 2 numbers per row"):
        E.VectorEncoder("emb", 2).fit(pd.Series(["1,2", "3,4"]), P)
    with pytest.raises(TowersError, match="vector entries are not numbers"):
        E.VectorEncoder("emb", 2).fit(pd.Series([["a", "b"]]), P)


def test_vector_from_parquet(tmp_path):
    f = tmp_path / "v.parquet"
    pq.write_table(pa.table({"emb": pa.array([[1.0, 2.0], [3.0, 6.0]], type=pa.list_(pa.float32()))}), f)
    enc = E.VectorEncoder("emb", 2).fit(read_table(f)["emb"], f)
    assert enc.mean.tolist() == [2.0, 4.0] and enc.std.tolist() == [1.0, 2.0]


# ---------------------------------------------------------------- ids


def test_id_encoder_integer_ids():
    enc = E.IdEncoder.fit(np.array([30, 10, 20, 10], dtype=np.int64))
    assert enc.id_type == "int" and enc.size == 4
    assert codes(enc.transform(np.array([10, 20, 30, 99, 10]))) == [1, 2, 3, 0, 1]


def test_id_encoder_text_ids():
    enc = E.IdEncoder.fit(np.array(["b", "a", "c", "a"], dtype=object))
    assert enc.id_type == "str" and enc.size == 4
    got = codes(enc.transform(np.array(["a", "b", "c", "zz"], dtype=object)))
    assert got == [1, 2, 3, 0]


def test_id_encoder_empty():
    enc = E.IdEncoder.fit(np.array([], dtype=np.int64))
    assert enc.size == 1
    assert codes(enc.transform(np.array([5]))) == [0]


# ---------------------------------------------------------------- saved state


def fitted_encoders():
    train = {
        "price": pd.Series([1.0, 2.5, np.nan, 4.0]),
        "brand": pd.Series(["acme", "bolt", "acme", None]),
        "code": pd.Series([1.0, 2.0, 2.5, np.nan]),
        "hashed": pd.Series(["p", "q", "r", "s"]),
        "tags": pd.Series(["x|y", "y", None, "z|x|y"]),
        "htags": pd.Series(["x|y", "y", None, "z"]),
        "emb": pd.Series([[1.0, 0.0], [3.0, 4.0], None, [2.0, 8.0]]),
    }
    encs = [
        E.NumericEncoder("price"),
        E.CategoricalEncoder("brand", rare_below=1),
        E.CategoricalEncoder("code"),
        E.CategoricalEncoder("hashed", hashed_rows=11),
        E.TokenEncoder("tags", separator="|", token_limit=2),
        E.TokenEncoder("htags", hashed_rows=13, token_limit=3),
        E.VectorEncoder("emb", 2),
    ]
    for enc in encs:
        enc.fit(train[enc.name], P)
    return encs


SERVE = {
    "price": pd.Series([np.nan, 100.0, 2.5]),
    "brand": pd.Series(["bolt", "new", None]),
    "code": pd.Series([2.0, 3.0, 2.5]),
    "hashed": pd.Series(["p", "unseen", None]),
    "tags": pd.Series(["y|new|x", "", "x"]),
    "htags": pd.Series(["y|new|x", "", "x"]),
    "emb": pd.Series([[0.0, 0.0], None, [5.0, -4.0]]),
}


@pytest.mark.parametrize("index", range(7))
def test_state_survives_json_and_transforms_identically(index):
    enc = fitted_encoders()[index]
    state = enc.state()
    text = json.dumps(state)  # no default=: numpy scalars or arrays in the state would fail here
    rebuilt = E.encoder_from_state(json.loads(text))
    assert type(rebuilt) is type(enc)
    assert rebuilt.state() == state
    assert torch.equal(rebuilt.transform(SERVE[enc.name], P), enc.transform(SERVE[enc.name], P))
    if hasattr(enc, "size"):
        assert rebuilt.size == enc.size
    else:
        assert rebuilt.width == enc.width


@pytest.mark.parametrize("ids", [np.array([7, 3, 5], dtype=np.int64), np.array(["u2", "u1"], dtype=object)])
def test_id_state_survives_json(ids):
    enc = E.IdEncoder.fit(ids)
    rebuilt = E.encoder_from_state(json.loads(json.dumps(enc.state())))
    assert rebuilt.id_type == enc.id_type and rebuilt.ids.dtype == enc.ids.dtype
    probe = np.concatenate([ids, ids[:1]]) if ids.dtype != object else np.array(["u1", "u9", "u2"], dtype=object)
    assert torch.equal(rebuilt.transform(probe), enc.transform(probe))
    assert rebuilt.transform(probe).min().item() >= 0


def test_make_encoder_builds_from_resolved_feature_specs(tmp_path):
    cfg = C.resolve({
        "interactions": {"path": "l.csv", "query_column": "u", "candidate_column": "i"},
        "items": {"path": "items.csv", "id_column": "i", "features": [
            {"name": "p", "kind": "numeric"},
            {"name": "c", "kind": "categorical", "rare_below": 3, "hashed_rows": 0},
            {"name": "t", "kind": "tokens", "separator": ";", "token_limit": 5, "hashed_rows": 9},
            {"name": "v", "kind": "vector", "length": 4},
        ]},
    }, tmp_path)
    p, c, t, v = (E.make_encoder(s) for s in cfg.items.features)
    assert isinstance(p, E.NumericEncoder) and p.name == "p"
    assert isinstance(c, E.CategoricalEncoder) and c.rare_below == 3 and c.hashed_rows == 0
    assert isinstance(t, E.TokenEncoder) and (t.separator, t.token_limit, t.hashed_rows) == (";", 5, 9)
    assert isinstance(v, E.VectorEncoder) and v.length == 4 and v.width == 4


def test_state_saved_under_the_earlier_key_names_still_loads():
    # bundles written before the feature options were renamed keep loading, with the same settings
    enc = E.encoder_from_state({"kind": "tokens", "name": "t", "min_count": 2, "hash_buckets": 0, "separator": ";",
                                "max_tokens": 5, "vocab": ["a", "b"]})
    assert (enc.rare_below, enc.hashed_rows, enc.token_limit, enc.vocab) == (2, 0, 5, ["a", "b"])
