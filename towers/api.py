"""The Python API: load a run folder, embed unseen entities, recommend, find similar items, evaluate.

The CLI calls exactly these functions, so both give the same results.
"""

from __future__ import annotations

import warnings
import zipfile
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pandas as pd
import torch
import yaml

from . import config as C
from .bundle import load_bundle, load_payload
from .dataset import Pairs, read_interactions
from .errors import TowersError
from .evaluate import Scorer, popularity_scorer
from .export import read_embeddings
from .features import SideEncoders, block_len, slice_block
from .retrieval import top_n
from .runner import evaluate_slices, oracle_scorer
from .tables import align_id_types, normalise_ids, require_columns
from .training import EMBED_CHUNK

_NO_MATCH = np.iinfo(np.int64).min  # what align_id_types gives text that is not a whole number


def _check_archive(path: Path, kind: str) -> None:
    """torch.save writes a zip archive; anything else (garbage, a cut-off copy) is damaged, not unsafe."""
    if path.is_file() and not zipfile.is_zipfile(path):
        raise TowersError(f"{path}: {kind} is corrupt or truncated (not a torch archive); retrain or restore the file")


def _unpack(d: dict) -> Pairs:
    return Pairs(d["query"], d["candidate"], d.get("target"), d.get("weight"))


class Run:
    """A trained run folder: its model bundle, exported embeddings and split pairs."""

    def __init__(self, run_dir: str | Path):
        self.dir = Path(run_dir)
        if not (self.dir / "model.pt").is_file():
            raise TowersError(f"{self.dir}: not a run folder (no model.pt); give the --out folder of `towers train`")
        _check_archive(self.dir / "model.pt", "model bundle")
        self.bundle = load_bundle(self.dir / "model.pt")
        cfg_path = self.dir / "config.yaml"
        self.config = self._saved_config(cfg_path) if cfg_path.is_file() else None
        self.item_item = self.bundle.item_item
        self._pairs = None
        self._emb = {}

    # ---- saved state -------------------------------------------------------------------------
    def _saved_config(self, cfg_path: Path) -> dict:
        fix = "restore config.yaml from a backup or retrain the run"
        try:
            raw = yaml.safe_load(cfg_path.read_text(encoding="utf-8"))
        except (yaml.YAMLError, UnicodeDecodeError) as exc:
            problem = getattr(exc, "problem", None) or type(exc).__name__
            raise TowersError(f"{cfg_path}: not valid YAML ({problem}); the run folder is damaged; {fix}") from None
        try:
            return C.resolve(raw, self.dir)
        except TowersError as exc:
            raise TowersError(f"{cfg_path}: {exc} (in the run's saved config; {fix})") from None

    @property
    def pairs(self) -> dict:
        if self._pairs is None:
            _check_archive(self.dir / "pairs.pt", "pairs file")
            self._pairs = load_payload(self.dir / "pairs.pt", "pairs file")
        return self._pairs

    def embeddings(self, side: str, folder: str = "") -> tuple[np.ndarray, torch.Tensor, torch.Tensor | None, dict]:
        """(ids, vectors, bias, metadata) of an exported embeddings file: side 'item', 'user' or 'query'."""
        key = (side, folder)
        if key not in self._emb:
            name = {"item": "item_embeddings.parquet", "user": "user_embeddings.parquet",
                    "query": "query_embeddings.parquet"}[side]
            path = self.dir / folder / name
            if side == "query" and not path.is_file():
                path = self.dir / folder / "item_embeddings.parquet"  # one shared tower
            self._emb[key] = read_embeddings(path)
        return self._emb[key]

    def _query_side(self) -> str:
        return "query" if self.item_item else "user"

    # ---- embedding unseen entities ----------------------------------------------------------------
    def _embed(self, df: pd.DataFrame, encoders: SideEncoders, tower, bias_table, source: str) -> pd.DataFrame:
        if encoders.id_column is None:
            raise TowersError(f"{source}: this run has no feature table for that side, so new entities cannot be "
                              "embedded from features; train with a feature table")
        require_columns(df.columns, [encoders.id_column] + [e.name for e in encoders.encoders], source)
        if len(df) == 0:
            raise TowersError(f"{source}: no rows to embed")
        ids = normalise_ids(df[encoders.id_column], source, encoders.id_column)
        lookup = align_id_types(ids, encoders.id_encoder.ids) if len(encoders.id_encoder.ids) else ids
        if lookup.dtype == ids.dtype or not (lookup == _NO_MATCH).any():
            ids = lookup  # the run's id type, where every id converts
        # else: text ids that are no whole numbers are new entities; they keep their own text as id
        block = encoders.encode(lookup, df.reset_index(drop=True), source)
        unknown = encoders.unknown_counts()
        if unknown:
            listed = ", ".join(f"{k}: {v}" for k, v in unknown.items())
            warnings.warn(f"{source}: values unseen in training were mapped to the unknown bucket ({listed})", stacklevel=3)
        tower.eval()
        n = block_len(block)
        with torch.no_grad():
            vecs = torch.cat([tower(slice_block(block, i, min(n, i + EMBED_CHUNK))) for i in range(0, n, EMBED_CHUNK)])
            bias = bias_table(block["id"]).squeeze(1) if bias_table is not None else None
        out = pd.DataFrame({"id": ids, "embedding": list(vecs.numpy())})
        if bias is not None:
            out["bias"] = bias.numpy()
        out.attrs["vectors"], out.attrs["bias"] = vecs, bias
        return out

    def embed_items(self, df: pd.DataFrame, source: str = "items") -> pd.DataFrame:
        """Embed item rows (id column plus feature columns) with the candidate tower."""
        m = self.bundle.model
        return self._embed(df, self.bundle.candidate_encoders, m.candidate_tower,
                           m.candidate_bias if m.use_biases else None, source)

    def embed_users(self, df: pd.DataFrame, source: str = "users") -> pd.DataFrame:
        """Embed user rows (id column plus feature columns) with the query tower."""
        if self.item_item:
            raise TowersError("this run is item_item: it has no user tower; use embed_items")
        m = self.bundle.model
        return self._embed(df, self.bundle.query_encoders, m.query_tower, m.query_bias if m.use_biases else None, source)

    # ---- retrieval ------------------------------------------------------------------------------
    def _rows(self, ids_all: np.ndarray, wanted, what: str) -> torch.Tensor:
        """Catalog rows of requested ids, parsed the same way as log ids are matched to tables."""
        values = list(wanted)
        if all(isinstance(v, (int, np.integer)) and not isinstance(v, bool) for v in values):
            given = np.asarray(values, dtype=np.int64)
        else:
            given = np.asarray([str(v) for v in values], dtype=object)
        wanted = align_id_types(given, ids_all)
        if ids_all.dtype.kind in "iu":
            unparsed = wanted == np.iinfo(np.int64).min  # align_id_types' mark for text that is no whole number
            if unparsed.any():
                bad = given[np.flatnonzero(unparsed)[0]]
                raise TowersError(f"{self.dir}: {what} id {bad!r} is not a number, but this run's {what} ids are "
                                  "numbers; give the id as a whole number")
        rows = pd.Index(ids_all).get_indexer(wanted)
        if (rows < 0).any():
            bad = wanted[np.flatnonzero(rows < 0)[0]]
            bad = bad.item() if isinstance(bad, np.generic) else bad
            raise TowersError(f"{self.dir}: unknown {what} id {bad!r}: not in this run's catalog ({len(ids_all)} {what}s); "
                              "check the id, or retrain with this entity in the feature table")
        return torch.from_numpy(rows.astype(np.int64))

    def _ranked_frame(self, query_ids, idx, scores, item_ids) -> pd.DataFrame:
        q, n = idx.shape
        valid = (idx >= 0).numpy().reshape(-1)
        flat = idx.numpy().reshape(-1)
        return pd.DataFrame({
            "query_id": np.repeat(np.asarray(query_ids, dtype=object), n)[valid],
            "rank": np.tile(np.arange(1, n + 1), q)[valid],
            "item_id": item_ids[flat[valid]],
            "score": scores.numpy().reshape(-1)[valid],
        })

    def recommend(self, user_ids, top: int = 10, exclude_known: bool = True) -> pd.DataFrame:
        """Top items per user (query_id, rank, item_id, score); known training positives excluded."""
        if top <= 0:
            raise TowersError(f"{self.dir}: --top must be a positive whole number, got {top}; ask for at least 1 item")
        q_ids, q_vec, q_bias, meta = self.embeddings(self._query_side())
        i_ids, i_vec, i_bias, _ = self.embeddings("item")
        rows = self._rows(q_ids, pd.unique(np.asarray(list(user_ids), dtype=object)), "query" if self.item_item else "user")
        scale = 1.0 / float(meta.get("temperature", 1.0))
        ex_r = ex_c = None
        if exclude_known:
            tr = self.pairs["train"]
            va = self.pairs["valid"]
            kq = torch.cat([tr["query"], va["query"]])
            kc = torch.cat([tr["candidate"], va["candidate"]])
            # map known pairs onto the requested rows (each requested row may appear once)
            lookup = torch.full((len(q_ids),), -1, dtype=torch.int64)
            lookup[rows] = torch.arange(len(rows))
            local = lookup[kq]
            keep = local >= 0
            local, kc = local[keep], kc[keep]
            if self.item_item:
                local = torch.cat([local, torch.arange(len(rows))])
                kc = torch.cat([kc, rows])
            order = torch.argsort(local, stable=True)
            ex_r, ex_c = local[order], kc[order]
        idx, scores = top_n(q_vec.index_select(0, rows), i_vec, top, i_bias, ex_r, ex_c, scale)
        extra = float(meta.get("global_bias", 0.0))
        if q_bias is not None:
            scores = scores + q_bias.index_select(0, rows).unsqueeze(1) + extra
        return self._ranked_frame(q_ids[rows.numpy()], idx, scores, i_ids)

    def similar(self, item_ids, top: int = 10) -> pd.DataFrame:
        """Most similar items (query_id, rank, item_id, score), the item itself excluded.

        user_item runs: cosine similarity of item embeddings. item_item runs: the trained pair score.
        """
        if top <= 0:
            raise TowersError(f"{self.dir}: --top must be a positive whole number, got {top}; ask for at least 1 item")
        i_ids, i_vec, i_bias, meta = self.embeddings("item")
        rows = self._rows(i_ids, item_ids, "item")
        self_rows = torch.arange(len(rows))
        if self.item_item:
            q_ids, q_vec, q_bias, _ = self.embeddings("query")
            scale = 1.0 / float(meta.get("temperature", 1.0))
            idx, scores = top_n(q_vec.index_select(0, rows), i_vec, top, i_bias, self_rows, rows, scale)
            if q_bias is not None:
                scores = scores + q_bias.index_select(0, rows).unsqueeze(1) + float(meta.get("global_bias", 0.0))
        else:
            unit = torch.nn.functional.normalize(i_vec, dim=1)
            idx, scores = top_n(unit.index_select(0, rows), unit, top, None, self_rows, rows)
        return self._ranked_frame(i_ids[rows.numpy()], idx, scores, i_ids)

    # ---- evaluation -----------------------------------------------------------------------------
    def _scorer(self, folder: str) -> Scorer:
        q_ids, qv, qb, meta = self.embeddings(self._query_side(), folder)
        _, cv, cb, _ = self.embeddings("item", folder)
        return Scorer(qv, cv, qb, cb, float(meta.get("global_bias", 0.0)), 1.0 / float(meta.get("temperature", 1.0)))

    def evaluate(self, interactions: str | Path | None = None) -> dict:
        """Re-score the run on its held-out pairs, or on a new interaction file with the config's columns."""
        p = self.pairs
        query_ids = np.asarray(p["query_ids"], dtype=np.int64 if isinstance((p["query_ids"] or [""])[0], int) else object)
        item_ids = np.asarray(p["item_ids"], dtype=np.int64 if isinstance((p["item_ids"] or [""])[0], int) else object)
        data = SimpleNamespace(train=_unpack(p["train"]), valid=_unpack(p["valid"]), test=_unpack(p["test"]),
                               cold_test=_unpack(p["cold_test"]), cold_items=p["cold_items"], warm_items=p["warm_items"],
                               item_item=p["item_item"], queries=SimpleNamespace(ids=query_ids),
                               candidates=SimpleNamespace(ids=item_ids))
        if self.config is None:
            raise TowersError(f"{self.dir}: config.yaml is missing; the run folder is incomplete")
        cfg = self.config
        notes = []
        if interactions is not None:
            cfg = C.resolve({**{k: dict(v) for k, v in cfg.items()}, "interactions": {**cfg["interactions"], "path": str(interactions)}},
                            Path.cwd())
            q, c, target, weight, _ = read_interactions(cfg)
            qr = pd.Index(query_ids).get_indexer(align_id_types(q, query_ids))
            cr = pd.Index(item_ids).get_indexer(align_id_types(c, item_ids))
            ok = (qr >= 0) & (cr >= 0)
            if (~ok).sum():
                notes.append(f"{interactions}: skipped {int((~ok).sum())} rows whose ids are not in this run's catalog")
            if not ok.any():
                raise TowersError(f"{interactions}: no row matches this run's users and items; check the id columns")
            f32 = lambda a: None if a is None else torch.from_numpy(a[ok].astype(np.float32))  # noqa: E731
            new = Pairs(torch.from_numpy(qr[ok].astype(np.int64)), torch.from_numpy(cr[ok].astype(np.int64)),
                        f32(target), f32(weight))
            warm = data.warm_items[new.candidate]
            data.test = new.subset(torch.nonzero(warm).flatten())
            data.cold_test = new.subset(torch.nonzero(~warm).flatten())
            data.cold_items = ~data.warm_items
        explicit = cfg["training"]["loss"] == "squared"
        scorers = {"popularity": popularity_scorer(data.train, len(query_ids), len(item_ids), explicit, data.item_item)}
        if (self.dir / "linear_factor" / "item_embeddings.parquet").is_file():
            scorers["linear_factor"] = self._scorer("linear_factor")
        scorers["towers"] = self._scorer("")
        try:
            oracle = oracle_scorer(cfg, data)
        except TowersError as exc:
            notes.append(f"oracle skipped: {exc}")
            oracle = None
        if oracle is not None:
            scorers["oracle"] = oracle
        return {"metrics": evaluate_slices(scorers, data, cfg), "notes": notes}


def load(run_dir: str | Path) -> Run:
    """Open a run folder written by `towers train`."""
    return Run(run_dir)


def train(config_path: str | Path, out_dir: str | Path, overwrite: bool = False, resume: bool = False) -> dict:
    """Train a run from a YAML config (same as `towers train`); returns metrics, folder and table."""
    from .runner import train_run

    return train_run(config_path, out_dir, overwrite=overwrite, resume=resume)
