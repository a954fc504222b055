"""Interaction pairs as catalog-row index tensors: the unit every split, trainer and metric works on."""

from __future__ import annotations

from dataclasses import dataclass

import torch

from towers.data.features import FeatureBlock, take
from towers.data.spill import Spill


@dataclass
class Pairs:
    """Interaction pairs as catalog-row index tensors, with optional target, weight and time."""

    query: torch.Tensor  # int64 rows into the query catalog
    candidate: torch.Tensor  # int64 rows into the candidate catalog
    target: torch.Tensor | None = None  # float32
    weight: torch.Tensor | None = None  # float32
    time: torch.Tensor | None = None  # int64
    context: FeatureBlock | None = None  # encoded context columns, one row per pair

    def __len__(self) -> int:
        return len(self.query)

    def subset(self, idx) -> "Pairs":
        idx = _index(idx)
        pick = lambda t: None if t is None else t.index_select(0, idx)  # noqa: E731
        return Pairs(pick(self.query), pick(self.candidate), pick(self.target), pick(self.weight), pick(self.time),
                     None if self.context is None else take(self.context, idx))

    def divide(self, parts: list, spill: Spill | None = None) -> list["Pairs"]:
        """self.subset(idx) for each index array of `parts`, taken column by column; self is emptied on the way.

        Each column is dropped once its parts are taken, so at most one column is held twice: with a
        long log, the split costs the pairs plus one column, not the pairs twice. With a spill on disk
        the parts are spill arrays (data/spill.py).
        """
        parts = [_index(idx) for idx in parts]
        out = [Pairs(None, None) for _ in parts]

        def pick(column: torch.Tensor, idx: torch.Tensor) -> torch.Tensor:
            if spill is None or not spill.on_disk:
                return column.index_select(0, idx)
            into = torch.from_numpy(spill.empty(len(idx), column.numpy().dtype).reshape(len(idx), *column.shape[1:]))
            return torch.index_select(column, 0, idx, out=into)

        for name in ("query", "candidate", "target", "weight", "time"):
            column = getattr(self, name)
            setattr(self, name, None)
            for pairs, idx in zip(out, parts):
                setattr(pairs, name, None if column is None else pick(column, idx))
            del column
        block, self.context = self.context, None
        for name in list(block or ()):
            column = block.pop(name)
            for pairs, idx in zip(out, parts):
                pairs.context = (pairs.context or {}) | {name: column.index_select(0, idx)}
            del column
        return out

    def positives(self) -> "Pairs":
        """Rows that count as positive events (target > 0, or every row when there is no target)."""
        if self.target is None:
            return self
        return self.subset(torch.nonzero(self.target > 0).flatten())


def _index(idx) -> torch.Tensor:
    """Row positions as an index tensor: int32 arrays stay int32 (half the memory of int64 for a long split)."""
    idx = torch.as_tensor(idx)
    return idx if idx.dtype in (torch.int32, torch.int64) else idx.to(torch.int64)


@dataclass
class SplitPairs:
    """The split a run is trained and judged on: pairs per slice, which items are warm or cold, which users cold."""

    train: Pairs
    valid: Pairs
    test: Pairs
    cold_test: Pairs
    warm_items: torch.Tensor  # bool (n_items,): items with training pairs
    cold_items: torch.Tensor  # bool (n_items,): items held out whole for the cold slice
    item_item: bool
    cold_user_test: Pairs  # pairs of the users held out whole, for the cold_users slice
    cold_users: torch.Tensor  # bool (n_queries,): users held out whole

    def known(self) -> Pairs:
        """Positives a query is known to have (training and validation): excluded from its test ranking."""
        tr, va = self.known_parts()
        return Pairs(torch.cat([tr.query, va.query]), torch.cat([tr.candidate, va.candidate]))

    def known_parts(self) -> list[Pairs]:
        """known() as its two parts, not joined: a long log's training pairs are not copied."""
        return [self.train.positives(), self.valid.positives()]
