"""Negatives for the logistic loss, and the log-share correction of the in-batch softmax.
"""

from __future__ import annotations

import torch

from towers.config import TrainingSection
from towers.data.pairs import Pairs


class NegativeSampler:
    """Draws negative candidate rows as one tensor op: uniform or proportional to popularity^alpha."""

    def __init__(self, train: Pairs, n_items: int, warm: torch.Tensor, tcfg: TrainingSection, generator: torch.Generator,
                 everywhere=lambda counts: counts):
        """everywhere: the item counts of every process from this one's (collective.summed for a divided log)."""
        self.generator = generator
        self.cdf = None
        if tcfg.negative_sampling == "uniform":
            self.rows = torch.nonzero(warm).flatten()  # uniform: one randint, no search
            return
        counts = everywhere(torch.bincount(train.candidate, minlength=n_items).double())
        weights = counts.pow(tcfg.popularity_exponent) * warm.double()
        self.cdf = torch.cumsum(weights / weights.sum(), 0)
        self.cdf[-1] = 1.0

    def __call__(self, n: int) -> torch.Tensor:
        if self.cdf is None:
            return self.rows.index_select(0, torch.randint(0, len(self.rows), (n,), generator=self.generator))
        u = torch.rand(n, generator=self.generator, dtype=torch.float64)
        return torch.searchsorted(self.cdf, u, right=True).clamp_(max=len(self.cdf) - 1)


def log_batch_share(candidates: torch.Tensor, n_items: int, everywhere=lambda counts: counts) -> torch.Tensor:
    """log of each item's share of training positives: its chance to be any given in-batch candidate.

    everywhere: the item counts of every process from this one's (collective.summed for a divided log).
    """
    counts = everywhere(torch.bincount(candidates, minlength=n_items).double())
    return torch.log(counts.clamp(min=1) / counts.sum()).float()
