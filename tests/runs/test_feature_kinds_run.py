"""A run with a date item feature, a clipped log1p price and a date context column, end to end: trained,
exported, loaded, and new items embedded with the saved reference date and bounds.

Outside reference: the encoders rebuilt from the run's model.pt against encoders fitted by hand on the
training items (the run's own split), and Python datetime for the saved reference date.
"""

from __future__ import annotations

from datetime import datetime, timedelta, timezone

import numpy as np
import pandas as pd
import pytest
import yaml

from towers.api import load
from towers.runs.train import train_run

pytestmark = pytest.mark.slow  # one small training run


def _garden_store(folder):
    """Garden-store items with a listing date and a price, and orders with an order time."""
    rng = np.random.default_rng(4)
    n_items, n_users, n_orders = 40, 60, 1500
    listed = [datetime(2025, 1, 1) + timedelta(days=int(d)) for d in rng.integers(0, 430, n_items)]
    items = pd.DataFrame({"item": [f"GS-{i:03d}" for i in range(n_items)],
                          "listed_on": [d.date().isoformat() for d in listed],
                          "price": np.round(rng.lognormal(3.0, 1.0, n_items), 2)})
    items.loc[3, "listed_on"] = None
    items.to_csv(folder / "items.csv", index=False)
    ordered = datetime(2026, 1, 1) + pd.to_timedelta(rng.integers(0, 60 * 24 * 3600, n_orders), unit="s")
    log = pd.DataFrame({"customer": rng.integers(0, n_users, n_orders), "item": items["item"].to_numpy()[
        rng.integers(0, n_items, n_orders)], "ordered_at": [t.isoformat() + "+01:00" for t in ordered]})
    log.to_csv(folder / "orders.csv", index=False)
    cfg = {
        "run": {"seed": 2, "threads": 1},
        "interactions": {"path": "orders.csv", "query_column": "customer", "candidate_column": "item",
                         "context": [{"name": "ordered_at", "kind": "date", "calendar": True}]},
        "items": {"path": "items.csv", "id_column": "item", "features": [
            {"name": "listed_on", "kind": "date", "calendar": True},
            {"name": "price", "kind": "numeric", "log1p": True, "clip_lower": 0.05, "clip_upper": 0.95}]},
        "model": {"dim": 4, "hidden": [8]},
        "training": {"epochs": 2, "batch_size": 512, "progress": "plain"},
        "evaluation": {"baseline": False, "references": False, "top_k": [5]},
        "report": {"enabled": False},
    }
    (folder / "config.yaml").write_text(yaml.safe_dump(cfg))
    return folder / "config.yaml", items, log


def test_dates_and_numeric_transforms_through_a_whole_run(tmp_path):
    config, items, log = _garden_store(tmp_path)
    result = train_run(config, tmp_path / "run")
    run = load(result["out"])
    listed, price = run.bundle.candidate_encoders.encoders
    # the training items of the run's split: the encoders were fitted on these rows only
    trained = pd.Index(items["item"]).get_indexer(run.bundle.candidate_encoders.id_encoder.ids)
    train_rows = items.iloc[np.sort(trained)]
    latest = max(datetime.fromisoformat(d) for d in train_rows["listed_on"].dropna())  # reference: datetime
    assert listed.reference_date == latest.isoformat()
    prices = train_rows["price"].to_numpy()
    assert (price.low, price.high) == (pytest.approx(np.quantile(prices, 0.05)),  # reference: numpy.quantile
                                       pytest.approx(np.quantile(prices, 0.95)))
    # the context reference is the latest training event: one of the log's times, read in UTC
    utc = {datetime.fromisoformat(t).astimezone(timezone.utc).replace(tzinfo=None) for t in log["ordered_at"]}
    reference = datetime.fromisoformat(run.context.encoders[0].reference_date)
    assert reference in utc and reference >= sorted(utc)[len(utc) // 2]
    new = pd.DataFrame({"item": ["GS-900", "GS-901"], "listed_on": ["2026-06-01", None], "price": [1e5, 0.0]})
    embedded = run.embed_items(new)
    assert len(embedded) == 2 and np.isfinite(np.stack(embedded["embedding"].to_numpy())).all()
