"""`towers sweep`: train a grid of k (model.dim) by one penalty and choose the cell by validation.

Each cell is an ordinary run folder under SWEEP_DIR/cells/, trained by runs/train.train_run with the
cell's config (the user's config plus the cell's overrides, written beside the folder): in this
process with --jobs 1, else in `python -m towers train` child processes. So a sweep is resumable the
way a run is: finished cells are skipped, an interrupted cell continues from its RUN.partial
checkpoint. The choice uses only the early-stopping metric on the validation pairs (history.json),
never the test slice; the test metrics are reported beside it.
"""

from __future__ import annotations

import contextlib
import csv
import io
import json
import math
import os
import shutil
import signal
import subprocess
import sys
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import yaml

from towers import config as C
from towers.atomic import open_private_log, write_atomic, write_text_atomic
from towers.errors import TowersError
from towers.evaluation.protocol import SLICES
from towers.runs.folder import LINEAR_FACTOR, TOWERS, RunFolder
from towers.runs.train import train_run
from towers.training.progress import log, show_bar
from towers.training.stopping import TrainingInterrupted

PENALTY_KEYS = ("training.weight_decay", "training.id_l2")
IGNORED_WHEN_COMPARING = (("run", "threads"), ("training", "progress"))  # change nothing a cell learns
REPORT_SECTION = "report"  # likewise: the report settings only change report.html
POLL_S = 0.2


@dataclass
class Cell:
    """One grid point: its values, its run folder, its config file and its log."""

    dim: int
    penalty: float
    name: str
    folder: Path
    config_path: Path
    log_path: Path
    config: C.Config | None = None
    status: str = "pending"  # pending, done, skipped, failed
    message: str = ""


def cell_name(dim: int, penalty_key: str, penalty: float) -> str:
    """Folder name of a cell, e.g. dim16_weight_decay_1e-05 (repr keeps every digit of the penalty)."""
    return f"dim{dim}_{penalty_key.split('.')[-1]}_{float(penalty)!r}"


def validation_error(metric: str, value: float) -> float:
    """The validation metric as an error (lower is better): rmse and mae as they are, 1 - value otherwise."""
    return value if C.lower_is_better(metric) else 1.0 - value


def knee_index(x, y) -> int | None:
    """Index of the elbow of a falling error curve y(x) by the Kneedle rule (Satopaa et al., 2011).

    Both axes are scaled to [0, 1]; the elbow is the point farthest below the chord joining the first
    and the last point (the maximum of Kneedle's difference curve, in its offline form without the
    sensitivity threshold). Points are taken in order of x. None when there are fewer than three
    points, the curve does not fall from its first point to its last (then the smallest x is as good
    as any), or no point lies below the chord.
    """
    x, y = np.asarray(x, dtype=float), np.asarray(y, dtype=float)
    if len(x) < 3 or not (np.isfinite(x).all() and np.isfinite(y).all()):
        return None
    order = np.argsort(x, kind="stable")
    xs, ys = x[order], y[order]
    if xs[-1] == xs[0] or ys[-1] >= ys[0]:
        return None
    xn = (xs - xs[0]) / (xs[-1] - xs[0])
    yn = (ys - ys.min()) / (ys.max() - ys.min())
    chord = yn[0] + (yn[-1] - yn[0]) * xn
    gap = chord - yn
    best = int(np.argmax(gap[1:-1])) + 1
    return int(order[best]) if gap[best] > 1e-12 else None


def core_count() -> int:
    return len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)


def searchable_config(config_path: Path, out: Path, who: str) -> C.Config:
    """The config a search (sweep or tune) starts from: it must hold validation pairs to choose by, and
    `out` must be a folder or not yet exist."""
    base = C.load(config_path)
    if base.evaluation.validation_fraction <= 0:
        raise TowersError(f"{config_path}: config key 'evaluation.validation_fraction': got 0; {who} chooses by "
                          "the validation metric, so hold out some validation pairs (e.g. 0.1)")
    if out.exists() and not out.is_dir():
        raise TowersError(f"{out}: exists and is not a folder; choose another --out")
    return base


def comparable_config(cfg: C.Config | dict) -> dict:
    """A config (as YAML would give it back) without the keys that change how fast, not what, a cell trains."""
    out = yaml.safe_load(C.dump(cfg)) if isinstance(cfg, C.Config) else yaml.safe_load(yaml.safe_dump(cfg))
    for section, key in IGNORED_WHEN_COMPARING:
        out.get(section, {}).pop(key, None)
    out.pop(REPORT_SECTION, None)
    return out


def _check_grid(dims, penalties, penalty_key: str, jobs: int) -> tuple[list[int], list[float]]:
    if penalty_key not in PENALTY_KEYS:
        raise TowersError(f"--penalty-key: got {penalty_key!r}; expected one of {', '.join(PENALTY_KEYS)}")
    if not dims or not penalties:
        raise TowersError("--dims and --penalties: give at least one value each, e.g. --dims 8 16 32 --penalties 1e-5 1e-4")
    if any(d < 1 for d in dims):
        raise TowersError(f"--dims: got {[d for d in dims if d < 1][0]}; every k must be a whole number >= 1")
    if any(not math.isfinite(p) or p < 0 for p in penalties):
        raise TowersError(f"--penalties: got {[p for p in penalties if not math.isfinite(p) or p < 0][0]!r}; "
                          "every penalty must be a finite number >= 0")
    if jobs < 1:
        raise TowersError(f"--jobs: got {jobs}; give 1 or more parallel cells")
    return sorted({int(d) for d in dims}), sorted({float(p) for p in penalties})


def run_sweep(config_path: str | Path, out_dir: str | Path, dims, penalties,
              penalty_key: str = "training.weight_decay", jobs: int = 1, baseline: bool = False) -> dict:
    """Train every (dim, penalty) cell not yet finished, then write sweep.csv, the plots and best_config.yaml.

    Returns {"rows": [...], "best": row, "table": text, "files": {name: path}}. baseline=False turns the
    linear factor model off in every cell (evaluation.baseline: false) to halve the work.
    """
    dims, penalties = _check_grid(dims, penalties, penalty_key, jobs)
    config_path, out = Path(config_path), Path(out_dir)
    base = searchable_config(config_path, out, "a sweep")
    metric = base.stop_metric
    section, key = penalty_key.split(".")
    cells_dir = out / "cells"
    cells = []
    for d in dims:
        for p in penalties:
            name = cell_name(d, penalty_key, p)
            overrides = {"model": {"dim": d}, "training": {"progress": "plain"}}
            overrides.setdefault(section, {})[key] = p
            if not baseline:
                overrides["evaluation"] = {"baseline": False}
            cell = Cell(d, p, name, cells_dir / name, cells_dir / f"{name}.yaml", cells_dir / f"{name}.log")
            cell.config = C.load(config_path, overrides)  # every cell is checked before any training starts
            cells.append(cell)

    todo = [c for c in cells if not _finished(c)]
    workers = max(1, min(jobs, len(todo)))
    cores = core_count()
    threads = max(1, cores // workers)
    if base.run.threads:
        threads = min(threads, base.run.threads)
    log(f"sweep: {len(cells)} cells ({len(dims)} k x {len(penalties)} {penalty_key}), {len(cells) - len(todo)} "
        f"finished earlier, {len(todo)} to train with {workers} job(s) x {threads} thread(s) on {cores} cores")
    if jobs > cores:
        log(f"sweep: --jobs {jobs} is more than the {cores} cores; cells will compete for them")
    for cell in cells:
        if cell not in todo:
            cell.status = "skipped"
            log(f"cell {cell.name}: finished earlier; skipped")
    for cell in todo:
        _prepare_cell(cell, threads)
    _train_cells(todo, workers, out)

    rows = [_row(c, metric, penalty_key) for c in cells]
    ok = [r for r in rows if r["status"] == "ok"]
    if not ok:
        raise TowersError(f"{out}: no cell finished ({rows[0]['status']}); see the logs in {cells_dir}")
    value_key = f"valid_{metric}"
    lower = C.lower_is_better(metric)
    best = min(ok, key=lambda r: r[value_key]) if lower else max(ok, key=lambda r: r[value_key])  # ties: first cell
    for r in rows:
        r["chosen"] = int(r is best)
    files = {"sweep.csv": _write_csv(out / "sweep.csv", rows),
             "sweep_heatmap.png": _plot_heatmap(out / "sweep_heatmap.png", rows, dims, penalties, penalty_key, metric, best),
             "sweep_elbow.png": _plot_elbow(out / "sweep_elbow.png", rows, penalties, penalty_key, metric, best),
             "best_config.yaml": _write_best_config(out / "best_config.yaml", config_path, base, best, penalty_key, metric)}
    failed = [r for r in rows if r["status"] != "ok"]
    if failed:
        log(f"warning: {len(failed)} cell(s) did not finish: " + "; ".join(f"{r['cell']} ({r['status']})" for r in failed))
    return {"rows": rows, "best": best, "table": format_sweep_table(rows, metric, penalty_key), "files": files}


def _finished(cell: Cell) -> bool:
    """A cell whose run folder holds metrics.json is done; refuse one that was trained with another config."""
    done = cell.folder / RunFolder.METRICS
    if not done.is_file():
        return False
    saved = cell.folder / RunFolder.CONFIG
    then = comparable_config(yaml.safe_load(saved.read_text(encoding="utf-8"))) if saved.is_file() else {}
    now = comparable_config(cell.config)
    if then != now:
        raise TowersError(f"{cell.folder}: this finished cell was trained with a different config "
                          f"({C.first_difference(then, now) or 'config.yaml missing'}); give the sweep a new --out, "
                          "or delete that cell folder to retrain it")
    return True


def _prepare_cell(cell: Cell, threads: int) -> None:
    """Write the cell's config; an interrupted cell with the same config resumes, any other leftover restarts."""
    cfg = cell.config.with_section("run", threads=threads)
    partial = RunFolder(cell.folder).partial.path
    saved = partial / RunFolder.CONFIG
    if saved.is_file():
        then = yaml.safe_load(saved.read_text(encoding="utf-8"))
        if isinstance(then, dict) and comparable_config(then) == comparable_config(cfg):
            # the checkpoint resumes exactly with its own settings
            cfg = cfg.with_section("run", threads=then["run"]["threads"])
            cfg = cfg.with_section("training", progress=then["training"]["progress"])
            log(f"cell {cell.name}: resuming the interrupted cell")
        else:
            shutil.rmtree(partial)
            log(f"cell {cell.name}: leftover partial cell had another config; starting it over")
    elif partial.exists():
        shutil.rmtree(partial)
    if cell.folder.exists() and not (cell.folder / RunFolder.METRICS).is_file():
        raise TowersError(f"{cell.folder}: an unfinished folder that is not a run; delete it and rerun the sweep")
    text = C.dump(cfg)
    if not cell.config_path.is_file() or cell.config_path.read_text(encoding="utf-8") != text:
        write_text_atomic(cell.config_path, text)
    cell.config = cfg


def _train_cells(todo: list[Cell], workers: int, out: Path) -> None:
    """Train the cells: one after another in this process, or `workers` child processes at a time.

    Either way each cell is `train_run(CELL.yaml, CELL, resume=True)`, its log lines going to CELL.log.
    Children (`python -m towers train ... --resume`) run in their own session, so a Ctrl-C reaches only
    this process, which passes it on once: each child then checkpoints and exits, and the sweep stops
    with the rerun hint. In this process, training's own Ctrl-C handler does the same.
    """
    if not todo:
        return
    from tqdm import tqdm

    bar = tqdm(total=len(todo), desc="sweep", unit="cell", file=sys.stderr) if show_bar("auto") else None
    say = (lambda m: bar.write(m, file=sys.stderr)) if bar else log
    try:
        interrupted = _train_here(todo, say, bar) if workers == 1 else _train_children(todo, workers, say, bar)
    finally:
        if bar:
            bar.close()
    if interrupted:
        err = TowersError(f"sweep interrupted; rerun the same `towers sweep` command to continue in {out}")
        err.exit_code = 130
        raise err


def _train_here(todo: list[Cell], say, bar) -> bool:
    """Cells one after another in this process (no start-up cost per cell); True if interrupted."""
    for cell in todo:
        say(f"cell {cell.name}: training (log: {cell.log_path})")
        started, code = time.perf_counter(), 0
        with open_private_log(cell.log_path) as fh, contextlib.redirect_stderr(fh):
            try:
                train_run(cell.config_path, cell.folder, resume=True)
            except TrainingInterrupted as exc:
                print(f"interrupted: {exc}", file=fh)
                code = exc.exit_code
            except TowersError as exc:
                print(f"error: {exc}", file=fh)
                code = exc.exit_code
        _finish(cell, code, time.perf_counter() - started, say)
        if bar:
            bar.update(1)
        if code == 130:
            return True
    return False


def _train_children(todo: list[Cell], workers: int, say, bar) -> bool:
    """`workers` child processes at a time; True if interrupted."""
    pending, running = list(todo), {}
    env = dict(os.environ, PYTHONPATH=os.pathsep.join(
        [str(Path(__file__).resolve().parents[1])] + ([os.environ["PYTHONPATH"]] if os.environ.get("PYTHONPATH") else [])))
    interrupted = False
    while pending or running:
        try:
            while pending and len(running) < workers and not interrupted:
                cell = pending.pop(0)
                running[cell.name] = (cell, _start(cell, env), time.perf_counter())
                say(f"cell {cell.name}: training (log: {cell.log_path})")
            for name, (cell, proc, started) in list(running.items()):
                if proc.poll() is None:
                    continue
                del running[name]
                _finish(cell, proc.returncode, time.perf_counter() - started, say)
                if bar:
                    bar.update(1)
            if interrupted and not running:
                break
            time.sleep(POLL_S)
        except KeyboardInterrupt:
            interrupted = True
            for _cell, proc, _ in running.values():
                if proc.poll() is None:
                    proc.send_signal(signal.SIGINT)  # a second Ctrl-C passes a second one on: abort at once
            say("sweep: stopping; each running cell writes a checkpoint first")
    return interrupted


def _start(cell: Cell, env: dict) -> subprocess.Popen:
    fh = open_private_log(cell.log_path)  # a stream of log lines, appended across resumes
    try:
        return subprocess.Popen([sys.executable, "-m", "towers", "train", str(cell.config_path), "--out",
                                 str(cell.folder), "--resume"], stdout=fh, stderr=subprocess.STDOUT, env=env,
                                start_new_session=True)
    finally:
        fh.close()


def _finish(cell: Cell, code: int, seconds: float, say) -> None:
    if code == 0 and (cell.folder / RunFolder.METRICS).is_file():
        cell.status = "done"
        say(f"cell {cell.name}: trained in {seconds:.1f} s")
        return
    lines = cell.log_path.read_text(encoding="utf-8", errors="replace").splitlines() if cell.log_path.is_file() else []
    said = [ln for ln in lines if ln.startswith(("error:", "interrupted:"))]
    cell.message = (said[-1] if said else (lines[-1] if lines else f"exit code {code}"))[:300]
    cell.status = "interrupted" if code == 130 else "failed"
    say(f"cell {cell.name}: {cell.status} (exit code {code}): {cell.message}")


def _row(cell: Cell, metric: str, penalty_key: str) -> dict:
    """One sweep.csv row: the cell's values, its best validation value and epoch, its test metrics."""
    row = {"cell": cell.name, "dim": cell.dim, "penalty_key": penalty_key, "penalty": cell.penalty}
    hist_path, metrics_path = cell.folder / RunFolder.HISTORY, cell.folder / RunFolder.METRICS
    if not (hist_path.is_file() and metrics_path.is_file()):
        row["status"] = cell.message or cell.status
        return row
    hist = json.loads(hist_path.read_text(encoding="utf-8"))
    towers = hist["epochs"][TOWERS]
    best = next((r for r in towers if r["epoch"] == hist["best_epoch"]), None)
    value = None if best is None else best.get(f"valid_{metric}")
    if value is None or hist.get("stop_metric") != metric:
        row["status"] = f"no validation {metric} in history.json"
        return row
    row.update({"status": "ok", f"valid_{metric}": float(value), "best_epoch": int(hist["best_epoch"]),
                "epochs_run": len(towers)})
    metrics = json.loads(metrics_path.read_text(encoding="utf-8"))
    for model, prefix in ((TOWERS, ""), (LINEAR_FACTOR, f"{LINEAR_FACTOR}_")):
        for slice_name in [s for s in SLICES if s in metrics]:
            for m, v in (metrics[slice_name].get(model) or {}).items():
                if m != "queries":
                    row[f"{prefix}{slice_name}_{m}"] = v
    return row


def _columns(rows: list[dict]) -> list[str]:
    cols: list[str] = []
    for r in rows:
        cols += [k for k in r if k not in cols]
    lead = ["cell", "dim", "penalty_key", "penalty", "status"]
    return lead + [c for c in cols if c not in lead and c != "chosen"] + ["chosen"]


def _write_csv(path: Path, rows: list[dict]) -> Path:
    buf = io.StringIO()
    w = csv.DictWriter(buf, fieldnames=_columns(rows), lineterminator="\n")
    w.writeheader()
    for r in rows:
        w.writerow({k: (repr(v) if isinstance(v, float) else v) for k, v in r.items()})
    return write_text_atomic(path, buf.getvalue())


def format_sweep_table(rows: list[dict], metric: str, penalty_key: str) -> str:
    """The sweep as a plain text table; '*' marks the chosen cell."""
    value_key = f"valid_{metric}"
    tests = [c for c in _columns(rows) if c.startswith(("warm_", "cold_"))]
    head = ["", "dim", penalty_key.split(".")[-1], value_key, "best_epoch"] + tests
    lines = [head]
    for r in rows:
        if r["status"] != "ok":
            lines.append(["", str(r["dim"]), f"{r['penalty']:g}", r["status"][:60], "", *[""] * len(tests)])
            continue
        lines.append(["*" if r.get("chosen") else "", str(r["dim"]), f"{r['penalty']:g}", f"{r[value_key]:.4f}",
                      str(r["best_epoch"])] + [f"{r[c]:.4f}" if isinstance(r.get(c), float) else str(r.get(c, ""))
                                               for c in tests])
    widths = [max(len(line[i]) for line in lines) for i in range(len(head))]
    text = "\n".join("  ".join(v.rjust(w) if i else v.ljust(w) for i, (v, w) in enumerate(zip(line, widths))).rstrip()
                     for line in lines)
    return text + "\n* chosen by validation " + metric + " (" + ("lowest" if C.lower_is_better(metric) else "highest") + ")\n"


# ---- plots -----------------------------------------------------------------------------------------
def figure(width: float, height: float):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), dpi=100, layout="constrained")
    FigureCanvasAgg(fig)
    return fig, fig.subplots()


def save_png(fig, path: Path) -> Path:
    return write_atomic(path, lambda p: fig.savefig(p, format="png"))


def _plot_heatmap(path: Path, rows, dims, penalties, penalty_key, metric, best) -> Path:
    value_key = f"valid_{metric}"
    grid = np.full((len(penalties), len(dims)), np.nan)
    for r in rows:
        if r["status"] == "ok":
            grid[penalties.index(r["penalty"]), dims.index(r["dim"])] = r[value_key]
    fig, ax = figure(1.6 + 1.1 * len(dims), 1.4 + 0.6 * len(penalties))
    cmap = "viridis_r" if C.lower_is_better(metric) else "viridis"  # bright is better either way
    im = ax.imshow(np.ma.masked_invalid(grid), cmap=cmap, aspect="auto", origin="lower")
    fig.colorbar(im, ax=ax, label=f"validation {metric}")
    finite = grid[np.isfinite(grid)]
    mid = (finite.min() + finite.max()) / 2 if len(finite) else 0
    for i in range(len(penalties)):
        for j in range(len(dims)):
            v = grid[i, j]
            text = "failed" if not np.isfinite(v) else f"{v:.4f}"
            bright = np.isfinite(v) and ((v > mid) != C.lower_is_better(metric))
            ax.text(j, i, text, ha="center", va="center", fontsize=9, color="black" if bright else "white")
    from matplotlib.patches import Rectangle

    bi, bj = penalties.index(best["penalty"]), dims.index(best["dim"])
    ax.add_patch(Rectangle((bj - 0.5, bi - 0.5), 1, 1, fill=False, edgecolor="red", lw=2.5))
    ax.set_xticks(range(len(dims)), [str(d) for d in dims])
    ax.set_yticks(range(len(penalties)), [f"{p:g}" for p in penalties])
    ax.set(xlabel="k (model.dim)", ylabel=penalty_key,
           title=f"validation {metric}; red box: chosen (k={best['dim']}, {best['penalty']:g})")
    return save_png(fig, path)


def _plot_elbow(path: Path, rows, penalties, penalty_key, metric, best) -> Path:
    value_key = f"valid_{metric}"
    fig, ax = figure(7.5, 4.5)
    for i, p in enumerate(penalties):
        pts = sorted((r["dim"], validation_error(metric, r[value_key])) for r in rows
                     if r["status"] == "ok" and r["penalty"] == p)
        if not pts:
            continue
        ks, errs = zip(*pts)
        colour = f"C{i % 10}"
        knee = knee_index(np.log2(ks), errs)
        label = f"{penalty_key.split('.')[-1]} {p:g}" + ("" if knee is not None else " (no elbow)")
        ax.plot(ks, errs, "o-", color=colour, label=label)
        if knee is not None:
            ax.plot([ks[knee]], [errs[knee]], "o", ms=14, mfc="none", mec=colour, mew=2)
            ax.annotate(f"elbow k={ks[knee]}", (ks[knee], errs[knee]), textcoords="offset points", xytext=(8, 8),
                        color=colour, fontsize=9)
    ax.plot([best["dim"]], [validation_error(metric, best[value_key])], "*", ms=16, color="red", label="chosen cell")
    ax.set_xscale("log", base=2)
    ks_all = sorted({r["dim"] for r in rows})
    ax.set_xticks(ks_all, [str(k) for k in ks_all])
    ylabel = metric if C.lower_is_better(metric) else f"1 - {metric}"
    ax.set(xlabel="k (model.dim), log scale", ylabel=f"validation error ({ylabel})",
           title="validation error against k; circle: elbow (Kneedle rule on log2 k)")
    ax.grid(alpha=0.3)
    ax.legend(frameon=False, fontsize=9)
    return save_png(fig, path)


# ---- best_config.yaml ------------------------------------------------------------------------------
def config_with(config_path: Path, base: C.Config, values: dict) -> dict:
    """The user's own config file as YAML data with `values` ({"section.key": value}) set and its relative
    paths made absolute (base is that file loaded), so it runs from anywhere; comments are lost."""
    raw = yaml.safe_load(config_path.read_text(encoding="utf-8-sig")) or {}
    for section, keys in C.SCHEMA.items():
        given = raw.get(section)
        if not isinstance(given, dict):
            continue
        for k, spec in keys.items():
            if spec.kind == "path" and given.get(k) is not None:
                given[k] = getattr(getattr(base, section), k)
    for dotted, v in values.items():
        s, k = dotted.split(".")
        if not isinstance(raw.get(s), dict):
            raw[s] = {}
        raw[s][k] = v
    return raw


def _write_best_config(path: Path, config_path: Path, base: C.Config, best: dict, penalty_key: str, metric: str) -> Path:
    """The user's own config with the chosen k and penalty; relative paths made absolute so it runs from here."""
    raw = config_with(config_path, base, {"model.dim": best["dim"], penalty_key: best["penalty"]})
    head = (f"# {config_path.name} with the cell chosen by `towers sweep`: model.dim {best['dim']}, {penalty_key} "
            f"{best['penalty']!r}\n# (validation {metric} {best[f'valid_{metric}']:.4f} at epoch {best['best_epoch']}); "
            "paths made absolute; comments of the original are not kept.\n")
    return write_text_atomic(path, head + yaml.safe_dump(raw, sort_keys=False))
