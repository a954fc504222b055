"""The log divided among data-parallel processes: each keeps the events of its own share of the users.

A user belongs to process hash(user id) mod N (pandas' hash_array: the same on every machine), so
all of a user's events sit in one process. That keeps every per-user step local and exact: the
per-user splits, the known pairs excluded from a user's ranking, the history a query tower pools
and the history rows of EASE and item-kNN.

Reading is divided too. The log's units (a parquet row group, a CSV piece of a million rows, which
pandas parses in every process but only one keeps) are dealt out in turn: process r reads units r,
r + N, ... and checks their rows, so an error names the file's row. The processes then agree on one
numbering of the distinct ids (`merged_ids`: every process's ids with the place of their first row,
gathered once, ordered as one pass over the log would meet them) and send each row to its user's
process (collective.Exchange), where the rows are put back in the log's order. So every process
holds the very catalogs, numbering and rows, in order, that one process reading the whole log and
keeping its users' rows would. What needs every user's events is summed over processes where it is
made (collective.summed): which entities have training events, the item counts, EASE's and
item-kNN's co-occurrence counts, the query histories.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
import torch

from towers.collective import gather_objects, rank_and_size
from towers.config import Config


@dataclass(frozen=True)
class Shard:
    """Process `rank` of `world` keeps the rows of the users whose id hashes to rank mod world."""

    rank: int
    world: int

    def turns(self) -> "Turns":
        """What deals the log's units out: unit i to process i mod world."""
        return Turns(self.rank, self.world)

    def own_rows(self, ids: np.ndarray) -> torch.Tensor:
        """The catalog rows of the ids this process owns (`owners`): the users whose events it holds."""
        return torch.from_numpy(np.flatnonzero(owners(ids, self.world) == self.rank))


class Turns:
    """Called once per unit of the log, in order (tables.read_table_chunks' `take`): whether it is this
    process's; `unit` is the number of the last unit taken, so each row read can carry it."""

    def __init__(self, rank: int, world: int):
        self.rank, self.world = rank, world
        self.seen, self.unit = 0, -1

    def __call__(self) -> bool:
        i, self.seen = self.seen, self.seen + 1
        if i % self.world == self.rank:
            self.unit = i
            return True
        return False


def merged_ids(codes: np.ndarray, uniques: np.ndarray, unit: np.ndarray) -> np.ndarray:
    """Every process's distinct ids in the order one pass over the whole log meets them.

    codes / uniques: this process's id column (ids == uniques[codes], codes numbered in order of first
    appearance, as IdPieces numbers them); unit: each row's unit (non-decreasing, a unit's rows together).
    An id's place is the unit and the row within it of its first row; the earliest place of each id wins.
    """
    seen = np.maximum.accumulate(codes) if len(codes) else codes
    first = np.flatnonzero(np.diff(seen, prepend=-1) > 0)  # the row where each code appears first
    offset = first - np.searchsorted(unit, unit[first], side="left")
    place = (unit[first].astype(np.int64) << 32) | offset
    parts = gather_objects((uniques, place))
    if any(u.dtype == object for u, _ in parts) and any(u.dtype != object for u, _ in parts):
        parts = [(u.astype(str).astype(object), k) for u, k in parts]  # numbers beside text: all as text
    ids = np.concatenate([u for u, _ in parts])
    order = np.argsort(np.concatenate([k for _, k in parts]), kind="stable")
    merged = pd.unique(ids[order])
    return np.asarray(merged, dtype=object if ids.dtype == object else np.int64)


def owners(ids: np.ndarray, world: int) -> np.ndarray:
    """The process each id belongs to. Whole numbers hash as numbers and text as text: a log that stores
    one user as 17 in one file and "17" in another would give that user's events to two processes."""
    values = ids if ids.dtype == object else ids.astype(np.int64, copy=False)
    return (pd.util.hash_array(values, categorize=False) % np.uint64(world)).astype(np.int64)


def whole_log_reason(cfg: Config) -> str | None:
    """Why this run's log cannot be divided by user (every process then reads it whole), or None."""
    ic, ev = cfg.interactions, cfg.evaluation
    if not cfg.run.divide_log:
        return "run.divide_log is false"
    if cfg.item_item:
        return "item_item runs pair items with items, not users"
    if ic.pairs_from != "rows" or ic.count_repeats:
        return "pairs derived from orders or sessions, or counted repeats, are made from the whole log"
    if ic.context:
        return "context columns are encoded with vocabularies fitted on every training event"
    if ev.baseline and (ev.baseline_solver != "gradient" or cfg.training.rating_loss):
        return ("the linear factor model's ALS solves and its certificate read every event "
                "(evaluation.baseline_solver: gradient and an implicit loss can be divided)")
    if ev.bilinear:
        return "the bilinear reference reads every event"
    return None


def log_shard(cfg: Config) -> Shard | None:
    """This process's shard when several processes train and the log can be divided, else None."""
    rank, world = rank_and_size()
    if world == 1 or whole_log_reason(cfg) is not None:
        return None
    return Shard(rank, world)
