"""Group labels read from the feature tables for metrics per group."""

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from towers import config as C
from towers.data.groups import MISSING, group_labels
from towers.errors import TowersError


def _cfg(tmp_path: Path, columns, item_item=False) -> C.Config:
    pd.DataFrame({"user": [1, 2, 3, 4], "segment": ["b", "a", None, "a"]}).to_csv(tmp_path / "users.csv", index=False)
    pd.DataFrame({"item": ["x", "y", "z"], "shelf": ["s1", "s2", "s1"], "price": [1.0, 2.0, 3.0]}).to_csv(
        tmp_path / "items.csv", index=False)
    raw = {"run": {"mode": "item_item" if item_item else "user_item"},
           "interactions": {"path": "log.csv", "query_column": "user", "candidate_column": "item"},
           "items": {"path": "items.csv", "id_column": "item", "features": [{"name": "price", "kind": "numeric"}]},
           "evaluation": {"group_metrics_by": columns}}
    if not item_item:
        raw["users"] = {"path": "users.csv", "id_column": "user", "features": []}
    return C.resolve(raw, tmp_path)


def test_labels_follow_the_catalog_order_with_missing_values_grouped(tmp_path):
    cfg = _cfg(tmp_path, ["segment", "shelf"])
    users, items = np.array([4, 3, 1, 9]), np.array(["z", "x", "y"], dtype=object)  # 9 has no table row
    seg, shelf = group_labels(cfg, users, items)
    assert (seg.side, shelf.side) == ("user", "item")
    # reference: the same lookup by pandas, row by row through the id index
    table = pd.read_csv(tmp_path / "users.csv").set_index("user")["segment"]
    expected = [table.get(u) if u in table.index and pd.notna(table.get(u)) else MISSING for u in users]
    assert [seg.names[c] for c in seg.codes.tolist()] == expected
    assert [shelf.names[c] for c in shelf.codes.tolist()] == ["s1", "s1", "s2"]


def test_a_column_in_neither_table_is_a_clear_error(tmp_path):
    with pytest.raises(TowersError, match=r"'evaluation.group_metrics_by': column 'colour' is not in the users table"):
        group_labels(_cfg(tmp_path, ["colour"]), np.array([1]), np.array(["x"], dtype=object))


def test_a_misspelt_column_is_named_with_its_likely_spelling_before_the_log_is_read(tmp_path):
    from towers.data.groups import check_group_columns

    with pytest.raises(TowersError, match=r"column 'segmnet' is not in .*; did you mean 'segment'\?"):
        check_group_columns(_cfg(tmp_path, ["segmnet"]))  # reads the tables' headers only
    with pytest.raises(TowersError, match=r"did you mean 'shelf'\?"):
        check_group_columns(_cfg(tmp_path, ["Shelf"]))
    check_group_columns(_cfg(tmp_path, ["segment", "shelf"]))


def test_item_item_runs_group_items_only(tmp_path):
    cfg = _cfg(tmp_path, ["segment"], item_item=True)
    with pytest.raises(TowersError, match="not in the items table"):
        group_labels(cfg, np.array(["x"], dtype=object), np.array(["x"], dtype=object))


def test_too_many_groups_is_refused(tmp_path):
    cfg = _cfg(tmp_path, ["price"])
    pd.DataFrame({"item": [f"i{k}" for k in range(150)], "price": np.arange(150.0)}).to_csv(tmp_path / "items.csv",
                                                                                          index=False)
    with pytest.raises(TowersError, match=r"column 'price': 150 distinct values"):
        group_labels(cfg, np.array([1]), np.array([f"i{k}" for k in range(150)], dtype=object))
