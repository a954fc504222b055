"""`towers train` end to end: prepare, train towers and the baseline, evaluate, export, save.

Everything is written into RUN_DIR.partial first and renamed to RUN_DIR at the end, so a failed or
killed run never leaves a half-written run folder under the requested name.
"""

from __future__ import annotations

import json
import shutil
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd
import torch
import yaml

from . import config as C
from . import distributed
from .atomic import write_atomic, write_text_atomic
from .als import fit_als
from .bundle import save_bundle
from .certificate import certify
from .certificate import describe as describe_certificate
from .context import event_pairs, sample_contexts, vectors_with_context
from .dataset import Pairs, Prepared, prepare
from .errors import TowersError
from .evaluate import Scorer, popularity_scorer, ranking_metrics, rating_metrics
from .export import read_embeddings, write_embeddings
from .model import TwoTowerModel
from .report import write_report
from .training import (TrainingDiverged, TrainingInterrupted, build_model, fit, log, model_scorer, reads_context,
                       start_global_bias)
from .warm_start import grow_weights, load_previous

MODEL_ORDER = ("popularity", "linear_factor", "bilinear", "towers", "oracle")


def check_out_dir(out: Path, overwrite: bool) -> None:
    if out.exists() and not out.is_dir():
        raise TowersError(f"{out}: exists and is not a folder; choose another --out")
    if out.exists() and any(out.iterdir()) and not overwrite:
        raise TowersError(f"{out}: run folder already exists; choose another --out or pass --overwrite to replace it")


def apply_threads(cfg: dict) -> None:
    if cfg["run"]["threads"]:
        torch.set_num_threads(cfg["run"]["threads"])


def baseline_model(data: Prepared, cfg: dict) -> tuple[TwoTowerModel, dict]:
    """The linear factor model: the same towers with ids only and no hidden layer."""
    preset = C.linear_factor_preset(cfg)
    m = TwoTowerModel([], data.queries.encoders.id_encoder.size, [], data.candidates.encoders.id_encoder.size,
                      preset["model"], shared=data.item_item and cfg["model"]["shared_tower"])
    return start_global_bias(m, data, preset), preset


def oracle_scorer(cfg: dict, data: Prepared) -> Scorer | None:
    """True vectors from files (as the demo generator writes them), mapped to the catalogs."""
    ev = cfg["evaluation"]
    if not ev["oracle_items"] or data.item_item:
        return None

    def load(path, ids):
        o_ids, vec, bias, _ = read_embeddings(path)
        if o_ids.dtype != ids.dtype:
            o_ids = o_ids.astype(str).astype(object) if ids.dtype == object else o_ids
        rows = pd.Index(o_ids).get_indexer(ids)
        if (rows < 0).any():
            missing = ids[np.flatnonzero(rows < 0)[0]]
            raise TowersError(f"{path}, column 'id': no oracle vector for id {missing!r}; the oracle must cover every entity")
        r = torch.from_numpy(rows)
        return vec.index_select(0, r), None if bias is None else bias.index_select(0, r)

    qv, qb = load(ev["oracle_users"], data.queries.ids)
    cv, cb = load(ev["oracle_items"], data.candidates.ids)
    return Scorer(qv, cv, qb, cb)


def known_pairs(data: Prepared) -> Pairs:
    """Positives a query is known to have (training and validation): excluded from its test ranking."""
    tr, va = data.train.positives(), data.valid.positives()
    return Pairs(torch.cat([tr.query, va.query]), torch.cat([tr.candidate, va.candidate]))


def evaluate_slices(scorers: dict[str, Scorer], data: Prepared, cfg: dict, event_vectors: dict | None = None) -> dict:
    """{slice: {model: {metric: value}}} for the warm test pairs and, if any, the cold ones.

    With context columns each held-out event is its own query (context.py); event_vectors maps a
    model name to a function giving its query vectors for a slice's events (context-aware towers).
    """
    explicit = cfg["training"]["loss"] == "squared"
    ks, tie = cfg["evaluation"]["top_k"], cfg["run"]["seed"]
    empty = Pairs(torch.zeros(0, dtype=torch.int64), torch.zeros(0, dtype=torch.int64))
    slices = {"warm": (data.test, known_pairs(data), data.warm_items)}
    if len(data.cold_test):
        slices["cold"] = (data.cold_test, empty, data.cold_items)
    out: dict = {name: {} for name in slices}
    for slice_name, (pairs, known, candidates) in slices.items():
        users = None
        if pairs.context is not None:
            raw = pairs
            pairs, known, users = event_pairs(pairs, known)
        for name in MODEL_ORDER:
            if name not in scorers:
                continue
            s = scorers[name]
            if users is not None:
                fn = (event_vectors or {}).get(name)
                s = s.for_events(users, fn(raw) if fn else None)
            if explicit:
                out[slice_name][name] = rating_metrics(s, pairs)
            else:
                out[slice_name][name] = ranking_metrics(s, pairs, known, candidates, ks, tie, exclude_self=data.item_item)
    return out


def format_table(metrics: dict) -> str:
    """The metrics as a plain text table, one block per slice."""
    lines = []
    for slice_name, models in metrics.items():
        names = [m for m in models if models[m]]
        if not names:
            continue
        cols = [c for c in next(iter(models[n] for n in names)) if c != "queries"]
        width = max(len(n) for n in names) + 2
        lines.append(f"[{slice_name}]" + (f"  ({models[names[0]].get('queries')} queries)" if "queries" in models[names[0]] else ""))
        lines.append("model".ljust(width) + "".join(c.rjust(11) for c in cols))
        for n in names:
            lines.append(n.ljust(width) + "".join(f"{models[n].get(c, float('nan')):11.4f}" for c in cols))
        lines.append("")
    return "\n".join(lines).rstrip() + "\n"


def export_run(folder: Path, model: TwoTowerModel, data: Prepared, cfg: dict, label: str,
               scorer: Scorer | None = None) -> dict[str, str]:
    """Write the embeddings of every catalog entity for one model; returns file names by side.

    scorer: the model's vectors when the caller already has them (they are not computed twice).
    """
    s = scorer if scorer is not None else model_scorer(model, data)
    meta = {"normalized": str(bool(cfg["model"]["normalize"])).lower(),
            "temperature": cfg["model"]["temperature"],
            "score": "dot(query, item) / temperature + query bias + item bias + global bias"
            if model.use_biases else "dot(query, item) / temperature",
            "global_bias": s.global_bias, "model": label}
    files = {}
    write_embeddings(folder / "item_embeddings.parquet", data.candidates.ids, s.item_vectors, s.item_bias,
                     meta | {"side": "item"})
    files["items"] = "item_embeddings.parquet"
    if not data.item_item:
        write_embeddings(folder / "user_embeddings.parquet", data.queries.ids, s.query_vectors, s.query_bias,
                         meta | {"side": "user"})
        files["users"] = "user_embeddings.parquet"
    elif not model.shared:
        write_embeddings(folder / "query_embeddings.parquet", data.queries.ids, s.query_vectors, s.query_bias,
                         meta | {"side": "query item"})
        files["queries"] = "query_embeddings.parquet"
    return files


def _save_model(folder: Path, model: TwoTowerModel, model_cfg: dict, data: Prepared) -> None:
    """The bundle: weights, the towers' input descriptions, and every encoder's plain state."""
    extra = {}
    if reads_context(model.query_tower, data):
        extra["context"] = data.context.state()
        extra["context_sample"] = sample_contexts(data.train.context)
    save_bundle(folder / "model.pt", model, model_cfg, model.query_tower.inputs, model.candidate_tower.inputs,
                data.queries.encoders, data.candidates.encoders, data.item_item, extra)


def save_pairs(path: Path, data: Prepared) -> None:
    """Catalog ids and split pairs, as tensors and lists only (weights_only-loadable)."""
    def pack(p: Pairs) -> dict:
        d = {"query": p.query, "candidate": p.candidate}
        if p.context is not None:
            d["context"] = p.context
        if p.target is not None:
            d["target"] = p.target
        if p.weight is not None:
            d["weight"] = p.weight
        return d

    payload = {"format": "towers-pairs", "version": 1,
               "query_ids": data.queries.ids.tolist(), "item_ids": data.candidates.ids.tolist(),
               "train": pack(data.train), "valid": pack(data.valid), "test": pack(data.test),
               "cold_test": pack(data.cold_test), "cold_items": data.cold_items, "warm_items": data.warm_items,
               "item_item": data.item_item}
    write_atomic(path, lambda p: torch.save(payload, p))


def _resumable(out: Path, partial: Path, cfg: dict) -> bool:
    """Whether an interrupted run can continue here, checking the config has not changed."""
    saved = partial / "config.yaml"
    if not saved.is_file():
        return False
    if yaml.safe_load(saved.read_text(encoding="utf-8")) != yaml.safe_load(C.dump(cfg)):
        raise TowersError(f"{saved}: the config differs from the interrupted run's; resume with the same config, "
                          f"or drop --resume to start over")
    return True


def train_run(config_path: str | Path, out_dir: str | Path, overwrite: bool = False, resume: bool = False,
              init_from: str | Path | None = None) -> dict:
    """Train, evaluate and export one run; returns {'metrics': ..., 'out': path, 'table': text}.

    resume=True continues an interrupted run from RUN_DIR.partial (exactly: the same weights as an
    uninterrupted run with the same seed); with nothing to resume it starts afresh. init_from starts
    every model from an earlier run's weights, grown for new users, items and values (warm_start.py).
    """
    started = time.perf_counter()
    cfg = C.load(config_path)
    out = Path(out_dir)
    partial = out.parent / f"{out.name}.partial"
    resuming = resume and _resumable(out, partial, cfg)
    if resume and not resuming and out.is_dir() and (out / "metrics.json").is_file() and not partial.exists():
        raise TowersError(f"{out}: this run already finished; nothing to resume (use --overwrite to train it again)")
    if not resuming:
        check_out_dir(out, overwrite)
    distributed.start()
    primary = distributed.is_primary()
    scratch = None
    if not primary:  # the other processes train alongside and write only into a private scratch folder
        scratch = Path(tempfile.mkdtemp(prefix="towers-process-"))
        if resuming:
            shutil.copytree(partial, scratch / partial.name)
        partial = scratch / partial.name
    if distributed.rank_and_size()[1] > 1:
        cfg["run"]["threads"] = distributed.threads_per_process(cfg["run"]["threads"])
    apply_threads(cfg)
    torch.manual_seed(cfg["run"]["seed"])
    previous = load_previous(init_from) if init_from else None
    data = prepare(cfg, previous)
    started_from = None if previous is None else {"run": str(Path(init_from).resolve()), "encoders": data.started_from}
    for note in data.notes:
        log(note)
    log(f"data: {len(data.train):,} training, {len(data.valid):,} validation, {len(data.test):,} test, "
        f"{len(data.cold_test):,} cold-start pairs; {len(data.queries.ids):,} queries, {len(data.candidates.ids):,} items")

    model = build_model(data, cfg)
    if previous is not None:  # before anything is written, so a mismatch leaves no folder behind
        started_from["towers"] = grow_weights(model, previous.model.state_dict(), previous.path)
    if not resuming:
        if partial.exists():
            shutil.rmtree(partial)
        (partial / "checkpoints").mkdir(parents=True)
        write_text_atomic(partial / "config.yaml", C.dump(cfg))
    (partial / "linear_factor" / "checkpoints").mkdir(parents=True, exist_ok=True)
    resume_hint = f"resume with: towers train {config_path} --out {out} --resume"
    try:
        result = fit(model, data, cfg, partial / "checkpoints", "towers", resume=resuming)
        scorers: dict[str, Scorer] = {
            "popularity": popularity_scorer(data.train, len(data.queries.ids), len(data.candidates.ids),
                                            cfg["training"]["loss"] == "squared", data.item_item),
            "towers": model_scorer(model, data),
        }
        histories = {"towers": result.history}
        if cfg["evaluation"]["baseline"]:
            torch.manual_seed(cfg["run"]["seed"])
            base, preset = baseline_model(data, cfg)
            if init_from and (Path(init_from) / "linear_factor" / "model.pt").is_file():
                lf_prev = load_previous(init_from, "linear_factor")
                started_from["linear_factor"] = grow_weights(base, lf_prev.model.state_dict(), lf_prev.path)
            train_base = fit if preset["evaluation"]["baseline_solver"] == "gradient" else fit_als
            base_result = train_base(base, data, preset, partial / "linear_factor" / "checkpoints", "linear_factor",
                                     resume=resuming)
            if cfg["training"]["loss"] == "squared":  # is it the global optimum? (certificate.py)
                cert = certify(base, data, preset)
                write_text_atomic(partial / "linear_factor" / "certificate.json", json.dumps(cert, indent=2))
                log(describe_certificate(cert))
            scorers["linear_factor"] = model_scorer(base, data)
            histories["linear_factor"] = base_result.history
            _save_model(partial / "linear_factor", base, preset["model"], data)
            export_run(partial / "linear_factor", base, data, preset, "linear_factor", scorers["linear_factor"])
        context_models = {"towers": model}
        if cfg["evaluation"]["bilinear"]:
            torch.manual_seed(cfg["run"]["seed"])
            bi_cfg = C.bilinear_preset(cfg)
            (partial / "bilinear" / "checkpoints").mkdir(parents=True, exist_ok=True)
            bilinear = build_model(data, bi_cfg)
            if init_from and (Path(init_from) / "bilinear" / "model.pt").is_file():
                bi_prev = load_previous(init_from, "bilinear")
                started_from["bilinear"] = grow_weights(bilinear, bi_prev.model.state_dict(), bi_prev.path)
            histories["bilinear"] = fit(bilinear, data, bi_cfg, partial / "bilinear" / "checkpoints", "bilinear",
                                        resume=resuming).history
            scorers["bilinear"] = model_scorer(bilinear, data)
            context_models["bilinear"] = bilinear
            _save_model(partial / "bilinear", bilinear, bi_cfg["model"], data)
            export_run(partial / "bilinear", bilinear, data, bi_cfg, "bilinear", scorers["bilinear"])
    except TrainingInterrupted as stop:
        raise TrainingInterrupted(f"{stop}; {resume_hint}") from None
    except TrainingDiverged:
        shutil.rmtree(partial, ignore_errors=True)  # a diverged run leaves nothing behind
        raise
    if not primary:
        shutil.rmtree(scratch, ignore_errors=True)
        return {"metrics": None, "out": out, "table": ""}
    if data.oracle is not None:
        scorers["oracle"] = data.oracle
    event_vectors = {name: _event_vectors(m.query_tower, data) for name, m in context_models.items()
                     if reads_context(m.query_tower, data)}
    metrics = evaluate_slices(scorers, data, cfg, event_vectors)
    _save_model(partial, model, cfg["model"], data)
    files = export_run(partial, model, data, cfg, "towers", scorers["towers"])
    save_pairs(partial / "pairs.pt", data)
    write_text_atomic(partial / "metrics.json", json.dumps(metrics, indent=2))
    if started_from is not None:
        write_text_atomic(partial / "started_from.json", json.dumps(started_from, indent=2))
    write_text_atomic(partial / "history.json", json.dumps(
        {"stop_metric": result.stop_metric, "best_epoch": result.best_epoch, "epochs": histories}, indent=2))
    if cfg["report"]["enabled"]:
        write_report(partial)  # report.html, read back from the finished files
    _publish(partial, out)
    table = format_table(metrics)
    log(f"run written to {out} in {time.perf_counter() - started:.1f} s ({', '.join(files.values())})")
    return {"metrics": metrics, "out": out, "table": table}


def _event_vectors(tower, data: Prepared):
    """A function giving a context-aware query tower's vectors for a slice's events."""
    return lambda p: vectors_with_context(tower, data.queries.block, p.query, p.context)


def _publish(partial: Path, out: Path) -> None:
    """Move the finished RUN.partial into place, replacing an older run folder only at the very end."""
    if out.exists():
        old = out.parent / f"{out.name}.replaced"
        if old.exists():
            shutil.rmtree(old)
        out.rename(old)
        partial.rename(out)
        shutil.rmtree(old)
    else:
        partial.rename(out)
