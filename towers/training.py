"""The training loop: vectorised minibatches, sampled negatives, sparse id updates, early stopping.

Objective (per training pair, averaged; see README "Training objective"):
    J = 1/N sum_p w_p [ l(s_p, y_p) + sum_j l(s_pj, 0) ]
        + lambda/(2N) sum_e (||e_e||^2 + b_e^2) + (wd/2) ||theta||^2
The id-row penalty is spread over a row's pairs (1/n_e per pair), so each minibatch is an unbiased
estimate of J and full-batch training minimises it exactly. Under loss: softmax the bracket is the
in-batch sampled softmax of losses.in_batch_softmax_loss (the batch's other items as negatives).
"""

from __future__ import annotations

import math
import signal
import sys
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path

import torch
import torch.nn.functional as F
from tqdm import tqdm

from .allocator import reuse_freed_memory
from .atomic import write_atomic
from .bundle import load_payload
from .config import default_stop_metric, lower_is_better
from .context import averaged_vectors, event_pairs, sample_contexts, vectors_with_context
from .dataset import Pairs, Prepared
from .distributed import is_primary, mean_over_processes, peer_failure, rank_and_size, wrap
from .errors import TowersError
from .evaluate import Scorer, ranking_metrics, rating_metrics
from .features import FeatureBlock, block_len, slice_block, take
from .losses import in_batch_softmax_loss, logistic_loss, squared_loss
from .model import Tower, TwoTowerModel

EMBED_CHUNK = 65536


def log(message: str) -> None:
    """Plain log lines go to stderr so stdout stays clean for tables and results (process 0 only)."""
    if is_primary():
        print(message, file=sys.stderr, flush=True)


def build_model(data: Prepared, cfg: dict) -> TwoTowerModel:
    """A TwoTowerModel sized for the prepared data's encoders."""
    q, c = data.queries.encoders, data.candidates.encoders
    if not cfg["model"]["use_ids"]:
        for side, enc in (("users" if not data.item_item else "items", q), ("items", c)):
            if not enc.encoders:
                raise TowersError(f"config key 'model.use_ids': false leaves the {side} tower with no input; "
                                  f"add {side}.features or set use_ids: true")
    shared = data.item_item and cfg["model"]["shared_tower"]
    q_inputs = _with_dims(q.model_inputs(), cfg["users" if not data.item_item else "items"]["features"])
    if data.context is not None:
        q_inputs += _with_dims(data.context.model_inputs(), cfg["interactions"]["context"])
    c_inputs = _with_dims(c.model_inputs(), cfg["items"]["features"])
    return start_global_bias(TwoTowerModel(q_inputs, q.id_encoder.size, c_inputs, c.id_encoder.size, cfg["model"],
                                           shared=shared), data, cfg)


def start_global_bias(model: TwoTowerModel, data: Prepared, cfg: dict) -> TwoTowerModel:
    """A new model's global bias starts at the mean training rating, so id rows and biases learn offsets.

    Done once when a model is built (not by each Trainer), so a trained or warm-started bias is kept.
    """
    if cfg["training"]["loss"] == "squared" and model.use_biases and data.train.target is not None:
        with torch.no_grad():
            model.global_bias.fill_(float(data.train.target.mean()))
    return model


def _with_dims(inputs: list[dict], specs: list[dict]) -> list[dict]:
    dims = {s["name"]: s.get("dim") for s in specs}
    return [dict(i, dim=dims.get(i["name"])) for i in inputs]


@torch.no_grad()
def embed_all(tower: Tower, block: FeatureBlock) -> torch.Tensor:
    """Embeddings of every entity in a block, computed in chunks with the tower in eval mode."""
    was = tower.training
    tower.eval()
    n = block_len(block)
    out = torch.cat([tower(slice_block(block, i, min(n, i + EMBED_CHUNK))) for i in range(0, n, EMBED_CHUNK)]) \
        if n else torch.zeros(0, tower.mlp[-1].out_features if len(tower.mlp) else tower.ids.embedding_dim)
    tower.train(was)
    return out


@torch.no_grad()
def model_scorer(model: TwoTowerModel, data: Prepared) -> Scorer:
    """The trained model as vectors over both catalogs.

    A query tower that reads context columns gives each query its vector averaged over a fixed sample
    of training contexts (context.sample_contexts): its expected scores over the usual context mix.
    """
    if reads_context(model.query_tower, data):
        qv = averaged_vectors(model.query_tower, data.queries.block, sample_contexts(data.train.context))
    else:
        qv = embed_all(model.query_tower, data.queries.block)
    cv = qv if (model.shared and data.queries is data.candidates) else embed_all(model.candidate_tower, data.candidates.block)
    qb = model.query_bias_of(data.queries.block["id"]) if model.use_biases else None
    cb = model.candidate_bias_of(data.candidates.block["id"]) if model.use_biases else None
    g = float(model.global_bias) if model.use_biases else 0.0
    return Scorer(qv, cv, qb, cb, g, 1.0 / model.temperature)


def reads_context(tower: Tower, data: Prepared) -> bool:
    """Whether a query tower takes the data's context columns as inputs."""
    return data.context is not None and any(i["name"] in data.context.names for i in tower.inputs)


def validation_metrics(scorer: Scorer, data: Prepared, cfg: dict, pairs: Pairs,
                       model: TwoTowerModel | None = None) -> dict[str, float]:
    """Metrics of `pairs` (validation or test) in the warm setting.

    With context columns every pair is its own query event (see context.py); `model` then gives the
    events' query vectors when its query tower reads the context.
    """
    known = data.train.positives()
    if pairs.context is not None:
        vectors = None
        if model is not None and reads_context(model.query_tower, data):
            vectors = vectors_with_context(model.query_tower, data.queries.block, pairs.query, pairs.context)
        pairs, known, users = event_pairs(pairs, known)
        scorer = scorer.for_events(users, vectors)
    if cfg["training"]["loss"] == "squared":
        return rating_metrics(scorer, pairs)
    return ranking_metrics(scorer, pairs, known, data.warm_items, cfg["evaluation"]["top_k"],
                           tie_seed=cfg["run"]["seed"], max_queries=cfg["training"]["validate_queries"],
                           exclude_self=data.item_item)


class NegativeSampler:
    """Draws negative candidate rows as one tensor op: uniform or proportional to popularity^alpha."""

    def __init__(self, train: Pairs, n_items: int, warm: torch.Tensor, tcfg: dict, generator: torch.Generator):
        self.generator = generator
        self.cdf = None
        if tcfg["negative_sampling"] == "uniform":
            self.rows = torch.nonzero(warm).flatten()  # uniform: one randint, no search
            return
        counts = torch.bincount(train.candidate, minlength=n_items).double()
        weights = counts.pow(tcfg["popularity_exponent"]) * warm.double()
        self.cdf = torch.cumsum(weights / weights.sum(), 0)
        self.cdf[-1] = 1.0

    def __call__(self, n: int) -> torch.Tensor:
        if self.cdf is None:
            return self.rows.index_select(0, torch.randint(0, len(self.rows), (n,), generator=self.generator))
        u = torch.rand(n, generator=self.generator, dtype=torch.float64)
        return torch.searchsorted(self.cdf, u, right=True).clamp_(max=len(self.cdf) - 1)


def _log_batch_share(candidates: torch.Tensor, n_items: int) -> torch.Tensor:
    """log of each item's share of training positives: its chance to be any given in-batch candidate."""
    counts = torch.bincount(candidates, minlength=n_items).double()
    return torch.log(counts.clamp(min=1) / len(candidates)).float()


class _IdRowObjective(torch.autograd.Function):
    """Per-pair objective of a batch where both towers output their id rows (the linear factor model),
    with its gradient in closed form: one node instead of some forty, so autograd's bookkeeping and
    temporaries stay off the hot path of id-only training.

    Inputs: q (b, k) query rows; c (b (1 + n_neg), k) candidate rows, positives first; qb (b,),
    cb (b (1 + n_neg),) biases and g the global bias (zeros when the model has none); y (b,) targets
    or None (all 1); w (b,) pair weights or None; pq, pc (b,) = lambda / n_row of each pair's query
    and positive candidate rows (None when lambda = 0). Per pair:
      w * (loss(s q.c+ + qb + cb+ + g, y) + sum_j softplus(s q.c-_j + qb + cb-_j + g)) [logistic]
      w * (pos - y)^2 / 2                                                         [squared]
      + pq (|q|^2 + qb^2) / 2 + pc (|c+|^2 + cb+^2) / 2,
    the same value as the general path of Trainer.batch_loss (tests/test_batch_loss.py checks both
    the value and every gradient against it).
    """

    @staticmethod
    def forward(ctx, q, c, qb, cb, g, y, w, pq, pc, scale: float, n_neg: int, logistic: bool):
        # row dot products with linalg.vecdot and sums over negatives with einsum: each is one pass,
        # where (x * y).sum(1) writes and rereads a temporary (measured 1.5x to 4x faster here)
        b = q.shape[0]
        cp, cbp = c[:b], cb[:b]
        pos = torch.linalg.vecdot(q, cp) * scale + qb + cbp + g
        t = y if y is not None else torch.ones(b)
        d_neg = None
        if logistic:
            loss = logistic_loss(pos, t)
            d_pos = torch.sigmoid(pos) - t
            if n_neg:
                cn = c[b:].view(b, n_neg, -1)
                neg = torch.einsum("bnk,bk->bn", cn, q) * scale + (qb + g).unsqueeze(1) + cb[b:].view(b, n_neg)
                loss = loss + F.softplus(neg, threshold=50.0).sum(1)
                d_neg = torch.sigmoid(neg)
        else:
            loss = squared_loss(pos, t)
            d_pos = pos - t
        if w is not None:
            loss = loss * w
            d_pos = d_pos * w
            d_neg = None if d_neg is None else d_neg * w.unsqueeze(1)
        if pq is not None:
            norms_q = torch.linalg.vecdot(q, q) + qb * qb
            norms_c = torch.linalg.vecdot(cp, cp) + cbp * cbp
            loss = loss + 0.5 * (pq * norms_q + pc * norms_c)
        ctx.save_for_backward(q, c, qb, cb, d_pos, d_neg, pq, pc)
        ctx.scale, ctx.n_neg = scale, n_neg
        return loss

    @staticmethod
    def backward(ctx, grad):
        q, c, qb, cb, d_pos, d_neg, pq, pc = ctx.saved_tensors
        b, s, n_neg = q.shape[0], ctx.scale, ctx.n_neg
        gp = d_pos * grad  # d objective / d positive score, per pair
        gps = (gp * s).unsqueeze(1)
        gq = gps * c[:b]
        g_qb = gp.clone()
        g_c = torch.empty_like(c)
        torch.mul(gps, q, out=g_c[:b])
        g_cb = torch.empty_like(cb)
        g_cb[:b] = gp
        if d_neg is not None:
            gn = d_neg * grad.unsqueeze(1)  # (b, n_neg)
            cn = c[b:].view(b, n_neg, -1)
            gq.add_(torch.einsum("bn,bnk->bk", gn, cn), alpha=s)
            torch.mul((gn * s).unsqueeze(2), q.unsqueeze(1), out=g_c[b:].view(b, n_neg, -1))
            g_cb[b:] = gn.reshape(-1)
            g_qb += gn.sum(1)
        g_g = g_qb.sum() if ctx.needs_input_grad[4] else None
        if pq is not None:
            kq, kc = pq * grad, pc * grad
            gq.addcmul_(kq.unsqueeze(1), q)
            g_qb.addcmul_(kq, qb)
            g_c[:b].addcmul_(kc.unsqueeze(1), c[:b])
            g_cb[:b].addcmul_(kc, cb[:b])
        return gq, g_c, g_qb, g_cb, g_g, None, None, None, None, None, None, None


class _SquaredNorms(torch.autograd.Function):
    """||x_r||^2 of each row, with a one-pass backward (2 x_r g_r); pow(2).sum(1) takes three passes."""

    @staticmethod
    def forward(ctx, x: torch.Tensor) -> torch.Tensor:
        ctx.save_for_backward(x)
        return (x * x).sum(1)

    @staticmethod
    def backward(ctx, grad: torch.Tensor) -> torch.Tensor:
        (x,) = ctx.saved_tensors
        return x * (2.0 * grad).unsqueeze(1)


def _output_is_id_row(tower: Tower) -> bool:
    """Whether the tower's output is exactly its id-table row (ids only, no hidden layer, no softplus or norm)."""
    return tower.direct and not tower.normalize and not tower.non_negative


def _id_counts(ids: torch.Tensor, rows: int) -> torch.Tensor:
    """Training positives per id row; 1/count spreads a row's penalty over its pairs."""
    c = torch.bincount(ids, minlength=rows).float()
    return torch.where(c > 0, 1.0 / c.clamp(min=1), torch.zeros_like(c))


def make_optimizers(model: TwoTowerModel, tcfg: dict) -> list[torch.optim.Optimizer]:
    """Adam with L2 weight decay for the dense network; a sparse optimiser for id and bias tables."""
    opts: list[torch.optim.Optimizer] = []
    dense = model.dense_parameters()
    groups = [{"params": dense, "weight_decay": tcfg["weight_decay"]}] if dense else []
    if model.use_biases:
        groups.append({"params": [model.global_bias], "weight_decay": 0.0})
    if groups:
        opts.append(torch.optim.Adam(groups, lr=tcfg["learning_rate"]))
    sparse = model.sparse_parameters()
    if sparse:
        kind, lr = tcfg["id_optimizer"], tcfg["id_learning_rate"]
        if kind == "adam":
            opts.append(torch.optim.SparseAdam(sparse, lr=lr))
        elif kind == "adagrad":
            opts.append(torch.optim.Adagrad(sparse, lr=lr))
        else:
            opts.append(torch.optim.SGD(sparse, lr=lr))
    return opts


@dataclass
class TrainResult:
    history: list[dict] = field(default_factory=list)
    best_epoch: int = 0
    best_value: float | None = None
    stop_metric: str = ""
    best_state: dict | None = None


def record_epoch(model: TwoTowerModel, data: Prepared, cfg: dict, result: TrainResult, epoch: int, loss: float,
                 rate: float, checkpoint_dir: Path | None) -> tuple[float | None, bool]:
    """Validate after an epoch (or ALS sweep), append its history row, keep and save the best weights.

    Returns (validation value, whether this epoch is the best so far); with no validation pairs every
    epoch counts as the best.
    """
    metric = result.stop_metric
    value = None
    if len(data.valid):
        value = validation_metrics(model_scorer(model, data), data, cfg, data.valid, model).get(metric)
    row = {"epoch": epoch, "loss": loss, "pairs_per_s": rate}
    if value is not None:
        row[f"valid_{metric}"] = value
    result.history.append(row)
    lower = lower_is_better(metric)
    improved = value is None or result.best_value is None or (value < result.best_value if lower else value > result.best_value)
    if improved:
        result.best_value, result.best_epoch = value, epoch
        result.best_state = _clone(model.state_dict())
        if checkpoint_dir is not None:
            state = result.best_state
            write_atomic(checkpoint_dir / "best.pt", lambda f: torch.save({"epoch": epoch, "state_dict": state}, f))
    return value, improved


class Trainer:
    """Runs epochs over the training pairs of a Prepared dataset for one model."""

    def __init__(self, model: TwoTowerModel, data: Prepared, cfg: dict, label: str = "towers"):
        self.model, self.data, self.cfg, self.label = model, data, cfg, label
        self.tcfg = cfg["training"]
        if cfg["run"]["reuse_memory"]:
            reuse_freed_memory()
        self.generator = torch.Generator().manual_seed(cfg["run"]["seed"])
        self.optimizers = make_optimizers(model, self.tcfg)
        self.rank, self.world = rank_and_size()
        # one process: negatives come from the shuffling generator, as always; several: each process
        # draws its own negatives, while the shared shuffle keeps every process on the same order
        self.negative_generator = self.generator if self.world == 1 else \
            torch.Generator().manual_seed(cfg["run"]["seed"] + 1 + self.rank)
        self.logistic = self.tcfg["loss"] == "logistic"
        self.softmax = self.tcfg["loss"] == "softmax"
        self.n_neg = self.tcfg["negatives"] if self.logistic else 0
        # both towers output their id rows (the linear factor model): the closed-form objective node
        self.id_rows_only = _output_is_id_row(model.query_tower) and _output_is_id_row(model.candidate_tower)
        if self.id_rows_only:  # each pair's id-table rows, looked up once instead of twice per step
            self.pair_q_ids = data.queries.block["id"].index_select(0, data.train.query)
            self.pair_c_ids = data.candidates.block["id"].index_select(0, data.train.candidate)
        train = data.train
        self.log_q = _log_batch_share(train.candidate, block_len(data.candidates.block)) \
            if self.softmax and self.tcfg["logq_correction"] else None
        if self.tcfg["loss"] == "squared" and train.target is None:
            raise TowersError("config key 'training.loss': squared loss needs interactions.target_column (ratings); "
                              "use loss: logistic for events without a target")
        self.sampler = NegativeSampler(train, block_len(data.candidates.block), data.warm_items, self.tcfg,
                                       self.negative_generator) if self.n_neg else None
        q_ids = data.queries.block["id"][train.query]
        c_ids = data.candidates.block["id"][train.candidate]
        if model.shared:
            both = torch.cat([q_ids, c_ids])
            self.q_inv = self.c_inv = _id_counts(both, data.candidates.encoders.id_encoder.size)
        else:
            self.q_inv = _id_counts(q_ids, data.queries.encoders.id_encoder.size)
            self.c_inv = _id_counts(c_ids, data.candidates.encoders.id_encoder.size)
        self.lam = self.tcfg["id_l2"]
        self.stop_requested = False
        self.step_loss = self.batch_loss if self.world == 1 else wrap(self)

    def _penalty(self, tower: Tower, bias, ids: torch.Tensor, inv: torch.Tensor, rows: torch.Tensor | None = None,
                 bias_rows: torch.Tensor | None = None) -> torch.Tensor:
        """lambda/2 * (||row||^2 + b^2) / n_row for each pair's id row (row 0, the unknown id, is free).

        rows / bias_rows: the id rows and biases of `ids` when the caller has gathered them already (an
        id-only tower's output is its id row), so the tables are not read twice and each table gets
        one sparse gradient per step instead of two to be added together.
        """
        total = None
        if tower.ids is not None:
            total = _SquaredNorms.apply(rows if rows is not None else tower.ids(ids))
        if bias is not None:
            b2 = (bias_rows if bias_rows is not None else bias(ids).squeeze(1)).pow(2)
            total = b2 if total is None else total + b2
        if total is None:
            return torch.zeros(len(ids))
        return (0.5 * self.lam) * total * inv.index_select(0, ids)

    def in_batch_loss(self, idx: torch.Tensor) -> torch.Tensor:
        """Sampled softmax over the batch: each pair's candidate against the batch's other candidates.

        Query and global biases cancel inside a softmax over candidates, so only candidate biases enter.
        """
        m, d, train = self.model, self.data, self.data.train
        q_rows, c_rows = train.query.index_select(0, idx), train.candidate.index_select(0, idx)
        qb = self.query_batch(idx, q_rows)
        q_ids = m.query_tower.id_rows(qb)
        qe = m.query_tower(qb, q_ids)
        cb = take(d.candidates.block, c_rows)
        c_ids = m.candidate_tower.id_rows(cb)
        ce = m.candidate_tower(cb, c_ids)
        logits = (qe @ ce.T) / m.temperature + m.candidate_bias_of(c_ids).unsqueeze(0)
        log_q = self.log_q.index_select(0, c_rows) if self.log_q is not None else None
        loss = in_batch_softmax_loss(logits, c_rows, log_q)
        if train.target is not None:  # a label in [0, 1] scales its row; label 0 rows teach nothing here
            loss = loss * train.target.index_select(0, idx)
        if train.weight is not None:
            loss = loss * train.weight.index_select(0, idx)
        if self.lam > 0:
            loss = loss + self._penalty(m.query_tower, m.query_bias if m.use_biases else None, q_ids, self.q_inv)
            loss = loss + self._penalty(m.candidate_tower, m.candidate_bias if m.use_biases else None, c_ids, self.c_inv)
        return loss.mean()

    def query_batch(self, idx: torch.Tensor, q_rows: torch.Tensor) -> dict:
        """The query tower's input for pairs idx: the query entity's features, plus the pairs' context columns."""
        qb = take(self.data.queries.block, q_rows)
        if self.data.train.context is not None:
            qb = qb | take(self.data.train.context, idx)
        return qb

    def batch_loss(self, idx: torch.Tensor) -> torch.Tensor:
        """Mean objective over one minibatch of training pairs (see module docstring)."""
        if self.softmax:
            return self.in_batch_loss(idx)
        if self.id_rows_only:
            return self.id_row_loss(idx)
        m, d, train = self.model, self.data, self.data.train
        q_rows, c_rows = train.query.index_select(0, idx), train.candidate.index_select(0, idx)
        qb = self.query_batch(idx, q_rows)
        q_ids = m.query_tower.id_rows(qb)
        qe = m.query_tower(qb, q_ids)
        b = len(idx)
        if self.n_neg:
            c_rows = torch.cat([c_rows, self.sampler(b * self.n_neg)])
        cb = take(d.candidates.block, c_rows)
        c_ids = m.candidate_tower.id_rows(cb)
        ce = m.candidate_tower(cb, c_ids)
        scale = 1.0 / m.temperature
        qbias = m.query_bias_of(q_ids)
        cbias = m.candidate_bias_of(c_ids)
        g = m.global_bias if m.use_biases else 0.0
        # split, not slices: a slice's backward zero-fills a gradient of the whole tensor for each part
        ce_pos, ce_neg = ce.split([b, len(ce) - b])
        cbias_pos, cbias_neg = cbias.split([b, len(cbias) - b])
        pos = (qe * ce_pos).sum(1) * scale + qbias + cbias_pos + g
        y = train.target.index_select(0, idx) if train.target is not None else torch.ones(b)
        if self.logistic:
            loss = logistic_loss(pos, y)
            if self.n_neg:
                ne = ce_neg.view(b, self.n_neg, -1)
                # elementwise, not bmm: b tiny (n_neg x k) products are slower as a batched matmul
                neg = (ne * qe.unsqueeze(1)).sum(2) * scale + qbias.unsqueeze(1) + cbias_neg.view(b, -1) + g
                loss = loss + logistic_loss(neg, torch.zeros_like(neg)).sum(1)
        else:
            loss = squared_loss(pos, y)
        if train.weight is not None:
            loss = loss * train.weight.index_select(0, idx)
        if self.lam > 0:
            qbias_t = m.query_bias if m.use_biases else None
            cbias_t = m.candidate_bias if m.use_biases else None
            q_rows_seen = qe if _output_is_id_row(m.query_tower) else None
            c_rows_seen = ce_pos if _output_is_id_row(m.candidate_tower) else None
            loss = loss + self._penalty(m.query_tower, qbias_t, q_ids, self.q_inv, q_rows_seen,
                                        qbias if m.use_biases else None)
            loss = loss + self._penalty(m.candidate_tower, cbias_t, c_ids[:b], self.c_inv, c_rows_seen,
                                        cbias_pos if m.use_biases else None)
        return loss.mean()

    def id_row_loss(self, idx: torch.Tensor) -> torch.Tensor:
        """batch_loss for a model whose towers both output their id rows, through _IdRowObjective."""
        m, d, train = self.model, self.data, self.data.train
        b = len(idx)
        c_codes = self.pair_c_ids.index_select(0, idx)
        if self.n_neg:
            c_codes = torch.cat([c_codes, d.candidates.block["id"].index_select(0, self.sampler(b * self.n_neg))])
        q_ids = m.query_tower.id_rows({"id": self.pair_q_ids.index_select(0, idx)})
        c_ids = m.candidate_tower.id_rows({"id": c_codes})
        q, c = m.query_tower.ids(q_ids), m.candidate_tower.ids(c_ids)
        g = m.global_bias if m.use_biases else torch.zeros(())
        y = train.target.index_select(0, idx) if train.target is not None else None
        w = train.weight.index_select(0, idx) if train.weight is not None else None
        pq = pc = None
        if self.lam > 0:
            pq = self.lam * self.q_inv.index_select(0, q_ids)
            pc = self.lam * self.c_inv.index_select(0, c_ids[:b])
        loss = _IdRowObjective.apply(q, c, m.query_bias_of(q_ids), m.candidate_bias_of(c_ids), g, y, w, pq, pc,
                                     1.0 / m.temperature, self.n_neg, self.logistic)
        return loss.mean()

    def objective(self) -> float:
        """The full objective J over all training pairs, without dropout (sampled negatives excluded)."""
        keep_neg = self.n_neg
        self.n_neg = 0
        self.model.eval()
        with torch.no_grad():
            n = len(self.data.train)
            step = self.tcfg["batch_size"] if self.softmax else 65536  # softmax: batches as in training
            total = sum(float(self.batch_loss(torch.arange(i, min(n, i + step)))) * min(step, n - i)
                        for i in range(0, n, step))
            dense = sum(float(p.pow(2).sum()) for p in self.model.dense_parameters())
        self.model.train()
        self.n_neg = keep_neg
        return total / n + 0.5 * self.tcfg["weight_decay"] * dense

    def run_epoch(self, epoch: int, bar: bool, perm: torch.Tensor | None = None, start_step: int = 0,
                  done_loss: float = 0.0) -> float:
        """One pass over the shuffled training pairs; returns the mean batch loss.

        perm/start_step/done_loss continue an epoch that was interrupted part-way. A stop request
        (Ctrl-C) is honoured between steps, never inside one, so the saved state is consistent.
        """
        self.model.train()
        n = len(self.data.train)
        bs = self.tcfg["batch_size"]
        if perm is None:
            perm = torch.randperm(n, generator=self.generator)
        steps = math.ceil(n / bs)
        progress = tqdm(total=n, initial=min(n, start_step * bs), desc=f"{self.label} epoch {epoch}", unit="pairs",
                        leave=False, file=sys.stderr, disable=not bar, mininterval=0.5)
        start, total = time.perf_counter(), done_loss
        for s in range(start_step, steps):
            if self.stop_requested:
                progress.close()
                raise Interrupted(epoch, s, perm, total)
            idx = perm[s * bs:(s + 1) * bs]
            if self.world > 1:  # this process's share of the global batch (distributed.py)
                idx = idx[self.rank::self.world]
            loss = self.step_loss(idx)
            if not torch.isfinite(loss):
                progress.close()
                raise TrainingDiverged(
                    f"training diverged at {self.label} epoch {epoch}, step {s + 1} (loss {float(loss.detach())}); no model "
                    "was written; lower training.learning_rate / id_learning_rate, or raise weight_decay / id_l2")
            for opt in self.optimizers:
                opt.zero_grad(set_to_none=True)
            loss.backward()
            for opt in self.optimizers:
                opt.step()
            total += float(loss.detach()) * len(idx)
            progress.update(len(idx))
            if bar and s % 20 == 0:
                rate = (progress.n - progress.initial) / max(1e-9, time.perf_counter() - start)
                progress.set_postfix(loss=f"{float(loss.detach()):.4f}", pairs_s=f"{rate:,.0f}")
        progress.close()
        self.last_rate = (n - min(n, start_step * bs)) / max(1e-9, time.perf_counter() - start)
        if self.world > 1:
            return mean_over_processes(total * self.world / n)
        return total / n


class Interrupted(Exception):
    """Raised between steps after a stop request, carrying the position to resume from."""

    def __init__(self, epoch: int, step: int, perm: torch.Tensor, loss_so_far: float):
        super().__init__(f"interrupted at epoch {epoch}, step {step}")
        self.epoch, self.step, self.perm, self.loss_so_far = epoch, step, perm, loss_so_far


class TrainingDiverged(TowersError):
    """A NaN or infinite loss: the run stops and writes no model."""


class TrainingInterrupted(TowersError):
    """Ctrl-C during training: a checkpoint was written; the message says how to resume."""

    exit_code = 130


def show_bar(progress: str) -> bool:
    """tqdm only on a terminal (or when asked); plain log lines otherwise."""
    if progress == "bar":
        return True
    if progress == "plain":
        return False
    return sys.stderr.isatty()


def _clone(state: dict) -> dict:
    return {k: v.detach().clone() for k, v in state.items()}


def fit(model: TwoTowerModel, data: Prepared, cfg: dict, checkpoint_dir: Path | None, label: str,
        resume: bool = False) -> TrainResult:
    """Train with validation every epoch, early stopping, and best/last checkpoints.

    checkpoint_dir/last.pt holds everything needed to continue exactly (weights, optimiser state,
    random-number state, position in the epoch); best.pt holds the best weights so far. With
    resume=True an existing last.pt is continued, and a finished one is simply loaded.
    """
    trainer = Trainer(model, data, cfg, label)
    tcfg = cfg["training"]
    metric = default_stop_metric(cfg)
    bar = show_bar(tcfg["progress"])
    result = TrainResult(stop_metric=metric)
    best_state, stale = None, 0
    epoch, perm, start_step, done_loss = 1, None, 0, 0.0
    last_path = checkpoint_dir / "last.pt" if checkpoint_dir is not None else None

    def save(finished: bool, position: tuple | None = None) -> None:
        if last_path is None:
            return
        ep, step, p, lsf = position if position else (epoch, 0, None, 0.0)
        state = {"format": "towers-checkpoint", "version": 1, "label": label, "finished": finished,
                 "epoch": ep, "step": step, "loss_so_far": lsf, "stale": stale,
                 "best_value": result.best_value, "best_epoch": result.best_epoch, "history": result.history,
                 "model": _clone(model.state_dict()), "best_model": best_state,
                 "optimizers": [o.state_dict() for o in trainer.optimizers],
                 "generator": trainer.generator.get_state(), "global_rng": torch.get_rng_state()}
        if p is not None:
            state["perm"] = p
        write_atomic(last_path, lambda f: torch.save(state, f))

    if resume and last_path is not None and last_path.is_file():
        st = load_payload(last_path, "checkpoint")
        if st.get("format") != "towers-checkpoint" or st.get("label") != label:
            raise TowersError(f"{last_path}: not a {label} checkpoint of this run; remove the .partial folder to start over")
        model.load_state_dict(st["model"])
        for opt, o_state in zip(trainer.optimizers, st["optimizers"]):
            opt.load_state_dict(o_state)
        trainer.generator.set_state(st["generator"])
        torch.set_rng_state(st["global_rng"])
        result.history, result.best_value, result.best_epoch = st["history"], st["best_value"], st["best_epoch"]
        best_state, stale = st["best_model"], st["stale"]
        epoch, start_step, perm, done_loss = st["epoch"], st["step"], st.get("perm"), st["loss_so_far"]
        if st["finished"]:
            if best_state is not None:
                model.load_state_dict(best_state)
            log(f"{label}: already trained in the interrupted run; loaded its best weights")
            return result
        log(f"{label}: resuming at epoch {epoch}" + (f", step {start_step}" if start_step else ""))

    previous = _install_stop_handler(trainer)
    try:
        while epoch <= tcfg["epochs"]:
            try:
                loss = trainer.run_epoch(epoch, bar, perm, start_step, done_loss)
            except RuntimeError as exc:  # a collective failed: a peer process is gone
                if trainer.world > 1:
                    raise peer_failure(exc) from None
                raise
            except Interrupted as stop:
                save(False, (stop.epoch, stop.step, stop.perm, stop.loss_so_far))
                raise TrainingInterrupted(f"{label} training interrupted at epoch {stop.epoch}, step {stop.step}; "
                                          "checkpoint written") from None
            perm, start_step, done_loss = None, 0, 0.0
            value, improved = record_epoch(model, data, cfg, result, epoch, loss, trainer.last_rate, checkpoint_dir)
            if improved:
                best_state, stale = result.best_state, 0
            else:
                stale += 1
            shown = "" if value is None else f"  valid {metric} {value:.4f}{' (best)' if improved else ''}"
            log(f"{label} epoch {epoch}/{tcfg['epochs']}  loss {loss:.4f}  {trainer.last_rate:,.0f} pairs/s{shown}")
            epoch += 1
            if stale >= tcfg["patience"]:
                log(f"{label}: stopping early after epoch {epoch - 1}; best epoch {result.best_epoch}")
                break
            save(False)
    finally:
        _restore_stop_handler(previous)
    if best_state is not None:
        model.load_state_dict(best_state)
    save(True)
    return result


def _install_stop_handler(trainer: Trainer):
    """Ctrl-C asks the trainer to stop after the current step (only possible in the main thread).

    Several processes could not agree on a step to stop at, so there Ctrl-C ends them at once.
    """
    if threading.current_thread() is not threading.main_thread() or trainer.world > 1:
        return None

    def request_stop(signum, frame):
        if trainer.stop_requested:  # a second Ctrl-C stops at once
            raise KeyboardInterrupt
        trainer.stop_requested = True
        log("stopping after this step (Ctrl-C again to abort without a checkpoint)")

    return signal.signal(signal.SIGINT, request_stop)


def _restore_stop_handler(previous) -> None:
    if previous is not None:
        signal.signal(signal.SIGINT, previous)
