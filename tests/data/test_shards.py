"""The log divided among data-parallel processes by user (towers/data/shards.py).

Reference for the two-process checks: one process preparing the same config (the project's own
path, itself checked against numpy and scikit-learn elsewhere). Under the per-user time split
(`user_recent`) a user's sides depend on that user's events alone, so the divided split must be the
one-process split pair for pair, and everything summed over processes (which entities have training
events, the held-out entities, the query histories) must equal the one-process value exactly.
"""

from __future__ import annotations

import contextlib
import json
import os
import signal
import subprocess
import sys
import time
from collections import Counter
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import torch
import yaml

from towers import config as C
from towers.data.groups import group_labels
from towers.data.prepare import prepare, read_interactions
from towers.data.shards import Shard, owners, whole_log_reason
from towers.evaluation.protocol import evaluate_slices, popularity_scorer, reference_scorers
from towers.runs.folder import RunFolder
from towers.training.distributed import rehearsal_endpoint

from ..conftest import ROOT


def _config(store, folder, **evaluation) -> C.Config:
    cfg = {
        "run": {"seed": 2, "threads": 1},
        "interactions": {"path": str(store / "orders.csv"), "query_column": "customer_id",
                         "candidate_column": "product_id", "time_column": "ordered_at"},
        "items": {"path": str(store / "items.parquet"), "id_column": "item_id",
                  "features": [{"name": "department", "kind": "categorical"}, {"name": "price", "kind": "numeric"}]},
        "users": {"path": str(store / "customers.csv"), "id_column": "customer_id",
                  "features": [{"name": "age_band", "kind": "categorical"}]},
        "model": {"dim": 8, "hidden": [16], "history_length": 6, "history_past_only": True},
        "training": {"loss": "softmax", "epochs": 1, "validate_queries": 100000},
        "evaluation": {"split": "user_recent", "cold_item_fraction": 0.1, "cold_user_fraction": 0.1,
                       "baseline": True, **evaluation},
        "report": {"enabled": False},
    }
    path = folder / "divided.yaml"
    path.write_text(yaml.safe_dump(cfg))
    return C.load(path)


def test_every_user_goes_to_one_process_and_the_hash_spreads_them():
    ids = np.array([f"c{i}" for i in range(997)], dtype=object)
    who = owners(ids, 3)
    assert set(np.unique(who)) == {0, 1, 2}
    # the hash spreads 997 users about evenly: each share within 4 standard deviations of 997/3
    # (binomial, sd = sqrt(997 * 1/3 * 2/3) = 14.9)
    sizes = np.bincount(who, minlength=3)
    assert all(abs(s - 997 / 3) < 4 * 14.9 for s in sizes), sizes


def test_units_are_dealt_out_in_turn():
    turns = [Shard(r, 3).turns() for r in range(3)]
    taken = [[t() for _ in range(8)] for t in turns]
    assert [sum(col) for col in zip(*taken)] == [1] * 8  # each unit read by exactly one process
    assert taken[1] == [False, True, False, False, True, False, False, True] and turns[1].unit == 7


def test_owners_agree_for_the_same_ids_in_any_order_or_piece():
    ids = np.arange(5000, dtype=np.int64) * 7919
    whole = owners(ids, 4)
    shuffled = np.random.default_rng(0).permutation(len(ids))
    assert (owners(ids[shuffled], 4) == whole[shuffled]).all()
    assert (owners(ids[:100], 4) == whole[:100]).all()
    assert set(np.unique(whole)) == {0, 1, 2, 3}


def test_runs_that_need_every_event_read_the_whole_log(small_store, tmp_path):
    cfg = _config(small_store, tmp_path)
    assert whole_log_reason(cfg) is None  # the gradient baseline divides
    assert "ALS" in whole_log_reason(cfg.with_section("evaluation", baseline_solver="weighted_als"))
    assert whole_log_reason(cfg.with_section("run", divide_log=False)) == "run.divide_log is false"
    assert "item_item" in whole_log_reason(cfg.with_section("run", mode="item_item"))


# each process prepares the config and evaluates popularity and the references with the divided share,
# then saves what the test compares with one process
_PROCESS = r"""
import sys, torch
from towers import config as C
from towers.data.prepare import prepare
from towers.evaluation.protocol import evaluate_slices, popularity_scorer, reference_scorers
from towers.data.groups import group_labels
from towers.training import distributed
distributed.start()
import towers.data.prepare as P
from towers.data.prepare import read_interactions
from towers.data.shards import log_shard
P.LOG_PIECE_ROWS = 700  # the log in units of 700 rows, dealt out in turns
cfg = C.load(sys.argv[1])
log = read_interactions(cfg, shard=log_shard(cfg))
read = {"q_ids": log.query_ids.uniques, "c_ids": log.candidate_ids.uniques, "query": log.query, "candidate": log.candidate,
        "time": log.time}
data = prepare(cfg)
share = distributed.evaluation_share(divided=data.divided)
n_q, n_c = len(data.queries.ids), len(data.candidates.ids)
scorers = {"popularity": popularity_scorer(data.train, n_q, n_c, False, divided=data.divided)}
refs, info = reference_scorers(data.split, n_q, n_c, cfg, share=share)
metrics = evaluate_slices(scorers | refs, data.split, cfg, reference_info=info, share=share)
groups = group_labels(cfg.with_section("evaluation", group_metrics_by=["age_band", "department"]), data.queries.ids,
                      data.candidates.ids)
grouped = evaluate_slices(scorers | refs, data.split, cfg, reference_info=info, groups=groups, share=share)
s = data.split
timed = prepare(cfg.with_section("evaluation", split="time"))  # the whole log's cut-off, ties in the log's order
torch.save({"divided": data.divided, "read": read, "metrics": metrics, "grouped": grouped,
            "time_pairs": {n: torch.stack([getattr(timed.split, n).query, getattr(timed.split, n).candidate,
                                           getattr(timed.split, n).time]) for n in ("train", "valid", "test")},
            "history": data.queries.block["(history)"], "history_times": data.history_times,
            "warm": s.warm_items, "cold_items": s.cold_items, "cold_users": s.cold_users,
            "pairs": {n: torch.stack([getattr(s, n).query, getattr(s, n).candidate, getattr(s, n).time])
                      for n in ("train", "valid", "test", "cold_test", "cold_user_test")}},
           sys.argv[2])
distributed.stop()
"""


@pytest.fixture(scope="module")
def two_processes(small_store, tmp_path_factory):
    folder = tmp_path_factory.mktemp("divided")
    cfg = _config(small_store, folder)
    host, port = rehearsal_endpoint().split(":")
    procs = []
    for rank in range(2):
        env = dict(os.environ, RANK=str(rank), WORLD_SIZE="2", LOCAL_WORLD_SIZE="2", MASTER_ADDR=host,
                   MASTER_PORT=port, OMP_NUM_THREADS="1",
                   PYTHONPATH=os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")]))
        procs.append(subprocess.Popen([sys.executable, "-c", _PROCESS, str(folder / "divided.yaml"),
                                       str(folder / f"rank{rank}.pt")], env=env, stderr=subprocess.PIPE, text=True))
    errors = [p.communicate(timeout=300)[1] for p in procs]
    assert [p.returncode for p in procs] == [0, 0], [e[-2000:] for e in errors]
    return cfg, [torch.load(folder / f"rank{r}.pt", weights_only=False) for r in range(2)]


def test_processes_read_the_whole_log_between_them_numbered_and_ordered_as_one_process(two_processes):
    """Each process reads every other unit of the log; between them they hold every row once, each its own
    users' rows in the log's order, every process with the one-process id numbering."""
    cfg, parts = two_processes
    whole = read_interactions(cfg)
    rows = Counter()
    for p in parts:
        got = p["read"]
        assert (got["q_ids"] == whole.query_ids.uniques).all() and (got["c_ids"] == whole.candidate_ids.uniques).all()
        # its users' rows, in the log's order: the whole log's rows of those users, in order
        mine = np.isin(whole.query, np.unique(got["query"]))
        assert (got["query"] == whole.query[mine]).all() and (got["candidate"] == whole.candidate[mine]).all()
        assert (got["time"] == whole.time[mine]).all()
        rows.update(got["query"].tolist())
    assert rows == Counter(whole.query.tolist())  # no user in two processes, no row lost


def test_a_log_of_several_parquet_row_groups_is_read_in_turns(tmp_path):
    """The first row of each piece counts the row groups another process reads (errors name the file's row)."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    from towers.data.tables import read_table_chunks

    table = pa.table({"u": np.arange(10), "i": np.arange(10) * 2})
    pq.write_table(table, tmp_path / "log.parquet", row_group_size=3)  # groups of 3, 3, 3, 1 rows
    got = [(start, df["u"].tolist()) for start, df in
           read_table_chunks(tmp_path / "log.parquet", ["u", "i"], 2, take=Shard(1, 2).turns())]
    assert got == [(3, [3, 4]), (5, [5]), (9, [9])]
    csv = tmp_path / "log.csv"
    table.to_pandas().to_csv(csv, index=False)
    got = [(start, df["u"].tolist()) for start, df in read_table_chunks(csv, ["u", "i"], 4, take=Shard(0, 2).turns())]
    assert got == [(0, [0, 1, 2, 3]), (8, [8, 9])]


def _rows(t: torch.Tensor) -> Counter:
    return Counter(map(tuple, t.T.tolist()))


def test_divided_split_is_the_one_process_split_pair_for_pair(two_processes):
    cfg, parts = two_processes
    one = prepare(cfg)
    assert all(p["divided"] for p in parts)
    for name in ("train", "valid", "test", "cold_test", "cold_user_test"):
        mine = [_rows(p["pairs"][name]) for p in parts]
        assert not set(mine[0]) & set(mine[1])  # no pair in both processes
        ref = getattr(one.split, name)
        assert mine[0] + mine[1] == _rows(torch.stack([ref.query, ref.candidate, ref.time])), name
    for p in parts:  # summed over processes: every process holds the one-process masks and histories
        assert torch.equal(p["warm"], one.warm_items)
        assert torch.equal(p["cold_items"], one.split.cold_items)
        assert torch.equal(p["cold_users"], one.split.cold_users)
        assert torch.equal(p["history"], one.queries.block["(history)"])
        assert torch.equal(p["history_times"], one.history_times)  # model.history_past_only's bag times


def test_divided_time_split_is_the_one_process_split_pair_for_pair(two_processes):
    """split: time over a divided log: one cut-off over every process's events (the orders' lines share their
    order's time, so ties are broken by the log's order, as one process breaks them)."""
    cfg, parts = two_processes
    one = prepare(cfg.with_section("evaluation", split="time")).split
    for name in ("train", "valid", "test"):
        ref = getattr(one, name)
        assert len(ref) > 0, name
        assert _rows(parts[0]["time_pairs"][name]) + _rows(parts[1]["time_pairs"][name]) == \
            _rows(torch.stack([ref.query, ref.candidate, ref.time])), name


def test_divided_evaluation_gives_every_process_the_one_process_metrics(two_processes):
    """Popularity, EASE and item-kNN on every slice: the same counts, so the same metrics up to the
    order in which per-query values are summed (the reference is one process evaluating everything)."""
    cfg, parts = two_processes
    one = prepare(cfg)
    n_q, n_c = len(one.queries.ids), len(one.candidates.ids)
    refs, info = reference_scorers(one.split, n_q, n_c, cfg)
    expected = evaluate_slices({"popularity": popularity_scorer(one.train, n_q, n_c, False)} | refs, one.split, cfg,
                               reference_info=info)
    groups = group_labels(cfg.with_section("evaluation", group_metrics_by=["age_band", "department"]), one.queries.ids,
                          one.candidates.ids)
    grouped = evaluate_slices({"popularity": popularity_scorer(one.train, n_q, n_c, False)} | refs, one.split, cfg,
                              reference_info=info, groups=groups)
    # without groups each process's sums are summed; with groups the rankings are joined (protocol.py)
    for key, want in (("metrics", expected), ("grouped", grouped)):
        assert parts[0][key] == parts[1][key]  # every process holds the same numbers
        got = parts[0][key]
        assert json.dumps(got["references"], sort_keys=True) == json.dumps(want["references"], sort_keys=True)
        for slice_name in ("warm", "cold", "cold_users"):
            assert set(got[slice_name]) == set(want[slice_name]), slice_name
            for model, values in want[slice_name].items():
                assert got[slice_name][model] == pytest.approx(values, rel=1e-9, abs=1e-12), (key, slice_name, model)
    assert grouped["groups"]["age_band"] and grouped["groups"]["department"]
    for column, models in grouped["groups"].items():
        for model, rows in models.items():
            for group, values in rows.items():
                assert parts[0]["grouped"]["groups"][column][model][group] == pytest.approx(values, rel=1e-9), group


def _descendants(pid: int) -> list[int]:
    """Every process below `pid`, from /proc (Linux), children before their own children."""
    parent = {}
    for entry in os.listdir("/proc"):
        if entry.isdigit():
            with contextlib.suppress(OSError, ValueError, IndexError):  # gone meanwhile
                stat = Path(f"/proc/{entry}/stat").read_text()
                parent[int(entry)] = int(stat.rsplit(")", 1)[1].split()[1])
    out, frontier = [], [pid]
    while frontier:
        frontier = [p for p, pp in parent.items() if pp in frontier]
        out += frontier
    return out


@pytest.mark.slow  # torchrun processes
@pytest.mark.skipif(not os.path.isdir("/proc"), reason="finds torchrun's workers through /proc")
def test_two_workers_train_on_divided_data_like_one_process(small_store, tmp_path):
    """`towers train --workers 2` with the log divided: the run folder holds the one-process split (pairs.pt,
    pair for pair) and the one-process reference metrics; the towers and the linear factor model take
    different batches (each process draws from its own users), so they differ like two runs of one
    process with different shuffles: held within 10% (seen: 2% and 4% on this config)."""
    cfg_path = tmp_path / "divided.yaml"
    _config(small_store, tmp_path)
    raw = yaml.safe_load(cfg_path.read_text())
    raw["training"]["epochs"] = 3
    raw["training"]["progress"] = "plain"
    cfg_path.write_text(yaml.safe_dump(raw))
    env = dict(os.environ, OMP_NUM_THREADS="1", PYTHONPATH=os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")]))
    for name, extra in (("one", []), ("two", ["--workers", "2"])):
        proc = subprocess.run([sys.executable, "-m", "towers", "train", str(cfg_path), "--out", str(tmp_path / name),
                               *extra], capture_output=True, text=True, timeout=600, env=env)
        assert proc.returncode == 0, proc.stderr[-2000:]
    assert "divided among 2 processes" in proc.stderr
    one, two = RunFolder(tmp_path / "one").read_pairs(), RunFolder(tmp_path / "two").read_pairs()
    assert (one.query_ids == two.query_ids).all() and (one.item_ids == two.item_ids).all()
    for name in ("train", "valid", "test", "cold_test", "cold_user_test"):
        a, b = getattr(one.split, name), getattr(two.split, name)
        assert _rows(torch.stack([a.query, a.candidate, a.time])) == _rows(torch.stack([b.query, b.candidate, b.time]))
    m1 = json.loads((tmp_path / "one" / "metrics.json").read_text())
    m2 = json.loads((tmp_path / "two" / "metrics.json").read_text())
    for model in ("popularity", "ease", "item_knn"):
        assert m2["warm"][model] == pytest.approx(m1["warm"][model], rel=1e-9), model
    for model in ("towers", "linear_factor"):
        for metric in ("recall@20", "ndcg@20"):
            a, b = m1["warm"][model][metric], m2["warm"][model][metric]
            assert abs(b - a) / a < 0.10, (model, metric, a, b)

    # killed once the first epoch's checkpoint is written, then resumed: the very weights of the uninterrupted
    # run, each process going on with its own random state (its id dropout and negatives), not process 0's
    env["TMPDIR"] = str(tmp_path)  # the other process's scratch folder, left behind by the kill
    killed = tmp_path / "killed"
    proc = subprocess.Popen([sys.executable, "-m", "towers", "train", str(cfg_path), "--out", str(killed),
                             "--workers", "2"], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, env=env)
    last = tmp_path / "killed.partial" / "checkpoints" / "last.pt"
    deadline = time.time() + 300
    while not last.exists() and proc.poll() is None and time.time() < deadline:
        time.sleep(0.02)
    for pid in [proc.pid, *_descendants(proc.pid)]:  # every process at once, as when the machine fails
        with contextlib.suppress(ProcessLookupError):
            os.kill(pid, signal.SIGKILL)
    proc.wait()
    assert last.exists() and not killed.exists()
    proc = subprocess.run([sys.executable, "-m", "towers", "train", str(cfg_path), "--out", str(killed), "--workers",
                           "2", "--resume"], capture_output=True, text=True, timeout=600, env=env)
    assert proc.returncode == 0, proc.stderr[-2000:]
    assert "resuming at epoch" in proc.stderr
    for model in ("model.pt", "linear_factor/model.pt"):
        want = torch.load(tmp_path / "two" / model, weights_only=True)["state_dict"]
        got = torch.load(killed / model, weights_only=True)["state_dict"]
        assert want.keys() == got.keys() and all(torch.equal(want[k], got[k]) for k in want), model


@pytest.mark.slow  # torchrun processes
def test_a_process_without_users_of_its_own_still_takes_part(tmp_path):
    """One user in the whole log: one process holds every pair, the other none; the run ends as one process's
    does (the same held-out pairs counted, the same note about them)."""
    rng = np.random.default_rng(0)
    n = 400
    pd.DataFrame({"u": ["solo"] * n, "i": rng.integers(0, 60, n), "t": np.arange(n)}).to_csv(tmp_path / "log.csv",
                                                                                          index=False)
    (tmp_path / "solo.yaml").write_text(yaml.safe_dump({
        "run": {"seed": 1, "threads": 1},
        "interactions": {"path": "log.csv", "query_column": "u", "candidate_column": "i", "time_column": "t"},
        "model": {"dim": 4, "hidden": [8]}, "training": {"loss": "softmax", "epochs": 2, "batch_size": 64},
        "evaluation": {"split": "user_recent"}, "report": {"enabled": False}}))
    env = dict(os.environ, OMP_NUM_THREADS="1", PYTHONPATH=os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")]))
    out = {}
    for name, extra in (("one", []), ("two", ["--workers", "2"])):
        proc = subprocess.run([sys.executable, "-m", "towers", "train", "solo.yaml", "--out", name, *extra],
                              capture_output=True, text=True, timeout=600, env=env, cwd=tmp_path)
        assert proc.returncode == 0, proc.stderr[-2000:]
        out[name] = json.loads((tmp_path / name / "metrics.json").read_text())
    assert out["two"]["notes"] == out["one"]["notes"]
    assert out["two"]["warm"] == out["one"]["warm"]
    assert not any(out["two"]["warm"].values())  # nothing left to rank: every item of the user is known
