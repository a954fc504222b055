"""Run configuration: every key declared once, one validation routine, typed sections, YAML in and out.

Each section is a frozen dataclass whose fields declare their key (type, default, allowed range,
meaning) in one place; `SCHEMA` and `FEATURE_KEYS` are views of those declarations, from which the
README's config reference is generated. `resolve` checks a raw mapping against them (every error has
one form: `config key 'section.key': got VALUE; expected ...`), applies the cross-key rules, and
returns a `Config` of typed sections. Facts that follow from several keys (is this a rating loss?
how many sampled negatives apply?) are properties computed here, once.
"""

from __future__ import annotations

import copy
import dataclasses
import difflib
import math
from dataclasses import dataclass, field
from datetime import date, datetime
from pathlib import Path
from typing import Any

import yaml

from towers.errors import TowersError


@dataclass(frozen=True)
class Key:
    """One config key: its type, default, constraint and meaning."""

    kind: str  # "int", "float", "bool", "str", "choice", "path", "int_list", "str_list", "str_or_int_list", "features", "any"
    default: Any
    meaning: str
    low: float | None = None  # inclusive lower bound, unless low_open
    high: float | None = None
    low_open: bool = False
    choices: tuple = ()
    nullable: bool = False


def key(kind: str, default: Any, meaning: str, **constraints) -> Any:
    """A dataclass field declaring one config key (its default is the field's default)."""
    return field(default=default, metadata={"key": Key(kind, default, meaning, **constraints)})


FEATURE_KINDS = ("numeric", "categorical", "tokens", "vector", "date")
CONTEXT_KINDS = ("numeric", "categorical", "date")
DEFAULT_NEGATIVES = 4  # sampled negatives per positive under the logistic loss when none are configured
# the temperature of normalised vectors when none is configured: measured best on MovieLens latest-small
# (DEVELOPERS.md, "Defaults"); towers tune searches 0.02 to 1
NORMALIZED_TEMPERATURE = 0.2
# an empty model.normalize is on under the softmax from this model.dim up: a unit vector keeps k - 1 of its k
# numbers, and on planted rank-4 events k = 4 lost 11% of its warm recall@20 normalised, k = 8 and 32 nothing
NORMALIZE_FROM_DIM = 8


@dataclass(frozen=True)
class FeatureSpec:
    """One feature column of a feature table (or a context column of the log)."""

    name: str | None = key('str', None, 'column in the feature table')
    kind: str = key('choice', None,
                    'numeric, categorical, tokens, vector or date',
                    choices=FEATURE_KINDS)
    rare_below: int = key('int', 1,
                          'categorical/tokens: values seen fewer than this many times in training share the '
                          'unknown row (1 keeps every value seen)',
                          low=1)
    hashed_rows: int = key('int', 0,
                           'categorical/tokens: > 0 hashes values into this many table rows instead of learning'
                           ' a vocabulary (for huge or open-ended value sets)',
                           low=0)
    separator: str = key('str', '|', 'tokens: delimiter when the column is a string rather than a list')
    token_limit: int = key('int', 32, 'tokens: longer lists keep their first this-many tokens', low=1)
    length: int | None = key('int', None, 'vector: the fixed vector length', low=1, nullable=True)
    dim: int | None = key('int', None,
                          'categorical/tokens: embedding size (default model.feature_dim)',
                          low=1, nullable=True)
    log1p: bool = key('bool', False,
                      'numeric: take log(1 + x) before standardising (prices, counts); a negative value is an error')
    clip_lower: float | None = key('float', None,
                                   'numeric: values below this quantile of the training values are raised to it '
                                   '(e.g. 0.01; the bound is saved with the run); empty: no lower clip',
                                   low=0.0, high=1.0, nullable=True)
    clip_upper: float | None = key('float', None,
                                   'numeric: values above this quantile of the training values are lowered to it '
                                   '(e.g. 0.99; the bound is saved with the run); empty: no upper clip',
                                   low=0.0, high=1.0, nullable=True)
    reference_date: str | None = key('str', None,
                                     'date: ages are counted in days up to this ISO date or timestamp (e.g. '
                                     '2026-03-14); empty: the latest date among the training rows, saved with the run',
                                     nullable=True)
    calendar: bool = key('bool', False,
                         'date: also the day of the week and the month of the year, each as a (sin, cos) pair')


# keys that only mean something for some kinds: set on another kind, they are refused rather than ignored
FEATURE_KEY_KINDS = {"log1p": ("numeric",), "clip_lower": ("numeric",), "clip_upper": ("numeric",),
                     "reference_date": ("date",), "calendar": ("date",),
                     "rare_below": ("categorical", "tokens"), "hashed_rows": ("categorical", "tokens"),
                     "dim": ("categorical", "tokens"), "separator": ("tokens",), "token_limit": ("tokens",),
                     "length": ("vector",)}


@dataclass(frozen=True)
class RunSection:
    """run: what kind of run, its seed and threads."""

    mode: str = key('choice', 'user_item',
                    'user_item (users -> items) or item_item (items -> items, one item table)',
                    choices=('user_item', 'item_item'))
    seed: int = key('int', 0, 'random seed: the same seed and data give the same run', low=0)
    threads: int = key('int', 0, "torch CPU threads; 0 keeps torch's default", low=0)
    reuse_memory: bool = key('bool', True,
                             'training keeps memory it frees for its next steps (glibc malloc settings) instead'
                             ' of handing it back to the system and faulting it in again each step')
    spill_folder: str | None = key('path', None, 'a folder where the columns with one entry per event (ids as codes, '
                                   'times, weights, the split pairs) live as memory-mapped files instead of in memory, '
                                   'for a log larger than memory; empty keeps them in memory', nullable=True)
    divide_log: bool = key('bool', True, 'data-parallel training (several processes): each process reads and keeps '
                           'only its share of the users and their events (by a hash of the user id), so memory and work '
                           'are divided; false: every process reads the whole log. Applies to user_item runs whose rows '
                           'are the pairs (pairs_from: rows, no count_repeats), without context columns, an ALS or '
                           'squared-loss linear factor model, or the bilinear reference; other runs read the whole log '
                           'in every process, and the log says why')


@dataclass(frozen=True)
class InteractionsSection:
    """interactions: the log of observed pairs and its columns."""

    path: str | None = key('path', None, 'interaction log, CSV or parquet, one row per observed pair; or a folder '
                           'of such files (all CSV/TSV or all parquet, read in name order as one log, e.g. one '
                           'export a day; hidden files and names starting with `_` are skipped)')
    query_column: str | None = key('str', None, 'query-side id (a user, or the first item of a pair); not needed '
                                   'when pairs_from counts item pairs from an export')
    candidate_column: str | None = key('str', None, 'candidate-side id (the item)')
    target_column: str | None = key('str', None,
                                    'rating, 0/1 label or count; absent means every row is a positive event',
                                    nullable=True)
    weight_column: str | None = key('str', None, 'non-negative weight of each row in the loss', nullable=True)
    time_column: str | None = key('str', None, 'event time; needed by the splits time, user_recent and user_last', nullable=True)
    group_column: str | None = key('str', None,
                                   'rows sharing a value here (an order or session id) always land on the same '
                                   'side of the split (training, validation or test); with pairs_from baskets or '
                                   'sessions, the basket or session id',
                                   nullable=True)
    pairs_from: str = key('choice', 'rows',
                          'where the pairs come from: rows (each row of the log is a pair), baskets (item_item: '
                          'every two distinct items of candidate_column sharing a group_column value, counted once '
                          'per basket, both directions) or sessions (item_item: two distinct items viewed in one '
                          'group_column value at most session_minutes apart, counted once per session)',
                          choices=('rows', 'baskets', 'sessions'))
    session_minutes: float = key('float', 30.0,
                                 'sessions: the longest time between two views that still pair them (needs '
                                 'time_column; numeric times count as seconds)',
                                 low=0.0)
    group_item_cap: int = key('int', 50,
                              'baskets and sessions: one holding more distinct items than this keeps a seeded random '
                              'sample of this many, so one huge order adds at most cap x (cap - 1) pairs',
                              low=2)
    min_pair_count: int = key('int', 1,
                              'baskets and sessions: training pairs found in fewer baskets or sessions than this are '
                              'left out, to save memory on large exports (most pairs are seen once); held-out pairs '
                              'are all kept',
                              low=1)
    quantity_column: str | None = key('str', None,
                                      'baskets: a pair counts min(quantity of a, quantity of b) per basket instead '
                                      'of 1; count_repeats: a pair weighs its summed quantity instead of its rows',
                                      nullable=True)
    count_repeats: bool = key('bool', False,
                              'rows repeating a (query, candidate) pair become one row weighted by their number (or '
                              'summed quantity_column), keeping the latest time; with group_column, orders sharing '
                              'a pair are one split unit')
    derive_memory_gb: float = key('float', 2.0,
                                  'baskets, sessions and count_repeats: memory limit in GiB of the embedded DuckDB '
                                  'engine that derives the pairs; beyond it, it spills to a temporary folder (TMPDIR)',
                                  low=0.1)
    context: tuple[FeatureSpec, ...] = key('features', (),
                                           'columns of the log describing each event (hour, channel, device '
                                           '...), numeric or categorical, fed to the query tower beside the '
                                           "user's features")


@dataclass(frozen=True)
class SideSection:
    """users or items: a feature table keyed by id."""

    path: str | None = key('path', None, 'feature table, CSV or parquet (relative to the config file)', nullable=True)
    id_column: str | None = key('str', None, 'column holding the entity id', nullable=True)
    features: tuple[FeatureSpec, ...] = key('features', (), 'list of features, each {name, kind, ...}')
    missing_rows: str = key('choice', 'error',
                            'ids in the interactions with no feature row: error, drop (their interactions, with'
                            ' a count) or default (all-missing features)',
                            choices=('error', 'drop', 'default'))


@dataclass(frozen=True)
class ModelSection:
    """model: the two towers."""

    dim: int = key('int', 32, 'k, the embedding size', low=1)
    hidden: tuple[int, ...] = key('int_list', (128,), "hidden layer sizes of each tower's MLP; [] means a linear map")
    activation: str = key('choice', 'relu', 'hidden-layer activation', choices=('relu', 'gelu', 'tanh', 'silu'))
    dropout: float = key('float', 0.0, 'dropout after each hidden layer', low=0.0, high=0.95)
    feature_dim: int = key('int', 16, 'embedding size of categorical and token features', low=1)
    use_ids: bool = key('bool', True, 'learn a per-id embedding for entities seen in training')
    id_dim: int | None = key('int', None,
                             'size of the id embedding feeding the MLP (default: dim)',
                             low=1, nullable=True)
    id_dropout: float = key('float', 0.1,
                            'share of training rows whose id is replaced by the unknown row, so features learn '
                            'to carry new entities (ignored for id-only towers)',
                            low=0.0, high=1.0)
    id_table_rows: int = key('int', 0,
                             '> 0: a side with more ids than this composes each id row from two tables of at most '
                             'this many rows (quotient-remainder), for very large id spaces, at an accuracy cost '
                             '(README, "Bounded id tables"); 0: one row per id',
                             low=0)
    id_table_combine: str = key('choice', 'product',
                                'id_table_rows: how the two rows of an id combine, element-wise product or sum',
                                choices=('product', 'sum'))
    normalize: bool | None = key('bool', None,
                                 "L2-normalise each tower's output; empty: on under the softmax loss with dim "
                                 f">= {NORMALIZE_FROM_DIM}, else off", nullable=True)
    temperature: float | None = key('float', None,
                                    'scores are divided by this (useful with normalize); empty: '
                                    f'{NORMALIZED_TEMPERATURE} with normalised vectors, 1 without',
                                    low=0.0, low_open=True, nullable=True)
    non_negative: bool = key('bool', False, 'softplus on the output so every embedding entry is >= 0')
    biases: bool = key('bool', True, 'per-id biases on both sides plus a global bias')
    feature_bias: bool = key('bool', True,
                             "biases on: an item tower with features also predicts each item's bias from them "
                             "(one more output of its MLP, added to the id bias), so a new item gets a "
                             "popularity from its features and normalised vectors keep one")
    shared_tower: bool = key('bool', False, 'item_item mode: one tower embeds both sides')
    history_length: int = key('int', 0,
                              "user_item runs: the query tower also averages embeddings of up to this many of "
                              "the user's training items (the latest when the log has a time column); 0: off",
                              low=0)
    history_decay: float = key('float', 1.0,
                               "history_length > 0: the user's i-th latest item (i = 0, 1, ...) weighs "
                               "history_decay ** i in the pooled history, weights summing to 1; 1 is a plain mean",
                               low=0.0, low_open=True, high=1.0)
    history_past_only: bool = key('bool', False,
                                  "history_length > 0: in training, each pair's history holds only the user's items "
                                  "from before the pair's time, as a held-out pair's history precedes it (needs "
                                  "interactions.time_column); false: every training item but the pair's own")

    def __post_init__(self) -> None:
        # built in code rather than from a config (resolve fills both keys): no loss to settle normalize by
        if self.temperature is None:
            object.__setattr__(self, "temperature", settled_temperature(bool(self.normalize)))


@dataclass(frozen=True)
class TrainingSection:
    """training: the objective, the optimisers and early stopping."""

    loss: str = key('choice', 'softmax',
                    'squared (ratings), logistic (events with sampled negatives, or 0/1 targets) or softmax '
                    "(events; each pair's item against the other items in its batch)",
                    choices=('squared', 'logistic', 'softmax'))
    negatives: int | None = key('int', None,
                                'logistic: sampled negatives per positive (empty: 4); softmax: items drawn '
                                "uniformly for each batch and shared by all its pairs, beside the batch's own "
                                '(empty: 0); squared loss samples none, so a value above 0 there is an error',
                                low=0, nullable=True)
    negative_sampling: str = key('choice', 'popularity',
                                 'uniform over training items, or popularity^alpha',
                                 choices=('uniform', 'popularity'))
    popularity_exponent: float = key('float', 0.75, 'alpha in popularity^alpha', low=0.0, high=2.0)
    logq_correction: bool = key('bool', True,
                                "softmax: subtract log of each item's share of training events from its in-"
                                'batch logit, so popular items are not penalised for appearing often as '
                                'negatives')
    epochs: int = key('int', 20, 'maximum passes over the training pairs', low=1)
    batch_size: int = key('int', 2048, 'positive pairs per step', low=1)
    learning_rate: float = key('float', 0.003, 'Adam step size for network weights', low=0.0, low_open=True)
    id_learning_rate: float = key('float', 0.01, 'step size for id-embedding and bias tables', low=0.0, low_open=True)
    schedule: str = key('choice', 'constant',
                        'step sizes over training: constant, or cosine (both rates fall along half a cosine from '
                        'their value to 0 at the last step of training.epochs)',
                        choices=('constant', 'cosine'))
    warmup_steps: int = key('int', 0, 'steps over which both rates rise linearly from 0 at the start', low=0)
    id_optimizer: str = key('choice', 'adam',
                            'sparse optimiser for id tables: adam (SparseAdam), adagrad or sgd',
                            choices=('adam', 'adagrad', 'sgd'))
    weight_decay: float = key('float', 1e-05,
                              'L2 penalty (wd/2)*||theta||^2 on network weights, per-pair objective',
                              low=0.0)
    id_l2: float = key('float', 0.1,
                       'lambda: penalty (lambda/2)*(sum of squared id rows and biases), in the summed objective',
                       low=0.0)
    patience: int = key('int', 3, 'stop after this many epochs without validation improvement', low=1)
    stop_metric: str | None = key('str', None,
                                  'validation metric for early stopping (default rmse for squared, recall@K '
                                  'otherwise)',
                                  nullable=True)
    epoch_order: str = key('choice', 'auto', 'how an epoch orders the pairs: permutation (one random permutation of '
                           'all pairs), windowed (blocks of 8,192 consecutive pairs in a random order, mixed '
                           'shuffle_window at a time: reads pairs on disk a block at a time), auto (windowed with '
                           'run.spill_folder, else permutation)', choices=('auto', 'permutation', 'windowed'))
    shuffle_window: int = key('int', 1 << 20, 'pairs mixed together at a time in the windowed epoch order', low=8192)
    validate_queries: int = key('int', 2000, 'at most this many validation queries are ranked each epoch', low=1)
    progress: str = key('choice', 'auto',
                        'progress bar: auto (only on a terminal), bar, or plain log lines',
                        choices=('auto', 'bar', 'plain'))

    @property
    def rating_loss(self) -> bool:
        """Squared loss: the model predicts ratings (judged by RMSE), not a ranking of events."""
        return self.loss == "squared"

    @property
    def batch_negatives(self) -> int:
        """softmax: uniformly drawn items shared by a batch, beside its own (mixed negative sampling)."""
        return (self.negatives or 0) if self.loss == "softmax" else 0

    @property
    def sampled_negatives(self) -> int:
        """Negatives drawn per positive: the logistic loss's only (softmax uses the batch's other items)."""
        if self.loss != "logistic":
            return 0
        return DEFAULT_NEGATIVES if self.negatives is None else self.negatives


@dataclass(frozen=True)
class EvaluationSection:
    """evaluation: the held-out split, the reference models and the oracle."""

    split: str = key('choice', 'random',
                     'held-out split: random, time (the latest events; needs interactions.time_column), '
                     "user_share (a share of each user's events), user_recent (each user's latest share of events; "
                     "needs time_column) or user_last (each user's last_n latest events; needs time_column)",
                     choices=('random', 'time', 'user_share', 'user_recent', 'user_last'))
    last_n: int = key('int', 1,
                      "user_last: each user's latest this-many events are the test slice (and the this-many "
                      'before them validation, when validation_fraction > 0)',
                      low=1)
    test_fraction: float = key('float', 0.1, 'share of pairs held out for the test slice', low=0.0, high=0.9)
    validation_fraction: float = key('float', 0.1,
                                     'share of the remaining pairs held out for early stopping',
                                     low=0.0, high=0.9)
    cold_item_fraction: float = key('float', 0.0,
                                    'share of items (with features) held out whole for the cold slice',
                                    low=0.0, high=0.9)
    cold_user_fraction: float = key('float', 0.0,
                                    'share of users (with features) held out whole for the cold_users slice',
                                    low=0.0, high=0.9)
    test_queries: int = key('int', 0, 'at most this many queries of each held-out slice are ranked, a seeded '
                            'sample (0: all); for logs with millions of users, where ranking every one is slow and '
                            'their known pairs are many', low=0)
    top_k: tuple[int, ...] = key('int_list', (20,), 'K values for recall@K, ndcg@K, coverage@K and popularity_pct@K')
    group_metrics_by: tuple[str, ...] = key('str_list', (),
                                            'columns of the users or items table (a segment, a category ...): '
                                            'warm-slice recall@K and ndcg@K per value of each, in metrics.json '
                                            'under "groups" and in the table')
    baseline: bool = key('bool', True, 'also train the linear factor model (ids only, no hidden layer)')
    bilinear: bool = key('bool', False,
                         'also train the bilinear model (features and ids, linear towers: no hidden layer), to '
                         "see what the towers' hidden layers add")
    references: bool = key('bool', True,
                           'implicit runs: also score EASE and item-kNN (from each query\'s training history), '
                           'each with its setting chosen on the validation pairs')
    ease_max_items: int = key('int', 10000,
                              'largest catalog EASE is fitted for (its memory grows with items^2: about 1.1 GiB '
                              'at 10,000); above it the table notes it as skipped',
                              low=1)
    baseline_solver: str = key('choice', 'gradient',
                               'how the linear factor model is trained: gradient (the same loop as the towers),'
                               ' als (ratings, squared loss) or weighted_als (implicit events)',
                               choices=('gradient', 'als', 'weighted_als'))
    baseline_rounds: int = key('int', 15,
                               'als / weighted_als: most rounds (one round solves every user row, then every '
                               'item row; early stopping may end sooner)',
                               low=1)
    baseline_row_steps: int = key('int', 3,
                                  'als / weighted_als: conjugate-gradient steps per row solve in each round; 0 '
                                  'solves every row exactly by Cholesky',
                                  low=0)
    baseline_event_weight: float = key('float', 3.0,
                                       'weighted_als: alpha in the confidence 1 + alpha * r of an observed cell '
                                       '(3: the best worst-case value in scripts/measure_defaults.py)',
                                       low=0.0)
    baseline_non_negative: bool = key('bool', False,
                                      'als: keep every factor entry >= 0 (non-negative matrix factorisation by '
                                      'HALS)')
    certificate_gap: float = key('float', 0.001,
                                 'the linear factor certificate passes when its objective is within this share '
                                 'of the global optimum (squared loss)',
                                 low=0.0, low_open=True)
    oracle_users: str | None = key('path', None,
                                   'parquet of true query vectors (id, embedding, bias), for an oracle row; '
                                   "item_item: the true users' vectors, for the expected co-occurrence",
                                   nullable=True)
    oracle_items: str | None = key('path', None,
                                   'parquet of true item vectors (id, embedding, bias), for an oracle row',
                                   nullable=True)


@dataclass(frozen=True)
class ReportSection:
    """report: report.html of a run folder."""

    enabled: bool = key('bool', True, 'write report.html into the run folder at the end of `towers train`')
    color_feature: str | None = key('str', None,
                                    'categorical item feature that colours the item map (default: the first one'
                                    ' listed)',
                                    nullable=True)
    anchors: int = key('int', 6,
                       'how many of the most popular items get a neighbour list (when anchor_ids is empty)',
                       low=0)
    anchor_ids: tuple[str | int, ...] = key('str_or_int_list', (),
                                            'item ids to show neighbour lists for, instead of the most popular '
                                            'items')
    neighbours: int = key('int', 8, 'neighbours listed per anchor item', low=1)
    map_items: int = key('int', 20000,
                         'at most this many items are drawn on the item map (a seeded random subset)',
                         low=1)


def keys_of(section_type) -> dict[str, Key]:
    """The declared keys of a section dataclass, in declaration order."""
    return {f.name: f.metadata["key"] for f in dataclasses.fields(section_type)}


FEATURE_KEYS = keys_of(FeatureSpec)
SIDE_KEYS = keys_of(SideSection)
SECTION_TYPES = {"run": RunSection, "interactions": InteractionsSection, "users": SideSection, "items": SideSection,
                 "model": ModelSection, "training": TrainingSection, "evaluation": EvaluationSection,
                 "report": ReportSection}
SCHEMA: dict[str, dict[str, Key]] = {name: keys_of(t) for name, t in SECTION_TYPES.items()}


@dataclass(frozen=True)
class Config:
    """A resolved run config: one typed section per YAML section."""

    run: RunSection
    interactions: InteractionsSection
    users: SideSection
    items: SideSection
    model: ModelSection
    training: TrainingSection
    evaluation: EvaluationSection
    report: ReportSection

    @property
    def item_item(self) -> bool:
        return self.run.mode == "item_item"

    @property
    def query_side(self) -> SideSection:
        """The section whose table feeds the query tower: items in item_item runs, users otherwise."""
        return self.items if self.item_item else self.users

    @property
    def stop_metric(self) -> str:
        """The validation metric used for early stopping (configured, or rmse / recall@K by loss)."""
        if self.training.stop_metric:
            return self.training.stop_metric
        return "rmse" if self.training.rating_loss else f"recall@{self.evaluation.top_k[0]}"

    def with_section(self, name: str, **changes) -> "Config":
        """A copy with some keys of one section changed (values as resolve would give them)."""
        return dataclasses.replace(self, **{name: dataclasses.replace(getattr(self, name), **changes)})

    def to_dict(self) -> dict:
        """Plain data (lists, dicts, strings, numbers): what config.yaml and model bundles hold."""
        return {name: _plain(dataclasses.asdict(getattr(self, name))) for name in SECTION_TYPES}


def plain(section) -> dict:
    """One typed section (or feature spec) as plain data."""
    return _plain(dataclasses.asdict(section))


def _plain(value):
    if isinstance(value, dict):
        return {k: _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    return value


def _typed_value(kind: str, value):
    if kind == "features":
        return tuple(FeatureSpec(**f) for f in value)
    if kind in ("int_list", "str_list", "str_or_int_list"):
        return tuple(value)
    return value


def section_of(name: str, values: dict):
    """One typed section from checked plain values."""
    t = SECTION_TYPES[name]
    keys = SCHEMA[name]
    return t(**{k: _typed_value(keys[k].kind, v) for k, v in values.items()})


def model_section(values: dict) -> ModelSection:
    """A ModelSection from a bundle's plain model settings (keys it lacks keep their defaults)."""
    keys = SCHEMA["model"]
    values = {"feature_bias": False} | dict(values)  # bundles written before the key have no bias output
    _settle_scale(values, None)
    return ModelSection(**{k: _typed_value(keys[k].kind, v) for k, v in values.items() if k in keys})


RENAMED_KEYS = {
    "evaluation.baseline_sweeps": "evaluation.baseline_rounds",
    "evaluation.baseline_cg_steps": "evaluation.baseline_row_steps",
    "evaluation.baseline_confidence": "evaluation.baseline_event_weight",
}
RENAMED_FEATURE_KEYS = {"min_count": "rare_below", "hash_buckets": "hashed_rows", "max_tokens": "token_limit"}


def _renamed(label: str, new: str) -> TowersError:
    return TowersError(f"config key '{label}' has a new name: '{new}'; rename it in the config (same meaning)")


def _suggest(name: str, options) -> str:
    close = difflib.get_close_matches(name, list(options), n=1)
    return f"; did you mean '{close[0]}'?" if close else f"; known keys: {', '.join(sorted(options))}"


def _check_value(label: str, key: Key, value: Any, base_dir: Path) -> Any:
    given = value  # reported as written, before any coercion below

    def bad(expected: str) -> TowersError:
        return TowersError(f"config key '{label}': got {given!r}; expected {expected}")

    if value is None:
        if key.nullable or key.default is None and key.kind in ("str", "path"):
            return None
        raise bad(f"a {key.kind} value (this key may not be empty)")
    if key.kind == "bool":
        if not isinstance(value, bool):
            raise bad("true or false")
        return value
    if key.kind in ("int", "float"):
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise bad(f"a number ({key.kind})")
        if key.kind == "int":
            if isinstance(value, float) and not value.is_integer():
                raise bad("a whole number")
            value = int(value)
        else:
            value = float(value)
            if not math.isfinite(value):
                raise bad("a finite number")
        if key.low is not None and (value <= key.low if key.low_open else value < key.low):
            raise bad(f"a number {'>' if key.low_open else '>='} {key.low}")
        if key.high is not None and value > key.high:
            raise bad(f"a number <= {key.high}")
        return value
    if key.kind == "str":
        if not isinstance(value, (str, int)) or isinstance(value, bool):
            raise bad("a string")
        return str(value)
    if key.kind == "choice":
        if value not in key.choices:
            raise bad("one of " + ", ".join(map(str, key.choices)))
        return value
    if key.kind == "path":
        if not isinstance(value, str):
            raise bad("a file path")
        p = Path(value).expanduser()
        return str(p if p.is_absolute() else (base_dir / p).resolve())
    if isinstance(value, tuple):  # a declared default
        value = list(value)
    if key.kind == "int_list":
        if not isinstance(value, list) or not all(isinstance(v, int) and not isinstance(v, bool) and v > 0 for v in value):
            raise bad("a list of positive whole numbers, e.g. [128, 64]")
        return list(value)
    if key.kind == "str_list":
        if not isinstance(value, list) or not all(isinstance(v, str) for v in value):
            raise bad("a list of names, e.g. [segment, region]")
        return list(value)
    if key.kind == "str_or_int_list":
        if not isinstance(value, list) or not all(isinstance(v, (str, int)) and not isinstance(v, bool) for v in value):
            raise bad("a list of ids (strings or whole numbers), e.g. [TR-00012, TR-00345]")
        return list(value)
    if key.kind == "features":
        if not isinstance(value, list):
            raise bad("a list of {name, kind} entries")
        out = [_check_feature(label, i, f, base_dir) for i, f in enumerate(value)]
        names = [f["name"] for f in out]
        for i, name in enumerate(names):
            if name == "id":  # the encoded block keeps the entity ids under "id"
                raise TowersError(f"config key '{label}[{i}].name': 'id' is reserved for the entity id; rename that column")
            if name in names[:i]:
                raise TowersError(f"config key '{label}[{i}].name': feature '{name}' is listed twice; list each column once")
        return out
    raise AssertionError(key.kind)


def _check_feature(label: str, index: int, spec: Any, base_dir: Path) -> dict:
    here = f"{label}[{index}]"
    if not isinstance(spec, dict):
        raise TowersError(f"config key '{here}': got {spec!r}; expected a mapping like {{name: price, kind: numeric}}")
    for k in spec:
        if k in RENAMED_FEATURE_KEYS:
            raise _renamed(f"{here}.{k}", f"{here}.{RENAMED_FEATURE_KEYS[k]}")
        if k not in FEATURE_KEYS:
            raise TowersError(f"config key '{here}.{k}' is unknown{_suggest(str(k), FEATURE_KEYS)}")
    for required in ("name", "kind"):
        if spec.get(required) is None:
            raise TowersError(f"config key '{here}.{required}' is missing; "
                              f"every feature needs a name and a kind ({', '.join(FEATURE_KINDS)})")
    if isinstance(spec.get("reference_date"), date):  # YAML reads an unquoted 2026-03-14 as a date
        spec = dict(spec, reference_date=spec["reference_date"].isoformat())
    out = {k: _check_value(f"{here}.{k}", key, spec.get(k, key.default), base_dir) for k, key in FEATURE_KEYS.items()}
    if out["kind"] == "vector" and out["length"] is None:
        raise TowersError(f"config key '{here}.length' is missing; a vector feature needs its fixed length")
    for k, kinds in FEATURE_KEY_KINDS.items():
        if out[k] != FEATURE_KEYS[k].default and out["kind"] not in kinds:
            fits = f", or set kind: {kinds[0]} if that is what the column holds" if len(kinds) == 1 else ""
            raise TowersError(f"config key '{here}.{k}': applies to {' or '.join(kinds)} features only (this one is "
                              f"{out['kind']}); remove it{fits}")
    if out["clip_lower"] is not None and out["clip_upper"] is not None and out["clip_lower"] >= out["clip_upper"]:
        raise TowersError(f"config key '{here}.clip_lower': got {out['clip_lower']!r}; expected a quantile below "
                          f"clip_upper ({out['clip_upper']!r})")
    if out["reference_date"] is not None:
        try:
            datetime.fromisoformat(out["reference_date"])
        except ValueError:
            raise TowersError(f"config key '{here}.reference_date': got {out['reference_date']!r}; expected an ISO "
                              "date or timestamp such as 2026-03-14 or 2026-03-14T09:30:00+01:00") from None
    return out


def resolve(raw: dict, base_dir: Path) -> Config:
    """Check a raw config mapping against SCHEMA, fill defaults, apply the cross-key rules; paths resolve
    against base_dir."""
    if not isinstance(raw, dict):
        raise TowersError(f"config: the top level must be a mapping of sections ({', '.join(SCHEMA)})")
    for section in raw:
        if section not in SCHEMA:
            raise TowersError(f"config section '{section}' is unknown{_suggest(str(section), SCHEMA)}")
    out: dict[str, dict] = {}
    for section, keys in SCHEMA.items():
        given = raw.get(section)
        given = {} if given is None else given
        if not isinstance(given, dict):
            raise TowersError(f"config section '{section}': expected a mapping of keys, got {given!r}")
        for k in given:
            if f"{section}.{k}" in RENAMED_KEYS:
                raise _renamed(f"{section}.{k}", RENAMED_KEYS[f"{section}.{k}"])
            if k not in keys:
                raise TowersError(f"config key '{section}.{k}' is unknown{_suggest(str(k), keys)}")
        out[section] = {k: _check_value(f"{section}.{k}", key, copy.deepcopy(given.get(k, key.default)), base_dir)
                        for k, key in keys.items()}
    _check_consistency(out)
    _settle_scale(out["model"], out["training"]["loss"])
    return Config(**{name: section_of(name, values) for name, values in out.items()})


def _settle_scale(model: dict, loss: str | None) -> None:
    """Fill an empty model.normalize (on under the softmax loss from NORMALIZE_FROM_DIM) and model.temperature
    (NORMALIZED_TEMPERATURE with normalised vectors, else 1), so a resolved config and every run folder hold plain
    values."""
    if model.get("normalize") is None:
        model["normalize"] = loss == "softmax" and model.get("dim", NORMALIZE_FROM_DIM) >= NORMALIZE_FROM_DIM
    if model.get("temperature") is None:
        model["temperature"] = settled_temperature(model["normalize"])


def settled_temperature(normalize: bool) -> float:
    """The temperature an empty model.temperature means: NORMALIZED_TEMPERATURE for normalised vectors, else 1
    (raw dot products scale themselves)."""
    return NORMALIZED_TEMPERATURE if normalize else 1.0


def _check_consistency(cfg: dict) -> None:
    _check_derived(cfg)
    derived = cfg["interactions"]["pairs_from"] != "rows"
    for name in ("candidate_column",) if derived else ("query_column", "candidate_column"):
        if not cfg["interactions"][name]:
            raise TowersError(f"config key 'interactions.{name}' is missing; name the id column of the interaction log")
    if not cfg["interactions"]["path"]:
        raise TowersError("config key 'interactions.path' is missing; give the interaction log (CSV or parquet)")
    for side in ("users", "items"):
        s = cfg[side]
        if s["path"] and not s["id_column"]:
            raise TowersError(f"config key '{side}.id_column' is missing; name the id column of {s['path']}")
        if s["features"] and not s["path"]:
            raise TowersError(f"config key '{side}.path' is missing; features were listed but no feature table given")
    if cfg["run"]["mode"] == "item_item" and any(v != _plain(SIDE_KEYS[k].default) for k, v in cfg["users"].items()):
        raise TowersError("config: item_item mode draws both sides from 'items'; "
                          "remove the 'users' section or use mode user_item")
    if cfg["model"]["history_length"] and cfg["model"]["history_past_only"] and not cfg["interactions"]["time_column"]:
        raise TowersError("config key 'model.history_past_only': keeping only the items from before each pair needs "
                          "the time of each event; set interactions.time_column or set history_past_only false")
    if cfg["model"]["history_length"] and cfg["run"]["mode"] == "item_item":
        raise TowersError("config key 'model.history_length': a history is a user's items, so user_item mode only; "
                          "set it to 0")
    if cfg["model"]["shared_tower"] and cfg["run"]["mode"] != "item_item":
        raise TowersError("config key 'model.shared_tower': only item_item mode can share one tower; set it false")
    _check_context(cfg)
    ev = cfg["evaluation"]
    if ev["cold_item_fraction"] > 0 and not cfg["items"]["features"]:
        raise TowersError("config key 'evaluation.cold_item_fraction': a cold-start split needs item features "
                          "(items.features); set it to 0 or add features")
    _check_split(cfg)
    if ev["test_fraction"] + ev["validation_fraction"] >= 0.95:
        raise TowersError("config keys 'evaluation.test_fraction' + 'validation_fraction' leave almost no training data; "
                          "lower them")
    if not ev["top_k"]:
        raise TowersError("config key 'evaluation.top_k': give at least one K, e.g. [20]")
    if (ev["oracle_users"] is None) != (ev["oracle_items"] is None):
        raise TowersError("config keys 'evaluation.oracle_users' and 'oracle_items' go together; give both or neither")
    stop = cfg["training"]["stop_metric"]
    if stop is not None:
        allowed = {"rmse", "mae"} if cfg["training"]["loss"] == "squared" else {"mrr", "auc"} | {
            f"{m}@{k}" for m in ("recall", "ndcg") for k in ev["top_k"]}
        if stop not in allowed:
            raise TowersError(f"config key 'training.stop_metric': got {stop!r}; expected one of {', '.join(sorted(allowed))}")
    training = cfg["training"]
    if training["negatives"] and training["loss"] == "squared":
        raise TowersError(f"config key 'training.negatives': got {training['negatives']}; expected empty or 0, since "
                          "training.loss is squared (ratings need no negatives; remove the key, or use loss: logistic "
                          "or softmax for events)")
    _check_baseline_solver(cfg)
    colour = cfg["report"]["color_feature"]
    categorical = [f["name"] for f in cfg["items"]["features"] if f["kind"] == "categorical"]
    if colour is not None and colour not in categorical:
        raise TowersError(f"config key 'report.color_feature': got {colour!r}; expected one of the categorical item "
                          f"features ({', '.join(categorical)})" if categorical else
                          f"config key 'report.color_feature': got {colour!r}; expected null (items.features lists no "
                          "categorical feature)")


def _check_split(cfg: dict) -> None:
    """The split's own needs: a time column for the time-ordered splits, users for the per-user ones."""
    ev, ic = cfg["evaluation"], cfg["interactions"]
    split, item_item = ev["split"], cfg["run"]["mode"] == "item_item"
    if split in ("time", "user_recent", "user_last") and not ic["time_column"]:
        raise TowersError(f"config key 'evaluation.split': {split!r} needs interactions.time_column; set it or use "
                          f"split: {'random' if split == 'time' else 'user_share'}")
    if split in ("user_share", "user_recent", "user_last") and item_item:
        raise TowersError(f"config key 'evaluation.split': got {split!r}; expected random or time in item_item mode "
                          "(per-user splits need users; use run.mode: user_item, or split: random)")
    if ev["last_n"] != 1 and split != "user_last":
        raise TowersError(f"config key 'evaluation.last_n': got {ev['last_n']}; expected 1 unless evaluation.split is "
                          "user_last (remove the key, or use split: user_last)")
    if ev["cold_user_fraction"] > 0 and item_item:
        raise TowersError("config key 'evaluation.cold_user_fraction': item_item mode has no users; set it to 0 "
                          "(cold_item_fraction holds out items)")
    if ev["cold_user_fraction"] > 0 and not cfg["users"]["features"]:
        raise TowersError("config key 'evaluation.cold_user_fraction': a cold-user split needs user features "
                          "(users.features); set it to 0 or add features")
    group = ic["group_column"]
    if group is not None and group in (ic["query_column"], ic["candidate_column"]):
        raise TowersError(f"config key 'interactions.group_column': got {group!r}; expected a column other than the id "
                          "columns (to hold out whole users or items use evaluation.cold_user_fraction or "
                          "cold_item_fraction)")


def _check_derived(cfg: dict) -> None:
    """Pairs derived from baskets or sessions, and repeats counted: the columns each needs and refuses."""
    ic = cfg["interactions"]
    source = ic["pairs_from"]
    here = f"config key 'interactions.pairs_from': got {source!r}"
    if source != "rows":
        if cfg["run"]["mode"] != "item_item":
            raise TowersError(f"{here}; expected rows in user_item mode (pairs of items need run.mode: item_item; "
                              "for customers and items from an order export use count_repeats)")
        if not ic["group_column"]:
            raise TowersError(f"config key 'interactions.group_column' is missing; pairs_from {source} needs the "
                              f"column holding the {'basket or order' if source == 'baskets' else 'session'} id")
        for name in ("query_column", "target_column", "weight_column"):
            if ic[name]:
                raise TowersError(f"config key 'interactions.{name}': got {ic[name]!r}; expected it empty with pairs_from "
                                  f"{source} (pairs pair two items of candidate_column, weighted by their count)")
        if ic["context"]:
            raise TowersError(f"config key 'interactions.context': pairs_from {source} derives pairs without event "
                              "context; remove it")
        if ic["count_repeats"]:
            raise TowersError(f"config key 'interactions.count_repeats': got True; expected false with pairs_from "
                              f"{source} (derived pairs are counts already)")
    if source == "sessions" and not ic["time_column"]:
        raise TowersError("config key 'interactions.time_column' is missing; pairs_from sessions pairs views within "
                          "session_minutes, so it needs the view time")
    if source == "sessions" and ic["quantity_column"]:
        raise TowersError(f"config key 'interactions.quantity_column': got {ic['quantity_column']!r}; expected empty "
                          "with pairs_from sessions (views have no quantity)")
    if ic["quantity_column"] and source == "rows" and not ic["count_repeats"]:
        raise TowersError(f"config key 'interactions.quantity_column': got {ic['quantity_column']!r}; expected empty "
                          "unless pairs_from is baskets or count_repeats is true (use weight_column to weight rows)")
    if ic["count_repeats"]:
        for name in ("target_column", "weight_column"):
            if ic[name]:
                raise TowersError(f"config key 'interactions.{name}': got {ic[name]!r}; expected it empty with "
                                  "count_repeats (the count of each pair's rows becomes its weight)")
        if ic["context"]:
            raise TowersError("config key 'interactions.context': count_repeats merges events with different "
                              "contexts; remove the context columns or set count_repeats: false")


def _check_baseline_solver(cfg: dict) -> None:
    """ALS fits ratings, weighted ALS fits events; both need lambda > 0 and two separate id tables."""
    ev = cfg["evaluation"]
    solver, loss = ev["baseline_solver"], cfg["training"]["loss"]
    here = f"config key 'evaluation.baseline_solver': got {solver!r}"
    if solver == "als" and loss != "squared":
        raise TowersError(f"{here}; expected gradient or weighted_als, since training.loss is {loss} "
                          "(als fits ratings under squared loss; weighted_als fits implicit events)")
    if solver == "weighted_als" and loss == "squared":
        raise TowersError(f"{here}; expected gradient or als, since training.loss is squared "
                          "(weighted_als is for implicit events; als fits ratings)")
    if solver != "gradient" and cfg["training"]["id_l2"] <= 0:
        raise TowersError(f"{here}; expected gradient while training.id_l2 is 0 (ALS row solves need lambda > 0; raise id_l2)")
    if solver != "gradient" and cfg["model"]["id_table_rows"]:
        raise TowersError(f"{here}; expected gradient with model.id_table_rows > 0 (ALS solves one row per id, the "
                          "bounded tables compose each id's row from two shared ones; set baseline_solver: gradient, "
                          "or id_table_rows: 0)")
    if solver != "gradient" and cfg["run"]["mode"] == "item_item" and cfg["model"]["shared_tower"]:
        raise TowersError(f"{here}; expected gradient with model.shared_tower: true "
                          "(ALS alternates between two separate id tables; set shared_tower: false)")
    if ev["baseline_non_negative"] and solver != "als":
        raise TowersError("config key 'evaluation.baseline_non_negative': got True; expected false unless "
                          "evaluation.baseline_solver is als (non-negative factors are fitted by HALS under squared loss)")


def _check_context(cfg: dict) -> None:
    """Context columns feed the query tower; their names share its input namespace."""
    context = cfg["interactions"]["context"]
    if not context:
        return
    side = "items" if cfg["run"]["mode"] == "item_item" else "users"
    taken = {f["name"] for f in cfg[side]["features"]}
    own = {cfg["interactions"][k] for k in ("query_column", "candidate_column", "target_column", "weight_column")}
    for i, f in enumerate(context):
        here = f"config key 'interactions.context[{i}]"
        if f["kind"] not in CONTEXT_KINDS:
            raise TowersError(f"{here}.kind': got {f['kind']!r}; context columns are numeric, categorical or date")
        if f["name"] in taken:
            raise TowersError(f"{here}.name': '{f['name']}' is also a {side} feature; rename one of the columns")
        if f["name"] in own:
            raise TowersError(f"{here}.name': '{f['name']}' is already an id, target or weight column; "
                              "list only the columns that describe the event")
    if cfg["run"]["mode"] == "item_item":
        raise TowersError("config key 'interactions.context': context columns are for user_item runs; "
                          "remove them or use mode user_item")
    if cfg["model"]["shared_tower"]:
        raise TowersError("config key 'interactions.context': a shared tower embeds both sides alike, but context "
                          "belongs to the query side only; set model.shared_tower: false")


def lower_is_better(metric: str) -> bool:
    return metric in ("rmse", "mae")


def load(path: str | Path, overrides: dict | None = None) -> Config:
    """Read a YAML config with yaml.safe_load and resolve it."""
    path = Path(path)
    if not path.is_file():
        raise TowersError(f"{path}: config file not found; give the path to a YAML config (see configs/)")
    try:
        raw = yaml.safe_load(path.read_text(encoding="utf-8-sig"))
    except UnicodeDecodeError:
        raise TowersError(f"{path}: not UTF-8 text; save the config as UTF-8 YAML") from None
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        line = f", line {mark.line + 1}" if mark is not None else ""
        raise TowersError(f"{path}{line}: not valid YAML ({getattr(exc, 'problem', exc)}); fix the syntax") from None
    raw = {} if raw is None else raw
    if overrides and isinstance(raw, dict):
        raw = copy.deepcopy(raw)
        for section, keys in overrides.items():
            if raw.get(section) is None:
                raw[section] = {}
            if isinstance(raw[section], dict):
                raw[section].update(keys)
    try:
        return resolve(raw, path.resolve().parent)
    except TowersError as exc:  # name the file, as every input error does
        raise TowersError(f"{path}: {exc}") from None


def dump(cfg: Config) -> str:
    """The resolved config as YAML text (absolute paths, every default filled in)."""
    return yaml.safe_dump(cfg.to_dict(), sort_keys=False)


def bilinear_preset(cfg: Config) -> Config:
    """The bilinear model: each tower a linear map of its features and id row (no hidden layer)."""
    return cfg.with_section("model", hidden=(), dropout=0.0)


def linear_factor_preset(cfg: Config) -> Config:
    """The linear factor model (matrix factorisation with biases) as a preset of the same towers."""
    base = cfg.with_section("model", hidden=(), use_ids=True, id_dropout=0.0, normalize=False, temperature=1.0,
                            non_negative=False, dropout=0.0, id_dim=None)
    return base.with_section("users", features=()).with_section("items", features=())


def drop_misplaced_feature_keys(raw: dict) -> dict:
    """A saved run config with each feature's keys of other kinds left out (FEATURE_KEY_KINDS): runs written
    before such keys were refused saved them (a separator on a categorical feature, ignored then), and a run
    must still open."""
    for section in ("items", "users", "interactions"):
        part = raw.get(section) if isinstance(raw, dict) else None
        specs = part.get("context" if section == "interactions" else "features") if isinstance(part, dict) else None
        for spec in specs if isinstance(specs, list) else []:
            if isinstance(spec, dict):
                for k, kinds in FEATURE_KEY_KINDS.items():
                    if k in spec and spec.get("kind") not in kinds:
                        del spec[k]
    return raw


def first_difference(a: dict, b: dict, prefix: str = "") -> str:
    """The first key (dotted, in sorted order) whose value differs between two configs as plain YAML values,
    as "key: old then, new now"; "" when they are equal."""
    for k in sorted(set(a) | set(b), key=str):
        then, now = a.get(k), b.get(k)
        if then != now:
            if isinstance(then, dict) and isinstance(now, dict):
                return first_difference(then, now, f"{prefix}{k}.")
            if isinstance(then, list) and isinstance(now, list) and len(then) == len(now):  # a feature list: its entry
                i = next(i for i, (x, y) in enumerate(zip(then, now)) if x != y)
                if isinstance(then[i], dict) and isinstance(now[i], dict):
                    return first_difference(then[i], now[i], f"{prefix}{k}[{i}].")
                return f"{prefix}{k}[{i}]: {then[i]!r} then, {now[i]!r} now"
            return f"{prefix}{k}: {then!r} then, {now!r} now"
    return ""
