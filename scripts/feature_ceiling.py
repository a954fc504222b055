"""How far cold-start recall can go on planted data: the oracle that knows only an item's features.

A model ranks items held out whole from their features alone, so on them it can at best know the part
of each planted vector and bias that the features determine. The demo store writes that part
(truth/item_feature_vectors.parquet); this script scores the run's cold slice with the planted oracle
and again with the held-out items' rows taken from that file (items with history keep their planted
rows: a model can learn them), and prints both beside the run's own towers and popularity.

    .venv/bin/python scripts/feature_ceiling.py demo_runs/copurchase
    .venv/bin/python scripts/feature_ceiling.py RUN_DIR --features PATH   # another feature-part file

The run's config must name evaluation.oracle_users and oracle_items; --features defaults to
item_feature_vectors.parquet beside oracle_items.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from towers.data.embeddings_file import TrueVectors, co_occurrence_vectors, read_embeddings, rows_of
from towers.errors import TowersError
from towers.evaluation.protocol import evaluate_slices, oracle_scorer
from towers.runs.folder import RunFolder
from towers.runs.run import Run

METRICS = ("recall@20", "ndcg@20")


def feature_truth(run: Run, features: str, saved=None) -> tuple[TrueVectors, TrueVectors]:
    """(planted oracle, oracle with the held-out items' rows from the feature-part file); saved: the run's
    pairs file as read (read here when not given)."""
    saved = saved or run.folder.read_pairs()
    ev = run.config.evaluation
    if not ev.oracle_users or not ev.oracle_items:
        raise TowersError(f"{run.dir}: the config names no evaluation.oracle_users / oracle_items")
    cold = saved.split.cold_items
    items, bias = rows_of(ev.oracle_items, saved.item_ids)
    f_items, f_bias = rows_of(features, saved.item_ids)
    mixed, mixed_bias = items.clone(), None if bias is None else bias.clone()
    mixed[cold] = f_items[cold]
    if mixed_bias is not None and f_bias is not None:
        mixed_bias[cold] = f_bias[cold]
    if saved.split.item_item:
        _, users, _, _ = read_embeddings(ev.oracle_users)
        return (co_occurrence_vectors(users, items, bias, ev.oracle_users, ev.oracle_items),
                co_occurrence_vectors(users, mixed, mixed_bias, ev.oracle_users, features))
    users, user_bias = rows_of(ev.oracle_users, saved.query_ids)
    return TrueVectors(users, items, user_bias, bias), TrueVectors(users, mixed, user_bias, mixed_bias)


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("run_dir")
    parser.add_argument("--features", help="feature-part embeddings file (default: beside oracle_items)")
    args = parser.parse_args(argv)
    try:
        run = Run(args.run_dir)
        features = args.features or str(Path(run.config.evaluation.oracle_items).parent / "item_feature_vectors.parquet")
        saved_pairs = run.folder.read_pairs()
        planted, from_features = feature_truth(run, features, saved_pairs)
        split = saved_pairs.split
        rows = {}
        for name, truth in (("oracle", planted), ("features_oracle", from_features)):
            rows[name] = evaluate_slices({"oracle": oracle_scorer(truth)}, split, run.config)["cold"]["oracle"]
        saved = json.loads(run.folder.file(RunFolder.METRICS).read_text())["cold"]
    except (TowersError, KeyError) as exc:
        print(f"feature_ceiling: {exc}", file=sys.stderr)
        return 2
    rows = {"popularity": saved["popularity"], "towers": saved["towers"]} | rows
    chance = rows["popularity"][METRICS[0]]
    print(f"cold slice of {args.run_dir}")
    print(f"{'model':<16}" + "".join(f"{m:>12}" for m in METRICS) + f"{'/ popularity':>14}")
    for name, m in rows.items():
        print(f"{name:<16}" + "".join(f"{m[k]:>12.4f}" for k in METRICS) + f"{m[METRICS[0]] / chance:>14.2f}")
    share = rows["towers"][METRICS[0]] / rows["features_oracle"][METRICS[0]]
    print(f"towers / features_oracle ({METRICS[0]}): {share:.3f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
