"""Speed benchmarks for towers: each figure is a ratio of two timings taken in the same run.

    scripts/bench            full sizes (the sizes named in each case below)
    scripts/bench --quick    smaller sizes, the same figures, under 5 minutes on 2 cores
    scripts/bench --only retrieval als       some cases only

Every case runs in its own child process (`bench.py --child CASE`), so one measurement's memory
peak never leaks into the next; the parent prints a table and writes bench.json. Absolute times on
shared machines are noise; the ratios are the point. The cases and the meaning of every key are
described in DEVELOPERS.md, "Benchmarking".
"""

from __future__ import annotations

import argparse
import contextlib
import functools
import json
import os
import platform
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

# sizes per case: (full, quick)
SIZES = {
    "id_training": ({"users": 200_000, "items": 100_000, "pairs": 2_000_000, "textbook_pairs": 61_440},
                    # quick: fewer pairs, the same tables (the textbook loop's dense Adam costs by table size)
                    {"users": 200_000, "items": 100_000, "pairs": 500_000, "textbook_pairs": 20_480}),
    "tower_flops": ({"users": 100_000, "items": 20_000, "pairs": 600_000},
                    {"users": 30_000, "items": 10_000, "pairs": 150_000}),
    # the in-batch softmax's loss and gradients alone, at three batch sizes (plus drawn columns)
    "softmax_batch": ({"batches": [1024, 4096, 8192], "extra": 512, "steps": 5},
                      {"batches": [1024, 4096], "extra": 512, "steps": 3}),
    "als": ({"users": 40_000, "items": 10_000, "ratings": 1_000_000},
            {"users": 10_000, "items": 4_000, "ratings": 200_000}),
    "retrieval": ({"queries": 20_000, "items": 200_000, "top": 100},
                  {"queries": 4_000, "items": 100_000, "top": 100}),
    "scale": ({"small": 1_000_000, "large": 10_000_000, "items": 100_000},
              {"small": 200_000, "large": 2_000_000, "items": 50_000}),
    # the log ten times larger again, written in chunks of `chunk` events (never whole in memory)
    "scale_100m": ({"base": 10_000_000, "huge": 100_000_000, "items": 100_000, "chunk": 10_000_000},
                   {"base": 1_000_000, "huge": 10_000_000, "items": 50_000, "chunk": 2_000_000}),
    "embed": ({"items": 1_000_000}, {"items": 300_000}),
    "serve": ({"events": 200_000, "items": 20_000, "requests": 2_000},
              {"events": 50_000, "items": 5_000, "requests": 400}),
    # lists for a slice of the users, timed and extrapolated to all of them (the whole run would take long)
    "lists": ({"users": 1_000_000, "items": 200_000, "slice": 20_000, "top": 10, "known": 10},
              {"users": 200_000, "items": 50_000, "slice": 5_000, "top": 10, "known": 10}),
    # full size with min_pair_count 2, the README's setting for large exports (every pair kept would hold ~100M pairs)
    "derive_pairs": ({"lines": 50_000_000, "items": 100_000, "min_pair_count": 2},
                     {"lines": 3_000_000, "items": 50_000, "min_pair_count": 1}),
    # a log trained under a memory limit it does not fit in (a memory cgroup), spilled to disk, against in memory
    "memory_limit": ({"events": 30_000_000, "users": 150_000, "items": 50_000, "chunk": 10_000_000, "test_queries": 20_000},
                     {"events": 4_000_000, "users": 20_000, "items": 20_000, "chunk": 2_000_000, "test_queries": 5_000}),
    # two machines rehearsed on this one (two torchrun invocations, one process and one thread each) and one process
    "two_nodes": ({"events": 20_000_000, "items": 20_000, "epochs": 1},
                  {"events": 200_000, "items": 5_000, "epochs": 2}),
}
CASES = tuple(SIZES)
K = 64  # k, the embedding size, in every case


# ---- measuring -------------------------------------------------------------------------------------

def peak_rss_bytes() -> int:
    """This process's peak resident memory (Linux reports ru_maxrss in KiB)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024


def status_bytes(field: str) -> int | None:
    """A memory figure (VmRSS, VmHWM) of this process from /proc, in bytes; None off Linux."""
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith(field + ":"):
                return int(line.split()[1]) * 1024
    except OSError:
        return None
    return None


def reset_peak_rss() -> bool:
    """Reset VmHWM to the current RSS (Linux >= 4.0), so a later VmHWM is the peak of what follows."""
    try:
        Path("/proc/self/clear_refs").write_text("5")
        return True
    except OSError:
        return False


def best_time(fn, repeats: int = 3) -> float:
    """Shortest wall time of several calls, in seconds (the least disturbed by other processes)."""
    best = float("inf")
    for _ in range(repeats):
        t = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t)
    return best


def log(message: str) -> None:
    print(f"[bench] {message}", file=sys.stderr, flush=True)


# ---- synthetic data ----------------------------------------------------------------------------------

def popular_items(rng, n: int, n_items: int):
    """Item rows drawn with a long tail: P(item of rank r) ~ (r + 10)^-0.8 (shop-like, no source)."""
    import numpy as np

    w = (np.arange(n_items) + 10.0) ** -0.8
    cdf = np.cumsum(w / w.sum())
    return np.minimum(np.searchsorted(cdf, rng.random(n)), n_items - 1)


def write_id_log(path: Path, n_pairs: int, n_users: int, n_items: int, seed: int) -> None:
    """An event log of integer user and item ids as parquet."""
    import numpy as np
    import pyarrow as pa
    import pyarrow.parquet as pq

    rng = np.random.default_rng(seed)
    users = rng.integers(0, n_users, n_pairs)
    items = popular_items(rng, n_pairs, n_items)
    pq.write_table(pa.table({"user": users, "item": items}), path)


def sku_text(rows):
    """Item codes such as SKU-0001234, built by arrow (no Python string per row)."""
    import pyarrow as pa
    import pyarrow.compute as pc

    digits = pc.utf8_lpad(pc.cast(pa.array(rows), pa.string()), 7, "0")
    return pc.binary_join_element_wise("SKU-", digits, "")


def write_item_table(path: Path, n_items: int, seed: int, first: int = 0) -> None:
    """An item feature table: text id, category (500 values), price, tags as 'a|b|c' text."""
    import numpy as np
    import pyarrow as pa
    import pyarrow.compute as pc
    import pyarrow.parquet as pq

    rng = np.random.default_rng(seed)
    rows = np.arange(first, first + n_items)
    tags = pa.array(np.char.add("t", rng.integers(0, 2000, n_items).astype(str)))
    more = pa.array(np.char.add("t", rng.integers(0, 2000, n_items).astype(str)))
    table = pa.table({
        "item_id": sku_text(rows),
        "category": pa.array(np.char.add("c", rng.integers(0, 500, n_items).astype(str))),
        "price": pa.array(np.round(rng.lognormal(2.5, 0.8, n_items), 2)),
        "tags": pc.binary_join_element_wise(tags, more, "|"),
    })
    pq.write_table(table, path)


def write_shop_log(path: Path, n_pairs: int, n_users: int, n_items: int, seed: int) -> None:
    """An event log with integer customer ids and text item codes, as parquet."""
    import numpy as np
    import pyarrow as pa
    import pyarrow.parquet as pq

    rng = np.random.default_rng(seed)
    users = rng.integers(0, n_users, n_pairs)
    items = sku_text(popular_items(rng, n_pairs, n_items))
    pq.write_table(pa.table({"customer": users, "sku": items}), path)


def write_shop_log_chunks(path: Path, n_pairs: int, n_users: int, n_items: int, seed: int, chunk: int,
                          times: bool = False) -> None:
    """write_shop_log's kind of log, `chunk` events at a time into one parquet file (one row group a chunk).
    times: also a `placed_at` column, each event's place in the log (the log in time order)."""
    import numpy as np
    import pyarrow as pa
    import pyarrow.parquet as pq

    rng = np.random.default_rng(seed)
    schema = [("customer", pa.int64()), ("sku", pa.string())] + ([("placed_at", pa.int64())] if times else [])
    with pq.ParquetWriter(path, pa.schema(schema)) as writer:
        for start in range(0, n_pairs, chunk):
            n = min(chunk, n_pairs - start)
            columns = {"customer": rng.integers(0, n_users, n), "sku": sku_text(popular_items(rng, n, n_items))}
            if times:
                columns["placed_at"] = np.arange(start, start + n, dtype=np.int64)
            writer.write_table(pa.table(columns), row_group_size=1 << 20)


# ---- configs -----------------------------------------------------------------------------------------

def id_config(log_path: Path, batch: int) -> dict:
    """The linear factor model (ids only, no hidden layer) under logistic loss with one negative."""
    return {
        "run": {"seed": 1},
        "interactions": {"path": str(log_path), "query_column": "user", "candidate_column": "item"},
        "model": {"dim": K, "hidden": [], "id_dropout": 0.0},
        "training": {"loss": "logistic", "negatives": 1, "negative_sampling": "uniform", "batch_size": batch,
                     "id_optimizer": "sgd", "id_learning_rate": 20.0, "epochs": 1, "progress": "plain"},
        "evaluation": {"test_fraction": 0.0, "validation_fraction": 0.0, "baseline": False},
    }


ID_BATCH = 16384
TOWER_BATCH = 4096


# ---- cases (children) ----------------------------------------------------------------------------------

def case_id_training(size: dict, work: Path) -> dict:
    """Id-only training, three ways over the same pairs: towers' Trainer, a bare SGD kernel, a textbook loop."""
    import torch

    from towers import config as C
    from towers.data.prepare import prepare
    from towers.model.build import build_model
    from towers.training.loop import Trainer

    log_path = work / "ids.parquet"
    write_id_log(log_path, size["pairs"], size["users"], size["items"], seed=3)
    cfg = C.resolve(id_config(log_path, ID_BATCH), work)
    data = prepare(cfg)
    torch.manual_seed(1)
    model = build_model(data, cfg)
    trainer = Trainer(model, data, cfg)
    n = len(data.train)

    losses = []

    def towers_epoch():
        losses.append(trainer.run_epoch(len(losses) + 1, False))

    bare = BareKernel(model, data, cfg)
    t_towers, t_bare = [], []
    for _ in range(3):  # interleaved, so both see the same machine; the best of three each
        t_towers.append(best_time(towers_epoch, 1))
        t_bare.append(best_time(bare.epoch, 1))
    towers_rate, bare_rate = n / min(t_towers), n / min(t_bare)
    log(f"id training: towers {towers_rate:,.0f} pairs/s (epoch losses {', '.join(f'{x:.4f}' for x in losses)}), "
        f"bare kernel {bare_rate:,.0f} pairs/s (losses {', '.join(f'{x:.4f}' for x in bare.losses)})")
    textbook_rate = textbook_loop(data, size["textbook_pairs"])
    log(f"id training: textbook per-sample loop {textbook_rate:,.0f} pairs/s")
    return {
        "id_training_vs_bare_kernel": towers_rate / bare_rate,
        "id_training_vs_per_sample_loop": towers_rate / textbook_rate,
        "id_training_pairs_per_s": towers_rate, "bare_kernel_pairs_per_s": bare_rate,
        "per_sample_loop_pairs_per_s": textbook_rate,
        "id_training_epoch_losses": losses, "bare_kernel_epoch_losses": bare.losses,
    }


class BareKernel:
    """Gather-dot-scatter SGD for the same objective, written by hand: no autograd, no modules.

    Per batch: gather the query, positive and negative rows and biases, compute the logistic-loss
    gradients and the spread id penalty in closed form, and scatter-add them into the tables. The
    scatter is a sparse COO add, the fastest row scatter-add torch offers on this CPU (index_add_
    and index_put_(accumulate=True) were measured slower). Works on copies of the model's tables.
    """

    def __init__(self, model, data, cfg):
        import torch

        self.U = model.query_tower.ids.weight.detach().clone()
        self.V = model.candidate_tower.ids.weight.detach().clone()
        self.bu = model.query_bias.weight.detach().clone().squeeze(1)
        self.bv = model.candidate_bias.weight.detach().clone().squeeze(1)
        self.g = 0.0
        self.q = data.queries.block["id"].index_select(0, data.train.query)
        self.c = data.candidates.block["id"].index_select(0, data.train.candidate)
        self.q_inv = 1.0 / torch.bincount(self.q, minlength=len(self.U)).clamp(min=1).float()
        self.c_inv = 1.0 / torch.bincount(self.c, minlength=len(self.V)).clamp(min=1).float()
        self.warm = torch.unique(self.c)
        self.lr, self.lam = cfg.training.id_learning_rate, cfg.training.id_l2
        self.batch = cfg.training.batch_size
        self.gen = torch.Generator().manual_seed(5)
        self.losses = []

    @staticmethod
    def scatter(table, rows, values, alpha):
        import torch

        table.add_(torch.sparse_coo_tensor(rows.unsqueeze(0), values, table.shape, check_invariants=False), alpha=alpha)

    def epoch(self) -> None:
        import torch
        import torch.nn.functional as F

        n, b_max, lam, lr = len(self.q), self.batch, self.lam, self.lr
        perm = torch.randperm(n, generator=self.gen)
        total = 0.0
        for s in range(0, n, b_max):
            idx = perm[s:s + b_max]
            b = len(idx)
            qi = self.q.index_select(0, idx)
            ci = torch.cat([self.c.index_select(0, idx),
                            self.warm.index_select(0, torch.randint(0, len(self.warm), (b,), generator=self.gen))])
            u, v = self.U.index_select(0, qi), self.V.index_select(0, ci)
            bu, bv = self.bu.index_select(0, qi), self.bv.index_select(0, ci)
            vp, vn = v[:b], v[b:]
            sp = (u * vp).sum(1) + bu + bv[:b] + self.g
            sn = (u * vn).sum(1) + bu + bv[b:] + self.g
            total += float(F.softplus(-sp).sum() + F.softplus(sn).sum())
            gp, gn = (torch.sigmoid(sp) - 1.0) / b, torch.sigmoid(sn) / b  # d(mean loss)/d score
            pq = (lam / b) * self.q_inv.index_select(0, qi)  # spread penalty, per pair
            pc = (lam / b) * self.c_inv.index_select(0, ci[:b])
            grad_u = gp.unsqueeze(1) * vp + gn.unsqueeze(1) * vn + pq.unsqueeze(1) * u
            grad_v = torch.cat([gp.unsqueeze(1) * u + pc.unsqueeze(1) * vp, gn.unsqueeze(1) * u])
            grad_bu = gp + gn + pq * bu
            grad_bv = torch.cat([gp + pc * bv[:b], gn])
            self.scatter(self.U, qi, grad_u, -lr)
            self.scatter(self.V, ci, grad_v, -lr)
            self.scatter(self.bu, qi, grad_bu, -lr)
            self.scatter(self.bv, ci, grad_bv, -lr)
            self.g -= 0.003 * float(gp.sum() + gn.sum())
        self.losses.append(total / n)


def textbook_loop(data, n_pairs: int) -> float:
    """The loop most tutorials write: a per-sample Dataset, a DataLoader, dense tables and dense Adam."""
    import random

    import torch
    import torch.nn as nn
    import torch.nn.functional as F
    from torch.utils.data import DataLoader, Dataset

    users = data.queries.block["id"].index_select(0, data.train.query).tolist()
    items = data.candidates.block["id"].index_select(0, data.train.candidate).tolist()
    n_users, n_items = len(data.queries.ids) + 1, len(data.candidates.ids) + 1

    class Pairs(Dataset):
        def __len__(self):
            return len(users)

        def __getitem__(self, i):
            return users[i], items[i], random.randrange(1, n_items)

    class Factors(nn.Module):
        def __init__(self):
            super().__init__()
            self.u, self.v = nn.Embedding(n_users, K), nn.Embedding(n_items, K)
            self.bu, self.bv = nn.Embedding(n_users, 1), nn.Embedding(n_items, 1)
            for e in (self.u, self.v):
                nn.init.normal_(e.weight, std=0.1)
            for e in (self.bu, self.bv):
                nn.init.zeros_(e.weight)

        def forward(self, u, i):
            return (self.u(u) * self.v(i)).sum(1) + self.bu(u).squeeze(1) + self.bv(i).squeeze(1)

    random.seed(0)
    torch.manual_seed(0)
    model = Factors()
    opt = torch.optim.Adam(model.parameters(), lr=0.01)
    loader = DataLoader(Pairs(), batch_size=1024, shuffle=True)
    steps = n_pairs // 1024
    done, start = 0, None
    for step, (u, i, j) in enumerate(loader):
        if step == 2:  # the first steps allocate Adam's state: not timed
            start, done = time.perf_counter(), 0
        pos, neg = model(u, i), model(u, j)
        loss = F.binary_cross_entropy_with_logits(torch.cat([pos, neg]), torch.cat([torch.ones_like(pos), torch.zeros_like(neg)]))
        loss = loss + 0.1 * (model.u(u).pow(2).sum(1) + model.v(i).pow(2).sum(1)).mean() / 100
        opt.zero_grad()
        loss.backward()
        opt.step()
        done += len(u)
        if step >= steps + 1:
            break
    return done / (time.perf_counter() - start)


def tower_flops_per_pair(model, n_neg: int) -> tuple[int, int]:
    """Matrix-product FLOPs per training pair in the two towers' Linear layers: (forward, training step).

    A Linear layer costs 2*in*out per row forward, and as much again for each of the two backward
    products (gradient of the input, gradient of the weight): 6*in*out per row per step. Elementwise
    work (activations, embedding lookups, the loss) is not counted.
    """
    import torch.nn as nn

    def per_row(tower):
        return sum(2 * m.in_features * m.out_features for m in tower.modules() if isinstance(m, nn.Linear))

    forward = per_row(model.query_tower) + (1 + n_neg) * per_row(model.candidate_tower)
    return forward, 3 * forward


def matmul_peak_flops() -> float:
    """FLOP/s of torch.mm on 2048 x 2048 float32 matrices (best of 10)."""
    import torch

    a, b = torch.randn(2048, 2048), torch.randn(2048, 2048)
    out = torch.empty(2048, 2048)
    torch.mm(a, b, out=out)
    return 2 * 2048 ** 3 / best_time(lambda: torch.mm(a, b, out=out), 10)


def case_softmax_batch(size: dict, work: Path) -> dict:
    """The in-batch softmax's loss and gradients (vectors of k = K, a bias and log q per column, batch + extra
    columns), blocked (what training runs) against the dense form under autograd: pairs a second at each batch
    size. The dense form's (B, C) matrices outgrow the allocator's reused blocks at large batches."""
    import torch

    from towers.model import losses

    torch.manual_seed(0)
    out = {}

    def repeated(fn, args: tuple, n: int) -> None:
        for _ in range(n):
            fn(*args)

    def dense(q, c, bias, ids, log_q):
        logits = q @ c.T * 0.5 + bias.unsqueeze(0)
        losses.in_batch_softmax_loss(logits, ids, log_q).mean().backward()

    def blocked(q, c, bias, ids, log_q):
        losses.blocked_in_batch_softmax_loss(q, c, bias, ids, 0.5, log_q).mean().backward()

    for b in size["batches"]:
        cols = b + size["extra"]
        args = (torch.randn(b, K, requires_grad=True), torch.randn(cols, K, requires_grad=True),
                torch.randn(cols, requires_grad=True), torch.randint(0, 50_000, (cols,)), torch.randn(cols))
        for name, fn in (("dense", dense), ("blocked", blocked)):
            fn(*args)  # warm-up
            steps = functools.partial(repeated, fn, args, size["steps"])
            out[f"softmax_{name}_pairs_per_s_{b}"] = b / (best_time(steps, 3) / size["steps"])
        out[f"softmax_blocked_vs_dense_{b}"] = out[f"softmax_blocked_pairs_per_s_{b}"] / out[f"softmax_dense_pairs_per_s_{b}"]
        log(f"softmax_batch {b}: blocked {out[f'softmax_blocked_pairs_per_s_{b}']:,.0f} pairs/s, dense "
            f"{out[f'softmax_dense_pairs_per_s_{b}']:,.0f}")
    return out


def case_tower_flops(size: dict, work: Path) -> dict:
    """MLP towers [256, 256] -> 64 with id, categorical, numeric and token inputs, batch 4096."""
    import numpy as np
    import pyarrow as pa
    import pyarrow.parquet as pq
    import torch

    from towers import config as C
    from towers.data.prepare import prepare
    from towers.model.build import build_model
    from towers.training.loop import Trainer

    rng = np.random.default_rng(4)
    n_users = size["users"]
    pq.write_table(pa.table({"customer": np.arange(n_users),
                             "region": np.char.add("r", rng.integers(0, 40, n_users).astype(str)),
                             "age": rng.integers(18, 90, n_users).astype(float)}), work / "users.parquet")
    write_item_table(work / "items.parquet", size["items"], seed=5)
    write_shop_log(work / "log.parquet", size["pairs"], n_users, size["items"], seed=6)
    raw = {
        "run": {"seed": 1},
        "interactions": {"path": str(work / "log.parquet"), "query_column": "customer", "candidate_column": "sku"},
        "users": {"path": str(work / "users.parquet"), "id_column": "customer",
                  "features": [{"name": "region", "kind": "categorical"}, {"name": "age", "kind": "numeric"}]},
        "items": {"path": str(work / "items.parquet"), "id_column": "item_id",
                  "features": [{"name": "category", "kind": "categorical"}, {"name": "price", "kind": "numeric"},
                               {"name": "tags", "kind": "tokens"}]},
        "model": {"dim": K, "hidden": [256, 256]},
        "training": {"loss": "logistic", "negatives": 1, "batch_size": TOWER_BATCH, "epochs": 1, "progress": "plain"},
        "evaluation": {"test_fraction": 0.0, "validation_fraction": 0.0, "baseline": False},
    }
    cfg = C.resolve(raw, work)
    data = prepare(cfg)
    torch.manual_seed(1)
    model = build_model(data, cfg)
    trainer = Trainer(model, data, cfg)
    n = len(data.train)
    _, step_flops = tower_flops_per_pair(model, cfg.training.sampled_negatives)
    peak = matmul_peak_flops()
    epochs = []
    seconds = best_time(lambda: epochs.append(trainer.run_epoch(len(epochs) + 1, False)), 2)
    achieved = n * step_flops / seconds
    peak = max(peak, matmul_peak_flops())  # measured before and after, the better one kept
    log(f"towers: {n / seconds:,.0f} pairs/s, {achieved / 1e9:.1f} GFLOP/s in Linear layers; "
        f"torch.mm 2048^2 {peak / 1e9:.1f} GFLOP/s")
    return {"tower_flops_vs_matmul_peak": achieved / peak, "tower_gflops": achieved / 1e9,
            "matmul_2048_gflops": peak / 1e9, "tower_pairs_per_s": n / seconds}


def case_als(size: dict, work: Path) -> dict:
    """One ALS sweep of towers.als against solving every row's normal equations with its own Cholesky."""
    import numpy as np
    import torch

    from towers.config import SCHEMA
    from towers.training import als

    rng = np.random.default_rng(7)
    nu, ni, n = size["users"], size["items"], size["ratings"]
    pu, pi = rng.normal(0, 0.6, (nu, 8)), rng.normal(0, 0.6, (ni, 8))
    u = rng.integers(0, nu, n)
    i = popular_items(rng, n, ni)
    y = np.clip(np.round(3.5 + (pu[u] * pi[i]).sum(1) + rng.normal(0, 0.8, n)), 1, 5)
    # id rows: row 0 is the unknown id, so catalog row r is id row r + 1
    cells = als.Cells.build(torch.from_numpy(u + 1), torch.from_numpy(i + 1), torch.from_numpy(y).float(), None,
                            nu + 1, ni + 1)
    lam = SCHEMA["training"]["id_l2"].default
    cg_steps = SCHEMA["evaluation"]["baseline_row_steps"].default
    g = torch.Generator().manual_seed(8)

    def start() -> als.Factors:
        q, c = torch.randn(nu + 1, K, generator=g) * 0.1, torch.randn(ni + 1, K, generator=g) * 0.1
        q[0], c[0] = 0, 0
        return als.Factors(q, c, torch.zeros(nu + 1), torch.zeros(ni + 1), float(y.mean()))

    f0 = start()
    fast = als.Factors(f0.query.clone(), f0.candidate.clone(), f0.query_bias.clone(), f0.candidate_bias.clone(),
                       f0.global_bias)
    warm = start()
    als.als_sweep(warm, cells, lam, cg_steps)  # first call: lazy set-up inside torch, not timed
    t = time.perf_counter()
    als.als_sweep(fast, cells, lam, cg_steps)
    t_fast = time.perf_counter() - t
    exact = als.Factors(f0.query.clone(), f0.candidate.clone(), f0.query_bias.clone(), f0.candidate_bias.clone(),
                        f0.global_bias)
    als.als_sweep(exact, cells, lam, 0)  # towers' batched Cholesky: the reference's answer, for the check
    ref = PerRowCholesky(cells, f0, lam)
    t = time.perf_counter()
    ref.sweep()
    t_ref = time.perf_counter() - t
    diff = float(np.abs(ref.query[:, :K] - exact.query.double().numpy()).max())
    objective = {name: als.objective(fac, cells, lam) / n for name, fac in
                 (("start", f0), ("cg", fast), ("exact", exact))}
    log(f"ALS sweep ({cg_steps} CG steps) {t_fast:.2f} s; per-row Cholesky reference {t_ref:.2f} s; "
        f"objective per rating: start {objective['start']:.4f}, CG sweep {objective['cg']:.4f}, "
        f"exact sweep {objective['exact']:.4f}; reference vs towers' exact solve: max |diff| {diff:.2e}")
    return {"als_vs_per_row_cholesky": t_ref / t_fast, "als_sweep_s": t_fast, "per_row_cholesky_sweep_s": t_ref,
            "als_cg_steps": cg_steps, "als_objective_after_cg_sweep": objective["cg"],
            "als_objective_after_exact_sweep": objective["exact"], "als_reference_max_abs_diff": diff}


class PerRowCholesky:
    """The textbook ALS sweep: for each row, gather its cells, build (F^T W F + lambda I), Cholesky, solve.

    The same objective as towers.als (bias appended to the vector, the other side's bias and the
    global bias as an offset, the global bias re-fitted after each half), in float64 numpy/scipy.
    """

    def __init__(self, cells, f, lam: float):
        import numpy as np

        self.lam = lam
        self.query = np.concatenate([f.query.double().numpy(), f.query_bias.double().numpy()[:, None]], 1)
        self.cand = np.concatenate([f.candidate.double().numpy(), f.candidate_bias.double().numpy()[:, None]], 1)
        self.g = f.global_bias
        self.rows, self.cols = cells.rows.numpy(), cells.cols.numpy()
        self.w, self.y = cells.weight.double().numpy(), cells.target.double().numpy()

    def half(self, mine, other, my_rows, other_rows) -> None:
        import numpy as np
        from scipy.linalg import cho_factor, cho_solve

        order = np.argsort(my_rows, kind="stable")
        r_sorted, o_sorted = my_rows[order], other_rows[order]
        w, y = self.w[order], self.y[order]
        bounds = np.flatnonzero(np.diff(r_sorted)) + 1
        starts = np.concatenate([[0], bounds])
        ends = np.concatenate([bounds, [len(r_sorted)]])
        d = mine.shape[1]
        eye = self.lam * np.eye(d)
        for a, b in zip(starts, ends):
            o = o_sorted[a:b]
            F = np.concatenate([other[o, :-1], np.ones((b - a, 1))], 1)
            target = y[a:b] - other[o, -1] - self.g
            A = F.T @ (w[a:b, None] * F) + eye
            mine[r_sorted[a]] = cho_solve(cho_factor(A), F.T @ (w[a:b] * target))

    def refit_global(self) -> None:
        import numpy as np

        s0 = (self.query[self.rows, :-1] * self.cand[self.cols, :-1]).sum(1) + self.query[self.rows, -1] + \
            self.cand[self.cols, -1]
        self.g = float(np.sum(self.w * (self.y - s0)) / np.sum(self.w))

    def sweep(self) -> None:
        self.half(self.query, self.cand, self.rows, self.cols)
        self.refit_global()
        self.half(self.cand, self.query, self.cols, self.rows)
        self.refit_global()


def case_retrieval(size: dict, work: Path) -> dict:
    """Blocked exact top-N (towers.retrieval.top_n) against the same blocked products without selection."""
    import numpy as np
    import torch

    from towers.search import kernels as SK
    from towers.search import retrieval as R
    from towers.search import screen as S
    from towers.search import tiles as T

    g = torch.Generator().manual_seed(9)
    nq, ni, top = size["queries"], size["items"], size["top"]
    # vectors with a shared direction and varied norms, as trained embeddings have (not plain noise)
    common = torch.randn(K, generator=g)
    q = torch.randn(nq, K, generator=g) + 0.3 * common
    items = (torch.randn(ni, K, generator=g) + 0.3 * common) * torch.rand(ni, 1, generator=g).add(0.5)
    bias = torch.randn(ni, generator=g) * 0.5
    ex_r = torch.arange(nq).repeat_interleave(20)  # 20 known items per query, excluded as recommend does
    ex_c = torch.randint(0, ni, (nq * 20,), generator=g)

    layout = T.Layout(items, bias)
    rows = layout.rows_per_block(nq, 1, R.CANDIDATES * top + SK.SPAN)

    def bare():
        """The same products as top_n in the same chunk order, with no selection: blocks of rows as a
        single-worker search cuts them, each product on all of torch's threads (top_n with enough
        queries runs one product per core on each of its workers instead)."""
        scores = torch.empty(layout.sub_tiles, rows, layout.sub_width)
        for lo in range(0, nq, rows):
            qb = q[lo:lo + rows]
            for step, starts in enumerate(layout.steps):
                for t, a in enumerate(starts):
                    chunk, chunk_bias = layout.tile(a)
                    T.score_tile(qb, chunk, chunk_bias, scores[t if step == 0 else 0, :len(qb)])

    result = {}

    def search():
        result["top"] = R.top_n(q, items, top, bias, ex_r, ex_c)

    def search_float32():
        """The same search with the bfloat16 screen off: float32 products throughout."""
        mode, S.MODE = S.MODE, "never"
        try:
            result["top32"] = R.top_n(q, items, top, bias, ex_r, ex_c)
        finally:
            S.MODE = mode

    bare()  # warm-up: first touch of the buffers
    R.top_n(q[:8], items[:5000], top)  # loads (or compiles) the selection kernels before memory is measured
    screened = S.wanted(nq, ni)  # also measures, once, whether bfloat16 products are fast here
    buffers_mb = R.buffer_bytes(layout, nq, top, screened) / 2 ** 20
    rss_before = status_bytes("VmRSS")
    peak_ok = reset_peak_rss()
    t_search = [best_time(search, 1)]
    extra = (status_bytes("VmHWM") - rss_before) if peak_ok and rss_before else None
    t_bare, t_32 = [best_time(bare, 1)], [best_time(search_float32, 1)]
    for _ in range(2):  # interleaved, so all three see the same machine; the best of three each
        t_search.append(best_time(search, 1))
        t_bare.append(best_time(bare, 1))
        t_32.append(best_time(search_float32, 1))
    # spot check against brute force on 64 queries (the tests check exclusions and ties in detail)
    pick = torch.randperm(nq, generator=g)[:64]
    full = (q[pick].double() @ items.double().T + bias.double()).numpy()
    local = np.full(nq, -1)
    local[pick.numpy()] = np.arange(len(pick))
    mine = local[ex_r.numpy()] >= 0
    full[local[ex_r.numpy()[mine]], ex_c.numpy()[mine]] = -np.inf
    expect = -np.sort(-full, axis=1)[:, :top]
    max_err = max(float(np.abs(result[key][1][pick].double().numpy() - expect).max()) for key in ("top", "top32"))
    flops = 2.0 * nq * ni * K
    log(f"retrieval: top-{top} {min(t_search):.2f} s (bfloat16 screen {'on' if screened else 'off'}), "
        f"float32 throughout {min(t_32):.2f} s, bare blocked products {min(t_bare):.2f} s "
        f"({flops / min(t_bare) / 1e9:.1f} GFLOP/s); extra peak memory "
        f"{'n/a' if extra is None else f'{extra / 2**20:.0f} MiB'}; max |score - brute force| {max_err:.1e}")
    return {"retrieval_vs_bare_matmul": min(t_bare) / min(t_search), "retrieval_s": min(t_search),
            "retrieval_bf16_screen": screened,
            "retrieval_float32_vs_bare_matmul": min(t_bare) / min(t_32), "retrieval_float32_s": min(t_32),
            "bare_matmul_s": min(t_bare), "retrieval_peak_extra_mb": None if extra is None else extra / 2 ** 20,
            "retrieval_buffers_mb": buffers_mb, "full_score_matrix_mb": nq * ni * 4 / 2 ** 20,
            "retrieval_max_abs_error": max_err}


def scale_config(work: Path, tag: str) -> dict:
    return {
        "run": {"seed": 1},
        "interactions": {"path": str(work / f"log_{tag}.parquet"), "query_column": "customer", "candidate_column": "sku"},
        "items": {"path": str(work / "items.parquet"), "id_column": "item_id",
                  "features": [{"name": "category", "kind": "categorical"}, {"name": "price", "kind": "numeric"},
                               {"name": "tags", "kind": "tokens", "token_limit": 4}]},  # 2 tags per item here
        "model": {"dim": 32, "hidden": [64]},
        "training": {"loss": "logistic", "negatives": 1, "batch_size": 8192, "id_optimizer": "sgd",
                     "id_learning_rate": 5.0, "epochs": 1, "progress": "plain"},
        "evaluation": {"baseline": False},
    }


def case_scale_data(size: dict, work: Path) -> dict:
    """Writes the item table and both logs (users grow with the log: 20 events per customer)."""
    write_item_table(work / "items.parquet", size["items"], seed=10)
    for tag in ("small", "large"):
        write_shop_log(work / f"log_{tag}.parquet", size[tag], size[tag] // 20, size["items"], seed=11)
    return {}


def case_scale_100m_data(size: dict, work: Path) -> dict:
    """The item table and both logs in chunks (users grow with the log: 20 events per customer)."""
    write_item_table(work / "items.parquet", size["items"], seed=10)
    for tag in ("base", "huge"):
        write_shop_log_chunks(work / f"log_{tag}.parquet", size[tag], size[tag] // 20, size["items"], seed=11,
                              chunk=size["chunk"])
    return {}


def case_scale_run(size: dict, work: Path, tag: str) -> dict:
    """Load from parquet, match ids, split, fit encoders, encode, one training epoch; time and peak memory."""
    import torch

    from towers import config as C
    from towers.data.prepare import prepare
    from towers.model.build import build_model
    from towers.training.loop import Trainer

    t = time.perf_counter()
    cfg = C.resolve(scale_config(work, tag), work)
    data = prepare(cfg)
    t_prepare = time.perf_counter() - t
    torch.manual_seed(1)
    trainer = Trainer(build_model(data, cfg), data, cfg)
    t_epoch = time.perf_counter()
    trainer.run_epoch(1, False)
    total, t_epoch = time.perf_counter() - t, time.perf_counter() - t_epoch
    log(f"scale {size[tag]:,} events: prepare {t_prepare:.1f} s, epoch {t_epoch:.1f} s, total {total:.1f} s, "
        f"peak RSS {peak_rss_bytes() / 2**30:.2f} GiB")
    return {"seconds": total, "prepare_s": t_prepare, "epoch_s": t_epoch, "peak_rss_gb": peak_rss_bytes() / 2 ** 30}


def case_embed_setup(size: dict, work: Path) -> dict:
    """A small trained run with item features, and a table of unseen items to embed."""
    import yaml

    from towers.runs.train import train_run

    write_item_table(work / "items.parquet", 5_000, seed=12)
    write_shop_log(work / "log.parquet", 50_000, 2_000, 5_000, seed=13)
    cfg = scale_config(work, "x")
    cfg["interactions"]["path"] = str(work / "log.parquet")
    cfg["model"] = {"dim": K, "hidden": [256, 256]}
    (work / "embed.yaml").write_text(yaml.safe_dump(cfg))
    train_run(work / "embed.yaml", work / "run", overwrite=True)
    write_item_table(work / "unseen.parquet", size["items"], seed=14, first=10_000_000)
    return {}


def case_embed_run(size: dict, work: Path) -> dict:
    """`towers embed RUN --items unseen.parquet`: time and peak memory of the whole command."""
    from towers.cli import main

    t = time.perf_counter()
    code = main(["embed", str(work / "run"), "--items", str(work / "unseen.parquet"),
                 "--out", str(work / "unseen_vectors.parquet")])
    seconds = time.perf_counter() - t
    if code:
        raise SystemExit(f"towers embed failed with exit code {code}")
    log(f"embed {size['items']:,} unseen items: {seconds:.1f} s, peak RSS {peak_rss_bytes() / 2**30:.2f} GiB")
    return {"seconds": seconds, "peak_rss_gb": peak_rss_bytes() / 2 ** 30}


SERVE_CLIENTS = (1, 8, 32)


def case_serve_setup(size: dict, work: Path) -> dict:
    """A small trained run (20 events per customer) for `towers serve`."""
    import yaml

    from towers.runs.train import train_run

    write_item_table(work / "items.parquet", size["items"], seed=15)
    write_shop_log(work / "log.parquet", size["events"], size["events"] // 20, size["items"], seed=16)
    cfg = scale_config(work, "x")
    cfg["interactions"]["path"] = str(work / "log.parquet")
    cfg["evaluation"]["references"] = False  # the run's lists are what is timed, not its evaluation
    cfg["report"] = {"enabled": False}
    (work / "serve.yaml").write_text(yaml.safe_dump(cfg))
    train_run(work / "serve.yaml", work / "run", overwrite=True)
    return {}


def ask_server(host: str, port: int, shares: list[list[int]]) -> tuple[list[float], float]:
    """Each share's users asked for top-20 lists by its own thread on one keep-alive connection; (latencies, wall)."""
    import http.client
    import threading

    times: list[float] = []
    lock = threading.Lock()

    def client(mine: list[int]) -> None:
        conn = http.client.HTTPConnection(host, port, timeout=120)
        mine_times = []
        for user in mine:
            body = json.dumps({"users": [user], "top": 20})
            t = time.perf_counter()
            conn.request("POST", "/recommend", body, {"Content-Type": "application/json"})
            response = conn.getresponse()
            response.read()
            mine_times.append(time.perf_counter() - t)
            if response.status != 200:
                raise SystemExit(f"towers serve answered {response.status}")
        conn.close()
        with lock:
            times.extend(mine_times)

    threads = [threading.Thread(target=client, args=(mine,)) for mine in shares]
    t = time.perf_counter()
    for th in threads:
        th.start()
    for th in threads:
        th.join()
    return times, time.perf_counter() - t


def case_serve_run(size: dict, work: Path) -> dict:
    """`towers serve` in its own process, asked for top-20 lists of random users by 1, 8 and 32 clients at once
    (threads, each on its own keep-alive http.client connection); the same requests through Run.recommend in
    this process, one at a time on one torch thread (as each server worker runs), for the ratio."""
    import re
    import signal

    import numpy as np
    import torch

    import towers

    torch.set_num_threads(1)  # as each of the server's worker threads runs it
    run = towers.load(work / "run")
    users = run.embeddings("user")[0]
    rng = np.random.default_rng(17)
    asked = [int(u) for u in rng.choice(users, size["requests"])]
    library = []
    for user in asked[:200]:
        t = time.perf_counter()
        run.recommend([user], 20)
        library.append(time.perf_counter() - t)

    log_path = work / "serve.log"
    with open(log_path, "wb") as out:
        server = subprocess.Popen([sys.executable, "-m", "towers", "serve", str(work / "run"), "--port", "0"],
                                  stdout=out, stderr=subprocess.STDOUT, cwd=ROOT)
    try:
        found = None
        for _ in range(1200):
            found = re.search(r"http://([\d.]+):(\d+) with (\d+) worker", log_path.read_text())
            if found or server.poll() is not None:
                break
            time.sleep(0.1)
        if not found:
            raise SystemExit(f"towers serve did not start: {log_path.read_text()}")
        host, port = found.group(1), int(found.group(2))
        result = {"serve_threads": int(found.group(3)),
                  "serve_library_p50_ms": 1000 * float(np.median(library))}
        for clients in SERVE_CLIENTS:
            times, wall = ask_server(host, port, [asked[i::clients] for i in range(clients)])
            result[f"serve_p50_ms_{clients}"] = 1000 * float(np.percentile(times, 50))
            result[f"serve_p99_ms_{clients}"] = 1000 * float(np.percentile(times, 99))
            result[f"serve_rps_{clients}"] = len(times) / wall
            log(f"serve, {clients} clients: p50 {result[f'serve_p50_ms_{clients}']:.1f} ms, "
                f"p99 {result[f'serve_p99_ms_{clients}']:.1f} ms, {result[f'serve_rps_{clients}']:.0f} requests/s")
    finally:
        server.send_signal(signal.SIGINT)
        server.wait(timeout=60)
    return result


def case_lists(size: dict, work: Path) -> dict:
    """The nightly batch (runs/lists.write_lists: stock filter, one item column, known pairs excluded, parquet
    out) on random vectors, for a slice of the users, against the plain top-N of the same slice."""
    import numpy as np
    import pyarrow as pa
    import torch

    from towers.runs import lists as L
    from towers.search import retrieval as R
    from towers.search.scorer import Scorer

    g = torch.Generator().manual_seed(21)
    nu, ni, top, part = size["users"], size["items"], size["top"], size["slice"]
    common = torch.randn(K, generator=g)
    users = torch.randn(nu, K, generator=g) + 0.3 * common
    items = (torch.randn(ni, K, generator=g) + 0.3 * common) * torch.rand(ni, 1, generator=g).add(0.5)
    bias = torch.randn(ni, generator=g) * 0.5
    scorer = Scorer(users, items, None, bias)
    known = L.known_by_query(torch.arange(nu).repeat_interleave(size["known"]),
                             torch.randint(0, ni, (nu * size["known"],), generator=g), nu)
    rng = np.random.default_rng(21)
    in_stock = rng.random(ni) < 0.8  # a fifth of the shelf out of stock tonight
    item_ids = np.asarray([f"SKU-{i:07d}" for i in range(ni)], dtype=object)
    lists = L.Lists(item_ids, torch.from_numpy(np.flatnonzero(in_stock)), {"price": pa.array(rng.uniform(1, 90, ni))})
    user_ids = np.arange(10_000_000, 10_000_000 + nu, dtype=np.int64)
    rows = torch.arange(part)
    # warm-up: loads the selection kernels and measures, once, whether bfloat16 products are fast here
    L.write_lists(work / "warm.parquet", scorer, lists, user_ids, torch.arange(L.BATCH_USERS), top, known, False, "plain")
    ex_r, ex_c = L.block_exclusions(rows, *known)
    written = []
    rss_before = status_bytes("VmRSS")
    peak_ok = reset_peak_rss()

    def batch():
        written.append(L.write_lists(work / "lists.parquet", scorer, lists, user_ids, rows, top, known, False, "plain"))

    t_lists = [best_time(batch, 1)]
    peak = status_bytes("VmHWM") if peak_ok else peak_rss_bytes()
    t_plain = [best_time(lambda: R.top_n(users[:part], items, top, bias, ex_r, ex_c), 1)]
    t_lists.append(best_time(batch, 1))  # interleaved: both see the same machine; the best of two each
    t_plain.append(best_time(lambda: R.top_n(users[:part], items, top, bias, ex_r, ex_c), 1))
    t_lists, t_plain, written = min(t_lists), min(t_plain), written[-1]
    rate = part / t_lists
    log(f"lists: {part:,} of {nu:,} users x {ni:,} items, top {top}: {t_lists:.1f} s ({rate:,.0f} users/s, {written:,} "
        f"rows); plain top-N of the same users {t_plain:.1f} s; EXTRAPOLATED to all {nu:,} users: "
        f"{nu / rate / 60:.1f} min; peak RSS {peak / 2**30:.2f} GiB (vectors and known pairs of all users held, "
        f"{(rss_before or 0) / 2**30:.2f} GiB before listing)")
    return {"lists_vs_top_n": t_plain / t_lists, "lists_users_per_s": rate, "lists_peak_rss_gb": peak / 2 ** 30,
            "lists_all_users_extrapolated_s": nu / rate, "lists_slice_users": part, "lists_top_n_s": t_plain}
def case_derive_data(size: dict, work: Path) -> dict:
    """An order export as CSV, written in chunks of 1M lines: orders of 1 to 8 lines, long-tailed items, and one
    order in 20,000 with 300 lines (above the default group_item_cap of 50)."""
    import numpy as np
    import pyarrow as pa
    import pyarrow.csv as pacsv

    rng = np.random.default_rng(15)
    written, order = 0, 0
    with pacsv.CSVWriter(work / "orders.csv", pa.schema([("order_id", pa.int64()), ("product_id", pa.string()),
                                                         ("quantity", pa.int64()), ("ordered_at", pa.timestamp("s"))])) as out:
        while written < size["lines"]:
            n = min(1_000_000, size["lines"] - written)
            lengths = np.where(rng.random(n) < 1 / 20_000, 300, rng.integers(1, 9, n))
            cum = np.cumsum(lengths)
            last = int(np.searchsorted(cum, n))  # the orders filling exactly n lines, the last one cut short
            lengths = lengths[:last + 1]
            lengths[-1] -= cum[last] - n
            lines = n
            orders = np.repeat(np.arange(order, order + len(lengths)), lengths)
            start = np.datetime64("2026-01-01T00:00:00", "s")
            out.write_table(pa.table({
                "order_id": orders, "product_id": sku_text(popular_items(rng, lines, size["items"])),
                "quantity": rng.geometric(0.7, lines),
                "ordered_at": pa.array(start + (orders * 7).astype("timedelta64[s]"), pa.timestamp("s"))}))
            written, order = written + lines, order + len(lengths)
    return {"lines": written, "orders": order}


def case_derive_run(size: dict, work: Path) -> dict:
    """Pairs from baskets with a time split (towers/data/baskets.py) against one DuckDB pass over the same file."""
    import duckdb

    from towers import config as C
    from towers.data.baskets import derive_pairs

    cfg = C.resolve({"run": {"mode": "item_item", "threads": 2},
                     "interactions": {"path": str(work / "orders.csv"), "pairs_from": "baskets", "group_column": "order_id",
                                      "candidate_column": "product_id", "time_column": "ordered_at",
                                      "quantity_column": "quantity", "min_pair_count": size.get("min_pair_count", 1)},
                     "evaluation": {"split": "time"}, "training": {"progress": "plain"}}, work)
    t = time.perf_counter()
    con = duckdb.connect(config={"threads": 2, "memory_limit": "2GB"})
    con.execute(f"SELECT count(*) FROM (SELECT order_id, count(*) FROM read_csv('{work / 'orders.csv'}') GROUP BY ALL)"
                ).fetchall()
    con.close()
    scan = time.perf_counter() - t
    t = time.perf_counter()
    pairs = derive_pairs(cfg, split=True)
    seconds = time.perf_counter() - t
    lines = size["lines"]
    log(f"pairs from {lines:,} order lines: {seconds:.1f} s ({lines / seconds:,.0f} lines/s), one scan {scan:.1f} s, "
        f"{len(pairs.weight):,} pairs, peak RSS {peak_rss_bytes() / 2**30:.2f} GiB")
    return {"seconds": seconds, "scan_s": scan, "pairs": len(pairs.weight), "peak_rss_gb": peak_rss_bytes() / 2 ** 30}


# ---- two machines rehearsed on one ---------------------------------------------------------------------

def case_two_nodes_data(size: dict, work: Path) -> dict:
    """The item table, a shop log (20 events a customer, in time order) and scale_config's towers on one thread a
    process, validated every epoch (training.validate_queries, 2,000 queries), without the reference models or the
    report. Each customer's latest events are held out (user_recent), a split that is the same in one process and
    two, as is the validation sample, so the two runs' metrics differ only by training."""
    import yaml

    write_item_table(work / "items.parquet", size["items"], seed=17)
    write_shop_log_chunks(work / "log_two_nodes.parquet", size["events"], size["events"] // 20, size["items"], seed=18,
                          chunk=min(size["events"], 10_000_000), times=True)
    cfg = scale_config(work, "two_nodes")
    cfg["interactions"]["time_column"] = "placed_at"
    cfg["evaluation"]["split"] = "user_recent"
    cfg["run"]["threads"] = 1
    cfg["training"]["epochs"] = size["epochs"]
    cfg["evaluation"]["references"] = False
    cfg["report"] = {"enabled": False}
    (work / "two_nodes.yaml").write_text(yaml.safe_dump(cfg))
    return {}


def towers_env() -> dict:
    """This process's environment with the checkout first on PYTHONPATH, for `python -m towers` children."""
    return dict(os.environ, PYTHONPATH=os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")]))


def timed_command(argv: list[str]) -> dict:
    """Run `towers` (or torchrun around it) to its end: wall seconds, exit code and the peak resident memory of
    its largest process (ru_maxrss of waited-for children: the training process, larger than torchrun's agent)."""
    env = dict(towers_env(), OMP_NUM_THREADS="1")
    t = time.perf_counter()
    code = subprocess.run(argv, env=env, cwd=ROOT, stdout=subprocess.DEVNULL).returncode  # the training log stays on stderr
    seconds = time.perf_counter() - t
    return {"seconds": seconds, "code": code,
            "peak_rss_gb": resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss * 1024 / 2 ** 30}


def memory_cgroup(limit_bytes: int | None) -> Path | None:
    """A fresh memory cgroup (v2, or v1's memory controller) under this process's own, with a limit; None
    where none can be made (not root, no writable cgroup file system). Swap is not counted: none is set up here."""
    import uuid

    own = Path("/proc/self/cgroup").read_text().splitlines() if Path("/proc/self/cgroup").exists() else []
    for line in own:
        _, controllers, rel = line.split(":", 2)
        if controllers == "" and Path("/sys/fs/cgroup/cgroup.controllers").exists():
            base, limit_file = Path("/sys/fs/cgroup") / rel.lstrip("/"), "memory.max"
        elif "memory" in controllers.split(","):
            base, limit_file = Path("/sys/fs/cgroup/memory") / rel.lstrip("/"), "memory.limit_in_bytes"
        else:
            continue
        group = base / f"towers-bench-{uuid.uuid4().hex[:8]}"
        try:
            group.mkdir()
            if limit_bytes is not None:
                (group / limit_file).write_text(str(limit_bytes))
            return group
        except OSError:
            with contextlib.suppress(OSError):
                group.rmdir()
    return None


def anonymous_bytes(group: Path) -> int:
    """The cgroup's anonymous memory now (what no eviction can take back; file pages are reclaimable)."""
    stat = dict(line.split() for line in (group / "memory.stat").read_text().splitlines())
    return int(stat.get("anon", stat.get("rss", 0)))


def run_in_cgroup(argv: list[str], limit_bytes: int | None) -> dict:
    """argv in a fresh memory cgroup with the limit: exit code, wall seconds, peak anonymous memory (sampled
    every 20 ms) and whether the kernel's memory limit killed it."""
    import threading

    group = memory_cgroup(limit_bytes)
    if group is None:
        return {"skipped": "no writable memory cgroup (needs root and a cgroup file system)"}
    env = towers_env()
    peak, done = [0], threading.Event()

    def watch():
        while not done.is_set():
            with contextlib.suppress(OSError, ValueError):
                peak[0] = max(peak[0], anonymous_bytes(group))
            time.sleep(0.02)

    t = time.perf_counter()
    proc = subprocess.Popen(argv, env=env, cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True,
                            preexec_fn=lambda: (group / "cgroup.procs").write_text(str(os.getpid())))
    watcher = threading.Thread(target=watch, daemon=True)
    watcher.start()
    _, err = proc.communicate()
    done.set()
    watcher.join()
    seconds = time.perf_counter() - t
    for _ in range(50):  # the group empties a moment after its last process ends
        try:
            group.rmdir()
            break
        except OSError:
            time.sleep(0.1)
    return {"code": proc.returncode, "seconds": seconds, "peak_anon_gb": peak[0] / 2 ** 30,
            "killed": proc.returncode in (-9, 137), "last_line": (err.strip().splitlines() or [""])[-1][:200]}


def case_memory_limit(size: dict, work: Path) -> dict:
    """Four `towers train` runs of one log, all in the windowed epoch order: in memory and spilled, each without
    a limit and then under one halfway between their peaks of anonymous memory. The spilled run under the
    limit must end with the metrics of both runs without it; the in-memory run under it is expected to be killed."""
    import yaml

    write_item_table(work / "limit_items.parquet", size["items"], seed=10)
    write_shop_log_chunks(work / "limit_log.parquet", size["events"], size["users"], size["items"], seed=12,
                          chunk=size["chunk"])
    (work / "spill").mkdir(exist_ok=True)
    cfg = scale_config(work, "x")
    cfg["interactions"]["path"] = str(work / "limit_log.parquet")
    cfg["items"]["path"] = str(work / "limit_items.parquet")
    cfg["evaluation"] = {"baseline": False, "references": False, "test_queries": size["test_queries"]}
    cfg["report"] = {"enabled": False}
    cfg["training"]["progress"] = "plain"
    cfg["training"]["epoch_order"] = "windowed"  # both runs in the same order: the spill may change no figure
    configs = {}
    for kind in ("memory", "spilled"):
        if kind == "spilled":
            cfg["run"]["spill_folder"] = str(work / "spill")
        configs[kind] = work / f"limit_{kind}.yaml"
        configs[kind].write_text(yaml.safe_dump(cfg))
    runs = {}

    def train(kind: str, limit: int | None) -> dict:
        out = work / f"limit_run_{kind}_{'limited' if limit else 'free'}"
        got = run_in_cgroup([sys.executable, "-m", "towers", "train", str(configs[kind]), "--out", str(out),
                             "--overwrite"], limit)
        metrics = out / "metrics.json"
        got["warm"] = json.loads(metrics.read_text())["warm"]["towers"] if metrics.exists() else None
        log(f"memory_limit {kind}, limit {'none' if not limit else f'{limit / 2**30:.2f} GiB'}: {got}")
        return got

    runs["memory_free"], runs["spilled_free"] = train("memory", None), train("spilled", None)
    if "skipped" in runs["memory_free"]:
        return {"memory_limit_skipped": 1.0}
    limit = int((runs["memory_free"]["peak_anon_gb"] + runs["spilled_free"]["peak_anon_gb"]) / 2 * 2 ** 30)
    runs["memory_limited"], runs["spilled_limited"] = train("memory", limit), train("spilled", limit)
    (work / "memory_limit.json").write_text(json.dumps(runs, indent=1))
    limited = runs["spilled_limited"]["warm"]
    same = limited is not None and limited == runs["spilled_free"]["warm"]
    return {"memory_limit_gb": limit / 2 ** 30, "memory_limit_spilled_ok": float(runs["spilled_limited"]["code"] == 0),
            "memory_limit_spilled_same_metrics": float(same),
            "memory_limit_same_as_in_memory": float(limited is not None and limited == runs["memory_free"]["warm"]),
            "memory_limit_in_memory_killed": float(runs["memory_limited"]["killed"]),
            "memory_limit_peak_anon_gb_memory": runs["memory_free"]["peak_anon_gb"],
            "memory_limit_peak_anon_gb_spilled": runs["spilled_free"]["peak_anon_gb"],
            "memory_limit_seconds_memory": runs["memory_free"]["seconds"],
            "memory_limit_seconds_spilled": runs["spilled_free"]["seconds"],
            "memory_limit_seconds_spilled_limited": runs["spilled_limited"]["seconds"],
            "memory_limit_recall_memory": runs["memory_free"]["warm"]["recall@20"],
            "memory_limit_recall_spilled": runs["spilled_free"]["warm"]["recall@20"]}


def case_two_nodes_one(size: dict, work: Path) -> dict:
    """`towers train` in one process."""
    return timed_command([sys.executable, "-m", "towers", "train", str(work / "two_nodes.yaml"), "--out", str(work / "one")])


def case_two_nodes_base(size: dict, work: Path) -> dict:
    """A process that only imports towers' training path: the fixed memory every process has before any data."""
    return timed_command([sys.executable, "-c", "import towers.cli, towers.runs.train"])


def case_two_nodes_node(size: dict, work: Path) -> dict:
    """One of the two torchrun invocations of the rehearsal (the README's commands, at size["endpoint"])."""
    from towers.training.distributed import node_command

    argv = ["train", str(work / "two_nodes.yaml"), "--out", str(work / "two")]
    return timed_command(node_command(size["node"], 2, size["endpoint"], argv))


def two_nodes_figures(one: dict, nodes: list[dict], base: dict, work: Path) -> dict:
    """Wall time, training pairs a second per core, data memory and validation of the rehearsal, each over one
    process's. Data memory is a process's peak less `base`'s (the interpreter and libraries alone)."""
    if one["code"] or any(n["code"] for n in nodes):
        raise SystemExit(f"bench: two_nodes: exit codes {one['code']} (one process), {[n['code'] for n in nodes]} (nodes)")
    runs = {}
    for tag, cores in (("one", 1), ("two", 2)):  # one thread a process
        history = json.loads((work / tag / "history.json").read_text())
        metric, epochs = history["stop_metric"], history["epochs"]["towers"]
        best = next(row for row in epochs if row["epoch"] == history["best_epoch"])
        test = json.loads((work / tag / "metrics.json").read_text())["warm"]["towers"][metric]
        rate = sum(row["pairs_per_s"] for row in epochs) / len(epochs)  # all pairs of an epoch over its time
        runs[tag] = {"per_core": rate / cores, "valid": best[f"valid_{metric}"], "test": test}
    wall = max(n["seconds"] for n in nodes)  # the nodes end together (torchrun's exit barrier)
    fixed = base["peak_rss_gb"]
    data_one = one["peak_rss_gb"] - fixed
    data_two = [n["peak_rss_gb"] - fixed for n in nodes]
    log(f"two_nodes: wall {wall:.1f} s against {one['seconds']:.1f} s; pairs/s per core {runs['two']['per_core']:,.0f} "
        f"against {runs['one']['per_core']:,.0f}; peak RSS per process {nodes[0]['peak_rss_gb']:.2f} and "
        f"{nodes[1]['peak_rss_gb']:.2f} GiB against {one['peak_rss_gb']:.2f} GiB (data {data_two[0]:.2f} and "
        f"{data_two[1]:.2f} GiB against {data_one:.2f} GiB over {fixed:.2f} GiB of libraries); "
        f"valid {metric} {runs['two']['valid']:.4f} "
        f"against {runs['one']['valid']:.4f}, test {runs['two']['test']:.4f} against {runs['one']['test']:.4f}")
    return {"two_nodes_wall_vs_one": wall / one["seconds"],
            "two_nodes_pairs_per_core_vs_one": runs["two"]["per_core"] / runs["one"]["per_core"],
            "two_nodes_peak_rss_vs_one": max(n["peak_rss_gb"] for n in nodes) / one["peak_rss_gb"],
            "two_nodes_data_memory_vs_one": max(data_two) / data_one, "two_nodes_data_memory_gb": data_two,
            "two_nodes_one_data_memory_gb": data_one, "two_nodes_libraries_gb": fixed,
            "two_nodes_valid_vs_one": runs["two"]["valid"] / runs["one"]["valid"],
            "two_nodes_test_vs_one": runs["two"]["test"] / runs["one"]["test"],
            "two_nodes_wall_s": wall, "two_nodes_one_wall_s": one["seconds"],
            "two_nodes_pairs_per_s_per_core": runs["two"]["per_core"],
            "two_nodes_one_pairs_per_s_per_core": runs["one"]["per_core"],
            "two_nodes_peak_rss_gb": [n["peak_rss_gb"] for n in nodes], "two_nodes_one_peak_rss_gb": one["peak_rss_gb"],
            "two_nodes_valid": runs["two"]["valid"], "two_nodes_one_valid": runs["one"]["valid"],
            "two_nodes_test": runs["two"]["test"], "two_nodes_one_test": runs["one"]["test"], "two_nodes_metric": metric}


CHILDREN = {"id_training": case_id_training, "tower_flops": case_tower_flops, "als": case_als,
            "softmax_batch": case_softmax_batch,
            "retrieval": case_retrieval, "scale_data": case_scale_data,
            "scale_small": lambda s, w: case_scale_run(s, w, "small"),
            "scale_large": lambda s, w: case_scale_run(s, w, "large"),
            "scale_100m_data": case_scale_100m_data,
            "scale_base": lambda s, w: case_scale_run(s, w, "base"),
            "scale_huge": lambda s, w: case_scale_run(s, w, "huge"),
            "embed_setup": case_embed_setup, "embed_run": case_embed_run, "lists": case_lists,
            "serve_setup": case_serve_setup, "serve_run": case_serve_run,
            "derive_data": case_derive_data, "derive_run": case_derive_run,
            "two_nodes_data": case_two_nodes_data, "two_nodes_one": case_two_nodes_one,
            "two_nodes_node": case_two_nodes_node, "two_nodes_base": case_two_nodes_base, "memory_limit": case_memory_limit}


# ---- the parent ------------------------------------------------------------------------------------

def children(jobs: list[tuple[str, dict]], work: Path) -> list[dict]:
    """Run measurements (name, size) each in a fresh process, all at once; returns their JSON results in order."""
    procs = [(name, subprocess.Popen([sys.executable, __file__, "--child", name, "--size", json.dumps(size), "--work",
                                      str(work)], stdout=subprocess.PIPE, text=True, cwd=ROOT)) for name, size in jobs]
    results = []
    for name, proc in procs:
        out, _ = proc.communicate()
        if proc.returncode != 0:
            raise SystemExit(f"bench: case {name} failed (exit {proc.returncode})")
        results.append(json.loads(out.strip().splitlines()[-1]))
    return results


def child(name: str, size: dict, work: Path) -> dict:
    """Run one measurement in a fresh process; returns its JSON result."""
    return children([(name, size)], work)[0]


def run_case(name: str, size: dict, work: Path) -> dict:
    if name == "scale":
        child("scale_data", size, work)
        small, large = child("scale_small", size, work), child("scale_large", size, work)
        return {"scale_10m_over_1m": large["seconds"] / small["seconds"], "peak_rss_gb_10m": large["peak_rss_gb"],
                "peak_rss_gb_1m": small["peak_rss_gb"], "scale_seconds_1m": small["seconds"],
                "scale_seconds_10m": large["seconds"], "scale_prepare_s_1m": small["prepare_s"],
                "scale_prepare_s_10m": large["prepare_s"]}
    if name == "scale_100m":
        child("scale_100m_data", size, work)
        base, huge = child("scale_base", size, work), child("scale_huge", size, work)
        return {"scale_100m_epoch_over_10m": huge["epoch_s"] / base["epoch_s"], "peak_rss_gb_100m": huge["peak_rss_gb"],
                "scale_100m_over_10m": huge["seconds"] / base["seconds"], "peak_rss_gb_100m_base": base["peak_rss_gb"],
                "scale_seconds_100m": huge["seconds"], "scale_epoch_s_100m": huge["epoch_s"],
                "scale_prepare_s_100m": huge["prepare_s"], "scale_seconds_100m_base": base["seconds"],
                "scale_epoch_s_100m_base": base["epoch_s"], "scale_prepare_s_100m_base": base["prepare_s"]}
    if name == "embed":
        child("embed_setup", size, work)
        out = child("embed_run", size, work)
        return {"embed_1m_unseen_peak_rss_gb": out["peak_rss_gb"], "embed_1m_unseen_s": out["seconds"]}
    if name == "derive_pairs":
        data = child("derive_data", size, work)
        out = child("derive_run", {**size, "lines": data["lines"]}, work)
        return {"derive_pairs_vs_scan": out["seconds"] / out["scan_s"], "derive_pairs_peak_rss_gb": out["peak_rss_gb"],
                "derive_pairs_lines_per_s": data["lines"] / out["seconds"], "derive_pairs_s": out["seconds"],
                "derive_pairs_scan_s": out["scan_s"], "derive_pairs_lines": data["lines"], "derive_pairs_out": out["pairs"]}
    if name == "two_nodes":
        from towers.training.distributed import rehearsal_endpoint

        child("two_nodes_data", size, work)
        one = child("two_nodes_one", size, work)
        base = child("two_nodes_base", size, work)
        endpoint = rehearsal_endpoint()
        return two_nodes_figures(one, children([("two_nodes_node", {**size, "node": r, "endpoint": endpoint})
                                                for r in range(2)], work), base, work)
    if name == "serve":
        child("serve_setup", size, work)
        out = child("serve_run", size, work)
        return {"serve_p50_1_client_vs_library": out["serve_p50_ms_1"] / out["serve_library_p50_ms"],
                "serve_rps_32_vs_1_client": out["serve_rps_32"] / out["serve_rps_1"], **out}
    return child(name, size, work)


GOALS = {  # key: (goal, "at least" or "at most")
    "id_training_vs_bare_kernel": (0.8, ">="), "id_training_vs_per_sample_loop": (20, ">="),
    "tower_flops_vs_matmul_peak": (0.4, ">="),
    "softmax_blocked_vs_dense_1024": (1.0, ">="), "softmax_blocked_vs_dense_4096": (2.0, ">="),
    "softmax_blocked_vs_dense_8192": (None, ""), "als_vs_per_row_cholesky": (5, ">="),
    "retrieval_vs_bare_matmul": (0.8, ">="),
    "retrieval_float32_vs_bare_matmul": (None, ""),  # the same search with the bfloat16 screen off
    "scale_10m_over_1m": (11, "<="), "peak_rss_gb_10m": (4, "<="),
    "scale_100m_epoch_over_10m": (11, "<="), "peak_rss_gb_100m": (4, "<="), "scale_100m_over_10m": (None, ""),
    "embed_1m_unseen_peak_rss_gb": (None, ""),
    "serve_p50_1_client_vs_library": (None, ""), "serve_rps_32_vs_1_client": (None, ""),
    "lists_vs_top_n": (None, ""), "lists_users_per_s": (None, ""), "lists_peak_rss_gb": (None, ""),
    "derive_pairs_vs_scan": (None, ""), "derive_pairs_lines_per_s": (None, ""), "derive_pairs_peak_rss_gb": (4, "<="),
    "memory_limit_spilled_ok": (1, ">="), "memory_limit_spilled_same_metrics": (1, ">="),
    "memory_limit_same_as_in_memory": (1, ">="),
    "memory_limit_in_memory_killed": (None, ""), "memory_limit_gb": (None, ""),
    "memory_limit_peak_anon_gb_memory": (None, ""), "memory_limit_peak_anon_gb_spilled": (None, ""),
    "two_nodes_wall_vs_one": (None, ""), "two_nodes_pairs_per_core_vs_one": (0.8, ">="),
    "two_nodes_peak_rss_vs_one": (None, ""), "two_nodes_data_memory_vs_one": (0.6, "<="),
    "two_nodes_valid_vs_one": (0.98, ">="), "two_nodes_test_vs_one": (None, ""),
}


def table(figures: dict) -> str:
    lines = [f"{'figure':34s} {'value':>10s}  {'goal':>8s}  met"]
    for key, (goal, sense) in GOALS.items():
        if key not in figures:
            continue
        v = figures[key]
        met = "" if goal is None else ("yes" if (v >= goal if sense == ">=" else v <= goal) else "NO")
        lines.append(f"{key:34s} {v:10.3f}  {'' if goal is None else f'{sense} {goal:g}':>8s}  {met}")
    return "\n".join(lines)


def load_average() -> list[float] | None:
    try:
        return [round(x, 2) for x in os.getloadavg()]
    except OSError:
        return None


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--quick", action="store_true", help="smaller sizes, the same figures (under 5 minutes)")
    p.add_argument("--only", nargs="+", choices=CASES, help="run only these cases")
    p.add_argument("--out", default=str(ROOT / "bench.json"), help="where to write the figures (default bench.json)")
    p.add_argument("--child", help=argparse.SUPPRESS)
    p.add_argument("--size", help=argparse.SUPPRESS)
    p.add_argument("--work", help=argparse.SUPPRESS)
    args = p.parse_args(argv)
    if args.child:
        result = CHILDREN[args.child](json.loads(args.size), Path(args.work))
        print(json.dumps(result))
        return 0

    import torch

    from towers.atomic import write_text_atomic

    started = time.perf_counter()
    figures: dict = {}
    sizes = {}
    load_start = load_average()
    with tempfile.TemporaryDirectory(prefix="towers-bench-") as tmp:
        for name in args.only or CASES:
            size = SIZES[name][1 if args.quick else 0]
            sizes[name] = size
            work = Path(tmp) / name
            work.mkdir()
            t = time.perf_counter()
            log(f"{name} {json.dumps(size)}")
            figures.update(run_case(name, size, work))
            log(f"{name} done in {time.perf_counter() - t:.0f} s")
    elapsed = time.perf_counter() - started
    report = {
        **{k: figures[k] for k in GOALS if k in figures},
        "details": {k: v for k, v in figures.items() if k not in GOALS},
        "run": {"mode": "quick" if args.quick else "full", "seconds": round(elapsed, 1), "sizes": sizes,
                "command": "scripts/bench" + (" --quick" if args.quick else "") +
                           (f" --only {' '.join(args.only)}" if args.only else ""),
                "load_average_start": load_start, "load_average_end": load_average(),
                "threads": torch.get_num_threads(), "cpu_count": os.cpu_count(), "torch": torch.__version__,
                "python": platform.python_version(), "machine": platform.machine(),
                "finished": time.strftime("%Y-%m-%d %H:%M:%S")},
    }
    write_text_atomic(Path(args.out), json.dumps(report, indent=2) + "\n")
    print(table(figures))
    print(f"\n{report['run']['mode']} run in {elapsed:.0f} s; load average {load_start} -> {report['run']['load_average_end']}; "
          f"figures written to {args.out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
