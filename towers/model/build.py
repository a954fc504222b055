"""Models sized for prepared data: the towers, the bilinear model and the linear factor model."""

from __future__ import annotations

import torch

from towers import config as C
from towers.data.history import HISTORY
from towers.data.prepare import Prepared
from towers.errors import TowersError
from towers.model.towers import TwoTowerModel


def build_model(data: Prepared, cfg: C.Config) -> TwoTowerModel:
    """A TwoTowerModel sized for the prepared data's encoders."""
    q, c = data.queries.encoders, data.candidates.encoders
    if not cfg.model.use_ids:
        for side, enc, block in (("users" if not data.item_item else "items", q, data.queries.block),
                                 ("items", c, data.candidates.block)):
            if not enc.encoders and HISTORY not in block:
                raise TowersError(f"config key 'model.use_ids': false leaves the {side} tower with no input; "
                                  f"add {side}.features or set use_ids: true")
    shared = data.item_item and cfg.model.shared_tower
    q_inputs = _with_dims(q.model_inputs(), cfg.query_side.features)
    if HISTORY in data.queries.block:  # the user's items, averaged from a table of their own (history.py)
        q_inputs.append({"name": HISTORY, "kind": "tokens", "size": len(data.candidates.ids) + 1, "dim": cfg.model.dim})
    if data.context is not None:
        q_inputs += _with_dims(data.context.model_inputs(), cfg.interactions.context)
    c_inputs = _with_dims(c.model_inputs(), cfg.items.features)
    return start_global_bias(TwoTowerModel(q_inputs, q.id_encoder.size, c_inputs, c.id_encoder.size, cfg.model,
                                           shared=shared), data, cfg)


def start_global_bias(model: TwoTowerModel, data: Prepared, cfg: C.Config) -> TwoTowerModel:
    """A new model's global bias starts at the mean training rating, so id rows and biases learn offsets.

    Done once when a model is built (not by each Trainer), so a trained or warm-started bias is kept.
    """
    if cfg.training.rating_loss and model.use_biases and data.train.target is not None:
        with torch.no_grad():
            model.global_bias.fill_(float(data.train.target.mean()))
    return model


def _with_dims(inputs: list[dict], specs: tuple[C.FeatureSpec, ...]) -> list[dict]:
    dims = {s.name: s.dim for s in specs}
    return [dict(i, dim=dims.get(i["name"])) for i in inputs]


def baseline_model(data: Prepared, cfg: C.Config) -> tuple[TwoTowerModel, C.Config]:
    """The linear factor model: the same towers with ids only and no hidden layer."""
    preset = C.linear_factor_preset(cfg)
    m = TwoTowerModel([], data.queries.encoders.id_encoder.size, [], data.candidates.encoders.id_encoder.size,
                      preset.model, shared=data.item_item and preset.model.shared_tower)
    return start_global_bias(m, data, preset), preset
