"""Group labels of catalog rows, for metrics per group of a categorical user or item column.

A fairness and quality audit: does the model serve every customer segment, every category, alike?
The labels come straight from the feature tables (any column, feature or not), one per catalog row.
"""

from __future__ import annotations

import difflib
from dataclasses import dataclass

import numpy as np
import pandas as pd
import torch

from towers.config import Config
from towers.data.tables import normalise_ids, read_table, separator_hint, table_columns, table_rows
from towers.errors import TowersError

MOST_GROUPS = 100  # more distinct values than this is not a grouping a table can show
MISSING = "(missing)"


@dataclass
class Groups:
    """One column's groups: which side it labels, each catalog row's group index, and the group names."""

    column: str
    side: str  # "user" (query rows) or "item" (item rows)
    codes: torch.Tensor  # int64 (n_rows,)
    names: list[str]


def _table_columns(path: str | None) -> list[str]:
    return table_columns(path) if path else []


def group_labels(cfg: Config, query_ids: np.ndarray, item_ids: np.ndarray) -> list[Groups]:
    """The groups of every column named in evaluation.group_metrics_by, read from the users or items table."""
    out = []
    for column in cfg.evaluation.group_metrics_by:
        side, sec = _group_side(cfg, column)
        out.append(_labels(column, side, sec.path, sec.id_column, item_ids if side == "item" else query_ids))
    return out


def check_group_columns(cfg: Config) -> None:
    """Fail at once, before the log is read, when a column of evaluation.group_metrics_by is in no table."""
    for column in cfg.evaluation.group_metrics_by:
        _group_side(cfg, column)


def _group_side(cfg: Config, column: str):
    """(side, its config section) of the table holding `column`: the users table first, then the items."""
    sides = [("item", cfg.items)]
    if not cfg.item_item:
        sides.insert(0, ("user", cfg.users))
    names = {side: _table_columns(sec.path) for side, sec in sides if sec.path}
    found = [(side, sec) for side, sec in sides if column in names.get(side, ())]
    if found:
        return found[0]
    for side, sec in sides:  # a table whose header read as one column: its separator is the cause
        hint = separator_hint([str(c) for c in names.get(side, ())], column)
        if hint is not None:
            raise TowersError(f"config key 'evaluation.group_metrics_by': column {column!r} is not in the {side}s "
                              f"table ({sec.path}); {hint}")
    where = " or ".join(f"the {s}s table ({sec.path})" for s, sec in sides if sec.path) or "no feature table"
    present = [str(c) for cols in names.values() for c in cols]
    same = [c for c in present if c.strip().casefold() == column.strip().casefold()]
    close = same or difflib.get_close_matches(column, present, n=1, cutoff=0.6)
    hint = f"did you mean {close[0]!r}?" if close else "name a column of the users or items table"
    raise TowersError(f"config key 'evaluation.group_metrics_by': column {column!r} is not in {where}; {hint}")


def _labels(column: str, side: str, path: str, id_column: str, catalog_ids: np.ndarray) -> Groups:
    df = read_table(path, columns=[id_column, column], ids=[id_column])
    ids = normalise_ids(df[id_column], path, id_column)
    row = table_rows(ids, catalog_ids)
    values = df[column].astype("string").fillna(MISSING).to_numpy(dtype=object)
    labels = np.where(row >= 0, values[np.maximum(row, 0)], MISSING)
    codes, names = pd.factorize(labels, sort=True)
    if len(names) > MOST_GROUPS:
        raise TowersError(f"{path}, column '{column}': {len(names)} distinct values; metrics per group need a "
                          f"categorical column with at most {MOST_GROUPS} (remove it from evaluation.group_metrics_by)")
    return Groups(column, side, torch.from_numpy(codes.astype(np.int64)), [str(n) for n in names])
