"""`towers align`: a retrained run rotated onto an older one, every score unchanged.

The facts checked here come from outside towers: for an orthogonal R, (U R)(V R)^T = U R R^T V^T =
U V^T, so dot products (and norms, hence cosines) do not move; the orthogonal R minimising
||A R - B||_F is the Procrustes solution of Schonemann (1966), as computed by
scipy.linalg.orthogonal_procrustes; random orthogonal matrices come from scipy.stats.ortho_group.
Runs are tiny (the 200-item demo store, k = 8, one epoch) so the file stays quick.
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import torch
import yaml
from scipy.linalg import orthogonal_procrustes
from scipy.stats import ortho_group

import towers
from towers.cli import main as cli
from towers.evaluation.protocol import SLICES
from towers.runs.align import align_run

K = 8  # the tiny runs' model.dim (tests/conftest.py)


@pytest.fixture(scope="module")
def base(tmp_path_factory) -> Path:
    """This file's own folder for the references and aligned runs it writes."""
    return tmp_path_factory.mktemp("align")


@pytest.fixture(scope="module")
def old_run(tiny_runs) -> Path:
    return tiny_runs.train()


@pytest.fixture(scope="module")
def new_run(tiny_runs) -> Path:
    return tiny_runs.train(run={"seed": 1})


@pytest.fixture(scope="module")
def aligned(base, new_run, old_run) -> Path:
    out = base / "runs" / "aligned"
    align_run(new_run, old_run, out)
    return out


def _read(path: Path):
    """An embeddings file read with pyarrow alone, as the README shows: ids, vectors, bias, metadata."""
    t = pq.read_table(path)
    meta = {k.decode(): v.decode() for k, v in t.schema.metadata.items()}
    vecs = t.column("embedding").combine_chunks().flatten().to_numpy().reshape(-1, int(meta["k"])).astype(np.float64)
    bias = t.column("bias").to_numpy().astype(np.float64) if "bias" in t.column_names else None
    return t.column("id").to_pylist(), vecs, bias, meta


def _scores(run: Path, folder: str = "") -> np.ndarray:
    """Every user x item score from a run's parquet files: dot / temperature + biases + g (README formula)."""
    _, u, bu, meta = _read(run / folder / "user_embeddings.parquet")
    _, v, bv, _ = _read(run / folder / "item_embeddings.parquet")
    s = u @ v.T / float(meta["temperature"])
    if bu is not None:
        s = s + bu[:, None] + bv[None, :] + float(meta["global_bias"])
    return s


def _shared(new: Path, old: Path, side: str = "item"):
    ids_n, vn, _, _ = _read(new / f"{side}_embeddings.parquet")
    ids_o, vo, _, _ = _read(old / f"{side}_embeddings.parquet")
    pos = {i: r for r, i in enumerate(ids_o)}
    rows = [(r, pos[i]) for r, i in enumerate(ids_n) if i in pos]
    return vn[[a for a, _ in rows]], vo[[b for _, b in rows]]


def _rotation(run: Path, folder: str = "") -> np.ndarray:
    rec = json.loads((run / "alignment.json").read_text())
    return np.asarray((rec[folder] if folder else rec)["rotation"])


def _write_reference(folder: Path, source: Path, q: np.ndarray, keep: slice = slice(None), rename: bool = False) -> Path:
    """A reference folder holding `source`'s item (user, query) vectors times q, written with pyarrow directly."""
    folder.mkdir(parents=True)
    for side in ("item", "user", "query"):
        path = source / f"{side}_embeddings.parquet"
        if not path.is_file():
            continue
        ids, v, _, _ = _read(path)
        ids, v = ids[keep], (v @ q)[keep]
        if rename:
            ids = [f"ELSEWHERE-{i}" for i in ids]
        flat = pa.array(v.astype(np.float32).reshape(-1), type=pa.float32())
        table = pa.table({"id": ids, "embedding": pa.FixedSizeListArray.from_arrays(flat, v.shape[1])})
        pq.write_table(table.replace_schema_metadata({b"k": str(v.shape[1]).encode()}), folder / path.name)
    return folder


# ---- scores do not change ------------------------------------------------------------------------------
def test_every_score_is_unchanged_in_the_parquet_files(new_run, old_run, aligned):
    # (U R)(V R)^T = U V^T for orthogonal R; biases are untouched (brute-force scores, numpy)
    for folder in ("", "linear_factor"):
        before, after = _scores(new_run, folder), _scores(aligned, folder)
        assert before.shape == (300, 200)
        np.testing.assert_allclose(after, before, atol=2e-5)
        r = _rotation(aligned, folder)
        np.testing.assert_allclose(r.T @ r, np.eye(K), atol=1e-10)  # orthogonal: R^T R = I
        for side in ("item", "user"):
            ids_n, vn, bn, _ = _read(new_run / folder / f"{side}_embeddings.parquet")
            ids_a, va, ba, meta = _read(aligned / folder / f"{side}_embeddings.parquet")
            assert ids_a == ids_n and np.array_equal(ba, bn)
            np.testing.assert_allclose(va, vn @ r, atol=1e-6)
            assert meta["aligned_to"].endswith(str(Path(old_run.parent.name, old_run.name, folder)))


@pytest.mark.slow
def test_every_score_is_unchanged_through_the_api(new_run, aligned):
    a, b = towers.load(new_run), towers.load(aligned)
    users = a.embeddings("user")[0]
    items = a.embeddings("item")[0]
    key = ["query_id", "item_id"]
    rec_a = a.recommend(users, top=len(items), exclude_known=False).set_index(key).sort_index()
    rec_b = b.recommend(users, top=len(items), exclude_known=False).set_index(key).sort_index()
    assert len(rec_a) == 300 * 200 and rec_a.index.equals(rec_b.index)
    # the same numbers as the brute-force parquet scores above; (U R)(V R)^T = U V^T
    np.testing.assert_allclose(rec_b["score"].to_numpy(), rec_a["score"].to_numpy(), atol=2e-5)
    # similar is a cosine in user_item runs: R keeps norms, so cosines do not move either
    sim_a = a.similar(items, top=len(items) - 1).set_index(key).sort_index()
    sim_b = b.similar(items, top=len(items) - 1).set_index(key).sort_index()
    assert sim_a.index.equals(sim_b.index)
    np.testing.assert_allclose(sim_b["score"].to_numpy(), sim_a["score"].to_numpy(), atol=2e-6)
    # the held-out metrics, computed from the vectors, come out the same
    again = b.evaluate()["metrics"]
    before = a.evaluate()["metrics"]
    for slice_name in [s for s in before if s in SLICES]:
        for model, metrics in before[slice_name].items():
            for name, value in metrics.items():
                assert again[slice_name][model][name] == pytest.approx(value, abs=1e-6), (slice_name, model, name)


# ---- the rotation is the Procrustes solution -------------------------------------------------------------
def test_rotation_equals_scipy_orthogonal_procrustes(new_run, old_run, aligned):
    rec = json.loads((aligned / "alignment.json").read_text())
    for folder in ("", "linear_factor"):
        a, b = _shared(new_run / folder, old_run / folder)
        # reference: scipy.linalg.orthogonal_procrustes (Schonemann 1966) on the same matrices
        expect, _ = orthogonal_procrustes(a, b)
        np.testing.assert_allclose(_rotation(aligned, folder), expect, atol=1e-8)
        part = rec[folder] if folder else rec
        assert part["shared_items"] == len(a) == 200
        # drift figures recomputed by brute force (numpy norms)
        d = part["drift"]["items"]
        assert d["before"]["mean"] == pytest.approx(np.linalg.norm(a - b, axis=1).mean(), rel=1e-9)
        assert d["after"]["max"] == pytest.approx(np.linalg.norm(a @ expect - b, axis=1).max(), rel=1e-9)
        assert d["after"]["relative"] == pytest.approx(np.linalg.norm(a @ expect - b) / np.linalg.norm(b), rel=1e-9)
        # optimal: no other orthogonal matrix fits better (random ones from scipy.stats.ortho_group)
        for q in ortho_group.rvs(K, size=20, random_state=4):
            assert np.linalg.norm(a @ q - b) >= np.linalg.norm(a @ expect - b)
        # the same R is applied to the users, whose drift is reported too
        u_new, u_old = _shared(new_run / folder, old_run / folder, "user")
        assert part["drift"]["users"]["after"]["relative"] == pytest.approx(
            np.linalg.norm(u_new @ expect - u_old) / np.linalg.norm(u_old), rel=1e-9)


def test_planted_rotation_is_recovered(base, old_run):
    q = ortho_group.rvs(K, random_state=11)  # reference: scipy.stats.ortho_group, Haar-random orthogonal
    ref = _write_reference(base / "planted", old_run, q)
    out = base / "runs" / "planted_aligned"
    with pytest.warns(UserWarning, match="no linear_factor/ to align against"):
        record = align_run(old_run, ref, out)
    # V (V Q target): the Procrustes solution is Q itself (exact fit, full-rank V)
    np.testing.assert_allclose(np.asarray(record["rotation"]), q, atol=1e-5)
    assert record["drift"]["items"]["after"]["max"] < 1e-5 < record["drift"]["items"]["before"]["mean"]
    assert record["drift"]["users"]["after"]["relative"] < 1e-5
    _, v, _, _ = _read(old_run / "item_embeddings.parquet")
    np.testing.assert_allclose(_read(out / "item_embeddings.parquet")[1], v @ q, atol=1e-5)
    # the baseline had nothing to align against: copied byte for byte and said so
    assert record["linear_factor"] == {"aligned": False, "reason": record["linear_factor"]["reason"]}
    assert (out / "linear_factor" / "model.pt").read_bytes() == (old_run / "linear_factor" / "model.pt").read_bytes()


@pytest.mark.slow
def test_shared_tower_item_item_run_rotates_its_one_tower(base, tiny_runs):
    run = tiny_runs.train(config="store_copurchase.yaml", model={"normalize": True, "temperature": 0.5},
                          evaluation={"baseline": False})
    q = ortho_group.rvs(K, random_state=5)
    out = base / "runs" / "pairs_shared_aligned"
    record = align_run(run, _write_reference(base / "pairs_planted", run, q), out)
    np.testing.assert_allclose(np.asarray(record["rotation"]), q, atol=1e-5)
    ids, v, _, meta = _read(out / "item_embeddings.parquet")
    assert meta["normalized"] == "true"
    np.testing.assert_allclose(np.linalg.norm(v, axis=1), 1.0, atol=1e-6)  # R keeps unit length
    items = towers.load(run).embeddings("item")[0]
    key = ["query_id", "item_id"]
    a = towers.load(run).similar(items, top=50).set_index(key)
    b = towers.load(out).similar(items, top=len(items) - 1).set_index(key).loc[a.index]
    np.testing.assert_allclose(b["score"].to_numpy(), a["score"].to_numpy(), atol=2e-5)  # U V^T unchanged


@pytest.mark.slow
def test_item_item_run_with_two_towers_aligns_the_query_side(base, tiny_runs):
    new = tiny_runs.train(config="store_copurchase.yaml", model={"shared_tower": False, "normalize": True},
                          evaluation={"baseline": False})
    q = ortho_group.rvs(K, random_state=8)  # reference: scipy.stats.ortho_group
    old = _write_reference(base / "pairs_two_planted", new, q)
    out = base / "runs" / "pairs_aligned"
    record = align_run(new, old, out)
    assert set(record["drift"]) == {"items", "query items"}
    r = np.asarray(record["rotation"])
    np.testing.assert_allclose(r, q, atol=1e-5)  # fitted on the items alone
    qn, qo = _shared(new, old, "query")
    assert record["drift"]["query items"]["before"]["mean"] == pytest.approx(
        np.linalg.norm(qn - qo, axis=1).mean(), rel=1e-9)
    assert record["drift"]["query items"]["after"]["max"] < 1e-5  # the query tower got the same R
    np.testing.assert_allclose(_read(out / "query_embeddings.parquet")[1], _read(new / "query_embeddings.parquet")[1] @ r,
                               atol=1e-6)
    items = towers.load(new).embeddings("item")[0]
    key = ["query_id", "item_id"]
    a = towers.load(new).similar(items, top=len(items) - 1).set_index(key).sort_index()
    b = towers.load(out).similar(items, top=len(items) - 1).set_index(key).sort_index()
    assert a.index.equals(b.index)
    np.testing.assert_allclose(b["score"].to_numpy(), a["score"].to_numpy(), atol=2e-5)


@pytest.mark.slow
def test_context_run_keeps_its_scores_in_every_context(base):
    # a query tower that also reads context columns (interactions.context): its last layer is rotated,
    # the bundle's context encoders and context sample are copied, so every context scores as before
    rng = np.random.default_rng(3)
    n = 1500
    log = pd.DataFrame({"customer": rng.integers(0, 60, n), "item": rng.integers(0, 20, n),
                        "channel": rng.choice(["shop", "web"], n), "hour": rng.integers(8, 20, n)})
    log.to_csv(base / "context_log.csv", index=False)
    cfg = {"run": {"seed": 1, "threads": 1},
           "interactions": {"path": str(base / "context_log.csv"), "query_column": "customer", "candidate_column": "item",
                            "context": [{"name": "channel", "kind": "categorical"}, {"name": "hour", "kind": "numeric"}]},
           "model": {"dim": K, "hidden": [16]},
           "training": {"epochs": 1, "batch_size": 256, "progress": "plain"},
           "evaluation": {"top_k": [10], "baseline": False}}
    (base / "context.yaml").write_text(yaml.safe_dump(cfg))
    run = base / "runs" / "context"
    towers.train(base / "context.yaml", run)
    q = ortho_group.rvs(K, random_state=13)  # reference: scipy.stats.ortho_group
    out = base / "runs" / "context_aligned"
    record = align_run(run, _write_reference(base / "context_planted", run, q), out)
    np.testing.assert_allclose(np.asarray(record["rotation"]), q, atol=1e-5)
    a, b = towers.load(run), towers.load(out)
    assert b.bundle.extra["context"] == a.bundle.extra["context"]
    users = list(range(60))
    for context in ({"channel": "web", "hour": 9}, {"channel": "shop", "hour": 19}, None):
        ra = a.recommend(users, top=20, exclude_known=False, context=context).set_index(["query_id", "item_id"]).sort_index()
        rb = b.recommend(users, top=20, exclude_known=False, context=context).set_index(["query_id", "item_id"]).sort_index()
        assert ra.index.equals(rb.index)
        np.testing.assert_allclose(rb["score"].to_numpy(), ra["score"].to_numpy(), atol=2e-5)  # (U R)(V R)^T = U V^T


# ---- the model bundle is rotated too ---------------------------------------------------------------------
def test_embed_on_the_aligned_run_gives_the_rotated_vectors(small_store, new_run, aligned, tmp_path):
    # (x W^T + b) R = x (R^T W)^T + b R: the rotated last layer maps features to the rotated vectors
    data = small_store
    r = _rotation(aligned)
    for flag, table in (("--items", "items.parquet"), ("--items", "new_items.parquet"), ("--users", "customers.csv")):
        a, b = tmp_path / f"a_{Path(table).stem}.parquet", tmp_path / f"b_{Path(table).stem}.parquet"
        assert cli(["embed", str(new_run), flag, str(data / table), "--out", str(a)]) == 0
        assert cli(["embed", str(aligned), flag, str(data / table), "--out", str(b)]) == 0
        ids_a, va, ba, _ = _read(a)
        ids_b, vb, bb, _ = _read(b)
        assert ids_a == ids_b and np.array_equal(ba, bb)
        np.testing.assert_allclose(vb, va @ r, atol=1e-5)
    # re-embedding the catalog from the aligned bundle reproduces the aligned export (brute force)
    _, v_export, _, _ = _read(aligned / "item_embeddings.parquet")
    np.testing.assert_allclose(_read(tmp_path / "b_items.parquet")[1], v_export, atol=1e-5)
    # the id-only baseline: its id tables are the embeddings, rotated in place
    lf = torch.load(aligned / "linear_factor" / "model.pt", weights_only=True)["state_dict"]
    lf_new = torch.load(new_run / "linear_factor" / "model.pt", weights_only=True)["state_dict"]
    r_lf = torch.from_numpy(_rotation(aligned, "linear_factor"))
    for name in ("candidate_tower.ids.weight", "query_tower.ids.weight"):
        np.testing.assert_allclose(lf[name].double().numpy(), (lf_new[name].double() @ r_lf).numpy(), atol=1e-6)
    for name in ("candidate_bias.weight", "query_bias.weight", "global_bias"):
        assert torch.equal(lf[name], lf_new[name])  # biases are not part of the dot product


def test_aligned_folder_copies_the_rest_and_leaves_out_checkpoints(new_run, old_run, aligned):
    for name in ("config.yaml", "metrics.json", "history.json", "pairs.pt", "report.html"):
        assert (aligned / name).read_bytes() == (new_run / name).read_bytes(), name
    assert not (aligned / "checkpoints").exists() and not (aligned / "linear_factor" / "checkpoints").exists()
    rec = json.loads((aligned / "alignment.json").read_text())
    assert rec["left_out"] == ["checkpoints", "linear_factor/checkpoints"]
    assert "model.pt" in rec["rotated"] and "linear_factor/user_embeddings.parquet" in rec["rotated"]
    assert rec["reference"] == str(old_run.resolve())
    assert not (aligned.parent / "aligned.partial").exists()


def test_cli_prints_the_drift_table(base, new_run, old_run, capsys):
    out = base / "runs" / "cli_aligned"
    assert cli(["align", str(new_run), "--reference", str(old_run), "--out", str(out)]) == 0
    shown = capsys.readouterr().out.splitlines()
    assert shown[0].split()[:3] == ["model", "side", "shared"]
    rows = {tuple(line.split()[:2]): line.split()[2:] for line in shown[1:-1]}
    assert set(rows) == {("towers", "items"), ("towers", "users"), ("linear_factor", "items"), ("linear_factor", "users")}
    rec = json.loads((out / "alignment.json").read_text())
    assert float(rows[("towers", "items")][2]) == pytest.approx(rec["drift"]["items"]["after"]["mean"], abs=1e-4)
    # Procrustes minimises the Frobenius drift of the items it is fitted on, and R = I is one candidate,
    # so the relative item drift can only go down (users are not fitted, so no such bound holds for them)
    for model in ("towers", "linear_factor"):
        figures = [float(x) for x in rows[(model, "items")]]
        assert figures[6] <= figures[5] + 1e-4
    assert shown[-1] == f"aligned run: {out}"


# ---- errors ---------------------------------------------------------------------------------------------
def _refused(capsys, out: Path, *args: str) -> str:
    """Runs `towers align` expecting exit 2, one error line, and nothing written."""
    capsys.readouterr()  # drop what earlier steps (training logs) printed
    assert cli(["align", *args, "--out", str(out)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("error: "), err
    assert not out.exists() and not out.with_name(out.name + ".partial").exists()
    return err[0]


def test_different_k_is_refused(base, new_run, capsys):
    # a reference with k = 6: the first 6 columns of a random rotation of the new vectors
    ref = _write_reference(base / "k6", new_run, ortho_group.rvs(K, random_state=2)[:, :6])
    line = _refused(capsys, base / "runs" / "x", str(new_run), "--reference", str(ref))
    assert "k = 8" in line and "k = 6" in line and "model.dim" in line


def test_no_shared_items_is_refused(base, new_run, capsys):
    ref = _write_reference(base / "elsewhere", new_run, np.eye(K), rename=True)
    assert "shares no item id" in _refused(capsys, base / "runs" / "x", str(new_run), "--reference", str(ref))


def test_fewer_shared_items_than_k_is_refused(base, new_run, capsys):
    # with n < k shared rows, V_new^T V_old has rank n < k: many orthogonal R fit equally well
    ref = _write_reference(base / "few", new_run, np.eye(K), keep=slice(0, K - 1))
    line = _refused(capsys, base / "runs" / "x", str(new_run), "--reference", str(ref))
    assert f"only {K - 1} item ids" in line and "fewer than k = 8" in line


def test_reference_spanning_fewer_than_k_directions_warns(base, new_run):
    # old vectors with a zero last coordinate: V_new^T V_old has rank k - 1, so R is unique only up to
    # the last direction (R = A B^T is unique iff V_new^T V_old is nonsingular: from memory)
    flat = np.diag([1.0] * (K - 1) + [0.0])
    ref = _write_reference(base / "flat", new_run, flat)
    with pytest.warns(UserWarning, match="span fewer than k = 8 directions"):
        record = align_run(new_run, ref, base / "runs" / "flat_aligned")
    r = np.asarray(record["rotation"])
    np.testing.assert_allclose(r.T @ r, np.eye(K), atol=1e-10)  # still orthogonal, so scores still hold
    a, b = _shared(new_run, ref)
    expect, _ = orthogonal_procrustes(a, b)  # reference: scipy.linalg.orthogonal_procrustes
    fit = np.linalg.norm(a @ r - b)
    assert fit == pytest.approx(np.linalg.norm(a @ expect - b), rel=1e-9)  # an optimal fit all the same


def test_missing_files_are_refused(base, new_run, old_run, capsys, tmp_path):
    assert "not a run folder (no model.pt)" in _refused(capsys, base / "runs" / "x", str(tmp_path), "--reference", str(old_run))
    assert "no item_embeddings.parquet" in _refused(capsys, base / "runs" / "x", str(new_run), "--reference", str(tmp_path))
    broken = tmp_path / "broken"
    shutil.copytree(new_run, broken)
    (broken / "item_embeddings.parquet").unlink()
    line = _refused(capsys, base / "runs" / "x", str(broken), "--reference", str(old_run))
    assert "item_embeddings.parquet: embeddings file not found" in line


@pytest.mark.slow
def test_non_negative_model_is_refused(base, old_run, tiny_runs, capsys):
    nonneg = tiny_runs.train(model={"non_negative": True}, evaluation={"baseline": False})
    line = _refused(capsys, base / "runs" / "x", str(nonneg), "--reference", str(old_run))
    assert "non_negative: true" in line and "cannot be aligned" in line


def test_existing_or_same_output_folder_is_refused(new_run, old_run, aligned, capsys, tmp_path):
    assert cli(["align", str(new_run), "--reference", str(old_run), "--out", str(aligned)]) == 2
    assert "already exists" in capsys.readouterr().err
    assert (aligned / "alignment.json").is_file()  # the existing aligned run is untouched
    own = Path(shutil.copytree(new_run, tmp_path / "run"))  # a copy: the shared run is never a target
    assert cli(["align", str(own), "--reference", str(old_run), "--out", str(own), "--overwrite"]) == 2
    assert "write the aligned run to a new folder" in capsys.readouterr().err
    assert (own / "checkpoints" / "best.pt").is_file()
