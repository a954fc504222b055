"""Evaluation divided among processes: each ranks every N-th query, and the exact counts are gathered.

Ranking held-out positives against the whole catalog is the costly part of evaluation, and a query's
counts (its candidates above and level with each of its positives, and its candidates in all) depend
on that query alone: search/rank_counts.py keeps them independent of how queries are cut into blocks.
So process r of N ranks the queries r, r + N, r + 2N, ... of the one ordered list every process
builds alike, the integer counts of all processes are gathered and put back in one-process order,
and every process computes the metrics from them with the one-process code. Every process then
holds the very numbers one process computes, to the last bit, so all make the same stopping
decisions. Gathering counts, not sums of per-query metrics, is what keeps that exact (a sum of
floats depends on its order); it moves 8 bytes per positive twice and per query once, little next
to the ranking, and the metrics computed from the counts cost little next to the ranking too.

When the log itself is divided by user (data/shards.py) each process holds only its own users'
held-out pairs, so it ranks all of its own queries (`divided`), and the counts of every process are
joined in rank order (protocol.joined_ranks): every process again holds the same numbers and metrics.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import torch


@dataclass(frozen=True)
class Share:
    """Process `rank` of `world`: it takes the entries whose owner (a query's or pair's position) is rank mod world.

    gather: a collective every process calls together with its own 1-D tensor (lengths may differ);
    it returns every process's tensor, in rank order. training/distributed.py supplies it.
    """

    rank: int
    world: int
    gather: Callable[[torch.Tensor], list[torch.Tensor]]
    divided: bool = False  # the log is divided: every query this process holds is its own

    def mine(self, owner: torch.Tensor) -> torch.Tensor:
        """bool mask of the entries this process takes, owner (n,) being each entry's position in the whole list."""
        return owner % self.world == self.rank

    def joined(self, part: torch.Tensor) -> torch.Tensor:
        """Every process's 1-D tensor one after another, in rank order."""
        return torch.cat(self.gather(part))

    def whole(self, parts: list[tuple[torch.Tensor, torch.Tensor]]) -> list[torch.Tensor]:
        """Whole tensors in one-process order from every process's parts, in one exchange.

        parts: (owner, part) pairs of one dtype: owner (n,) the whole tensor's entries' positions
        (as given to `mine`), part this process's entries in their order in the whole tensor.
        """
        if not parts:
            return []
        pieces = self.gather(torch.cat([part for _, part in parts]))
        taken = [0] * self.world  # how much of each process's piece earlier tensors used
        out = []
        for owner, part in parts:
            who = owner % self.world
            counts = torch.bincount(who, minlength=self.world).tolist()
            full = torch.empty(len(owner), dtype=part.dtype)
            for r in range(self.world):  # a loop over processes, never over entries
                full[who == r] = pieces[r][taken[r]:taken[r] + counts[r]]
                taken[r] += counts[r]
            out.append(full)
        return out
