"""The run folder: every file name in one place, and the reading and writing of each file.

A run folder holds personal data (user ids, user embeddings, who interacted with what), so every
folder it creates is owner-only (0700) and every file is written owner-only (0600) by atomic.py.

Layout (`towers train --out RUN`):

    RUN/config.yaml                 the resolved config, every default filled in
    RUN/model.pt                    the towers' bundle (weights and plain encoder state)
    RUN/pairs.pt                    catalog ids and the split pairs
    RUN/metrics.json, history.json  held-out metrics per slice and model; per-epoch history
    RUN/started_from.json           warm starts only: what came from the earlier run
    RUN/report.html                 the self-contained report
    RUN/{item,user,query}_embeddings.parquet
    RUN/checkpoints/                last.pt and best.pt of the towers
    RUN/linear_factor/, RUN/bilinear/   the same model files for each reference model that has them
                                    (plus certificate.json for the linear factor model)
    RUN/alignment.json              `towers align` only: the rotation and drift table

A run is written into RUN.partial and renamed into place when complete (`publish`).
"""

from __future__ import annotations

import json
import shutil
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import torch
import yaml

from towers import config as C
from towers.atomic import make_private_dir, write_atomic, write_text_atomic
from towers.data.pairs import Pairs, SplitPairs
from towers.errors import TowersError
from towers.model.bundle import LoadedBundle, load_bundle, load_payload

TOWERS = "towers"
LINEAR_FACTOR = "linear_factor"
BILINEAR = "bilinear"
SUBFOLDER_MODELS = (LINEAR_FACTOR, BILINEAR)  # models saved in a subfolder of their own name

EMBEDDINGS = {"item": "item_embeddings.parquet", "user": "user_embeddings.parquet",
              "query": "query_embeddings.parquet"}


@dataclass
class SavedPairs:
    """pairs.pt as read back: both catalogs' ids and the split."""

    query_ids: np.ndarray
    item_ids: np.ndarray
    split: SplitPairs


class RunFolder:
    """One run folder on disk (finished, or the .partial one being written)."""

    CONFIG = "config.yaml"
    MODEL = "model.pt"
    PAIRS = "pairs.pt"
    METRICS = "metrics.json"
    HISTORY = "history.json"
    STARTED_FROM = "started_from.json"
    REPORT = "report.html"
    CERTIFICATE = "certificate.json"
    ALIGNMENT = "alignment.json"
    CHECKPOINTS = "checkpoints"
    PARTIAL_SUFFIX = ".partial"

    def __init__(self, path: str | Path):
        self.path = Path(path)

    def __repr__(self) -> str:
        return f"RunFolder({str(self.path)!r})"

    # ---- names --------------------------------------------------------------------------------
    def model_dir(self, model: str = TOWERS) -> Path:
        """The folder of one model's files: the run folder for the towers, a subfolder for the others."""
        return self.path if model == TOWERS else self.path / model

    def model_file(self, model: str = TOWERS) -> Path:
        return self.model_dir(model) / self.MODEL

    def embeddings_file(self, side: str, model: str = TOWERS) -> Path:
        """side: 'item', 'user' or 'query' (a shared tower's query side is its item file)."""
        path = self.model_dir(model) / EMBEDDINGS[side]
        if side == "query" and not path.is_file():
            return self.model_dir(model) / EMBEDDINGS["item"]
        return path

    def checkpoints(self, model: str = TOWERS) -> Path:
        return self.model_dir(model) / self.CHECKPOINTS

    def file(self, name: str, model: str = TOWERS) -> Path:
        return self.model_dir(model) / name

    def has_model(self, model: str) -> bool:
        return self.model_file(model).is_file()

    @property
    def partial(self) -> "RunFolder":
        """The folder a run is written into before it is complete."""
        return RunFolder(self.path.parent / f"{self.path.name}{self.PARTIAL_SUFFIX}")

    @property
    def final_path(self) -> Path:
        """The run's own name: without .partial while it is still being written."""
        name = self.path.name
        if name.endswith(self.PARTIAL_SUFFIX):
            return self.path.with_name(name[: -len(self.PARTIAL_SUFFIX)])
        return self.path

    # ---- creating and publishing ----------------------------------------------------------------
    def check_new(self, overwrite: bool) -> None:
        """Refuse to write over a file, or over a non-empty folder unless overwrite."""
        out = self.path
        if out.exists() and not out.is_dir():
            raise TowersError(f"{out}: exists and is not a folder; choose another --out")
        if out.exists() and any(out.iterdir()) and not overwrite:
            raise TowersError(f"{out}: run folder already exists; choose another --out or pass --overwrite "
                              "(overwrite=True in Python) to replace it")

    def make(self, model: str = TOWERS, checkpoints: bool = False) -> Path:
        """Create (owner-only) a model's folder, and its checkpoints folder if asked; returns the latter or the former."""
        folder = self.checkpoints(model) if checkpoints else self.model_dir(model)
        make_private_dir(folder)
        return folder

    def remove(self) -> None:
        shutil.rmtree(self.path, ignore_errors=True)

    def publish(self, out: "RunFolder") -> None:
        """Move this finished folder to `out`, replacing an older run folder only at the very end."""
        if out.path.exists():
            old = out.path.parent / f"{out.path.name}.replaced"
            if old.exists():
                shutil.rmtree(old)
            out.path.rename(old)
            self.path.rename(out.path)
            shutil.rmtree(old)
        else:
            self.path.rename(out.path)

    # ---- files ----------------------------------------------------------------------------------
    def write_json(self, name: str, payload, model: str = TOWERS) -> Path:
        return write_text_atomic(self.file(name, model), json.dumps(payload, indent=2))

    def read_json(self, name: str, model: str = TOWERS):
        path = self.file(name, model)
        if not path.is_file():
            raise TowersError(f"{path}: missing; the run folder is incomplete (retrain the run)")
        return json.loads(path.read_text(encoding="utf-8"))

    def write_config(self, cfg: C.Config) -> Path:
        return write_text_atomic(self.path / self.CONFIG, C.dump(cfg))

    def has_config(self) -> bool:
        return (self.path / self.CONFIG).is_file()

    def read_config(self) -> C.Config:
        """The run's saved config, resolved again (paths in it are absolute)."""
        cfg_path = self.path / self.CONFIG
        fix = "restore config.yaml from a backup or retrain the run"
        try:
            raw = yaml.safe_load(cfg_path.read_text(encoding="utf-8"))
        except (yaml.YAMLError, UnicodeDecodeError) as exc:
            problem = getattr(exc, "problem", None) or type(exc).__name__
            raise TowersError(f"{cfg_path}: not valid YAML ({problem}); the run folder is damaged; {fix}") from None
        training = raw.get("training") if isinstance(raw, dict) else None
        if isinstance(training, dict) and training.get("loss") != "logistic" and training.get("negatives") == 4:
            training["negatives"] = None  # saved before negatives became empty by default: 4 was the unused default
        try:
            return C.resolve(C.drop_misplaced_feature_keys(raw), self.path)
        except TowersError as exc:
            raise TowersError(f"{cfg_path}: {exc} (in the run's saved config; {fix})") from None

    def config_difference(self, cfg: C.Config) -> str:
        """The first key where the saved config and cfg differ (as YAML values), as C.first_difference words it;
        "" when they are the same."""
        saved = yaml.safe_load((self.path / self.CONFIG).read_text(encoding="utf-8"))
        return C.first_difference(saved, yaml.safe_load(C.dump(cfg)))

    def load_bundle(self, model: str = TOWERS) -> LoadedBundle:
        return load_bundle(self.model_file(model))

    def write_pairs(self, query_ids: np.ndarray, item_ids: np.ndarray, split: SplitPairs,
                    others: list[SplitPairs] | None = None) -> Path:
        """Catalog ids and split pairs, as tensors and lists only (weights_only-loadable).

        others: the other processes' pairs of a divided log, in rank order after this process's. Each column
        is then written as a list of its parts (version 2), so the writer never joins them into a copy of
        the whole; reading joins them (`read_pairs_payload`), in the same order as one process's file.
        """
        splits = [split, *(others or [])]

        def packed(name: str) -> dict:
            parts = [_pack(getattr(s, name)) for s in splits]
            # the columns every process has (context columns are each process's own, and not written)
            return parts[0] if len(parts) == 1 else {key: [part[key] for part in parts] for key in parts[0]
                                                     if all(key in part for part in parts)}
        payload = {"format": "towers-pairs", "version": 2 if others else 1,
                   "query_ids": query_ids.tolist(), "item_ids": item_ids.tolist(),
                   **{name: packed(name) for name in _SLICES}, "cold_items": split.cold_items,
                   "warm_items": split.warm_items, "item_item": split.item_item, "cold_users": split.cold_users}
        return write_atomic(self.path / self.PAIRS, lambda p: torch.save(payload, p))

    def read_pairs_payload(self) -> dict:
        """pairs.pt as saved, each column whole (a column written in parts is joined in their order)."""
        payload = load_payload(self.path / self.PAIRS, "pairs file")
        for name in _SLICES:
            for key, column in payload.get(name, {}).items():
                if isinstance(column, list):
                    payload[name][key] = torch.cat(column)
        return payload

    def read_pairs(self) -> SavedPairs:
        """pairs.pt read back; a file written before the cold-user slice existed reads with that slice empty."""
        p = self.read_pairs_payload()
        query_ids = _ids(p["query_ids"])
        none = torch.zeros(0, dtype=torch.int64)
        cold_user_test = _unpack(p["cold_user_test"]) if "cold_user_test" in p else Pairs(none, none)
        cold_users = p.get("cold_users", torch.zeros(len(query_ids), dtype=torch.bool))
        split = SplitPairs(_unpack(p["train"]), _unpack(p["valid"]), _unpack(p["test"]), _unpack(p["cold_test"]),
                           p["warm_items"], p["cold_items"], p["item_item"], cold_user_test, cold_users)
        return SavedPairs(query_ids, _ids(p["item_ids"]), split)


def _ids(values: list) -> np.ndarray:
    """Catalog ids as saved: whole numbers back to int64, text as objects."""
    return np.asarray(values, dtype=np.int64 if isinstance((values or [""])[0], int) else object)


_SLICES = ("train", "valid", "test", "cold_test", "cold_user_test")  # the split's pairs, as pairs.pt names them


def _pack(p: Pairs) -> dict:
    d = {"query": p.query, "candidate": p.candidate}
    for name in ("context", "target", "weight", "time"):
        if getattr(p, name) is not None:
            d[name] = getattr(p, name)
    return d


def _unpack(d: dict) -> Pairs:
    return Pairs(d["query"], d["candidate"], d.get("target"), d.get("weight"), d.get("time"), context=d.get("context"))
