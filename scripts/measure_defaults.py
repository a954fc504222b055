"""Measure the defaults of five config keys on data generated on the spot, and recommend a value for each.

Keys measured (their current defaults come from towers.config, so the tables always show what is shipped;
the sixth renamed key, hashed_rows, is not measured here):

    evaluation.baseline_row_steps     CG steps per ALS row solve (0 = exact Cholesky)
    evaluation.baseline_rounds        most ALS rounds
    evaluation.baseline_event_weight  weighted ALS's alpha in the confidence 1 + alpha * r
    feature token_limit, rare_below   token lists kept to N tokens; values seen fewer times share a row

Data: the fictional demo store (towers.synthetic.demo_store) and the planted benchmarks
(towers.synthetic.planted), generated afresh for every seed (seed s: store seed 7 + s, planted seed s,
run.seed s). Every model is trained through towers.api.train with a config written to the work folder
(the repo's demo and planted configs with their data paths repointed and a few keys overridden);
only held-out validation and test figures are reported. Each table ends with the rule that picks the
recommended value.

    .venv/bin/python scripts/measure_defaults.py            # full grid, 66 runs, about 10 minutes on 2 cores
    .venv/bin/python scripts/measure_defaults.py --quick    # reduced grid, under 3 minutes
    .venv/bin/python scripts/measure_defaults.py --keep --work /tmp/defaults   # keep data, configs, runs, logs

Training logs go to WORK/logs/ and one line per run to stderr; stdout holds only the tables. A --work
folder used again reads back the runs whose config is unchanged instead of training them again. Timings
are taken on a shared machine: read them as ratios within one table, not as absolute speeds.
"""

from __future__ import annotations

import argparse
import contextlib
import copy
import json
import math
import shutil
import statistics
import sys
import tempfile
import time
from pathlib import Path

import pandas as pd
import yaml

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from towers import config as C  # noqa: E402
from towers.api import train as train_run  # noqa: E402
from towers.data.encoders import make_encoder  # noqa: E402
from towers.model.bundle import load_payload  # noqa: E402
from towers.synthetic.demo_store import generate_store  # noqa: E402
from towers.synthetic.planted import generate_explicit, generate_implicit  # noqa: E402

EV = C.SCHEMA["evaluation"]
DEFAULT_STEPS = EV["baseline_row_steps"].default
DEFAULT_ROUNDS = EV["baseline_rounds"].default
DEFAULT_ALPHA = EV["baseline_event_weight"].default
DEFAULT_TOKENS = C.FEATURE_KEYS["token_limit"].default
DEFAULT_RARE = C.FEATURE_KEYS["rare_below"].default

# The grids: (full, quick).
GRID = {
    "row_steps": ([0, 1, 2, 3, 5], [0, 1, 3]),
    "cap_explicit": (60, 30),          # rounds given to every ALS run on ratings (no early stopping)
    "cap_implicit": (25, 12),          # rounds given to every weighted ALS run (no early stopping)
    "event_weight": ([1, 3, 10, 30, 100], [1, 10, 100]),
    "token_limit": ([4, 8, 16, 32, 64], [4, 8, 32]),
    "rare_below": ([1, 2, 5], [1, 2]),
    "tower_epochs": (5, 3),
    "seeds": (2, 1),
}

# Rule constants (stated again under each table).
OBJECTIVE_TOL = 1e-3      # row steps: final objective within this share of Cholesky's
SETTLE_TOL = {"rmse": 1e-3, "recall@20": 1e-2}  # rounds: "settled" once within this share of the best
CAP_MARGIN = 1.5          # rounds: cap = this times the latest settle round, rounded up to a multiple of 5
TIE_SHARE = 0.01          # features: differences below 1% (or the seed spread, or the training noise) are ties


# ---------------------------------------------------------------- data and configs

class Workspace:
    """The work folder: generated data per seed, configs, run folders and training logs."""

    def __init__(self, path: Path, quick: bool):
        self.path, self.quick = path, quick
        for sub in ("data", "configs", "runs", "logs"):
            (path / sub).mkdir(parents=True, exist_ok=True)
        self.runs_done = 0
        self.train_seconds = 0.0

    def data(self, kind: str, seed: int) -> Path:
        """Generate (once) and return the data folder of one data set and seed."""
        out = self.path / "data" / f"{kind}-{seed}"
        if (out / ".done").is_file():
            return out
        if kind == "store":
            sizes = dict(n_items=1500, n_customers=2000, n_new_items=150) if self.quick else {}
            generate_store(out, seed=7 + seed, **sizes)
        elif kind == "explicit":
            generate_explicit(out, seed=seed)
        elif kind == "implicit":
            generate_implicit(out, seed=seed)
        else:
            raise ValueError(kind)
        (out / ".done").write_text("")
        return out

    def config(self, base: str, kind: str, seed: int, changes: dict) -> dict:
        """configs/BASE.yaml with its paths pointed into the data folder, threads 1, no report, CHANGES on top."""
        data = self.data(kind, seed)
        cfg = yaml.safe_load((ROOT / "configs" / f"{base}.yaml").read_text(encoding="utf-8"))
        for section in ("interactions", "users", "items"):
            if section in cfg and cfg[section].get("path"):
                cfg[section]["path"] = str(data / Path(cfg[section]["path"]).name)
        for key in ("oracle_users", "oracle_items"):
            if cfg.get("evaluation", {}).get(key):
                cfg["evaluation"][key] = str(data / "truth" / Path(cfg["evaluation"][key]).name)
        cfg.setdefault("run", {}).update(threads=1, seed=seed)
        cfg.setdefault("training", {}).update(progress="plain")
        cfg["report"] = {"enabled": False}
        for section, keys in changes.items():
            cfg.setdefault(section, {}).update(keys)
        return cfg

    def train(self, name: str, cfg: dict) -> dict:
        """Train one config through towers.api.train; returns metrics, per-round history, sizes and wall time."""
        cfg_path = self.path / "configs" / f"{name}.yaml"
        text = yaml.safe_dump(cfg, sort_keys=False)
        out = self.path / "runs" / name
        # a finished run of the very same config in a reused --work folder is read back, not trained again
        cached = cfg_path.is_file() and cfg_path.read_text(encoding="utf-8") == text and (out / "metrics.json").is_file()
        wall = 0.0
        if not cached:
            cfg_path.write_text(text, encoding="utf-8")
            started = time.perf_counter()
            with open(self.path / "logs" / f"{name}.log", "w", encoding="utf-8") as log, contextlib.redirect_stderr(log):
                train_run(cfg_path, out, overwrite=True)
            wall = time.perf_counter() - started
            self.runs_done += 1
            self.train_seconds += wall
        print(f"  run {name:<46} " + ("(finished earlier, read back)" if cached else f"{wall:6.1f} s"),
              file=sys.stderr, flush=True)
        metrics = json.loads((out / "metrics.json").read_text())
        history = json.loads((out / "history.json").read_text())["epochs"]
        pairs = load_payload(out / "pairs.pt", "pairs file")
        return {"metrics": metrics, "history": history, "n_train": len(pairs["train"]["query"]),
                "wall": wall, "out": out, "config": cfg_path}


def set_feature_options(cfg: dict, **options) -> dict:
    """Set options on every categorical and token feature of both sides (token_limit on token features only)."""
    cfg = copy.deepcopy(cfg)
    for side in ("users", "items"):
        for f in cfg.get(side, {}).get("features", []) or []:
            if f["kind"] in ("categorical", "tokens"):
                for key, value in options.items():
                    if key != "token_limit" or f["kind"] == "tokens":
                        f[key] = value
    return cfg


# ---------------------------------------------------------------- small helpers

def mean(values) -> float:
    values = [v for v in values if v is not None]
    return statistics.fmean(values) if values else float("nan")


def half_range(values) -> float:
    values = [v for v in values if v is not None]
    return (max(values) - min(values)) / 2 if len(values) > 1 else 0.0


def seconds_per_round(rows: list[dict], n_train: int) -> float:
    """Median seconds per round (epoch or sweep) from history's pairs_per_s, which counts training pairs."""
    return statistics.median(n_train / r["pairs_per_s"] for r in rows if r["pairs_per_s"] > 0)


def early_stop(values: list[float], patience: int, lower: bool) -> tuple[int, int]:
    """(round where training stops, best round) under `patience`, as towers' EarlyStopping counts them."""
    best, best_round, stale = None, 0, 0
    for i, v in enumerate(values, 1):
        if best is None or (v < best if lower else v > best):
            best, best_round, stale = v, i, 0
        else:
            stale += 1
        if stale >= patience:
            return i, best_round
    return len(values), best_round


def settle_round(values: list[float], lower: bool, tol: float) -> int:
    """First round whose value is within `tol` (a share) of the best value over all rounds."""
    best = min(values) if lower else max(values)
    for i, v in enumerate(values, 1):
        if (v <= best * (1 + tol)) if lower else (v >= best * (1 - tol)):
            return i
    return len(values)


def table(headers: list[str], rows: list[list], title: str) -> str:
    """A plain text table: first column left-aligned, the rest right-aligned."""
    cells = [[str(h) for h in headers]] + [[str(c) for c in r] for r in rows]
    widths = [max(len(r[i]) for r in cells) for i in range(len(headers))]
    lines = [title]
    for j, r in enumerate(cells):
        lines.append("  ".join(c.ljust(widths[i]) if i == 0 else c.rjust(widths[i]) for i, c in enumerate(r)))
        if j == 0:
            lines.append("  ".join("-" * w for w in widths))
    return "\n".join(lines)


def seeds_text(values, fmt: str) -> str:
    return "/".join(format(v, fmt) for v in values)


# ---------------------------------------------------------------- 1 and 2: ALS row steps and rounds

EXPLICIT_SETS = {  # name: (config, data kind)
    "demo ratings": ("store_ratings", "store"),
    "planted explicit": ("planted_explicit", "explicit"),
}


def measure_row_steps(ws: Workspace, seeds: list[int], steps_grid: list[int], cap: int) -> dict:
    """ALS on ratings for every row-step count: every run gets `cap` rounds with no early stopping."""
    out = {}
    for set_name, (base, kind) in EXPLICIT_SETS.items():
        for seed in seeds:
            for steps in steps_grid:
                cfg = ws.config(base, kind, seed, {
                    "evaluation": {"baseline_solver": "als", "baseline_row_steps": steps, "baseline_rounds": cap},
                    # the towers are not measured here: one epoch; patience = cap turns early stopping off
                    "training": {"epochs": 1, "patience": cap},
                })
                run = ws.train(f"als-{kind}-s{seed}-steps{steps}", cfg)
                rows = run["history"]["linear_factor"]
                valid = [r["valid_rmse"] for r in rows]
                out[(set_name, seed, steps)] = {
                    "valid": valid, "objective": [r["loss"] for r in rows],
                    "sec_round": seconds_per_round(rows, run["n_train"]),
                    "test": run["metrics"]["warm"]["linear_factor"]["rmse"],
                    "popularity": run["metrics"]["warm"]["popularity"]["rmse"],
                }
    return out


def report_row_steps(res: dict, seeds: list[int], steps_grid: list[int], cap: int) -> tuple[str, int]:
    parts, worst_gap = [], dict.fromkeys(steps_grid, 0.0)
    at = min(DEFAULT_ROUNDS, cap)
    for set_name in EXPLICIT_SETS:
        chol = {seed: res[(set_name, seed, 0)] for seed in seeds} if 0 in steps_grid else None
        rows = []
        for steps in steps_grid:
            runs = [res[(set_name, seed, steps)] for seed in seeds]
            best = [min(r["valid"]) for r in runs]
            best_round = [r["valid"].index(min(r["valid"])) + 1 for r in runs]
            stops = [early_stop(r["valid"], C.SCHEMA["training"]["patience"].default, True) for r in runs]
            gaps = [(r["objective"][-1] - chol[seed]["objective"][-1]) / chol[seed]["objective"][-1]
                    for r, seed in zip(runs, seeds)] if chol else [float("nan")]
            worst_gap[steps] = max(worst_gap[steps], max(gaps))
            sec = mean(r["sec_round"] for r in runs)
            sec0 = mean(c["sec_round"] for c in chol.values()) if chol else float("nan")
            rows.append([
                "cholesky" if steps == 0 else steps,
                f"{mean(best):.4f}", seeds_text(best_round, "d"),
                f"{mean(r['valid'][at - 1] for r in runs):.4f}",
                f"{mean(r['test'] for r in runs):.4f}",
                f"{sec * 1000:.1f}", f"{sec / sec0:.2f}",
                f"{mean(r['objective'][at - 1] for r in runs):.6f}",
                f"{mean(r['objective'][-1] for r in runs):.6f}",
                f"{max(gaps):+.1e}",
                seeds_text([s[0] for s in stops], "d"),
            ])
        parts.append(table(
            ["row steps", "best valid RMSE", "best round", f"valid @{at}", "test RMSE", "ms/round", "x cholesky",
             f"objective @{at}", f"objective @{cap}", "gap @cap", "patience stop"], rows,
            f"{set_name} (ALS, {cap} rounds, no early stopping; mean of {len(seeds)} seed(s), per-seed values a/b; "
            f"popularity's test RMSE {mean(res[(set_name, s, steps_grid[0])]['popularity'] for s in seeds):.4f})"))
    ok = [s for s in steps_grid if s > 0 and worst_gap[s] <= OBJECTIVE_TOL]
    pick = min(ok) if ok else 0
    gaps = ", ".join(f"{s}: {worst_gap[s]:+.1e}" for s in steps_grid if s > 0)
    rule = (f"rule: the fewest CG steps whose objective after {cap} rounds is within {OBJECTIVE_TOL:g} (relative) of "
            f"Cholesky's on every data set and seed, since each step costs time; Cholesky (0) if none is.\n"
            f"worst relative gap per step count: {gaps}\n"
            f"recommended evaluation.baseline_row_steps: {pick} (current default {DEFAULT_STEPS})")
    return "\n\n".join(parts) + "\n" + rule, pick


def report_rounds(als: dict, wals: dict, seeds: list[int], steps: int, alpha: float, caps: tuple[int, int]) -> tuple[str, int]:
    """Where validation settles with the chosen row steps: ratings (ALS) and events (weighted ALS)."""
    rows, latest, capped, per_set = [], 0, [], {}
    patience = C.SCHEMA["training"]["patience"].default
    sources = [(name, "rmse", True, caps[0], lambda n, s: als[(n, s, steps)]) for name in EXPLICIT_SETS] + \
              [(name, "recall@20", False, caps[1], lambda n, s: wals[(n, s, alpha)]) for name in IMPLICIT_SETS]
    for name, metric, lower, cap, get in sources:
        for seed in seeds:
            v = get(name, seed)["valid"]
            best = min(v) if lower else max(v)
            settle = settle_round(v, lower, SETTLE_TOL[metric])
            stop, stop_best = early_stop(v, patience, lower)
            latest = max(latest, settle)
            per_set[name] = max(per_set.get(name, 0), settle)
            if settle >= cap - 1:
                capped.append(f"{name} seed {seed}")
            at = min(DEFAULT_ROUNDS, cap)
            rows.append([f"{name} s{seed}", metric, cap, f"{best:.4f}", v.index(best) + 1, settle,
                         f"{v[at - 1]:.4f}", f"{stop} ({v[stop_best - 1]:.4f})"])
    cap_of = lambda r: max(5, int(math.ceil(CAP_MARGIN * r / 5.0)) * 5)  # noqa: E731
    pick = cap_of(latest)
    text = table(["data set", "metric", "cap", "best valid", "best round", "settled at", f"valid @{DEFAULT_ROUNDS}",
                  f"patience-{patience} stop (valid)"], rows,
                 f"validation per round with row steps {steps} (weighted ALS at alpha {alpha:g}); no early stopping")
    text += (f"\nsettled at = first round within {SETTLE_TOL['rmse']:g} (RMSE) or {SETTLE_TOL['recall@20']:g} "
             f"(recall@20) relative of the best round's value.\n"
             f"rule: cap = the latest settle round times {CAP_MARGIN:g}, rounded up to a multiple of 5 "
             f"(early stopping still ends runs sooner).\n")
    if capped:
        text += f"note: settled only at the end of the cap on {', '.join(capped)}: the latest settle round is a lower bound.\n"
    text += ("the rule on each data set alone: " + ", ".join(f"{n} {cap_of(r)}" for n, r in per_set.items()) + "\n"
             f"recommended evaluation.baseline_rounds: {pick} (current default {DEFAULT_ROUNDS})")
    return text, pick


# ---------------------------------------------------------------- 3: weighted ALS's event weight

IMPLICIT_SETS = {
    "demo baskets": ("store_baskets", "store"),
    "planted implicit": ("planted_implicit", "implicit"),
}


def measure_event_weight(ws: Workspace, seeds: list[int], alphas: list[float], steps: int, cap: int) -> dict:
    out = {}
    for set_name, (base, kind) in IMPLICIT_SETS.items():
        for seed in seeds:
            for alpha in alphas:
                cfg = ws.config(base, kind, seed, {
                    "evaluation": {"baseline_solver": "weighted_als", "baseline_event_weight": alpha,
                                   "baseline_row_steps": steps, "baseline_rounds": cap, "bilinear": False},
                    "training": {"epochs": 1, "patience": cap},
                })
                run = ws.train(f"wals-{kind}-s{seed}-alpha{alpha:g}", cfg)
                rows = run["history"]["linear_factor"]
                out[(set_name, seed, alpha)] = {
                    "valid": [r["valid_recall@20"] for r in rows], "objective": [r["loss"] for r in rows],
                    "sec_round": seconds_per_round(rows, run["n_train"]),
                    "test": run["metrics"]["warm"]["linear_factor"]["recall@20"],
                    "popularity": run["metrics"]["warm"]["popularity"]["recall@20"],
                }
    return out


def measure_weighted_check(ws: Workspace, seeds: list[int], alpha: float, steps: int, cap: int, wals: dict) -> dict:
    """Weighted ALS by Cholesky at `alpha`, beside the CG runs with `steps` already in `wals`."""
    out = {}
    for set_name, (base, kind) in IMPLICIT_SETS.items():
        for seed in seeds:
            cfg = ws.config(base, kind, seed, {
                "evaluation": {"baseline_solver": "weighted_als", "baseline_event_weight": alpha,
                               "baseline_row_steps": 0, "baseline_rounds": cap, "bilinear": False},
                "training": {"epochs": 1, "patience": cap},
            })
            run = ws.train(f"wals-{kind}-s{seed}-alpha{alpha:g}-cholesky", cfg)
            rows = run["history"]["linear_factor"]
            out[(set_name, seed, 0)] = {"valid": [r["valid_recall@20"] for r in rows],
                                        "objective": [r["loss"] for r in rows],
                                        "sec_round": seconds_per_round(rows, run["n_train"]),
                                        "test": run["metrics"]["warm"]["linear_factor"]["recall@20"]}
            out[(set_name, seed, steps)] = wals[(set_name, seed, alpha)]
    return out


def report_weighted_check(res: dict, seeds: list[int], alpha: float, steps: int, cap: int) -> str:
    rows = []
    for set_name in IMPLICIT_SETS:
        for s in (0, steps):
            runs = [res[(set_name, seed, s)] for seed in seeds]
            gaps = [(r["objective"][-1] - c["objective"][-1]) / c["objective"][-1]
                    for r, c in zip(runs, [res[(set_name, seed, 0)] for seed in seeds])]
            sec0 = mean(res[(set_name, seed, 0)]["sec_round"] for seed in seeds)
            rows.append([f"{set_name}, {'cholesky' if s == 0 else s}", f"{mean(max(r['valid']) for r in runs):.4f}",
                         f"{mean(r['test'] for r in runs):.4f}", f"{mean(r['objective'][-1] for r in runs):.6f}",
                         f"{max(gaps):+.1e}", f"{mean(r['sec_round'] for r in runs) * 1000:.0f}",
                         f"{mean(r['sec_round'] for r in runs) / sec0:.2f}"])
    return table(["data set, row steps", "best valid recall@20", "test recall@20", f"objective @{cap}", "gap @cap",
                  "ms/round", "x cholesky"], rows,
                 f"check on events: weighted ALS at alpha {alpha:g}, {cap} rounds, row steps {steps} against Cholesky "
                 "(not part of the rule above)")


def report_event_weight(res: dict, seeds: list[int], alphas: list[float], grid: list[float], steps: int,
                        cap: int) -> tuple[str, float]:
    parts, ratio = [], {a: [] for a in alphas}
    for set_name in IMPLICIT_SETS:
        best_valid = {a: mean(max(res[(set_name, s, a)]["valid"]) for s in seeds) for a in alphas}
        top = max(best_valid[a] for a in grid)
        rows = []
        for a in alphas:
            runs = [res[(set_name, s, a)] for s in seeds]
            ratio[a].append(best_valid[a] / top)
            rows.append([f"{a:g}" + ("  (current)" if a == DEFAULT_ALPHA else ""),
                         f"{best_valid[a]:.4f}", seeds_text([max(r["valid"]) for r in runs], ".4f"),
                         seeds_text([r["valid"].index(max(r["valid"])) + 1 for r in runs], "d"),
                         f"{best_valid[a] / top:.3f}",
                         f"{mean(r['test'] for r in runs):.4f}", seeds_text([r["test"] for r in runs], ".4f"),
                         f"{mean(r['sec_round'] for r in runs) * 1000:.0f}"])
        pop = mean(res[(set_name, s, alphas[0])]["popularity"] for s in seeds)
        parts.append(table(["alpha", "best valid recall@20", "per seed", "best round", "/ best", "test recall@20",
                            "per seed", "ms/round"], rows,
                           f"{set_name} (weighted ALS, row steps {steps}, {cap} rounds, no early stopping; "
                           f"linear factor model; popularity's test recall@20 {pop:.4f})"))
    worst = {a: min(ratio[a]) for a in alphas}
    pick = max(grid, key=lambda a: (worst[a], -a))
    text = "\n\n".join(parts)
    text += ("\nrule: on each data set, divide each alpha's best validation recall@20 (mean over seeds) by the best "
             "alpha's there; recommend the grid value whose worst such ratio over the data sets is highest "
             "(test recall@20 is shown as a check, not used).\n"
             "worst ratio: " + ", ".join(f"{a:g}: {worst[a]:.3f}" for a in alphas) + "\n"
             f"recommended evaluation.baseline_event_weight: {pick:g} (current default {DEFAULT_ALPHA:g})")
    return text, pick


# ---------------------------------------------------------------- 4: token_limit and rare_below

# The store's item name (brand, variant and noun, e.g. "Copperwren Pro Trowel") is its only value set with
# many rare values (most names occur once), so one set adds it as a categorical feature: the baskets
# config leaves it out, and without it no value in these data is seen fewer than 5 times.
FEATURE_SETS = {  # name: (config, data kind, extra item features)
    "demo baskets": ("store_baskets", "store", []),
    "demo baskets + item name": ("store_baskets", "store", [{"name": "name", "kind": "categorical"}]),
    "planted implicit": ("planted_implicit", "implicit", []),
}


def feature_config(ws: Workspace, set_name: str, seed: int, epochs: int, **options) -> dict:
    base, kind, extra = FEATURE_SETS[set_name]
    cfg = ws.config(base, kind, seed, {"evaluation": {"baseline": False, "bilinear": False},
                                       "training": {"epochs": epochs}})
    cfg["items"]["features"] = list(cfg["items"]["features"]) + extra
    return set_feature_options(cfg, **options)


def vocabularies(run: dict, rare_values: list[int]) -> dict:
    """{rare_below: {side.feature: vocabulary}} as towers' encoders fit them on this run's training entities."""
    cfg = C.load(run["config"])
    pairs = load_payload(run["out"] / "pairs.pt", "pairs file")
    out = {r: {} for r in rare_values}
    sides = (("users", "query_ids", "query"), ("items", "item_ids", "candidate"))
    for side, ids_key, column in sides:
        spec = cfg[side]
        names = [f for f in spec["features"] if f["kind"] in ("categorical", "tokens")]
        if not names or not spec["path"]:
            continue
        path = Path(spec["path"])
        frame = pd.read_parquet(path) if path.suffix == ".parquet" else pd.read_csv(path)
        catalog = pairs[ids_key]
        trained = {str(catalog[i]) for i in pairs["train"][column].unique().tolist()}
        rows = frame[frame[spec["id_column"]].astype(str).isin(trained)]
        for f in names:
            for r in rare_values:
                enc = make_encoder(dict(f, rare_below=r)).fit(rows[f["name"]], path)
                out[r][f"{side}.{f['name']}"] = enc.vocab
    return out


def token_lengths(ws: Workspace, seed: int) -> pd.Series:
    items = pd.read_parquet(ws.data("store", seed) / "items.parquet")
    return items["tags"].map(len)


def measure_features(ws: Workspace, seeds: list[int], tokens: list[int], rares: list[int], epochs: int) -> dict:
    """Towers' test recall@20 (warm, cold) for each token_limit and rare_below; identical inputs are trained once."""
    res = {}

    def record(key, run):
        rows = run["history"]["towers"]
        m = run["metrics"]
        res[key] = {"warm": m["warm"]["towers"]["recall@20"], "cold": m["cold"]["towers"]["recall@20"],
                    "valid": max(r["valid_recall@20"] for r in rows), "epochs": len(rows),
                    "sec_epoch": seconds_per_round(rows, run["n_train"]), "trained": True}

    for set_name, (_, kind, _) in FEATURE_SETS.items():
        has_tokens = kind == "store"
        for seed in seeds:
            base_key = (set_name, seed, DEFAULT_RARE, DEFAULT_TOKENS)
            base = ws.train(f"feat-{set_name.replace(' ', '').replace('+', '-')}-s{seed}-r{DEFAULT_RARE}-t{DEFAULT_TOKENS}",
                            feature_config(ws, set_name, seed, epochs, rare_below=DEFAULT_RARE, token_limit=DEFAULT_TOKENS))
            record(base_key, base)
            vocab = vocabularies(base, sorted(set(rares) | {DEFAULT_RARE}))
            res[(set_name, seed, "vocab")] = {r: {k: len(v) for k, v in vs.items()} for r, vs in vocab.items()}
            for r in rares:
                if r == DEFAULT_RARE:
                    continue
                key = (set_name, seed, r, DEFAULT_TOKENS)
                if vocab[r] == vocab[DEFAULT_RARE]:  # the same vocabularies: the same input, the same seeded run
                    res[key] = dict(res[base_key], trained=False)
                    continue
                record(key, ws.train(f"feat-{set_name.replace(' ', '').replace('+', '-')}-s{seed}-r{r}-t{DEFAULT_TOKENS}",
                                     feature_config(ws, set_name, seed, epochs, rare_below=r, token_limit=DEFAULT_TOKENS)))
            if has_tokens and set_name == "demo baskets":
                for t in tokens:
                    if t == DEFAULT_TOKENS:
                        continue
                    record((set_name, seed, DEFAULT_RARE, t),
                           ws.train(f"feat-baskets-s{seed}-r{DEFAULT_RARE}-t{t}",
                                    feature_config(ws, set_name, seed, epochs, rare_below=DEFAULT_RARE, token_limit=t)))
    return res


def training_noise(res: dict, seeds: list[int], tokens: list[int], longest: int) -> tuple[dict, list[int]]:
    """Relative spread of test recall@20 among token limits that leave the input unchanged, per slice.

    Every limit at or above the longest list encodes the same tokens; only the zero padding differs, which
    changes nothing but the floating-point order of the embedding gradients' sums. Their spread is therefore
    the training noise of one run: how far two runs differ for no reason the data could explain.
    """
    same = [t for t in tokens if t >= longest]
    if len(same) < 2:
        return {"warm": 0.0, "cold": 0.0}, same
    out = {}
    for slice_name in ("warm", "cold"):
        means = [mean(res[("demo baskets", s, DEFAULT_RARE, t)][slice_name] for s in seeds) for t in same]
        out[slice_name] = (max(means) - min(means)) / min(means)  # as a share of the lowest: never below the spread
    return out, same


def _feature_pick(res: dict, sets: list[str], seeds: list[int], values: list[int], key_of, current: int,
                  noise: dict) -> tuple[int, list[str]]:
    """Keep `current` unless a value is better beyond the noise margin on warm or cold and not worse on the other."""
    lines, better, worse, ratios = [], dict.fromkeys(values, 0), dict.fromkeys(values, 0), {v: [] for v in values}
    for set_name in sets:
        for slice_name in ("warm", "cold"):
            means = {v: mean(res[key_of(set_name, s, v)][slice_name] for s in seeds) for v in values}
            spreads = {v: half_range([res[key_of(set_name, s, v)][slice_name] for s in seeds]) for v in values}
            ref = means[current]
            margin = max(TIE_SHARE * ref, max(spreads.values()), noise[slice_name] * ref)
            marks = []
            for v in values:
                d = means[v] - ref
                better[v] += d > margin
                worse[v] += d < -margin
                ratios[v].append(means[v] / ref)
                if v != current:
                    marks.append(f"{v}: {d:+.4f} " + ("(better)" if d > margin else "(worse)" if d < -margin else "(tie)"))
            lines.append(f"  {set_name}, {slice_name}: current {current} {ref:.4f}, margin {margin:.4f}; " + ", ".join(marks))
    winners = [v for v in values if v != current and better[v] and not worse[v]]
    if not winners:
        return current, lines
    return max(winners, key=lambda v: mean(ratios[v])), lines


def report_features(ws: Workspace, res: dict, seeds: list[int], tokens: list[int], rares: list[int]) -> tuple[str, int, int]:
    parts = []
    # token lists as generated
    lengths = pd.concat([token_lengths(ws, s) for s in seeds])
    counts = lengths.value_counts().sort_index()
    parts.append("demo store item tags per item (all seeds): "
                 + ", ".join(f"{n} tokens: {c}" for n, c in counts.items())
                 + f"; longest {lengths.max()}. Planted implicit items have no token feature.")

    # token_limit on demo baskets
    rows = []
    t_sec0 = mean(res[("demo baskets", s, DEFAULT_RARE, DEFAULT_TOKENS)]["sec_epoch"] for s in seeds)
    for t in tokens:
        runs = [res[("demo baskets", s, DEFAULT_RARE, t)] for s in seeds]
        cut = float((lengths > t).mean())
        rows.append([f"{t}" + ("  (current)" if t == DEFAULT_TOKENS else ""), f"{cut:.1%}",
                     f"{mean(r['warm'] for r in runs):.4f}", seeds_text([r["warm"] for r in runs], ".4f"),
                     f"{mean(r['cold'] for r in runs):.4f}", seeds_text([r["cold"] for r in runs], ".4f"),
                     f"{mean(r['valid'] for r in runs):.4f}",
                     f"{mean(r['sec_epoch'] for r in runs):.2f}",
                     f"{mean(r['sec_epoch'] for r in runs) / t_sec0:.2f}"])
    parts.append(table(["token_limit", "items cut", "warm recall@20", "per seed", "cold recall@20", "per seed",
                        "best valid", "s/epoch", f"x limit {DEFAULT_TOKENS}"], rows,
                       f"token_limit on demo baskets (towers; test recall@20, mean of {len(seeds)} seed(s))"))
    noise, same = training_noise(res, seeds, tokens, int(lengths.max()))
    t_pick, t_lines = _feature_pick(res, ["demo baskets"], seeds, tokens,
                                    lambda n, s, v: (n, s, DEFAULT_RARE, v), DEFAULT_TOKENS, noise)

    # rare_below on every feature set
    rows, vocab_lines = [], []
    for set_name in FEATURE_SETS:
        for r in rares:
            runs = [res[(set_name, s, r, DEFAULT_TOKENS)] for s in seeds]
            shared = "" if all(x["trained"] for x in runs) or r == DEFAULT_RARE else "  = r1 input"
            rows.append([f"{set_name}, {r}" + ("  (current)" if r == DEFAULT_RARE else "") + shared,
                         f"{mean(x['warm'] for x in runs):.4f}", seeds_text([x["warm"] for x in runs], ".4f"),
                         f"{mean(x['cold'] for x in runs):.4f}", seeds_text([x["cold"] for x in runs], ".4f"),
                         f"{mean(x['valid'] for x in runs):.4f}", f"{mean(x['sec_epoch'] for x in runs):.2f}"])
        sizes = res[(set_name, seeds[0], "vocab")]
        feats = sorted(next(iter(sizes.values())))
        vocab_lines.append(f"  {set_name} (seed {seeds[0]}): " + "; ".join(
            f"{f} " + "/".join(str(sizes[r][f]) for r in rares) for f in feats))
    parts.append(table(["data set, rare_below", "warm recall@20", "per seed", "cold recall@20", "per seed",
                        "best valid", "s/epoch"], rows,
                       f"rare_below (towers; test recall@20, mean of {len(seeds)} seed(s); '= r1 input': the "
                       f"vocabularies equal rare_below {DEFAULT_RARE}'s, so its run stands for this value)"))
    parts.append(f"vocabulary sizes at rare_below {'/'.join(map(str, rares))}, fitted by towers' encoders on the "
                 "training entities:\n" + "\n".join(vocab_lines))
    r_pick, r_lines = _feature_pick(res, list(FEATURE_SETS), seeds, rares,
                                    lambda n, s, v: (n, s, v, DEFAULT_TOKENS), DEFAULT_RARE, noise)

    noise_text = (f"training noise: token limits {', '.join(map(str, same))} encode the same tokens (only the zero "
                  "padding differs, which changes the floating-point order of gradient sums and nothing else), yet "
                  f"their mean test recall@20 spans {noise['warm']:.1%} (warm) and {noise['cold']:.1%} (cold) of the lowest "
                  "mean: differences that small are noise here." if len(same) > 1 and max(noise.values()) > 0 else
                  f"training noise: token limits {', '.join(map(str, same))} encode the same tokens and gave the same "
                  "figures here, so this run measures no training noise; the margin below is only 1% and the seed "
                  "spread, which understates the noise (the full run's identical inputs spread by a few percent)."
                  if len(same) > 1 else
                  "training noise: not measured (fewer than two token limits at or above the longest list).")
    rule = (f"rule (both keys): a value differs from the current default only when its mean test recall@20 differs by "
            f"more than a margin, the largest of {TIE_SHARE:.0%} of the default's value, the largest seed half-range, "
            "and the training noise above (as a share); keep the current default unless a value is better beyond the "
            "margin on warm or cold and worse beyond it on neither (then the best such value).")
    parts.append(noise_text + "\n" + rule + "\ntoken_limit against the current default:\n" + "\n".join(t_lines)
                 + f"\nrecommended token_limit: {t_pick} (current default {DEFAULT_TOKENS})"
                 + "\nrare_below against the current default:\n" + "\n".join(r_lines)
                 + f"\nrecommended rare_below: {r_pick} (current default {DEFAULT_RARE})")
    return "\n\n".join(parts), t_pick, r_pick


# ---------------------------------------------------------------- main

def main(argv=None) -> int:
    parser = argparse.ArgumentParser(prog="scripts/measure_defaults.py", description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="reduced grid, one seed, smaller store (under 3 minutes)")
    parser.add_argument("--seeds", type=int, default=None, help="seeds per measurement (default 2, quick 1)")
    parser.add_argument("--work", default=None, help="work folder (default: a new temp folder, removed at the end)")
    parser.add_argument("--keep", action="store_true", help="keep the work folder (data, configs, runs, logs)")
    args = parser.parse_args(argv)
    pick = lambda key: GRID[key][1] if args.quick else GRID[key][0]  # noqa: E731
    seeds = list(range(args.seeds if args.seeds else pick("seeds")))
    work = Path(args.work) if args.work else Path(tempfile.mkdtemp(prefix="towers-defaults-"))
    ws = Workspace(work, args.quick)
    started = time.perf_counter()
    print(f"measure_defaults: {'quick' if args.quick else 'full'} grid, seeds {seeds}, work folder {work}", flush=True)
    try:
        steps_grid, cap_e, cap_i = pick("row_steps"), pick("cap_explicit"), pick("cap_implicit")
        alphas_grid = [float(a) for a in pick("event_weight")]
        alphas = sorted(set(alphas_grid) | {float(DEFAULT_ALPHA)})
        tokens, rares = pick("token_limit"), pick("rare_below")

        als = measure_row_steps(ws, seeds, steps_grid, cap_e)
        text1, steps = report_row_steps(als, seeds, steps_grid, cap_e)
        wals = measure_event_weight(ws, seeds, alphas, steps, cap_i)
        text3, alpha = report_event_weight(wals, seeds, alphas, alphas_grid, steps, cap_i)
        if steps:
            check = measure_weighted_check(ws, seeds, alpha, steps, cap_i, wals)
            text1 += "\n\n" + report_weighted_check(check, seeds, alpha, steps, cap_i)
        print("\n== 1. evaluation.baseline_row_steps ==\n" + text1, flush=True)
        text2, rounds = report_rounds(als, wals, seeds, steps, alpha, (cap_e, cap_i))
        print("\n== 2. evaluation.baseline_rounds ==\n" + text2, flush=True)
        print("\n== 3. evaluation.baseline_event_weight ==\n" + text3, flush=True)

        feats = measure_features(ws, seeds, tokens, rares, pick("tower_epochs"))
        text4, token_limit, rare_below = report_features(ws, feats, seeds, tokens, rares)
        print("\n== 4. feature options token_limit and rare_below ==\n" + text4, flush=True)

        total = time.perf_counter() - started
        print("\n== recommended defaults ==")
        for key, value, current in (("evaluation.baseline_row_steps", steps, DEFAULT_STEPS),
                                    ("evaluation.baseline_rounds", rounds, DEFAULT_ROUNDS),
                                    ("evaluation.baseline_event_weight", f"{alpha:g}", f"{DEFAULT_ALPHA:g}"),
                                    ("features[].token_limit", token_limit, DEFAULT_TOKENS),
                                    ("features[].rare_below", rare_below, DEFAULT_RARE),
                                    ("features[].hashed_rows", "not measured", C.FEATURE_KEYS["hashed_rows"].default)):
            print(f"{key:<36} {str(value):>14}   (current {current})")
        print(f"\n{ws.runs_done} training runs, {ws.train_seconds:.0f} s of training, {total:.0f} s in all")
        if args.quick:
            print("quick grid: one seed, a smaller store and short caps; it checks that everything runs. Take the "
                  "recommended defaults from the full grid, whose noise margins are measured.")
    finally:
        if not args.keep and not args.work:
            shutil.rmtree(work, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
