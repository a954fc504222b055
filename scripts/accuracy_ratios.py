"""Ratio rows from a run's metrics.json: each model against the oracle, popularity and the references.

Used by scripts/accuracy (planted data) and scripts/demo (the demo store). A ranking metric is
better when higher, so model/oracle near 1 means close to the limit; for rmse lower is better, so
model/oracle near 1 from above means close to the floor.

    .venv/bin/python scripts/accuracy_ratios.py demo_runs/baskets demo_runs/ratings
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

from towers.evaluation.protocol import SLICES

ROWS = (("towers", "oracle"), ("towers", "popularity"), ("linear_factor", "oracle"))
REFERENCE_ROWS = (("towers", "ease"), ("towers", "item_knn"))  # the references score the warm slice only


def headline_metric(metrics: dict) -> str:
    """rmse for rating runs, else the first recall@K."""
    first = next(iter(metrics["warm"].values()))
    if "rmse" in first:
        return "rmse"
    return next(m for m in first if m.startswith("recall@"))


def ratio(metrics: dict, slice_name: str, model: str, reference: str, metric: str) -> float | None:
    """metrics[slice][model][metric] / metrics[slice][reference][metric], or None when either is absent or 0."""
    s = metrics.get(slice_name, {})
    a, b = s.get(model, {}).get(metric), s.get(reference, {}).get(metric)
    if a is None or not b:
        return None
    return a / b


def ratio_rows(metrics: dict, metric: str | None = None) -> str:
    """The ratio rows of every slice as text: 'towers/oracle', 'towers/popularity', 'linear_factor/oracle', and on
    the warm slice of an implicit run 'towers/ease' and 'towers/item_knn'."""
    metric = metric or headline_metric(metrics)
    lines = []
    for slice_name in [s for s in SLICES if s in metrics]:
        lines.append(f"[{slice_name}] {metric} ratios")
        rows = ROWS + (REFERENCE_ROWS if slice_name == "warm" and metric != "rmse" else ())
        for model, reference in rows:
            r = ratio(metrics, slice_name, model, reference, metric)
            missing = next((m for m in (reference, model) if m not in metrics[slice_name]), None)
            shown = f"{r:.3f}" if r is not None else f"n/a (no {missing} row)" if missing else "n/a (zero)"
            lines.append(f"  {model + '/' + reference:<22}{shown}")
    return "\n".join(lines) + "\n"


def main(argv: list[str]) -> int:
    if not argv:
        print("usage: accuracy_ratios.py RUN_DIR [RUN_DIR ...]", file=sys.stderr)
        return 2
    for run in argv:
        path = Path(run) / "metrics.json"
        if not path.is_file():
            print(f"error: {path}: not found; train the run first", file=sys.stderr)
            return 2
        print(f"== {run}")
        print(ratio_rows(json.loads(path.read_text(encoding="utf-8"))))
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
