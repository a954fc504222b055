"""Date features, numeric log1p and quantile clipping, and the token separator warning (towers/data/encoders.py).

Outside references: Python's `datetime` arithmetic for ages and weekdays, numpy's sin, cos, log1p and
quantile for the encodings, and scikit-learn's StandardScaler for the standardisation.
"""

from __future__ import annotations

import json
import re
import warnings
from datetime import date, datetime, timedelta, timezone

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import torch
from sklearn.preprocessing import StandardScaler

from towers import config as C
from towers.data import encoders as E
from towers.data.context import ContextEncoders
from towers.data.features import SideTable
from towers.errors import TowersError

P = "items.csv"

LISTED = ["2026-03-14", "2025-11-02T08:15:00", None, "2024-02-29", "2026-01-01T23:30:00+02:00"]
# the same instants as Python datetimes (UTC; a zone converted), written out by hand
LISTED_PY = [datetime(2026, 3, 14), datetime(2025, 11, 2, 8, 15), None, datetime(2024, 2, 29),
             datetime(2026, 1, 1, 21, 30)]


def _days(a: datetime, b: datetime) -> float:
    return (a - b) / timedelta(days=1)


def _config(tmp_path, *features, context=()):
    return C.resolve({"interactions": {"path": "log.csv", "query_column": "u", "candidate_column": "i",
                                       "context": list(context)},
                      "items": {"path": "items.csv", "id_column": "i", "features": list(features)}}, tmp_path)


# ---------------------------------------------------------------- dates


def test_age_in_days_at_the_latest_training_date_matches_datetime_arithmetic():
    enc = E.DateEncoder("listed").fit(pd.Series(LISTED, dtype=object), P)
    assert enc.reference_date == "2026-03-14T00:00:00"  # the latest training date, found by eye above
    ref = datetime(2026, 3, 14)
    ages = np.array([np.nan if d is None else _days(ref, d) for d in LISTED_PY])  # reference: datetime arithmetic
    scaler = StandardScaler().fit(ages.reshape(-1, 1))  # reference: StandardScaler, NaN ignored when fitting
    out = enc.transform(pd.Series(LISTED, dtype=object), P).numpy()
    ok = ~np.isnan(ages)
    np.testing.assert_allclose(out[ok, 0], scaler.transform(ages.reshape(-1, 1))[ok, 0], rtol=1e-5, atol=1e-6)
    assert out[~ok].tolist() == [[0.0, 1.0]]  # missing: 0 with indicator 1, as the numeric kind gives it
    assert (out[ok, 1] == 0).all()


def test_configured_reference_date_and_unseen_rows_use_the_fitted_scale():
    enc = E.DateEncoder("listed", reference_date="2026-06-01T12:00:00+02:00").fit(pd.Series(LISTED, dtype=object), P)
    assert enc.reference_date == "2026-06-01T10:00:00"  # converted to UTC
    ref = datetime(2026, 6, 1, 10)
    serve = ["2026-07-04", "1999-12-31T06:00:00Z"]
    ages = [_days(ref, datetime(2026, 7, 4)), _days(ref, datetime(1999, 12, 31, 6))]  # reference: datetime
    got = enc.transform(pd.Series(serve, dtype=object), P).numpy()[:, 0] * enc.std + enc.mean
    np.testing.assert_allclose(got, ages, rtol=1e-5)
    assert got[0] < 0  # a date after the reference has a negative age


def test_parquet_date_and_timestamp_types_read_like_iso_text(tmp_path):
    when = [datetime(2026, 3, 14, 9, 30, tzinfo=timezone(timedelta(hours=-5))), None,
            datetime(2025, 7, 1, tzinfo=timezone.utc)]
    table = pa.table({"day": pa.array([date(2026, 3, 14), None, date(2025, 7, 1)], pa.date32()),
                      "stamp": pa.array(when, pa.timestamp("us", tz="America/New_York")),
                      "naive": pa.array([datetime(2026, 3, 14, 14, 30), None, datetime(2025, 7, 1)], pa.timestamp("ms")),
                      "text": ["2026-03-14T09:30:00-05:00", None, "2025-07-01"]})
    pq.write_table(table, tmp_path / "t.parquet")
    df = pd.read_parquet(tmp_path / "t.parquet")
    enc = E.DateEncoder("x", reference_date="2026-04-01")
    ages = {c: enc.transform(df[c], "t.parquet").numpy()[:, 0] for c in df.columns}
    # 09:30 at UTC-5 is 14:30 UTC whether stored as a zoned timestamp, a naive UTC one or ISO text
    np.testing.assert_array_equal(ages["stamp"], ages["text"])
    np.testing.assert_array_equal(ages["stamp"], ages["naive"])
    ref = datetime(2026, 4, 1)
    assert ages["day"][0] == pytest.approx(_days(ref, datetime(2026, 3, 14)), rel=1e-6)  # reference: datetime
    assert ages["stamp"][0] == pytest.approx(_days(ref, datetime(2026, 3, 14, 14, 30)), rel=1e-6)


def test_calendar_pairs_match_numpy_sin_cos_of_the_stated_angle():
    days = pd.date_range("2025-12-25", periods=40, freq="37h")  # every weekday and three months, odd hours
    text = pd.Series([d.isoformat() for d in days] + [None], dtype=object)
    enc = E.DateEncoder("seen", calendar=True).fit(text, P)
    out = enc.transform(text, P).numpy()
    assert enc.width == 6 and out.shape == (41, 6)
    py = [d.to_pydatetime() for d in days]
    weekday = np.array([d.weekday() for d in py])  # reference: datetime.weekday(), Monday 0
    month = np.array([d.month - 1 for d in py])  # January 0
    a, b = 2 * np.pi * weekday / 7, 2 * np.pi * month / 12  # the stated angles, 2*pi*value/period
    np.testing.assert_allclose(out[:40, 2:], np.stack([np.sin(a), np.cos(a), np.sin(b), np.cos(b)], 1), atol=1e-6)
    assert out[40].tolist() == [0.0, 1.0, 0.0, 0.0, 0.0, 0.0]  # a missing date: zeros and the indicator


@pytest.mark.parametrize("bad", ["14/03/2026", "next week", "2026-13-01"])
def test_unparseable_date_names_file_column_row_and_the_form(bad):
    with pytest.raises(TowersError, match=rf"^items\.csv, column 'listed', row 3: '{bad}' is not a date; write an ISO "
                                          r"date or timestamp such as 2026-03-14"):
        E.DateEncoder("listed").validate(pd.Series(["2026-01-01", None, bad]), P)


def test_numbers_in_a_date_column_are_refused():
    with pytest.raises(TowersError, match=r"row 1: 45000\.0 is not a date"):
        E.DateEncoder("listed").validate(pd.Series([45000.0, 45001.0]), P)


def test_a_date_in_a_numeric_column_suggests_the_date_kind():
    with pytest.raises(TowersError, match=r"row 2: '2026-03-14' is not a number but reads as a date; declare the "
                                          r"feature with kind: date"):
        E.NumericEncoder("listed").validate(pd.Series(["12", "2026-03-14"]), P)
    with pytest.raises(TowersError, match=r"'large' is not a number; fix the value, or declare the feature as categorical"):
        E.NumericEncoder("size").validate(pd.Series(["12", "large"]), P)
    # a price with its currency sign or thousands separator: the number is there, written with more than digits
    for written, bare in (("£5.35", "5.35"), ("1,299", "1299"), ("12 kg", "12")):
        with pytest.raises(TowersError, match=rf"{re.escape(repr(written))} is not a number; write the number alone "
                                              rf"\({re.escape(bare)}\)"):
            E.NumericEncoder("price").validate(pd.Series(["3", written]), P)


def test_no_training_dates_and_no_reference_is_an_error():
    with pytest.raises(TowersError, match="no dates among the training rows.*set reference_date"):
        E.DateEncoder("listed").fit(pd.Series([None, None], dtype=object), P)


# ---------------------------------------------------------------- numeric transforms


def test_log1p_matches_numpy_log1p_then_standardises():
    prices = np.array([0.0, 3.5, 12.0, np.nan, 250.0, 1999.0])
    enc = E.NumericEncoder("price", log1p=True).fit(pd.Series(prices), P)
    logged = np.log1p(prices)  # reference: numpy.log1p
    scaler = StandardScaler().fit(logged.reshape(-1, 1))
    out = enc.transform(pd.Series(prices), P).numpy()
    ok = ~np.isnan(prices)
    np.testing.assert_allclose(out[ok, 0], scaler.transform(logged.reshape(-1, 1))[ok, 0], rtol=1e-5, atol=1e-6)
    assert out[3].tolist() == [0.0, 1.0]


def test_log1p_refuses_a_negative_value_naming_the_row():
    enc = E.NumericEncoder("price", log1p=True)
    with pytest.raises(TowersError, match=r"^items\.csv, column 'price', row 3: -2\.0 is negative, but log1p takes "
                                          r"values >= 0.*set log1p: false"):
        enc.validate(pd.Series([1.0, None, -2.0]), P)
    enc.fit(pd.Series([1.0, 2.0]), P)
    with pytest.raises(TowersError, match="row 2: -0.5 is negative"):  # unseen rows too
        enc.transform(pd.Series([4.0, -0.5]), P)


def test_clipping_at_training_quantiles_matches_numpy_quantile_and_holds_for_unseen_rows():
    rng = np.random.default_rng(7)
    train = rng.lognormal(3.0, 1.2, 500)
    train[[5, 50]] = np.nan
    enc = E.NumericEncoder("price", clip_lower=0.05, clip_upper=0.95).fit(pd.Series(train), P)
    ok = train[~np.isnan(train)]
    low, high = np.quantile(ok, 0.05), np.quantile(ok, 0.95)  # reference: numpy.quantile (linear)
    assert (enc.low, enc.high) == (pytest.approx(low, rel=1e-12), pytest.approx(high, rel=1e-12))
    clipped = np.clip(ok, low, high)
    assert enc.mean == pytest.approx(clipped.mean(), rel=1e-12) and enc.std == pytest.approx(clipped.std(), rel=1e-12)
    serve = np.array([-1e6, low / 2, 20.0, high * 3])
    got = enc.transform(pd.Series(serve), P).numpy()[:, 0] * enc.std + enc.mean
    np.testing.assert_allclose(got, [low, low, 20.0, high], rtol=1e-5)  # the training bounds, not the serving rows'


def test_one_sided_clip_then_log1p():
    train = np.array([1.0, 2.0, 3.0, 4.0, 1000.0])
    enc = E.NumericEncoder("count", log1p=True, clip_upper=0.75).fit(pd.Series(train), P)
    assert enc.low is None and enc.high == pytest.approx(np.quantile(train, 0.75))  # reference: numpy.quantile
    expected = np.log1p(np.clip(train, None, np.quantile(train, 0.75)))  # reference: numpy clip then log1p
    assert enc.mean == pytest.approx(expected.mean(), rel=1e-12)


def test_states_written_before_the_transforms_load_unchanged():
    old = {"kind": "numeric", "name": "price", "mean": 2.0, "std": 4.0}  # a bundle's state from before these keys
    enc = E.encoder_from_state(old)
    assert (enc.log1p, enc.low, enc.high) == (False, None, None)
    assert enc.transform(pd.Series([6.0]), P).tolist() == [[1.0, 0.0]]  # (6 - 2) / 4, by hand


def test_fitted_bounds_and_reference_survive_json():
    enc = E.NumericEncoder("price", log1p=True, clip_lower=0.1, clip_upper=0.9).fit(pd.Series([1.0, 5, 9, 40, 300]), P)
    dates = E.DateEncoder("listed", calendar=True).fit(pd.Series(LISTED, dtype=object), P)
    for e, serve in ((enc, pd.Series([0.0, 7.0, 1e5])), (dates, pd.Series(["2027-01-01", None], dtype=object))):
        back = E.encoder_from_state(json.loads(json.dumps(e.state())))
        assert back.state() == e.state()
        assert torch.equal(back.transform(serve, P), e.transform(serve, P))


# ---------------------------------------------------------------- config


def test_config_builds_the_new_encoders(tmp_path):
    cfg = _config(tmp_path, {"name": "price", "kind": "numeric", "log1p": True, "clip_upper": 0.99},
                  {"name": "listed", "kind": "date", "reference_date": date(2026, 3, 14), "calendar": True})
    price, listed = (E.make_encoder(s) for s in cfg.items.features)
    assert (price.log1p, price.clip_lower, price.clip_upper) == (True, None, 0.99)
    assert (listed.reference_date, listed.calendar, listed.width) == ("2026-03-14T00:00:00", True, 6)


@pytest.mark.parametrize("spec, message", [
    ({"name": "brand", "kind": "categorical", "log1p": True},
     r"'items\.features\[0\]\.log1p': applies to numeric features only \(this one is categorical\); remove it"),
    ({"name": "price", "kind": "numeric", "calendar": True}, r"'items\.features\[0\]\.calendar': applies to date"),
    # a user who meant tokens: the separator of a categorical column was silently ignored before
    ({"name": "author", "kind": "categorical", "separator": ","},
     r"separator': applies to tokens features only \(this one is categorical\); remove it, or set kind: tokens"),
    ({"name": "author", "kind": "categorical", "token_limit": 4}, r"token_limit': applies to tokens"),
    ({"name": "author", "kind": "categorical", "length": 4}, r"length': applies to vector"),
    ({"name": "price", "kind": "numeric", "rare_below": 5}, r"rare_below': applies to categorical or tokens"),
    ({"name": "price", "kind": "numeric", "clip_lower": 0.9, "clip_upper": 0.1}, r"expected a quantile below clip_upper"),
    ({"name": "price", "kind": "numeric", "clip_upper": 1.5}, r"clip_upper': got 1\.5; expected a number <= 1"),
    ({"name": "listed", "kind": "date", "reference_date": "14.03.2026"},
     r"reference_date': got '14\.03\.2026'; expected an ISO date or timestamp"),
])
def test_config_refuses_misplaced_or_bad_keys(tmp_path, spec, message):
    with pytest.raises(TowersError, match=message):
        _config(tmp_path, spec)


def test_context_takes_dates_and_refuses_tokens(tmp_path):
    cfg = _config(tmp_path, context=[{"name": "ordered_at", "kind": "date", "calendar": True}])
    frame = pd.DataFrame({"ordered_at": ["2026-03-13T18:00:00Z", "2026-03-14T10:00:00Z", "2026-03-15", None]})
    enc = ContextEncoders.fit(frame, cfg.interactions.context, np.array([0, 1]), "log.csv")
    assert enc.model_inputs() == [{"name": "ordered_at", "kind": "date", "width": 6}]
    assert enc.encoders[0].reference_date == "2026-03-14T10:00:00"  # the latest training event
    block = ContextEncoders.from_state(json.loads(json.dumps(enc.state()))).encode(frame, "log.csv")
    assert torch.equal(block["ordered_at"], enc.encode(frame, "log.csv")["ordered_at"])
    with pytest.raises(TowersError, match=r"context\[0\]\.kind': got 'tokens'; context columns are numeric, "
                                          "categorical or date"):
        _config(tmp_path, context=[{"name": "basket", "kind": "tokens"}])


# ---------------------------------------------------------------- separator warning


def _tags_table(tmp_path, tags, separator="|"):
    pd.DataFrame({"item": range(len(tags)), "tags": tags}).to_csv(tmp_path / "items.csv", index=False)
    spec = C.FeatureSpec(name="tags", kind="tokens", separator=separator)
    return lambda: SideTable(tmp_path / "items.csv", "item", [spec], "error")


def test_separator_warning_names_file_column_and_the_separator_in_use(tmp_path):
    read = _tags_table(tmp_path, ["rake;steel", "hose;garden;green", "trowel", "seed;tomato", "gloves"])
    with pytest.warns(UserWarning, match=r"items\.csv, column 'tags': no value holds the separator '\|', but 60% of "
                                         r"them hold ';'.*set separator: ';' on this feature"):
        read()


@pytest.mark.parametrize("tags, separator", [
    (["rake|steel", "hose, garden", "trowel"], "|"),  # the separator occurs: the commas are inside tokens
    (["rake", "hose", "trowel", "seed", "gloves", "watering can"], "|"),  # one in six, below the share
    (["rake;steel", "hose;garden"], ";"),  # set right
    ([None, "", "  "], "|"),  # nothing to judge
])
def test_separator_warning_stays_quiet(tmp_path, tags, separator):
    read = _tags_table(tmp_path, tags, separator)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        read()


def test_separator_warning_skips_list_columns(tmp_path):
    table = pa.table({"item": [1, 2], "tags": pa.array([["a;b"], ["c;d", "e"]], pa.list_(pa.string()))})
    pq.write_table(table, tmp_path / "items.parquet")
    spec = C.FeatureSpec(name="tags", kind="tokens")
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        SideTable(tmp_path / "items.parquet", "item", [spec], "error")
