"""Held-out splits: whole items and users held out for the cold slices, then the rest split by unit.

A unit is what must land on one side (training, validation or test) together: one row by default;
with a group column every row of a group; in item_item mode both directions of an unordered pair
(A, B) and (B, A), so a test pair's reverse never teaches the model its answer. Units are merged
when they share rows (a pair seen in two orders joins both orders' groups). The warm split then
places units: at random, by time (a unit at its earliest event), or per user (a share of each
user's units at random, each user's latest share, or each user's latest units).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import torch

from towers.config import EvaluationSection
from towers.data.tables import positions_in
from towers.errors import TowersError
from towers.memory import index_dtype

TRAIN, VALID, TEST = 0, 1, 2
PER_USER_SPLITS = ("user_share", "user_recent", "user_last")


@dataclass
class Split:
    """Index arrays into the pair list (int32 below 2**31 pairs), and which catalog rows are held out whole."""

    train: np.ndarray
    valid: np.ndarray
    test: np.ndarray
    cold_test: np.ndarray
    cold_items: torch.Tensor  # bool (n_items,)
    cold_user_test: np.ndarray
    cold_users: torch.Tensor  # bool (n_queries,)


@dataclass
class HoldOut:
    """Which entities of one side may be held out whole: those with a feature row, minus those an earlier
    run learned (a warm start), which would not be cold."""

    eligible: np.ndarray  # bool (n,): has a feature row
    learned: np.ndarray | None = None  # bool (n,): in the earlier run's id encoder


@dataclass
class TrainedBefore:
    """The pairs an earlier run trained on (its pairs.pt: its two catalogs and the training pairs' rows in
    them): a warm start keeps them in training."""

    query_ids: np.ndarray  # the earlier run's query catalog
    item_ids: np.ndarray  # its item catalog
    query_rows: np.ndarray  # each earlier training pair's rows in those catalogs
    item_rows: np.ndarray

    def mask(self, query_ids: np.ndarray, item_ids: np.ndarray, query_rows: np.ndarray, item_rows: np.ndarray,
             unordered: bool = False) -> np.ndarray:
        """A bool per pair (query_rows, item_rows, rows of these catalogs): whether the earlier run trained on it.
        unordered (item_item runs): (a, b) and (b, a) are one pair. Each catalog is mapped once, not each pair."""
        q = positions_in(query_ids, self.query_ids)[self.query_rows]
        c = positions_in(item_ids, self.item_ids)[self.item_rows]
        found = (q >= 0) & (c >= 0)
        n = np.int64(max(len(item_ids), len(query_ids)))

        def keys(a: np.ndarray, b: np.ndarray) -> np.ndarray:
            a, b = a.astype(np.int64, copy=False), b.astype(np.int64, copy=False)
            return np.minimum(a, b) * n + np.maximum(a, b) if unordered else a * n + b

        earlier = np.sort(keys(q[found], c[found]))  # repeats do no harm to searchsorted; unique() hashed slower
        new = keys(query_rows, item_rows)
        if not len(earlier):
            return np.zeros(len(new), dtype=bool)
        at = np.searchsorted(earlier, new).clip(max=len(earlier) - 1)
        return earlier[at] == new


def make_split(pairs, n_items: int, ev: EvaluationSection, seed: int, cold_eligible: HoldOut | None,
               item_item: bool, groups: np.ndarray | None = None, n_queries: int | None = None,
               cold_user_eligible: HoldOut | None = None, sides: np.ndarray | None = None,
               everywhere=lambda seen: seen, trained_before: np.ndarray | None = None,
               order_keys: np.ndarray | None = None) -> Split:
    """Split pairs per the evaluation config; the same seed and data always give the same split.

    groups: one code per pair (the log's group column), or None. n_queries: rows of the query catalog
    (default: the item catalog in item_item mode, else the largest query row + 1). cold_eligible /
    cold_user_eligible: which items / users may be held out whole (None: none may). Cold items are
    drawn first, then cold users, then the warm split, all from one seeded generator. sides: each pair's
    side given already (pairs derived from baskets placed whole, data/baskets.py), used for the warm pairs
    instead of a split by units. everywhere: which entities have pairs in any process, from this
    process's (collective.summed when the log is divided among processes, data/shards.py), so every
    process holds out the same entities. trained_before: a bool per pair, the pairs an earlier run trained
    on (a warm start): they stay in training, with every pair of their units, and the warm split places
    only the other units, its fractions taken of those, so no held-out pair is one the starting weights
    learned. With `sides` given (orders placed whole before pairing), such pairs move to training on their
    own and the rest of their order keeps its side. order_keys: when the log is divided among processes, each
    pair's key among equal times, alike in every process: its place in the whole log, or with groups its
    group's code (numbered by first appearance in the whole log); a time split then cuts every process's units
    at one time, ties broken as one process reading the whole log breaks them.
    """
    rng = np.random.default_rng(seed + 1)
    q = pairs.query.numpy()
    c = pairs.candidate.numpy()
    if n_queries is None:
        n_queries = n_items if item_item else int(q.max(initial=-1)) + 1
    cold_items = np.zeros(n_items, dtype=bool)
    if ev.cold_item_fraction > 0 and cold_eligible is not None:
        seen = np.zeros(n_items, dtype=bool)
        seen[c] = True
        if item_item:
            seen[q] = True
        cold_items = _held_out(everywhere(seen), cold_eligible, ev.cold_item_fraction, rng, "item")
    cold_users = np.zeros(n_queries, dtype=bool)
    if ev.cold_user_fraction > 0 and cold_user_eligible is not None and not item_item:
        seen = np.zeros(n_queries, dtype=bool)
        seen[q] = True
        cold_users = _held_out(everywhere(seen), cold_user_eligible, ev.cold_user_fraction, rng, "user")
    cold_q = cold_items[q] if item_item else cold_users[q]
    touches_cold = cold_items[c] | cold_q
    cold_test = np.flatnonzero(cold_items[c] & ~cold_q)
    cold_user_test = np.flatnonzero(cold_users[q] & ~cold_items[c])
    # int32 positions while the log allows: the slices' indices cost half as much for a long log
    rest = np.flatnonzero(~touches_cold).astype(index_dtype(len(q)))
    # the warm rows' columns: the columns themselves when no row is cold (no copy of a long log)
    of_rest = (lambda a: a) if len(rest) == len(q) else (lambda a: a[rest])  # noqa: E731
    fixed = None if trained_before is None else of_rest(np.asarray(trained_before, dtype=bool))
    if sides is not None:
        side = of_rest(sides)
        if fixed is not None:
            side = np.where(fixed, TRAIN, side).astype(np.int8)
        return Split(rest[side == TRAIN], rest[side == VALID], rest[side == TEST], cold_test,
                     torch.from_numpy(cold_items), cold_user_test, torch.from_numpy(cold_users))
    # each row its own unit unless pairs or groups join rows: then a code per row (split_units)
    unit = split_units(of_rest(q), of_rest(c), None if groups is None else of_rest(groups), item_item) \
        if item_item or groups is not None else len(rest)
    when = None if pairs.time is None else of_rest(pairs.time.numpy())
    whole = None if order_keys is None else WholeLog(of_rest(np.asarray(order_keys)), everywhere)
    if fixed is not None and fixed.any():
        side = _sides_around(fixed, unit, of_rest(q), when, ev, rng, whole)
    else:
        side = _unit_sides(unit, of_rest(q), when, ev, rng, whole=whole)
    return Split(rest[side == TRAIN], rest[side == VALID], rest[side == TEST], cold_test, torch.from_numpy(cold_items),
                 cold_user_test, torch.from_numpy(cold_users))


@dataclass
class WholeLog:
    """A divided log's rows as parts of the whole (data/shards.py): each row's key among equal times (make_split's
    order_keys: alike in every process, ordered as one process orders its units) and `summed`, which adds a
    count over the processes."""

    keys: np.ndarray
    summed: object

    def part(self, rows: np.ndarray) -> "WholeLog":
        return WholeLog(self.keys[rows], self.summed)

    def unit_keys(self, unit: np.ndarray | int, n_units: int) -> np.ndarray:
        """Each unit's key: its first row's (a group's rows share their group's code)."""
        keys = self.keys if isinstance(unit, int) else self.keys[_unit_first_row(unit, n_units)]
        return keys.astype(np.int64, copy=False)


def _unit_sides(unit: np.ndarray | int, q: np.ndarray, when: np.ndarray | None, ev: EvaluationSection,
                rng, trained: np.ndarray | None = None, whole: WholeLog | None = None) -> np.ndarray:
    """Each row's side under the configured warm split (trained: as _per_user_sides takes it; whole: the
    rows' places in a divided log, for a time split over every process's units)."""
    if ev.split in PER_USER_SPLITS:
        return _per_user_sides(unit, q, when, ev, rng, trained)
    if ev.split == "time" and when is not None and whole is not None:
        return _whole_log_time_sides(unit, when, ev, whole)
    return global_sides(unit, when, ev, rng)


def _sides_around(fixed: np.ndarray, unit: np.ndarray | int, q: np.ndarray, when: np.ndarray | None,
                  ev: EvaluationSection, rng, whole: WholeLog | None = None) -> np.ndarray:
    """Each row's side when the rows in `fixed` must train: every unit holding such a row trains whole,
    and the configured split places the other units among themselves."""
    if not isinstance(unit, int):
        held = np.zeros(_unit_count(unit), dtype=bool)
        held[unit[fixed]] = True
        fixed = held[unit]
    free = np.flatnonzero(~fixed)
    side = np.full(len(fixed), TRAIN, dtype=np.int8)
    # a divided time split counts with every process, so one with no free rows still takes part
    if len(free) or (whole is not None and ev.split == "time"):
        sub = len(free) if isinstance(unit, int) else np.unique(unit[free], return_inverse=True)[1].reshape(-1)
        trained = np.zeros(int(q.max(initial=-1)) + 1, dtype=bool)
        trained[q[fixed]] = True  # these users train on their fixed rows: all their other units may be held out
        side[free] = _unit_sides(sub, q[free], None if when is None else when[free], ev, rng, trained,
                                 None if whole is None else whole.part(free))
    return side


def _held_out(seen: np.ndarray, pool: HoldOut, fraction: float, rng, what: str) -> np.ndarray:
    """A bool mask of entities held out whole: round(fraction x eligible entities of the log), drawn from
    those no earlier run learned; an error with the numbers when too few of those remain."""
    eligible = seen & pool.eligible
    n_eligible = int(eligible.sum())
    n_cold = int(round(fraction * n_eligible))
    new = eligible if pool.learned is None else eligible & ~pool.learned
    candidates = np.flatnonzero(new)
    if n_cold > len(candidates):
        most = math.floor(len(candidates) / n_eligible * 1000) / 1000 if n_eligible else 0.0
        raise TowersError(f"--init-from: evaluation.cold_{what}_fraction {fraction:g} asks for {n_cold} cold {what}s, but "
                          f"only {len(candidates)} of the {n_eligible} {what}s with features in the log were not learned by "
                          f"the earlier run (those are not cold); lower cold_{what}_fraction to at most {most:g}, "
                          f"or add new {what}s to the log")
    out = np.zeros(len(seen), dtype=bool)
    out[rng.choice(candidates, size=n_cold, replace=False)] = True
    return out


# held-out pairs below which a slice's recall@K is mostly noise: its standard error sqrt(p (1 - p) / n) (a
# binomial share) reaches 0.05 at n = 100 (common practice, no source)
FEW_HELD_OUT = 100


def thin_slices_note(ev: EvaluationSection, n_valid: int, n_test: int) -> str | None:
    """A note when a per-user split held out fewer than FEW_HELD_OUT validation or test pairs although its
    fractions ask for some: a user's units are held out only once round(fraction x units) reaches 1, so logs of
    users with few orders or sessions leave those slices nearly empty. None otherwise."""
    if ev.split not in PER_USER_SPLITS:
        return None
    thin = [f"{n:,} {name}" for n, name, asked in ((n_valid, "validation", ev.validation_fraction > 0),
                                                  (n_test, "test", ev.test_fraction > 0 or ev.split == "user_last"))
            if asked and n < FEW_HELD_OUT]
    if not thin:
        return None
    return (f"note: evaluation.split {ev.split} held out only {' and '.join(thin)} pairs: early stopping and the "
            f"figures follow noise at that size; a per-user split holds out a user's units (orders, sessions or "
            f"events) only once the user has enough of them (README, Evaluation protocol); raise "
            f"evaluation.test_fraction / validation_fraction, or use split: random")


def split_units(q: np.ndarray, c: np.ndarray, groups: np.ndarray | None, item_item: bool) -> np.ndarray:
    """One unit code per row (0..n_units-1): rows with one code always land on the same side.

    Rows are joined when they share a group, and in item_item mode when they hold the same unordered
    pair. Without either, every row is its own unit (code = row position).
    """
    keys = []
    if item_item:
        lo, hi = np.minimum(q, c).astype(np.int64), np.maximum(q, c).astype(np.int64)
        keys.append(np.unique(lo * (int(max(q.max(initial=0), c.max(initial=0))) + 1) + hi, return_inverse=True)[1])
    if groups is not None:
        keys.append(np.unique(groups, return_inverse=True)[1])
    if not keys:
        return np.arange(len(q), dtype=np.int64)
    if len(keys) == 1:
        return keys[0].reshape(-1).astype(np.int64)
    return connected_units(keys[0].reshape(-1), keys[1].reshape(-1))


def connected_units(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Connected components of the graph whose nodes are the values of `a` and of `b` and whose edges are
    the rows (a[i], b[i]): each row's component, numbered 0..k-1 in order of first row.

    Minimum-label propagation with pointer jumping, one vectorised pass per round; the rounds grow with
    the logarithm of the longest chain of linked keys, not with the rows.
    """
    na = int(a.max(initial=-1)) + 1
    u, v = a.astype(np.int64), b.astype(np.int64) + na
    label = np.arange(na + int(b.max(initial=-1)) + 1, dtype=np.int64)
    while True:
        low = np.minimum(label[u], label[v])
        before = label.copy()
        np.minimum.at(label, u, low)
        np.minimum.at(label, v, low)
        while True:  # pointer jumping: every label points at a node whose label is not larger
            jumped = label[label]
            if np.array_equal(jumped, label):
                break
            label = jumped
        if np.array_equal(label, before):
            break
    # first-appearance numbering, so the codes do not depend on how the keys were numbered
    _, first, inverse = np.unique(label[u], return_index=True, return_inverse=True)
    rank = np.empty(len(first), dtype=np.int64)
    rank[np.argsort(first, kind="stable")] = np.arange(len(first))
    return rank[inverse.reshape(-1)]


def _unit_count(unit: np.ndarray | int) -> int:
    """Units of a unit array (codes 0..k-1), or `unit` itself when given as a row count: one unit a row."""
    return unit if isinstance(unit, int) else int(unit.max(initial=-1)) + 1


def _unit_first_row(unit: np.ndarray | int, n_units: int) -> np.ndarray:
    if isinstance(unit, int):
        return np.arange(unit, dtype=np.int64)
    first = np.full(n_units, len(unit), dtype=np.int64)
    np.minimum.at(first, unit, np.arange(len(unit), dtype=np.int64))
    return first


def _unit_time(unit: np.ndarray | int, n_units: int, when: np.ndarray) -> np.ndarray:
    """Each unit's earliest event time."""
    if isinstance(unit, int):
        return when.astype(np.int64, copy=False)
    t = np.full(n_units, np.iinfo(np.int64).max, dtype=np.int64)
    np.minimum.at(t, unit, when.astype(np.int64))
    return t


def global_sides(unit: np.ndarray | int, when: np.ndarray | None, ev: EvaluationSection, rng) -> np.ndarray:
    """Random or time split of the units, the fractions applied to units: test first, then validation
    from the rest. Returns each row's side. unit: each row's unit code, or the row count when every row
    is its own unit (data/baskets.py places its n baskets so)."""
    n_units = _unit_count(unit)
    if ev.split == "time" and when is not None:
        order = np.argsort(_unit_time(unit, n_units, when), kind="stable")
    else:
        # int32 where it fits: the same order as rng.permutation(n_units), half the memory for a long log
        order = rng.permutation(np.arange(n_units, dtype=index_dtype(n_units)))
    n_test = int(round(ev.test_fraction * n_units))
    n_valid = int(round(ev.validation_fraction * (n_units - n_test)))
    unit_side = np.full(n_units, TRAIN, dtype=np.int8)
    if ev.split == "time":  # the latest units are the test slice, the next latest validation
        unit_side[order[n_units - n_test:]] = TEST
        unit_side[order[n_units - n_test - n_valid:n_units - n_test]] = VALID
    else:
        unit_side[order[:n_test]] = TEST
        unit_side[order[n_test:n_test + n_valid]] = VALID
    return unit_side if isinstance(unit, int) else unit_side[unit]


def _whole_log_time_sides(unit: np.ndarray | int, when: np.ndarray, ev: EvaluationSection,
                          whole: WholeLog) -> np.ndarray:
    """global_sides' time split of every process's units, made in each process for its own: the counts are of
    the whole log's units, and of two units at one time the later is the one one process numbers later (a
    row: later in the log; a group: a later first appearance; WholeLog.unit_keys), so the processes place
    between them exactly the units one process would (global_sides' sort by time is stable)."""
    n_units = _unit_count(unit)
    when_unit = _unit_time(unit, n_units, when)
    key = whole.unit_keys(unit, n_units)
    total = int(whole.summed(n_units))
    n_test = int(round(ev.test_fraction * total))
    n_valid = int(round(ev.validation_fraction * (total - n_test)))
    unit_side = np.full(n_units, TRAIN, dtype=np.int8)
    test = latest_units(when_unit, key, n_test, whole.summed)
    unit_side[test] = TEST
    rest = np.flatnonzero(~test)
    unit_side[rest[latest_units(when_unit[rest], key[rest], n_valid, whole.summed)]] = VALID
    return unit_side if isinstance(unit, int) else unit_side[unit]


def latest_units(when: np.ndarray, key: np.ndarray, n: int, summed) -> np.ndarray:
    """Which of this process's units are among the n latest of all processes' units, by (time, key); the
    keys are distinct over all processes. No unit leaves its process: a bisection finds the cut-off time
    (the latest with at least n units at or after it), then one among the keys of the units at that time,
    each step a count summed over the processes: 2 x 64 sums of one number."""
    if n <= 0:
        return np.zeros(len(when), dtype=bool)
    if n >= int(summed(len(when))):
        return np.ones(len(when), dtype=bool)
    cut = _last_with_count(when, n, summed)
    out = when > cut
    at_cut = np.flatnonzero(when == cut)
    wanted = n - int(summed(int(out.sum())))  # >= 1 by the choice of cut
    out[at_cut[key[at_cut] >= _last_with_count(key[at_cut], wanted, summed)]] = True
    return out


def _last_with_count(values: np.ndarray, n: int, summed) -> int:
    """The largest whole number v with at least n of all processes' int64 values >= v (n >= 1 and at most
    their count)."""
    lo, hi = -(1 << 63), (1 << 63) - 1
    values = values.astype(np.int64, copy=False)
    while lo < hi:
        mid = (lo + hi + 1) // 2
        if int(summed(int(np.count_nonzero(values >= mid)))) >= n:
            lo = mid
        else:
            hi = mid - 1
    return lo


def _per_user_sides(unit: np.ndarray | int, q: np.ndarray, when: np.ndarray | None, ev: EvaluationSection,
                    rng, trained: np.ndarray | None = None) -> np.ndarray:
    """Each user's units split apart, every user keeping at least one training unit; returns each row's side.
    trained: bool by user id, users whose training holds units from elsewhere already (a warm start's pairs the
    earlier run trained on): they need none of these, so the caps below are k, not k - 1, for them.

    A unit belongs to the user of its first row. user_share: of a user's k units, round(test_fraction x k)
    at random are test (halves rounded up), capped at k - 1; then round(validation_fraction x the rest)
    of the rest are validation, capped to leave one for training. user_recent: the same counts, taken
    from the user's latest units (test the latest, validation the latest before them). user_last: the
    latest min(last_n, k - 1) units are test and, when validation_fraction > 0, the min(last_n, what is
    left - 1) before them validation. By time, a unit is at its earliest event and among equal times the
    later row counts as later.
    """
    n_units = _unit_count(unit)
    first = _unit_first_row(unit, n_units)
    narrow = index_dtype(max(n_units, int(q.max(initial=0)) + 1))  # 4 bytes a unit where it fits
    owner = q[first].astype(narrow)
    by_time = ev.split in ("user_recent", "user_last")
    # by time, ascending by (owner, earliest time, first row), so a user's latest units come last; else a
    # random order within each user
    within = (first.astype(narrow), _unit_time(unit, n_units, when)) if by_time else (rng.random(n_units),)
    order = np.lexsort((*within, owner))
    first = within = None
    owners_sorted = owner[order]
    starts = np.flatnonzero(np.r_[True, owners_sorted[1:] != owners_sorted[:-1]])
    # units each owner keeps for training at least: 1, or 0 for an owner trained already
    keeps = 1 if trained is None else 1 - trained[owners_sorted[starts]].astype(np.int64)
    owners_sorted = None
    counts = np.diff(np.r_[starts, n_units])  # each owner's units, in owner order
    # the counts of test and validation units, once per owner, then compared with each unit's place
    if ev.split == "user_last":
        n_test = np.minimum(ev.last_n, counts - keeps)
        n_valid = np.minimum(ev.last_n, counts - keeps - n_test) if ev.validation_fraction > 0 else np.zeros_like(counts)
    else:
        n_test = np.minimum(np.floor(ev.test_fraction * counts + 0.5).astype(np.int64), counts - keeps)
        left = counts - n_test
        n_valid = np.minimum(np.floor(ev.validation_fraction * left + 0.5).astype(np.int64), left - keeps)
    group = np.repeat(np.arange(len(starts), dtype=narrow), counts)  # each sorted unit's owner, 0..owners-1
    pos = np.arange(n_units, dtype=narrow) - starts.astype(narrow)[group]  # place within the owner's units
    if by_time:
        pos = counts.astype(narrow)[group] - 1 - pos  # 0 is the latest
    sorted_side = np.full(n_units, TRAIN, dtype=np.int8)
    sorted_side[pos < (n_test + n_valid).astype(narrow)[group]] = VALID
    sorted_side[pos < n_test.astype(narrow)[group]] = TEST
    unit_side = np.empty(n_units, dtype=np.int8)
    unit_side[order] = sorted_side
    return unit_side if isinstance(unit, int) else unit_side[unit]
