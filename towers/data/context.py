"""Context columns: per-event inputs (hour, channel, device ...) that feed the query tower.

A context value belongs to one logged event, not to the user, so with context every held-out event
is its own ranking query: the user's features plus that event's context give its query vector.
Models without context (popularity, the linear factor model) use the user's vector for each event.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import torch

from towers.data.encoders import encoder_from_state, make_encoder
from towers.data.features import FeatureBlock, inputs_of, take
from towers.data.pairs import Pairs

AVERAGE_OVER = 32  # training contexts averaged for a user's context-free vector: common practice (no source)


class ContextEncoders:
    """Encoders of the log's context columns, fitted on training events only."""

    def __init__(self, encoders: list):
        self.encoders = encoders

    @classmethod
    def fit(cls, frame: pd.DataFrame, specs: list[dict], train_rows: np.ndarray, path) -> "ContextEncoders":
        encoders = [make_encoder(s) for s in specs]
        rows = frame.iloc[train_rows]
        for enc in encoders:
            enc.fit(rows[enc.name], path)
        return cls(encoders)

    def encode(self, frame: pd.DataFrame, path) -> FeatureBlock:
        """Encode context rows (one per event) into a block."""
        return {enc.name: enc.transform(frame[enc.name].reset_index(drop=True), path) for enc in self.encoders}

    @property
    def names(self) -> list[str]:
        return [e.name for e in self.encoders]

    def model_inputs(self) -> list[dict]:
        return inputs_of(self.encoders)

    def unknown_counts(self) -> dict[str, int]:
        return {e.name: e.unknown_seen for e in self.encoders if getattr(e, "unknown_seen", 0)}

    def state(self) -> dict:
        return {"features": [e.state() for e in self.encoders]}

    @classmethod
    def from_state(cls, state: dict) -> "ContextEncoders":
        return cls([encoder_from_state(s) for s in state["features"]])


def sample_contexts(train_context: FeatureBlock, n: int = AVERAGE_OVER, seed: int = 0) -> FeatureBlock:
    """A fixed sample of training events' contexts: the context mix a context-free vector averages over."""
    total = len(next(iter(train_context.values())))
    g = torch.Generator().manual_seed(seed)
    return take(train_context, torch.randperm(total, generator=g)[:n])


@torch.no_grad()
def vectors_with_context(tower, query_block: FeatureBlock, query_rows: torch.Tensor, context: FeatureBlock,
                         chunk: int = 65536) -> torch.Tensor:
    """Query vectors of events: row i is the tower on query_rows[i]'s features with context row i."""
    was = tower.training
    tower.eval()
    parts = []
    for lo in range(0, len(query_rows), chunk):
        idx = torch.arange(lo, min(len(query_rows), lo + chunk))
        parts.append(tower(take(query_block, query_rows[idx]) | take(context, idx)))
    tower.train(was)
    return torch.cat(parts)


@torch.no_grad()
def averaged_vectors(tower, query_block: FeatureBlock, contexts: FeatureBlock, chunk: int = 65536) -> torch.Tensor:
    """Each query's vector averaged over the sample of contexts: its expected score vector over the mix."""
    n = len(query_block["id"])
    s = len(next(iter(contexts.values())))
    per = max(1, chunk // s)
    parts = []
    for lo in range(0, n, per):
        rows = torch.arange(lo, min(n, lo + per))
        q_rows = rows.repeat_interleave(s)
        c_rows = torch.arange(s).repeat(len(rows))
        v = vectors_with_context(tower, query_block, q_rows, take(contexts, c_rows), chunk)
        parts.append(v.view(len(rows), s, -1).mean(1))
    return torch.cat(parts)


class AveragedOverContexts(torch.nn.Module):
    """A query tower whose output is averaged over a fixed context sample (for context-free vectors)."""

    def __init__(self, tower, contexts: FeatureBlock):
        super().__init__()
        self.tower, self.contexts = tower, contexts

    def forward(self, block: FeatureBlock) -> torch.Tensor:
        return averaged_vectors(self.tower, block, self.contexts)


def event_pairs(pairs, known):
    """Held-out pairs as events: query i is event i; each event excludes its user's known items.

    Returns (event pairs, known pairs keyed by event, the user row of each event).
    """

    n = len(pairs)
    users = pairs.query
    events = Pairs(torch.arange(n), pairs.candidate, pairs.target, pairs.weight)
    # join known (user, item) pairs to the events of the same user, with sorted index tensors
    k_order = torch.argsort(known.query, stable=True)
    kq, kc = known.query[k_order], known.candidate[k_order]
    start = torch.searchsorted(kq, users)
    count = torch.searchsorted(kq, users, right=True) - start
    ev = torch.repeat_interleave(torch.arange(n), count)
    offset = torch.arange(len(ev)) - torch.repeat_interleave(torch.cumsum(count, 0) - count, count)
    return events, Pairs(ev, kc[start[ev] + offset]), users
