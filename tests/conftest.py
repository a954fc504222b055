"""Fixtures shared by the whole suite: generated data, tiny trained runs, and torch's thread count.

Session fixtures are read-only by convention: every test that writes (a damaged copy of a run, an
aligned run, a CSV of its own) writes under its own tmp_path or a tmp_path_factory folder, never into
a shared store or a cached run.
"""

from __future__ import annotations

import json
import os
from pathlib import Path

import pytest
import torch
import yaml

import towers
import towers.search.tiles as T
from towers.cli import main as cli
from towers.synthetic.demo_store import generate_store
from towers.synthetic.planted import generate_explicit, generate_implicit

from .sizes import PLANTED_EXPLICIT, PLANTED_IMPLICIT, SMALL_STORE

ROOT = Path(__file__).resolve().parents[1]
THREADS = torch.get_num_threads()  # the session's thread count, before any test or training changed it

# a tiny run: small towers, one epoch, one thread; enough for every check that is not about accuracy
TINY = {"run": {"threads": 1}, "model": {"dim": 8, "hidden": [16]},
        "training": {"epochs": 1, "batch_size": 512}}


# ---------------------------------------------------------------- torch threads

@pytest.fixture(autouse=True)
def _restore_threads():
    """Every test starts and ends with the session's thread count, whatever training (run.threads) set."""
    torch.set_num_threads(THREADS)
    yield
    torch.set_num_threads(THREADS)


@pytest.fixture
def one_thread():
    """torch on one thread: tiny problems, where more threads only add overhead on a shared machine."""
    torch.set_num_threads(1)


@pytest.fixture
def two_threads():
    """torch on two threads (blocked searches and counts then run on two worker threads)."""
    torch.set_num_threads(2)


@pytest.fixture(params=[(1 << 22, 2048), (1 << 10, 64), (1 << 12, 48), (1 << 9, 16)],
                ids=["default", "small-tiles", "odd-tiles", "one-group-tiles"])
def count_tiles(request, monkeypatch):
    """Rank counting over the default tiles, and over tiles small enough that every case runs many blocks
    and chunks (towers/search/tiles.py)."""
    entries, sub_tile = request.param
    monkeypatch.setattr(T, "BLOCK_ENTRIES", entries)
    monkeypatch.setattr(T, "SUB_TILE", sub_tile)


# ---------------------------------------------------------------- generated data

class Stores:
    """The demo stores of the session, each generated on first use."""

    def __init__(self, tmp_path_factory):
        self._factory = tmp_path_factory
        self._made: dict[str, Path] = {}

    def get(self, size: str) -> Path:
        """The folder of the "small" or the "default" store."""
        if size not in self._made:
            if size == "default":
                out = self._factory.mktemp("demo_store") / "demo_data"
                assert cli(["demo-data", "--out", str(out)]) == 0
            else:
                out = self._factory.mktemp("small_store")
                generate_store(out, **SMALL_STORE)
            self._made[size] = out
        return self._made[size]


@pytest.fixture(scope="session")
def stores(tmp_path_factory) -> Stores:
    return Stores(tmp_path_factory)


@pytest.fixture(scope="session")
def demo_store(stores) -> Path:
    """The demo store at its default size (the data scripts/demo uses), written by `towers demo-data`."""
    return stores.get("default")


@pytest.fixture(scope="session")
def small_store(stores) -> Path:
    """A small demo store (200 items, 300 customers, 20 new arrivals) with every file of the default one."""
    return stores.get("small")


@pytest.fixture(scope="session")
def planted_explicit(tmp_path_factory) -> Path:
    """Planted ratings, rank 2 plus noise 0.5 (towers/synthetic/planted.py), at test size."""
    out = tmp_path_factory.mktemp("planted_explicit") / "data"
    generate_explicit(out, seed=3, **PLANTED_EXPLICIT)
    return out


@pytest.fixture(scope="session")
def planted_implicit(tmp_path_factory) -> Path:
    """Planted events drawn by a rank-3 softmax (towers/synthetic/planted.py), at test size."""
    out = tmp_path_factory.mktemp("planted_implicit") / "data"
    generate_implicit(out, seed=3, **PLANTED_IMPLICIT)
    return out


# ---------------------------------------------------------------- tiny runs

class TinyRuns:
    """Configs from the shipped ones, pointed at a generated store, and runs trained from them.

    `config` writes a YAML file; `train` trains it once per session for each distinct request and
    hands every later identical request the same finished run folder (read-only by convention).
    """

    def __init__(self, stores: Stores, tmp_path_factory):
        self._stores = stores
        self._factory = tmp_path_factory
        self._trained: dict[str, Path] = {}

    def settings(self, config: str = "store_baskets.yaml", store: str = "small", tiny: bool = True,
                 oracle: bool = True, relative_to: Path | None = None, **sections) -> dict:
        """The shipped `config` with its data paths on `store` (relative to `relative_to` if given), its
        oracle kept (unless oracle=False), TINY settings (unless tiny=False), and then `sections`
        ({section: {key: value}}) on top."""
        cfg = yaml.safe_load((ROOT / "configs" / config).read_text(encoding="utf-8"))
        data = self._stores.get(store)

        def where(path: str) -> str:
            target = data / Path(path).relative_to("../demo_data")
            return os.path.relpath(target, relative_to) if relative_to else str(target)

        cfg["interactions"]["path"] = where(cfg["interactions"]["path"])
        for side in ("users", "items"):
            if side in cfg:
                cfg[side]["path"] = where(cfg[side]["path"])
        for key in ("oracle_users", "oracle_items"):
            if key in cfg["evaluation"]:
                cfg["evaluation"][key] = where(cfg["evaluation"][key]) if oracle else None
        cfg["training"]["progress"] = "plain"
        for section, keys in (TINY if tiny else {}).items():
            cfg.setdefault(section, {}).update(keys)
        for section, keys in sections.items():
            cfg.setdefault(section, {}).update(keys)
        return cfg

    def config(self, folder: Path | None = None, name: str = "config.yaml", **options) -> Path:
        """`settings(**options)` written as `folder / name` (a fresh folder if none is given)."""
        folder = folder or self._factory.mktemp("config")
        path = Path(folder) / name
        path.write_text(yaml.safe_dump(self.settings(**options)), encoding="utf-8")
        return path

    def search_config(self, name: str) -> Path:
        """A tiny config for the search commands (sweep, tune) in a fresh folder `name`: data paths relative
        to that folder (the best config they write elsewhere must fix them), no oracle or cold items, two
        short epochs, no report."""
        base = self._factory.mktemp(name)
        return self.config(base, relative_to=base, oracle=False, evaluation={"cold_item_fraction": 0.0},
                           training={"epochs": 2, "batch_size": 256, "patience": 10}, report={"enabled": False})

    def train(self, **options) -> Path:
        """The run folder of `towers.train` on `config(**options)`, trained once per session."""
        key = json.dumps(options, sort_keys=True, default=str)
        if key not in self._trained:
            folder = self._factory.mktemp("tiny_run")
            towers.train(self.config(folder, **options), folder / "run")
            self._trained[key] = folder / "run"
        return self._trained[key]


@pytest.fixture(scope="session")
def tiny_runs(stores, tmp_path_factory) -> TinyRuns:
    """The factory of tiny configs and runs (TinyRuns), shared by the whole session."""
    return TinyRuns(stores, tmp_path_factory)
