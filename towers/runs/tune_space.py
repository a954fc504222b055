"""What `towers tune` searches: every range, the rule that decides whether it applies, and why.

This module is the one place the search space is written down; the README's table copies it
(tests/docs checks that they agree). Ranges are log-scale: each of these keys acts by its order of
magnitude (a step size, a penalty, a width, a count), so equal ratios should get equal room. Integers
are drawn on the same log scale and rounded by optuna.

`suggest(trial, base)` asks an optuna trial for one point and returns it as config keys and values
({"model.dim": 57, ...}); `overrides(values)` nests them the way `config.load` takes overrides. Which
keys apply depends on the user's config (`base`), never on earlier trials:

- `training.negatives`: its meaning depends on the loss (logistic: drawn per positive pair; softmax:
  drawn once per batch and shared, beside the batch's own items), so each loss has its own range;
  squared loss samples none, so it is not searched there.
- `model.temperature` only divides scores usefully when `model.normalize` is on (otherwise the towers
  can learn any scale themselves), so normalize is searched as a switch (ranking losses) and the
  temperature only in trials that turn it on. Under squared loss normalize stays as configured (bounded
  scores cannot reach a rating scale without the biases doing all the work), and the temperature is
  searched only when the config turns normalize on.
- `model.feature_bias` acts only with item features and biases; measured both ways (it helped most data
  and cost MovieLens 3% beside normalised vectors, DEVELOPERS.md "Defaults"), so the search tries both.
- `model.history_length` exists only in user_item runs (config rule: a history is a user's items). It
  is searched behind a switch (`history`: off keeps 0, the config's own default) because 0 cannot sit
  on a log scale.
"""

from __future__ import annotations

from dataclasses import dataclass

from towers import config as C


@dataclass(frozen=True)
class Range:
    """One searched key: its log-scale range, whether it is whole, when it applies, and why."""

    key: str  # "section.name", as in the config
    low: float
    high: float
    integer: bool
    when: str  # in words, for the README
    why: str


RANGES = (
    Range("model.dim", 8, 128, True, "always",
          "k below 8 separates few tastes; a step's cost grows with k, and 128 is already wide for the catalogs a "
          "CPU trains in minutes"),
    Range("training.learning_rate", 3e-4, 3e-2, False, "always",
          "Adam's step for network weights: a factor 10 each way of the default 0.003 (id tables keep their own "
          "training.id_learning_rate)"),
    Range("training.batch_size", 256, 8192, True, "always",
          "pairs per step: small batches give many noisy steps an epoch, large ones few; under the softmax a "
          "batch also supplies batch_size - 1 negatives, so each pair's cost grows with it (4,096 took 2.4 x "
          "1,024's time a pair on a 54k-event log)"),
    Range("training.weight_decay", 1e-7, 1e-3, False, "always",
          "L2 on network weights in the per-pair objective, around the default 1e-5: 1e-7 is practically none, "
          "1e-3 already a strong pull on every weight each step"),
    Range("training.id_l2", 1e-3, 10.0, False, "always",
          "lambda on id rows and biases in the summed objective, around the default 0.1: 1e-3 is practically "
          "none, 10 outweighs the few pairs of a rare user or item"),
    Range("training.negatives", 1, 32, True, "training.loss logistic (drawn per positive pair)",
          "1 is the least that teaches anything; each one adds a scored pair per positive, so past about 32 the "
          "cost grows for little change (the default is 4)"),
    Range("training.negatives", 16, 2048, True, "training.loss softmax (drawn once per batch, shared)",
          "the batch's own batch_size - 1 items are negatives already, so fewer than 16 extra change little; "
          "2048 is about what a large batch holds itself"),
    Range("model.temperature", 0.02, 1.0, False, "model.normalize on",
          "cosine scores lie in [-1, 1] and the temperature stretches them to +-1/T: 1 leaves them flat, 0.02 "
          "(logits up to 50) is as sharp as is useful"),
    Range("model.history_length", 4, 128, True, "user_item runs, in trials that turn the history on",
          "fewer than 4 items average into a noisy vector; every step pays for each item kept, and past 128 "
          "the oldest add little"),
    Range("model.history_decay", 0.8, 1.0, False, "user_item runs, in trials that turn the history on",
          "1 averages the history alike; 0.8 leaves the 20th latest item 1% of the latest's weight, about as "
          "short a memory as a shop's history is worth (0.95 measured best on MovieLens, 0.9 and 0.8 close)"),
)
SWITCHES = {
    "model.normalize": "ranking losses (logistic, softmax): on or off, as the config's own choice",
    "model.feature_bias": "item features and model.biases on: on or off, as the config's own choice",
    "history": "user_item runs: the history input on (length searched) or off (model.history_length 0)",
    "model.history_past_only": "user_item runs with a time column, in trials that turn the history on: on or off",
}
HISTORY_SWITCH = "history"  # the optuna parameter of the history switch (not a config key)


def _range(key: str, loss: str | None = None) -> Range:
    found = [r for r in RANGES if r.key == key and (loss is None or loss in r.when)]
    assert len(found) == 1, (key, loss)
    return found[0]


def _ask(trial, r: Range):
    if r.integer:
        return trial.suggest_int(r.key, int(r.low), int(r.high), log=True)
    return trial.suggest_float(r.key, r.low, r.high, log=True)


def suggest(trial, base: C.Config) -> dict:
    """One point of the space for the user's config `base`, as {config key: value}, in RANGES order."""
    t = base.training
    values = {key: _ask(trial, _range(key)) for key in ("model.dim", "training.learning_rate", "training.batch_size",
                                                        "training.weight_decay", "training.id_l2")}
    if t.loss in ("logistic", "softmax"):
        values["training.negatives"] = _ask(trial, _range("training.negatives", t.loss))
    normalize = base.model.normalize
    if not t.rating_loss:
        normalize = trial.suggest_categorical("model.normalize", [False, True])
        values["model.normalize"] = normalize
    if normalize:
        values["model.temperature"] = _ask(trial, _range("model.temperature"))
    if _bias_from_features(base):
        values["model.feature_bias"] = trial.suggest_categorical("model.feature_bias", [False, True])
    if not base.item_item:
        history = trial.suggest_categorical(HISTORY_SWITCH, [False, True])
        values["model.history_length"] = _ask(trial, _range("model.history_length")) if history else 0
        if history:
            values["model.history_decay"] = _ask(trial, _range("model.history_decay"))
            if base.interactions.time_column:
                values["model.history_past_only"] = trial.suggest_categorical("model.history_past_only", [False, True])
    return values


def _bias_from_features(base: C.Config) -> bool:
    """Whether model.feature_bias can act: biases on and an item table with features."""
    return base.model.biases and bool(base.items.features)


def configured(base: C.Config, name: str):
    """What the config holds for a searched name, an empty value read as what it means (the trial-000 answer
    and the "changed:" line's left side)."""
    if name == HISTORY_SWITCH:
        return base.model.history_length > 0
    section, key = name.split(".")
    value = getattr(getattr(base, section), key)
    if name == "training.negatives" and value is None:  # empty: 4 under logistic, none drawn under softmax
        value = base.training.sampled_negatives
    return value


class _FromConfig:
    """A stand-in trial for `suggest` that answers each question with the config's own value, moved into the
    asked range where it lies outside (a log scale holds no 0: that becomes the low end), and records the
    answers as optuna parameters. So which keys apply stays written once, in `suggest`."""

    def __init__(self, base: C.Config):
        self.base, self.params = base, {}

    def _own(self, name: str):
        return configured(self.base, name)

    def _answer(self, name: str, value):
        self.params[name] = value
        return value

    def suggest_int(self, name: str, low: int, high: int, log: bool = False) -> int:
        return self._answer(name, int(round(min(max(self._own(name), low), high))))

    def suggest_float(self, name: str, low: float, high: float, log: bool = False) -> float:
        return self._answer(name, float(min(max(self._own(name), low), high)))

    def suggest_categorical(self, name: str, choices: list):
        return self._answer(name, self._own(name))


def config_point(base: C.Config) -> dict:
    """The user's own config as optuna parameters of this space (`suggest`'s names), each value moved into its
    range where it lies outside: the first trial of a new study, so the search starts from, and is measured
    against, what the user already had."""
    trial = _FromConfig(base)
    suggest(trial, base)
    return trial.params


def searched_keys(base: C.Config) -> list[str]:
    """The config keys `suggest` can set for this config, in table order."""
    keys = ["model.dim", "training.learning_rate", "training.batch_size", "training.weight_decay", "training.id_l2"]
    if base.training.loss in ("logistic", "softmax"):
        keys.append("training.negatives")
    if not base.training.rating_loss:
        keys.append("model.normalize")
    if not base.training.rating_loss or base.model.normalize:
        keys.append("model.temperature")
    if _bias_from_features(base):
        keys.append("model.feature_bias")
    if not base.item_item:
        keys += ["model.history_length", "model.history_decay"]
        if base.interactions.time_column:
            keys.append("model.history_past_only")
    return keys


def overrides(values: dict) -> dict:
    """{"model.dim": 8} -> {"model": {"dim": 8}}, the form `config.load` takes."""
    out: dict[str, dict] = {}
    for dotted, value in values.items():
        section, key = dotted.split(".")
        out.setdefault(section, {})[key] = value
    return out


def describe() -> list[dict]:
    """The space as plain data: stored with a study, so a study made with another space is refused."""
    return [{"key": r.key, "low": r.low, "high": r.high, "integer": r.integer, "when": r.when} for r in RANGES] + \
        [{"switch": name, "when": when} for name, when in SWITCHES.items()]


def readme_rows() -> list[str]:
    """The README's rows of the space table, one per range (tests/docs checks that the README holds them)."""
    return [f"| `{r.key}` | {r.low:g} to {r.high:g}{', whole' if r.integer else ''} | {r.when} | {r.why} |" for r in RANGES]
