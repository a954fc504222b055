"""The gradient training loop: vectorised minibatches, sampled negatives, sparse id updates.

Objective (per training pair, averaged):
    J = 1/N sum_p w_p [ l(s_p, y_p) + sum_j l(s_pj, 0) ]
        + lambda/(2N) sum_e (||e_e||^2 + b_e^2) + (wd/2) ||theta||^2
The id-row penalty is spread over a row's pairs (1/n_e per pair), so each minibatch is an unbiased
estimate of J and full-batch training minimises it exactly. Under loss: softmax the bracket is the
in-batch sampled softmax of model/losses.in_batch_softmax_loss (the batch's other items as negatives),
computed a block of rows at a time (blocked_in_batch_softmax_loss).
Validation, early stopping and Ctrl-C are training/stopping.py's, shared with ALS.
"""

from __future__ import annotations

import math
import sys
import time
from collections.abc import Callable
from pathlib import Path

import torch
from tqdm import tqdm

from towers.atomic import write_atomic
from towers.collective import across, gather_objects, largest, rank_and_size, share_rows, summed
from towers.config import Config
from towers.data.features import block_len, take
from towers.data.history import HISTORY, before, without_targets
from towers.data.prepare import Prepared
from towers.errors import TowersError
from towers.memory import reuse_freed_memory
from towers.model.bundle import load_payload
from towers.model.losses import blocked_in_batch_softmax_loss, logistic_loss, squared_loss
from towers.model.towers import Tower, TwoTowerModel, whole_bias
from towers.training.distributed import GradientExchange, mean_over_processes
from towers.training.negatives import NegativeSampler, log_batch_share
from towers.training.objectives import (
    IdRowObjective,
    SquaredNorms,
    id_counts,
    output_is_id_row,
)
from towers.training.optimizers import make_optimizers, rate_factor, set_rates
from towers.training.order import Shuffled, Windowed, restore
from towers.training.order import draw as draw_order
from towers.training.progress import log, show_bar
from towers.training.stopping import (
    EarlyStopping,
    StopRequest,
    TrainingDiverged,
    TrainingInterrupted,
    TrainResult,
)


class Trainer:
    """Runs epochs over the training pairs of a Prepared dataset for one model."""

    def __init__(self, model: TwoTowerModel, data: Prepared, cfg: Config, label: str = "towers"):
        self.model, self.data, self.cfg, self.label = model, data, cfg, label
        self.tcfg = cfg.training
        if cfg.run.reuse_memory:
            reuse_freed_memory()
        self.generator = torch.Generator().manual_seed(cfg.run.seed)
        self.optimizers = make_optimizers(model, self.tcfg)
        self.base_rates = [[g["lr"] for g in opt.param_groups] for opt in self.optimizers]
        self.scheduled = self.tcfg.schedule != "constant" or self.tcfg.warmup_steps > 0
        self.rank, self.world = rank_and_size()
        # one process: negatives come from the shuffling generator, as always; several: each process
        # draws its own negatives, while the shared shuffle keeps every process on the same order
        self.negative_generator = self.generator if self.world == 1 else \
            torch.Generator().manual_seed(cfg.run.seed + 1 + self.rank)
        self.logistic = self.tcfg.loss == "logistic"
        self.softmax = self.tcfg.loss == "softmax"
        self.n_neg = self.tcfg.sampled_negatives
        self.extra = self.tcfg.batch_negatives
        self.warm_rows = torch.nonzero(data.warm_items).flatten()
        # both towers output their id rows (the linear factor model): the closed-form objective node
        self.id_rows_only = output_is_id_row(model.query_tower) and output_is_id_row(model.candidate_tower)
        self.pair_q_ids = self.pair_c_ids = None
        if self.id_rows_only and not cfg.run.spill_folder:  # each pair's id-table rows, looked up once, not each step
            self.pair_q_ids = data.queries.block["id"].index_select(0, data.train.query)
            self.pair_c_ids = data.candidates.block["id"].index_select(0, data.train.candidate)
        train = data.train
        self.divided = data.divided  # this process holds only its users' pairs (data/shards.py)
        everywhere = across(self.divided)  # a process's own counts summed with the others' (divided log)
        self.log_q = log_batch_share(train.candidate, block_len(data.candidates.block), everywhere) \
            if self.softmax and self.tcfg.logq_correction else None
        if self.tcfg.rating_loss and train.target is None:
            raise TowersError("config key 'training.loss': squared loss needs interactions.target_column (ratings); "
                              "use loss: logistic for events without a target")
        self.sampler = NegativeSampler(train, block_len(data.candidates.block), data.warm_items, self.tcfg,
                                       self.negative_generator, everywhere) if self.n_neg else None
        q_rows = everywhere(torch.bincount(train.query, minlength=block_len(data.queries.block)))
        c_rows = everywhere(torch.bincount(train.candidate, minlength=block_len(data.candidates.block)))
        if model.shared:
            self.q_inv = self.c_inv = id_counts(data.candidates.block["id"], q_rows + c_rows,
                                                data.candidates.encoders.id_encoder.size)
        else:
            self.q_inv = id_counts(data.queries.block["id"], q_rows, data.queries.encoders.id_encoder.size)
            self.c_inv = id_counts(data.candidates.block["id"], c_rows, data.candidates.encoders.id_encoder.size)
        self.lam = self.tcfg.id_l2
        self.stop = StopRequest(self.world)
        # several processes: their gradients averaged after each backward pass (distributed.py)
        self.owned = self.owned_tables()
        self.owned_rows: torch.Tensor | None = None
        self.exchange = GradientExchange(model, self.owned) if self.world > 1 else None

    def owned_tables(self) -> list[torch.nn.Parameter]:
        """The tables whose rows each belong to one process: with the log divided by user, the query side's id
        table (one row per user, not a bounded one) and bias table, whose rows only their user's process reads
        and writes in training (row 0, the unknown id, excepted: GradientExchange exchanges it)."""
        m = self.model
        if self.world == 1 or not self.divided or m.shared:
            return []
        tables = [m.query_tower.ids] if m.query_tower.use_ids else []
        tables += [m.query_bias] if m.use_biases else []
        return [t.weight for t in tables if isinstance(t, torch.nn.Embedding)]

    def share_owned_rows(self) -> None:
        """After an epoch: every process's users' rows of the owned tables, and their rows of the id
        optimiser's state, written into every process, so each holds the whole model again (for validation's
        best weights, the checkpoint process 0 writes, and the model it saves), as if every row were exchanged."""
        if not self.owned:
            return
        if self.owned_rows is None:  # this process's users with training pairs: the rows it updates
            block = self.data.queries.block
            used = torch.nonzero(torch.bincount(self.data.train.query, minlength=block_len(block))).flatten()
            rows = torch.unique(block["id"].index_select(0, used))
            self.owned_rows = rows[rows != 0]
        tables = []
        for p in self.owned:
            tables.append(p.data)
            for opt in self.optimizers:
                tables += [t for t in opt.state.get(p, {}).values()
                           if isinstance(t, torch.Tensor) and t.shape == p.shape]
        share_rows(tables, self.owned_rows)

    def _penalty(self, tower: Tower, bias, ids: torch.Tensor, inv: torch.Tensor, rows: torch.Tensor | None,
                 bias_rows: torch.Tensor | None = None) -> torch.Tensor:
        """lambda/2 * (||row||^2 + b^2) / n_row for each pair's id row (row 0, the unknown id, is free).

        rows: the id rows the tower read for `ids` (Tower.encode; None without ids); bias_rows: their
        biases where the loss read them already, else they are read here. So no table is read twice and each
        gets one sparse gradient entry a lookup, not two to be added together.
        """
        total = None
        if rows is not None:
            total = SquaredNorms.apply(rows)
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
        qb = self.query_batch(idx, q_rows, c_rows)
        q_ids = m.query_tower.id_rows(qb)
        qe, q_id_rows, _ = m.query_tower.encode(qb, q_ids)
        columns = c_rows
        if self.extra:  # mixed negatives: items drawn uniformly, shared by the batch (Yang et al., WWW 2020)
            pick = torch.randint(len(self.warm_rows), (self.extra,), generator=self.negative_generator)
            columns = torch.cat([c_rows, self.warm_rows.index_select(0, pick)])
        cb = take(d.candidates.block, columns)
        c_ids = m.candidate_tower.id_rows(cb)
        c_enc = m.candidate_tower.encode(cb, c_ids)
        ce, c_id_rows = c_enc.vectors, c_enc.id_rows
        c_id_bias = m.candidate_bias_of(c_ids)
        cbias = whole_bias(c_id_bias, c_enc)
        log_q = None
        if self.log_q is not None:  # log of each column item's expected count among the columns
            share = self.log_q.index_select(0, columns).double().exp()
            log_q = torch.log(len(idx) * share + self.extra / len(self.warm_rows)).float()
        loss = blocked_in_batch_softmax_loss(qe, ce, cbias, columns, 1.0 / m.temperature, log_q)
        if train.target is not None:  # a label in [0, 1] scales its row; label 0 rows teach nothing here
            loss = loss * train.target.index_select(0, idx)
        if train.weight is not None:
            loss = loss * train.weight.index_select(0, idx)
        if self.lam > 0:  # the rows the towers read, the batch's own candidates' first (not the extra negatives)
            loss = loss + self._penalty(m.query_tower, m.query_bias if m.use_biases else None, q_ids, self.q_inv,
                                        q_id_rows)
            loss = loss + self._penalty(m.candidate_tower, m.candidate_bias if m.use_biases else None, c_ids[:len(idx)],
                                        self.c_inv, _leading(c_id_rows, len(idx)),
                                        _leading(c_id_bias, len(idx)) if m.use_biases else None)
        return loss.mean()

    def query_batch(self, idx: torch.Tensor, q_rows: torch.Tensor, c_rows: torch.Tensor) -> dict:
        """The query tower's input for pairs idx: the query entity's features, plus the pairs' context columns;
        a user's history bag leaves out the pair's own item, and with model.history_past_only every item from
        the pair's time on (history.py)."""
        qb = take(self.data.queries.block, q_rows)
        if HISTORY in qb:
            qb[HISTORY] = without_targets(qb[HISTORY], c_rows)
            if self.data.history_times is not None:
                qb[HISTORY] = before(qb[HISTORY], self.data.history_times.index_select(0, q_rows),
                                     self.data.train.time.index_select(0, idx))
        if self.data.train.context is not None:
            qb = qb | take(self.data.train.context, idx)
        return qb

    def own_random_state(self) -> dict:
        """What this process draws from that its peers do not share: its negatives' generator and the global one
        (id dropout). A checkpoint keeps every process's, so each resumes with its own (fit)."""
        return {"negatives": self.negative_generator.get_state(), "global": torch.get_rng_state()}

    def set_own_random_state(self, state: dict) -> None:
        self.negative_generator.set_state(state["negatives"])
        torch.set_rng_state(state["global"])

    def epoch_generator(self, epoch: int) -> torch.Generator:
        """What draws one epoch's order in this process when the log is divided: from the seed, the process
        and the epoch alone, so a resumed process draws the very order it was in."""
        return torch.Generator().manual_seed((self.cfg.run.seed * 1_000_003 + self.rank) * 1_000_003 + epoch)

    def batch_loss(self, idx: torch.Tensor) -> torch.Tensor:
        """Mean objective over one minibatch of training pairs (see module docstring)."""
        if self.softmax:
            return self.in_batch_loss(idx)
        if self.id_rows_only:
            return self.id_row_loss(idx)
        m, d, train = self.model, self.data, self.data.train
        q_rows, c_rows = train.query.index_select(0, idx), train.candidate.index_select(0, idx)
        qb = self.query_batch(idx, q_rows, c_rows)
        q_ids = m.query_tower.id_rows(qb)
        q_enc = m.query_tower.encode(qb, q_ids)
        qe, q_id_rows = q_enc.vectors, q_enc.id_rows
        b = len(idx)
        if self.n_neg:
            c_rows = torch.cat([c_rows, self.sampler(b * self.n_neg)])
        cb = take(d.candidates.block, c_rows)
        c_ids = m.candidate_tower.id_rows(cb)
        c_enc = m.candidate_tower.encode(cb, c_ids)
        ce, c_id_rows = c_enc.vectors, c_enc.id_rows
        scale = 1.0 / m.temperature
        q_id_bias = m.query_bias_of(q_ids)
        qbias = whole_bias(q_id_bias, q_enc)  # a shared tower's queries are items: their feature bias too
        c_id_bias = m.candidate_bias_of(c_ids)
        cbias = whole_bias(c_id_bias, c_enc)
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
            loss = loss + self._penalty(m.query_tower, qbias_t, q_ids, self.q_inv, q_id_rows,
                                        q_id_bias if m.use_biases else None)
            loss = loss + self._penalty(m.candidate_tower, cbias_t, c_ids[:b], self.c_inv, _leading(c_id_rows, b),
                                        _leading(c_id_bias, b) if m.use_biases else None)
        return loss.mean()

    def id_row_loss(self, idx: torch.Tensor) -> torch.Tensor:
        """batch_loss for a model whose towers both output their id rows, through IdRowObjective."""
        m, d, train = self.model, self.data, self.data.train
        b = len(idx)
        if self.pair_q_ids is not None:
            q_codes, c_codes = self.pair_q_ids.index_select(0, idx), self.pair_c_ids.index_select(0, idx)
        else:  # pairs on disk: no copy of their length in memory
            q_codes = d.queries.block["id"].index_select(0, train.query.index_select(0, idx))
            c_codes = d.candidates.block["id"].index_select(0, train.candidate.index_select(0, idx))
        if self.n_neg:
            c_codes = torch.cat([c_codes, d.candidates.block["id"].index_select(0, self.sampler(b * self.n_neg))])
        q_ids = m.query_tower.id_rows({"id": q_codes})
        c_ids = m.candidate_tower.id_rows({"id": c_codes})
        q, c = m.query_tower.ids(q_ids), m.candidate_tower.ids(c_ids)
        g = m.global_bias if m.use_biases else torch.zeros(())
        y = train.target.index_select(0, idx) if train.target is not None else None
        w = train.weight.index_select(0, idx) if train.weight is not None else None
        pq = pc = None
        if self.lam > 0:
            pq = self.lam * self.q_inv.index_select(0, q_ids)
            pc = self.lam * self.c_inv.index_select(0, c_ids[:b])
        loss = IdRowObjective.apply(q, c, m.query_bias_of(q_ids), m.candidate_bias_of(c_ids), g, y, w, pq, pc,
                                     1.0 / m.temperature, self.n_neg, self.logistic)
        return loss.mean()

    def objective(self) -> float:
        """The full objective J over all training pairs, without dropout (sampled negatives excluded)."""
        keep_neg = self.n_neg
        self.n_neg = 0
        self.model.eval()
        with torch.no_grad():
            n = len(self.data.train)
            step = self.tcfg.batch_size if self.softmax else 65536  # softmax: batches as in training
            total = sum(float(self.batch_loss(torch.arange(i, min(n, i + step)))) * min(step, n - i)
                        for i in range(0, n, step))
            dense = sum(float(p.pow(2).sum()) for p in self.model.dense_parameters())
        self.model.train()
        self.n_neg = keep_neg
        return total / n + 0.5 * self.tcfg.weight_decay * dense

    def run_epoch(self, epoch: int, bar: bool, order: Shuffled | Windowed | None = None, start_step: int = 0,
                  done_loss: float = 0.0) -> float:
        """One pass over the shuffled training pairs; returns the mean batch loss.

        order/start_step/done_loss continue an epoch that was interrupted part-way. A stop request
        (Ctrl-C) is honoured between steps, never inside one, so the saved state is consistent.
        """
        self.model.train()
        n = len(self.data.train)
        bs = self.tcfg.batch_size
        if self.divided:  # each process its own order of its own pairs, drawn again on resume (checkpoints are process 0's)
            order = draw_order(n, self.tcfg, bool(self.cfg.run.spill_folder), self.epoch_generator(epoch))
        elif order is None:  # a new epoch: its own order (order.py)
            order = draw_order(n, self.tcfg, bool(self.cfg.run.spill_folder), self.generator)
        steps = math.ceil(n / bs)
        if self.divided:  # every process takes as many steps as the one with the most pairs needs at bs / N a step
            steps = math.ceil(largest(n) * self.world / bs)
        progress = tqdm(total=n, initial=min(n, start_step * bs), desc=f"{self.label} epoch {epoch}", unit="pairs",
                        leave=False, file=sys.stderr, disable=not bar, mininterval=0.5)
        start, total = time.perf_counter(), done_loss
        for s in range(start_step, steps):
            if self.stop.requested:
                progress.close()
                raise Interrupted(epoch, s, order, total)
            # divided: its own pairs cut into `steps` batches as even as can be
            idx = order.span(s * n // steps, (s + 1) * n // steps) if self.divided else order.batch(s, bs)
            if self.world > 1 and not self.divided:  # this process's share of the global batch (distributed.py)
                idx = idx[self.rank::self.world]
            # a process with no pairs this step (fewer than steps) has no gradient but still joins the exchange
            loss = self.batch_loss(idx) if len(idx) else None
            if loss is not None and not torch.isfinite(loss):
                progress.close()
                raise TrainingDiverged(
                    f"training diverged at {self.label} epoch {epoch}, step {s + 1} (loss {float(loss.detach())}); no model "
                    "was written; lower training.learning_rate / id_learning_rate, or raise weight_decay / id_l2")
            if self.scheduled:
                set_rates(self.optimizers, self.base_rates,
                          rate_factor(self.tcfg, (epoch - 1) * steps + s, self.tcfg.epochs * steps))
            for opt in self.optimizers:
                opt.zero_grad(set_to_none=True)
            if loss is not None:
                loss.backward()
            if self.exchange is not None:
                self.exchange()
            for opt in self.optimizers:
                opt.step()
            if loss is None:
                continue
            total += float(loss.detach()) * len(idx)
            progress.update(len(idx))
            if bar and s % 20 == 0:
                rate = (progress.n - progress.initial) / max(1e-9, time.perf_counter() - start)
                progress.set_postfix(loss=f"{float(loss.detach()):.4f}", pairs_s=f"{rate:,.0f}")
        progress.close()
        self.last_rate = (n - min(n, start_step * bs)) / max(1e-9, time.perf_counter() - start)
        if self.divided:  # every process's pairs over this epoch's time: the rate of the whole run, as in one process
            self.last_rate = summed(self.last_rate)
            return mean_over_processes(total / max(1, n))
        if self.world > 1:
            return mean_over_processes(total * self.world / n)
        return total / n


def _leading(t: torch.Tensor | None, n: int) -> torch.Tensor | None:
    """The first n rows of t: the batch's own pairs, before any extra negatives drawn for the whole batch."""
    if t is None or len(t) == n:
        return t
    return t.split([n, len(t) - n])[0]


class Interrupted(Exception):
    """Raised between steps after a stop request, carrying the position to resume from."""

    def __init__(self, epoch: int, step: int, order: Shuffled | Windowed, loss_so_far: float):
        super().__init__(f"interrupted at epoch {epoch}, step {step}")
        self.epoch, self.step, self.order, self.loss_so_far = epoch, step, order, loss_so_far


def fit(model: TwoTowerModel, data: Prepared, cfg: Config, checkpoint_dir: Path | None, label: str,
        resume: bool = False, on_round: Callable[[int, float | None], None] | None = None) -> TrainResult:
    """Train with validation every epoch, early stopping, and best/last checkpoints.

    checkpoint_dir/last.pt holds everything needed to continue exactly (weights, optimiser state,
    random-number state, position in the epoch); best.pt holds the best weights so far. With
    resume=True an existing last.pt is continued, and a finished one is simply loaded. on_round(epoch,
    validation value) is called after each epoch (`EarlyStopping.on_round`); an exception it raises
    ends training there.
    """
    trainer = Trainer(model, data, cfg, label)
    tcfg = cfg.training
    bar = show_bar(tcfg.progress)
    result = TrainResult(stop_metric=cfg.stop_metric)
    stopping = EarlyStopping(result, tcfg.patience, label, "epoch", tcfg.epochs, on_round=on_round)
    epoch, order, start_step, done_loss = 1, None, 0, 0.0
    last_path = checkpoint_dir / "last.pt" if checkpoint_dir is not None else None

    def save(finished: bool, position: tuple | None = None) -> None:
        # several processes: each one's own random state, gathered where every process saves (an epoch's end, the
        # finish); a step interrupted part-way keeps only this process's, as its peers may be gone already
        per_process = None
        if trainer.world > 1:
            per_process = [trainer.own_random_state()] if position else gather_objects(trainer.own_random_state())
        if last_path is None:
            return
        ep, step, p, lsf = position if position else (epoch, 0, None, 0.0)
        state = {"format": "towers-checkpoint", "version": 1, "label": label, "finished": finished,
                 "epoch": ep, "step": step, "loss_so_far": lsf, "stale": stopping.stale,
                 "best_value": result.best_value, "best_epoch": result.best_epoch, "history": result.history,
                 # written as they are, not copied first (one copy of the weights less at each save); once
                 # finished the model holds the best weights, so both keys share one set of tensors in the file
                 "model": result.best_state if finished and result.best_state is not None else model.state_dict(),
                 "best_model": result.best_state,
                 "optimizers": [o.state_dict() for o in trainer.optimizers],
                 "generator": trainer.generator.get_state(), "global_rng": torch.get_rng_state()}
        if p is not None:
            state["perm"] = p.saved()  # the epoch's order: a permutation, or what draws a windowed one
        if per_process is not None:
            state["process_random"] = per_process
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
        per_process = st.get("process_random")
        if trainer.world > 1 and per_process is not None and len(per_process) == trainer.world:
            trainer.set_own_random_state(per_process[trainer.rank])
        elif trainer.world > 1:
            log(f"{label}: the checkpoint holds the random state of {len(per_process or [1])} process(es), not "
                f"{trainer.world}; each process draws its id dropout and negatives afresh, so the run will not end "
                "with the weights of an uninterrupted one")
        result.history, result.best_value, result.best_epoch = st["history"], st["best_value"], st["best_epoch"]
        result.best_state, stopping.stale = st["best_model"], st["stale"]
        epoch, start_step, order, done_loss = st["epoch"], st["step"], restore(st.get("perm")), st["loss_so_far"]
        if st["finished"]:
            stopping.restore_best(model)
            log(f"{label}: already trained in the interrupted run; loaded its best weights")
            return result
        log(f"{label}: resuming at epoch {epoch}" + (f", step {start_step}" if start_step else ""))

    with trainer.stop:
        while epoch <= tcfg.epochs:
            try:  # a peer process gone surfaces from the collectives as peer_failure's line (collective.py)
                loss = trainer.run_epoch(epoch, bar, order, start_step, done_loss)
            except Interrupted as stop:
                save(False, (stop.epoch, stop.step, stop.order, stop.loss_so_far))
                raise TrainingInterrupted(f"{label} training interrupted at epoch {stop.epoch}, step {stop.step}; "
                                          "checkpoint written") from None
            order, start_step, done_loss = None, 0, 0.0
            trainer.share_owned_rows()
            finished = stopping.after_round(model, data, cfg, epoch, loss, trainer.last_rate, checkpoint_dir)
            epoch += 1
            if finished:
                break
            save(False)
    stopping.restore_best(model)
    save(True)
    result.best_state = None  # in the model now, and in the finished checkpoint: a copy of the weights less to hold
    return result
