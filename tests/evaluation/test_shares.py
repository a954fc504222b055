"""Evaluation divided among processes (towers/evaluation/shares.py, HeldOut.part): every process must end with
the very counts and metrics one process computes.

The processes are stood in for by threads whose `gather` is a barrier exchange, so the collective's
semantics (everyone sends, everyone receives every piece in rank order) hold without starting
processes; tests/training/test_split_validation.py runs the same over real gloo processes.
"""

from __future__ import annotations

import threading
from concurrent.futures import ThreadPoolExecutor
from functools import partial

import numpy as np
import pytest
import torch

from towers.data.pairs import Pairs
from towers.evaluation.protocol import held_out, popularity_scorer, rank_positives, ranking_metrics, sample_keys
from towers.evaluation.shares import Share
from towers.search.scorer import Scorer


def as_processes(world: int, work):
    """work(share) for each of `world` stand-in processes (threads), gathering through a barrier; results by rank."""
    sent: list = [None] * world
    barrier = threading.Barrier(world, timeout=60)  # a broken exchange fails instead of hanging

    def gather_for(rank: int):
        def gather(part: torch.Tensor) -> list[torch.Tensor]:
            sent[rank] = part
            barrier.wait()
            pieces = list(sent)
            barrier.wait()  # nobody sends the next piece before everyone has read this one
            return pieces
        return gather

    with ThreadPoolExecutor(world) as pool:
        return list(pool.map(lambda r: work(Share(r, world, gather_for(r))), range(world)))


def _problem(seed: int = 5):
    g = torch.Generator().manual_seed(seed)
    nq, ni, k = 37, 90, 4
    vectors = Scorer(torch.randn(nq, k, generator=g), torch.randn(ni, k, generator=g), torch.randn(nq, generator=g),
                     torch.randn(ni, generator=g), 0.25, 1.5)
    train = Pairs(torch.randint(0, nq, (400,), generator=g), torch.randint(0, ni, (400,), generator=g))
    test = Pairs(torch.randint(0, nq, (260,), generator=g), torch.randint(0, ni, (260,), generator=g))
    mask = torch.ones(ni, dtype=torch.bool)
    mask[:7] = False
    # popularity ties many items, so the tied counts matter too
    return {"vectors": vectors, "popularity": popularity_scorer(train, nq, ni, explicit=False)}, train, test, mask


@pytest.mark.parametrize("world", [2, 3, 40])  # 40: more processes than queries, so some rank nothing
@pytest.mark.parametrize("model", ["vectors", "popularity"])
def test_every_process_gets_the_one_process_counts(world, model):
    scorers, train, test, mask = _problem()
    h = held_out(test, train, mask, seed=1, max_queries=30)
    assert len(h.queries) == 30 and len(h.q_index) > len(h.queries)  # several positives a query
    whole = rank_positives(scorers[model], h)  # reference: the one-process counts (held to brute force in test_protocol.py)
    for got in as_processes(world, lambda share: rank_positives(scorers[model], h, share)):
        for a, b in zip(got, whole):
            assert torch.equal(a, b)


def test_shares_cover_every_query_once():
    _, train, test, mask = _problem()
    h = held_out(test, train, mask)
    parts = [h.part(Share(r, 3, None)) for r in range(3)]
    assert sorted(torch.cat([p.queries for p in parts]).tolist()) == h.queries.tolist()
    assert sum(len(p.q_index) for p in parts) == len(h.q_index)
    assert sum(len(p.ex_rows) for p in parts) == len(h.ex_rows)
    for p in parts:  # exclusions stay sorted by row and point at rows of the share
        assert torch.equal(p.ex_rows, torch.sort(p.ex_rows).values) and int(p.ex_rows.max()) < len(p.queries)


@pytest.mark.parametrize("world", [2, 3])
def test_ranking_metrics_divided_equal_one_process_exactly(world):
    scorers, train, test, mask = _problem(8)
    for scorer in scorers.values():
        rank = partial(ranking_metrics, scorer, test, train, mask, [5, 10], tie_seed=3, max_queries=31)
        one = rank()  # reference: one process
        for got in as_processes(world, lambda share, rank=rank: rank(share=share)):
            assert got == one  # exact: the same counts give the same floats


def test_sample_keys_are_splitmix64():
    # source: SplitMix64 (Steele, Lea & Flood, OOPSLA 2014) started from state 0 first returns 0xE220A8397B1DCDAF
    # (from memory); sample_keys mixes row + (seed + 7) * the golden gamma, so row 0 with seed -6 is that state
    assert int(sample_keys(torch.tensor([0]), -6)[0]) == 0xE220A8397B1DCDAF
    keys = sample_keys(torch.arange(100_000), 3)
    assert len(np.unique(keys)) == 100_000  # a bijection: no two rows share a key


@pytest.mark.parametrize("world", [2, 3])
def test_divided_log_samples_the_one_process_queries(world):
    """Each process holds only its own users' pairs (rows mod world here); the sample of 30 queries they
    draw together is the one-process sample, and the ranking metrics equal its (the queries joined in
    another order, so the means may differ in the last bit)."""
    scorers, train, test, mask = _problem(8)
    one = held_out(test, train, mask, seed=1, max_queries=30)

    def own(p: Pairs, r: int) -> Pairs:
        keep = p.query % world == r
        return Pairs(p.query[keep], p.candidate[keep])

    def work(share):
        s = Share(share.rank, world, share.gather, divided=True)
        mine = held_out(own(test, s.rank), own(train, s.rank), mask, seed=1, max_queries=30, share=s)
        got = ranking_metrics(scorers["vectors"], own(test, s.rank), own(train, s.rank), mask, [5, 10], tie_seed=1,
                              max_queries=30, share=s)
        return (mine.queries if mine is not None else torch.zeros(0, dtype=torch.int64)), got

    parts = as_processes(world, work)
    assert sorted(torch.cat([q for q, _ in parts]).tolist()) == one.queries.tolist()
    whole = ranking_metrics(scorers["vectors"], test, train, mask, [5, 10], tie_seed=1, max_queries=30)
    for _, got in parts:
        assert got == pytest.approx(whole, rel=1e-12)
