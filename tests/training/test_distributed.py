"""Data-parallel training: two processes on localhost (torchrun, gloo) against one process.

With squared loss there are no sampled negatives, and each global batch is split across the two
processes whose gradients DistributedDataParallel averages, so both runs take the same steps up to
floating-point summation order: validation metrics must agree within 2%.
"""

from __future__ import annotations

import json
import signal
import subprocess
import sys
import time
from pathlib import Path

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

    class Started:
        def __init__(self, cmd, **_options):
            started.append(cmd)

        def wait(self):
            return 0
    monkeypatch.setattr(D, "usable_cores", lambda: 1)
    monkeypatch.setattr(D.subprocess, "Popen", Started)
    assert D.launch_workers(2, ["train", "x.yaml", "--out", "r"]) == 0
    assert "note: --workers 2 starts 2 processes" in capsys.readouterr().err and len(started) == 1


_LAUNCHER = '''
import sys
from towers.training import distributed as D
# in place of torchrun: a child that says it started, records the signal it gets, and exits 1 on it
CHILD = ("import signal, sys, time; signal.signal(signal.SIGTERM, lambda *a: (open(sys.argv[1], 'w').write('TERM'), "
         "sys.exit(1))); open(sys.argv[2], 'w').write('up'); time.sleep(60)")
D.torchrun_command = lambda n, argv: [sys.executable, "-c", CHILD, *argv]
D.usable_cores = lambda: 8
sys.exit(D.launch_workers(2, sys.argv[1:]))
'''


@pytest.mark.parametrize("stop", ["SIGTERM", "SIGKILL"])
def test_a_stopped_launcher_stops_what_it_started(tmp_path, stop):
    # SIGTERM is passed on (exit 130 and a line saying how to resume); SIGKILL cannot be caught, and the kernel
    # sends the child SIGTERM as its parent dies (prctl PR_SET_PDEATHSIG, Linux)
    if stop == "SIGKILL" and not sys.platform.startswith("linux"):
        pytest.skip("PR_SET_PDEATHSIG is Linux's")
    got, up = tmp_path / "got", tmp_path / "up"
    proc = subprocess.Popen([sys.executable, "-c", _LAUNCHER, str(got), str(up)], stderr=subprocess.PIPE, text=True,
                            cwd=Path(__file__).resolve().parents[2])
    deadline = time.time() + 60
    while not up.exists() and time.time() < deadline:
        time.sleep(0.02)
    proc.send_signal(getattr(signal, stop))
    _, err = proc.communicate(timeout=60)
    while not got.exists() and time.time() < deadline:
        time.sleep(0.02)
    assert got.read_text() == "TERM"
    if stop == "SIGTERM":
        assert proc.returncode == 130
        assert err.strip().splitlines()[-1] == ("interrupted: SIGTERM passed on to the 2 processes; the last checkpoint "
                                                "is kept: run the same command with --resume to continue")
