"""Held-out splits (towers/data/splits.py): units that stay together, per-user splits, users and items held
out whole, and warm starts that draw cold entities only from what the earlier run never learned.

Every check is computed again outside towers: pandas merges and groupbys, scipy's connected components,
or the split as plain numpy wrote it before units existed.
"""

from __future__ import annotations

import threading

import numpy as np
import pandas as pd
import pytest
import torch
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components

from towers import config as C
from towers.config import EvaluationSection
from towers.data.pairs import Pairs
from towers.data.prepare import prepare, read_interactions
from towers.data.splits import FEW_HELD_OUT, HoldOut, connected_units, latest_units, make_split, thin_slices_note
from towers.errors import TowersError
from towers.model.build import build_model
from towers.model.bundle import load_bundle, save_bundle


def as_pairs(df: pd.DataFrame) -> Pairs:
    column = lambda name: torch.from_numpy(df[name].to_numpy(np.int64, copy=True))  # noqa: E731
    return Pairs(column("q"), column("c"), time=column("t") if "t" in df else None)


def with_sides(df: pd.DataFrame, split) -> pd.DataFrame:
    """df with a 'side' column naming where each row went ('none': in no slice)."""
    side = np.full(len(df), "none", dtype=object)
    for name in ("train", "valid", "test", "cold_test", "cold_user_test"):
        side[getattr(split, name)] = name
    return df.assign(side=side)


def groups_of(df: pd.DataFrame, column: str) -> np.ndarray:
    return pd.factorize(df[column])[0].astype(np.int64)


# ---------------------------------------------------------------- item_item: both directions together


def copurchase_log(seed: int, n_items: int = 80, n_pairs: int = 500) -> pd.DataFrame:
    """Planted co-purchases: every unordered pair in both directions, a fifth of them once more, rows shuffled,
    every row at its own time."""
    rng = np.random.default_rng(seed)
    a, b = rng.integers(0, n_items, 6 * n_pairs), rng.integers(0, n_items, 6 * n_pairs)
    keys = np.unique(np.minimum(a, b)[a != b] * n_items + np.maximum(a, b)[a != b])
    keys = rng.permutation(keys)[:n_pairs]
    lo, hi = keys // n_items, keys % n_items
    again = rng.random(n_pairs) < 0.2
    q = np.concatenate([lo, hi, lo[again]])
    c = np.concatenate([hi, lo, hi[again]])
    order = rng.permutation(len(q))
    return pd.DataFrame({"q": q[order], "c": c[order], "t": rng.permutation(len(q))})


def reverse_leaks(held: pd.DataFrame, train: pd.DataFrame) -> int:
    """Held-out rows whose reverse pair is a training row (reference: a pandas merge)."""
    return len(held[["q", "c"]].merge(train[["q", "c"]].drop_duplicates(), left_on=["q", "c"], right_on=["c", "q"]))


@pytest.mark.parametrize("split", ["random", "time"])
def test_item_item_pairs_never_have_their_reverse_in_training(split):
    df = copurchase_log(seed=4)
    ev = EvaluationSection(split=split, test_fraction=0.2, validation_fraction=0.2)
    out = with_sides(df, make_split(as_pairs(df), 80, ev, seed=5, cold_eligible=None, item_item=True))
    train = out[out.side == "train"]
    for held in ("test", "valid"):
        rows = out[out.side == held]
        assert len(rows) > 50
        assert reverse_leaks(rows, train) == 0  # reference: pandas merge on the reversed pair
        assert len(rows.merge(train, on=["q", "c"])) == 0  # nor the same pair again
    unordered = out.assign(lo=np.minimum(out.q, out.c), hi=np.maximum(out.q, out.c))
    assert unordered.groupby(["lo", "hi"]).side.nunique().max() == 1  # reference: pandas groupby nunique
    n_units = len(unordered.drop_duplicates(["lo", "hi"]))
    n_test = round(0.2 * n_units)
    assert unordered[unordered.side == "test"][["lo", "hi"]].drop_duplicates().shape[0] == n_test  # fractions of pairs
    if split == "time":  # a pair is placed at its earliest time: the test pairs are the latest ones
        first = unordered.groupby(["lo", "hi"]).agg(t=("t", "min"), side=("side", "first"))
        assert first[first.side == "test"].t.min() > first[first.side == "valid"].t.max()
        assert first[first.side == "valid"].t.min() > first[first.side == "train"].t.max()


def test_the_leak_check_finds_a_per_row_split():
    # Regression: a per-row random split put most test pairs' reverses into training (4,814 of 5,918 test
    # pairs on a made-up shop's co-purchases); the same check on a per-row split of the planted log finds them
    df = copurchase_log(seed=4)
    test = np.random.default_rng(0).permutation(len(df))[:len(df) // 5]
    is_test = np.zeros(len(df), bool)
    is_test[test] = True
    assert reverse_leaks(df[is_test], df[~is_test]) > 0.5 * is_test.sum()


def basket_pairs(seed: int, n_orders: int = 150, n_items: int = 40) -> pd.DataFrame:
    """Every ordered pair of distinct items within each order (both directions); pairs recur across orders."""
    rng = np.random.default_rng(seed)
    rows = []
    for order in range(n_orders):  # building the planted data, not the code under test
        items = rng.choice(n_items, size=int(rng.integers(2, 5)), replace=False)
        rows += [(order, a, b) for a in items for b in items if a != b]
    df = pd.DataFrame(rows, columns=["order", "q", "c"])
    return df.iloc[rng.permutation(len(df))].reset_index(drop=True)


def test_item_item_groups_and_pairs_stay_together():
    df = basket_pairs(seed=6)
    ev = EvaluationSection(test_fraction=0.2, validation_fraction=0.2)
    out = with_sides(df, make_split(as_pairs(df), 40, ev, 3, None, True, groups=groups_of(df, "order")))
    assert out.groupby("order").side.nunique().max() == 1  # reference: pandas groupby nunique
    out = out.assign(lo=np.minimum(out.q, out.c), hi=np.maximum(out.q, out.c))
    assert out.groupby(["lo", "hi"]).side.nunique().max() == 1
    assert reverse_leaks(out[out.side == "test"], out[out.side == "train"]) == 0
    # the units are the connected components of orders linked by a shared unordered pair
    # (reference: scipy.sparse.csgraph.connected_components)
    pair = pd.factorize(out.lo * 40 + out.hi)[0]
    n_orders = int(out.order.max()) + 1
    graph = coo_matrix((np.ones(len(out)), (out.order.to_numpy(), n_orders + pair)), shape=(n_orders + pair.max() + 1,) * 2)
    _, comp = connected_components(graph, directed=False)
    unit = comp[out.order.to_numpy()]
    n_units = len(np.unique(unit))
    assert 1 < n_units < n_orders  # some orders were merged, and more than one unit is left
    assert len(np.unique(unit[out.side == "test"])) == round(0.2 * n_units)


def test_connected_units_match_scipy():
    rng = np.random.default_rng(8)
    a = np.concatenate([rng.integers(0, 300, 400), np.arange(500, 1500)])
    b = np.concatenate([rng.integers(0, 300, 400), np.arange(500, 1500) // 2])  # a long chain: many rounds
    ours = connected_units(a, b)
    n_a = a.max() + 1
    graph = coo_matrix((np.ones(len(a)), (a, n_a + b)), shape=(n_a + b.max() + 1,) * 2)
    ref = connected_components(graph, directed=False)[1][a]  # reference: scipy.sparse.csgraph
    both = pd.DataFrame({"ours": ours, "ref": ref})
    assert both.groupby("ours").ref.nunique().max() == 1 and both.groupby("ref").ours.nunique().max() == 1
    assert ours[0] == 0 and set(ours) == set(range(ours.max() + 1))  # numbered from the first row


def test_a_time_split_places_each_group_at_its_earliest_event():
    rng = np.random.default_rng(9)
    n_orders = 300
    size = rng.integers(1, 6, n_orders)
    order = np.repeat(np.arange(n_orders), size)
    start = rng.permutation(n_orders) * 10  # distinct order times; rows up to 9 later
    df = pd.DataFrame({"order": order, "q": rng.integers(0, 60, n_orders)[order], "c": rng.integers(0, 50, len(order)),
                       "t": start[order] + rng.integers(0, 10, len(order))})
    df = df.iloc[rng.permutation(len(df))].reset_index(drop=True)
    ev = EvaluationSection(split="time", test_fraction=0.2, validation_fraction=0.1)
    out = with_sides(df, make_split(as_pairs(df), 50, ev, 0, None, False, groups=groups_of(df, "order"), n_queries=60))
    per = out.groupby("order").agg(t=("t", "min"), side=("side", "first"), sides=("side", "nunique"))  # reference: pandas
    assert per.sides.max() == 1
    n_test = round(0.2 * n_orders)
    assert (per.side == "test").sum() == n_test and (per.side == "valid").sum() == round(0.1 * (n_orders - n_test))
    assert per[per.side == "test"].t.min() > per[per.side == "valid"].t.max() > per[per.side == "train"].t.max()


class _Summed:
    """collective.summed for processes played by threads: every caller waits for the others and gets the sum."""

    def __init__(self, world: int):
        self.barrier, self.values = threading.Barrier(world, timeout=30), [0] * world  # a missed count fails

    def of(self, rank: int):
        def summed(value):
            self.values[rank] = value
            self.barrier.wait()
            if isinstance(value, np.ndarray) and value.dtype == bool:  # which entities any process holds
                total = np.logical_or.reduce(self.values)
            else:
                total = sum(self.values)
            self.barrier.wait()  # every process has read the sum before the next one is put down
            return total
        return summed


@pytest.mark.parametrize("groups, cold, warm_start", [(False, 0.0, False), (True, 0.0, False), (True, 0.2, False),
                                                      (True, 0.2, True), (False, 0.2, True)],
                         ids=["rows", "orders", "interleaved-orders-cold-items", "warm-start-orders",
                              "warm-start-rows"])
@pytest.mark.parametrize("seed", range(6))
def test_a_time_split_of_a_divided_log_is_the_one_process_split(groups, cold, warm_start, seed):
    # three processes (threads) each split their own users' rows by time, the counts summed between them: they
    # hold between them the one-process split row for row, ties between equal times broken as one process
    # breaks them (whole minutes, so the cut-offs fall inside runs of equal times); orders' lines interleaved in
    # the log, some dropped with cold items; a warm start whose first process has every row trained already
    rng = np.random.default_rng(4 + seed)
    n_orders = 400
    order = np.repeat(np.arange(n_orders), rng.integers(1, 5, n_orders))
    df = pd.DataFrame({"order": order, "q": rng.integers(0, 50, n_orders)[order], "c": rng.integers(0, 40, len(order)),
                       "t": (rng.integers(0, 120, n_orders) * 60)[order]})
    df = df.iloc[rng.permutation(len(df))].reset_index(drop=True)  # an order's lines apart in the log
    df["g"] = groups_of(df, "order")  # group codes by first appearance, as the log reader numbers them
    ev = EvaluationSection(split="time", test_fraction=0.2, validation_fraction=0.15, cold_item_fraction=cold)
    owner = df.q.to_numpy() % 3
    fixed = (owner == 0) | (rng.random(len(df)) < 0.2) if warm_start else None
    grouping = (lambda d: d["g"].to_numpy()) if groups else (lambda d: None)  # noqa: E731
    pool = HoldOut(np.ones(40, dtype=bool)) if cold else None
    one = with_sides(df, make_split(as_pairs(df), 40, ev, seed, pool, False, groups=grouping(df), n_queries=50,
                                    trained_before=fixed)).side
    assert (one == "test").any() and (one == "valid").any()
    summed, got, errors = _Summed(3), pd.Series("none", index=df.index, dtype=object), []

    def process(rank: int):
        try:
            mine = df[owner == rank]
            split = make_split(as_pairs(mine), 40, ev, seed, pool, False, groups=grouping(mine), n_queries=50,
                               everywhere=summed.of(rank),  # the keys prepare passes: group codes, else places
                               order_keys=mine["g"].to_numpy() if groups else mine.index.to_numpy(np.int64) * 7 + 3,
                               trained_before=None if fixed is None else fixed[mine.index.to_numpy()])
            got[mine.index] = with_sides(mine.reset_index(drop=True), split).side.to_numpy()
        except BaseException as exc:  # noqa: BLE001 - shown by the assertion below
            errors.append(exc)
            summed.barrier.abort()
    threads = [threading.Thread(target=process, args=(r,)) for r in range(3)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert not errors, errors
    assert (got == one).all(), pd.crosstab(one, got)


def test_latest_units_finds_the_n_latest_by_time_then_key():
    # reference: numpy's lexsort over all the units at once
    rng = np.random.default_rng(5)
    when = rng.integers(-3, 4, 500) * (1 << 61)  # a few times near both ends of int64
    key = rng.permutation(500).astype(np.int64)
    order = np.lexsort((key, when))
    for n in (0, 1, 77, 250, 499, 500):
        want = np.zeros(500, bool)
        want[order[500 - n:]] = True
        assert (latest_units(when, key, n, lambda x: x) == want).all(), n


def test_user_item_random_split_without_groups_is_the_row_split_unchanged():
    # reference: the row-level split as plain numpy wrote it before units (runs of random-split configs
    # without a group column must keep their exact tables)
    rng = np.random.default_rng(1)
    df = pd.DataFrame({"q": rng.integers(0, 70, 900), "c": rng.integers(0, 90, 900)})
    eligible = rng.random(90) < 0.8
    ev = EvaluationSection(test_fraction=0.15, validation_fraction=0.1, cold_item_fraction=0.2)
    got = make_split(as_pairs(df), 90, ev, 11, HoldOut(eligible), False, n_queries=70)
    r = np.random.default_rng(12)
    seen = np.zeros(90, bool)
    seen[df.c] = True
    candidates = np.flatnonzero(seen & eligible)
    cold = np.zeros(90, bool)
    cold[r.choice(candidates, size=round(0.2 * len(candidates)), replace=False)] = True
    rest = np.flatnonzero(~cold[df.c])
    order = rest[r.permutation(len(rest))]
    n_test = round(0.15 * len(order))
    n_valid = round(0.1 * (len(order) - n_test))
    assert np.array_equal(got.cold_items.numpy(), cold)
    assert np.array_equal(got.test, np.sort(order[:n_test]))
    assert np.array_equal(got.valid, np.sort(order[n_test:n_test + n_valid]))
    assert np.array_equal(got.train, np.sort(order[n_test + n_valid:]))
    assert np.array_equal(got.cold_test, np.flatnonzero(cold[df.c]))


# ---------------------------------------------------------------- per-user splits


def user_log(seed: int, n_users: int = 120, most: int = 25) -> pd.DataFrame:
    """Users with 1..most events each (some with exactly one), distinct times, rows shuffled."""
    rng = np.random.default_rng(seed)
    k = rng.integers(1, most + 1, n_users)
    k[:10] = 1
    q = np.repeat(np.arange(n_users), k)
    df = pd.DataFrame({"q": q, "c": rng.integers(0, 200, len(q)), "t": rng.permutation(len(q))})
    return df.iloc[rng.permutation(len(df))].reset_index(drop=True)


def per_user(out: pd.DataFrame, side: str, users: pd.Index) -> pd.Series:
    return out[out.side == side].groupby("q").size().reindex(users, fill_value=0)


def test_user_share_holds_out_a_rounded_share_of_each_user():
    df = user_log(seed=2)
    ev = EvaluationSection(split="user_share", test_fraction=0.2, validation_fraction=0.25)
    out = with_sides(df, make_split(as_pairs(df), 200, ev, 4, None, False, n_queries=120))
    k = df.groupby("q").size()  # reference: pandas groupby
    # per-user counts: the share rounded half up, leaving the user one training event
    n_test = np.minimum(np.floor(0.2 * k + 0.5), k - 1)
    n_valid = np.minimum(np.floor(0.25 * (k - n_test) + 0.5), k - n_test - 1)
    assert (per_user(out, "test", k.index) == n_test).all()
    assert (per_user(out, "valid", k.index) == n_valid).all()
    assert (per_user(out, "train", k.index) >= 1).all()  # every user keeps a training event
    assert (out[out.q.isin(k.index[k == 1])].side == "train").all()  # single-event users stay in training
    assert per_user(out, "test", k.index).sum() > 200
    again = with_sides(df, make_split(as_pairs(df), 200, ev, 4, None, False, n_queries=120))
    other = with_sides(df, make_split(as_pairs(df), 200, ev, 5, None, False, n_queries=120))
    assert (again.side == out.side).all() and (other.side != out.side).any()  # seeded and random


@pytest.mark.parametrize("validation", [0.0, 0.1])
def test_user_last_holds_out_each_users_latest_events(validation):
    df = user_log(seed=3, most=12)
    ev = EvaluationSection(split="user_last", last_n=2, validation_fraction=validation)
    out = with_sides(df, make_split(as_pairs(df), 200, ev, 0, None, False, n_queries=120))
    # reference: pandas rank, 1 = the user's latest event
    rank = df.groupby("q").t.rank(method="first", ascending=False)
    k = df.groupby("q").q.transform("size")
    n_test = np.minimum(2, k - 1)
    n_valid = np.minimum(2, k - 1 - n_test) if validation > 0 else 0 * k
    expected = np.where(rank <= n_test, "test", np.where(rank <= n_test + n_valid, "valid", "train"))
    assert (out.side.to_numpy() == expected).all()
    assert (out.side == "valid").any() == (validation > 0)


@pytest.mark.parametrize("test_fraction,validation", [(0.2, 0.1), (0.3, 0.0), (0.5, 0.4)])
def test_user_recent_holds_out_each_users_latest_share(test_fraction, validation):
    df = user_log(seed=4)
    ev = EvaluationSection(split="user_recent", test_fraction=test_fraction, validation_fraction=validation)
    out = with_sides(df, make_split(as_pairs(df), 200, ev, 0, None, False, n_queries=120))
    # reference: pandas rank by time within each user, 1 = the user's latest event
    rank = df.groupby("q").t.rank(method="first", ascending=False)
    k = df.groupby("q").q.transform("size")
    # counts as user_share's: the share rounded half up, capped to leave one training event
    n_test = np.minimum(np.floor(test_fraction * k + 0.5), k - 1)
    n_valid = np.minimum(np.floor(validation * (k - n_test) + 0.5), k - n_test - 1)
    expected = np.where(rank <= n_test, "test", np.where(rank <= n_test + n_valid, "valid", "train"))
    assert (out.side.to_numpy() == expected).all()
    assert (out[k.to_numpy() == 1].side == "train").all()  # single-event users stay in training
    assert (out.side == "test").sum() > 150 and (out.side == "valid").any() == (validation > 0)
    # the split is by time: every user's test events come after the user's training events
    last_train = out[out.side == "train"].groupby("q").t.max()  # reference: pandas groupby max / min
    first_test = out[out.side == "test"].groupby("q").t.min()
    assert (first_test > last_train.reindex(first_test.index)).all()
    again = with_sides(df, make_split(as_pairs(df), 200, ev, 9, None, False, n_queries=120))
    assert (again.side == out.side).all()  # no randomness: the seed does not move it


@pytest.mark.parametrize("split", ["user_last", "user_recent"])
def test_per_user_time_splits_count_the_later_row_as_later_among_equal_times(split):
    rng = np.random.default_rng(5 if split == "user_last" else 6)
    df = pd.DataFrame({"q": rng.integers(0, 30, 400), "c": rng.integers(0, 40, 400), "t": rng.integers(0, 4, 400)})
    if split == "user_last":
        ev = EvaluationSection(split="user_last", last_n=3, validation_fraction=0.0)
    else:
        ev = EvaluationSection(split="user_recent", test_fraction=0.25, validation_fraction=0.2)
    out = with_sides(df, make_split(as_pairs(df), 40, ev, 0, None, False, n_queries=30))
    # reference: pandas rank on the rows in reverse, so among equal times the later row ranks first
    rev = df.iloc[::-1]
    rank = rev.groupby("q").t.rank(method="first", ascending=False).iloc[::-1]
    k = df.groupby("q").q.transform("size")
    if split == "user_last":
        n_test, n_valid = np.minimum(3, k - 1), 0 * k
    else:
        n_test = np.minimum(np.floor(0.25 * k + 0.5), k - 1)
        n_valid = np.minimum(np.floor(0.2 * (k - n_test) + 0.5), k - n_test - 1)
    expected = np.where(rank <= n_test, "test", np.where(rank <= n_test + n_valid, "valid", "train"))
    assert (out.side.to_numpy() == expected).all()

def test_user_recent_with_groups_holds_out_each_users_latest_orders():
    df = order_log(seed=9)
    ev = EvaluationSection(split="user_recent", test_fraction=0.3, validation_fraction=0.2)
    out = with_sides(df, make_split(as_pairs(df), 60, ev, 2, None, False, groups=groups_of(df, "order"), n_queries=50))
    per = out.groupby("order").agg(q=("q", "first"), t=("t", "min"), side=("side", "first"), sides=("side", "nunique"))
    assert per.sides.max() == 1  # reference: pandas groupby nunique
    rank = per.groupby("q").t.rank(method="first", ascending=False)  # reference: pandas rank of order start times
    g = per.groupby("q").q.transform("size")
    n_test = np.minimum(np.floor(0.3 * g + 0.5), g - 1)
    n_valid = np.minimum(np.floor(0.2 * (g - n_test) + 0.5), g - n_test - 1)
    expected = np.where(rank <= n_test, "test", np.where(rank <= n_test + n_valid, "valid", "train"))
    assert (per.side.to_numpy() == expected).all()


def order_log(seed: int) -> pd.DataFrame:
    """Orders of 1-4 rows, each order one user's; an order's rows a little apart in time."""
    rng = np.random.default_rng(seed)
    n_orders = 400
    owner = rng.integers(0, 50, n_orders)
    size = rng.integers(1, 5, n_orders)
    order = np.repeat(np.arange(n_orders), size)
    start = rng.permutation(n_orders) * 10
    df = pd.DataFrame({"order": order, "q": owner[order], "c": rng.integers(0, 60, len(order)),
                       "t": start[order] + rng.integers(0, 10, len(order))})
    return df.iloc[rng.permutation(len(df))].reset_index(drop=True)


def test_user_share_with_groups_moves_whole_orders():
    df = order_log(seed=7)
    ev = EvaluationSection(split="user_share", test_fraction=0.3, validation_fraction=0.0)
    out = with_sides(df, make_split(as_pairs(df), 60, ev, 2, None, False, groups=groups_of(df, "order"), n_queries=50))
    per = out.groupby("order").agg(q=("q", "first"), side=("side", "first"), sides=("side", "nunique"))
    assert per.sides.max() == 1  # reference: pandas groupby nunique
    g = per.groupby("q").size()
    n_test = np.minimum(np.floor(0.3 * g + 0.5), g - 1)
    assert (per[per.side == "test"].groupby("q").size().reindex(g.index, fill_value=0) == n_test).all()
    assert (per[per.side == "train"].groupby("q").size().reindex(g.index, fill_value=0) >= 1).all()


def test_user_last_with_groups_holds_out_each_users_latest_order():
    df = order_log(seed=8)
    ev = EvaluationSection(split="user_last", last_n=1, validation_fraction=0.2)
    out = with_sides(df, make_split(as_pairs(df), 60, ev, 2, None, False, groups=groups_of(df, "order"), n_queries=50))
    per = out.groupby("order").agg(q=("q", "first"), t=("t", "min"), side=("side", "first"), sides=("side", "nunique"))
    assert per.sides.max() == 1
    rank = per.groupby("q").t.rank(method="first", ascending=False)  # reference: pandas rank of order start times
    g = per.groupby("q").q.transform("size")
    expected = np.where((rank == 1) & (g > 1), "test", np.where((rank == 2) & (g > 2), "valid", "train"))
    assert (per.side.to_numpy() == expected).all()


# ---------------------------------------------------------------- whole users and items held out


def test_cold_users_are_held_out_whole():
    rng = np.random.default_rng(10)
    df = pd.DataFrame({"q": rng.integers(0, 100, 1500), "c": rng.integers(0, 80, 1500)})
    user_rows, item_rows = rng.random(100) < 0.85, rng.random(80) < 0.9
    ev = EvaluationSection(test_fraction=0.1, validation_fraction=0.1, cold_item_fraction=0.1, cold_user_fraction=0.2)
    split = make_split(as_pairs(df), 80, ev, 0, HoldOut(item_rows), False, n_queries=100,
                       cold_user_eligible=HoldOut(user_rows))
    out = with_sides(df, split)
    cold_users = np.flatnonzero(split.cold_users.numpy())
    cold_items = np.flatnonzero(split.cold_items.numpy())
    seen_users = df.q.unique()
    # reference: pandas unique / isin on the log
    assert len(cold_users) == round(0.2 * user_rows[seen_users].sum()) and user_rows[cold_users].all()
    assert not out[out.q.isin(cold_users)].side.isin(["train", "valid", "test"]).any()
    expected = df.index[df.q.isin(cold_users) & ~df.c.isin(cold_items)]
    assert np.array_equal(split.cold_user_test, expected.to_numpy())
    assert not out[out.side == "cold_test"].q.isin(cold_users).any()
    both = df.q.isin(cold_users) & df.c.isin(cold_items)
    assert (out[both].side == "none").all() and both.any()  # a held-out user with a held-out item: in no slice
    assert len(cold_items) == round(0.1 * item_rows[df.c.unique()].sum())


# ---------------------------------------------------------------- through prepare: files, groups, warm starts


def write_store(folder, n_users: int, n_items: int, seed: int, new_users: int = 0, new_items: int = 0):
    """A log of users x items with feature tables; the last new_users / new_items appear only in `full.csv`."""
    rng = np.random.default_rng(seed)
    pd.DataFrame({"user": np.arange(n_users), "age": rng.choice(["a", "b", "c"], n_users),
                  "size": rng.integers(1, 6, n_users)}).to_csv(folder / "users.csv", index=False)
    pd.DataFrame({"item": np.arange(n_items), "dept": rng.choice(["x", "y"], n_items),
                  "price": rng.random(n_items)}).to_csv(folder / "items.csv", index=False)
    n = 12 * (n_users + n_items)
    log = pd.DataFrame({"user": rng.integers(0, n_users, n), "item": rng.integers(0, n_items, n),
                        "order": np.arange(n) // 3})
    log.to_csv(folder / "full.csv", index=False)
    early = log[(log.user < n_users - new_users) & (log.item < n_items - new_items)]
    early.to_csv(folder / "early.csv", index=False)


def store_config(folder, log: str, **evaluation) -> C.Config:
    raw = {"interactions": {"path": log, "query_column": "user", "candidate_column": "item"},
           "users": {"path": "users.csv", "id_column": "user",
                     "features": [{"name": "age", "kind": "categorical"}, {"name": "size", "kind": "numeric"}]},
           "items": {"path": "items.csv", "id_column": "item",
                     "features": [{"name": "dept", "kind": "categorical"}, {"name": "price", "kind": "numeric"}]},
           "model": {"dim": 4, "hidden": [8]}, "evaluation": evaluation}
    return C.resolve(raw, folder)


@pytest.fixture(scope="module")
def warm_store(tmp_path_factory):
    """An earlier run's bundle (prepared and saved untrained: training does not change its id lists) on a log
    without the last 20 users and 20 items, and the folder whose full log adds them."""
    folder = tmp_path_factory.mktemp("warm_split")
    write_store(folder, 100, 80, seed=3, new_users=20, new_items=20)
    cfg = store_config(folder, "early.csv")
    data = prepare(cfg)
    model = build_model(data, cfg)
    save_bundle(folder / "model.pt", model, cfg.model, model.query_tower.inputs, model.candidate_tower.inputs,
                data.queries.encoders, data.candidates.encoders, False, {})
    return folder, load_bundle(folder / "model.pt")


def test_warm_start_draws_cold_entities_only_from_what_the_earlier_run_never_learned(warm_store):
    folder, previous = warm_store
    learned_items = set(previous.candidate_encoders.id_encoder.ids.tolist())
    learned_users = set(previous.query_encoders.id_encoder.ids.tolist())
    cfg = store_config(folder, "full.csv", cold_item_fraction=0.2, cold_user_fraction=0.15)
    # the leak, reproduced: drawn without regard to the earlier run, cold items include ones it learned
    fresh = prepare(cfg)
    leaked = [i for i in fresh.candidates.ids[fresh.cold_items.numpy()].tolist() if i in learned_items]
    assert leaked
    warm = prepare(cfg, previous)
    cold_items = warm.candidates.ids[warm.cold_items.numpy()].tolist()
    cold_users = warm.queries.ids[warm.cold_users.numpy()].tolist()
    assert len(cold_items) == round(0.2 * 80) and len(cold_users) == round(0.15 * 100)
    assert not set(cold_items) & learned_items and not set(cold_users) & learned_users  # reference: Python sets
    # the extended encoders keep every earlier id at its learned row: a leaked item would have had one, while
    # the cold ones map to the unknown row 0 (what the linear factor model and the towers' id input use)
    assert (warm.candidates.encoders.id_encoder.transform(np.array(leaked)) > 0).all()
    assert (warm.candidates.encoders.id_encoder.transform(np.array(cold_items)) == 0).all()
    assert (warm.queries.encoders.id_encoder.transform(np.array(cold_users)) == 0).all()
    assert len(warm.cold_user_test) and len(warm.cold_test)


@pytest.mark.parametrize("what, evaluation, numbers, most", [
    ("item", {"cold_item_fraction": 0.3}, "asks for 24 cold items, but only 20 of the 80 items", "0.25"),  # 20 / 80
    ("user", {"cold_user_fraction": 0.25}, "asks for 25 cold users, but only 20 of the 100 users", "0.2"),  # 20 / 100
])
def test_asking_for_more_cold_entities_than_are_new_is_one_clear_line(warm_store, what, evaluation, numbers, most):
    folder, previous = warm_store
    with pytest.raises(TowersError, match=numbers) as err:
        prepare(store_config(folder, "full.csv", **evaluation), previous)
    msg = str(err.value)
    assert "\n" not in msg and f"lower cold_{what}_fraction to at most {most}," in msg and f"add new {what}s" in msg
    assert "--init-from" in msg


def test_group_column_keeps_orders_together_through_prepare(tmp_path):
    write_store(tmp_path, 40, 30, seed=5)
    cfg = store_config(tmp_path, "full.csv", split="user_share", test_fraction=0.2)
    cfg = cfg.with_section("interactions", group_column="order")
    data = prepare(cfg)
    log = pd.read_csv(tmp_path / "full.csv")
    rows = {}
    for side in ("train", "valid", "test"):
        p = getattr(data, side)
        rows[side] = pd.DataFrame({"user": data.queries.ids[p.query.numpy()], "item": data.candidates.ids[p.candidate.numpy()]})
    # each order's rows found again in the slices by (user, item), for the pairs the log holds once
    # (reference: pandas groupby and merge)
    once = log.groupby(["user", "item"]).size()
    single = log.merge(once[once == 1].reset_index()[["user", "item"]])
    found = pd.concat([single.merge(r).assign(side=s) for s, r in rows.items()])
    assert found.groupby("order").side.nunique().max() == 1 and found.side.nunique() == 3


def test_a_missing_group_value_names_file_column_and_row(tmp_path):
    write_store(tmp_path, 10, 10, seed=1)
    log = pd.read_csv(tmp_path / "full.csv")
    log["order"] = log["order"].astype(object)
    log.loc[2, "order"] = None
    log.to_csv(tmp_path / "holes.csv", index=False)
    cfg = store_config(tmp_path, "holes.csv").with_section("interactions", group_column="order")
    with pytest.raises(TowersError, match=r"holes\.csv, column 'order', row 3: missing group value; every row needs one"):
        read_interactions(cfg)


@pytest.mark.parametrize("split", ["random", "time"])
def test_pairs_trained_before_stay_in_training_with_their_reverses(split):
    # a warm start: rows an earlier run trained on train again, each unordered pair whole; the fractions are
    # taken of the other pairs (reference: pandas groupby on the unordered pair)
    df = copurchase_log(seed=4)
    df = df.assign(lo=np.minimum(df.q, df.c), hi=np.maximum(df.q, df.c))
    fixed = np.random.default_rng(1).random(len(df)) < 0.3
    ev = EvaluationSection(split=split, test_fraction=0.2, validation_fraction=0.2)
    out = with_sides(df, make_split(as_pairs(df), 80, ev, seed=5, cold_eligible=None, item_item=True,
                                    trained_before=fixed))
    assert (out.side[fixed] == "train").all()
    pinned = set(map(tuple, df.loc[fixed, ["lo", "hi"]].to_numpy()))
    unit_pinned = np.array([(lo, hi) in pinned for lo, hi in zip(df.lo, df.hi)])
    assert (out.side[unit_pinned] == "train").all()  # a pinned row's reverse trains too
    assert out.groupby(["lo", "hi"]).side.nunique().max() == 1
    free_units = out[~unit_pinned].drop_duplicates(["lo", "hi"])
    assert (out[out.side == "test"].drop_duplicates(["lo", "hi"]).shape[0]) == round(0.2 * len(free_units))
    assert reverse_leaks(out[out.side == "test"], out[out.side == "train"]) == 0


def test_per_user_split_around_pairs_trained_before():
    # user_last over each user's rows the earlier run did not train on: the latest two of those are test
    df = user_log(seed=3, most=12)
    fixed = np.random.default_rng(2).random(len(df)) < 0.4
    ev = EvaluationSection(split="user_last", last_n=2, validation_fraction=0.0)
    out = with_sides(df, make_split(as_pairs(df), 200, ev, 0, None, False, n_queries=120, trained_before=fixed))
    assert (out.side[fixed] == "train").all()
    free = df[~fixed]
    rank = free.groupby("q").t.rank(method="first", ascending=False)  # reference: pandas rank among the free rows
    k = free.groupby("q").q.transform("size")
    # a user with rows trained before keeps those for training, so every other row may be held out (k, not k - 1)
    trained_before = free.q.isin(df.q[fixed])
    expected = np.where(rank <= np.minimum(2, k - (~trained_before).astype(int)), "test", "train")
    assert (out.side[~fixed].to_numpy() == expected).all()
    assert (trained_before & (k == 1) & (out.side[~fixed] == "test")).any()  # one new event, and it is tested


def test_pairs_trained_before_are_found_by_id_in_a_renumbered_catalog():
    # the new run's catalogs hold the earlier ids in another order, plus new ones (reference: Python sets of id pairs)
    from towers.data.splits import TrainedBefore

    rng = np.random.default_rng(3)
    old_q, old_c = np.array([10, 20, 30, 40]), np.array(["a", "b", "c"], dtype=object)
    earlier = TrainedBefore(old_q, old_c, rng.integers(0, 4, 25), rng.integers(0, 3, 25))
    new_q, new_c = np.array([40, 50, 10, 30, 20]), np.array(["c", "d", "a", "b"], dtype=object)
    q_rows, c_rows = rng.integers(0, 5, 200), rng.integers(0, 4, 200)
    got = earlier.mask(new_q, new_c, q_rows, c_rows)
    seen = set(zip(old_q[earlier.query_rows].tolist(), old_c[earlier.item_rows].tolist()))
    want = [(q, c) in seen for q, c in zip(new_q[q_rows].tolist(), new_c[c_rows].tolist())]
    assert got.tolist() == want and any(want) and not all(want)


def test_an_item_item_pair_trained_before_is_found_in_either_order():
    from towers.data.splits import TrainedBefore

    ids = np.array(["a", "b", "c", "d"], dtype=object)
    both = TrainedBefore(ids[:3], ids[:3], np.array([0, 1]), np.array([1, 2]))  # (a, b), (b, c)
    rows = np.array([1, 2, 0, 3]), np.array([0, 1, 2, 0])  # (b, a), (c, b), (a, c), (d, a)
    assert both.mask(ids, ids, *rows, unordered=True).tolist() == [True, True, False, False]
    assert both.mask(ids, ids, *rows, unordered=False).tolist() == [False, False, False, False]


def test_a_warm_start_that_leaves_few_test_pairs_says_so(tmp_path):
    # a trial warm-started with sessions as units: every session holding a pair the earlier run learned stays in
    # training whole, and the test slice shrank to 1,392 of 20,376 pairs without a word
    from towers.data.splits import TrainedBefore

    df = pd.DataFrame({"u": np.repeat(np.arange(100), 6), "i": np.random.default_rng(3).integers(0, 50, 600),
                       "s": np.repeat(np.arange(300), 2), "t": np.arange(600)})
    df.to_parquet(tmp_path / "log.parquet")
    raw = {"interactions": {"path": str(tmp_path / "log.parquet"), "query_column": "u", "candidate_column": "i",
                            "group_column": "s", "time_column": "t"},
           "evaluation": {"split": "user_recent", "test_fraction": 0.3, "validation_fraction": 0.0, "baseline": False}}
    cfg = C.resolve(raw, tmp_path)
    learned = df[df["s"] % 3 != 2].drop_duplicates("s")  # one pair of each user's first two sessions
    before = TrainedBefore(np.arange(100), np.arange(50), learned["u"].to_numpy(), learned["i"].to_numpy())
    data = prepare(cfg, trained_before=before)
    assert any(n.startswith("warm start: only 0.0% of the other pairs are test pairs (test_fraction 0.3)")
               for n in data.notes), data.notes
    assert not any("warm start: only" in n for n in prepare(cfg).notes)  # a fresh start holds out its share
    # user_last holds out last_n units a user, not test_fraction of them: no share to fall short of
    last = cfg.with_section("evaluation", split="user_last")
    assert not any("warm start: only" in n for n in prepare(last, trained_before=before).notes)


def test_zero_targets_under_the_softmax_are_warned(tmp_path):
    # the softmax is the default loss: a 0/1 label column that used to train logistic now teaches nothing on its 0s
    rng = np.random.default_rng(6)
    pd.DataFrame({"u": rng.integers(0, 30, 400), "i": rng.integers(0, 20, 400),
                  "y": (rng.random(400) < 0.3).astype(float)}).to_parquet(tmp_path / "log.parquet")
    raw = {"interactions": {"path": str(tmp_path / "log.parquet"), "query_column": "u", "candidate_column": "i",
                            "target_column": "y"}, "evaluation": {"baseline": False}}
    zeros = int((pd.read_parquet(tmp_path / "log.parquet")["y"] == 0).sum())
    said = [n for n in prepare(C.resolve(raw, tmp_path)).notes if "target 0" in n]
    assert said == [f"warning: {zeros:,} rows have target 0: the softmax learns from each row's own item against the "
                    "others, so a 0 row teaches nothing; where 0 means shown but not chosen, set training.loss: "
                    "logistic, which learns from it"]
    raw["training"] = {"loss": "logistic"}
    assert not [n for n in prepare(C.resolve(raw, tmp_path)).notes if "target 0" in n]


def test_a_per_user_split_that_holds_out_almost_nothing_says_so():
    # a new user's trial: orders as units under user_recent, most customers with fewer than 5 orders, left 16
    # validation and 51 test pairs; a per-user split holds out a user's units only once round(fraction x k) >= 1
    ev = EvaluationSection(split="user_recent", test_fraction=0.1, validation_fraction=0.1)
    k = np.arange(1, 5)  # 1 to 4 units a user
    assert (np.round(0.1 * k) == 0).all()  # reference: numpy's round, the README's count of held-out units
    note = thin_slices_note(ev, 16, 51)
    assert note.startswith("note: evaluation.split user_recent held out only 16 validation and 51 test pairs")
    assert thin_slices_note(ev, FEW_HELD_OUT, FEW_HELD_OUT) is None
    assert thin_slices_note(EvaluationSection(split="random"), 16, 51) is None  # a random split holds out its share
    no_validation = EvaluationSection(split="user_share", validation_fraction=0.0)
    assert "only 40 test pairs" in thin_slices_note(no_validation, 0, 40)
