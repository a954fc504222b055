"""Validation divided among data-parallel processes: two gloo processes, each ranking its share of the
validation queries, must each report exactly what one process reports for the same weights.

The processes are started with torch.multiprocessing and join a gloo group as torchrun's would; each
prepares the data from the same config and seed, builds the same untrained towers (seeded), and calls
validation_metrics with distributed.evaluation_share(), as EarlyStopping does every round. The
ratings config checks the squared-loss path under a share too (there every process computes the
errors whole).
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import torch
import torch.distributed as dist
import torch.multiprocessing as mp
import yaml

from towers import config as C
from towers.data.prepare import prepare
from towers.evaluation.protocol import popularity_scorer, validation_metrics
from towers.model.build import build_model
from towers.model.embed import model_scorer
from towers.training import distributed as D

pytestmark = pytest.mark.slow  # starts processes

KINDS = ("events", "ratings")


def _configs(folder):
    rng = np.random.default_rng(11)
    n = 6000
    items = np.minimum(rng.zipf(1.4, n), 150) - 1  # long-tailed popularity: popularity ties many items
    pd.DataFrame({"u": rng.integers(0, 400, n), "i": items, "stars": rng.integers(1, 6, n)}).to_parquet(folder / "log.parquet")
    # every process holds every pair here (tests/data/test_shards.py checks the log divided by user)
    base = {"run": {"seed": 2, "threads": 1, "divide_log": False},
            "interactions": {"path": "log.parquet", "query_column": "u", "candidate_column": "i"},
            "model": {"dim": 8, "hidden": [16]},
            "training": {"loss": "logistic", "validate_queries": 151},  # a sample, odd so the shares differ in size
            "evaluation": {"validation_fraction": 0.2, "test_fraction": 0.1, "top_k": [5, 20]}}
    ratings = json.loads(json.dumps(base))
    ratings["interactions"]["target_column"] = "stars"
    ratings["training"]["loss"] = "squared"
    for kind, raw in zip(KINDS, (base, ratings)):
        (folder / f"{kind}.yaml").write_text(yaml.safe_dump(raw))


def _validate(folder, kind: str, share) -> dict:
    """Validation metrics of seeded, untrained towers and of popularity, as EarlyStopping computes them."""
    cfg = C.load(folder / f"{kind}.yaml")
    data = prepare(cfg)
    torch.manual_seed(cfg.run.seed)
    model = build_model(data, cfg)
    popularity = popularity_scorer(data.train, len(data.queries.ids), len(data.candidates.ids), cfg.training.rating_loss)
    return {"towers": validation_metrics(model_scorer(model, data), data, cfg, data.valid, model, share),
            "popularity": validation_metrics(popularity, data, cfg, data.valid, None, share)}


def _process(rank: int, world: int, folder) -> None:
    torch.set_num_threads(1)
    dist.init_process_group("gloo", init_method=f"file://{folder / 'group'}", rank=rank, world_size=world)
    try:
        out = {kind: _validate(folder, kind, D.evaluation_share()) for kind in KINDS}
    finally:
        dist.destroy_process_group()
    (folder / f"process{rank}.json").write_text(json.dumps(out))


def test_two_gloo_processes_report_the_one_process_validation_exactly(tmp_path, one_thread):
    _configs(tmp_path)
    mp.spawn(_process, args=(2, tmp_path), nprocs=2, join=True)
    one = {kind: _validate(tmp_path, kind, None) for kind in KINDS}  # reference: the same call in one process
    assert one["events"]["towers"]["queries"] == 151 and one["ratings"]["towers"]["rmse"] > 0
    for rank in range(2):
        got = json.loads((tmp_path / f"process{rank}.json").read_text())
        assert got == one  # exact: floats written by json round-trip to the same value
