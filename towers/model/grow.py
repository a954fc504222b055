"""Warm starts, the weights: continue from an earlier run's model without renumbering anything it learned.

The encoders grow first (data/vocabulary.py), keeping every earlier index. Tables grow: old rows
are copied; a new user's or item's id row starts as the earlier run's unknown row, so the tower
first embeds it from its features alone (what the earlier run did for a cold entity). Id-only tables
(the linear factor model) have no features to start from: new rows keep their fresh random start.
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
            raise TowersError(f"{source}: weights '{key}' have shape {tuple(old.shape)} there but "
                              f"{tuple(cur.shape)} here; keep model.dim, hidden sizes and feature settings the same "
                              "to warm-start")
        copied += 1
    model.load_state_dict(state)
    return {"tensors_copied": copied, "rows_added": grown}
