"""A whole run trained on pairs that towers derives from the demo store's order export (configs/store_orders.yaml)."""

import pytest

import towers


@pytest.mark.slow
def test_train_from_the_demo_order_export(tiny_runs, small_store):
    run = towers.load(tiny_runs.train(config="store_orders.yaml", report={"enabled": False}))
    metrics = run.evaluate()["metrics"]
    assert {"warm", "cold"} <= set(metrics)  # cold items held out whole (evaluation.cold_item_fraction)
    assert 0 < metrics["warm"]["towers"]["recall@20"] <= 1  # common practice: a recall is a share
    # every order of the export, its pairs derived without a split, scored against the trained run
    again = run.evaluate(small_store / "orders.csv")["metrics"]
    assert again["warm"]["towers"]["queries"] > metrics["warm"]["towers"]["queries"]
