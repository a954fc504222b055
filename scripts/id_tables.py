"""What bounded id tables (model.id_table_rows) cost in accuracy and save in memory, measured in one run.

Accuracy: configs/store_baskets.yaml on the demo store (generated here, `towers demo-data`), trained
through towers.train with one row per id and with caps whose two tables hold about 1/4 and 1/16 of
the larger side's rows, plus the smallest cap allowed (about 2 sqrt(n) rows). The cap is one number
for both sides, so the smaller side keeps a larger share. Each run prints its id-table parameters
(both towers; the linear factor model's are the same again), the peak memory of its process and the
warm and cold recall@20 of the towers and the linear factor model. On the demo's 4,000 customers the
id tables are a few megabytes, so peak memory there is the rest of the run's.

Memory: a log of many ids (`--memory-users`, 2,000,000 customers with 2 events each by default, over
20,000 items) through prepare, the model and one epoch of gradient training (ids only, hidden [64],
SparseAdam, whose state is two more tables of the same shape), full tables against the same caps;
peak memory of each process.

Every setting runs in its own child process, so memory peaks do not mix.

    scripts/id_tables                             # both parts, the product (the default)
    scripts/id_tables --combine product sum       # each cap with both combinations
    scripts/id_tables --skip-memory               # accuracy only
    scripts/id_tables --config store_views.yaml   # another demo config
"""

from __future__ import annotations

import argparse
import json
import math
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import yaml

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

SHARES = (4, 16)  # caps giving about 1/4 and 1/16 of the larger side's rows
K = 20


def log(message: str) -> None:
    print(f"[id_tables] {message}", file=sys.stderr, flush=True)


def peak_rss_gb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2 ** 20  # Linux: KiB


def cap_for(rows: int, share: int | None) -> int:
    """The cap whose two tables hold about rows / share rows (None: the smallest cap for rows)."""
    from towers.model.id_tables import least_rows

    return least_rows(rows) if share is None else max(least_rows(rows), math.ceil(rows / share))


def id_parameters(state: dict) -> int:
    """Parameters of the id tables in a model's state dict (both towers, one shared tower once)."""
    tables = {v.data_ptr(): v.numel() for k, v in state.items() if ".ids." in k}  # a shared tower's keys twice
    return sum(tables.values())


# ---- children ----------------------------------------------------------------------------------------

def child_accuracy(args: dict) -> dict:
    """towers.train on the config with model changes; metrics, id parameters, peak memory."""
    import towers
    from towers.model.bundle import load_payload

    cfg = yaml.safe_load(Path(args["config"]).read_text())
    cfg["model"].update(args["model"])
    work = Path(args["work"])
    path = work / f"{args['label']}.yaml"
    path.write_text(yaml.safe_dump(cfg))
    t = time.perf_counter()
    run = towers.train(path, work / args["label"], overwrite=True)
    seconds = time.perf_counter() - t
    m = run["metrics"]
    out = {"seconds": seconds, "peak_rss_gb": peak_rss_gb(), "recall": {}}
    for model in ("towers", "linear_factor"):
        for s in ("warm", "cold"):
            out["recall"][f"{s} {model}"] = m.get(s, {}).get(model, {}).get(f"recall@{K}")
    payload = load_payload(work / args["label"] / "model.pt")
    out["id_parameters"] = id_parameters(payload["state_dict"])
    out["id_rows"] = {side: len(payload[f"{side}_encoders"]["ids"]["ids"]) + 1 for side in ("query", "candidate")}
    return out


def memory_config(work: Path, model: dict) -> dict:
    return {
        "run": {"seed": 1},
        "interactions": {"path": str(work / "big.parquet"), "query_column": "customer", "candidate_column": "item"},
        "model": {"dim": 32, "hidden": [64], **model},
        "training": {"loss": "logistic", "negatives": 1, "batch_size": 8192, "epochs": 1, "progress": "plain"},
        "evaluation": {"baseline": False, "references": False, "validation_fraction": 0.0},
    }


def child_memory_data(args: dict) -> dict:
    import numpy as np
    import pyarrow as pa
    import pyarrow.parquet as pq

    rng = np.random.default_rng(5)
    n = args["users"] * 2
    users = np.repeat(np.arange(args["users"]), 2)
    w = (np.arange(args["items"]) + 10.0) ** -0.8  # long-tailed items, as scripts/bench draws them
    items = np.minimum(np.searchsorted(np.cumsum(w / w.sum()), rng.random(n)), args["items"] - 1)
    pq.write_table(pa.table({"customer": users, "item": items}), Path(args["work"]) / "big.parquet")
    return {}


def child_memory(args: dict) -> dict:
    """prepare, build, one epoch: peak memory and the id-table parameters of the model."""
    import torch

    from towers import config as C
    from towers.data.prepare import prepare
    from towers.model.build import build_model
    from towers.training.loop import Trainer

    work = Path(args["work"])
    cfg = C.resolve(memory_config(work, args["model"]), work)
    t = time.perf_counter()
    data = prepare(cfg)
    torch.manual_seed(1)
    model = build_model(data, cfg)
    trainer = Trainer(model, data, cfg)
    trainer.run_epoch(1, False)
    return {"seconds": time.perf_counter() - t, "peak_rss_gb": peak_rss_gb(),
            "id_parameters": id_parameters(model.state_dict()),
            "id_rows": {"query": data.queries.encoders.id_encoder.size,
                        "candidate": data.candidates.encoders.id_encoder.size}}


CHILDREN = {"accuracy": child_accuracy, "memory_data": child_memory_data, "memory": child_memory}


def child(name: str, args: dict) -> dict:
    cmd = [sys.executable, __file__, "--child", name, "--args", json.dumps(args)]
    proc = subprocess.run(cmd, stdout=subprocess.PIPE, text=True, cwd=ROOT)
    if proc.returncode != 0:
        raise SystemExit(f"id_tables: {name} {args.get('label', '')} failed (exit {proc.returncode})")
    return json.loads(proc.stdout.strip().splitlines()[-1])


# ---- the parent ----------------------------------------------------------------------------------------

def _cap(model: dict) -> str:
    return f"{model['id_table_rows']:,}" if model["id_table_rows"] else "-"


def settings(rows: int, combines: list[str]) -> list[tuple[str, dict]]:
    """(label, model changes): one row per id, then each cap with each combination."""
    out = [("full", {"id_table_rows": 0})]
    for share in (*SHARES, None):
        cap = cap_for(rows, share)
        for combine in combines:
            name = f"1/{share}" if share else "smallest"
            out.append((f"{name} {combine}" if len(combines) > 1 else name,
                        {"id_table_rows": cap, "id_table_combine": combine}))
    return out


def accuracy_part(work: Path, config: str, combines: list[str], seed: int) -> list[str]:
    data = work / "demo_data"
    if not data.is_dir():
        from towers.synthetic.demo_store import generate_store

        generate_store(data)
    cfg = yaml.safe_load((ROOT / "configs" / config).read_text())
    for section in ("interactions", "users", "items"):
        if section in cfg:
            cfg[section]["path"] = str(data / Path(cfg[section]["path"]).name)
    for key in ("oracle_users", "oracle_items"):
        cfg["evaluation"].pop(key, None)
    cfg["evaluation"]["references"] = False
    cfg["report"] = {"enabled": False}
    cfg["run"]["seed"] = seed
    cfg["training"]["progress"] = "plain"
    base = work / "base.yaml"
    base.write_text(yaml.safe_dump(cfg))
    log("accuracy: full")
    full = child("accuracy", {"config": str(base), "model": {"id_table_rows": 0}, "work": str(work), "label": "full"})
    results = [("full", {"id_table_rows": 0}, full)]
    for label, model in settings(max(full["id_rows"].values()), combines)[1:]:
        log(f"accuracy: {label} (id_table_rows {model['id_table_rows']})")
        results.append((label, model, child("accuracy", {"config": str(base), "model": model, "work": str(work),
                                                         "label": label.replace("/", "_").replace(" ", "_")})))
    head = (f"{'id tables':16s} {'cap':>6s} {'id params':>10s} {'share':>6s} {'peak GiB':>8s} "
            + " ".join(f"{c:>16s}" for c in full["recall"]) + f" {'seconds':>7s}")
    lines = [f"{config}, seed {seed}: {full['id_rows']['query'] - 1:,} query ids, "
             f"{full['id_rows']['candidate'] - 1:,} items; recall@{K}", head]
    for label, model, r in results:
        cells = " ".join(f"{v:16.4f}" if v is not None else f"{'-':>16s}" for v in r["recall"].values())
        lines.append(f"{label:16s} {_cap(model):>6} {r['id_parameters']:10,d} "
                     f"{r['id_parameters'] / full['id_parameters']:6.3f} {r['peak_rss_gb']:8.2f} {cells} "
                     f"{r['seconds']:7.0f}")
    return lines


def memory_part(work: Path, users: int, items: int, combines: list[str]) -> list[str]:
    log(f"memory: writing {users:,} customers x 2 events over {items:,} items")
    child("memory_data", {"work": str(work), "users": users, "items": items})
    log("memory: full")
    full = child("memory", {"work": str(work), "model": {"id_table_rows": 0}})
    out = [("full", {"id_table_rows": 0}, full)]
    for label, model in settings(max(full["id_rows"].values()), combines)[1:]:
        log(f"memory: {label} (id_table_rows {model['id_table_rows']})")
        out.append((label, model, child("memory", {"work": str(work), "model": model})))
    rows = full["id_rows"]
    lines = [f"memory: {users:,} customers x 2 events, {items:,} items, ids only, dim 32, hidden [64], one epoch; "
             f"{rows['query'] - 1:,} customer ids and {rows['candidate'] - 1:,} item ids in training",
             f"{'id tables':16s} {'cap':>9s} {'id params':>12s} {'share':>6s} {'peak GiB':>8s} {'seconds':>7s}"]
    for label, model, r in out:
        lines.append(f"{label:16s} {_cap(model):>9} {r['id_parameters']:12,d} "
                     f"{r['id_parameters'] / full['id_parameters']:6.3f} {r['peak_rss_gb']:8.2f} {r['seconds']:7.0f}")
    return lines


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--config", default="store_baskets.yaml", help="a demo config in configs/ (default store_baskets.yaml)")
    p.add_argument("--combine", nargs="+", default=["product"], choices=("product", "sum"))
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--memory-users", type=int, default=2_000_000)
    p.add_argument("--memory-items", type=int, default=20_000)
    p.add_argument("--skip-memory", action="store_true")
    p.add_argument("--skip-accuracy", action="store_true")
    p.add_argument("--work", help="keep the data and runs here (default: a temporary folder)")
    p.add_argument("--child", help=argparse.SUPPRESS)
    p.add_argument("--args", help=argparse.SUPPRESS)
    args = p.parse_args(argv)
    if args.child:
        print(json.dumps(CHILDREN[args.child](json.loads(args.args))))
        return 0
    started = time.perf_counter()
    with tempfile.TemporaryDirectory(prefix="towers-id-tables-") as tmp:
        work = Path(args.work) if args.work else Path(tmp)
        work.mkdir(parents=True, exist_ok=True)
        lines = []
        if not args.skip_accuracy:
            lines += accuracy_part(work, args.config, args.combine, args.seed)
        if not args.skip_memory:
            (work / "memory").mkdir(exist_ok=True)
            lines += [""] * bool(lines) + memory_part(work / "memory", args.memory_users, args.memory_items,
                                                      args.combine)
    print("\n".join(lines))
    log(f"done in {time.perf_counter() - started:.0f} s")
    return 0


if __name__ == "__main__":
    sys.exit(main())
