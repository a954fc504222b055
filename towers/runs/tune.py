"""`towers tune`: search model and training settings by the validation metric within a time budget.

A study is an optuna study (Akiba et al., KDD 2019) kept in TUNE_DIR/study.db (optuna's RDB storage on
SQLite), so running the same command again continues it. Each trial draws a point of the space in
runs/tune_space.py with the TPE sampler (Bergstra et al., NeurIPS 2011), seeded from run.seed and the
number of trials the study already holds (so a resumed study does not repeat its first draws), and
trains an ordinary run of the user's config with those values through `train_run`, in this process.
After each epoch the towers' training loop calls the trial's `EpochReport` (fit's on_round hook): it
reports the best validation value so far, and the successive-halving pruner (asynchronous successive
halving, Li et al., MLSys 2020) stops trials that are not in the top third of the trials that reached
the same epoch (2, 6, 18, ...). A trial is judged by the config's early-stopping metric on the
validation pairs (the best epoch's `valid_<metric>` in history.json), never by the test slice.

Trials train with the reference models, the bilinear model, EASE / item-kNN and report.html switched
off: they cost time and change nothing the towers learn. Only the best complete trial keeps its run
folder (trials/NNN/); every trial keeps its config (trials/NNN.yaml) and its training log
(trials/NNN.log), so any of them can be trained again with `towers train`.

Control: the trial trains in a worker thread while this (main) thread waits, so Ctrl-C reaches the
tuner rather than the training loop's own handler (which only listens in the main thread). The first
Ctrl-C lets the running trial finish, then the study stops; the second stops the running trial at its
next epoch, records it as failed and queues its values again for the next run; the third does the
same at once and quits. A trial a killed process left "running" is failed and queued again when the
study is next opened. With --jobs
N > 1, N spawned worker processes run trials against the same study, each in its own session; this
process passes every Ctrl-C on to them and collects their messages.
"""

from __future__ import annotations

import contextlib
import csv
import io
import math
import os
import re
import shutil
import signal
import sys
import threading
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import yaml

from towers import config as C
from towers.atomic import make_private_dir, open_private_log, write_text_atomic
from towers.errors import TowersError
from towers.runs import tune_space as S
from towers.runs.folder import TOWERS, RunFolder
from towers.runs.sweep import (
    comparable_config,
    config_with,
    core_count,
    figure,
    save_png,
    searchable_config,
)
from towers.runs.train import train_run
from towers.training.progress import show_bar
from towers.training.stopping import TrainingDiverged

STUDY_FILE = "study.db"
STUDY_NAME = "towers-tune"
LOCK_FILE = "tune.lock"
TRIALS_DIR = "trials"
STARTUP_TRIALS = 8  # random draws before TPE models the space: about one per searched key
FIRST_RUNG = 2  # successive halving judges trials first after epoch 2 (epoch 1 mostly reflects the step size) ...
REDUCTION = 3  # ... and keeps the top third at each rung: epochs 2, 6, 18, ...
TRIAL_OVERRIDES = {  # what every trial changes beside the searched keys: nothing the towers learn depends on these
    "training": {"progress": "plain"},
    "evaluation": {"baseline": False, "bilinear": False, "references": False},
    "report": {"enabled": False},
}
POLL_S = 0.25
NOTE_CHARS = 300
_TRIAL_FOLDER = re.compile(r"^\d{3,}(\.partial)?$")


def trial_name(number: int) -> str:
    return f"{number:03d}"


# ---- Ctrl-C ----------------------------------------------------------------------------------------
class Control:
    """What Ctrl-C has asked for so far: 1 press finish the trial and stop, 2 stop the trial at its next
    epoch, 3 quit now (KeyboardInterrupt). `forward` passes each press on (to worker processes)."""

    def __init__(self):
        self.presses = 0
        self.forward = None

    @property
    def stop_after_trial(self) -> bool:
        return self.presses >= 1

    @property
    def abandon(self) -> bool:
        return self.presses >= 2

    def press(self, say) -> None:
        self.presses += 1
        if self.forward is not None:
            self.forward()
        if self.presses == 1:
            say("tune: stopping after the running trial (Ctrl-C again to stop it at its next epoch)")
        elif self.presses == 2:
            say("tune: stopping the running trial at its next epoch; it is tried again when you rerun "
                "(Ctrl-C again to quit at once)")
        else:
            raise KeyboardInterrupt

    @contextlib.contextmanager
    def listening(self, say):
        """Route SIGINT here while the block runs (main thread only, as signal handlers must be)."""
        if threading.current_thread() is not threading.main_thread():
            yield self
            return
        previous = signal.signal(signal.SIGINT, lambda signum, frame: self.press(say))
        try:
            yield self
        finally:
            signal.signal(signal.SIGINT, previous)


class TrialCut(Exception):
    """Raised by EpochReport to end a trial before its training ends: why is 'time budget' or 'interrupted'."""

    def __init__(self, why: str, epoch: int):
        super().__init__(f"{why} after epoch {epoch}")
        self.why, self.epoch = why, epoch


class EpochReport:
    """The per-epoch hook of one trial (`fit(on_round=...)`).

    Each epoch: report the best validation value so far to optuna at step = epoch, raise
    optuna.TrialPruned when the pruner says so, and raise TrialCut when Ctrl-C asked twice or the time
    budget is spent (not after the last epoch: a trial that has run them all is let finish).
    """

    def __init__(self, trial, metric: str, last_epoch: int, deadline: float, control: Control | None = None):
        self.trial, self.lower = trial, C.lower_is_better(metric)
        self.last_epoch, self.deadline = last_epoch, deadline
        self.control = control or Control()
        self.best: float | None = None
        self.epochs = 0

    def __call__(self, epoch: int, value: float | None) -> None:
        import optuna

        self.epochs = epoch
        if value is not None and math.isfinite(value):
            if self.best is None or (value < self.best if self.lower else value > self.best):
                self.best = value
            self.trial.report(self.best, epoch)
        if self.control.abandon:
            raise TrialCut("interrupted", epoch)
        if self.best is not None and self.trial.should_prune():
            raise optuna.TrialPruned(f"pruned by successive halving after epoch {epoch}")
        if epoch < self.last_epoch and time.time() >= self.deadline:
            raise TrialCut("time budget", epoch)


# ---- the study -------------------------------------------------------------------------------------
@dataclass
class Plan:
    """What every worker needs (plain values: it is handed to spawned processes)."""

    config_path: str
    out: str
    deadline: float  # time.time() after which no trial starts
    trials: int | None
    threads: int
    metric: str


def _check_flags(minutes: float, trials: int | None, jobs: int) -> None:
    if not (isinstance(minutes, (int, float)) and math.isfinite(minutes) and minutes > 0):
        raise TowersError(f"--minutes: got {minutes!r}; give the time budget as a number of minutes > 0, e.g. --minutes 30")
    if trials is not None and trials < 1:
        raise TowersError(f"--trials: got {trials}; give a whole number >= 1, or leave it out to use the whole --minutes")
    if jobs < 1:
        raise TowersError(f"--jobs: got {jobs}; give 1 or more trials at once")


def _storage(out: Path):
    import optuna

    path = (out / STUDY_FILE).resolve()
    if not path.exists():  # created owner-only before SQLite opens it; its journal files take its mode
        os.close(os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600))
    return optuna.storages.RDBStorage(f"sqlite:///{path}", engine_kwargs={"connect_args": {"timeout": 60}})


def _quiet_optuna():
    import optuna

    before = optuna.logging.get_verbosity()
    optuna.logging.set_verbosity(optuna.logging.WARNING)
    return before


def _pruner():
    import optuna

    return optuna.pruners.SuccessiveHalvingPruner(min_resource=FIRST_RUNG, reduction_factor=REDUCTION)


def _load(out: Path, seed: int, worker: int):
    """The study with a TPE sampler seeded from run.seed, the worker and the trials it already holds."""
    import optuna

    storage = _storage(out)
    study = optuna.load_study(study_name=STUDY_NAME, storage=storage, pruner=_pruner())
    held = len(study.get_trials(deepcopy=False))
    study.sampler = optuna.samplers.TPESampler(seed=seed + 100_003 * worker + held, n_startup_trials=STARTUP_TRIALS)
    return study


def _open_study(out: Path, base: C.Config, config_path: Path, metric: str):
    """Create the study, or check that the existing one was made for this config; fail and queue again the
    trials a killed run left running."""
    import optuna
    from optuna.trial import TrialState

    trials_dir = out / TRIALS_DIR
    fresh = not (out / STUDY_FILE).exists()
    if fresh and trials_dir.is_dir() and any(trials_dir.iterdir()):
        raise TowersError(f"{out}: holds {TRIALS_DIR}/ but no {STUDY_FILE}; give the tune a new --out, or delete "
                          f"{trials_dir} to start over")
    storage = _storage(out)
    names = optuna.study.get_all_study_names(storage)
    if names and STUDY_NAME not in names:
        raise TowersError(f"{out / STUDY_FILE}: not a `towers tune` study (it holds {', '.join(names)}); give the tune "
                          "a new --out")
    direction = "minimize" if C.lower_is_better(metric) else "maximize"
    study = optuna.create_study(study_name=STUDY_NAME, storage=storage, direction=direction, load_if_exists=True)
    now = comparable_config(base)
    attrs = study.user_attrs
    if "config" not in attrs:
        # trial 000 is the user's own config (moved into the ranges where outside): best.yaml is never a point
        # the study found worse than where the user started; queued before the study is marked as made, and
        # once, so a process killed in between neither loses nor doubles it
        if not any(t.user_attrs.get("from_config") for t in study.get_trials(deepcopy=False)):
            study.enqueue_trial(S.config_point(base), user_attrs={"from_config": True})
        study.set_user_attr("config", now)
        study.set_user_attr("space", S.describe())
        study.set_user_attr("metric", metric)
        study.set_user_attr("config_file", str(config_path.resolve()))
    else:
        then = attrs["config"]
        if then != now:
            raise TowersError(f"{out}: this study was started with a different config ({C.first_difference(then, now)}); "
                              "give the tune a new --out, or delete that folder to start over")
        if attrs.get("space") != S.describe():
            raise TowersError(f"{out}: this study was made with another search space (another towers version); give the "
                              "tune a new --out")
    for t in study.get_trials(deepcopy=False, states=(TrialState.RUNNING,)):
        storage.set_trial_user_attr(t._trial_id, "note", "interrupted (the process ended); its values were queued again")
        storage.set_trial_user_attr(t._trial_id, "interrupted", True)
        storage.set_trial_state_values(t._trial_id, TrialState.FAIL)
        study.enqueue_trial(t.params, user_attrs={"retry_of": t.number})
    return study


@contextlib.contextmanager
def _locked(out: Path):
    """One `towers tune` at a time per folder (an advisory lock, released when the process ends)."""
    import fcntl

    fd = os.open(out / LOCK_FILE, os.O_RDWR | os.O_CREAT, 0o600)
    try:
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            raise TowersError(f"{out}: another `towers tune` is working in this folder; wait for it to finish, or "
                              "give another --out") from None
        yield
    finally:
        os.close(fd)


def _counted(study) -> int:
    """Trials toward --trials: finished or running ones, less those interrupted (their values run again)."""
    from optuna.trial import TrialState

    return sum(1 for t in study.get_trials(deepcopy=False)
               if t.state != TrialState.WAITING and not t.user_attrs.get("interrupted"))


def _better(value: float, than: float | None, lower: bool) -> bool:
    return than is None or (value < than if lower else value > than)


def _best_trial(trials, lower: bool):
    """The best complete trial; ties go to the earlier trial."""
    from optuna.trial import TrialState

    best = None
    for t in sorted(trials, key=lambda t: t.number):
        if t.state == TrialState.COMPLETE and t.value is not None and _better(t.value, best.value if best else None, lower):
            best = t
    return best


def _remove_run(folder: Path) -> None:
    for path in (folder, RunFolder(folder).partial.path):
        if path.is_dir():
            shutil.rmtree(path)


def _tidy(out: Path, keep: int | None) -> None:
    """Remove every trial run folder (finished or .partial) except the best trial's finished one."""
    trials_dir = out / TRIALS_DIR
    if not trials_dir.is_dir():
        return
    for path in trials_dir.iterdir():
        if path.is_dir() and _TRIAL_FOLDER.match(path.name) and not (keep is not None and path.name == trial_name(keep)):
            shutil.rmtree(path)


# ---- one worker --------------------------------------------------------------------------------------
class Progress:
    """The console of the main process: a bar over the time budget on a terminal, plain lines otherwise."""

    def __init__(self, console, budget_s: float, lower: bool, bar: bool):
        self.console, self.budget_s, self.lower = console, budget_s, lower
        self.started = time.perf_counter()
        self.finished, self.best = 0, None
        self.bar = None
        if bar:
            from tqdm import tqdm

            self.bar = tqdm(total=max(1, round(budget_s)), desc="tune", unit="s", file=console,
                            bar_format="{desc}: {percentage:3.0f}%|{bar}| {n:.0f}/{total:.0f} s{postfix}")

    def say(self, text: str) -> None:
        if self.bar is not None:
            self.bar.write(text, file=self.console)
        else:
            print(text, file=self.console, flush=True)

    def trial_done(self, state: str, value: float | None) -> None:
        self.finished += 1
        if state == "complete" and value is not None and _better(value, self.best, self.lower):
            self.best = value
        self.tick()

    def tick(self) -> None:
        if self.bar is None:
            return
        self.bar.n = min(round(time.perf_counter() - self.started), self.bar.total)
        best = "" if self.best is None else f", best {self.best:.4f}"
        self.bar.set_postfix_str(f"{self.finished} trials{best}", refresh=False)
        self.bar.refresh()

    def close(self) -> None:
        if self.bar is not None:
            self.bar.close()


class QueuedProgress:
    """A worker process's Progress: messages go to the main process, which prints them."""

    def __init__(self, queue):
        self.queue = queue

    def say(self, text: str) -> None:
        self.queue.put(("say", text))

    def trial_done(self, state: str, value: float | None) -> None:
        self.queue.put(("done", state, value))

    def tick(self) -> None:
        pass


def _short(key: str) -> str:
    return key.split(".")[-1]


def _shown(value) -> str:
    if isinstance(value, bool) or value is None:
        return {True: "on", False: "off", None: ""}[value]
    if isinstance(value, float):
        return f"{value:.3g}"
    return str(value)


def _work(plan: Plan, worker: int, control: Control, progress) -> None:
    """Run trials until the budget, the trial count or Ctrl-C says stop."""
    out = Path(plan.out)
    base = C.load(plan.config_path)
    study = _load(out, base.run.seed, worker)
    while not control.stop_after_trial and time.time() < plan.deadline:
        if plan.trials is not None and _counted(study) >= plan.trials:
            break
        _run_trial(study, study.ask(), plan, base, control, progress)


def _in_thread(work, log_path: Path, progress) -> BaseException | None:
    """work() in a worker thread, its stderr (training's log lines) into log_path; returns what it raised."""
    box: dict[str, BaseException] = {}

    def target():
        try:
            work()
        except BaseException as exc:  # handed to the main thread, which decides what it means
            box["error"] = exc

    with open_private_log(log_path) as fh, contextlib.redirect_stderr(fh):
        thread = threading.Thread(target=target, name="towers-tune-trial", daemon=True)
        thread.start()
        while thread.is_alive():
            thread.join(POLL_S)
            progress.tick()
    return box.get("error")


def _validation(folder: Path, metric: str) -> tuple[float, int, int]:
    """The best epoch's validation value, that epoch, and the epochs run, from the run's history.json."""
    hist = RunFolder(folder).read_json(RunFolder.HISTORY)
    towers = hist["epochs"][TOWERS]
    row = next((r for r in towers if r["epoch"] == hist["best_epoch"]), None)
    value = None if row is None else row.get(f"valid_{metric}")
    if value is None or hist.get("stop_metric") != metric:
        raise TowersError(f"{folder}: history.json holds no validation {metric}; check that the config holds out "
                          "validation pairs (evaluation.validation_fraction)")
    return float(value), int(hist["best_epoch"]), len(towers)


def _run_trial(study, trial, plan: Plan, base: C.Config, control: Control, progress) -> None:
    import optuna
    from optuna.trial import TrialState

    out = Path(plan.out)
    name = trial_name(trial.number)
    trials_dir = out / TRIALS_DIR
    folder, cfg_path, log_path = trials_dir / name, trials_dir / f"{name}.yaml", trials_dir / f"{name}.log"
    try:
        values = S.suggest(trial, base)
        trial.set_user_attr("values", values)
        changes = S.overrides(values)
        for section, keys in TRIAL_OVERRIDES.items():
            changes.setdefault(section, {}).update(keys)
        changes.setdefault("run", {})["threads"] = plan.threads
        cfg = C.load(plan.config_path, changes)
        write_text_atomic(cfg_path, C.dump(cfg))
        _remove_run(folder)  # a leftover of a trial number cannot be this trial's
        said = ", ".join(f"{_short(k)} {_shown(v)}" for k, v in values.items())
        with open_private_log(log_path) as fh:
            print(f"trial {name} of {out}: {said}", file=fh)
    except BaseException as exc:  # no trial is left "running" by a failed set-up
        trial.set_user_attr("note", f"set-up failed: {exc}"[:NOTE_CHARS])
        study.tell(trial, state=TrialState.FAIL)
        raise
    progress.say(f"trial {name}: {said} (log: {log_path})")
    report = EpochReport(trial, plan.metric, cfg.training.epochs, plan.deadline, control)
    started = time.perf_counter()
    try:
        error = _in_thread(lambda: train_run(cfg_path, folder, on_round=report), log_path, progress)
    except KeyboardInterrupt:  # the third Ctrl-C: queue the values again, quit
        _tell_interrupted(study, trial, report, time.perf_counter() - started, folder)
        raise
    seconds = time.perf_counter() - started
    trial.set_user_attr("seconds", seconds)
    trial.set_user_attr("epochs", report.epochs)
    lower = C.lower_is_better(plan.metric)
    if error is None:
        try:
            value, best_epoch, epochs = _validation(folder, plan.metric)
        except TowersError as exc:
            error = exc
    if error is None:
        trial.set_user_attr("best_epoch", best_epoch)
        trial.set_user_attr("epochs", epochs)
        prior = _best_trial(study.get_trials(deepcopy=False), lower)
        leads = _better(value, prior.value if prior else None, lower)
        if leads and prior is not None:  # only the best trial keeps its run folder
            _remove_run(trials_dir / trial_name(prior.number))
        elif not leads:
            _remove_run(folder)
        study.tell(trial, value)
        progress.say(f"trial {name}: complete, valid {plan.metric} {value:.4f} (epoch {best_epoch} of {epochs}) in "
                     f"{seconds:.1f} s{'; the best so far' if leads else ''}")
        progress.trial_done("complete", value)
        return
    _remove_run(folder)
    if isinstance(error, optuna.TrialPruned) or (isinstance(error, TrialCut) and error.why == "time budget"):
        note = str(error) if isinstance(error, optuna.TrialPruned) else f"stopped: {error}"
        trial.set_user_attr("note", note)
        study.tell(trial, state=TrialState.PRUNED)
        best = "" if report.best is None else f" at valid {plan.metric} {report.best:.4f}"
        progress.say(f"trial {name}: {note}{best}, {seconds:.1f} s")
        progress.trial_done("pruned", None)
        return
    if isinstance(error, TrialCut):
        _tell_interrupted(study, trial, report, seconds, folder)
        progress.say(f"trial {name}: interrupted after epoch {error.epoch}; its values run again next time")
        return
    note = (f"{type(error).__name__}: {error}" if not isinstance(error, TowersError) else str(error))[:NOTE_CHARS]
    trial.set_user_attr("note", note)
    study.tell(trial, state=TrialState.FAIL)
    progress.say(f"trial {name}: failed: {note}")
    progress.trial_done("failed", None)
    if isinstance(error, TrainingDiverged):
        return  # these values diverge; others may not
    if isinstance(error, TowersError):  # the data or the disk: every later trial would fail the same way
        raise TowersError(f"trial {name} failed: {error}") from None
    raise error  # a bug: its traceback


def _tell_interrupted(study, trial, report: EpochReport, seconds: float, folder: Path) -> None:
    """A trial stopped by Ctrl-C: failed, its values queued to run first next time, its folder removed."""
    from optuna.trial import TrialState

    trial.set_user_attr("seconds", seconds)
    trial.set_user_attr("epochs", report.epochs)
    trial.set_user_attr("note", "interrupted (Ctrl-C); its values were queued again")
    trial.set_user_attr("interrupted", True)
    study.tell(trial, state=TrialState.FAIL)
    study.enqueue_trial(trial.params, user_attrs={"retry_of": trial.number})
    _remove_run(folder)


def _child(plan: Plan, worker: int, queue) -> None:
    """A spawned worker process: its own session (Ctrl-C comes from the main process), its own trials."""
    os.setsid()
    _quiet_optuna()
    progress = QueuedProgress(queue)
    control = Control()
    try:
        with control.listening(lambda text: None):  # the main process says what each Ctrl-C does, once
            _work(plan, worker, control, progress)
    except KeyboardInterrupt:
        sys.exit(130)
    except TowersError as exc:
        progress.say(f"error: worker {worker}: {exc}")
        sys.exit(exc.exit_code)
    sys.exit(130 if control.stop_after_trial else 0)


def _work_in_processes(plan: Plan, jobs: int, control: Control, progress: Progress) -> None:
    import multiprocessing
    import queue as queues

    ctx = multiprocessing.get_context("spawn")
    inbox = ctx.Queue()
    procs = [ctx.Process(target=_child, args=(plan, w, inbox), name=f"towers-tune-{w}") for w in range(jobs)]
    for p in procs:
        p.start()

    def forward():
        for p in procs:
            if p.is_alive():
                os.kill(p.pid, signal.SIGINT)

    control.forward = forward

    def drain():
        while True:
            try:
                message = inbox.get_nowait()
            except queues.Empty:
                return
            if message[0] == "say":
                progress.say(message[1])
            else:
                progress.trial_done(message[1], message[2])

    while any(p.is_alive() for p in procs):
        time.sleep(POLL_S)
        drain()
        progress.tick()
    for p in procs:
        p.join()
    drain()
    failed = [p.exitcode for p in procs if p.exitcode not in (0, 130)]
    if failed:
        raise TowersError(f"{len(failed)} tune worker(s) failed (exit code {failed[0]}); see the messages above and "
                          f"{Path(plan.out) / TRIALS_DIR}/*.log, then rerun the same command to continue")


# ---- the command -------------------------------------------------------------------------------------
def waiting_note(trials) -> str:
    """What the opening line says of the study's waiting trials: interrupted ones queued to run again, and (a
    new study) trial 000, the user's own config; "" when none waits."""
    waiting = [t for t in trials if t.state.name == "WAITING"]
    retried = sum("retry_of" in t.user_attrs for t in waiting)
    own = any(t.user_attrs.get("from_config") for t in waiting)
    return ((f" ({retried} interrupted one(s) queued to run again)" if retried else "")
            + ("; the first trial trains your config's own values" if own else ""))


def run_tune(config_path: str | Path, out_dir: str | Path, minutes: float, trials: int | None = None,
             jobs: int = 1) -> dict:
    """Run trials for `minutes` (or until the study holds `trials`), then write the tables, plot and best.yaml.

    Returns {"rows": [...], "best": row, "table": text, "changed": {key: (config value, best value)},
    "files": {name: path}}.
    """
    _check_flags(minutes, trials, jobs)
    config_path, out = Path(config_path).resolve(), Path(out_dir)
    base = searchable_config(config_path, out, "tuning")
    metric, lower = base.stop_metric, C.lower_is_better(base.stop_metric)
    started = time.time()
    make_private_dir(out / TRIALS_DIR)
    verbosity = _quiet_optuna()
    console = sys.stderr
    progress = None
    control = Control()
    try:
        with _locked(out):
            study = _open_study(out, base, config_path, metric)
            prior = _best_trial(study.get_trials(deepcopy=False), lower)
            _tidy(out, prior.number if prior else None)
            cores = core_count()
            threads = max(1, cores // jobs)
            if base.run.threads:
                threads = min(threads, base.run.threads)
            every = study.get_trials(deepcopy=False)
            held = len([t for t in every if t.state.name != "WAITING"])
            plan = Plan(str(config_path), str(out.resolve()), started + 60.0 * minutes, trials, threads, metric)
            progress = Progress(console, 60.0 * minutes, lower, show_bar("auto"))
            progress.best = prior.value if prior else None
            goal = f", until the study holds {trials}" if trials else ""
            again = waiting_note(every)
            progress.say(f"tune: {held} earlier trial(s) in {out / STUDY_FILE}{again}; trials for {minutes:g} min{goal}, "
                         f"{jobs} at a time on {threads} thread(s) each; judged by validation {metric}")
            if jobs > cores:
                progress.say(f"tune: --jobs {jobs} is more than the {cores} cores; trials will compete for them")
            with control.listening(progress.say):
                if jobs == 1:
                    _work(plan, 0, control, progress)
                else:
                    _work_in_processes(plan, jobs, control, progress)
            progress.close()
            progress = None
            result = write_outputs(out, config_path, base)
    finally:
        if progress is not None:
            progress.close()
        import optuna

        optuna.logging.set_verbosity(verbosity)
    if control.stop_after_trial:
        err = TowersError(f"tune interrupted; results so far in {out / 'trials.txt'}; rerun the same `towers tune` "
                          f"command to continue the study in {out}")
        err.exit_code = 130
        raise err
    if result["best"] is None:
        raise TowersError(f"{out}: no trial completed within --minutes {minutes:g} (see {out / 'trials.txt'} and the "
                          f"logs in {out / TRIALS_DIR}); rerun the same command, with more --minutes, to continue")
    return result


# ---- outputs -----------------------------------------------------------------------------------------
STATES = {"COMPLETE": "complete", "PRUNED": "pruned", "FAIL": "failed", "RUNNING": "running"}


def _rows(trials, keys: list[str], metric: str, best_number: int | None) -> list[dict]:
    rows = []
    for t in sorted(trials, key=lambda t: t.number):
        state = STATES.get(t.state.name)
        if state is None:  # waiting: queued, not started
            continue
        values = t.user_attrs.get("values", {})
        row = {"trial": t.number, "state": state}
        row.update({k: values.get(k) for k in keys})
        row[f"valid_{metric}"] = t.value if state in ("complete", "pruned") else None
        row.update({"best_epoch": t.user_attrs.get("best_epoch"), "epochs": t.user_attrs.get("epochs"),
                    "seconds": t.user_attrs.get("seconds"),
                    "finished": t.datetime_complete.isoformat(timespec="seconds") if t.datetime_complete else None,
                    "note": t.user_attrs.get("note", ""), "best": int(t.number == best_number)})
        rows.append(row)
    return rows


def _write_csv(path: Path, rows: list[dict], columns: list[str]) -> Path:
    buf = io.StringIO()
    w = csv.DictWriter(buf, fieldnames=columns, lineterminator="\n")
    w.writeheader()
    for r in rows:
        w.writerow({k: ("" if r.get(k) is None else repr(r[k]) if isinstance(r[k], float) else r[k]) for k in columns})
    return write_text_atomic(path, buf.getvalue())


def format_tune_table(rows: list[dict], keys: list[str], metric: str) -> str:
    """The trials as a plain text table; '*' marks the best complete trial."""
    value_key = f"valid_{metric}"
    head = ["", "trial", "state"] + [_short(k) for k in keys] + [value_key, "epochs", "seconds", "note"]
    lines = [head]
    for r in rows:
        value = r.get(value_key)
        lines.append(["*" if r["best"] else "", trial_name(r["trial"]), r["state"]] + [_shown(r.get(k)) for k in keys]
                     + ["" if value is None else f"{value:.4f}", _shown(r.get("epochs")),
                        "" if r.get("seconds") is None else f"{r['seconds']:.1f}", (r.get("note") or "")[:60]])
    widths = [max(len(line[i]) for line in lines) for i in range(len(head))]
    text = "\n".join("  ".join(v.rjust(w) if 0 < i < len(head) - 1 and i != 2 else v.ljust(w)
                               for i, (v, w) in enumerate(zip(line, widths))).rstrip() for line in lines)
    order = "lowest" if C.lower_is_better(metric) else "highest"
    return text + f"\n* best complete trial by validation {metric} ({order}); pruned trials show their best value when stopped\n"


def _plot(path: Path, trials, metric: str, best_number: int | None) -> Path:
    """Validation value of each trial against the wall-clock time it ended; pruned trials marked."""
    from optuna.trial import TrialState

    ended = [t for t in trials if t.datetime_complete is not None and t.datetime_start is not None]
    fig, ax = figure(8.0, 4.5)
    if ended:
        origin = min(t.datetime_start for t in ended)

        def minutes(t) -> float:
            return (t.datetime_complete - origin).total_seconds() / 60.0

        lower = C.lower_is_better(metric)
        done = sorted((t for t in ended if t.state == TrialState.COMPLETE and t.value is not None), key=minutes)
        pruned = [t for t in ended if t.state == TrialState.PRUNED and t.value is not None]
        failed = [t for t in ended if t.state == TrialState.FAIL]
        if done:
            ax.plot([minutes(t) for t in done], [t.value for t in done], "o", color="C0", label="complete")
            best = np.minimum.accumulate if lower else np.maximum.accumulate
            ax.step([minutes(t) for t in done], best(np.array([t.value for t in done])), where="post", color="C0",
                    alpha=0.5, label="best so far")
        if pruned:
            ax.plot([minutes(t) for t in pruned], [t.value for t in pruned], "x", color="grey", ms=8,
                    label="pruned (value when stopped)")
        chosen = [t for t in done if t.number == best_number]
        if chosen:
            ax.plot([minutes(chosen[0])], [chosen[0].value], "*", color="red", ms=16,
                    label=f"best: trial {trial_name(best_number)}")
        for t in done + pruned:
            ax.annotate(trial_name(t.number), (minutes(t), t.value), textcoords="offset points", xytext=(4, 4),
                        fontsize=7, color="dimgrey")
        extra = f"; {len(failed)} failed (not shown)" if failed else ""
        ax.set_title(f"validation {metric} per trial{extra}")
        if done or pruned:
            ax.legend(frameon=False, fontsize=9)
    else:
        ax.set_title("no trial has finished yet")
    ax.set(xlabel="minutes since the study's first trial started (wall clock, pauses between runs included)",
           ylabel=f"validation {metric}")
    ax.grid(alpha=0.3)
    return save_png(fig, path)


def write_outputs(out: str | Path, config_path: str | Path, base: C.Config) -> dict:
    """trials.csv, trials.txt, trials.png and best.yaml from the study in `out`; only the best trial's run
    folder is kept."""
    out, config_path = Path(out), Path(config_path)
    study = _load(out, base.run.seed, 0)
    trials = study.get_trials(deepcopy=False)
    metric, lower = base.stop_metric, C.lower_is_better(base.stop_metric)
    best = _best_trial(trials, lower)
    _tidy(out, best.number if best else None)
    keys = S.searched_keys(base)
    rows = _rows(trials, keys, metric, best.number if best else None)
    columns = ["trial", "state"] + keys + [f"valid_{metric}", "best_epoch", "epochs", "seconds", "finished", "note",
                                           "best"]
    table = format_tune_table(rows, keys, metric)
    files = {"trials.csv": _write_csv(out / "trials.csv", rows, columns),
             "trials.txt": write_text_atomic(out / "trials.txt", table),
             "trials.png": _plot(out / "trials.png", trials, metric, best.number if best else None)}
    changed: dict[str, tuple] = {}
    best_row = None
    if best is not None:
        values = best.user_attrs["values"]
        for dotted, v in values.items():
            was = S.configured(base, dotted)  # an empty negatives as the number it means, as trial 000 took it
            if v != was:
                changed[dotted] = (was, v)
        raw = config_with(config_path, base, values)
        head = (f"# {config_path.name} with the best trial of `towers tune` (trial {trial_name(best.number)}: validation "
                f"{metric} {best.value:.4f} at epoch {best.user_attrs.get('best_epoch')}; run folder "
                f"{(out / TRIALS_DIR / trial_name(best.number)).resolve()});\n"
                "# paths made absolute; comments of the original are not kept.\n")
        files["best.yaml"] = write_text_atomic(out / "best.yaml", head + yaml.safe_dump(raw, sort_keys=False))
        best_row = next(r for r in rows if r["trial"] == best.number)
    return {"rows": rows, "best": best_row, "table": table, "changed": changed, "files": files,
            "run": out / TRIALS_DIR / trial_name(best.number) if best else None}
