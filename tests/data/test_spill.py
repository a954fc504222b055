"""The log's long columns on disk (run.spill_folder, data/spill.py) and the epoch order that reads them
in blocks (training/order.py).

Reference for the data checks: the same config prepared in memory, whose reading is itself checked
against pandas.read_csv / read_parquet and pandas.factorize in test_log_pieces.py; a spill must change
where the arrays live, never a value. The order checks are against the definition of a permutation
(numpy.sort of the visited positions equals numpy.arange).
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import torch

from towers import config as C
from towers.data import prepare as P
from towers.data.spill import Column, Spill
from towers.errors import TowersError
from towers.training import order as O


def _log(n: int, seed: int) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    return pd.DataFrame({
        "user": rng.integers(0, 60, n) * 3,
        "item": [f"sku-{i}" for i in rng.integers(0, 80, n)],
        "weight": rng.random(n),
        "when": pd.Timestamp("2026-01-01") + pd.to_timedelta(rng.integers(0, 10 ** 6, n), unit="s"),
    })


def _items(ids) -> pd.DataFrame:
    ids = sorted(set(ids))
    return pd.DataFrame({"item": ids, "shelf": [f"s{hash(i) % 5}" for i in ids]})


def _config(folder, split: str, spill=None, mode: str = "user_item") -> C.Config:
    raw = {"run": {"mode": mode, "spill_folder": None if spill is None else str(spill)},
           "interactions": {"path": "log.parquet", "query_column": "user", "candidate_column": "item",
                            "weight_column": "weight", "time_column": "when"},
           "items": {"path": "items.csv", "id_column": "item", "features": [{"name": "shelf", "kind": "categorical"}]},
           "evaluation": {"split": split, "cold_item_fraction": 0.1}}
    if mode == "item_item":
        raw["interactions"] = {"path": "pairs.parquet", "query_column": "a", "candidate_column": "b"}
        raw["evaluation"] = {"cold_item_fraction": 0.1}
    return C.resolve(raw, folder)


def _same_prepared(a: P.Prepared, b: P.Prepared) -> None:
    for name in ("train", "valid", "test", "cold_test", "cold_user_test"):
        x, y = getattr(a, name), getattr(b, name)
        for col in ("query", "candidate", "target", "weight", "time"):
            u, v = getattr(x, col), getattr(y, col)
            assert (u is None) == (v is None), (name, col)
            if u is not None:
                assert u.dtype == v.dtype and torch.equal(u, v), (name, col)
    for side in ("queries", "candidates"):
        p, q = getattr(a, side), getattr(b, side)
        np.testing.assert_array_equal(p.ids, q.ids)
        assert p.block.keys() == q.block.keys()
        assert all(torch.equal(p.block[k], q.block[k]) for k in p.block)
    assert torch.equal(a.warm_items, b.warm_items) and torch.equal(a.cold_items, b.cold_items)


@pytest.mark.parametrize("split", ["random", "user_recent"])
def test_a_spilled_log_prepares_to_the_same_pairs_and_leaves_no_file(tmp_path, monkeypatch, split):
    log = _log(3000, seed=3)
    log.to_parquet(tmp_path / "log.parquet", index=False)
    _items(log["item"]).to_csv(tmp_path / "items.csv", index=False)
    spill = tmp_path / "spill"
    spill.mkdir()
    monkeypatch.setattr(P, "LOG_PIECE_ROWS", 700)  # several pieces, so codes are written piece by piece
    monkeypatch.setattr("towers.data.spill.CHUNK", 333)  # and copied in several chunks
    in_memory = P.prepare(_config(tmp_path, split))
    on_disk = P.prepare(_config(tmp_path, split, spill))
    _same_prepared(in_memory, on_disk)
    assert list(spill.iterdir()) == []  # every file unlinked as soon as it was mapped
    maps = Path("/proc/self/maps").read_text() if sys.platform.startswith("linux") else ""
    if maps:  # the training pairs are mapped from the spill folder's (deleted) files
        assert str(spill) in maps


def test_item_pairs_spilled_equal_item_pairs_in_memory(tmp_path):
    rng = np.random.default_rng(4)
    pairs = pd.DataFrame({"a": [f"sku-{i}" for i in rng.integers(0, 50, 1500)],
                          "b": [f"sku-{i}" for i in rng.integers(0, 50, 1500)]})
    pairs.to_parquet(tmp_path / "pairs.parquet", index=False)
    _items(list(pairs["a"]) + list(pairs["b"])).to_csv(tmp_path / "items.csv", index=False)
    spill = tmp_path / "spill"
    spill.mkdir()
    _same_prepared(P.prepare(_config(tmp_path, "random", mode="item_item")),
                   P.prepare(_config(tmp_path, "random", spill, mode="item_item")))


def test_a_missing_spill_folder_is_named_with_the_fix(tmp_path):
    with pytest.raises(TowersError, match=r"run.spill_folder .*nope: no such folder; create it"):
        Spill(tmp_path / "nope")


def test_a_full_spill_disk_is_a_clear_error_not_a_crash(tmp_path, monkeypatch):
    import errno
    import os

    def full(*args):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(os, "posix_fallocate", full, raising=False)
    with pytest.raises(TowersError, match=r"run.spill_folder .*: cannot hold 0.0 GiB more \(No space left on device\); "
                                          r"free room there"):
        Spill(tmp_path).empty(1000, np.int64)
    assert list(tmp_path.iterdir()) == []


def test_spill_arrays_and_columns_hold_what_was_put_in(tmp_path, monkeypatch):
    monkeypatch.setattr("towers.data.spill.CHUNK", 7)
    spill = Spill(tmp_path)
    values = np.arange(50, dtype=np.int32) * 3
    keep = values % 2 == 0
    np.testing.assert_array_equal(spill.copy(values, np.int64), values.astype(np.int64))
    np.testing.assert_array_equal(spill.where(values, keep), values[keep])
    np.testing.assert_array_equal(spill.lookup(values, np.array([4, 0, 49, 4])), values[[4, 0, 49, 4]])
    column = Column(spill, np.float64)
    for part in np.array_split(np.linspace(0, 1, 31), 4):
        column.add(part)
    np.testing.assert_array_equal(column.finish(), np.linspace(0, 1, 31))
    assert len(Column(spill, np.int32).finish()) == 0 and len(spill.empty(0, np.int64)) == 0
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize("n, window", [(100_000, 3 * O.BLOCK), (O.BLOCK * 5, O.BLOCK), (1234, 1 << 20), (1, O.BLOCK)])
def test_a_windowed_epoch_visits_every_pair_once_a_block_at_a_time(n, window):
    order = O.Windowed(n, window, seed=11)
    size = 1000
    batches = [order.batch(s, size) for s in range((n + size - 1) // size)]
    seen = torch.cat(batches).numpy()
    np.testing.assert_array_equal(np.sort(seen), np.arange(n))
    # each window's positions fall in at most window / BLOCK blocks of the log
    per_window = max(1, window // O.BLOCK)
    for w in range(len(order.window_ends)):
        blocks = np.unique(order.window(w).numpy() // O.BLOCK)
        assert len(blocks) <= per_window
    # a checkpoint's saved order draws the very same batches again (resume mid-epoch)
    again = O.restore(order.saved())
    assert all(torch.equal(again.batch(s, size), b) for s, b in enumerate(batches))


def test_windows_mix_pairs_from_far_apart_in_the_log():
    n, window = 64 * O.BLOCK, 16 * O.BLOCK
    first = O.Windowed(n, window, seed=2).batch(0, 4096).numpy()
    # a batch of the first window draws from (nearly) all of its 16 blocks, not from one stretch of the log
    assert len(np.unique(first // O.BLOCK)) >= 14
    assert first.max() - first.min() > n // 2


def test_an_in_memory_epoch_is_one_permutation_kept_by_the_checkpoint():
    g = torch.Generator().manual_seed(5)
    order = O.Shuffled.draw(1000, g)
    assert torch.equal(torch.sort(order.perm.long()).values, torch.arange(1000))
    assert torch.equal(O.restore(order.saved()).batch(3, 64), order.batch(3, 64))
    assert O.restore(None) is None


@pytest.mark.slow
def test_a_spilled_run_trains_evaluates_and_resumes_like_a_run_in_memory(tiny_runs, tmp_path):
    """`towers train` with run.spill_folder on the shipped co-purchase config: it ends, leaves its folder empty, and its
    run folder is read back by `towers evaluate` to the same figures (reference: the run's own metrics.json).
    The same run stopped in the middle of its first epoch and resumed ends with the very weights of the
    uninterrupted one (the checkpoint keeps what draws the windowed order)."""
    import json

    import towers
    from towers.training import loop, stopping

    spill = tmp_path / "spill"
    spill.mkdir()
    config = tiny_runs.config(tmp_path, config="store_copurchase.yaml", oracle=False, run={"spill_folder": str(spill)},
                              training={"epochs": 2, "batch_size": 256, "patience": 10, "shuffle_window": 16384},
                              evaluation={"references": False})
    run = tmp_path / "run"
    towers.train(config, run)
    assert list(spill.iterdir()) == []
    written = json.loads((run / "metrics.json").read_text())
    assert written["warm"]["towers"]["recall@20"] > 0
    again = towers.load(run).evaluate()
    assert again["metrics"]["warm"]["towers"]["recall@20"] == pytest.approx(written["warm"]["towers"]["recall@20"])

    calls = []
    real = loop.Trainer.batch_loss

    def stop_mid_epoch(self, idx):
        calls.append(1)
        if len(calls) == 20:  # step 20 of the first epoch's 25: as Ctrl-C would, between two steps
            self.stop.requested = True
        return real(self, idx)

    resumed = tmp_path / "resumed"
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(loop.Trainer, "batch_loss", stop_mid_epoch)
        with pytest.raises(stopping.TrainingInterrupted, match="epoch 1, step 20"):
            towers.train(config, resumed)
    towers.train(config, resumed, resume=True)
    a = torch.load(run / "model.pt", weights_only=True)["state_dict"]
    b = torch.load(resumed / "model.pt", weights_only=True)["state_dict"]
    assert a.keys() == b.keys() and all(torch.equal(a[k], b[k]) for k in a)


@pytest.mark.slow
def test_a_spilled_run_ends_with_the_weights_of_the_same_run_in_memory(tiny_runs, tmp_path):
    """Reference: the same config trained in memory with the same (windowed) epoch order. The spill changes where
    the pairs live, so every weight and every figure must be equal, bit for bit."""
    import json

    import towers

    spill = tmp_path / "spill"
    spill.mkdir()
    runs = {}
    for kind, run in (("memory", {}), ("spilled", {"spill_folder": str(spill)})):
        config = tiny_runs.config(tmp_path, name=f"{kind}.yaml", config="store_copurchase.yaml", oracle=False, run=run,
                                  training={"epochs": 2, "batch_size": 256, "patience": 10, "epoch_order": "windowed",
                                            "shuffle_window": 8192},
                                  evaluation={"references": False})
        towers.train(config, tmp_path / kind)
        runs[kind] = (torch.load(tmp_path / kind / "model.pt", weights_only=True)["state_dict"],
                      json.loads((tmp_path / kind / "metrics.json").read_text()))
    (a, ma), (b, mb) = runs["memory"], runs["spilled"]
    assert a.keys() == b.keys() and all(torch.equal(a[k], b[k]) for k in a)
    assert ma == mb
