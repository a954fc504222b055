"""model.feature_bias: an item tower with features also predicts each item's bias from them.

Without it every item the run never saw shares the unknown id's bias, so among new items popularity can
live only in a vector's length (none once vectors are normalised). With it a new item's bias follows its
features. The data are planted: front-shelf items are drawn nine times as often as back-shelf ones by every
user alike, so the softmax's optimum puts log 9 between the two shelves' scores (a logit is log p(item),
up to a per-user constant: common practice, no source) and nothing else tells the items apart.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
import torch

from towers import config as C
from towers.data.prepare import prepare
from towers.model.build import build_model
from towers.model.embed import embed_all, embed_with_bias
from towers.training.loop import fit

pytestmark = pytest.mark.usefixtures("one_thread")  # tiny models: threads only add overhead

N_ITEMS = 60


def _config(tmp_path, feature_bias: bool) -> C.Config:
    rng = np.random.default_rng(3)
    shelf = np.where(np.arange(N_ITEMS) < N_ITEMS // 2, "front", "back")
    share = np.where(shelf == "front", 9.0, 1.0)
    n = 6000
    pd.DataFrame({"user": rng.integers(0, 80, n), "item": rng.choice(N_ITEMS, n, p=share / share.sum())}) \
        .to_parquet(tmp_path / "log.parquet")
    pd.DataFrame({"item": np.arange(N_ITEMS), "shelf": shelf, "noise": rng.normal(size=N_ITEMS)}) \
        .to_parquet(tmp_path / "items.parquet")
    raw = {
        "interactions": {"path": str(tmp_path / "log.parquet"), "query_column": "user", "candidate_column": "item"},
        "items": {"path": str(tmp_path / "items.parquet"), "id_column": "item",
                  "features": [{"name": "shelf", "kind": "categorical"}, {"name": "noise", "kind": "numeric"}]},
        # normalised vectors at temperature 2 score in [-0.5, 0.5]: at most 1 between two items, less than log 9,
        # so most of the gap between the shelves has to live in the biases
        "model": {"dim": 8, "hidden": [16], "id_dropout": 0.3, "feature_bias": feature_bias, "normalize": True,
                  "temperature": 2.0},
        "training": {"epochs": 4, "batch_size": 256, "learning_rate": 0.01},
        "evaluation": {"test_fraction": 0.0, "validation_fraction": 0.0, "baseline": False},
    }
    return C.resolve(raw, tmp_path)


def _new_items(tmp_path, feature_bias: bool) -> tuple[torch.Tensor, torch.Tensor]:
    """(biases, scores by every training user) of 20 items the run never saw, the first 10 on the front shelf,
    as the run scores them: the unknown row's id bias plus, with the head, what it predicts from features."""
    cfg = _config(tmp_path, feature_bias)
    torch.manual_seed(0)
    data = prepare(cfg)
    model = build_model(data, cfg)
    fit(model, data, cfg, None, "towers")
    rng = np.random.default_rng(4)
    new = pd.DataFrame({"item": np.arange(1000, 1020), "shelf": ["front"] * 10 + ["back"] * 10,
                        "noise": rng.normal(size=20)})
    block = data.candidates.encoders.encode(new["item"].to_numpy(), new, "new items")
    assert bool((block["id"] == 0).all())  # every one is unknown to the run
    vectors, predicted = embed_with_bias(model.candidate_tower, block)
    bias = model.candidate_bias_of(block["id"]).detach()
    if predicted is not None:
        bias = bias + predicted
    scores = embed_all(model.query_tower, data.queries.block) @ vectors.T / model.temperature + bias
    return bias, scores


def test_a_new_item_gets_its_bias_from_its_features(tmp_path):
    bias, scores = _new_items(tmp_path, True)
    score_gap = float(scores[:, :10].mean() - scores[:, 10:].mean())
    # the run scores new items with the planted gap between the shelves (within 15%), and most of it is
    # bias from the features: the vectors can give at most 1
    assert abs(score_gap - math.log(9)) < 0.15 * math.log(9), score_gap
    assert float(bias[:10].min()) > float(bias[10:].max())
    assert float(bias[:10].mean() - bias[10:].mean()) > math.log(9) - 1.0


def test_without_the_head_every_new_item_shares_the_unknown_bias(tmp_path):
    bias, scores = _new_items(tmp_path, False)
    assert torch.equal(bias, torch.full_like(bias, float(bias[0])))
    assert float(scores[:, :10].mean() - scores[:, 10:].mean()) <= 1.0  # the vectors' reach: short of log 9
