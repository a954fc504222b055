"""Faults during training: SIGKILL at random moments, Ctrl-C, and divergence.

A resumed run must reach exactly the weights of an uninterrupted run with the same seed.
"""

from __future__ import annotations

import random
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
import torch
import yaml

pytestmark = pytest.mark.slow  # subprocess runs, killed and resumed

ROOT = Path(__file__).resolve().parents[2]


@pytest.fixture(scope="module")
def small_config(tiny_runs, tmp_path_factory) -> Path:
    """The shipped basket config on the small store: four epochs of 256-pair batches, one thread."""
    return tiny_runs.config(tmp_path_factory.mktemp("resume"), tiny=False, oracle=False, run={"threads": 1},
                            training={"epochs": 4, "batch_size": 256, "patience": 10})


def _train(config: Path, out: Path, *extra: str) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-m", "towers", "train", str(config), "--out", str(out), *extra],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, cwd=ROOT)


def _weights(run: Path) -> dict:
    return torch.load(run / "model.pt", weights_only=True)["state_dict"]


def _same(a: dict, b: dict) -> bool:
    return a.keys() == b.keys() and all(torch.equal(a[k], b[k]) for k in a)


@pytest.fixture(scope="module")
def reference(small_config, tmp_path_factory) -> tuple[Path, float]:
    out = tmp_path_factory.mktemp("ref") / "run"
    start = time.perf_counter()
    proc = _train(small_config, out)
    _, err = proc.communicate(timeout=300)
    assert proc.returncode == 0, err
    return out, time.perf_counter() - start


def test_sigkill_at_three_random_moments_then_resume_gives_identical_weights(small_config, reference, tmp_path):
    ref_run, duration = reference
    out = tmp_path / "run"
    rng = random.Random(5)
    proc = _train(small_config, out)
    for _ in range(3):  # three kills, each anywhere in the run: the suite's time goes to other checks
        time.sleep(rng.uniform(0.25, 0.9) * duration)
        if proc.poll() is None:
            proc.send_signal(signal.SIGKILL)
        proc.communicate(timeout=60)
        proc = _train(small_config, out, "--resume")
    _, err = proc.communicate(timeout=300)
    if proc.returncode != 0:
        # the last kill may have landed after the run finished; resuming then says so
        assert "already finished" in err, err
    assert _same(_weights(out), _weights(ref_run))
    assert _same(torch.load(out / "linear_factor" / "model.pt", weights_only=True)["state_dict"],
                 torch.load(ref_run / "linear_factor" / "model.pt", weights_only=True)["state_dict"])
    assert not (tmp_path / "run.partial").exists()


def test_ctrl_c_writes_a_checkpoint_and_says_how_to_resume(small_config, reference, tmp_path):
    ref_run, _ = reference
    out = tmp_path / "run"
    proc = _train(small_config, out)
    last = tmp_path / "run.partial" / "checkpoints" / "last.pt"
    deadline = time.time() + 120
    while not last.exists() and time.time() < deadline and proc.poll() is None:
        time.sleep(0.05)
    proc.send_signal(signal.SIGINT)
    _, err = proc.communicate(timeout=120)
    assert proc.returncode == 130, err
    lines = [ln for ln in err.splitlines() if ln.startswith("interrupted:")]
    assert len(lines) == 1 and "--resume" in lines[0] and "Traceback" not in err
    assert not out.exists()
    proc = _train(small_config, out, "--resume")
    _, err = proc.communicate(timeout=300)
    assert proc.returncode == 0, err
    assert _same(_weights(out), _weights(ref_run))


def test_diverging_run_stops_without_writing_a_model(small_config, tmp_path):
    cfg = yaml.safe_load(small_config.read_text())
    cfg["training"].update(learning_rate=1e30, id_learning_rate=1e30, id_optimizer="sgd")
    cfg["evaluation"]["baseline"] = False
    path = tmp_path / "wild.yaml"
    path.write_text(yaml.safe_dump(cfg))
    proc = _train(path, tmp_path / "run")
    _, err = proc.communicate(timeout=300)
    assert proc.returncode == 2
    assert "diverged" in err and "learning_rate" in err and "Traceback" not in err
    assert not (tmp_path / "run").exists()
