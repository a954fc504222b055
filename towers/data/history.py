"""Each user's training items as a query-tower input: the history a user is known by.

The query tower averages embeddings of these items (a bag, like a token feature), as in Covington,
Adams & Sargin, "Deep Neural Networks for YouTube Recommendations" (RecSys 2016). The block column
holds item rows + 1, 0 padding. While training, each pair's own item is taken out of its user's bag
(`without_targets`): otherwise the model learns to find an item in the bag instead of what goes with it.
With `model.history_past_only` the bag also loses the items from the pair's time on (`before`), so
training predicts each event from what came before it, as a held-out event is predicted from the
training events before it ("predicting the next watch", Covington et al.).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import torch

from towers.data.pairs import Pairs
from towers.data.tables import align_id_types
from towers.errors import TowersError, where

HISTORY = "(history)"  # the block column; the parentheses keep it apart from any table column name


def history_column(train: Pairs, n_queries: int, n_items: int, limit: int, widest=lambda w: w,
                   with_times: bool = False):
    """(n_queries, L) int64: each query's distinct training items (row + 1), at most `limit`, 0-padded.

    With event times the latest `limit` items are kept, else those seen last in the log. L is the
    longest kept history (at least 1); widest maps it to the one every process uses (collective.largest
    when the log is divided among processes). with_times: also returns (n_queries, L) int64, the time of
    each kept item's latest event (0 in padding), for `before`.
    """
    pos = train.positives()
    q, c = pos.query.numpy().astype(np.int64), pos.candidate.numpy().astype(np.int64)
    when = pos.time.numpy() if pos.time is not None else np.arange(len(q))
    order = np.lexsort((-when, q))  # by query, latest first
    q, c = q[order], c[order]
    keys = q * n_items + c
    _, first = np.unique(keys, return_index=True)  # each (query, item) once, at its latest event
    first = np.sort(first)
    q, c = q[first], c[first]
    starts = np.searchsorted(q, q, side="left")
    place = np.arange(len(q)) - starts
    keep = place < limit
    width = widest(max(1, int(place[keep].max(initial=-1)) + 1))
    out = torch.zeros(n_queries, width, dtype=torch.int64)
    rows, places = torch.from_numpy(q[keep]), torch.from_numpy(place[keep])
    out[rows, places] = torch.from_numpy(c[keep] + 1)
    if not with_times:
        return out
    times = torch.zeros(n_queries, width, dtype=torch.int64)
    times[rows, places] = torch.from_numpy(when[order[first[keep]]].astype(np.int64))  # gathered once, not the log reordered
    return out, times


def before(bags: torch.Tensor, bag_times: torch.Tensor, times: torch.Tensor) -> torch.Tensor:
    """The bags with every item whose latest event is at or after its row's time taken out (set to padding)."""
    return bags.masked_fill(bag_times >= times.unsqueeze(1), 0)


def without_targets(bags: torch.Tensor, items: torch.Tensor) -> torch.Tensor:
    """The bags with each row's own item (a catalog row) taken out (set to padding)."""
    return bags.masked_fill(bags == (items + 1).unsqueeze(1), 0)


def empty_history(n: int) -> torch.Tensor:
    """Bags for n queries with no known items (new users embedded from features alone)."""
    return torch.zeros(n, 1, dtype=torch.int64)


def history_ids(series: pd.Series, path, column: str, separator: str = "|") -> tuple[np.ndarray, np.ndarray]:
    """A column of item-id histories as (flat ids, row of each id), in the order given within each row.

    A cell is a list of ids (a parquet list column), text of ids joined by `separator` (spaces around
    an id are dropped), one id (a number or text) or missing (an empty history). Flat ids are int64
    when the column holds whole numbers, else text.
    """
    values = series.to_numpy(dtype=object)
    try:
        arr = pa.array(values, from_pandas=True)
    except (pa.ArrowInvalid, pa.ArrowTypeError):
        raise TowersError(f"{where(path, column)}: mixes id lists, text and numbers from row to row; store every "
                          f"history the same way, as a list of item ids or as text like '12{separator}40{separator}7'"
                          ) from None
    if pa.types.is_null(arr.type):
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    if pa.types.is_string(arr.type) or pa.types.is_large_string(arr.type):
        arr = pc.split_pattern(arr, pattern=separator)
        arr = pa.ListArray.from_arrays(arr.offsets, pc.utf8_trim_whitespace(arr.flatten()), mask=arr.is_null())
    elif not (pa.types.is_list(arr.type) or pa.types.is_large_list(arr.type)):
        arr = pa.ListArray.from_arrays(pa.array(np.arange(len(arr) + 1, dtype=np.int32)), arr)  # one id per cell
    lengths = np.asarray(pc.list_value_length(arr).fill_null(0), dtype=np.int64)
    rows = np.repeat(np.arange(len(values), dtype=np.int64), lengths)
    flat = arr.flatten()
    if pa.types.is_null(flat.type):  # only empty lists and missing cells
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    if pa.types.is_integer(flat.type):
        ids = np.asarray(flat.cast(pa.int64()).fill_null(np.iinfo(np.int64).min).to_numpy(), dtype=np.int64)
        keep = np.asarray(flat.is_valid(), dtype=bool)
    elif pa.types.is_string(flat.type) or pa.types.is_large_string(flat.type):
        ids = np.asarray(flat.to_numpy(zero_copy_only=False), dtype=object)
        keep = np.asarray(flat.is_valid(), dtype=bool) & (ids != "")
    elif pa.types.is_floating(flat.type):  # whole numbers read as floats (a CSV column with empty cells)
        nums = np.asarray(flat.fill_null(np.nan).to_numpy(zero_copy_only=False), dtype=np.float64)
        keep = ~np.isnan(nums)
        bad = keep & ((nums != np.round(nums)) | (np.abs(nums) >= 2.0 ** 63))
        if bad.any():
            raise TowersError(f"{where(path, column, int(rows[np.flatnonzero(bad)[0]]) + 1)}: item id "
                              f"{float(nums[bad][0])!r} is not a whole number; item ids are whole numbers or text")
        ids = np.where(keep, nums, 0).astype(np.int64)
    else:
        first = int(rows[0]) + 1 if len(rows) else 1
        raise TowersError(f"{where(path, column, first)}: holds {flat.type} values, not item ids; store each history "
                          f"as a list of item ids or as text like '12{separator}40{separator}7'")
    return ids[keep], rows[keep]


def history_bags(ids: np.ndarray, rows: np.ndarray, n_rows: int, item_ids: np.ndarray, trained: torch.Tensor,
                 limit: int) -> tuple[torch.Tensor, dict]:
    """Bags (n_rows, L) of item rows + 1 (0 pads) from flat ids in the order given (the last is the latest).

    Ids not among `item_ids` (the run's item catalog) are left out, and so are items whose row is not
    `trained` (no training history held them, so their rows in the history table never learned). Each
    item counts once, at its latest place, and the latest `limit` items are kept: the bag a user with
    this history would have had in training. Returns the bags and the counts of ids left out
    ({"unknown": ..., "untrained": ...}, and "first_unknown": the first id not in the run, if any).
    """
    looked = align_id_types(ids, item_ids) if len(ids) else ids
    at = pd.Index(item_ids).get_indexer(looked) if len(ids) else np.zeros(0, np.int64)
    known = at >= 0
    learned = np.zeros(len(at), dtype=bool)
    learned[known] = trained.numpy()[at[known]]
    counts = {"unknown": int((~known).sum()), "untrained": int((known & ~learned).sum())}
    if counts["unknown"]:  # one to show: a mistyped id, or several joined by another separator
        counts["first_unknown"] = ids[np.flatnonzero(~known)[0]]
    r, c = rows[learned], at[learned].astype(np.int64)
    order = np.lexsort((-np.arange(len(r)), r))  # by row, latest (last given) first
    r, c = r[order], c[order]
    _, first = np.unique(r * max(1, len(item_ids)) + c, return_index=True)  # each item once, at its latest place
    first = np.sort(first)
    r, c = r[first], c[first]
    place = np.arange(len(r)) - np.searchsorted(r, r, side="left")
    keep = place < limit
    width = max(1, int(place[keep].max(initial=-1)) + 1)
    out = torch.zeros(n_rows, width, dtype=torch.int64)
    out[torch.from_numpy(r[keep]), torch.from_numpy(place[keep])] = torch.from_numpy(c[keep] + 1)
    return out, counts


def trained_items(bags: torch.Tensor, n_items: int) -> torch.Tensor:
    """(n_items,) bool: the items some training bag holds (their history-table rows were trained)."""
    seen = torch.zeros(n_items + 1, dtype=torch.bool)
    seen[bags.flatten()] = True
    return seen[1:]
