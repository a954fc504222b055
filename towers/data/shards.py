"""The log divided among data-parallel processes: each keeps the events of its own share of the users.

A user belongs to process hash(user id) mod N (pandas' hash_array: the same on every machine), so
all of a user's events sit in one process. That keeps every per-user step local and exact: the
per-user splits, the known pairs excluded from a user's ranking, the history a query tower pools
and the history rows of EASE and item-kNN. Every process still reads every file (only the columns
the config names, a piece at a time) and numbers every distinct id it sees, users and items alike,
so every process builds the very catalogs and id numbering one process builds without any exchange;
it keeps only its own users' rows. What needs every user's events is summed over processes where it
is made (collective.summed): which entities have training events, the item counts, EASE's and
item-kNN's co-occurrence counts, the query histories.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from towers.collective import rank_and_size
from towers.config import Config


@dataclass(frozen=True)
class Shard:
    """Process `rank` of `world` keeps the rows of the users whose id hashes to rank mod world."""

    rank: int
    world: int

    def mine(self, codes: np.ndarray, uniques: np.ndarray) -> np.ndarray:
        """bool mask over a piece's rows (ids == uniques[codes]): the rows of this process's users."""
        return (owners(uniques, self.world) == self.rank)[codes]

    def quota(self, total: int) -> int:
        """This process's part of a count divided as evenly as possible (sampled queries, say)."""
        return total // self.world + (self.rank < total % self.world)


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
