"""towers sweep: a grid of k by penalty, resumable, chosen by the validation metric only."""

from __future__ import annotations

import csv
import json
import shutil
from pathlib import Path

import numpy as np
import pytest
import yaml

from towers import config as C
from towers.cli import main as cli
from towers.errors import TowersError
from towers.runs.sweep import cell_name, knee_index, run_sweep

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # reference: PNG specification (ISO/IEC 15948), section 5.2
DIMS, PENALTIES, KEY = [4, 8], [1e-5, 1e-2], "training.weight_decay"


@pytest.fixture(scope="module")
def config(tiny_runs) -> Path:
    return tiny_runs.search_config("sweep")


@pytest.fixture(scope="module")
def sweep(config) -> tuple[Path, dict]:
    out = config.parent / "sweep"
    return out, run_sweep(config, out, DIMS, PENALTIES, KEY, jobs=1)


def _csv(out: Path) -> list[dict]:
    with open(out / "sweep.csv", newline="") as fh:
        return list(csv.DictReader(fh))


def _best_validation(cell: Path) -> float:
    """Independently of sweep.py: the best validation recall@20 over every epoch of history.json."""
    hist = json.loads((cell / "history.json").read_text())
    return max(row["valid_recall@20"] for row in hist["epochs"]["towers"])


@pytest.mark.slow
def test_sweep_writes_every_cell_and_output(sweep):
    out, result = sweep
    cells = sorted(p.name for p in (out / "cells").iterdir() if p.is_dir())
    assert cells == sorted(cell_name(d, KEY, p) for d in DIMS for p in PENALTIES)
    for name in cells:
        cell = out / "cells" / name
        assert (cell / "metrics.json").is_file() and (cell / "history.json").is_file()
        assert not (cell / "linear_factor" / "model.pt").exists()  # baseline off in cells by default
        assert not (cell / "report.html").exists()  # report.enabled: false in this config
        saved = yaml.safe_load((cell / "config.yaml").read_text())
        assert saved["model"]["dim"] in DIMS and saved["training"]["weight_decay"] in PENALTIES
        assert saved["evaluation"]["baseline"] is False
    rows = _csv(out)
    assert len(rows) == 4 and {(int(r["dim"]), float(r["penalty"])) for r in rows} == {(d, p) for d in DIMS for p in PENALTIES}
    assert all(r["status"] == "ok" for r in rows)
    for png in ("sweep_heatmap.png", "sweep_elbow.png"):
        data = (out / png).read_bytes()
        assert data[:8] == PNG_SIGNATURE and len(data) > 1000
    for r in rows:  # the test columns are the towers' own metrics.json values
        metrics = json.loads((out / "cells" / r["cell"] / "metrics.json").read_text())
        assert float(r["warm_recall@20"]) == metrics["warm"]["towers"]["recall@20"]
    assert "* chosen by validation recall@20 (highest)" in result["table"]


@pytest.mark.slow
def test_chosen_cell_is_the_best_validation_value_and_best_config_trains_it(sweep, config):
    out, result = sweep
    rows = _csv(out)
    values = {r["cell"]: _best_validation(out / "cells" / r["cell"]) for r in rows}
    for r in rows:
        assert float(r["valid_recall@20"]) == values[r["cell"]]
    argmax = max(values, key=values.get)  # early stopping keeps the first best epoch, so max() over epochs
    chosen = [r for r in rows if r["chosen"] == "1"]
    assert [r["cell"] for r in chosen] == [argmax] == [result["best"]["cell"]]
    best = C.load(out / "best_config.yaml")  # loads from the sweep folder: its paths were made absolute
    assert best.model.dim == int(chosen[0]["dim"])
    assert best.training.weight_decay == float(chosen[0]["penalty"])
    original = C.load(config)
    assert best.interactions.path == original.interactions.path
    assert best.evaluation.baseline is True  # the user's own setting, not the cells' override
    assert best.training.epochs == original.training.epochs


@pytest.mark.slow
def test_rerun_skips_finished_cells(sweep, config, capsys):
    out, _ = sweep
    stamps = {p: p.stat().st_mtime_ns for p in (out / "cells").glob("*/metrics.json")}
    args = ["sweep", str(config), "--out", str(out), "--dims", *map(str, DIMS), "--penalties", *map(str, PENALTIES)]
    assert cli(args) == 0
    captured = capsys.readouterr()
    assert captured.err.count("finished earlier; skipped") == 4
    assert "0 to train" in captured.err
    assert {p: p.stat().st_mtime_ns for p in stamps} == stamps
    assert "chosen: model.dim" in captured.out


@pytest.mark.slow
def test_interrupted_and_missing_cells_are_trained_again_in_parallel(sweep, config, capsys):
    out, _ = sweep
    cells = out / "cells"
    a, b = cell_name(4, KEY, 1e-5), cell_name(8, KEY, 1e-2)
    before = {n: json.loads((cells / n / "metrics.json").read_text()) for n in (a, b)}
    (cells / a).rename(cells / f"{a}.partial")  # as if killed after training, before the rename
    shutil.rmtree(cells / b)
    untouched = cells / cell_name(8, KEY, 1e-5) / "metrics.json"
    stamp = untouched.stat().st_mtime_ns
    run_sweep(config, out, DIMS, PENALTIES, KEY, jobs=2)
    err = capsys.readouterr().err
    assert f"cell {a}: resuming the interrupted cell" in err
    assert "2 to train with 2 job(s)" in err
    assert not (cells / f"{a}.partial").exists()
    for n in (a, b):  # child processes give the numbers the first, in-process sweep gave
        assert json.loads((cells / n / "metrics.json").read_text()) == before[n]
    assert untouched.stat().st_mtime_ns == stamp


@pytest.mark.slow
def test_a_finished_cell_with_another_config_is_refused(sweep, config, tmp_path):
    out, _ = sweep
    cfg = yaml.safe_load(config.read_text())
    cfg["training"]["epochs"] = 3
    changed = config.parent / "changed.yaml"
    changed.write_text(yaml.safe_dump(cfg))
    with pytest.raises(TowersError, match=r"different config \(training\.epochs: 2 then, 3 now\); give the sweep a new --out"):
        run_sweep(changed, out, DIMS, PENALTIES, KEY)


@pytest.mark.parametrize("dims, penalties, key, message", [
    ([0, 8], [1e-5], KEY, r"--dims: got 0"),
    ([8], [-1.0], KEY, r"--penalties: got -1.0"),
    ([8], [1e-5], "model.dropout", r"--penalty-key: got 'model.dropout'"),
])
def test_bad_grids_are_refused_before_training(config, tmp_path, dims, penalties, key, message):
    with pytest.raises(TowersError, match=message):
        run_sweep(config, tmp_path / "s", dims, penalties, key)
    assert not (tmp_path / "s").exists()


def test_sweep_needs_validation_pairs(config, tmp_path):
    cfg = yaml.safe_load(config.read_text())
    cfg["evaluation"]["validation_fraction"] = 0.0
    path = config.parent / "novalid.yaml"
    path.write_text(yaml.safe_dump(cfg))
    with pytest.raises(TowersError, match="validation_fraction"):
        run_sweep(path, tmp_path / "s", [8], [1e-5], KEY)


def test_knee_of_a_piecewise_linear_curve_is_its_breakpoint():
    # Worked example: falls steeply (slope -4) up to x = 3, then gently (slope -0.25). chord - y is
    # piecewise linear and concave with its kink at x = 3, so the farthest point below the chord is
    # x = 3 exactly (by hand).
    x = np.arange(0, 11, dtype=float)
    y = np.where(x <= 3, 20 - 4 * x, 8 - 0.25 * (x - 3))
    assert x[knee_index(x, y)] == 3
    # Kneedle scales both axes to [0, 1] (Satopaa et al. 2011), so affine changes of units change nothing
    assert x[knee_index(10 * x + 7, 0.01 * y - 3)] == 3
    shuffled = np.random.default_rng(0).permutation(len(x))  # the index refers to the points as given
    assert x[shuffled][knee_index(x[shuffled], y[shuffled])] == 3


def test_knee_of_one_over_x_is_the_geometric_mean_of_the_ends():
    # For y = 1/x on [a, b], the chord has slope -1/(ab); chord - y is largest where y' = -1/x^2 equals
    # that slope, at x = sqrt(ab) (by hand); scaling the axes does not move it. Here sqrt(1 * 16) = 4.
    x = np.linspace(1, 16, 61)
    assert x[knee_index(x, 1 / x)] == pytest.approx(4.0)


def test_no_knee_without_three_points_or_a_falling_curve():
    assert knee_index([1, 2], [3, 1]) is None
    assert knee_index([1, 2, 3, 4], [1, 2, 3, 5]) is None  # rising error: the smallest k is as good as any
    assert knee_index([1, 2, 3], [2, 2, 2]) is None
    assert knee_index([1, 2, 3], [3, 2, 1]) is None  # a straight line has no point below its chord
