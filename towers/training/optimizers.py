"""Optimisers: Adam with weight decay for the dense network, a sparse optimiser for id tables.
"""

from __future__ import annotations

import math

import torch

from towers.config import TrainingSection
from towers.model.towers import TwoTowerModel


def make_optimizers(model: TwoTowerModel, tcfg: TrainingSection) -> list[torch.optim.Optimizer]:
    """Adam with L2 weight decay for the dense network; a sparse optimiser for id and bias tables."""
    opts: list[torch.optim.Optimizer] = []
    dense = model.dense_parameters()
    groups = [{"params": dense, "weight_decay": tcfg.weight_decay}] if dense else []
    if model.use_biases:
        groups.append({"params": [model.global_bias], "weight_decay": 0.0})
    if groups:
        opts.append(torch.optim.Adam(groups, lr=tcfg.learning_rate))
    sparse = model.sparse_parameters()
    if sparse:
        kind, lr = tcfg.id_optimizer, tcfg.id_learning_rate
        if kind == "adam":
            opts.append(torch.optim.SparseAdam(sparse, lr=lr))
        elif kind == "adagrad":
            opts.append(torch.optim.Adagrad(sparse, lr=lr))
        else:
            opts.append(torch.optim.SGD(sparse, lr=lr))
    return opts


def rate_factor(tcfg: TrainingSection, step: int, total: int) -> float:
    """The share of each configured step size used at global step `step` (0-based) of `total`.

    A pure function of the step, so a resumed run takes exactly the rates an uninterrupted one would.
    """
    factor = 1.0
    if tcfg.schedule == "cosine":
        factor = 0.5 * (1.0 + math.cos(math.pi * min(step, total) / max(1, total)))
    if tcfg.warmup_steps:
        factor *= min(1.0, (step + 1) / tcfg.warmup_steps)
    return factor


def set_rates(optimizers: list[torch.optim.Optimizer], base: list[list[float]], factor: float) -> None:
    """Every parameter group at its base step size times `factor`."""
    for opt, rates in zip(optimizers, base):
        for group, rate in zip(opt.param_groups, rates):
            group["lr"] = rate * factor
