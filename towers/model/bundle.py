"""Model bundles: weights plus the encoders' plain state, loadable with torch.load(weights_only=True).

A bundle holds only tensors, numbers, strings, lists and dicts; no pickled code is ever loaded.
"""

from __future__ import annotations

import pickle
from pathlib import Path

import torch

from towers.atomic import write_atomic
from towers.config import ModelSection, model_section, plain
from towers.data.features import SideEncoders
from towers.errors import TowersError
from towers.model.towers import TwoTowerModel

BUNDLE_FORMAT = "towers-model"
BUNDLE_VERSION = 1


def save_bundle(path: str | Path, model: TwoTowerModel, model_cfg: ModelSection, query_inputs: list[dict],
                candidate_inputs: list[dict], query_enc: SideEncoders, candidate_enc: SideEncoders,
                item_item: bool, extra: dict | None = None) -> Path:
    """Write a bundle atomically."""
    payload = {
        "format": BUNDLE_FORMAT, "version": BUNDLE_VERSION,
        "model_config": plain(model_cfg), "item_item": item_item, "shared": model.shared,
        "query_inputs": query_inputs, "candidate_inputs": candidate_inputs,
        "query_encoders": query_enc.state(), "candidate_encoders": candidate_enc.state(),
        "state_dict": {k: v.detach().clone() for k, v in model.state_dict().items()},
        "extra": extra or {},
    }
    return write_atomic(path, lambda p: torch.save(payload, p))


def load_payload(path: str | Path, kind: str = "model bundle") -> dict:
    """torch.load with weights_only=True, turning every failure into one clear line."""
    path = Path(path)
    if not path.is_file():
        raise TowersError(f"{path}: {kind} not found; give a run folder written by `towers train`")
    try:
        payload = torch.load(path, map_location="cpu", weights_only=True)
    except pickle.UnpicklingError as exc:
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else "unsafe content"
        raise TowersError(f"{path}: refused to load {kind}: it holds objects other than plain data and tensors "
                          f"({first[:160]}); only load bundles written by towers") from None
    except (RuntimeError, EOFError, OSError, ValueError) as exc:
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise TowersError(f"{path}: {kind} is corrupt or truncated ({first[:160]}); retrain or restore the file") from None
    if not isinstance(payload, dict):
        raise TowersError(f"{path}: not a towers {kind}; retrain with `towers train`")
    return payload


class LoadedBundle:
    """A bundle rebuilt: model in eval mode plus both sides' encoders."""

    def __init__(self, payload: dict, path: Path):
        if payload.get("format") != BUNDLE_FORMAT:
            raise TowersError(f"{path}: not a towers model bundle; retrain with `towers train`")
        if payload.get("version") != BUNDLE_VERSION:
            raise TowersError(f"{path}: bundle version {payload.get('version')} is not supported by this towers "
                              f"(reads version {BUNDLE_VERSION}); retrain with this version")
        self.path = path
        self.model_cfg = model_section(payload["model_config"])
        self.item_item = payload["item_item"]
        self.query_encoders = SideEncoders.from_state(payload["query_encoders"])
        self.candidate_encoders = SideEncoders.from_state(payload["candidate_encoders"])
        self.model = TwoTowerModel(payload["query_inputs"], self.query_encoders.id_encoder.size,
                                   payload["candidate_inputs"], self.candidate_encoders.id_encoder.size,
                                   self.model_cfg, shared=payload["shared"])
        try:
            self.model.load_state_dict(payload["state_dict"])
        except RuntimeError as exc:
            raise TowersError(f"{path}: weights do not match the bundle's model description ({str(exc).splitlines()[0][:160]}); "
                              "the bundle is damaged; retrain") from None
        self.model.eval()
        self.extra = payload.get("extra", {})


def load_bundle(path: str | Path) -> LoadedBundle:
    path = Path(path)
    return LoadedBundle(load_payload(path), path)
