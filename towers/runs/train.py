"""`towers train` end to end: prepare, train towers and the baseline, evaluate, export, save.

Everything is written into RUN_DIR.partial first and renamed to RUN_DIR at the end, so a failed or
killed run never leaves a half-written run folder under the requested name.
"""

from __future__ import annotations

import shutil
import tempfile
import time
from collections.abc import Callable
from pathlib import Path

import torch

from towers import config as C
from towers.collective import across, parts_at_first, rank_and_size
from towers.data.context import sample_contexts, vectors_with_context
from towers.data.embeddings_file import write_embeddings
from towers.data.groups import check_group_columns, group_labels
from towers.data.pairs import Pairs, SplitPairs
from towers.data.prepare import Prepared, prepare
from towers.data.splits import TrainedBefore, thin_slices_note
from towers.errors import TowersError
from towers.evaluation.protocol import (
    evaluate_slices,
    format_table,
    oracle_scorer,
    popularity_scorer,
    reference_scorers,
)
from towers.memory import hand_back_freed_memory, trim_freed_memory
from towers.model.build import baseline_model, build_model
from towers.model.bundle import LoadedBundle, save_bundle
from towers.model.embed import model_scorer, reads_context
from towers.model.grow import grow_weights
from towers.model.id_tables import describe as describe_id_tables
from towers.model.towers import TwoTowerModel
from towers.runs.folder import BILINEAR, EMBEDDINGS, LINEAR_FACTOR, TOWERS, RunFolder
from towers.runs.report import write_report
from towers.search.scorer import Scorer
from towers.training import distributed
from towers.training.als import fit_als
from towers.training.certificate import certify
from towers.training.certificate import describe as describe_certificate
from towers.training.loop import fit
from towers.training.progress import log
from towers.training.stopping import TrainingDiverged, TrainingInterrupted


def apply_threads(cfg: C.Config) -> None:
    if cfg.run.threads:
        torch.set_num_threads(cfg.run.threads)


def export_run(folder: RunFolder, model: TwoTowerModel, data: Prepared, cfg: C.Config, label: str,
               scorer: Scorer | None = None) -> dict[str, str]:
    """Write the embeddings of every catalog entity for one model; returns file names by side.

    scorer: the model's vectors when the caller already has them (they are not computed twice).
    """
    s = scorer if scorer is not None else model_scorer(model, data)
    meta = {"normalized": str(bool(cfg.model.normalize)).lower(),
            "temperature": cfg.model.temperature,
            "score": s.formula(model.use_biases),
            "global_bias": s.global_bias, "model": label}
    sides = [("item", data.candidates.ids, s.item_vectors, s.item_bias, "item")]
    if not data.item_item:
        sides.append(("user", data.queries.ids, s.query_vectors, s.query_bias, "user"))
    elif not model.shared:
        sides.append(("query", data.queries.ids, s.query_vectors, s.query_bias, "query item"))
    files = {}
    for side, ids, vectors, bias, written_as in sides:
        path = folder.model_dir(label) / EMBEDDINGS[side]
        write_embeddings(path, ids, vectors, bias, meta | {"side": written_as})
        files[{"item": "items", "user": "users", "query": "queries"}[side]] = path.name
    return files


def _save_model(folder: RunFolder, label: str, model: TwoTowerModel, model_cfg: C.ModelSection, data: Prepared) -> None:
    """The bundle: weights, the towers' input descriptions, and every encoder's plain state."""
    extra = {}
    if reads_context(model.query_tower, data):
        extra["context"] = data.context.state()
        extra["context_sample"] = sample_contexts(data.train.context)
    save_bundle(folder.model_file(label), model, model_cfg, model.query_tower.inputs, model.candidate_tower.inputs,
                data.queries.encoders, data.candidates.encoders, data.item_item, extra)


def _resumable(partial: RunFolder, cfg: C.Config) -> bool:
    """Whether an interrupted run can continue here, checking the config has not changed."""
    if not partial.has_config():
        return False
    changed = partial.config_difference(cfg)
    if changed:
        raise TowersError(f"{partial.path / RunFolder.CONFIG}: the config differs from the interrupted run's ({changed}); "
                          "resume with the same config, or drop --resume to start over")
    return True


def load_previous(run_dir: str | Path, model: str = TOWERS) -> LoadedBundle:
    """The earlier run's bundle for --init-from (its towers, or a reference model's subfolder)."""
    folder = RunFolder(run_dir)
    if not folder.has_model(model):
        rel = folder.model_file(model).relative_to(folder.path)
        raise TowersError(f"{folder.path}: --init-from needs a finished run folder (no {rel} there); give the --out "
                          "folder of an earlier `towers train`")
    return folder.load_bundle(model)


def trained_pairs(run_dir: str | Path) -> TrainedBefore:
    """The pairs an earlier run trained on, by id, for --init-from: they stay in training, so the new run's
    held-out pairs are none its starting weights learned."""
    folder = RunFolder(run_dir)
    if not (folder.path / RunFolder.PAIRS).is_file():
        raise TowersError(f"{folder.path}: --init-from needs the run's {RunFolder.PAIRS} (its split) to keep the pairs it "
                          "trained on out of the new run's held-out pairs; give the --out folder of a finished run")
    saved = folder.read_pairs()
    train = saved.split.train
    return TrainedBefore(saved.query_ids, saved.item_ids, train.query.numpy(), train.candidate.numpy())


def _reference_model(name: str, data: Prepared, cfg: C.Config) -> tuple[TwoTowerModel, C.Config]:
    """A reference model trained beside the towers: the linear factor model or the bilinear model."""
    if name == LINEAR_FACTOR:
        return baseline_model(data, cfg)
    preset = C.bilinear_preset(cfg)
    return build_model(data, preset), preset


def _train_reference(name: str, data: Prepared, cfg: C.Config, partial: RunFolder, init_from: str | Path | None,
                     resuming: bool, started_from: dict | None, primary: bool = True):
    """Train one reference model, and in process 0 save and export it; returns (model, scorer, history).
    The scorer is what this process evaluates with: None in a data-parallel process other than 0 that
    evaluates nothing, this process's own users with a divided log."""
    torch.manual_seed(cfg.run.seed)
    model, preset = _reference_model(name, data, cfg)
    if init_from and RunFolder(init_from).has_model(name):
        earlier = load_previous(init_from, name)
        started_from[name] = grow_weights(model, earlier.model.state_dict(), earlier.path)
    solver = fit_als if name == LINEAR_FACTOR and preset.evaluation.baseline_solver != "gradient" else fit
    result = solver(model, data, preset, partial.checkpoints(name), name, resume=resuming)
    if name == LINEAR_FACTOR and cfg.training.rating_loss:  # is it the global optimum? (certificate.py)
        cert = certify(model, data, preset, result.history)
        partial.write_json(RunFolder.CERTIFICATE, cert, name)
        log(describe_certificate(cert))
    scorer = None
    if primary:
        scorer = model_scorer(model, data)
        _save_model(partial, name, model, preset.model, data)
        export_run(partial, model, data, preset, name, scorer)
    if data.divided:  # what the evaluation needs is this process's users
        scorer = model_scorer(model, data, data.own_queries)
    return model, scorer, result.history


def train_run(config_path: str | Path, out_dir: str | Path, overwrite: bool = False, resume: bool = False,
              init_from: str | Path | None = None, on_round: Callable[[int, float | None], None] | None = None) -> dict:
    """Train, evaluate and export one run; returns {'metrics': ..., 'out': path, 'table': text}.

    resume=True continues an interrupted run from RUN_DIR.partial (exactly: the same weights as an
    uninterrupted run with the same seed); with nothing to resume it starts afresh. init_from starts
    every model from an earlier run's weights, grown for new users, items and values (model/grow.py).
    on_round(epoch, validation value) is called after each epoch of the towers (not of the reference
    models); an exception it raises ends the run there, leaving RUN_DIR.partial (`towers tune` prunes
    trials this way).
    """
    started = time.perf_counter()
    cfg = C.load(config_path)
    out = RunFolder(out_dir)
    partial = out.partial
    resuming = resume and _resumable(partial, cfg)
    if resume and not resuming and out.path.is_dir() and out.file(RunFolder.METRICS).is_file() \
            and not partial.path.exists():
        raise TowersError(f"{out.path}: this run already finished; nothing to resume (use --overwrite to train it again)")
    if not resuming:
        out.check_new(overwrite)
    distributed.start()
    if distributed.is_primary():
        return _train_into(cfg, config_path, out, partial, resuming, init_from, started, primary=True,
                           on_round=on_round)
    # the other processes train alongside and write only into a private scratch folder, removed however they end
    scratch = Path(tempfile.mkdtemp(prefix="towers-process-"))
    try:
        if resuming:
            shutil.copytree(partial.path, scratch / partial.path.name)
        return _train_into(cfg, config_path, out, RunFolder(scratch / partial.path.name), resuming, init_from, started,
                           primary=False, on_round=on_round)
    finally:
        shutil.rmtree(scratch, ignore_errors=True)


def _train_into(cfg: C.Config, config_path, out: RunFolder, partial: RunFolder, resuming: bool,
                init_from: str | Path | None, started: float, primary: bool,
                on_round: Callable[[int, float | None], None] | None = None) -> dict:
    """Everything after the output folders are settled: prepare, train, evaluate, write partial, publish to out."""
    if rank_and_size()[1] > 1:
        cfg = cfg.with_section("run", threads=distributed.threads_per_process(cfg.run.threads))
    apply_threads(cfg)
    torch.manual_seed(cfg.run.seed)
    previous = load_previous(init_from) if init_from else None
    try:  # a misspelt column fails before a long log is read
        check_group_columns(cfg)
    except TowersError as exc:  # a config key's error names the config file, as those found on loading do
        raise (TowersError(f"{config_path}: {exc}") if str(exc).startswith("config key") else exc) from None
    data = prepare(cfg, previous, trained_pairs(init_from) if init_from else None)
    groups = group_labels(cfg, data.queries.ids, data.candidates.ids)  # read now: a bad table fails before training
    started_from = None if previous is None else {"run": str(Path(init_from).resolve()), "encoders": data.started_from}
    for note in data.notes:
        log(note)
    # every process's pairs counted when the log is divided
    sizes = across(data.divided)(torch.tensor([len(p) for p in (data.train, data.valid, data.test, data.cold_test,
                                                                 data.cold_user_test)])).tolist()
    log(f"data: {sizes[0]:,} training, {sizes[1]:,} validation, {sizes[2]:,} test, "
        f"{sizes[3]:,} cold-start pairs, {sizes[4]:,} cold-user pairs; "
        f"{len(data.queries.ids):,} queries, {len(data.candidates.ids):,} items"
        + (f"; the users and their events divided among {rank_and_size()[1]} processes"
           if data.divided else ""))
    thin = thin_slices_note(cfg.evaluation, sizes[1], sizes[2])
    if thin is not None:
        log(thin)

    model = build_model(data, cfg)
    note = describe_id_tables({("query items" if data.item_item else "users"): model.query_tower.ids,
                               "items": model.candidate_tower.ids} if not model.shared else
                              {"items": model.candidate_tower.ids})
    if note:
        log(note)
    if previous is not None:  # before anything is written, so a mismatch leaves no folder behind
        started_from[TOWERS] = grow_weights(model, previous.model.state_dict(), previous.path)
    if not resuming:
        partial.remove()
        partial.make(TOWERS, checkpoints=True)
        partial.write_config(cfg)
    references = [name for name, on in ((LINEAR_FACTOR, cfg.evaluation.baseline),
                                        (BILINEAR, cfg.evaluation.bilinear)) if on]
    for name in references:
        partial.make(name, checkpoints=True)
    resume_hint = f"resume with: towers train {config_path} --out {out.path} --resume"
    try:
        result = fit(model, data, cfg, partial.checkpoints(), TOWERS, resume=resuming, on_round=on_round)
        hand_back_freed_memory()  # the steps are over: the heap they kept is not the export's or evaluation's
        # a divided log: this process's users only (process 0 embeds everyone for the files, below);
        # a process other than 0 of a whole log evaluates nothing
        evaluates = primary or data.divided
        scorers: dict[str, Scorer | None] = {
            "popularity": popularity_scorer(data.train, len(data.queries.ids), len(data.candidates.ids),
                                            cfg.training.rating_loss, data.item_item, data.divided),
            TOWERS: model_scorer(model, data, data.own_queries) if evaluates else None,
        }
        files = {}
        if primary:  # saved and exported now, so the model is let go before the references train and evaluate
            _save_model(partial, TOWERS, model, cfg.model, data)
            files = export_run(partial, model, data, cfg, TOWERS, None if data.divided else scorers[TOWERS])
            trim_freed_memory()  # what writing the files took, not kept through the evaluation
        histories = {TOWERS: result.history}
        # the model itself is needed only for context vectors: else its tables (the users' id table the
        # largest) are free before the references train and the evaluation ranks
        context_models = {TOWERS: model} if reads_context(model.query_tower, data) else {}
        model = None
        for name in references:
            ref, scorers[name], histories[name] = _train_reference(name, data, cfg, partial, init_from, resuming,
                                                                   started_from, primary)
            if name == BILINEAR and reads_context(ref.query_tower, data):
                context_models[name] = ref
            ref = None  # saved and exported by _train_reference: only its scorer is needed now
    except TrainingInterrupted as stop:
        raise TrainingInterrupted(f"{stop}; {resume_hint}") from None
    except TrainingDiverged:
        partial.remove()  # a diverged run leaves nothing behind
        raise
    hand_back_freed_memory()  # and the references' steps too
    # a divided log (data/shards.py): every process evaluates its own users and all get the whole result
    share = distributed.evaluation_share(divided=True) if data.divided else None
    if not primary and share is None:
        return {"metrics": None, "out": out.path, "table": ""}
    if data.oracle is not None:
        scorers["oracle"] = oracle_scorer(data.oracle)
    event_vectors = {name: _event_vectors(m.query_tower, data) for name, m in context_models.items()}
    references, reference_info = reference_scorers(data.split, len(data.queries.ids), len(data.candidates.ids), cfg, log,
                                                   share)
    metrics = evaluate_slices(scorers | references, data.split, cfg, event_vectors, reference_info, groups, share)
    references = None
    if not primary:
        other_parts(data.split)  # process 0 writes every process's pairs
        return {"metrics": None, "out": out.path, "table": ""}
    if result.still_improving:
        metrics.setdefault("notes", {})["towers_training"] = ("towers: the best epoch was the last one run; validation "
                                                               "was still improving (raise training.epochs)")
    scorers = None  # every vector is written: what they held is free before the pairs are gathered
    partial.write_pairs(data.queries.ids, data.candidates.ids, data.split, other_parts(data.split) if data.divided else [])
    partial.write_json(RunFolder.METRICS, metrics)
    if started_from is not None:
        partial.write_json(RunFolder.STARTED_FROM, started_from)
    partial.write_json(RunFolder.HISTORY,
                       {"stop_metric": result.stop_metric, "best_epoch": result.best_epoch,
                        "still_improving": result.still_improving, "epochs": histories})
    if cfg.report.enabled:
        write_report(partial.path)  # report.html, read back from the finished files
    partial.publish(out)
    table = format_table(metrics)
    log(f"run written to {out.path} in {time.perf_counter() - started:.1f} s ({', '.join(files.values())})")
    return {"metrics": metrics, "out": out.path, "table": table}


def other_parts(split: SplitPairs) -> list[SplitPairs] | None:
    """The other processes' split pairs at process 0, in rank order, for its pairs file (None in the other
    processes, which send theirs). The catalog masks are process 0's: they are the same in every process."""
    def columns(p: Pairs) -> list[list[torch.Tensor] | None]:
        return [None if c is None else parts_at_first(c) for c in (p.query, p.candidate, p.target, p.weight, p.time)]
    slices = [columns(p) for p in (split.train, split.valid, split.test, split.cold_test, split.cold_user_test)]
    if slices[0][0] is None:
        return None
    world = len(slices[0][0])
    pairs = [[Pairs(*[None if c is None else c[r] for c in cols]) for cols in slices] for r in range(1, world)]
    return [SplitPairs(train, valid, test, cold_test, split.warm_items, split.cold_items, split.item_item,
                       cold_user_test, split.cold_users) for train, valid, test, cold_test, cold_user_test in pairs]


def _event_vectors(tower, data: Prepared):
    """A function giving a context-aware query tower's vectors for a slice's events."""
    return lambda p: vectors_with_context(tower, data.queries.block, p.query, p.context)
