"""The history bag of each user: its latest distinct training items, against pandas."""

import numpy as np
import pandas as pd
import torch

from towers.data.history import empty_history, history_column, without_targets
from towers.data.pairs import Pairs


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


def test_a_pair_never_sees_its_own_item_in_its_bag():
    bags = torch.tensor([[3, 5, 0], [5, 2, 7], [1, 0, 0]])
    items = torch.tensor([4, 6, 9])  # as bag entries (row + 1): 5 in the first bag, 7 in the second, 10 nowhere
    assert without_targets(bags, items).tolist() == [[3, 0, 0], [5, 2, 0], [1, 0, 0]]
    assert empty_history(2).tolist() == [[0], [0]]
