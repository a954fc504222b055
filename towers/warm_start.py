"""Warm starts: continue from an earlier run on new logs without renumbering anything it learned.

Encoders keep every id and category they knew, at the same index, and append what the new training
data adds; numeric and vector scalings stay as they were, so the earlier weights keep their meaning.
Tables grow: old rows are copied; a new user's or item's id row starts as the earlier run's unknown
row, so the tower first embeds it from its features alone (what the earlier run did for a cold
entity). Id-only tables (the linear factor model) have no features to start from: new rows keep
their fresh random start.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import torch

from .bundle import LoadedBundle, load_bundle
from .encoders import IdEncoder, encoder_from_state
from .errors import TowersError
from .features import SideEncoders


def load_previous(run_dir: str | Path, folder: str = "") -> LoadedBundle:
    """The earlier run's bundle (its towers, or a baseline's subfolder)."""
    path = Path(run_dir) / folder / "model.pt"
    if not path.is_file():
        raise TowersError(f"{Path(run_dir)}: --init-from needs a finished run folder (no {Path(folder) / 'model.pt'} "
                          "there); give the --out folder of an earlier `towers train`")
    return load_bundle(path)


def _appended(old: list, new: list) -> tuple[list, int]:
    """old in order, then the values of new that old lacks (in new's order)."""
    known = pd.Index(old, dtype=object) if old else pd.Index([], dtype=object)
    fresh = [v for v, seen in zip(new, known.get_indexer(pd.Index(new, dtype=object)) >= 0) if not seen] if new else []
    return list(old) + fresh, len(fresh)


def extend_ids(new: IdEncoder, old: IdEncoder, what: str) -> tuple[IdEncoder, int]:
    if len(old.ids) and len(new.ids) and old.id_type != new.id_type:
        raise TowersError(f"--init-from: the earlier run's {what} ids are {'numbers' if old.id_type == 'int' else 'text'} "
                          f"but the new log's are {'numbers' if new.id_type == 'int' else 'text'}; store ids the same way")
    old_ids = old.ids
    fresh = new.ids[pd.Index(old_ids).get_indexer(new.ids) < 0]
    merged = np.concatenate([old_ids, fresh]) if len(fresh) else old_ids
    return IdEncoder(merged, old.id_type if len(old_ids) else new.id_type), int(len(fresh))


def extend_side(new: SideEncoders, old: SideEncoders, what: str) -> tuple[SideEncoders, dict]:
    """new's encoders grown from old's: same features required, old numbering kept."""
    new_names = [(e.name, e.kind) for e in new.encoders]
    old_names = [(e.name, e.kind) for e in old.encoders]
    if new_names != old_names:
        raise TowersError(f"--init-from: the {what} features differ from the earlier run's ({old_names} there, "
                          f"{new_names} here); keep the same feature list to warm-start, or train afresh")
    ids, n_new = extend_ids(new.id_encoder, old.id_encoder, what)
    encoders, grown = [], {}
    for n_enc, o_enc in zip(new.encoders, old.encoders):
        state = o_enc.state()
        if getattr(o_enc, "vocab", None) is not None and not state.get("hash_buckets"):
            merged, added = _appended(list(o_enc.vocab), list(n_enc.vocab))
            state = dict(state, vocab=merged)
            if added:
                grown[n_enc.name] = added
        encoders.append(encoder_from_state(state))  # numeric/vector: the earlier scaling, unchanged
    return SideEncoders(ids, encoders, new.id_column), {"new_ids": n_new, "new_values": grown}


def extend_context(new, old_state: dict | None):
    """Context encoders grown like a side's (same columns required)."""
    from .context import ContextEncoders

    if new is None or old_state is None:
        if (new is None) != (old_state is None):
            raise TowersError("--init-from: one run has context columns and the other has none; "
                              "keep interactions.context the same to warm-start")
        return new, {}
    old = ContextEncoders.from_state(old_state)
    side = SideEncoders(IdEncoder(np.asarray([], dtype=object)), new.encoders, None)
    grown, info = extend_side(side, SideEncoders(IdEncoder(np.asarray([], dtype=object)), old.encoders, None), "context")
    return ContextEncoders(grown.encoders), {"new_values": info["new_values"]}


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
