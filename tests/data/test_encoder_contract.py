"""The contract every encoder keeps (towers/data/encoders.py), checked on each one alike.

* plain-state round trip: `state()` survives JSON, and `encoder_from_state` rebuilds an encoder whose
  state, size and transforms are identical (a run folder stores encoders only this way);
* values the encoder has no row of its own for go to its unknown row: unseen or too-rare values to
  row 0 (categorical, ids), unseen tokens to slot 1 (tokens), and missing values to the all-missing
  encoding (numeric and dates: zero plus the missing flag, calendar pairs zero; vectors: zeros; token
  lists: padding). Hashed
  encoders give every present value a bucket, so only missing values have no row of their own;
* row independence: encoding rows one at a time gives the rows of encoding them all together.
"""

from __future__ import annotations

import json
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import pandas as pd
import pytest
import torch

from towers.data import encoders as E

P = "items.csv"


def _series(values: list) -> pd.Series:
    return pd.Series(list(values), dtype=object)


def _ids(values: list) -> np.ndarray:
    return np.asarray(values, dtype=np.int64 if all(isinstance(v, int) for v in values) else object)


@dataclass
class Case:
    """One fitted encoder, rows to serve, and the encoding each value without a row of its own must get."""

    make: Callable[[], object]
    serve: list
    unknown: dict  # value -> its expected encoding (None stands for a missing value)
    placed: list  # values with a row of their own: their encodings differ from every unknown one
    ids: bool = False  # IdEncoder: arrays of ids in, no file path

    def encoder(self):
        return self.make()

    def transform(self, enc, values: list) -> torch.Tensor:
        return enc.transform(_ids(values)) if self.ids else enc.transform(_series(values), P)


def _fitted(enc, train: list):
    return enc.fit(_series(train), P)


CASES = {
    "numeric": Case(lambda: _fitted(E.NumericEncoder("price"), [1.0, 2.5, np.nan, 4.0]),
                    serve=[np.nan, 100.0, 2.5, -3.0, None, 4.0],
                    unknown={None: [0.0, 1.0]}, placed=[2.5, 100.0, -3.0]),
    "numeric-log1p-clipped": Case(lambda: _fitted(E.NumericEncoder("price", log1p=True, clip_lower=0.1, clip_upper=0.9),
                                                  [1.0, 10.0, np.nan, 100.0, 1000.0, 3.0]),
                                  serve=[5000.0, None, 0.0, 40.0, np.nan, 2.0],
                                  unknown={None: [0.0, 1.0]}, placed=[0.0, 40.0, 5000.0]),
    "date": Case(lambda: _fitted(E.DateEncoder("listed"), ["2026-03-14", None, "2025-12-01T10:00:00+01:00", "2024-02-29"]),
                 serve=["2027-01-01", None, "2026-03-14", "1990-05-05T23:59:59Z", np.nan],
                 unknown={None: [0.0, 1.0]}, placed=["2026-03-14", "2027-01-01", "1990-05-05"]),
    "date-calendar": Case(lambda: _fitted(E.DateEncoder("listed", reference_date="2026-01-01", calendar=True),
                                          ["2026-03-14", None, "2025-12-01"]),
                          serve=["2026-03-16T08:00:00", None, "2025-06-30", "2026-03-14"],
                          unknown={None: [0.0, 1.0, 0.0, 0.0, 0.0, 0.0]}, placed=["2026-03-16", "2025-06-30"]),
    "categorical": Case(lambda: _fitted(E.CategoricalEncoder("brand"), ["acme", "bolt", "acme", None, "coil"]),
                        serve=["bolt", "new", None, "acme", "zzz", "coil"],
                        unknown={"new": 0, "zzz": 0, None: 0}, placed=["acme", "bolt", "coil"]),
    "categorical-rare": Case(lambda: _fitted(E.CategoricalEncoder("brand", rare_below=2), ["acme", "bolt", "acme", "coil"]),
                             serve=["bolt", "acme", "new", None, "coil"],
                             unknown={"bolt": 0, "coil": 0, "new": 0, None: 0}, placed=["acme"]),
    "categorical-numbers": Case(lambda: _fitted(E.CategoricalEncoder("code"), [1.0, 2.0, 2.5, np.nan]),
                                serve=[2.0, 3.0, 2.5, None, 1.0],
                                unknown={3.0: 0, None: 0}, placed=[1.0, 2.0, 2.5]),
    "categorical-hashed": Case(lambda: _fitted(E.CategoricalEncoder("brand", hashed_rows=11), ["p", "q", "r", "s"]),
                               serve=["p", "unseen", None, "s", "q"],
                               unknown={None: 0}, placed=["p", "unseen", "s"]),
    "tokens": Case(lambda: _fitted(E.TokenEncoder("tags", separator="|", token_limit=3), ["x|y", "y", None, "z|x|y"]),
                   serve=["y|new|x", "", "x", None, "new|newer", "z|y|x|new"],
                   unknown={"new": [1, 0, 0], "new|newer": [1, 1, 0], None: [0, 0, 0]}, placed=["x", "y|z", "new|x"]),
    "tokens-hashed": Case(lambda: _fitted(E.TokenEncoder("htags", hashed_rows=13, token_limit=3), ["x|y", "y", None, "z"]),
                          serve=["y|new|x", "", "x", None, "z|z"],
                          unknown={None: [0, 0, 0], "": [0, 0, 0]}, placed=["x", "new", "z|z"]),
    "vector": Case(lambda: _fitted(E.VectorEncoder("emb", 2), [[1.0, 0.0], [3.0, 4.0], None, [2.0, 8.0]]),
                   serve=[[0.0, 0.0], None, [5.0, -4.0], [2.0, 4.0]],
                   unknown={None: [0.0, 0.0]}, placed=[[5.0, -4.0], [0.0, 0.0]]),
    "ids-int": Case(lambda: E.IdEncoder.fit(np.array([30, 10, 20, 10], dtype=np.int64)),
                    serve=[10, 99, 30, -5, 20], unknown={99: 0, -5: 0}, placed=[10, 20, 30], ids=True),
    "ids-text": Case(lambda: E.IdEncoder.fit(np.array(["u2", "u1", "u3"], dtype=object)),
                     serve=["u1", "u9", "u2", "", "u3"], unknown={"u9": 0, "": 0}, placed=["u1", "u2", "u3"], ids=True),
}


@pytest.fixture(params=list(CASES), ids=list(CASES))
def case(request) -> Case:
    return CASES[request.param]


def _width(enc) -> int:
    return enc.size if hasattr(enc, "size") else enc.width


def test_plain_state_round_trip_gives_identical_transforms(case):
    enc = case.encoder()
    state = enc.state()
    text = json.dumps(state)  # no default=: numpy scalars or arrays in the state would fail here
    rebuilt = E.encoder_from_state(json.loads(text))
    assert type(rebuilt) is type(enc)
    assert rebuilt.state() == state
    assert _width(rebuilt) == _width(enc)
    # reference: the encoder it was saved from, on serving rows with known, unseen and missing values
    assert torch.equal(case.transform(rebuilt, case.serve), case.transform(enc, case.serve))


def test_values_without_a_row_of_their_own_go_to_the_unknown_row(case):
    # the expected encodings are written out by hand from the encoders' stated conventions
    # (towers/data/encoders.py docstrings): common practice (no source) for embedding-table inputs
    enc = case.encoder()
    values = list(case.unknown)
    got = case.transform(enc, values)
    for value, row in zip(values, got.tolist()):
        assert row == case.unknown[value], value
    # and the values with rows of their own are placed elsewhere: the unknown row is not a catch-all
    for value, row in zip(case.placed, case.transform(enc, case.placed).tolist()):
        assert row not in list(case.unknown.values()), value


def test_rows_encode_the_same_alone_as_together(case):
    enc = case.encoder()
    together = case.transform(enc, case.serve)
    assert len(together) == len(case.serve)
    for i, value in enumerate(case.serve):
        # reference: the row of the batch encoding; a row's code must not depend on the other rows
        assert torch.equal(case.transform(enc, [value])[0], together[i]), (i, value)
