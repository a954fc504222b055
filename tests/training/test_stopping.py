"""Early stopping's end-of-training note: a best round that is the last one run says more rounds may help."""

import torch

from towers.training.stopping import EarlyStopping, TrainResult


def _history(values):
    return [{"epoch": e, "loss": 1.0, "pairs_per_s": 1.0, "valid_recall@20": v} for e, v in enumerate(values, 1)]


def test_best_last_round_warns(capsys):
    result = TrainResult(history=_history([0.1, 0.2, 0.3]), best_epoch=3, stop_metric="recall@20")
    assert result.still_improving
    EarlyStopping(result, patience=3, label="towers", rounds=3).restore_best(torch.nn.Linear(1, 1))
    err = capsys.readouterr().err
    assert "best epoch was the last one run (3)" in err and "training.epochs" in err


def test_earlier_best_or_no_validation_is_quiet(capsys):
    earlier = TrainResult(history=_history([0.1, 0.3, 0.2]), best_epoch=2, stop_metric="recall@20")
    unvalidated = TrainResult(history=[{"epoch": 1, "loss": 1.0, "pairs_per_s": 1.0}], best_epoch=1)
    assert not earlier.still_improving and not unvalidated.still_improving
    for result in (earlier, unvalidated):
        EarlyStopping(result, patience=3, label="towers", rounds=3).restore_best(torch.nn.Linear(1, 1))
    assert "warning" not in capsys.readouterr().err


def test_a_finished_checkpoint_holds_the_best_weights_once(tiny_runs):
    # once finished the model holds the best weights: the file keeps one set of tensors under both keys
    # (torch.save writes a storage shared by two entries once; torch.load gives it back shared)
    run = tiny_runs.train()
    state = torch.load(run / "checkpoints" / "last.pt", weights_only=True)
    assert state["finished"] and state["model"].keys() == state["best_model"].keys()
    for name, tensor in state["model"].items():
        best = state["best_model"][name]
        assert tensor.untyped_storage().data_ptr() == best.untyped_storage().data_ptr(), name
    weights = torch.load(run / "model.pt", weights_only=True)["state_dict"]
    assert all(torch.equal(weights[name], state["best_model"][name]) for name in weights)
