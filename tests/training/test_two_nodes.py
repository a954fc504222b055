"""A two-machine run rehearsed on one machine: two torchrun invocations, one process each, meeting at a c10d
rendezvous on 127.0.0.1 (the README's commands), against one process training the same config.

The config trains the towers on 0/1 labels (liked: stars >= 4) under the logistic loss with no sampled
negatives and no id dropout, so neither process draws anything of its own: the two processes take the
one-process steps, each gradient the mean of two half-batch gradients. That differs from one process
only in floating-point summation order and in the last batch of an epoch when its size is odd (its two
halves' means then weigh alike, not by their sizes; here 1,855 training pairs leave 63, split 32 / 31):
the towers' metrics are held within 2%, the bound the README states for squared loss, where nothing
is drawn per process either. The linear factor model is fitted by weighted ALS, which every process
computes whole on one thread, so its rounds match the one-process run exactly and only its validation
is divided: its history and metrics must be equal.
"""

from __future__ import annotations

import contextlib
import json
import os
import subprocess

import pandas as pd
import pytest
import yaml

from towers import config as C
from towers.api import train
from towers.data.prepare import prepare
from towers.evaluation.protocol import validation_metrics
from towers.model.embed import model_scorer
from towers.runs.folder import LINEAR_FACTOR, TOWERS, RunFolder
from towers.training.distributed import node_command, rehearsal_endpoint

from ..conftest import ROOT

pytestmark = pytest.mark.slow  # torchrun processes


@pytest.fixture(scope="module")
def runs(small_store, tmp_path_factory):
    folder = tmp_path_factory.mktemp("two_nodes")
    ratings = pd.read_csv(small_store / "ratings.csv")
    ratings.assign(liked=(ratings.stars >= 4).astype(int)).drop(columns="stars").to_csv(folder / "liked.csv", index=False)
    cfg = {
        "run": {"seed": 3, "threads": 1},
        "interactions": {"path": "liked.csv", "query_column": "customer_id", "candidate_column": "item_id",
                         "target_column": "liked"},
        "model": {"dim": 8, "hidden": [16], "id_dropout": 0.0},
        "training": {"loss": "logistic", "negatives": 0, "epochs": 3, "batch_size": 256, "progress": "plain"},
        "evaluation": {"baseline": True, "baseline_solver": "weighted_als", "baseline_rounds": 4, "references": False},
        "report": {"enabled": False},
    }
    config = folder / "liked.yaml"
    config.write_text(yaml.safe_dump(cfg))
    runs = folder / "runs"
    env = dict(os.environ, OMP_NUM_THREADS="1", PYTHONPATH=os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")]))
    endpoint = rehearsal_endpoint()
    with contextlib.ExitStack() as logs:
        nodes = []
        for rank in range(2):
            out = logs.enter_context(open(folder / f"node{rank}.out", "w"))
            err = logs.enter_context(open(folder / f"node{rank}.err", "w"))
            argv = node_command(rank, 2, endpoint, ["train", str(config), "--out", str(runs / "two")])
            nodes.append(subprocess.Popen(argv, stdout=out, stderr=err, env=env, cwd=folder))
        try:
            train(config, runs / "one")  # the one-process run, in this process, while the nodes start up
            codes = [node.wait(timeout=300) for node in nodes]
        finally:
            for node in nodes:  # only after a failure: torchrun passes SIGTERM on to its process
                if node.poll() is None:
                    node.terminate()
                    node.wait(timeout=60)
    return folder, config, codes


def _history(run):
    return json.loads((run / "history.json").read_text())


def test_both_nodes_exit_zero_and_one_run_is_written(runs):
    folder, _, codes = runs
    assert codes == [0, 0], [(folder / f"node{r}.err").read_text()[-2000:] for r in range(2)]
    assert sorted(p.name for p in (folder / "runs").iterdir()) == ["one", "two"]  # no .partial left, no second run
    printed = "".join((folder / f"node{r}.out").read_text() for r in range(2))
    assert printed.count("run folder:") == 1  # only process 0 prints and writes


def test_two_nodes_match_one_process(runs):
    folder = runs[0] / "runs"
    one, two = _history(folder / "one"), _history(folder / "two")
    m1 = json.loads((folder / "one" / "metrics.json").read_text())["warm"]
    m2 = json.loads((folder / "two" / "metrics.json").read_text())["warm"]
    # ALS is computed whole in every process: equal to the last bit, validation rounds included
    assert _rounds(two) == _rounds(one)
    assert m2[LINEAR_FACTOR] == m1[LINEAR_FACTOR] and m2["popularity"] == m1["popularity"]
    # the towers: the same steps up to summation order and the last batch's split (module docstring)
    v1 = [row["valid_recall@20"] for row in one["epochs"][TOWERS]]
    v2 = [row["valid_recall@20"] for row in two["epochs"][TOWERS]]
    assert v2 == pytest.approx(v1, rel=0.02)
    for metric, value in m1[TOWERS].items():
        assert m2[TOWERS][metric] == pytest.approx(value, rel=0.02), metric


def _rounds(history: dict) -> list[dict]:
    """The linear factor model's rounds (objective, validation) without their measured speed."""
    return [{k: v for k, v in row.items() if k != "pairs_per_s"} for row in history["epochs"][LINEAR_FACTOR]]


def test_divided_validation_equals_one_process_validation_of_the_same_weights(runs, one_thread):
    folder, config, _ = runs
    two = RunFolder(folder / "runs" / "two")
    history = _history(two.path)
    best = next(row for row in history["epochs"][TOWERS] if row["epoch"] == history["best_epoch"])
    cfg = C.load(config)
    data = prepare(cfg)
    model = two.load_bundle(TOWERS).model  # the best epoch's weights, which the two processes validated
    value = validation_metrics(model_scorer(model, data), data, cfg, data.valid, model)["recall@20"]
    assert value == best["valid_recall@20"]  # reference: one process ranking every validation query
