"""towers tune: the search space, the per-epoch report and its pruning, the study's bookkeeping, and a tiny
study end to end (best.yaml, the tables, resuming)."""

from __future__ import annotations

import csv
import json
import math
import re
from pathlib import Path

import optuna
import pytest
import yaml
from optuna.trial import TrialState

from towers import config as C
from towers.cli import main as cli
from towers.errors import TowersError
from towers.runs import tune as T
from towers.runs import tune_space as S
from towers.runs.train import train_run
from towers.runs.tune import Control, EpochReport, TrialCut, run_tune

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # reference: PNG specification (ISO/IEC 15948), section 5.2


def _config(**sections) -> C.Config:
    """A resolved config without data files (resolving checks keys and rules, not files)."""
    raw = {"interactions": {"path": "log.csv", "query_column": "user", "candidate_column": "item"},
           "items": {"path": "items.csv", "id_column": "item", "features": [{"name": "kind", "kind": "categorical"}]}}
    for section, keys in sections.items():
        raw.setdefault(section, {}).update(keys)
    return C.resolve(raw, Path("/data"))


def _draw(base: C.Config, n: int = 60) -> list[dict]:
    """n points drawn at random (optuna's RandomSampler) from the space for `base`."""
    study = optuna.create_study(sampler=optuna.samplers.RandomSampler(seed=5))
    return [S.suggest(study.ask(), base) for _ in range(n)]


def _inside(value, r: S.Range) -> bool:
    whole = isinstance(value, int) and not isinstance(value, bool)
    return (whole if r.integer else isinstance(value, float)) and r.low <= value <= r.high


@pytest.mark.parametrize("sections, negatives, normalize_searched, history", [
    ({"training": {"loss": "softmax"}}, "softmax", True, True),
    ({"training": {"loss": "logistic"}}, "logistic", True, True),
    ({"training": {"loss": "squared"}, "interactions": {"target_column": "stars"}}, None, False, True),
    ({"training": {"loss": "softmax"}, "run": {"mode": "item_item"}}, "softmax", True, False),
])
def test_space_keeps_its_ranges_and_the_run_mode(sections, negatives, normalize_searched, history):
    base = _config(**sections)
    points = _draw(base)
    for values in points:
        for key, value in values.items():
            if key in ("model.normalize", "model.feature_bias"):
                assert isinstance(value, bool)
            elif key == "model.history_length" and value == 0:
                pass  # the switch off: the config's own 0
            else:
                r = S._range(key, negatives if key == "training.negatives" else None)
                assert _inside(value, r), (key, value, r)
        assert ("training.negatives" in values) == (negatives is not None)
        assert ("model.normalize" in values) == normalize_searched
        assert ("model.temperature" in values) == bool(values.get("model.normalize", base.model.normalize))
        assert ("model.history_length" in values) == history  # item_item runs have no history
        assert ("model.feature_bias" in values) == bool(base.items.features)  # it acts on item features only
        assert set(values) <= set(S.searched_keys(base))
        changed = yaml.safe_load(C.dump(base))
        for section, keys in S.overrides(values).items():
            changed[section].update(keys)
        C.resolve(changed, Path("/data"))  # every point is a valid config (the config's own checks)
    # the draws cover each range: reference, a brute-force look at the extremes of 60 log-uniform draws
    dims = [v["model.dim"] for v in points]
    assert min(dims) < 12 and max(dims) > 90
    if history:
        assert {v["model.history_length"] == 0 for v in points} == {True, False}


def test_squared_loss_searches_the_temperature_only_when_the_config_normalizes():
    plain = _config(training={"loss": "squared"}, interactions={"target_column": "stars"})
    normed = _config(training={"loss": "squared"}, interactions={"target_column": "stars"}, model={"normalize": True})
    assert all("model.temperature" not in v for v in _draw(plain, 20))
    assert all(0.02 <= v["model.temperature"] <= 1.0 for v in _draw(normed, 20))


def test_every_range_is_log_scale_ready_and_explained():
    for r in S.RANGES:
        assert 0 < r.low < r.high and r.why and r.when  # log scales need low > 0
        if r.integer:
            assert float(r.low).is_integer() and float(r.high).is_integer()
    keys = {r.key for r in S.RANGES}
    assert keys == {"model.dim", "training.id_l2", "training.weight_decay", "training.learning_rate",
                    "training.batch_size", "training.negatives", "model.temperature", "model.history_length",
                    "model.history_decay"}


# ---------------------------------------------------------------- the per-epoch report and pruning

def _study(direction: str = "maximize"):
    return optuna.create_study(direction=direction, pruner=T._pruner(), sampler=optuna.samplers.RandomSampler(seed=0))


def _run(study, values: list[float], last_epoch: int = 10, deadline: float = math.inf, control=None):
    """Feed a fake validation sequence through EpochReport; returns (what it raised or None, the report)."""
    trial = study.ask()
    report = EpochReport(trial, "recall@20" if study.direction.name == "MAXIMIZE" else "rmse", last_epoch, deadline,
                         control)
    for epoch, value in enumerate(values, start=1):
        try:
            report(epoch, value)
        except (optuna.TrialPruned, TrialCut) as exc:
            study.tell(trial, state=TrialState.PRUNED)
            return exc, report
    study.tell(trial, report.best)
    return None, report


def test_successive_halving_prunes_a_poor_trial_at_the_first_rung():
    # reference: asynchronous successive halving (Li et al., MLSys 2020) with reduction factor 3, rungs at epochs
    # 2, 6, 18: at a rung a trial goes on only among the top len(values there) // 3 (at least the top one)
    study = _study()
    for good in ([0.20, 0.30, 0.31, 0.32, 0.33], [0.22, 0.31, 0.33, 0.34, 0.35], [0.21, 0.32, 0.33, 0.34, 0.35]):
        assert _run(study, good)[0] is None  # each is the best at epoch 2 so far; none reaches epoch 6
    raised, report = _run(study, [0.05, 0.08, 0.50, 0.60])  # 4 values at epoch 2: only the top 1 goes on
    assert isinstance(raised, optuna.TrialPruned) and report.epochs == 2
    assert study.trials[-1].intermediate_values == {1: 0.05, 2: 0.08}
    raised, report = _run(study, [0.25, 0.40, 0.41, 0.42, 0.43, 0.44, 0.45])  # the top one at epoch 2 goes on,
    assert raised is None and report.epochs == 7  # and is alone at epoch 6
    raised, report = _run(study, [0.30, 0.41, 0.41, 0.41, 0.41, 0.41, 0.41])  # second best at epoch 6 of 2 there
    assert isinstance(raised, optuna.TrialPruned) and report.epochs == 6


def test_the_report_is_the_best_value_so_far_in_the_metrics_direction():
    study = _study("minimize")
    _, report = _run(study, [1.2, 0.9, 1.1, 0.95])
    assert study.trials[0].intermediate_values == {1: 1.2, 2: 0.9, 3: 0.9, 4: 0.9}
    assert report.best == 0.9
    study = _study()
    _, report = _run(study, [0.3, None, 0.2])  # an epoch without validation is not reported
    assert study.trials[0].intermediate_values == {1: 0.3, 3: 0.3}


def test_time_budget_and_ctrl_c_cut_a_trial_but_not_after_its_last_epoch():
    raised, report = _run(_study(), [0.1, 0.2, 0.3], last_epoch=3, deadline=0.0)
    assert isinstance(raised, TrialCut) and raised.why == "time budget" and report.epochs == 1
    assert _run(_study(), [0.1], last_epoch=1, deadline=0.0)[0] is None  # the last epoch: let it finish
    control = Control()
    control.presses = 2
    raised, _ = _run(_study(), [0.1, 0.2], control=control)
    assert isinstance(raised, TrialCut) and raised.why == "interrupted"


def test_ctrl_c_presses_finish_then_cut_then_quit():
    said, forwarded = [], []
    control = Control()
    control.forward = lambda: forwarded.append(1)
    control.press(said.append)
    assert control.stop_after_trial and not control.abandon
    control.press(said.append)
    assert control.abandon
    with pytest.raises(KeyboardInterrupt):
        control.press(said.append)
    assert len(forwarded) == 3 and "stopping after the running trial" in said[0]


# ---------------------------------------------------------------- the study's bookkeeping

@pytest.mark.slow  # about a second: SQLite and optuna's schema set-up
def test_a_study_refuses_another_config_and_queues_a_killed_trial_again(tmp_path):
    base = _config(training={"loss": "softmax"})
    study = T._open_study(tmp_path, base, tmp_path / "c.yaml", base.stop_metric)
    assert (tmp_path / T.STUDY_FILE).stat().st_mode & 0o777 == 0o600
    trial = study.ask()
    values = S.suggest(trial, base)  # left running, as if the process had been killed
    study = T._open_study(tmp_path, base, tmp_path / "c.yaml", base.stop_metric)
    states = [t.state for t in study.get_trials()]
    assert states == [TrialState.FAIL, TrialState.WAITING]
    again = study.ask()
    assert S.suggest(again, base) == values and again.user_attrs["retry_of"] == 0
    assert T._counted(study) == 1  # the interrupted one does not count toward --trials
    other = _config(training={"loss": "softmax", "epochs": 7})
    with pytest.raises(TowersError, match=r"different config \(training\.epochs: 20 then, 7 now\); give the tune a new --out"):
        T._open_study(tmp_path, other, tmp_path / "c.yaml", other.stop_metric)
    threads_only = _config(training={"loss": "softmax", "progress": "bar"}, run={"threads": 3})
    T._open_study(tmp_path, threads_only, tmp_path / "c.yaml", base.stop_metric)  # speed settings are not the config


@pytest.mark.parametrize("minutes, trials, jobs, message", [
    (0, None, 1, r"--minutes: got 0; give the time budget as a number of minutes > 0"),
    (-2.5, None, 1, r"--minutes: got -2.5"),
    (float("nan"), None, 1, r"--minutes: got nan"),
    (5, 0, 1, r"--trials: got 0; give a whole number >= 1"),
    (5, None, 0, r"--jobs: got 0; give 1 or more"),
])
def test_bad_flags_are_one_line_errors_before_anything_is_written(tmp_path, minutes, trials, jobs, message):
    with pytest.raises(TowersError, match=message):
        run_tune(tmp_path / "missing.yaml", tmp_path / "t", minutes, trials, jobs)
    assert not (tmp_path / "t").exists()


def test_bad_minutes_through_the_cli(tmp_path, capsys):
    assert cli(["tune", str(tmp_path / "c.yaml"), "--out", str(tmp_path / "t"), "--minutes", "0"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and err.startswith("error: --minutes: got 0.0; give the time budget")


# ---------------------------------------------------------------- a tiny study end to end

@pytest.fixture(scope="module")
def config(tiny_runs) -> Path:
    return tiny_runs.search_config("tune")


@pytest.fixture(scope="module")
def study(config) -> tuple[Path, dict]:
    out = config.parent / "tune"
    return out, run_tune(config, out, minutes=10, trials=3)


def _csv(out: Path) -> list[dict]:
    with open(out / "trials.csv", newline="") as fh:
        return list(csv.DictReader(fh))


def _logged_best(log: Path) -> float:
    """Independently of the study: the best validation recall@20 the trial's training log printed."""
    return max(float(v) for v in re.findall(r"valid recall@20 (\d\.\d{4})", log.read_text()))


@pytest.mark.slow
def test_a_tiny_study_writes_best_yaml_with_the_best_trials_values(study, config):
    out, result = study
    rows = _csv(out)
    assert [r["trial"] for r in rows] == ["0", "1", "2"]
    assert {r["state"] for r in rows} <= {"complete", "pruned"}
    complete = [r for r in rows if r["state"] == "complete"]
    assert complete  # the first trial always completes (no rung has others to compare with)
    for r in complete:  # each value is what its own training log printed (4 decimals there)
        assert round(float(r["valid_recall@20"]), 4) == _logged_best(out / "trials" / f"{int(r['trial']):03d}.log")
    best = max(complete, key=lambda r: float(r["valid_recall@20"]))
    assert [r["trial"] for r in rows if r["best"] == "1"] == [best["trial"]] == [str(result["best"]["trial"])]
    name = f"{int(best['trial']):03d}"
    kept = sorted(p.name for p in (out / "trials").iterdir() if p.is_dir())
    assert kept == [name]  # only the best trial keeps its run folder
    hist = yaml.safe_load((out / "trials" / name / "history.json").read_text())
    assert max(e["valid_recall@20"] for e in hist["epochs"]["towers"]) == float(best["valid_recall@20"])

    loaded = C.load(out / "best.yaml")  # loads from the tune folder: its paths were made absolute
    trained = C.load(out / "trials" / f"{name}.yaml")  # what the best trial trained with
    original = C.load(config)
    for key in S.searched_keys(loaded):
        section, k = key.split(".")
        value = getattr(getattr(loaded, section), k)
        assert value == getattr(getattr(trained, section), k)
        if best[key] == "":  # not searched in that trial (a temperature without normalize): the config's own
            assert value == getattr(getattr(original, section), k)
        else:
            assert best[key] == (repr(value) if isinstance(value, float) else str(value))
    assert loaded.interactions.path == original.interactions.path
    assert loaded.evaluation.baseline is True and trained.evaluation.baseline is False  # the user's own setting
    assert loaded.training.epochs == original.training.epochs
    assert (out / "trials.png").read_bytes()[:8] == PNG_SIGNATURE
    assert result["table"] == (out / "trials.txt").read_text() and "* best complete trial" in result["table"]


@pytest.mark.slow
def test_rerunning_continues_the_study(study, config, capsys):
    out, _ = study
    before = _csv(out)
    assert cli(["tune", str(config), "--out", str(out), "--minutes", "10", "--trials", "4"]) == 0
    captured = capsys.readouterr()
    assert "tune: 3 earlier trial(s)" in captured.err
    rows = _csv(out)
    assert [r["trial"] for r in rows] == ["0", "1", "2", "3"]
    for a, b in zip(before, rows):
        assert {k: v for k, v in a.items() if k != "best"} == {k: v for k, v in b.items() if k != "best"}
    assert re.search(r"^best: trial \d{3}, valid_recall@20 0\.\d{4}", captured.out, re.M)
    assert "\nchanged: " in captured.out and "config: " in captured.out
    # a third run with the count reached trains nothing and writes the same table
    assert cli(["tune", str(config), "--out", str(out), "--minutes", "10", "--trials", "4"]) == 0
    assert "trial 004" not in capsys.readouterr().err and len(_csv(out)) == 4


@pytest.mark.slow
def test_train_run_calls_the_hook_after_each_epoch_and_stops_where_it_raises(config, tmp_path):
    seen = []
    train_run(config, tmp_path / "run", on_round=lambda epoch, value: seen.append((epoch, value)))
    hist = json.loads((tmp_path / "run" / "history.json").read_text())
    assert seen == [(r["epoch"], r["valid_recall@20"]) for r in hist["epochs"]["towers"]]  # the saved history

    class Stop(Exception):
        pass

    def stop(epoch, value):
        raise Stop

    with pytest.raises(Stop):
        train_run(config, tmp_path / "cut", on_round=stop)
    assert not (tmp_path / "cut").exists()  # nothing published: the trial's folder stays .partial
    assert (tmp_path / "cut.partial" / "checkpoints" / "best.pt").is_file()


@pytest.mark.parametrize("sections", [
    {"training": {"loss": "softmax", "negatives": 256}, "model": {"normalize": True, "temperature": 0.2}},
    {"training": {"loss": "logistic"}, "model": {"history_length": 20, "history_decay": 0.95}},
    {"training": {"loss": "squared"}, "interactions": {"target_column": "stars"}},
    {"training": {"loss": "softmax", "negatives": 64}, "run": {"mode": "item_item"}},
])
def test_a_new_study_first_trains_the_users_own_config(sections):
    # trial 000 is the config itself, so the best trial is never one the study measured worse than it
    base = _config(**sections)
    study = optuna.create_study()
    study.enqueue_trial(S.config_point(base))
    values = S.suggest(study.ask(), base)
    resolved = yaml.safe_load(C.dump(base))
    for section, keys in S.overrides(values).items():
        resolved[section].update(keys)
    trial = C.resolve(resolved, Path("/data"))
    assert trial.training.sampled_negatives == base.training.sampled_negatives  # empty means 4 under logistic
    plain = lambda cfg: {s: {k: v for k, v in keys.items() if k != "negatives"}  # noqa: E731
                         for s, keys in yaml.safe_load(C.dump(cfg)).items()}
    assert plain(trial) == plain(base)
    if base.training.negatives is not None:
        assert trial.training.negatives == base.training.negatives


def test_the_users_config_outside_the_ranges_is_moved_to_their_edges():
    base = _config(training={"loss": "softmax", "weight_decay": 0.0}, model={"dim": 512})
    point = S.config_point(base)
    assert point["model.dim"] == 128 and point["training.weight_decay"] == 1e-7  # the ranges' ends (RANGES)
    assert point["training.negatives"] == 16  # softmax with no drawn items: the range's low end


def test_the_users_config_is_queued_once_even_after_a_kill_before_the_study_was_marked(tmp_path):
    # a process killed after queueing trial 000 but before saving the study's config: the next run neither
    # loses nor doubles it
    base = _config(training={"loss": "softmax"})
    study = optuna.create_study(study_name=T.STUDY_NAME, storage=T._storage(tmp_path), direction="maximize")
    study.enqueue_trial(S.config_point(base), user_attrs={"from_config": True})
    study = T._open_study(tmp_path, base, tmp_path / "c.yaml", base.stop_metric)
    waiting = [t for t in study.get_trials() if t.state == TrialState.WAITING]
    assert len(waiting) == 1 and waiting[0].user_attrs["from_config"]


def test_the_opening_line_counts_only_interrupted_trials_as_interrupted():
    # a helper's new study said "1 interrupted one(s) queued": trial 000, the user's config, is no such trial
    from types import SimpleNamespace

    from towers.runs.tune import waiting_note

    def trial(state, **attrs):
        return SimpleNamespace(state=SimpleNamespace(name=state), user_attrs=attrs)
    assert waiting_note([trial("WAITING", from_config=True)]) == "; the first trial trains your config's own values"
    assert waiting_note([trial("COMPLETE", from_config=True), trial("WAITING", retry_of=3),
                         trial("WAITING", retry_of=5)]) == " (2 interrupted one(s) queued to run again)"
    assert waiting_note([trial("COMPLETE"), trial("PRUNED")]) == ""


def test_feature_bias_is_searched_only_where_it_can_act():
    # it needs item features and biases: without either, the config's own value stands
    base = _config(training={"loss": "softmax"})
    assert "model.feature_bias" in S.searched_keys(base)
    for without in (base.with_section("items", features=()), base.with_section("model", biases=False)):
        assert "model.feature_bias" not in S.searched_keys(without)
        assert all("model.feature_bias" not in values for values in _draw(without, 5))


@pytest.mark.parametrize("loss,given,meant", [("softmax", None, 0), ("logistic", None, 4), ("softmax", 64, 64)])
def test_an_empty_negatives_reads_as_the_number_it_means(loss, given, meant):
    # the "changed:" line and trial 000 read the config alike: an empty negatives is the README's default for
    # the loss (4 drawn a positive under logistic, none drawn under softmax), not null
    base = _config(training={"loss": loss, "negatives": given})
    assert S.configured(base, "training.negatives") == meant
    assert S.configured(base, "model.dim") == base.model.dim
