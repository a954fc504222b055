"""Data-parallel training: two processes on localhost (torchrun, gloo) against one process.

With squared loss there are no sampled negatives, and each global batch is split across the two
processes whose gradients DistributedDataParallel averages, so both runs take the same steps up to
floating-point summation order: validation metrics must agree within 2%.
"""

from __future__ import annotations

import json
import subprocess
import sys

import pytest
import yaml

from towers.training import distributed as D

pytestmark = pytest.mark.slow  # torchrun processes


@pytest.fixture(scope="module")
def runs(small_store, tmp_path_factory):
    folder = tmp_path_factory.mktemp("ddp")
    cfg = {
        "run": {"seed": 4, "threads": 1},
        "interactions": {"path": str(small_store / "ratings.csv"), "query_column": "customer_id", "candidate_column": "item_id",
                         "target_column": "stars"},
        "model": {"dim": 8, "hidden": [16], "id_dropout": 0.0},
        "training": {"loss": "squared", "epochs": 3, "batch_size": 256, "progress": "plain"},
        "evaluation": {"baseline": True},
    }
    path = folder / "ratings.yaml"
    path.write_text(yaml.safe_dump(cfg))
    out = {}
    for name, extra in (("one", []), ("two", ["--workers", "2"])):
        proc = subprocess.run([sys.executable, "-m", "towers", "train", str(path), "--out", str(folder / name), *extra],
                              capture_output=True, text=True, timeout=600)
        assert proc.returncode == 0, proc.stderr[-2000:]
        out[name] = (folder / name, proc)
    return out


def _best_valid(run_dir, model):
    h = json.loads((run_dir / "history.json").read_text())
    return min(row["valid_rmse"] for row in h["epochs"][model])


def test_two_processes_match_one_within_two_percent(runs):
    (one, _), (two, _) = runs["one"], runs["two"]
    for model in ("towers", "linear_factor"):  # linear_factor: sparse id-table gradients only
        a, b = _best_valid(one, model), _best_valid(two, model)
        assert abs(a - b) / a < 0.02, (model, a, b)
    m1 = json.loads((one / "metrics.json").read_text())["warm"]
    m2 = json.loads((two / "metrics.json").read_text())["warm"]
    for model in m1:
        assert m2[model]["rmse"] == pytest.approx(m1[model]["rmse"], rel=0.02), model


def test_only_process_zero_writes_and_prints(runs):
    (one, _), (two, p2) = runs["one"], runs["two"]
    assert sorted(p.relative_to(one).as_posix() for p in one.rglob("*")) == \
        sorted(p.relative_to(two).as_posix() for p in two.rglob("*"))
    assert p2.stdout.count("run folder:") == 1
    # each epoch line once, not once per process
    assert p2.stderr.count("towers epoch 1/3") == 1


def test_workers_must_be_positive(tmp_path):
    proc = subprocess.run([sys.executable, "-m", "towers", "train", "x.yaml", "--out", str(tmp_path / "r"),
                           "--workers", "0"], capture_output=True, text=True, timeout=60)
    assert proc.returncode == 2 and proc.stderr.strip().startswith("error: --workers 0")


@pytest.mark.parametrize("n, cores, load, free", [(3, 2, 0.0, 2), (2, 4, 3.2, 1), (2, 2, 1.6, 0)])
def test_more_processes_than_free_cores_get_a_note(n, cores, load, free):
    note = D.crowding_note(n, cores, load)
    assert note is not None and "\n" not in note  # one line
    assert note.startswith(f"note: --workers {n} starts {n} processes but {free} of this machine's {cores} cores are free")


@pytest.mark.parametrize("n, cores, load", [(1, 2, 0.0), (2, 2, 0.2), (2, 8, 5.0)])
def test_enough_free_cores_give_no_note(n, cores, load):
    assert D.crowding_note(n, cores, load) is None


def test_launch_prints_the_note_before_starting(monkeypatch, capsys):
    started = []
    monkeypatch.setattr(D, "usable_cores", lambda: 1)
    monkeypatch.setattr(D.subprocess, "run", lambda cmd, env: started.append(cmd) or subprocess.CompletedProcess(cmd, 0))
    assert D.launch_workers(2, ["train", "x.yaml", "--out", "r"]) == 0
    assert "note: --workers 2 starts 2 processes" in capsys.readouterr().err and len(started) == 1
