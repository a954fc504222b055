"""Step-size schedules: the cosine curve and the linear warm-up, as pure functions of the step."""

import math

import pytest
import torch

from towers.config import TrainingSection
from towers.training.optimizers import rate_factor, set_rates


def test_cosine_falls_from_one_to_zero_along_half_a_cosine():
    t = TrainingSection(schedule="cosine")
    total = 40
    got = [rate_factor(t, s, total) for s in range(total + 1)]
    want = [0.5 * (1 + math.cos(math.pi * s / total)) for s in range(total + 1)]  # the definition, by math.cos
    assert got == pytest.approx(want, abs=1e-15)
    assert got[0] == 1.0 and got[total // 2] == pytest.approx(0.5) and got[-1] == pytest.approx(0.0, abs=1e-15)


def test_warmup_rises_linearly_then_holds():
    t = TrainingSection(warmup_steps=4)
    assert [rate_factor(t, s, 100) for s in range(6)] == [0.25, 0.5, 0.75, 1.0, 1.0, 1.0]
    assert rate_factor(TrainingSection(), 7, 100) == 1.0  # constant: no change


def test_rates_are_set_per_group_from_their_base():
    a, b = torch.nn.Parameter(torch.zeros(1)), torch.nn.Parameter(torch.zeros(1))
    opt = torch.optim.Adam([{"params": [a], "lr": 0.1}, {"params": [b], "lr": 0.01}])
    set_rates([opt], [[0.1, 0.01]], 0.5)
    assert [g["lr"] for g in opt.param_groups] == pytest.approx([0.05, 0.005])
