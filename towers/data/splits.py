"""Held-out splits: random or by time for the warm slice, plus whole items held out for the cold slice."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import torch

from towers.config import EvaluationSection


@dataclass
class Split:
    """Index arrays into the pair list, and which candidate rows are held out whole."""

    train: np.ndarray
    valid: np.ndarray
    test: np.ndarray
    cold_test: np.ndarray
    cold_items: torch.Tensor  # bool (n_items,)


def make_split(pairs, n_items: int, ev: EvaluationSection, seed: int, cold_eligible: torch.Tensor | None,
               item_item: bool) -> Split:
    """Split pairs per the evaluation config; the same seed always gives the same split."""
    rng = np.random.default_rng(seed + 1)
    q = pairs.query.numpy()
    c = pairs.candidate.numpy()
    cold_items = np.zeros(n_items, dtype=bool)
    if ev.cold_item_fraction > 0 and cold_eligible is not None:
        seen = np.zeros(n_items, dtype=bool)
        seen[c] = True
        if item_item:
            seen[q] = True
        candidates = np.flatnonzero(seen & cold_eligible.numpy())
        n_cold = int(round(ev.cold_item_fraction * len(candidates)))
        cold_items[rng.choice(candidates, size=n_cold, replace=False)] = True
    touches_cold = cold_items[c] | (cold_items[q] if item_item else False)
    cold_test = np.flatnonzero(cold_items[c] & ~(cold_items[q] if item_item else False))
    rest = np.flatnonzero(~touches_cold)
    if ev.split == "time" and pairs.time is not None:
        order = rest[np.argsort(pairs.time.numpy()[rest], kind="stable")]
    else:
        order = rest[rng.permutation(len(rest))]
    n_test = int(round(ev.test_fraction * len(order)))
    n_valid = int(round(ev.validation_fraction * (len(order) - n_test)))
    if ev.split == "time":
        test = order[len(order) - n_test:]
        valid = order[len(order) - n_test - n_valid:len(order) - n_test]
        train = order[:len(order) - n_test - n_valid]
    else:
        test, valid, train = order[:n_test], order[n_test:n_test + n_valid], order[n_test + n_valid:]
    return Split(np.sort(train), np.sort(valid), np.sort(test), cold_test, torch.from_numpy(cold_items))
