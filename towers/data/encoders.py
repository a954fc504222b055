"""Feature encoders: fitted on training entities only, saved as plain JSON-safe state.

The same encoder object turns training rows and unseen rows into tensors, so what the model sees
at serving time is built exactly as in training. Index 0 is always the unknown / missing bucket.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import torch

from towers.config import FeatureSpec
from towers.data.tables import DATE_FORM, date_column, numeric_column
from towers.errors import TowersError, where


def _one_text(v) -> str:
    # per value, so 2.0 reads '2' whatever else is in the column (training and serving agree)
    if isinstance(v, (float, np.floating)) and float(v).is_integer():
        return str(int(v))
    return str(v)


def _as_text(values: np.ndarray) -> np.ndarray:
    """Values as strings for vocabulary lookup; integers-as-floats lose their '.0'."""
    s = pd.Series(values)
    # built by hand: a pandas result would infer a string dtype and turn None back into NaN
    return np.array([_one_text(v) if ok else None for v, ok in zip(s.to_numpy(dtype=object), s.notna().to_numpy())],
                    dtype=object)


def _hash_rows(text: np.ndarray, buckets: int) -> np.ndarray:
    """Stable hashing (pandas' fixed-key SipHash) of strings into 1..buckets; None -> 0."""
    out = np.zeros(len(text), dtype=np.int64)
    present = np.array([v is not None for v in text], dtype=bool) if len(text) else np.zeros(0, bool)
    if present.any():
        h = pd.util.hash_array(text[present].astype(str).astype(object), categorize=False)
        out[present] = (h % np.uint64(buckets)).astype(np.int64) + 1
    return out


def _fit_vocab(text: np.ndarray, rare_below: int) -> list[str]:
    counts = pd.Series(text, dtype=object).dropna().value_counts(sort=False)
    kept = counts[counts >= rare_below]
    return sorted(kept.index.astype(str).tolist())


def _scale(values: np.ndarray) -> tuple[float, float]:
    """Mean and standard deviation of the present (non-NaN) values; a std of 0 becomes 1."""
    ok = values[~np.isnan(values)]
    mean = float(ok.mean()) if len(ok) else 0.0
    std = float(ok.std()) if len(ok) > 1 else 1.0
    return mean, (std if std > 1e-12 else 1.0)


def _standardised(values: np.ndarray, mean: float, std: float) -> np.ndarray:
    """(n, 2): each value standardised and a missing indicator; a missing (NaN) value is 0 with indicator 1."""
    missing = np.isnan(values)
    z = np.where(missing, 0.0, (values - mean) / std)
    return np.stack([z, missing.astype(np.float64)], axis=1)


class NumericEncoder:
    """Standardise with training mean/std; a missing value becomes 0 with an indicator of 1.

    Optionally the values are first clipped at quantiles of the training values (the bounds `low` and
    `high` are fitted once and saved) and then taken through log1p; the mean and std are those of the
    clipped, transformed training values.
    """

    kind = "numeric"

    def __init__(self, name: str, mean: float = 0.0, std: float = 1.0, log1p: bool = False,
                 clip_lower: float | None = None, clip_upper: float | None = None,
                 low: float | None = None, high: float | None = None):
        self.name, self.mean, self.std = name, mean, std
        self.log1p, self.clip_lower, self.clip_upper = log1p, clip_lower, clip_upper
        self.low, self.high = low, high

    def _values(self, series: pd.Series, path) -> np.ndarray:
        """The column as float64 (NaN where missing), checked: numbers, and none negative under log1p."""
        v = numeric_column(series, path, self.name, feature=True)
        if self.log1p:
            negative = v < 0
            if negative.any():
                row = int(np.flatnonzero(negative)[0])
                raise TowersError(f"{where(path, self.name, row + 1)}: {float(v[row])!r} is negative, but log1p "
                                  "takes values >= 0 (prices, counts); fix the value or set log1p: false")
        return v

    def _shaped(self, v: np.ndarray) -> np.ndarray:
        """Clipped at the fitted bounds, then log1p (NaN stays NaN)."""
        if self.low is not None or self.high is not None:
            v = np.clip(v, self.low, self.high)
        return np.log1p(v) if self.log1p else v

    def fit(self, series: pd.Series, path) -> "NumericEncoder":
        v = self._values(series, path)
        ok = v[~np.isnan(v)]
        self.low = float(np.quantile(ok, self.clip_lower)) if self.clip_lower is not None and len(ok) else None
        self.high = float(np.quantile(ok, self.clip_upper)) if self.clip_upper is not None and len(ok) else None
        self.mean, self.std = _scale(self._shaped(v))
        return self

    def validate(self, series: pd.Series, path) -> None:
        """Raise on a bad value anywhere in the column (rows count from 1 in the order given)."""
        self._values(series, path)

    def transform(self, series: pd.Series, path) -> torch.Tensor:
        z = _standardised(self._shaped(self._values(series, path)), self.mean, self.std)
        return torch.from_numpy(z.astype(np.float32))

    @property
    def width(self) -> int:
        return 2

    def state(self) -> dict:
        return {"kind": self.kind, "name": self.name, "mean": self.mean, "std": self.std, "log1p": self.log1p,
                "clip_lower": self.clip_lower, "clip_upper": self.clip_upper, "low": self.low, "high": self.high}


DAY_US = 86_400 * 10**6  # microseconds in a day
EPOCH_WEEKDAY = 3  # 1970-01-01 was a Thursday; Monday is 0


class DateEncoder:
    """Dates and timestamps as their age in days at a reference date, standardised like numbers.

    Inputs: the standardised age (reference minus date, in days; a later date has a negative age) and a
    missing indicator, as NumericEncoder gives them. With `calendar`, four more: (sin, cos) of
    2*pi*value/period for the day of the week (Monday 0, period 7) and the month of the year (January
    0, period 12), all 0 for a missing date. Dates are read in UTC. The reference is the configured
    one or, when none is, the latest training date; it is fixed at fit and saved, so unseen rows later
    get their ages at the same reference.
    """

    kind = "date"

    def __init__(self, name: str, reference_date: str | None = None, calendar: bool = False,
                 mean: float = 0.0, std: float = 1.0):
        self.name, self.calendar, self.mean, self.std = name, calendar, mean, std
        self.reference_date = None if reference_date is None else _iso(_reference_us(reference_date, name))

    def _times(self, series: pd.Series, path) -> np.ndarray:
        return date_column(series, path, self.name)

    def _ages(self, times: np.ndarray) -> np.ndarray:
        missing = np.isnat(times)
        us = np.where(missing, 0, times.astype(np.int64))
        return np.where(missing, np.nan, (_reference_us(self.reference_date, self.name) - us) / DAY_US)

    def validate(self, series: pd.Series, path) -> None:
        """Raise unless every present value is an ISO date or timestamp (or a datetime column)."""
        self._times(series, path)

    def fit(self, series: pd.Series, path) -> "DateEncoder":
        times = self._times(series, path)
        if self.reference_date is None:
            present = times[~np.isnat(times)]
            if not len(present):
                raise TowersError(f"{where(path, self.name)}: no dates among the training rows to count ages from; "
                                  "set reference_date on this feature or fill the column")
            self.reference_date = _iso(int(present.max().astype(np.int64)))
        self.mean, self.std = _scale(self._ages(times))
        return self

    def transform(self, series: pd.Series, path) -> torch.Tensor:
        times = self._times(series, path)
        parts = [_standardised(self._ages(times), self.mean, self.std)]
        if self.calendar:
            missing = np.isnat(times)
            us = np.where(missing, 0, times.astype(np.int64))
            weekday = (np.floor_divide(us, DAY_US) + EPOCH_WEEKDAY) % 7
            month = np.where(missing, 0, times.astype("datetime64[M]").astype(np.int64)) % 12
            for value, period in ((weekday, 7), (month, 12)):
                angle = 2 * np.pi * value / period
                parts.append(np.where(missing[:, None], 0.0, np.stack([np.sin(angle), np.cos(angle)], axis=1)))
        return torch.from_numpy(np.concatenate(parts, axis=1).astype(np.float32))

    @property
    def width(self) -> int:
        return 6 if self.calendar else 2

    def state(self) -> dict:
        return {"kind": self.kind, "name": self.name, "reference_date": self.reference_date,
                "calendar": self.calendar, "mean": self.mean, "std": self.std}


def _reference_us(text: str, name: str) -> int:
    """A reference date (ISO text) as microseconds since the epoch, UTC."""
    us = date_column(pd.Series([text], dtype=object), None, name, strict=False)[0]
    if np.isnat(us):
        raise TowersError(f"feature '{name}': reference_date {text!r} is not {DATE_FORM}; fix it in the config")
    return int(us.astype(np.int64))


def _iso(us: int) -> str:
    """Microseconds since the epoch as ISO text in UTC without a zone (2026-03-14T00:00:00)."""
    return pd.Timestamp(us, unit="us").isoformat()


class CategoricalEncoder:
    """Vocabulary of training values (seen at least rare_below times) or hashing into buckets."""

    kind = "categorical"

    def __init__(self, name: str, rare_below: int = 1, hashed_rows: int = 0, vocab: list[str] | None = None):
        self.name, self.rare_below, self.hashed_rows = name, rare_below, hashed_rows
        self.vocab = vocab or []
        self._index = pd.Index(self.vocab, dtype=object)
        self.unknown_seen = 0

    def validate(self, series: pd.Series, path) -> None:
        """Any value is a category (unseen ones go to the unknown bucket): nothing to reject."""

    def fit(self, series: pd.Series, path) -> "CategoricalEncoder":
        if not self.hashed_rows:
            self.vocab = _fit_vocab(_as_text(series.to_numpy()), self.rare_below)
            self._index = pd.Index(self.vocab, dtype=object)
        return self

    def transform(self, series: pd.Series, path) -> torch.Tensor:
        text = _as_text(series.to_numpy())
        if self.hashed_rows:
            return torch.from_numpy(_hash_rows(text, self.hashed_rows))
        idx = self._index.get_indexer(pd.Index(text, dtype=object)) + 1  # -1 (unknown) -> 0
        present = pd.notna(pd.Series(text, dtype=object)).to_numpy()
        self.unknown_seen = int(((idx == 0) & present).sum())
        return torch.from_numpy(idx.astype(np.int64))

    @property
    def size(self) -> int:
        return (self.hashed_rows or len(self.vocab)) + 1

    def state(self) -> dict:
        return {"kind": self.kind, "name": self.name, "rare_below": self.rare_below,
                "hashed_rows": self.hashed_rows, "vocab": list(self.vocab)}


OTHER_SEPARATORS = (",", ";", " ")  # what a token column's text is most often split by, besides the separator
SEPARATOR_SHARE = 0.2  # share of values holding one of them that triggers the warning: a choice (no source)


class TokenEncoder:
    """Token lists (parquet list column or delimited text) as padded index rows for a bag of embeddings.

    Index 0 pads, index 1 is the unknown token, known tokens start at 2.
    """

    kind = "tokens"

    def __init__(self, name: str, rare_below: int = 1, hashed_rows: int = 0, separator: str = "|",
                 token_limit: int = 32, vocab: list[str] | None = None):
        self.name, self.rare_below, self.hashed_rows = name, rare_below, hashed_rows
        self.separator, self.token_limit = separator, token_limit
        self.vocab = vocab or []
        self._index = pd.Index(self.vocab, dtype=object)
        self.unknown_seen = 0

    def _lists(self, series: pd.Series, path, check_separator: bool = False) -> pa.ListArray:
        values = series.to_numpy(dtype=object)
        try:
            arr = pa.array(values, from_pandas=True)
        except (pa.ArrowInvalid, pa.ArrowTypeError):
            is_text = np.array([isinstance(v, str) for v in values], dtype=bool)
            is_list = np.array([isinstance(v, (list, tuple, np.ndarray)) for v in values], dtype=bool)
            bad = ~(is_text | is_list | pd.isna(pd.Series(values, dtype=object)).to_numpy())
            if bad.any():
                row = int(np.flatnonzero(bad)[0])
                raise TowersError(f"{where(path, self.name, row + 1)}: {values[row]!r} is neither a token list nor "
                                  f"delimited text; store tags as a list or as text like 'a{self.separator}b'") from None
            if is_text.any() and is_list.any():
                row = int(np.flatnonzero(is_list if is_text[np.flatnonzero(is_text | is_list)[0]] else is_text)[0])
                raise TowersError(f"{where(path, self.name, row + 1)}: {values[row]!r} mixes token lists and delimited "
                                  "text in one column; store every row the same way") from None
            raise TowersError(f"{where(path, self.name)}: token lists mix text and numbers; store every token as text") from None
        if pa.types.is_null(arr.type):
            arr = pa.array([None] * len(values), type=pa.list_(pa.string()))
        if pa.types.is_string(arr.type) or pa.types.is_large_string(arr.type):
            if check_separator:
                self._check_separator(arr, path)
            arr = pc.split_pattern(arr, pattern=self.separator)
            arr = pa.ListArray.from_arrays(arr.offsets, pc.utf8_trim_whitespace(arr.flatten()), mask=arr.is_null())
        elif not (pa.types.is_list(arr.type) or pa.types.is_large_list(arr.type)):
            present = np.flatnonzero(np.asarray(arr.is_valid())) if len(arr) else np.zeros(0, np.int64)
            row = int(present[0]) if len(present) else 0
            raise TowersError(f"{where(path, self.name, row + 1)}: holds {arr.type} values, not token lists; "
                              f"store tags as a list column or as text like 'a{self.separator}b' "
                              "(or declare the column categorical if each row holds one value)")
        return arr

    def _check_separator(self, text: pa.Array, path) -> None:
        """Warn when no value holds the separator but a fair share hold another common one: each whole
        text would silently become one token."""
        text = pc.utf8_trim_whitespace(text)
        present = pc.sum(pc.not_equal(text, "")).as_py() or 0
        if not present or pc.any(pc.match_substring(text, self.separator)).as_py():
            return
        shares = {sep: (pc.sum(pc.match_substring(text, sep)).as_py() or 0) / present
                  for sep in OTHER_SEPARATORS if sep != self.separator}
        sep, share = max(shares.items(), key=lambda kv: kv[1])
        if share >= SEPARATOR_SHARE:
            warnings.warn(f"{where(path, self.name)}: no value holds the separator {self.separator!r}, but "
                          f"{share:.0%} of them hold {sep!r}, so each whole text is read as one token; if {sep!r} "
                          f"separates the tokens, set separator: {sep!r} on this feature", stacklevel=4)

    def validate(self, series: pd.Series, path) -> None:
        """Raise unless every row is a token list, delimited text or missing; warn on a separator that
        seems wrong."""
        self._flat(series, path, check_separator=True)

    def _flat(self, series, path, check_separator: bool = False):
        """Flattened token text plus per-row offsets; a null row is an empty list."""
        arr = self._lists(series, path, check_separator)
        lengths = np.asarray(pc.list_value_length(arr).fill_null(0), dtype=np.int64)
        offsets = np.concatenate([[0], np.cumsum(lengths)]).astype(np.int64)
        flat = arr.flatten()
        if not (pa.types.is_string(flat.type) or pa.types.is_large_string(flat.type)):
            flat = flat.cast(pa.string())
        text = np.asarray(flat.to_numpy(zero_copy_only=False), dtype=object)
        return text, offsets

    def fit(self, series: pd.Series, path) -> "TokenEncoder":
        if not self.hashed_rows:
            text, _ = self._flat(series, path)
            text = text[pd.notna(pd.Series(text, dtype=object)).to_numpy()]
            text = text[text != ""]
            self.vocab = _fit_vocab(text, self.rare_below)
            self._index = pd.Index(self.vocab, dtype=object)
        return self

    def transform(self, series: pd.Series, path) -> torch.Tensor:
        text, offsets = self._flat(series, path)
        n = len(series)
        if self.hashed_rows:
            codes = _hash_rows(text, self.hashed_rows) + 1
        else:
            codes = self._index.get_indexer(pd.Index(text, dtype=object)).astype(np.int64) + 2  # -1 + 2 = 1: unknown
        empty = pd.isna(pd.Series(text, dtype=object)).to_numpy() | (text == "")
        if not self.hashed_rows:
            self.unknown_seen = int(((codes == 1) & ~empty).sum())
        # position of each non-empty token within its row, for the padded layout (empty tokens take no slot)
        row_of = np.repeat(np.arange(n), np.diff(offsets))[~empty]
        codes = codes[~empty]
        starts = np.concatenate([[0], np.cumsum(np.bincount(row_of, minlength=n))[:-1]]).astype(np.int64)
        pos = np.arange(len(codes)) - starts[row_of] if len(codes) else np.zeros(0, np.int64)
        keep = pos < self.token_limit
        out = np.zeros((n, self.token_limit), dtype=np.int64)
        out[row_of[keep], pos[keep]] = codes[keep]
        return torch.from_numpy(out)

    @property
    def size(self) -> int:
        return (self.hashed_rows or len(self.vocab)) + 2

    def state(self) -> dict:
        return {"kind": self.kind, "name": self.name, "rare_below": self.rare_below, "hashed_rows": self.hashed_rows,
                "separator": self.separator, "token_limit": self.token_limit, "vocab": list(self.vocab)}


class VectorEncoder:
    """Fixed-length dense vectors (a parquet list column), standardised per dimension."""

    kind = "vector"

    def __init__(self, name: str, length: int, mean: list[float] | None = None, std: list[float] | None = None):
        self.name, self.length = name, length
        self.mean = np.asarray(mean if mean is not None else np.zeros(length), dtype=np.float64)
        self.std = np.asarray(std if std is not None else np.ones(length), dtype=np.float64)

    def _matrix(self, series: pd.Series, path) -> tuple[np.ndarray, np.ndarray]:
        values = series.to_numpy(dtype=object)
        try:
            arr = pa.array(values, from_pandas=True)
        except (pa.ArrowInvalid, pa.ArrowTypeError):
            arr = None
        if arr is None or not (pa.types.is_list(arr.type) or pa.types.is_large_list(arr.type)
                               or pa.types.is_fixed_size_list(arr.type) or pa.types.is_null(arr.type)):
            raise TowersError(f"{where(path, self.name)}: expected a list column of {self.length} numbers per row "
                              "(store vectors in parquet as a list of floats)")
        missing = np.asarray(arr.is_null()) if len(arr) else np.zeros(0, bool)
        if pa.types.is_null(arr.type):
            return np.zeros((len(values), self.length)), np.ones(len(values), bool)
        lengths = np.asarray(pc.list_value_length(arr).fill_null(self.length), dtype=np.int64)
        wrong = lengths != self.length
        if wrong.any():
            row = int(np.flatnonzero(wrong)[0])
            raise TowersError(f"{where(path, self.name, row + 1)}: vector of length {lengths[row]}, expected {self.length}; "
                              "fix the row or the feature's length")
        flat = arr.flatten()  # drops null rows, matching ~missing below
        try:
            nums = np.asarray(flat.cast(pa.float64()).to_numpy(zero_copy_only=False), dtype=np.float64)
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
            raise self._not_numbers(flat, missing, path) from None
        mat = np.zeros((len(values), self.length))
        mat[~missing] = nums.reshape(-1, self.length)
        bad = ~np.isfinite(mat).all(axis=1)
        if bad.any():
            row = int(np.flatnonzero(bad)[0])
            raise TowersError(f"{where(path, self.name, row + 1)}: vector holds NaN or infinite entries; replace them")
        return mat, missing

    def _not_numbers(self, flat: pa.Array, missing: np.ndarray, path) -> TowersError:
        """The error naming the first row whose vector holds an entry that is not a number."""
        def is_number(v) -> bool:
            if v is None:
                return True  # a missing entry: reported as NaN by the finiteness check
            try:
                float(v)
            except (TypeError, ValueError):
                return False
            return True

        entries = flat.to_pylist()
        first = next((j for j, v in enumerate(entries) if not is_number(v)), None)
        if first is None:  # a type arrow cannot cast at all (structs, nested lists)
            return TowersError(f"{where(path, self.name)}: vector entries of type {flat.type} are not numbers; "
                               "store vectors as lists of floats")
        row = int(np.flatnonzero(~missing)[first // self.length])
        return TowersError(f"{where(path, self.name, row + 1)}: vector entries are not numbers ({entries[first]!r}); "
                           "store vectors as lists of floats")

    def validate(self, series: pd.Series, path) -> None:
        """Raise unless every row is a vector of `length` finite numbers (or missing)."""
        self._matrix(series, path)

    def fit(self, series: pd.Series, path) -> "VectorEncoder":
        mat, missing = self._matrix(series, path)
        ok = mat[~missing]
        if len(ok):
            self.mean = ok.mean(axis=0)
            std = ok.std(axis=0)
            self.std = np.where(std > 1e-12, std, 1.0)
        return self

    def transform(self, series: pd.Series, path) -> torch.Tensor:
        mat, missing = self._matrix(series, path)
        z = (mat - self.mean) / self.std
        z[missing] = 0.0
        return torch.from_numpy(z.astype(np.float32))

    @property
    def width(self) -> int:
        return self.length

    def state(self) -> dict:
        return {"kind": self.kind, "name": self.name, "length": self.length,
                "mean": self.mean.tolist(), "std": self.std.tolist()}


class IdEncoder:
    """Maps ids seen in training to rows 1..n of an embedding table; any other id maps to row 0."""

    kind = "id"

    def __init__(self, ids: np.ndarray | list | None = None, id_type: str = "str"):
        self.id_type = id_type
        values = np.asarray([] if ids is None else ids, dtype=np.int64 if id_type == "int" else object)
        self.ids = values
        self._index = pd.Index(values)

    @classmethod
    def fit(cls, ids: np.ndarray) -> "IdEncoder":
        uniq = pd.unique(ids)
        kind = "int" if ids.dtype.kind in "iu" else "str"
        return cls(np.sort(uniq) if kind == "int" else np.asarray(sorted(uniq), dtype=object), kind)

    def transform(self, ids: np.ndarray) -> torch.Tensor:
        return torch.from_numpy(self._index.get_indexer(ids).astype(np.int64) + 1)

    @property
    def size(self) -> int:
        return len(self.ids) + 1

    def state(self) -> dict:
        return {"kind": self.kind, "id_type": self.id_type, "ids": self.ids.tolist()}


ENCODERS = {c.kind: c for c in (NumericEncoder, CategoricalEncoder, TokenEncoder, VectorEncoder, DateEncoder)}


def make_encoder(spec: FeatureSpec):
    """A fresh (unfitted) encoder for one feature spec from the config."""
    name, kind = spec.name, spec.kind
    if kind == "numeric":
        return NumericEncoder(name, log1p=spec.log1p, clip_lower=spec.clip_lower, clip_upper=spec.clip_upper)
    if kind == "date":
        return DateEncoder(name, spec.reference_date, spec.calendar)
    if kind == "categorical":
        return CategoricalEncoder(name, spec.rare_below, spec.hashed_rows)
    if kind == "tokens":
        return TokenEncoder(name, spec.rare_below, spec.hashed_rows, spec.separator, spec.token_limit)
    return VectorEncoder(name, spec.length)


STATE_KEYS_BEFORE = {"min_count": "rare_below", "hash_buckets": "hashed_rows", "max_tokens": "token_limit"}


def encoder_from_state(state: dict):
    """Rebuild an encoder from its saved plain state (bundles saved under the earlier key names too)."""
    s = {STATE_KEYS_BEFORE.get(k, k): v for k, v in state.items()}
    kind = s.pop("kind")
    if kind == "id":
        return IdEncoder(s["ids"], s["id_type"])
    return ENCODERS[kind](**s)
