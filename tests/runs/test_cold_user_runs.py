"""The cold-user slice in run folders: pairs.pt writes and reads it (and older files without it still read),
and a run holding out users and splitting by each user's last events reports and re-evaluates the slice."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import torch

import towers
from towers.data.pairs import Pairs, SplitPairs
from towers.evaluation.protocol import SLICES
from towers.runs.folder import RunFolder


def small_split() -> SplitPairs:
    g = torch.Generator().manual_seed(0)
    pairs = lambda n, hi=20: Pairs(torch.randint(0, hi, (n,), generator=g), torch.randint(0, 30, (n,), generator=g))  # noqa: E731
    cold_users = torch.zeros(25, dtype=torch.bool)
    cold_users[20:] = True
    return SplitPairs(pairs(50), pairs(5), pairs(6), pairs(3), torch.ones(30, dtype=torch.bool),
                      torch.zeros(30, dtype=torch.bool), False,
                      Pairs(torch.tensor([20, 21, 24]), torch.tensor([1, 2, 3])), cold_users)


def test_pairs_file_keeps_the_cold_user_slice(tmp_path):
    folder = RunFolder(tmp_path)
    split = small_split()
    folder.write_pairs(np.arange(25), np.arange(30), split)
    raw = torch.load(tmp_path / RunFolder.PAIRS, weights_only=True)  # reference: torch.load, towers' reader aside
    assert torch.equal(raw["cold_user_test"]["query"], torch.tensor([20, 21, 24]))
    back = folder.read_pairs().split
    assert torch.equal(back.cold_user_test.query, split.cold_user_test.query)
    assert torch.equal(back.cold_user_test.candidate, split.cold_user_test.candidate)
    assert torch.equal(back.cold_users, split.cold_users)


def test_a_pairs_file_written_before_the_cold_user_slice_still_reads(tmp_path):
    folder = RunFolder(tmp_path)
    folder.write_pairs(np.arange(25), np.arange(30), small_split())
    raw = torch.load(tmp_path / RunFolder.PAIRS, weights_only=True)
    del raw["cold_user_test"], raw["cold_users"]  # the layout before the slice existed
    torch.save(raw, tmp_path / RunFolder.PAIRS)
    back = folder.read_pairs().split
    assert len(back.cold_user_test) == 0
    assert back.cold_users.dtype == torch.bool and len(back.cold_users) == 25 and not back.cold_users.any()


@pytest.mark.slow  # trains a tiny run
def test_a_run_with_cold_users_and_last_events_reports_every_slice(tiny_runs):
    run_dir = tiny_runs.train(evaluation={"split": "user_last", "last_n": 2, "cold_user_fraction": 0.1},
                              interactions={"group_column": "purchased_at"})
    metrics = json.loads((run_dir / "metrics.json").read_text())
    assert [s for s in metrics if s in SLICES] == ["warm", "cold", "cold_users"]
    assert set(metrics["cold_users"]) == {"popularity", "linear_factor", "towers", "oracle"}
    pairs = torch.load(run_dir / "pairs.pt", weights_only=True)  # reference: torch.load of the saved split
    cold = np.flatnonzero(pairs["cold_users"].numpy())
    assert len(cold) and np.isin(pairs["cold_user_test"]["query"].numpy(), cold).all()
    for side in ("train", "valid", "test", "cold_test"):
        assert not np.isin(pairs[side]["query"].numpy(), cold).any(), side
    run = towers.load(run_dir)
    again = run.evaluate()["metrics"]
    for model, values in metrics["cold_users"].items():
        for name, value in values.items():
            assert again["cold_users"][model][name] == pytest.approx(value, abs=1e-5), (model, name)
    # a new log: the held-out users' pairs with warm items form the cold_users slice again
    log_path = run.config.interactions.path
    fresh = run.evaluate(log_path)["metrics"]
    log = pd.read_parquet(log_path)  # reference: pandas filter on the log itself
    cold_ids = np.asarray(pairs["query_ids"])[cold]
    warm_ids = np.asarray(pairs["item_ids"])[pairs["warm_items"].numpy()]
    expected = log[log.customer_id.isin(cold_ids) & log.item_id.isin(warm_ids)].customer_id.nunique()
    assert fresh["cold_users"]["towers"]["queries"] == expected


def test_a_pairs_file_of_several_processes_reads_as_their_pairs_one_after_another(tmp_path):
    # a divided log's process 0 writes each column as its parts (the other processes' as they came), never
    # joined; reading gives what one process writes for the joined pairs (reference: torch.cat of the parts)
    folder, joined = RunFolder(tmp_path / "parts"), RunFolder(tmp_path / "joined")
    folder.path.mkdir(), joined.path.mkdir()
    own, other = small_split(), small_split()
    other.train = Pairs(other.train.query[:7], other.train.candidate[:7], time=torch.arange(7))
    own.train = Pairs(own.train.query, own.train.candidate, time=torch.arange(len(own.train)))
    folder.write_pairs(np.arange(25), np.arange(30), own, [other])
    raw = torch.load(tmp_path / "parts" / RunFolder.PAIRS, weights_only=True)
    assert raw["version"] == 2 and [len(t) for t in raw["train"]["query"]] == [50, 7]
    whole = {name: Pairs(*[None if getattr(getattr(own, name), c) is None else
                           torch.cat([getattr(getattr(own, name), c), getattr(getattr(other, name), c)])
                           for c in ("query", "candidate", "target", "weight", "time")])
             for name in ("train", "valid", "test", "cold_test", "cold_user_test")}
    joined.write_pairs(np.arange(25), np.arange(30), SplitPairs(
        whole["train"], whole["valid"], whole["test"], whole["cold_test"], own.warm_items, own.cold_items,
        own.item_item, whole["cold_user_test"], own.cold_users))
    a, b = folder.read_pairs().split, joined.read_pairs().split
    for name in whole:
        for column in ("query", "candidate", "time"):
            x, y = getattr(getattr(a, name), column), getattr(getattr(b, name), column)
            assert (x is None and y is None) or torch.equal(x, y), (name, column)
    assert folder.read_pairs_payload()["train"]["time"].tolist() == list(range(50)) + list(range(7))
