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
