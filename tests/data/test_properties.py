"""Property-based checks (hypothesis) of the data layer: encoders and the table reader.

* encoders: what is fitted on training rows transforms any serving row the same way, whatever
  else is in the batch (row by row, in any order), the saved state rebuilds the same encoder,
  and values unseen in training always land in the unknown bucket;
* read_table: any small CSV/TSV content gives a DataFrame or a one-line TowersError, never
  another exception.
"""

from __future__ import annotations

import json
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import torch
from hypothesis import given, settings
from hypothesis import strategies as st

from towers.data import encoders as E
from towers.data.tables import read_table
from towers.errors import TowersError

FAST = settings(max_examples=40, deadline=None)
P = "items.csv"

# ---------------------------------------------------------------- strategies

words = st.text(alphabet="abcdxyz", min_size=1, max_size=3)
maybe_words = st.one_of(words, st.none())
numbers = st.one_of(st.floats(-1e6, 1e6, allow_nan=False, allow_infinity=False), st.just(float("nan")))
token_lists = st.one_of(st.lists(words, max_size=6), st.none())


def object_series(values) -> pd.Series:
    return pd.Series(list(values), dtype=object)


def rebuilt(enc):
    """The encoder as a run folder stores it: plain JSON state, read back."""
    return E.encoder_from_state(json.loads(json.dumps(enc.state())))


def assert_row_independent(enc, serve: list, make=object_series, seed: int = 0):
    """Each row encodes the same alone, in the full batch, in a shuffled batch, and after a state round trip."""
    full = enc.transform(make(serve), P)
    assert len(full) == len(serve)
    for i, value in enumerate(serve):
        alone = enc.transform(make([value]), P)
        assert torch.equal(alone[0], full[i]), (i, value)
    order = np.random.default_rng(seed).permutation(len(serve))
    shuffled = enc.transform(make([serve[i] for i in order]), P)
    assert torch.equal(shuffled, full[torch.from_numpy(order)])
    assert torch.equal(rebuilt(enc).transform(make(serve), P), full)
    return full


# ---------------------------------------------------------------- encoders


@FAST
@given(train=st.lists(numbers, min_size=1, max_size=30), serve=st.lists(numbers, min_size=1, max_size=20))
def test_numeric_rows_are_encoded_independently_with_training_statistics(train, serve):
    enc = E.NumericEncoder("price").fit(pd.Series(train, dtype=float), P)
    full = assert_row_independent(enc, serve, lambda v: pd.Series(v, dtype=float))
    values = np.asarray(serve, dtype=float)
    missing = np.isnan(values)
    assert full[:, 1].tolist() == missing.astype(float).tolist()  # NaN is missing: indicator 1, value 0
    assert (full[missing, 0] == 0).all()
    expected = (values[~missing] - enc.mean) / enc.std
    np.testing.assert_allclose(full[~missing, 0].numpy(), expected.astype(np.float32), rtol=1e-5, atol=1e-6)
    ok = np.asarray(train, dtype=float)
    ok = ok[~np.isnan(ok)]
    if len(ok):
        assert enc.mean == pytest.approx(float(ok.mean()), rel=1e-9, abs=1e-9)


@FAST
@given(train=st.lists(maybe_words, min_size=1, max_size=30), serve=st.lists(maybe_words, min_size=1, max_size=20),
       rare_below=st.integers(1, 3))
def test_categorical_unknown_values_always_map_to_the_unknown_bucket(train, serve, rare_below):
    enc = E.CategoricalEncoder("brand", rare_below=rare_below).fit(object_series(train), P)
    full = assert_row_independent(enc, serve)
    counts = pd.Series([v for v in train if v is not None], dtype=object).value_counts()
    kept = {v for v, c in counts.items() if c >= rare_below}
    assert set(enc.vocab) == kept
    for value, code in zip(serve, full.tolist()):
        if value is None or value not in kept:
            assert code == 0, value  # missing, unseen or too rare: the unknown bucket
        else:
            assert code == enc.vocab.index(value) + 1
    assert enc.unknown_seen == sum(1 for v in serve if v is not None and v not in kept)


@FAST
@given(train=st.lists(maybe_words, min_size=1, max_size=20), serve=st.lists(maybe_words, min_size=1, max_size=20),
       buckets=st.integers(1, 7))
def test_categorical_hashing_is_stable_and_in_range(train, serve, buckets):
    enc = E.CategoricalEncoder("brand", hashed_rows=buckets).fit(object_series(train), P)
    full = assert_row_independent(enc, serve).tolist()
    for value, code in zip(serve, full):
        assert (code == 0) if value is None else (1 <= code <= buckets)
    first = {}
    for value, code in zip(serve, full):
        assert first.setdefault(value, code) == code  # the same value, the same bucket


@FAST
@given(train=st.lists(token_lists, min_size=1, max_size=20), serve=st.lists(token_lists, min_size=1, max_size=15),
       token_limit=st.integers(1, 5))
def test_token_rows_independent_and_unknown_tokens_map_to_the_unknown_slot(train, serve, token_limit):
    enc = E.TokenEncoder("tags", token_limit=token_limit).fit(object_series(train), P)
    full = assert_row_independent(enc, serve)
    seen = {t for row in train if row for t in row}
    assert set(enc.vocab) == seen
    for row, codes in zip(serve, full.tolist()):
        tokens = (row or [])[:token_limit]
        want = [enc.vocab.index(t) + 2 if t in seen else 1 for t in tokens]  # 1: unknown, 0: padding
        assert codes == want + [0] * (token_limit - len(want))
    # delimited text encodes exactly like the same tokens as a list
    as_text = [None if row is None else "|".join(row) for row in serve]
    nonempty = [i for i, row in enumerate(serve) if row]
    text_codes = enc.transform(object_series(as_text), P)
    assert torch.equal(text_codes[nonempty], full[nonempty])


@FAST
@given(length=st.integers(1, 4), data=st.data())
def test_vector_rows_are_encoded_independently(length, data):
    vec = st.one_of(st.lists(st.floats(-1e3, 1e3, allow_nan=False), min_size=length, max_size=length), st.none())
    train = data.draw(st.lists(vec, min_size=1, max_size=15))
    serve = data.draw(st.lists(vec, min_size=1, max_size=15))
    enc = E.VectorEncoder("emb", length).fit(object_series(train), P)
    full = assert_row_independent(enc, serve)
    for row, out in zip(serve, full):
        if row is None:
            assert (out == 0).all()
        else:
            expected = ((np.asarray(row) - enc.mean) / enc.std).astype(np.float32)
            np.testing.assert_allclose(out.numpy(), expected, rtol=1e-5, atol=1e-5)


@FAST
@given(train=st.lists(st.one_of(st.integers(0, 50), st.text(alphabet="pq", min_size=1, max_size=2)),
                      min_size=1, max_size=20, unique=True),
       serve=st.lists(st.integers(0, 80), min_size=1, max_size=20))
def test_id_encoder_unseen_ids_map_to_row_zero(train, serve):
    ints = np.asarray([v for v in train if isinstance(v, int)], dtype=np.int64)
    if len(ints) == 0:
        return
    enc = E.IdEncoder.fit(ints)
    rows = enc.transform(np.asarray(serve, dtype=np.int64)).tolist()
    known = sorted(set(ints.tolist()))
    assert rows == [known.index(v) + 1 if v in known else 0 for v in serve]
    alone = [enc.transform(np.asarray([v], dtype=np.int64)).item() for v in serve]
    assert alone == rows


# ---------------------------------------------------------------- the table reader

CSV_PIECES = ["a", "b", "id", "x1", "1", "2.5", "-3", "nan", "inf", "", " ", ",", ",", ";", "\t", '"', '""',
              "\n", "\n", "\r\n", "\r", "\ufeff", "é", "\x00", "#", "'", "\\", "[1, 2]", "a|b"]
csv_text = st.lists(st.sampled_from(CSV_PIECES), max_size=40).map("".join)
csv_bytes = st.one_of(csv_text.map(lambda t: t.encode("utf-8")),
                      csv_text.map(lambda t: t.encode("utf-8-sig")),
                      csv_text.map(lambda t: t.encode("latin-1", errors="replace")),
                      st.binary(max_size=120))


@FAST
@given(content=csv_bytes, suffix=st.sampled_from([".csv", ".tsv", ".CSV"]),
       columns=st.sampled_from([None, ["a"], ["a", "b"]]))
def test_read_table_gives_a_frame_or_a_towers_error(content, suffix, columns):
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / f"table{suffix}"
        path.write_bytes(content)
        try:
            df = read_table(path, columns=columns)
        except TowersError as exc:
            msg = str(exc)
            assert msg.startswith(str(path)) and "\n" not in msg, msg
            return
        assert isinstance(df, pd.DataFrame) and len(df) > 0
        assert all(isinstance(c, str) for c in df.columns) and not df.columns.duplicated().any()
        assert isinstance(df.index, pd.RangeIndex)
        if columns:
            assert set(columns) <= set(df.columns)


@FAST
@given(content=st.binary(max_size=200), suffix=st.sampled_from([".parquet", ".pq"]))
def test_read_table_on_garbage_parquet_gives_a_towers_error(content, suffix):
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / f"table{suffix}"
        path.write_bytes(content)
        with pytest.raises(TowersError) as err:
            read_table(path)
        assert str(err.value).startswith(str(path)) and "\n" not in str(err.value)
