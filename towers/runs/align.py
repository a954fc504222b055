"""`towers align`: rotate a retrained run onto an older run's vectors without changing any score.

A dot product does not change when both sides are multiplied by the same orthogonal matrix R:
(U R)(V R)^T = U V^T. Two trainings of the same model can therefore give the same scores with very
different vectors, which breaks caches and indexes built on the old ones. The R that brings the new
item vectors closest to the old ones, min ||V_new R - V_old||_F over orthogonal R, is the orthogonal
Procrustes problem, solved by one SVD (Schonemann 1966): V_new^T V_old = A S B^T gives R = A B^T.

The aligned run is a copy of the new run with every vector multiplied by R: the exported parquet
files and the model bundle (the id table of an id-only tower, or the last linear layer of an MLP), so
`embed`, `recommend` and `similar` give rotated vectors and the same scores. Biases are not part of
the dot product and stay as they are; unit-length outputs stay unit-length, since R keeps norms.
"""

from __future__ import annotations

import json
import shutil
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import torch
import torch.nn as nn

from towers.atomic import write_atomic, write_text_atomic
from towers.data.embeddings_file import read_embeddings, write_embeddings
from towers.data.tables import align_id_types
from towers.errors import TowersError
from towers.model.bundle import LoadedBundle, load_payload
from towers.model.id_tables import is_bounded
from towers.runs.folder import (
    EMBEDDINGS,
    SUBFOLDER_MODELS,
    TOWERS,
    RunFolder,
)

RECORD = RunFolder.ALIGNMENT
SIDE_FILES = {"items": EMBEDDINGS["item"], "users": EMBEDDINGS["user"], "query items": EMBEDDINGS["query"]}
LEFT_OUT = RunFolder.CHECKPOINTS  # training state of the unrotated weights (see align_run)
MODEL = RunFolder.MODEL
RANK_TOLERANCE = 1e-6  # singular values below this share of the largest count as zero: common practice (no source)
PROBE_ROWS = 64


def procrustes(source: np.ndarray, target: np.ndarray) -> np.ndarray:
    """The orthogonal R (k, k) minimising ||source R - target||_F (Schonemann 1966), in float64."""
    a, _, bt = np.linalg.svd(source.T.astype(np.float64) @ target.astype(np.float64))
    return a @ bt


def drift(new: np.ndarray, old: np.ndarray) -> dict:
    """How far matched vectors are apart: mean and max of ||new_i - old_i|| and ||new - old||_F / ||old||_F."""
    gaps = np.linalg.norm(new - old, axis=1)
    scale = float(np.linalg.norm(old))
    return {"mean": float(gaps.mean()), "max": float(gaps.max()),
            "relative": float(np.linalg.norm(new - old) / scale) if scale > 0 else None}


def shared_rows(new_ids: np.ndarray, old_ids: np.ndarray, old_path: Path) -> tuple[np.ndarray, np.ndarray]:
    """Row numbers (in the new file, in the old file) of the ids both files hold, matched by original id."""
    old = pd.Index(align_id_types(old_ids, new_ids))
    if not old.is_unique:
        dup = old[old.duplicated()][0]
        raise TowersError(f"{old_path}, column 'id': duplicate id {dup!r}; an embeddings file has one row per id")
    in_old = old.get_indexer(new_ids)
    rows_new = np.flatnonzero(in_old >= 0)
    return rows_new, in_old[rows_new]


def _embeddings_or_none(path: Path):
    return read_embeddings(path) if path.is_file() else None


def _side_drift(new, old, rotation: np.ndarray, old_path: Path) -> dict | None:
    """Drift before and after rotation over the ids two files share; None when they share none."""
    rows_new, rows_old = shared_rows(new[0], old[0], old_path)
    if len(rows_new) == 0 or new[1].shape[1] != old[1].shape[1]:
        return None
    a = new[1].numpy()[rows_new].astype(np.float64)
    b = old[1].numpy()[rows_old].astype(np.float64)
    return {"shared": int(len(rows_new)), "before": drift(a, b), "after": drift(a @ rotation, b)}


# ---- the model bundle ----------------------------------------------------------------------------
def _towers_of(bundle: LoadedBundle) -> list[tuple[str, nn.Module, list[dict]]]:
    """(name, tower, its inputs) for each distinct tower; a shared tower is listed once."""
    m = bundle.model
    out = [("candidate", m.candidate_tower, m.candidate_tower.inputs)]
    if not m.shared:
        out.append(("query", m.query_tower, m.query_tower.inputs))
    return out


@torch.no_grad()
def _rotate_tower(tower: nn.Module, r: torch.Tensor, path: Path) -> None:
    """Make the tower output out @ r: id table @ r, or W' = r^T W and b' = b r on the last linear layer."""
    if tower.direct:
        if is_bounded(tower.ids) and tower.ids.combine == "product":
            raise TowersError(f"{path}: this id-only model composes each id's vector as the element-wise product of "
                              "two table rows (model.id_table_rows with id_table_combine: product), which no rotation "
                              "of the tables reproduces; align it without the bounded tables, or use "
                              "id_table_combine: sum")
        # one table, or two whose rows are summed: (a + b) r = a r + b r
        tables = [tower.ids.quotient, tower.ids.remainder] if is_bounded(tower.ids) else [tower.ids]
        for t in tables:
            t.weight.copy_((t.weight.double() @ r).to(t.weight.dtype))
        return
    last = tower.mlp[-1] if len(tower.mlp) else None
    if not isinstance(last, nn.Linear) or last.out_features != r.shape[0]:
        raise TowersError(f"{path}: the tower does not end in a linear layer of size {r.shape[0]}; "
                          "align can rotate only towers that do")
    last.weight.copy_((r.T @ last.weight.double()).to(last.weight.dtype))
    if last.bias is not None:
        last.bias.copy_((last.bias.double() @ r).to(last.bias.dtype))


def _product_tables(path: Path) -> str | None:
    """Why an id-only model cannot be rotated (its id vectors are products of two table rows), or None."""
    bundle = LoadedBundle(load_payload(path), path)
    if any(t.direct and is_bounded(t.ids) and t.ids.combine == "product" for _, t, _ in _towers_of(bundle)):
        return ("its id vectors are element-wise products of two table rows (model.id_table_rows, id_table_combine: "
                "product), which no rotation of the tables reproduces")
    return None


def _probe_block(tower: nn.Module, generator: torch.Generator) -> dict:
    """Random inputs of the tower's shape: ids, category and token rows, numbers."""
    n = PROBE_ROWS
    rows = tower.ids.num_embeddings if tower.ids is not None else 1
    block = {"id": torch.randint(0, rows, (n,), generator=generator)}
    for spec in tower.inputs:
        if spec["kind"] == "categorical":
            block[spec["name"]] = torch.randint(0, spec["size"], (n,), generator=generator)
        elif spec["kind"] == "tokens":
            block[spec["name"]] = torch.randint(0, spec["size"], (n, 3), generator=generator)
        else:
            block[spec["name"]] = torch.randn(n, spec["width"], generator=generator)
    return block


def rotate_bundle(payload: dict, path: Path, rotation: np.ndarray, reference: Path) -> dict:
    """A copy of a bundle payload whose towers output (their old output) @ rotation.

    Refuses towers with non-negative outputs: a rotation would give negative entries. Checks the result
    on random inputs, so a tower layout that a rotation of the last layer does not cover is refused, not
    written.
    """
    original = LoadedBundle(payload, path)
    if original.model_cfg.non_negative:
        raise TowersError(f"{path}: this model has non_negative: true; a rotation would make entries negative, so "
                          "it cannot be aligned (retrain with non_negative: false to use align)")
    rotated = LoadedBundle(payload, path)  # a second, independent copy of the weights
    r = torch.from_numpy(rotation)
    generator = torch.Generator().manual_seed(0)
    for (name, before, _), (_, after, _) in zip(_towers_of(original), _towers_of(rotated)):
        _rotate_tower(after, r, path)
        block = _probe_block(before, generator)
        with torch.no_grad():
            want = before(block).double() @ r
            got = after(block).double()
        gap = float((got - want).abs().max())
        if gap > 1e-4 * (1.0 + float(want.abs().max())):
            raise TowersError(f"{path}: the {name} tower does not rotate exactly (largest difference {gap:.2g}); "
                              "align supports towers whose last step is a linear layer or the id table")
    extra = dict(payload.get("extra") or {}, aligned_to=str(reference))
    state = {k: v.detach().clone() for k, v in rotated.model.state_dict().items()}
    return dict(payload, state_dict=state, extra=extra)


# ---- one model folder ------------------------------------------------------------------------------
def _plan(new_dir: Path, ref_dir: Path, reference_label: Path) -> dict:
    """Fit R for one model folder and compute everything to write; nothing is written here."""
    new_items = read_embeddings(new_dir / SIDE_FILES["items"])
    old_path = ref_dir / SIDE_FILES["items"]
    old_items = read_embeddings(old_path)
    k_new, k_old = new_items[1].shape[1], old_items[1].shape[1]
    if k_new != k_old:
        raise TowersError(f"{new_dir}: vectors have k = {k_new} but the reference {ref_dir} has k = {k_old}; "
                          "align needs two runs with the same model.dim")
    rows_new, rows_old = shared_rows(new_items[0], old_items[0], old_path)
    n = len(rows_new)
    if n == 0:
        raise TowersError(f"{new_dir}: shares no item id with the reference {ref_dir}; align needs a reference "
                          "trained on (mostly) the same catalog")
    if n < k_new:
        raise TowersError(f"{new_dir}: shares only {n} item ids with the reference {ref_dir}, fewer than k = {k_new}, "
                          "so the rotation is not determined; align against a run sharing at least k items")
    a = new_items[1].numpy()[rows_new].astype(np.float64)
    b = old_items[1].numpy()[rows_old].astype(np.float64)
    rotation = procrustes(a, b)
    notes = []
    sv = np.linalg.svd(a.T @ b, compute_uv=False)
    if sv[-1] <= RANK_TOLERANCE * sv[0]:
        notes.append(f"{new_dir}: the shared item vectors span fewer than k = {k_new} directions, so the rotation is "
                     "not unique in the others; scores are unchanged, but those directions are not matched")
    drifts = {"items": {"shared": n, "before": drift(a, b), "after": drift(a @ rotation, b)}}
    tables = {"items": new_items}
    for side in ("users", "query items"):
        new_side = _embeddings_or_none(new_dir / SIDE_FILES[side])
        if new_side is None:
            continue
        tables[side] = new_side
        old_side = _embeddings_or_none(ref_dir / SIDE_FILES[side])
        if old_side is not None:
            d = _side_drift(new_side, old_side, rotation, ref_dir / SIDE_FILES[side])
            if d is not None:
                drifts[side] = d
    payload = rotate_bundle(load_payload(new_dir / MODEL), new_dir / MODEL, rotation, reference_label)
    return {"rotation": rotation, "shared_items": n, "drift": drifts, "tables": tables, "payload": payload,
            "notes": notes}


def _record(plan: dict, reference: Path) -> dict:
    return {"reference": str(reference), "shared_items": plan["shared_items"],
            "rotation": plan["rotation"].tolist(), "drift": plan["drift"]}


# ---- the command ---------------------------------------------------------------------------------
def align_run(run_dir: str | Path, reference: str | Path, out_dir: str | Path, overwrite: bool = False) -> dict:
    """Write OUT as RUN rotated onto REFERENCE's item vectors; returns the alignment.json record.

    OUT gets every file of RUN except its checkpoints/ folders (the unrotated weights and optimiser
    state of training, which a rotation cannot carry over exactly); model.pt and the embeddings files
    are rotated. A linear_factor/ subfolder is aligned on its own against REFERENCE/linear_factor/, or
    copied unrotated (with a warning) when the reference has none.
    """
    new, ref, out = Path(run_dir), Path(reference), Path(out_dir)
    if not (new / MODEL).is_file():
        raise TowersError(f"{new}: not a run folder (no model.pt); give the --out folder of `towers train`")
    if not (ref / SIDE_FILES["items"]).is_file():
        raise TowersError(f"{ref}: no {SIDE_FILES['items']}; give as --reference a run folder written by "
                          "`towers train` or `towers align`")
    if out.resolve() in (new.resolve(), ref.resolve()):
        raise TowersError(f"{out}: is the run or the reference itself; write the aligned run to a new folder")
    RunFolder(out).check_new(overwrite)
    ref_label = ref.resolve()

    plans = {"": _plan(new, ref, ref_label)}
    record = _record(plans[""], ref_label)
    notes = list(plans[""]["notes"])
    for name in SUBFOLDER_MODELS:  # each reference model is aligned on its own against the reference's
        if not (new / name / MODEL).is_file():
            continue
        product = _product_tables(new / name / MODEL)
        if product is not None:
            record[name] = {"aligned": False, "reason": f"{product}; copied unrotated"}
            notes.append(f"{new / name}: {product}; copied unrotated")
        elif (ref / name / SIDE_FILES["items"]).is_file():
            plans[name] = _plan(new / name, ref / name, ref_label / name)
            record[name] = _record(plans[name], ref_label / name)
            notes += plans[name]["notes"]
        else:
            reason = f"the reference has no {name}/ to align against; copied unrotated"
            record[name] = {"aligned": False, "reason": reason}
            notes.append(f"{new / name}: {reason}")
    for note in notes:
        warnings.warn(note, stacklevel=2)

    rotated = {str(Path(folder, MODEL)) for folder in plans}
    rotated |= {str(Path(folder, SIDE_FILES[side])) for folder, plan in plans.items() for side in plan["tables"]}
    record["rotated"] = sorted(rotated)
    record["left_out"] = sorted(str(p.relative_to(new)) for p in new.rglob(LEFT_OUT) if p.is_dir())
    record["notes"] = notes

    partial_folder = RunFolder(out).partial
    partial_folder.remove()
    partial = partial_folder.path
    try:
        for src in sorted(new.rglob("*")):
            rel = src.relative_to(new)
            if not src.is_file() or LEFT_OUT in rel.parts or str(rel) in rotated or src.name.endswith(".tmp"):
                continue
            write_atomic(partial / rel, lambda p, s=src: shutil.copyfile(s, p))
        for folder, plan in plans.items():
            write_atomic(partial / folder / MODEL, lambda p, d=plan["payload"]: torch.save(d, p))
            r = torch.from_numpy(plan["rotation"])
            for side, (ids, vectors, bias, meta) in plan["tables"].items():
                aligned = (vectors.double() @ r).float()
                write_embeddings(partial / folder / SIDE_FILES[side], ids, aligned, bias,
                                 dict(meta, aligned_to=str(ref_label / folder) if folder else str(ref_label)))
        write_text_atomic(partial / RECORD, json.dumps(record, indent=2))
        partial_folder.publish(RunFolder(out))
    except BaseException:
        shutil.rmtree(partial, ignore_errors=True)
        raise
    return record


def format_drift(record: dict) -> str:
    """The drift figures of an alignment record as a plain text table, one line per model and side."""
    cols = ("shared", "mean before", "mean after", "max before", "max after", "rel before", "rel after")
    lines = ["model".ljust(15) + "side".ljust(13) + "".join(c.rjust(12) for c in cols)]
    for model, rec in ((TOWERS, record), *((name, record.get(name)) for name in SUBFOLDER_MODELS)):
        if not rec or "drift" not in rec:
            continue
        for side, d in rec["drift"].items():
            rel = lambda v: float("nan") if v is None else v  # noqa: E731
            figures = [d["before"]["mean"], d["after"]["mean"], d["before"]["max"], d["after"]["max"],
                       rel(d["before"]["relative"]), rel(d["after"]["relative"])]
            lines.append(model.ljust(15) + side.ljust(13) + f"{d['shared']:12d}" + "".join(f"{v:12.4f}" for v in figures))
    return "\n".join(lines) + "\n"
