"""The order in which an epoch visits the training pairs.

In memory the order is one random permutation of all pairs. With the pairs on disk (run.spill_folder,
data/spill.py) a permutation would read the file at random, a page for every pair, and with a file
larger than memory every page again each epoch. So there the pairs are cut into blocks of BLOCK
consecutive pairs, the blocks are visited in a random order, and the blocks are taken a window at a
time (training.shuffle_window pairs): the pairs of a window are mixed by a permutation of their own
and batches are drawn from them in that order. The file is then read a block at a time, memory holds
the pages of about one window, and every batch still mixes pairs from all over the log (a window
of 1,048,576 pairs joins 128 blocks from anywhere in it).

training.epoch_order picks one (auto: windowed with a spill folder, else the permutation); the same
order in memory and on disk gives the same run to the bit. Either order is fixed by what the
checkpoint keeps (`saved`), so an interrupted epoch resumes at the same step with the same batches.
"""

from __future__ import annotations

import math

import torch

BLOCK = 8192  # consecutive pairs read together: 64 KiB of each int64 column


class Shuffled:
    """All pairs in one random permutation (pairs in memory)."""

    def __init__(self, perm: torch.Tensor):
        self.perm = perm

    @classmethod
    def draw(cls, n: int, generator: torch.Generator) -> "Shuffled":
        # int32 (the same order as int64 from the same generator): half the memory for a long log
        return cls(torch.randperm(n, generator=generator, dtype=torch.int32 if n < 2 ** 31 else torch.int64))

    def batch(self, step: int, size: int) -> torch.Tensor:
        return self.span(step * size, (step + 1) * size)

    def span(self, lo: int, hi: int) -> torch.Tensor:
        """The pairs at places lo..hi-1 of the order."""
        return self.perm[lo:hi]

    def saved(self):
        return self.perm


class Windowed:
    """Blocks in a random order, mixed a window at a time (pairs on disk); see the module docstring."""

    def __init__(self, n: int, window: int, seed: int):
        self.n, self.seed = n, seed
        n_blocks = math.ceil(n / BLOCK)
        self.per_window = max(1, window // BLOCK)
        self.blocks = torch.randperm(n_blocks, generator=torch.Generator().manual_seed(seed))
        sizes = torch.full((n_blocks,), BLOCK, dtype=torch.int64)
        if n_blocks:
            sizes[-1] = n - (n_blocks - 1) * BLOCK
        ends = torch.cumsum(sizes.index_select(0, self.blocks), 0)  # pairs up to each block, in visiting order
        last_blocks = torch.arange(self.per_window - 1, n_blocks + self.per_window - 1, self.per_window)
        self.window_ends = ends[last_blocks.clamp(max=max(0, n_blocks - 1))] if n_blocks else ends
        self._cached = (-1, None)

    @classmethod
    def draw(cls, n: int, window: int, generator: torch.Generator) -> "Windowed":
        return cls(n, window, int(torch.randint(0, 2 ** 62, (1,), generator=generator)))

    def window(self, w: int) -> torch.Tensor:
        """The pair positions of window w, mixed (int64)."""
        if self._cached[0] != w:
            starts = self.blocks[w * self.per_window:(w + 1) * self.per_window] * BLOCK
            rows = (starts.unsqueeze(1) + torch.arange(BLOCK)).flatten()
            rows = rows[rows < self.n]  # the last block of the log may be short
            mix = torch.randperm(len(rows), generator=torch.Generator().manual_seed(self.seed + 1 + w))
            self._cached = (w, rows.index_select(0, mix))
        return self._cached[1]

    def batch(self, step: int, size: int) -> torch.Tensor:
        return self.span(step * size, (step + 1) * size)

    def span(self, lo: int, hi: int) -> torch.Tensor:
        """The pairs at places lo..hi-1 of the order."""
        hi = min(self.n, hi)
        parts = []
        while lo < hi:
            w = int(torch.searchsorted(self.window_ends, torch.tensor(lo), right=True))
            start = int(self.window_ends[w - 1]) if w else 0
            end = min(hi, int(self.window_ends[w]))
            parts.append(self.window(w)[lo - start:end - start])
            lo = end
        return parts[0] if len(parts) == 1 else torch.cat(parts) if parts else torch.zeros(0, dtype=torch.int64)

    def saved(self) -> dict:
        return {"windowed": self.seed, "window": self.per_window * BLOCK, "pairs": self.n}


def draw(n: int, tcfg, spilled: bool, generator: torch.Generator) -> Shuffled | Windowed:
    """A new epoch's order, as training.epoch_order says (auto: windowed for pairs on disk)."""
    if tcfg.epoch_order == "windowed" or (tcfg.epoch_order == "auto" and spilled):
        return Windowed.draw(n, tcfg.shuffle_window, generator)
    return Shuffled.draw(n, generator)


def restore(saved) -> Shuffled | Windowed | None:
    """The order a checkpoint kept (None: none was kept, draw a new one)."""
    if saved is None:
        return None
    if isinstance(saved, dict):
        return Windowed(saved["pairs"], saved["window"], saved["windowed"])
    return Shuffled(saved)
