"""The history bag of each user: its latest distinct training items, against pandas; histories given for
new users, against a plain Python walk."""

import numpy as np
import pandas as pd
import pytest
import torch

from towers.data.history import before, empty_history, history_bags, history_column, history_ids, without_targets
from towers.data.pairs import Pairs
from towers.errors import TowersError


def _log(seed=0, n=400, users=30, items=50):
    rng = np.random.default_rng(seed)
    return pd.DataFrame({"q": rng.integers(0, users, n), "c": rng.integers(0, items, n),
                         "t": rng.permutation(n)})


def test_bags_hold_each_users_latest_distinct_items_as_pandas_finds_them():
    df = _log()
    pairs = Pairs(torch.from_numpy(df.q.to_numpy()), torch.from_numpy(df.c.to_numpy()),
                  time=torch.from_numpy(df.t.to_numpy()))
    bags = history_column(pairs, 32, 50, limit=5)  # users 30 and 31 have no events
    # reference: pandas, each (user, item) at its latest time, the 5 latest per user
    latest = df.groupby(["q", "c"]).t.max().reset_index().sort_values(["q", "t"], ascending=[True, False])
    top = latest.groupby("q").head(5)
    for u in range(32):
        want = top[top.q == u].c.to_numpy() + 1
        got = bags[u].numpy()
        assert list(got[got > 0]) == list(want), u
        assert (got[len(want):] == 0).all()
    assert bags.shape == (32, 5)


def test_bag_times_are_each_items_latest_event_as_pandas_finds_them():
    df = _log(3)
    pairs = Pairs(torch.from_numpy(df.q.to_numpy()), torch.from_numpy(df.c.to_numpy()),
                  time=torch.from_numpy(df.t.to_numpy()))
    bags, times = history_column(pairs, 30, 50, limit=4, with_times=True)
    assert torch.equal(bags, history_column(pairs, 30, 50, limit=4))
    latest = df.groupby(["q", "c"]).t.max()  # reference: pandas, each (user, item)'s latest time
    for u in range(30):
        for place in range(4):
            item = int(bags[u, place])
            assert int(times[u, place]) == (latest[(u, item - 1)] if item else 0)


def test_past_only_bags_keep_the_items_chosen_before_each_pair():
    bags = torch.tensor([[3, 5, 8], [5, 2, 0]])
    bag_times = torch.tensor([[90, 40, 10], [70, 20, 0]])  # latest first, as history_column keeps them
    pair_times = torch.tensor([40, 100])  # the first pair happened at 40: items of 40 and 90 are its future
    assert before(bags, bag_times, pair_times).tolist() == [[0, 0, 8], [5, 2, 0]]


def test_a_pair_never_sees_its_own_item_in_its_bag():
    bags = torch.tensor([[3, 5, 0], [5, 2, 7], [1, 0, 0]])
    items = torch.tensor([4, 6, 9])  # as bag entries (row + 1): 5 in the first bag, 7 in the second, 10 nowhere
    assert without_targets(bags, items).tolist() == [[3, 0, 0], [5, 2, 0], [1, 0, 0]]
    assert empty_history(2).tolist() == [[0], [0]]


# ---------------------------------------------------------------- histories given for new users

def _reference_bags(histories, item_ids, trained, limit):
    """Brute force in plain Python: known, trained ids; each once at its latest place; the latest `limit`."""
    index = {v: i for i, v in enumerate(item_ids)}
    out = []
    for h in histories:
        rows = [index[v] for v in h if v in index and trained[index[v]]]
        latest = []
        for r in reversed(rows):
            if r not in latest:
                latest.append(r)
        out.append([r + 1 for r in latest[:limit]])
    return out


def test_given_histories_become_bags_as_a_plain_python_walk_finds_them():
    rng = np.random.default_rng(5)
    item_ids = np.arange(100, 140, dtype=np.int64)
    trained = rng.random(40) < 0.8
    histories = [list(rng.integers(95, 145, rng.integers(0, 9))) for _ in range(60)]  # some ids outside 100..139
    series = pd.Series([[int(v) for v in h] for h in histories], dtype=object)
    ids, rows = history_ids(series, "users.parquet", "h")
    bags, counts = history_bags(ids, rows, len(histories), item_ids, torch.from_numpy(trained), limit=4)
    want = _reference_bags(histories, list(item_ids), trained, 4)  # reference: the plain Python walk above
    for got, expected in zip(bags.numpy(), want):
        assert list(got[got > 0]) == expected
    flat = [v for h in histories for v in h]
    assert counts["unknown"] == sum(not 100 <= v < 140 for v in flat)
    assert counts["untrained"] == sum(100 <= v < 140 and not trained[v - 100] for v in flat)


@pytest.mark.parametrize("cells", [
    ["12|40 | 7", None, "", "40|12|40"],  # text joined by the separator (spaces around ids dropped)
    [[12, 40, 7], None, [], [40, 12, 40]],  # lists of numbers
    [["12", "40", "7"], None, [], ["40", "12", "40"]],  # lists of text
])
def test_history_cells_as_text_or_lists_read_alike(cells):
    ids, rows = history_ids(pd.Series(cells, dtype=object), "users.csv", "h")
    bags, _ = history_bags(ids, rows, 4, np.array([7, 12, 40], dtype=np.int64), torch.ones(3, dtype=torch.bool), 2)
    # worked by hand: row 0 keeps its two latest (7, 40), row 3 keeps 40 (latest) and 12
    assert bags.tolist() == [[1, 3], [0, 0], [0, 0], [3, 2]]


def test_text_item_ids_and_one_id_per_cell():
    ids, rows = history_ids(pd.Series(["b", None, "a"]), "users.csv", "h")  # one id per cell, as text
    bags, counts = history_bags(ids, rows, 3, np.array(["a", "b"], dtype=object), torch.ones(2, dtype=torch.bool), 3)
    assert bags.tolist() == [[2], [0], [1]] and counts == {"unknown": 0, "untrained": 0}
    _, counts = history_bags(np.array(["b", "a;b"], dtype=object), np.array([0, 1]), 2, np.array(["a", "b"], dtype=object),
                             torch.ones(2, dtype=torch.bool), 3)
    assert counts == {"unknown": 1, "untrained": 0, "first_unknown": "a;b"}  # the one to show in the warning
    ids, rows = history_ids(pd.Series([3.0, np.nan]), "users.csv", "h")  # whole numbers read as floats
    assert ids.tolist() == [3] and rows.tolist() == [0]


@pytest.mark.parametrize("cells,message", [
    ([[1, 2], "3|4"], r"users.csv, column 'h': mixes id lists, text and numbers"),
    ([1.5, 2.0], r"users.csv, column 'h', row 1: item id 1.5 is not a whole number"),
    ([{"a": 1}], r"users.csv, column 'h', row 1: holds .* values, not item ids"),
])
def test_bad_history_cells_are_one_line_errors(cells, message):
    with pytest.raises(TowersError, match=message):
        history_ids(pd.Series(cells, dtype=object), "users.csv", "h")
