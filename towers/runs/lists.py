"""Lists a person can use: item columns beside each listed item, item filters inside the top-N, and the
nightly batch of lists for every user of a run, streamed to parquet.

An item filter is applied before selection: the items it rules out are taken out of the catalog the
exact top-N searches (Scorer.over_items), so a list still holds `top` items whenever that many pass.
Filters and columns read an item table: the run's own (config items.path) unless another is named,
since columns such as in_stock change every night. Items of the run that the table lacks cannot be
checked against a filter, so a filter leaves them out (a warning counts them); without a filter they
are listed with empty columns.
"""

from __future__ import annotations

import re
import sys
import time
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import torch

from towers.atomic import write_atomic
from towers.data.history import history_ids
from towers.data.tables import (
    READABLE,
    check_unique_ids,
    given_ids,
    normalise_ids,
    padded_form,
    positions_in,
    read_table,
    shown,
    table_columns,
    table_rows,
)
from towers.errors import TowersError, plain, where
from towers.search.scorer import Scorer, excluded_cells
from towers.training.progress import log, show_bar

LIST_COLUMNS = ("query_id", "rank", "item_id", "score")
BATCH_USERS = 8192  # users listed per block of the nightly batch (the search blocks them again inside)
_FILTER_KEYS = ("only_true", "only_values", "never_values", "never_ids")
_SCALARS = (str, int, float, bool, np.integer, np.floating, np.bool_)


@dataclass(frozen=True)
class ItemFilter:
    """Which items may be listed: every condition must hold.

    only_true: boolean item columns that must be true. only_values: (column, allowed values) pairs.
    never_values: (column, excluded values) pairs. never_ids: item ids never listed. Values are
    compared as text (a number as it prints, true/false for a boolean column); a missing value is
    neither allowed by only_values nor excluded by never_values, and is not true.
    """

    only_true: tuple[str, ...] = ()
    only_values: tuple[tuple[str, tuple[str, ...]], ...] = ()
    never_values: tuple[tuple[str, tuple[str, ...]], ...] = ()
    never_ids: tuple = ()

    @classmethod
    def from_dict(cls, d: Mapping | None) -> "ItemFilter":
        """An ItemFilter from plain JSON-like data.

        {"only_true": ["in_stock"], "only_values": {"department": ["garden", "tools"]},
         "never_values": {"brand": ["Acme"]}, "never_ids": ["TR-00012"]}; every key optional; a
        value list may be a single value. Unknown keys or wrong types raise a TowersError.
        """
        if d is None:
            return cls()
        if not isinstance(d, Mapping):
            raise TowersError(f"item filter: expected a mapping with keys {', '.join(_FILTER_KEYS)}, got "
                              f"{type(d).__name__}")
        unknown = [k for k in d if k not in _FILTER_KEYS]
        if unknown:
            raise TowersError(f"item filter: unknown key {unknown[0]!r}; the keys are {', '.join(_FILTER_KEYS)}")
        return cls(only_true=tuple(_names(d.get("only_true", ()), "only_true")),
                   only_values=_value_pairs(d.get("only_values", {}), "only_values"),
                   never_values=_value_pairs(d.get("never_values", {}), "never_values"),
                   never_ids=tuple(_scalars(d.get("never_ids", ()), "never_ids")))

    def columns(self) -> list[str]:
        """The item table columns this filter reads, each once."""
        names = list(self.only_true) + [c for c, _ in self.only_values] + [c for c, _ in self.never_values]
        return list(dict.fromkeys(names))

    def __bool__(self) -> bool:
        return bool(self.only_true or self.only_values or self.never_values or self.never_ids)


def _scalars(value, key: str) -> list:
    values = [value] if isinstance(value, _SCALARS) else value
    if not isinstance(values, (list, tuple)) or not all(isinstance(v, _SCALARS) for v in values):
        raise TowersError(f"item filter {key!r}: expected a value or a list of values (text, numbers, true/false), "
                          f"got {type(value).__name__}")
    return list(values)


def _names(value, key: str) -> list[str]:
    names = [value] if isinstance(value, str) else value
    if not isinstance(names, (list, tuple)) or not all(isinstance(v, str) and v for v in names):
        raise TowersError(f"item filter {key!r}: expected a list of column names, got {value!r}")
    return list(names)


def _value_pairs(value, key: str) -> tuple[tuple[str, tuple[str, ...]], ...]:
    """{column: values} or [(column, values), ...] as ((column, (text, ...)), ...), one entry per column."""
    pairs = value.items() if isinstance(value, Mapping) else value
    if not isinstance(pairs, (list, tuple)) and not isinstance(value, Mapping):
        raise TowersError(f"item filter {key!r}: expected {{column: [values]}}, got {type(value).__name__}")
    merged: dict[str, list[str]] = {}
    for pair in pairs:
        if not (isinstance(pair, (list, tuple)) and len(pair) == 2 and isinstance(pair[0], str) and pair[0]):
            raise TowersError(f"item filter {key!r}: expected {{column: [values]}}, got the entry {pair!r}")
        merged.setdefault(pair[0], []).extend(_text(v) for v in _scalars(pair[1], f"{key}.{pair[0]}"))
    return tuple((c, tuple(dict.fromkeys(v))) for c, v in merged.items())


def _text(value) -> str:
    """A value as filters compare it: true/false for booleans, a whole float without its .0, else str."""
    if isinstance(value, (bool, np.bool_)):
        return "true" if value else "false"
    if isinstance(value, (float, np.floating)) and float(value).is_integer():
        return str(int(value))
    return str(value)


TRUTH = {"true": "true", "1": "true", "false": "false", "0": "false"}  # how a boolean may be written, as compared


def _holds_booleans(series: pd.Series) -> bool:
    """A column of booleans, or of text and numbers with booleans among them (a CSV's True/False cells)."""
    return pd.api.types.is_bool_dtype(series) or (series.dtype == object
                                                  and series.map(type).isin((bool, np.bool_)).any())


def _texts(series: pd.Series) -> pd.Series:
    """A whole column as _text gives each value (missing values stay missing), without a Python call per row."""
    missing = series.isna().to_numpy()
    if pd.api.types.is_bool_dtype(series):
        out = np.where(series.to_numpy(dtype=bool), "true", "false").astype(object)
    elif pd.api.types.is_float_dtype(series):
        values = series.to_numpy(dtype=np.float64)
        out = series.astype(str).to_numpy(dtype=object)
        with np.errstate(invalid="ignore"):
            whole = np.isfinite(values) & (values == np.round(values)) & (np.abs(values) < 2.0 ** 63)
        out[whole] = values[whole].astype(np.int64).astype(str)
    elif _holds_booleans(series):
        out = series.map(_text, na_action="ignore").to_numpy(dtype=object)  # true/false among other values
    else:
        out = series.astype(str).to_numpy(dtype=object)
    out[missing] = None
    return pd.Series(out, index=series.index, dtype=object)


# ---- the item table, aligned on a run's catalog --------------------------------------------------

class ItemTable:
    """An item table's columns aligned on a run's items: row r of every column is catalog item r.

    `present[r]` says whether the table holds item r; the columns hold missing values where not.
    """

    def __init__(self, path: str | Path, id_column: str, item_ids: np.ndarray, columns: Sequence[str],
                 extra: pd.DataFrame | None = None):
        """extra: rows of items the file lacks (a run's new items, Run.with_new_items), read after its own."""
        self.path = Path(path)
        names = table_columns(self.path)
        wanted = list(dict.fromkeys([id_column] + list(columns)))
        for name in wanted:
            if name not in names:
                listed = ", ".join(shown(c) for c in names[:40]) + (", ..." if len(names) > 40 else "")
                raise TowersError(f"{where(self.path, shown(name))}: no such column in the item table; its columns are "
                                  f"{listed}")
        table = read_table(self.path, columns=wanted, ids=[id_column])
        ids = normalise_ids(table[id_column], self.path, id_column)
        check_unique_ids(ids, self.path, id_column)
        if extra is not None and id_column in extra.columns:
            more_ids = normalise_ids(extra[id_column], "new items", id_column)
            lacking = table_rows(ids, more_ids) < 0  # each new row: not in the file
            more = extra.loc[lacking, [c for c in wanted if c in extra.columns]]
            table = pd.concat([table, more], ignore_index=True)
            ids = np.concatenate([ids.astype(object), more_ids[lacking].astype(object)]) \
                if ids.dtype != more_ids.dtype else np.concatenate([ids, more_ids[lacking]])
        rows = table_rows(ids, item_ids)
        self.present = rows >= 0
        self._frame = table
        self._rows = rows
        self._seen: dict = {}  # per column, what the filters' checks found once (a service asks many times)

    def column(self, name: str) -> pd.Series:
        """The column on the run's items (catalog order), missing where the table lacks the item."""
        values = self._frame[name].iloc[np.where(self.present, self._rows, 0)].reset_index(drop=True)
        if not self.present.all():
            values = values.astype(object) if not pd.api.types.is_float_dtype(values) else values
            values[~self.present] = None
        return values

    def allowed(self, keep: ItemFilter) -> np.ndarray:
        """Which catalog items pass every table condition of `keep` (items the table lacks never do)."""
        ok = self.present.copy()
        for name in keep.only_true:
            ok &= self._true(name)
        for name, values in keep.only_values:
            text = self._text(name)
            values = self._given(name, values)
            self._warn_unmatched(name, text, values, "only")
            ok &= text.isin(values).to_numpy()
        for name, values in keep.never_values:
            text = self._text(name)
            values = self._given(name, values)
            self._warn_unmatched(name, text, values, "never")
            ok &= ~text.isin(values).to_numpy()
        return ok

    def _given(self, name: str, values: tuple[str, ...]) -> tuple[str, ...]:
        """The filter's values as the column's are compared: in a boolean column True, TRUE, 1 ... are true."""
        if ("boolean", name) not in self._seen:  # a table serves many requests: looked at once a column
            self._seen[("boolean", name)] = _holds_booleans(self._frame[name])
        if not self._seen[("boolean", name)]:
            return values
        return tuple(TRUTH.get(v.strip().lower(), v) for v in values)

    def _warn_unmatched(self, name: str, text: pd.Series, values: tuple[str, ...], kind: str) -> None:
        """A warning naming each filter value no item of the run has (a spelling, a case, a stray space), with
        the value the column holds in another case where there is one, and what the filter then does."""
        if ("values", name) not in self._seen:
            self._seen[("values", name)] = frozenset(pd.unique(text.dropna()))
        held = self._seen[("values", name)]
        missing = [v for v in values if v not in held]
        if not missing:
            return
        by_case = {str(v).casefold().strip(): v for v in held}
        hints = [f"{v!r} (did you mean {by_case[v.casefold().strip()]!r}?)" if v.casefold().strip() in by_case
                 else repr(v) for v in missing]
        listed = sorted(held)
        sample = ", ".join(repr(v) for v in listed[:12]) + (", ..." if len(listed) > 12 else "")
        if kind == "only":
            effect = "so nothing passes this filter" if len(missing) == len(values) else "so only the other values pass"
        else:
            effect = "so the never filter removes nothing for " + ("it" if len(missing) == 1 else "them")
        warnings.warn(f"{where(self.path, shown(name))}: no item has {' or '.join(hints)}, {effect}; values present: "
                      f"{sample or 'none'} (matched as written)", stacklevel=3)

    def _true(self, name: str) -> np.ndarray:
        series = self._frame[name]
        if pd.api.types.is_bool_dtype(series):
            truth = series.to_numpy(dtype=bool)
        else:
            text = _texts(series).str.lower()
            known = text.isna() | text.isin(tuple(TRUTH))
            if not known.all():
                row = int(np.flatnonzero(~known.to_numpy())[0])
                raise TowersError(f"{where(self.path, shown(name), row + 1)}: {series.iloc[row]!r} is not true or "
                                  "false; only-true needs a boolean column (true/false or 1/0, empty for unknown)")
            truth = (text.map(TRUTH) == "true").to_numpy()
        return truth[np.where(self.present, self._rows, 0)] & self.present

    def _text(self, name: str) -> pd.Series:
        text = _texts(self._frame[name])
        return text.iloc[np.where(self.present, self._rows, 0)].reset_index(drop=True).where(self.present)


def read_id_file(path: str | Path, what: str) -> np.ndarray:
    """Ids from a file: a table (CSV, TSV, parquet) of one column, or plain text with one id per line (also
    from a pipe, such as the shell's `<(...)`)."""
    path = Path(path)
    if not path.exists() or path.is_dir():
        raise TowersError(f"{path}: no such file; give a file of {what} ids, one per line")
    if path.suffix.lower() in READABLE:
        names = table_columns(path)  # the header first: a whole feature table is refused before its cells are read
        if len(names) != 1:
            raise TowersError(f"{path}: has {len(names)} columns; a file of {what} ids holds one column "
                              "(or give plain text, one id per line)")
        table = read_table(path, ids=names)
        ids = normalise_ids(table.iloc[:, 0], path, table.columns[0])
        if _looks_like_an_id(str(names[0]), ids):
            warnings.warn(f"{path}: its header {names[0]!r} looks like one of the {what} ids, not a column name: a "
                          "file of ids without a header row loses its first id to the header; add a header row "
                          f"(such as {what}_id), or give plain text, one id per line", stacklevel=2)
        return ids
    try:
        text = path.read_text(encoding="utf-8-sig")
    except UnicodeDecodeError:
        raise TowersError(f"{path}: not UTF-8 text; give {what} ids one per line as UTF-8 text") from None
    ids = [line.strip() for line in text.splitlines()]
    return np.asarray([i for i in ids if i], dtype=object)


def _looks_like_an_id(header: str, ids: np.ndarray) -> bool:
    """Whether a one-column table's header is shaped like its ids (digits as 0: 'FF-0199' like 'FF-0475', or
    a number above numbers): then the file most likely has no header row, and the header is its first id."""
    sample = ids[:100]
    if len(sample) == 0:
        return False
    if ids.dtype.kind in "iu":
        return header.strip().lstrip("-").isdigit()
    shape = _DIGIT.sub("0", header.strip())
    return sum(_DIGIT.sub("0", str(i)) == shape for i in sample) * 2 >= len(sample)


_DIGIT = re.compile(r"[0-9]")


# ---- choosing and ranking ------------------------------------------------------------------------

@dataclass
class Lists:
    """What a run's lists need besides the scorer: the catalog, the allowed items and the item columns.

    allowed: catalog rows of the items a list may hold (None: every item). columns: name -> a pyarrow
    array on the catalog, taken per listed item.
    """

    item_ids: np.ndarray
    allowed: torch.Tensor | None
    columns: dict[str, pa.Array]

    @property
    def item_column(self) -> torch.Tensor | None:
        """Catalog item row -> column of the filtered catalog (-1 for items filtered out)."""
        if self.allowed is None:
            return None
        column = torch.full((len(self.item_ids),), -1, dtype=torch.int64)
        column[self.allowed] = torch.arange(len(self.allowed))
        return column

    def restricted(self, scorer: Scorer) -> Scorer:
        """The scorer over the allowed items only (the whole catalog without a filter)."""
        return scorer if self.allowed is None else scorer.over_items(self.allowed)

    def top(self, scorer: Scorer, n: int, ex_rows: torch.Tensor | None = None, ex_items: torch.Tensor | None = None,
            item_column: torch.Tensor | None = None, restricted: bool = False) -> tuple[torch.Tensor, torch.Tensor]:
        """Each query's n best allowed items as (catalog item rows, scores), -1 padding; exclusions are
        (ranking row, catalog item row) cells sorted by row. item_column: self.item_column, if already made;
        restricted: the scorer is self.restricted(...) already (the batch restricts once, not per block)."""
        if self.allowed is None:
            return scorer.top(n, ex_rows, ex_items)
        column = self.item_column if item_column is None else item_column
        if ex_rows is not None and len(ex_rows):
            cols = column.index_select(0, ex_items)
            kept = cols >= 0
            ex_rows, ex_items = ex_rows[kept], cols[kept]
        idx, scores = (scorer if restricted else scorer.over_items(self.allowed)).top(n, ex_rows, ex_items)
        rows = self.allowed.index_select(0, idx.clamp(min=0).reshape(-1)).reshape(idx.shape)
        return torch.where(idx >= 0, rows, -1), scores

    def frame(self, query_ids, idx: torch.Tensor, scores: torch.Tensor) -> pd.DataFrame:
        """The list table (query_id, rank, item_id, score, then the chosen item columns); padding dropped."""
        return self.table(np.asarray(query_ids), idx, scores).to_pandas()

    def table(self, query_ids: np.ndarray, idx: torch.Tensor, scores: torch.Tensor) -> pa.Table:
        q, n = idx.shape
        flat = idx.numpy().reshape(-1)
        valid = flat >= 0
        items = flat[valid]
        data = {
            "query_id": _id_array(np.repeat(query_ids, n)[valid], query_ids),
            "rank": pa.array(np.tile(np.arange(1, n + 1, dtype=np.int64), q)[valid]),
            "item_id": _id_array(self.item_ids[items], self.item_ids),
            "score": pa.array(scores.numpy().reshape(-1)[valid].astype(np.float32)),
        }
        for name, values in self.columns.items():
            data[name] = values.take(pa.array(items))
        return pa.table(data)


def _id_array(values: np.ndarray, like: np.ndarray) -> pa.Array:
    """Ids as one arrow type whatever the block holds: int64 for whole-number ids, text otherwise."""
    if like.dtype.kind in "iu":
        return pa.array(values, pa.int64())
    return pa.array(values.astype(str) if len(values) else [], pa.string())


def item_lists(item_ids: np.ndarray, keep: ItemFilter | None, columns: Sequence[str], table_path, id_column,
               default_note: str, cache: dict | None = None, extra: pd.DataFrame | None = None) -> Lists:
    """The allowed items and item columns for a run's catalog (item_ids), reading the item table only when
    `columns` or a table condition of `keep` needs it. table_path / id_column: the table to read;
    default_note: what to tell the user when no table is known. cache: a dict that keeps the last table
    read, reused while the file's size and modification time stay the same (a service lists many times).
    extra: feature rows of items added to the run (Run.with_new_items), whose columns are read from them
    where the table lacks the item."""
    keep = keep or ItemFilter()
    if not isinstance(keep, ItemFilter):
        raise TowersError(f"keep: expected an ItemFilter (ItemFilter.from_dict builds one), got {type(keep).__name__}")
    columns = list(dict.fromkeys(columns))
    needed = list(dict.fromkeys(keep.columns() + columns))
    allowed = np.ones(len(item_ids), dtype=bool)
    out: dict[str, pa.Array] = {}
    if needed:
        if table_path is None or id_column is None:
            raise TowersError(default_note)
        clash = [c for c in columns if c in LIST_COLUMNS]
        if clash:
            raise TowersError(f"column {clash[0]!r}: the lists already have a column of that name; "
                              f"choose item columns other than {', '.join(LIST_COLUMNS)}")
        table = _cached_table(cache, table_path, id_column, item_ids, needed, extra)
        lacking = int((~table.present).sum())
        if keep.columns():
            allowed &= table.allowed(keep)
            if lacking:
                warnings.warn(f"{table.path}: {lacking} of the run's {len(item_ids)} items are not in this item table; "
                              "a filter cannot be checked on them, so they are left out of the lists", stacklevel=3)
        elif lacking and columns:
            warnings.warn(f"{table.path}: {lacking} of the run's {len(item_ids)} items are not in this item table; "
                          f"their {', '.join(columns)} are empty in the lists", stacklevel=3)
        for name in columns:
            out[name] = _arrow_column(table.column(name), table.path, name)
    if keep.never_ids:
        never = given_ids(keep.never_ids)
        at = positions_in(item_ids, never)
        allowed[at[at >= 0]] = False  # ids not in the run are never listed anyway
        if (at < 0).any():
            warnings.warn(f"never: {int((at < 0).sum())} of the {len(at)} ids given are not items of this run "
                          f"(first: {plain(never[np.flatnonzero(at < 0)[0]])!r}); a user id or a mistyped one leaves "
                          "nothing out", stacklevel=3)
    rows = None if allowed.all() else torch.from_numpy(np.flatnonzero(allowed).astype(np.int64))
    return Lists(item_ids, rows, out)


def _cached_table(cache: dict | None, path, id_column: str, item_ids: np.ndarray, needed: list[str],
                  extra: pd.DataFrame | None = None) -> ItemTable:
    try:
        info = Path(path).stat()
    except OSError:
        return ItemTable(path, id_column, item_ids, needed, extra)  # read_table names the problem
    key = (str(Path(path).resolve()), info.st_mtime_ns, info.st_size, id_column, tuple(sorted(needed)))
    entry = None if cache is None else cache.get("entry")  # (key, table) as one value: threads may share the cache
    if entry is None or entry[0] != key:
        entry = (key, ItemTable(path, id_column, item_ids, needed, extra))
        if cache is not None:
            cache["entry"] = entry
    return entry[1]


def _arrow_column(values: pd.Series, path, name: str) -> pa.Array:
    try:
        return pa.array(values.to_numpy(dtype=object) if values.dtype == object else values, from_pandas=True)
    except (pa.ArrowInvalid, pa.ArrowTypeError):
        raise TowersError(f"{where(path, shown(name))}: holds values of mixed types that one output column "
                          "cannot hold; store one type in this column") from None


# ---- the nightly batch ---------------------------------------------------------------------------

def known_by_query(query: torch.Tensor, item: torch.Tensor, n_queries: int) -> tuple[torch.Tensor, torch.Tensor]:
    """Known (query row, item row) pairs grouped by query: (offsets of each query's items, items)."""
    order = torch.argsort(query, stable=True)
    counts = torch.bincount(query, minlength=n_queries)
    offsets = torch.zeros(n_queries + 1, dtype=torch.int64)
    offsets[1:] = torch.cumsum(counts, 0)
    return offsets, item.index_select(0, order)


def block_exclusions(rows: torch.Tensor, offsets: torch.Tensor, items: torch.Tensor,
                     exclude_self: bool = False) -> tuple[torch.Tensor, torch.Tensor]:
    """(ranking row, item row) cells of a block's known pairs, sorted by ranking row; with exclude_self each
    query row also excludes the item of the same row (item_item runs)."""
    starts, counts = offsets.index_select(0, rows), offsets.index_select(0, rows + 1) - offsets.index_select(0, rows)
    total = int(counts.sum())
    ranking = torch.repeat_interleave(torch.arange(len(rows)), counts)
    first = torch.repeat_interleave(torch.cumsum(counts, 0) - counts, counts)
    at = torch.repeat_interleave(starts, counts) + torch.arange(total) - first
    cells = items.index_select(0, at)
    if exclude_self:
        ranking = torch.cat([ranking, torch.arange(len(rows))])
        cells = torch.cat([cells, rows])
        order = torch.argsort(ranking, stable=True)
        ranking, cells = ranking.index_select(0, order), cells.index_select(0, order)
    return ranking, cells


def write_lists(out: str | Path, scorer: Scorer, lists: Lists, query_ids: np.ndarray, rows: torch.Tensor, top: int,
                known: tuple[torch.Tensor, torch.Tensor] | None, exclude_self: bool, progress: str = "auto",
                block: int | None = None) -> int:
    """Write the lists of the query rows `rows` to a parquet file, block by block; returns the rows written.

    scorer: the run's scorer over its whole catalog; known: known_by_query of the pairs to exclude.
    Memory holds one block's lists; the file is written atomically and owner-only (write_atomic).
    """
    import pyarrow.parquet as pq
    from tqdm import tqdm

    block = block or BATCH_USERS
    column = lists.item_column
    allowed_only = lists.restricted(scorer)  # the allowed items' vectors gathered once for every block
    schema_done: list[pa.Schema] = []
    written = [0]

    def write(path: Path) -> None:
        bar = tqdm(total=len(rows), desc="lists", unit="user", file=sys.stderr) if show_bar(progress) else None
        last = time.monotonic()
        writer = None
        try:
            for start in range(0, len(rows), block):
                part = rows[start:start + block]
                ex_r = ex_c = None
                if known is not None or exclude_self:
                    offsets, items = known if known is not None else (torch.zeros(len(query_ids) + 1, dtype=torch.int64),
                                                                      torch.zeros(0, dtype=torch.int64))
                    ex_r, ex_c = block_exclusions(part, offsets, items, exclude_self)
                idx, scores = lists.top(allowed_only.for_queries(part), top, ex_r, ex_c, column, restricted=True)
                table = lists.table(query_ids[part.numpy()], idx, scores)
                if writer is None:
                    writer = pq.ParquetWriter(path, table.schema)
                    schema_done.append(table.schema)
                writer.write_table(table.cast(schema_done[0]))
                written[0] += table.num_rows
                if bar is not None:
                    bar.update(len(part))
                elif time.monotonic() - last > 10 or start + block >= len(rows):
                    log(f"lists: {min(start + block, len(rows))} of {len(rows)} {'items' if exclude_self else 'users'}")
                    last = time.monotonic()
            if writer is None:  # no user: an empty file with the list columns
                empty = lists.table(query_ids[:0], torch.zeros((0, top), dtype=torch.int64), torch.zeros((0, top)))
                pq.write_table(empty, path)
        finally:
            if writer is not None:
                writer.close()
            if bar is not None:
                bar.close()

    write_atomic(out, write)
    return written[0]


# ---- a run's lists (Run's methods call these; `run` is a towers.runs.run.Run) ---------------------

def lists_for(run, columns: Sequence[str] = (), keep: ItemFilter | None = None, item_table=None) -> Lists:
    """The allowed items and item columns of a run: its config's item table, or `item_table` if given."""
    if isinstance(columns, str):  # one column name where a list was meant: columns="title"
        columns = [columns]
    items = run.config.items if run.config is not None else None
    path = item_table if item_table is not None else (items.path if items is not None else None)
    id_column = None
    if items is not None and items.id_column:
        id_column = items.id_column
    elif run.config is not None:
        id_column = run.config.interactions.candidate_column
    note = (f"{run.dir}: this run has no item table (config items.path), so item columns and column filters have "
            "nothing to read; name one with --item-table FILE (item_table=)")
    return item_lists(run.embeddings("item")[0], keep, columns, path, id_column, note, run.item_table_cache,
                      run.new_item_rows)


def check_top(run, top) -> None:
    if isinstance(top, bool) or not isinstance(top, (int, np.integer)) or top <= 0:
        raise TowersError(f"{run.dir}: --top must be a positive whole number, got {top}; ask for at least 1 item")


def _run_scorer(run, vectors: torch.Tensor, bias: torch.Tensor | None) -> Scorer:
    """The run's score formula for query vectors embedded outside its catalog."""
    base = run._scorer("towers")
    return Scorer(vectors, base.item_vectors, bias, base.item_bias, base.global_bias, base.scale)


def _row_ids(df: pd.DataFrame, id_column: str | None) -> pd.DataFrame:
    """Feature rows without an id column get the ids "row 1", "row 2", ... (unknown to the run: the unknown row)."""
    if id_column is None or id_column in df.columns:
        return df
    return df.assign(**{id_column: [f"row {i}" for i in range(1, len(df) + 1)]})


def recommend_rows(run, df: pd.DataFrame, top: int, history_column: str | None, columns, keep, item_table,
                   separator: str, source: str) -> pd.DataFrame:
    """Lists for users given by feature rows (and a history column); the history's items in the run left out."""
    check_top(run, top)
    if not isinstance(df, pd.DataFrame):
        raise TowersError(f"{source}: expected a table of user feature rows (a pandas DataFrame), got "
                          f"{type(df).__name__}")
    lists = lists_for(run, columns, keep, item_table)
    df = _row_ids(df.reset_index(drop=True), run.bundle.query_encoders.id_column)
    embedded = run.embed_users(df, source, history_column=history_column, separator=separator)
    cells = [np.zeros((0, 2), dtype=np.int64)]  # (row of df, item row) left out of that row's list
    if history_column is not None:  # every given item of the run is left out, as recommend_history does
        ids, at_row = history_ids(df[history_column], source, history_column, separator)
        item_ids = run.embeddings("item")[0]
        at = positions_in(item_ids, ids)
        cells.append(np.stack([at_row[at >= 0], at[at >= 0]], 1))
    if not run.item_item:  # a row naming a user of the run embeds as that user: its known items are left out too
        enc = run.bundle.query_encoders
        at = positions_in(run.embeddings(run._query_side())[0], run._embed_ids(df[enc.id_column], enc, source)[1])
        named = np.flatnonzero(at >= 0)
        if len(named):  # the known pairs of the distinct users named (recommend's excluded_cells), then per row
            users, of_row = np.unique(at[named].astype(np.int64), return_inverse=True)
            user_at, item = excluded_cells(torch.from_numpy(users), [run.known_pairs()])
            offsets, item = known_by_query(user_at, item, len(users))
            rank, item = block_exclusions(torch.from_numpy(of_row.reshape(-1).astype(np.int64)), offsets, item)
            cells.append(np.stack([named[rank.numpy()], item.numpy()], 1))
    cells = np.unique(np.concatenate(cells).astype(np.int64), axis=0)  # sorted by row, each cell once
    ex_r, ex_c = (torch.from_numpy(np.ascontiguousarray(cells[:, j])) for j in (0, 1))
    idx, scores = lists.top(_run_scorer(run, embedded.attrs["vectors"], embedded.attrs["bias"]), top, ex_r, ex_c)
    return lists.frame(embedded["id"].to_numpy(), idx, scores)


def similar_rows(run, df: pd.DataFrame, top: int, columns, keep, item_table, source: str) -> pd.DataFrame:
    """Lists of the run's items most similar to new items given by feature rows (similar's score)."""
    check_top(run, top)
    if not isinstance(df, pd.DataFrame):
        raise TowersError(f"{source}: expected a table of item feature rows (a pandas DataFrame), got "
                          f"{type(df).__name__}")
    lists = lists_for(run, columns, keep, item_table)
    i_ids, i_vec = run.embeddings("item")[:2]
    m = run.bundle.model
    if run.item_item:  # the trained pair score: the new items through the query side
        enc = run.bundle.query_encoders
        df = _row_ids(df.reset_index(drop=True), enc.id_column)
        embedded = run._embed(df, enc, m.query_tower, m.query_bias if m.use_biases else None, source)
        scorer = _run_scorer(run, embedded.attrs["vectors"], embedded.attrs["bias"])
    else:  # cosine similarity of item vectors
        df = _row_ids(df.reset_index(drop=True), run.bundle.candidate_encoders.id_column)
        embedded = run.embed_items(df, source)
        unit = torch.nn.functional.normalize(i_vec, dim=1)
        scorer = Scorer(torch.nn.functional.normalize(embedded.attrs["vectors"], dim=1), unit)
    ids = embedded["id"].to_numpy()
    at = torch.from_numpy(positions_in(i_ids, ids))
    own = torch.nonzero(at >= 0).flatten()  # an item of the run given again is not its own neighbour
    idx, scores = lists.top(scorer, top, own, at.index_select(0, own))
    return lists.frame(ids, idx, scores)


def batch_rows(run, user_ids, what: str, source: str) -> torch.Tensor:
    """Catalog rows of the users to list: every one, or those of user_ids (each once, in order); ids not in
    the run are skipped with a warning that counts them."""
    q_ids = run.embeddings(run._query_side())[0]
    if user_ids is None:
        return torch.arange(len(q_ids))
    given = given_ids(user_ids)
    at = positions_in(q_ids, given)
    if (at < 0).any():
        first = given[np.flatnonzero(at < 0)[0]]
        first = plain(first)
        found = padded_form(given[at < 0], q_ids)
        hint = "" if found is None else f"; the run's ids keep leading zeros: {found[0]!r} is {found[1]!r} there"
        warnings.warn(f"{source}: {int((at < 0).sum())} of {len(at)} {what} ids are not in this run (e.g. {first!r}); "
                      f"they get no list{hint}", stacklevel=3)
    return torch.from_numpy(pd.unique(at[at >= 0]).astype(np.int64))


def write_run_lists(run, out, user_ids, top: int, columns, keep, item_table, progress: str, source: str) -> int:
    """The nightly batch: every user's list (or those of user_ids) to a parquet file; returns the rows written."""
    check_top(run, top)
    if Path(out).suffix.lower() not in (".parquet", ".pq"):
        raise TowersError(f"{out}: lists are written as parquet; give an --out ending in .parquet or .pq")
    lists = lists_for(run, columns, keep, item_table)
    what = "query" if run.item_item else "user"
    rows = batch_rows(run, user_ids, what, source)
    q_ids = run.embeddings(run._query_side())[0]
    known = known_by_query(*run.known_pairs(), len(q_ids))  # as recommend leaves out (Run.known_pairs)
    return write_lists(out, run._scorer("towers"), lists, q_ids, rows, top, known, run.item_item, progress)
