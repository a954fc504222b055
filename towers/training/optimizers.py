"""Optimisers: Adam with weight decay for the dense network, a sparse optimiser for id tables.
"""

from __future__ import annotations

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
