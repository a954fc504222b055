"""Warm starts, the encoders: an earlier run's vocabularies grown by what new training data adds.

Encoders keep every id and category they knew, at the same index, and append what the new training
data adds; numeric and vector scalings stay as they were, so the earlier weights keep their meaning
(model/grow.py then grows the weight tables to match).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from towers.data.context import ContextEncoders
from towers.data.encoders import IdEncoder, encoder_from_state
from towers.data.features import SideEncoders
from towers.errors import TowersError


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
        if getattr(o_enc, "vocab", None) is not None and not state.get("hashed_rows"):
            merged, added = _appended(list(o_enc.vocab), list(n_enc.vocab))
            state = dict(state, vocab=merged)
            if added:
                grown[n_enc.name] = added
        encoders.append(encoder_from_state(state))  # numeric/vector: the earlier scaling, unchanged
    return SideEncoders(ids, encoders, new.id_column), {"new_ids": n_new, "new_values": grown}


def extend_context(new, old_state: dict | None):
    """Context encoders grown like a side's (same columns required)."""
    if new is None or old_state is None:
        if (new is None) != (old_state is None):
            raise TowersError("--init-from: one run has context columns and the other has none; "
                              "keep interactions.context the same to warm-start")
        return new, {}
    old = ContextEncoders.from_state(old_state)
    side = SideEncoders(IdEncoder(np.asarray([], dtype=object)), new.encoders, None)
    grown, info = extend_side(side, SideEncoders(IdEncoder(np.asarray([], dtype=object)), old.encoders, None), "context")
    return ContextEncoders(grown.encoders), {"new_values": info["new_values"]}
