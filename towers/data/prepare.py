"""From config to tensors: read the log and feature tables, split, fit encoders, encode.

Everything here runs before any training starts, so a bad input costs seconds, not an hour.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
import torch

from towers.collective import Exchange, across, largest, rank_and_size
from towers.config import Config
from towers.data.baskets import collapse_repeats, derive_pairs
from towers.data.context import ContextEncoders
from towers.data.embeddings_file import TrueVectors, true_vectors
from towers.data.encoders import make_encoder
from towers.data.features import FeatureBlock, SideEncoders, SideTable, take
from towers.data.history import HISTORY, history_column
from towers.data.pairs import Pairs, SplitPairs
from towers.data.shards import Shard, log_shard, merged_ids, owners, whole_log_reason
from towers.data.spill import Column, Spill
from towers.data.splits import HoldOut, Split, TrainedBefore, make_split
from towers.data.tables import (
    IdPieces,
    numeric_column,
    positions_in,
    read_table_chunks,
    release_read_buffers,
    table_files,
    time_column,
)
from towers.data.vocabulary import extend_context, extend_side
from towers.errors import TowersError, rows_after, where
from towers.memory import index_dtype


@dataclass
class Side:
    """One side's catalog: ids, encoders and the encoded feature block of every entity."""

    ids: np.ndarray
    encoders: SideEncoders
    block: FeatureBlock
    has_features: bool
    unknown_counts: dict = field(default_factory=dict)


@dataclass
class Prepared:
    """All tensors a run needs: both sides, the split pairs and the cold items."""

    queries: Side
    candidates: Side
    train: Pairs
    valid: Pairs
    test: Pairs
    cold_test: Pairs
    cold_items: torch.Tensor  # bool (n_candidates,)
    cold_user_test: Pairs  # pairs of the users held out whole
    cold_users: torch.Tensor  # bool (n_queries,)
    warm_items: torch.Tensor  # bool (n_candidates,): candidates with training pairs
    item_item: bool
    notes: list[str]
    oracle: TrueVectors | None = None  # the planted truth, when the config names oracle files
    context: ContextEncoders | None = None  # encoders of interactions.context, fitted on training events
    started_from: dict | None = None  # warm start: ids and values added to the earlier run's encoders
    # ranking problems of validation, kept between epochs (evaluation/protocol.ranking_metrics' cache)
    rankings: dict = field(default_factory=dict)
    divided: bool = False  # data-parallel with the log divided by user (shards.py): the pairs are this process's
    # divided: the query rows of this process's users, the only ones it validates and evaluates (Shard.own_rows)
    own_queries: torch.Tensor | None = None
    # model.history_past_only: (n_queries, L) int64, when each history item was last chosen (history.before)
    history_times: torch.Tensor | None = None

    @property
    def split(self) -> SplitPairs:
        return SplitPairs(self.train, self.valid, self.test, self.cold_test, self.warm_items, self.cold_items,
                          self.item_item, self.cold_user_test, self.cold_users)


@dataclass
class IdColumn:
    """A log's id column as codes into its distinct ids (ids == uniques[codes]): memory-light for text ids."""

    codes: np.ndarray  # int32, one per row (IdPieces refuses more than 2**31 distinct ids)
    uniques: np.ndarray  # int64 or str objects, in order of first appearance

    def values(self) -> np.ndarray:
        return self.uniques[self.codes]


@dataclass
class Log:
    """The interaction log's columns, validated: ids, optional target / weight / time / group, context frame."""

    query_ids: IdColumn
    candidate_ids: IdColumn
    target: np.ndarray | None
    weight: np.ndarray | None
    time: np.ndarray | None
    context: pd.DataFrame | None
    group: np.ndarray | None = None  # int64 codes of the group column, one per row
    side: np.ndarray | None = None  # int8 side per row, when baskets were placed before their pairs were derived
    # a divided log under a time split: each row's place in the whole log (its unit << 32 | row within it)
    position: np.ndarray | None = None
    notes: list[str] = field(default_factory=list)  # what deriving or collapsing the rows did

    @property
    def query(self) -> np.ndarray:
        """The query ids, one per row."""
        return self.query_ids.values()

    @property
    def candidate(self) -> np.ndarray:
        """The candidate ids, one per row."""
        return self.candidate_ids.values()


def read_interactions(cfg: Config, split: bool = False, spill: Spill | None = None, shard: Shard | None = None) -> Log:
    """The log's id arrays, optional target / weight / time / group arrays and context columns, validated.

    With interactions.pairs_from baskets or sessions the rows are the derived item pairs (data/baskets.py);
    split: place whole baskets on the sides first (each row then carries its side), else all on training.
    With count_repeats each distinct (query, candidate) is one row weighted by its count. spill: where
    the columns of a log read from files go (data/spill.py; default in memory). shard: read this process's
    share of the log and keep the rows of its users, in the log's order (data/shards.py); the rows it
    reads are checked as they are read, so errors name the file's row.
    """
    spill = spill or Spill()
    ic = cfg.interactions
    path = ic.path
    if ic.pairs_from != "rows":
        d = derive_pairs(cfg, split)
        return Log(IdColumn(d.query, d.ids), IdColumn(d.candidate, d.ids), None, d.weight, None, None,
                   side=d.side if split else None, notes=d.notes)
    if ic.count_repeats:
        r = collapse_repeats(cfg)
        return Log(IdColumn(r.query, r.query_ids), IdColumn(r.candidate, r.candidate_ids), None, r.weight, r.time, None,
                   group=r.group, notes=r.notes)
    optional = [ic.target_column, ic.weight_column, ic.time_column, ic.group_column]
    cols = [ic.query_column, ic.candidate_column] + [c for c in optional if c]
    context_cols = [f.name for f in ic.context]
    wanted = list(dict.fromkeys(cols + context_cols))
    q, c, groups = IdPieces(spill), IdPieces(spill), GroupPieces(spill)
    columns = {name: Column(spill, dtype) for name, column, dtype in (
        ("target", ic.target_column, np.float64), ("weight", ic.weight_column, np.float64),
        ("time", ic.time_column, np.int64)) if column}
    contexts: list[pd.DataFrame] = []
    turns = None if shard is None else shard.turns()
    units = None if shard is None else Column(spill, np.int32)  # the unit each row was read in
    for file in table_files(path):
        for start, df in read_table_chunks(file, wanted, LOG_PIECE_ROWS, take=turns,
                                           ids=[c for c in (ic.query_column, ic.candidate_column) if c]):
            with rows_after(start):
                q.add(df[ic.query_column], file, ic.query_column)
                c.add(df[ic.candidate_column], file, ic.candidate_column)
                if ic.target_column:
                    columns["target"].add(_targets(df[ic.target_column], file, ic.target_column, cfg))
                if ic.weight_column:
                    columns["weight"].add(_weights(df[ic.weight_column], file, ic.weight_column))
                if ic.time_column:
                    columns["time"].add(time_column(df[ic.time_column], file, ic.time_column))
                if ic.group_column:
                    groups.add(df[ic.group_column], file, ic.group_column)
                if units is not None:
                    units.add(np.full(len(df), turns.unit, np.int32))
                if context_cols:
                    piece = df[context_cols].reset_index(drop=True)
                    for spec in ic.context:  # every value checked in file order, so an error names the log's row
                        make_encoder(spec).validate(piece[spec.name], file)
                    contexts.append(piece)
    release_read_buffers()
    joined = {name: columns[name].finish() if name in columns else None for name in ("target", "weight", "time")}
    context = pd.concat(contexts, ignore_index=True) if contexts else None
    group_codes, group_values = groups.finish() if ic.group_column else (None, None)
    log = Log(IdColumn(*q.finish()), IdColumn(*c.finish()), joined["target"], joined["weight"], joined["time"],
              context, group_codes)
    if shard is None:
        return log
    return _to_owners(log, group_values, units.finish(), shard, spill,
                      with_positions=cfg.evaluation.split == "time" and log.time is not None and not ic.group_column)


def _to_owners(log: Log, group_values: np.ndarray | None, unit: np.ndarray, shard: Shard, spill: Spill,
               with_positions: bool = False) -> Log:
    """This process's share of the log (its units) as its users' rows of the whole log, in the log's order.

    The ids are numbered alike in every process (shards.merged_ids), each row goes to its user's process
    (collective.Exchange), and the rows arrive grouped by the process that read them; sorting them by
    unit puts them back in the log's order (a unit's rows come from one process, in order).
    with_positions: the rows also carry their place in the whole log (Log.position), which a time split
    over every process's rows needs to break ties between rows of one time as one process would (with a group
    column the groups' codes break them instead).
    """
    def numbered(codes, uniques):
        ids = merged_ids(codes, uniques, unit)
        return spill.lookup(positions_in(ids, uniques).astype(np.int32), codes), ids

    q_codes, q_ids = numbered(log.query_ids.codes, log.query_ids.uniques)
    log.query_ids = None
    c_codes, c_ids = numbered(log.candidate_ids.codes, log.candidate_ids.uniques)
    log.candidate_ids = None
    g_codes = None if log.group is None else numbered(log.group, group_values)[0]
    columns = {"query": q_codes, "candidate": c_codes, "target": log.target, "weight": log.weight, "time": log.time,
               "group": g_codes, "position": None}
    if with_positions:  # the unit, then the row within it: increasing along the whole log
        position = unit.astype(np.int64)
        position <<= 32
        position += np.arange(len(unit), dtype=np.int64)  # the row's number, less its unit's first row's below
        position -= np.searchsorted(unit, unit, side="left")
        columns["position"] = position  # 8 bytes a row, built in place
        del position
    log = q_codes = c_codes = g_codes = None  # each column is freed once it is sent
    exchange = Exchange(spill.lookup(owners(q_ids, shard.world).astype(np.int16), columns["query"]))  # int16: a radix sort
    arrived = exchange(unit)
    back = np.argsort(arrived, kind="stable").astype(index_dtype(len(arrived)))
    arrived = None
    for name in columns:
        values, columns[name] = columns[name], None
        if values is not None:
            here = exchange(values)[back]
            columns[name] = spill.copy(here) if spill.on_disk else here
            del values, here
    return Log(IdColumn(columns["query"], q_ids), IdColumn(columns["candidate"], c_ids), columns["target"],
               columns["weight"], columns["time"], None, columns["group"], position=columns["position"])


LOG_PIECE_ROWS = 1_000_000  # rows of the log read at a time: a piece is tens of MB, not the whole log


def _targets(series: pd.Series, path, column: str, cfg: Config) -> np.ndarray:
    """The target column; in [0, 1] unless the loss fits ratings."""
    target = numeric_column(series, path, column, allow_missing=False)
    if not cfg.training.rating_loss:
        out = (target < 0) | (target > 1)
        if out.any():
            row = int(np.flatnonzero(out)[0])
            raise TowersError(f"{where(path, column, row + 1)}: {cfg.training.loss} targets must lie in [0, 1], got "
                              f"{float(target[row])!r}; use loss: squared for ratings, or move counts to weight_column")
    return target


def _weights(series: pd.Series, path, column: str) -> np.ndarray:
    weight = numeric_column(series, path, column, allow_missing=False)
    neg = weight < 0
    if neg.any():
        row = int(np.flatnonzero(neg)[0])
        raise TowersError(f"{where(path, column, row + 1)}: negative weight {float(weight[row])!r}; weights must be >= 0")
    return weight


class GroupPieces(IdPieces):
    """The group column read in pieces: equal values get equal codes across pieces (IdPieces' merge), and
    any value may be a group, but none may be missing."""

    def factorize(self, series: pd.Series, path, column) -> tuple[np.ndarray, np.ndarray]:
        codes, uniques = pd.factorize(series)
        missing = codes < 0
        if missing.any():
            row = int(np.flatnonzero(missing)[0])
            raise TowersError(f"{where(path, column, row + 1)}: missing group value; every row needs one (fill it, e.g. "
                              "with the row's own order or session id)")
        return codes, np.asarray(uniques, dtype=object)


def _as_pairs(qr, cr, target, weight, when, spill: Spill) -> Pairs:
    """The columns as a Pairs' tensors, converted a chunk at a time into spill arrays."""
    def convert(a, dtype):
        return None if a is None else torch.from_numpy(a if a.dtype == dtype else spill.copy(a, dtype))
    return Pairs(convert(qr, np.int64), convert(cr, np.int64), convert(target, np.float32), convert(weight, np.float32),
                 convert(when, np.int64))


def _train_entities(ids: np.ndarray, rows: np.ndarray, everywhere) -> np.ndarray:
    """The catalog ids that have rows among `rows` in any process, in catalog order (a bincount: linear, not a sort)."""
    return ids[np.flatnonzero(everywhere(np.bincount(rows, minlength=len(ids)) > 0))]


def _joint_ids(a: IdColumn, b: IdColumn, spill: Spill) -> IdColumn:
    """Both columns one after another as one IdColumn (item_item mode), distinct ids in order of first appearance."""
    ua, ub = a.uniques, b.uniques
    if ua.dtype != ub.dtype:  # an integer column and a text column: compare as text
        ua, ub = ua.astype(str).astype(object), ub.astype(str).astype(object)
    inverse, uniques = pd.factorize(np.concatenate([ua, ub]))
    inverse = inverse.astype(np.int32)
    codes = spill.empty(len(a.codes) + len(b.codes), np.int32)
    spill.lookup(inverse[:len(ua)], a.codes, out=codes[:len(a.codes)])
    spill.lookup(inverse[len(ua):], b.codes, out=codes[len(a.codes):])
    return IdColumn(codes, np.asarray(uniques, dtype=ua.dtype))


def _catalog_rows(ids: IdColumn, catalog_ids: np.ndarray, spill: Spill) -> np.ndarray:
    """Each row's position in the catalog (-1 where absent), matched once per distinct id; int32, so a long
    log costs 4 bytes a row here, not 8."""
    return spill.lookup(positions_in(catalog_ids, ids.uniques).astype(np.int32), ids.codes)


def prepare(cfg: Config, previous=None, trained_before: TrainedBefore | None = None) -> Prepared:
    """Read, validate, split and encode everything the config names.

    previous: an earlier run's LoadedBundle to warm-start from; its encoders are extended, never
    renumbered (warm_start.py), and `started_from` records what was added. trained_before: that run's
    training pairs, which stay in training here (splits.make_split).
    """
    ic = cfg.interactions
    item_item = cfg.item_item
    spill = Spill(cfg.run.spill_folder)
    shard = log_shard(cfg)
    everywhere = across(shard is not None)  # a process's own part summed with the others' (divided log)
    # the feature tables first: a bad one fails at once, not after a long export's pairs are counted
    item_side = SideTable(cfg.items.path, cfg.items.id_column, cfg.items.features, cfg.items.missing_rows,
                          "items")
    user_side = None if item_item else SideTable(cfg.users.path, cfg.users.id_column, cfg.users.features,
                                                 cfg.users.missing_rows, "users")
    log = read_interactions(cfg, split=True, spill=spill, shard=shard)
    q_log, c_log, target, weight, when = log.query_ids, log.candidate_ids, log.target, log.weight, log.time
    notes: list[str] = list(log.notes)
    if shard is None and rank_and_size()[1] > 1:
        notes.append(f"every process reads the whole log: {whole_log_reason(cfg)}")
    # rows derived from an export (baskets, sessions, count_repeats), a process's share of a divided log and the
    # rows of a folder's files one after another are not one file's rows: errors there name the id and column
    file_rows = ic.pairs_from == "rows" and not ic.count_repeats and shard is None and not Path(ic.path).is_dir()

    notes += _constant_notes("items", item_side)
    # ids are matched once per distinct id and mapped to rows through the codes (see IdColumn)
    if item_item:
        both = _joint_ids(q_log, c_log, spill)
        c_ids, c_table, keep_both = item_side.catalog(both.uniques, ic.path,
                                                      (ic.query_column or ic.candidate_column, ic.candidate_column),
                                                      codes=both.codes, file_rows=file_rows)
        n = len(q_log.codes)
        keep = keep_both[:n] & keep_both[n:]
        q_ids, q_table = c_ids, c_table
        rows_both = _catalog_rows(both, c_ids, spill)
        q_rows, c_rows = spill.where(rows_both[:n], keep), spill.where(rows_both[n:], keep)
        both = rows_both = None
    else:
        notes += _constant_notes("users", user_side)
        q_ids, q_table, keep_q = user_side.catalog(q_log.uniques, ic.path, ic.query_column, codes=q_log.codes,
                                                   file_rows=file_rows)
        c_ids, c_table, keep_c = item_side.catalog(c_log.uniques, ic.path, ic.candidate_column, codes=c_log.codes,
                                                   file_rows=file_rows)
        keep = keep_q & keep_c
        q_rows = spill.where(_catalog_rows(q_log, q_ids, spill), keep)
        c_rows = spill.where(_catalog_rows(c_log, c_ids, spill), keep)
    q_log = c_log = log.query_ids = log.candidate_ids = None  # the codes are rows now: free them
    dropped = everywhere(int((~keep).sum()))
    if dropped:
        unit = "interaction rows" if ic.pairs_from == "rows" and not ic.count_repeats else "pairs"  # derived: pairs
        notes.append(f"dropped {dropped:,} {unit} whose ids have no feature row (missing_rows: drop)")
    sel = lambda a: None if a is None else spill.where(a, keep)  # noqa: E731
    pairs = _as_pairs(q_rows, c_rows, sel(target), sel(weight), sel(when), spill)
    q_rows = c_rows = target = weight = when = log.target = log.weight = log.time = None  # held by `pairs` now
    groups = sel(log.group)
    if everywhere(len(pairs)) == 0:
        raise TowersError(f"{ic.path}: no interaction rows are left after matching ids to the feature tables; "
                          f"check the id columns")

    has_item_features = bool(cfg.items.features)
    item_has_row = np.ones(len(c_ids), bool)
    if item_side.has_table:
        item_has_row = pd.Index(item_side.ids).get_indexer(c_ids) >= 0
    cold_items = cold_users = None
    if has_item_features:
        cold_items = HoldOut(item_has_row, None if previous is None else _learned(c_ids, previous.candidate_encoders))
    if not item_item and cfg.users.features:
        user_has_row = np.ones(len(q_ids), bool)
        if user_side.has_table:
            user_has_row = pd.Index(user_side.ids).get_indexer(q_ids) >= 0
        cold_users = HoldOut(user_has_row, None if previous is None else _learned(q_ids, previous.query_encoders))
    fixed = None
    if trained_before is not None:
        fixed = trained_before.mask(q_ids, c_ids, pairs.query.numpy(), pairs.candidate.numpy(), unordered=item_item)
        kept, total = everywhere(int(fixed.sum())), everywhere(len(fixed))
        notes.append(f"warm start: {kept:,} pairs the earlier run trained on stay in training; the held-out pairs "
                     f"come from the other {total - kept:,}")
    split: Split = make_split(pairs, len(c_ids), cfg.evaluation, cfg.run.seed, cold_eligible=cold_items,
                              item_item=item_item, groups=groups, n_queries=len(q_ids), cold_user_eligible=cold_users,
                              sides=sel(log.side), everywhere=everywhere, trained_before=fixed,
                              order_keys=groups if shard is not None and groups is not None else sel(log.position))
    warm_free = everywhere(len(split.train) + len(split.valid) + len(split.test)) - kept if fixed is not None else 0
    if fixed is not None and cfg.evaluation.split != "user_last" and cfg.evaluation.test_fraction > 0 and warm_free:
        held = everywhere(len(split.test)) / warm_free  # of the warm pairs the split could place (user_last: per user)
        if held < 0.5 * cfg.evaluation.test_fraction:  # units holding a learned pair stayed in training whole
            notes.append(f"warm start: only {held:.1%} of the other pairs are test pairs (test_fraction "
                         f"{cfg.evaluation.test_fraction:g}): a unit (a group, a user's few events) holding a pair "
                         "the earlier run trained on stays in training whole, so the test slice is small and its "
                         "metrics noisy; compare on a later log with `towers evaluate --interactions` instead")
    fixed = log.position = None
    zeros = _target_zeros(pairs.target, everywhere) if cfg.training.loss == "softmax" else 0
    if zeros:
        notes.append(f"warning: {zeros:,} rows have target 0: the softmax "
                     "learns from each row's own item against the others, so a 0 row teaches nothing; where 0 means "
                     "shown but not chosen, set training.loss: logistic, which learns from it")
    if everywhere(len(split.train)) == 0:
        raise TowersError(f"{ic.path}: the split leaves no training pairs; lower evaluation fractions or add data")
    context_encoders = None
    if log.context is not None:
        frame = log.context.iloc[np.flatnonzero(keep)].reset_index(drop=True)
        context_encoders = ContextEncoders.fit(frame, ic.context, np.asarray(split.train), ic.path)
        pairs.context = context_encoders.encode(frame, ic.path)
    slices = [split.train, split.valid, split.test, split.cold_test, split.cold_user_test]
    train, valid, test, cold_test, cold_user_test = pairs.divide(slices, spill)
    pairs = groups = None

    tq, tc = train.query.numpy(), train.candidate.numpy()
    if item_item:
        c_train_ids = _train_entities(c_ids, np.concatenate([tq, tc]), everywhere)
        c_enc = SideEncoders.fit(c_table, cfg.items.path, cfg.items.id_column, cfg.items.features, c_train_ids)
        q_enc = c_enc
    else:
        q_enc = SideEncoders.fit(q_table, cfg.users.path, cfg.users.id_column, cfg.users.features,
                                 _train_entities(q_ids, tq, everywhere))
        c_enc = SideEncoders.fit(c_table, cfg.items.path, cfg.items.id_column, cfg.items.features,
                                 _train_entities(c_ids, tc, everywhere))
    started_from = None
    if previous is not None:
        started_from = {}
        c_enc, started_from["items"] = extend_side(c_enc, previous.candidate_encoders, "item")
        if item_item:
            q_enc = c_enc
        else:
            q_enc, started_from["users"] = extend_side(q_enc, previous.query_encoders, "user")
        context_encoders, started_from["context"] = extend_context(context_encoders, previous.extra.get("context"))
        if context_encoders is not None:  # the context encoded again with the extended encoders
            encoded = context_encoders.encode(frame, ic.path)
            for part, rows in zip((train, valid, test, cold_test, cold_user_test), slices):
                part.context = take(encoded, torch.as_tensor(rows, dtype=torch.int64))
    c_block = c_enc.encode(c_ids, c_table, cfg.items.path)
    c_side = Side(c_ids, c_enc, c_block, has_item_features)
    history_times = None
    if item_item:
        q_side = c_side
    else:
        q_block = q_enc.encode(q_ids, q_table, cfg.users.path)
        if cfg.model.history_length:  # a user's history lies in one process: the others' rows are zeros
            bags = history_column(train, len(q_ids), len(c_ids), cfg.model.history_length,
                                  widest=largest if shard else lambda w: w, with_times=cfg.model.history_past_only)
            if cfg.model.history_past_only:
                bags, history_times = bags[0], everywhere(bags[1])
            q_block[HISTORY] = everywhere(bags)
        q_side = Side(q_ids, q_enc, q_block, bool(cfg.users.features))

    warm = torch.zeros(len(c_ids), dtype=torch.bool)
    warm[train.candidate] = True
    if item_item:
        warm[train.query] = True
    warm = everywhere(warm)
    _warn_small_data(cfg, len(q_ids), len(c_ids), notes)
    if cfg.model.history_length and cfg.model.history_past_only and cfg.evaluation.split in ("random", "user_share"):
        # measured by a robustness check: MovieLens latest-small, split random, 1.06 -> 0.81 of EASE's recall@20
        notes.append(f"warning: model.history_past_only trains each event on the items before it, but under split "
                     f"{cfg.evaluation.split} a held-out event sits among the training ones and is scored with the "
                     "whole training history; on MovieLens latest-small that cost a quarter of the towers' recall@20 "
                     "(1.06 to 0.81 of EASE's); set it false, or hold out by time (user_recent, user_last, time)")
    prepared = Prepared(q_side, c_side, train, valid, test, cold_test, split.cold_items, cold_user_test,
                        split.cold_users, warm, item_item, notes, context=context_encoders, started_from=started_from,
                        divided=shard is not None, history_times=history_times,
                        own_queries=None if shard is None else shard.own_rows(q_ids))
    _check_oracles(cfg, prepared)
    return prepared


def _learned(ids: np.ndarray, encoders: SideEncoders) -> np.ndarray:
    """Which catalog ids an earlier run learned (its id encoder lists them): such entities are not cold."""
    known = encoders.id_encoder.ids
    if len(known) == 0:
        return np.zeros(len(ids), dtype=bool)
    return positions_in(known, ids) >= 0


def _constant_notes(section: str, side: SideTable) -> list[str]:
    """A warning line for features with one value in every row of their table (SideTable.constant_features)."""
    same = side.constant_features()
    if not same:
        return []
    names = ", ".join(repr(n) for n in same)
    if len(same) == len(side.specs):
        return [f"warning: {side.path}: every feature of {section} ({names}) has one value in every row, so new "
                f"{section} all get one vector and are ranked alike; check the table"]
    return [f"warning: {side.path}: {section}.features {names}: one value in every row, so "
            f"{'they tell' if len(same) > 1 else 'it tells'} no two {section} apart; check the column or drop it"]


def _check_oracles(cfg: Config, data: Prepared) -> None:
    """Read the oracle files now, so a missing or incomplete one fails before training, not after it."""
    data.oracle = true_vectors(cfg, data.queries.ids, data.candidates.ids, item_item=data.item_item)


def _target_zeros(target, everywhere) -> int:
    """Rows whose target is 0, summed over processes (0 without a target column)."""
    return 0 if target is None else int(everywhere(int((target.numpy() == 0).sum())))


def _warn_small_data(cfg: Config, n_queries: int, n_items: int, notes: list[str]) -> None:
    """k beyond what the data can identify: more factors than the smaller side has entities. (A warning on few
    pairs per entity was dropped: on MovieLens latest-small, about 6 pairs an entity, k = 16 scored as k = 32 and
    k = 64 and 118 scored best; the penalties, not k, keep such data from overfitting.)"""
    k = cfg.model.dim
    if k > min(n_queries, n_items):
        notes.append(f"warning: model.dim = {k} exceeds min(#queries, #items) = {min(n_queries, n_items)}; "
                     "extra dimensions cannot be identified from this data")
