"""What a run holds while it evaluates: each trained model is saved and exported first and then let go, so
its tables (the users' id table the largest) are not held beside the evaluation's rankings. Common
practice (free what is written; no outside source). The reference for "let go": a weak reference to each
model the run builds, dead once nothing holds the model.
"""

from __future__ import annotations

import gc
import weakref

import pytest

import towers.runs.train as T

pytestmark = pytest.mark.slow  # a tiny training run


def test_no_trained_model_is_held_while_the_run_evaluates(tiny_runs, tmp_path, monkeypatch):
    built: list[weakref.ref] = []
    alive_at_evaluation: list[int] = []
    build, baseline, evaluate = T.build_model, T.baseline_model, T.evaluate_slices

    def build_model(*args, **kwargs):
        model = build(*args, **kwargs)
        built.append(weakref.ref(model))
        return model

    def baseline_model(*args, **kwargs):
        model, preset = baseline(*args, **kwargs)
        built.append(weakref.ref(model))
        return model, preset

    def evaluate_slices(*args, **kwargs):
        gc.collect()
        alive_at_evaluation.append(sum(ref() is not None for ref in built))
        return evaluate(*args, **kwargs)

    monkeypatch.setattr(T, "build_model", build_model)
    monkeypatch.setattr(T, "baseline_model", baseline_model)
    monkeypatch.setattr(T, "evaluate_slices", evaluate_slices)
    config = tiny_runs.config(tmp_path, evaluation={"baseline": True})
    T.train_run(config, tmp_path / "run")
    assert len(built) == 2  # the towers and the linear factor model
    assert alive_at_evaluation == [0]
    for folder in (tmp_path / "run", tmp_path / "run" / "linear_factor"):  # both saved and exported before
        assert (folder / "model.pt").is_file() and (folder / "user_embeddings.parquet").is_file()
