"""Warm starts, the weights: continue from an earlier run's model without renumbering anything it learned.

The encoders grow first (data/vocabulary.py), keeping every earlier index. Tables grow: old rows
are copied; a new user's or item's id row starts as the earlier run's unknown row, so the tower
first embeds it from its features alone (what the earlier run did for a cold entity). Id-only tables
(the linear factor model) have no features to start from: new rows keep their fresh random start.

Bounded id tables (model.id_table_rows, model/id_tables.py) keep their remainder table as it was, so
every earlier id keeps its two rows; the quotient table grows, its new rows starting fresh. A new id's
vector is then composed from rows it shares with earlier ids, not the unknown row: composed rows have
no row of their own to start from. A remainder table that changed size (another id_table_rows, or a
side that crossed it) would move every earlier id to other rows, so it is refused.
"""

from __future__ import annotations

from pathlib import Path

import torch

from towers.errors import TowersError


def _unknown_row(model, key: str, direct: dict) -> int | None:
    """The row a grown table's new rows copy: the unknown id / value, or None to keep a fresh start."""
    if key.endswith("ids.weight"):
        return None if any(key.startswith(p) and d for p, d in direct.items()) else 0
    if key.endswith(("query_bias.weight", "candidate_bias.weight")):
        return 0
    for prefix, tower in (("query_tower.tables.", model.query_tower), ("candidate_tower.tables.", model.candidate_tower)):
        if key.startswith(prefix):
            pos = int(key[len(prefix):].split(".")[0][1:])
            return 1 if tower.inputs[pos]["kind"] == "tokens" else 0  # tokens: 0 pads, 1 is unknown
    return None


@torch.no_grad()
def grow_weights(model, old_state: dict, source: Path) -> dict:
    """Copy the earlier weights into model, growing tables; returns what was copied and grown."""
    state = model.state_dict()
    direct = {"query_tower.": model.query_tower.direct, "candidate_tower.": model.candidate_tower.direct}
    copied, grown = 0, {}
    _check_id_layout(old_state, state, source)
    for key, old in old_state.items():
        if key not in state:
            raise TowersError(f"{source}: the earlier model has weights '{key}' this config's model lacks; keep the "
                              "model section and feature lists the same to warm-start")
        cur = state[key]
        if cur.shape == old.shape:
            cur.copy_(old)
        elif cur.dim() == old.dim() >= 1 and cur.shape[1:] == old.shape[1:] and cur.shape[0] > old.shape[0]:
            cur[:old.shape[0]] = old
            unknown = _unknown_row(model, key, direct)
            if unknown is not None:
                cur[old.shape[0]:] = old[unknown]  # new entities and values start as the earlier run's unknown
            grown[key] = int(cur.shape[0] - old.shape[0])
        else:
            raise TowersError(f"{source}: weights '{key}' {_shape_change(old.shape, cur.shape)}; keep model.dim, "
                              "hidden sizes and feature settings the same to warm-start")
        copied += 1
    model.load_state_dict(state)
    return {"tensors_copied": copied, "rows_added": grown}


def _shape_change(old: torch.Size, cur: torch.Size) -> str:
    """What differs between two weight shapes, in words: a table's width apart from its row count (rows may grow)."""
    if len(old) == len(cur) == 2 and old[1] != cur[1]:
        return f"hold {old[1]} numbers a row there but {cur[1]} here"
    return f"have shape {tuple(old)} there but {tuple(cur)} here"


def _check_id_layout(old_state: dict, state: dict, source: Path) -> None:
    """Both models keep each tower's ids the same way (one row per id, or the same bounded tables)."""
    for tower in ("query_tower", "candidate_tower"):
        full, remainder = f"{tower}.ids.weight", f"{tower}.ids.remainder.weight"
        old_layout = "one row per id" if full in old_state else "bounded" if remainder in old_state else None
        new_layout = "one row per id" if full in state else "bounded" if remainder in state else None
        if None in (old_layout, new_layout):
            continue
        side = "item" if tower == "candidate_tower" else "query-side"
        if old_layout != new_layout:
            raise TowersError(f"{source}: the earlier model keeps its {side} ids {old_layout}, this one "
                              f"{new_layout} (model.id_table_rows, and whether the ids now exceed it); a warm start "
                              "cannot move learned rows between the two; train afresh, or set id_table_rows so that "
                              "both runs keep them the same way")
        if new_layout == "bounded" and old_state[remainder].shape != state[remainder].shape:
            raise TowersError(f"{source}: the earlier model's bounded {side} id tables have "
                              f"{old_state[remainder].shape[0]:,} remainder rows, this one "
                              f"{state[remainder].shape[0]:,}; keep model.id_table_rows the same to warm-start "
                              "(every earlier id would move to other rows)")
