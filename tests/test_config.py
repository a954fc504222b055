"""Config schema, validation and YAML handling (towers/config.py)."""

from __future__ import annotations

import copy
import dataclasses
from pathlib import Path

import pytest
import yaml

from towers import config as C
from towers.errors import TowersError


def minimal(**sections) -> dict:
    """The smallest valid raw config, with extra sections merged in."""
    raw = {"interactions": {"path": "log.csv", "query_column": "user", "candidate_column": "item"}}
    for name, keys in sections.items():
        raw.setdefault(name, {}).update(keys)
    return raw


def items_with_features(**extra) -> dict:
    return {"path": "items.csv", "id_column": "item", "features": [{"name": "price", "kind": "numeric"}], **extra}


def write(path: Path, text: str) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(text, encoding="utf-8")
    return path


# ---------------------------------------------------------------- defaults


def test_every_schema_key_is_filled_with_its_default(tmp_path):
    cfg = C.resolve(minimal(), tmp_path)
    plain = cfg.to_dict()
    assert list(plain) == list(C.SCHEMA)
    for section, keys in C.SCHEMA.items():
        assert set(plain[section]) == set(keys), section
        for name, key in keys.items():
            if section == "interactions" and name in ("path", "query_column", "candidate_column"):
                continue
            if section == "model" and name in ("normalize", "temperature"):
                continue  # settled by the loss (next test)
            assert getattr(getattr(cfg, section), name) == key.default, f"{section}.{name}"
    assert cfg.training.epochs == 20
    assert cfg.model.hidden == (128,)
    assert cfg.users.features == ()


@pytest.mark.parametrize("loss, normalize, temperature", [("softmax", True, C.NORMALIZED_TEMPERATURE),
                                                          ("logistic", False, 1.0), ("squared", False, 1.0)])
def test_empty_normalize_and_temperature_are_settled_by_the_loss(tmp_path, loss, normalize, temperature):
    raw = minimal()
    raw["training"] = {"loss": loss}
    cfg = C.resolve(raw, tmp_path)
    assert (cfg.model.normalize, cfg.model.temperature) == (normalize, temperature)
    assert C.dump(cfg).count("normalize: null") == 0  # a run folder's config holds plain values
    raw["model"] = {"normalize": not normalize}
    flipped = C.resolve(raw, tmp_path).model
    assert (flipped.normalize, flipped.temperature) == (not normalize, 1.0 if normalize else C.NORMALIZED_TEMPERATURE)
    raw["model"] = {"normalize": True, "temperature": 0.5}
    assert C.resolve(raw, tmp_path).model.temperature == 0.5
    raw["model"] = {"dim": C.NORMALIZE_FROM_DIM - 1}  # a small k keeps all its numbers
    assert (C.resolve(raw, tmp_path).model.normalize, C.resolve(raw, tmp_path).model.temperature) == (False, 1.0)


def test_a_bundle_written_before_feature_bias_loads_without_the_head():
    old = {"dim": 4, "hidden": [8], "normalize": False, "temperature": 1.0}  # no feature_bias key
    assert C.model_section(old).feature_bias is False
    assert C.model_section(old | {"feature_bias": True}).feature_bias is True


def test_resolved_sections_are_frozen_and_changed_by_copy(tmp_path):
    cfg = C.resolve(minimal(), tmp_path)
    with pytest.raises(dataclasses.FrozenInstanceError):
        cfg.model.dim = 3
    assert isinstance(cfg.model.hidden, tuple) and isinstance(cfg.evaluation.top_k, tuple)
    changed = cfg.with_section("model", dim=4)
    assert changed.model.dim == 4 and cfg.model.dim == 32
    assert changed.training is cfg.training  # the other sections are shared, not copied


def test_derived_facts_are_computed_once_in_the_config(tmp_path):
    default = C.resolve(minimal(), tmp_path)  # events by default: the in-batch softmax
    assert default.training.loss == "softmax" and default.training.sampled_negatives == 0
    logistic = C.resolve(minimal(training={"loss": "logistic"}), tmp_path)
    assert logistic.training.sampled_negatives == 4 and not logistic.training.rating_loss
    assert C.resolve(minimal(training={"loss": "logistic", "negatives": 7}), tmp_path).training.sampled_negatives == 7
    for loss in ("softmax", "squared"):
        cfg = C.resolve(minimal(training={"loss": loss}), tmp_path)
        assert cfg.training.sampled_negatives == 0
        assert cfg.training.rating_loss == (loss == "squared")
    assert C.resolve(minimal(run={"mode": "item_item"}), tmp_path).query_side.features == ()


def test_negatives_with_the_squared_loss_is_an_error(tmp_path):
    with pytest.raises(TowersError, match=r"^config key 'training\.negatives': got 3; .*training\.loss is squared"):
        C.resolve(minimal(training={"loss": "squared", "negatives": 3}), tmp_path)
    assert C.resolve(minimal(training={"loss": "squared", "negatives": 0}), tmp_path).training.sampled_negatives == 0


def test_softmax_negatives_are_drawn_per_batch_not_per_pair(tmp_path):
    cfg = C.resolve(minimal(training={"loss": "softmax", "negatives": 3}), tmp_path).training
    assert (cfg.batch_negatives, cfg.sampled_negatives) == (3, 0)
    assert C.resolve(minimal(training={"loss": "softmax"}), tmp_path).training.batch_negatives == 0
    logistic = C.resolve(minimal(training={"loss": "logistic"}), tmp_path).training
    assert logistic.batch_negatives == 0 and logistic.sampled_negatives == 4  # logistic draws per pair instead


def test_empty_sections_mean_all_defaults(tmp_path):
    cfg = C.resolve(minimal(model={}) | {"users": None}, tmp_path)
    assert cfg.users.path is None and cfg.model.dim == 32


def test_given_values_are_kept_and_coerced(tmp_path):
    cfg = C.resolve(minimal(model={"dim": 8.0, "hidden": [], "temperature": 1}, training={"epochs": 3}), tmp_path)
    assert cfg.model.dim == 8 and isinstance(cfg.model.dim, int)
    assert cfg.model.temperature == 1.0 and isinstance(cfg.model.temperature, float)
    assert cfg.model.hidden == ()
    assert cfg.training.epochs == 3


def test_integer_column_names_become_text(tmp_path):
    raw = minimal()
    raw["interactions"].update(query_column=0, candidate_column=1)
    cfg = C.resolve(raw, tmp_path)
    assert cfg.interactions.query_column == "0" and cfg.interactions.candidate_column == "1"


# ---------------------------------------------------------------- unknown names


def test_unknown_key_suggests_the_closest_name(tmp_path):
    with pytest.raises(TowersError) as err:
        C.resolve(minimal(training={"epocs": 5}), tmp_path)
    assert "'training.epocs' is unknown" in str(err.value)
    assert "did you mean 'epochs'?" in str(err.value)


@pytest.mark.parametrize("section, old, new", [
    ("evaluation", "baseline_sweeps", "baseline_rounds"),
    ("evaluation", "baseline_cg_steps", "baseline_row_steps"),
    ("evaluation", "baseline_confidence", "baseline_event_weight"),
])
def test_an_old_key_name_is_an_error_naming_the_new_one(tmp_path, section, old, new):
    with pytest.raises(TowersError, match=rf"^config key '{section}\.{old}' has a new name: '{section}\.{new}'"):
        C.resolve(minimal(**{section: {old: 3}}), tmp_path)


@pytest.mark.parametrize("old, new", [("min_count", "rare_below"), ("hash_buckets", "hashed_rows"),
                                      ("max_tokens", "token_limit")])
def test_an_old_feature_key_name_is_an_error_naming_the_new_one(tmp_path, old, new):
    items = {"path": "items.csv", "id_column": "item", "features": [{"name": "tags", "kind": "tokens", old: 2}]}
    with pytest.raises(TowersError, match=rf"'items\.features\[0\]\.{old}' has a new name: "
                                          rf"'items\.features\[0\]\.{new}'"):
        C.resolve(minimal(items=items), tmp_path)


def test_unknown_section_suggests_the_closest_name(tmp_path):
    with pytest.raises(TowersError, match=r"section 'trainig' is unknown; did you mean 'training'\?"):
        C.resolve(minimal() | {"trainig": {"epochs": 3}}, tmp_path)


def test_unknown_key_without_close_match_lists_the_known_keys(tmp_path):
    with pytest.raises(TowersError) as err:
        C.resolve(minimal(run={"zzzzzz": 1}), tmp_path)
    msg = str(err.value)
    assert "did you mean" not in msg
    assert "known keys: divide_log, mode, reuse_memory, seed, spill_folder, threads" in msg


def test_top_level_must_be_a_mapping(tmp_path):
    with pytest.raises(TowersError, match="top level must be a mapping"):
        C.resolve([1, 2], tmp_path)


@pytest.mark.parametrize("value", [[], False, 0, "dim: 3", [1]])
def test_a_section_that_is_not_a_mapping_is_rejected(tmp_path, value):
    raw = minimal()
    raw["model"] = value
    with pytest.raises(TowersError, match="config section 'model': expected a mapping"):
        C.resolve(raw, tmp_path)


# ---------------------------------------------------------------- types and ranges

BAD_VALUES = [
    ("model", "dim", 0, "a number >= 1"),
    ("model", "dim", -3, "a number >= 1"),
    ("model", "dim", 2.5, "a whole number"),
    ("model", "dim", True, "a number (int)"),
    ("model", "dim", "32", "a number (int)"),
    ("training", "epochs", True, "a number (int)"),
    ("training", "batch_size", False, "a number (int)"),
    ("training", "weight_decay", -1e-6, "a number >= 0.0"),
    ("training", "weight_decay", float("inf"), "a finite number"),
    ("training", "learning_rate", 0, "a number > 0.0"),
    ("training", "learning_rate", -0.1, "a number > 0.0"),
    ("training", "learning_rate", float("nan"), "a finite number"),
    ("training", "id_learning_rate", 0.0, "a number > 0.0"),
    ("model", "temperature", 0, "a number > 0.0"),
    ("model", "temperature", float("nan"), "a finite number"),
    ("model", "dropout", 0.96, "a number <= 0.95"),
    ("model", "id_dropout", 1.5, "a number <= 1.0"),
    ("model", "id_table_rows", -1, "a number >= 0"),
    ("model", "id_table_rows", 2.5, "a whole number"),
    ("model", "id_table_combine", "concat", "one of product, sum"),
    ("model", "hidden", 128, "a list of positive whole numbers"),
    ("model", "hidden", "128", "a list of positive whole numbers"),
    ("model", "hidden", [128, 0], "a list of positive whole numbers"),
    ("model", "hidden", [64.5], "a list of positive whole numbers"),
    ("model", "hidden", [True], "a list of positive whole numbers"),
    ("model", "hidden", None, "may not be empty"),
    ("model", "normalize", "yes", "true or false"),
    ("model", "normalize", 1, "true or false"),
    ("model", "activation", "sigmoid", "one of relu, gelu, tanh, silu"),
    ("run", "mode", "pairs", "one of user_item, item_item"),
    ("run", "seed", -1, "a number >= 0"),
    ("run", "reuse_memory", "yes", "true or false"),
    ("training", "loss", "hinge", "one of squared, logistic"),
    ("evaluation", "top_k", [0], "a list of positive whole numbers"),
    ("evaluation", "test_fraction", 0.91, "a number <= 0.9"),
    ("evaluation", "split", "session", "one of random, time, user_share, user_recent, user_last"),
    ("evaluation", "last_n", 0, "a number >= 1"),
    ("evaluation", "last_n", 1.5, "a whole number"),
    ("evaluation", "cold_user_fraction", 0.95, "a number <= 0.9"),
    ("evaluation", "cold_user_fraction", -0.1, "a number >= 0.0"),
    ("interactions", "group_column", ["order"], "a string"),
    ("interactions", "weight_column", ["w"], "a string"),
]


@pytest.mark.parametrize("section,key,value,expected", BAD_VALUES)
def test_wrong_types_and_ranges_name_the_key_the_value_and_the_expectation(tmp_path, section, key, value, expected):
    with pytest.raises(TowersError) as err:
        C.resolve(minimal(**{section: {key: value}}), tmp_path)
    msg = str(err.value)
    assert msg.startswith(f"config key '{section}.{key}': got {value!r}; expected"), msg
    assert expected in msg
    assert "\n" not in msg


@pytest.mark.parametrize("section,key,value", [
    ("model", "dim", 1),
    ("model", "temperature", 1e-6),
    ("model", "dropout", 0.95),
    ("model", "id_dropout", 1.0),
    ("model", "id_table_rows", 0),
    ("model", "id_table_combine", "sum"),
    ("training", "weight_decay", 0),
    ("training", "negatives", 0),
    ("evaluation", "test_fraction", 0.0),
])
def test_boundary_values_are_accepted(tmp_path, section, key, value):
    assert getattr(getattr(C.resolve(minimal(**{section: {key: value}}), tmp_path), section), key) == value


# ---------------------------------------------------------------- feature specs


def resolve_items(tmp_path, features, **extra):
    return C.resolve(minimal(items={"path": "items.csv", "id_column": "item", "features": features, **extra}), tmp_path)


def test_feature_defaults_are_filled(tmp_path):
    cfg = resolve_items(tmp_path, [{"name": "tags", "kind": "tokens"}, {"name": "emb", "kind": "vector", "length": 4}])
    tags, emb = cfg.items.features
    assert set(C.plain(tags)) == set(C.FEATURE_KEYS)
    assert C.plain(tags) == {"name": "tags", "kind": "tokens", "rare_below": 1, "hashed_rows": 0, "separator": "|",
                             "token_limit": 32, "length": None, "dim": None, "log1p": False, "clip_lower": None,
                             "clip_upper": None, "reference_date": None, "calendar": False}
    assert emb.length == 4


@pytest.mark.parametrize("spec,pattern", [
    ({"kind": "numeric"}, r"'items\.features\[0\]\.name' is missing"),
    ({"name": "price"}, r"'items\.features\[0\]\.kind' is missing"),
    ({"name": "price", "kind": None}, r"'items\.features\[0\]\.kind' is missing"),
    ({"name": "price", "kind": "text"},
     r"'items\.features\[0\]\.kind': got 'text'; expected one of numeric, categorical, tokens, vector"),
    ({"name": "emb", "kind": "vector"}, r"'items\.features\[0\]\.length' is missing; a vector feature needs its fixed length"),
    ({"name": "emb", "kind": "vector", "length": 0}, r"'items\.features\[0\]\.length': got 0"),
    ({"name": "emb", "kind": "vector", "lenght": 4}, r"'items\.features\[0\]\.lenght' is unknown; did you mean 'length'\?"),
    ({"name": "c", "kind": "categorical", "rare_below": 0}, r"'items\.features\[0\]\.rare_below': got 0"),
    ({"name": "c", "kind": "categorical", "hashed_rows": -1}, r"'items\.features\[0\]\.hashed_rows': got -1"),
    ("price", r"'items\.features\[0\]': got 'price'; expected a mapping"),
])
def test_bad_feature_specs(tmp_path, spec, pattern):
    with pytest.raises(TowersError, match=pattern):
        resolve_items(tmp_path, [spec])


def test_feature_error_names_the_right_index(tmp_path):
    with pytest.raises(TowersError, match=r"'items\.features\[1\]\.kind' is missing"):
        resolve_items(tmp_path, [{"name": "a", "kind": "numeric"}, {"name": "b"}])


def test_features_must_be_a_list(tmp_path):
    with pytest.raises(TowersError, match=r"'items\.features': got .*; expected a list"):
        resolve_items(tmp_path, {"name": "a", "kind": "numeric"})


def test_a_feature_listed_twice_is_rejected(tmp_path):
    # Encoded features are keyed by column name, so a second entry would overwrite the first.
    with pytest.raises(TowersError, match=r"'items\.features\[1\]\.name': feature 'a' is listed twice"):
        resolve_items(tmp_path, [{"name": "a", "kind": "numeric"}, {"name": "a", "kind": "categorical"}])


def test_a_feature_named_id_is_rejected(tmp_path):
    # The encoded block keeps the entity ids under "id"; a feature of that name would replace them.
    with pytest.raises(TowersError, match=r"'items\.features\[0\]\.name': 'id' is reserved"):
        resolve_items(tmp_path, [{"name": "id", "kind": "categorical"}])


# ---------------------------------------------------------------- contradictions


@pytest.mark.parametrize("sections,pattern", [
    ({"evaluation": {"cold_item_fraction": 0.1}}, r"'evaluation\.cold_item_fraction': a cold-start split needs item features"),
    ({"evaluation": {"split": "time"}}, r"'evaluation\.split': 'time' needs interactions\.time_column"),
    ({"model": {"shared_tower": True}}, r"'model\.shared_tower': only item_item mode"),
    ({"run": {"mode": "item_item"}, "users": {"path": "users.csv", "id_column": "user"}},
     r"item_item mode draws both sides from 'items'"),
    ({"run": {"mode": "item_item"}, "users": {"missing_rows": "drop"}}, r"item_item mode draws both sides from 'items'"),
    ({"users": {"path": "users.csv"}}, r"'users\.id_column' is missing"),
    ({"items": {"features": [{"name": "p", "kind": "numeric"}]}}, r"'items\.path' is missing; features were listed"),
    ({"evaluation": {"test_fraction": 0.5, "validation_fraction": 0.45}}, r"leave almost no training data"),
    ({"evaluation": {"top_k": []}}, r"'evaluation\.top_k': give at least one K"),
    ({"evaluation": {"oracle_users": "u.parquet"}}, r"'evaluation\.oracle_users' and 'oracle_items' go together"),
    ({"run": {"mode": "item_item"}, "evaluation": {"oracle_items": "i.parquet"}},
     r"'evaluation\.oracle_users' and 'oracle_items' go together"),  # item_item's oracle needs both files too
    ({"training": {"stop_metric": "rmse"}}, r"'training\.stop_metric': got 'rmse'; expected one of auc, mrr, ndcg@20, recall@20"),
    ({"training": {"loss": "squared", "stop_metric": "recall@20"}}, r"expected one of mae, rmse"),
    ({"training": {"stop_metric": "recall@10"}}, r"'training\.stop_metric'"),
    ({"evaluation": {"split": "user_last"}},
     r"^config key 'evaluation\.split': 'user_last' needs interactions\.time_column; set it or use split: user_share$"),
    ({"evaluation": {"split": "user_recent", "test_fraction": 0.2}},
     r"^config key 'evaluation\.split': 'user_recent' needs interactions\.time_column; set it or use split: user_share$"),
    ({"run": {"mode": "item_item"}, "interactions": {"time_column": "ts"}, "evaluation": {"split": "user_recent"}},
     r"^config key 'evaluation\.split': got 'user_recent'; expected random or time in item_item mode"),
    ({"evaluation": {"split": "user_recent", "last_n": 2}, "interactions": {"time_column": "ts"}},
     r"^config key 'evaluation\.last_n': got 2; expected 1 unless evaluation\.split is user_last"),
    ({"run": {"mode": "item_item"}, "evaluation": {"split": "user_share"}},
     r"^config key 'evaluation\.split': got 'user_share'; expected random or time in item_item mode"),
    ({"run": {"mode": "item_item"}, "interactions": {"time_column": "ts"}, "evaluation": {"split": "user_last"}},
     r"^config key 'evaluation\.split': got 'user_last'; expected random or time in item_item mode"),
    ({"evaluation": {"last_n": 3}}, r"^config key 'evaluation\.last_n': got 3; expected 1 unless evaluation\.split is user_last"),
    ({"evaluation": {"cold_user_fraction": 0.1}},
     r"^config key 'evaluation\.cold_user_fraction': a cold-user split needs user features \(users\.features\)"),
    ({"run": {"mode": "item_item"}, "evaluation": {"cold_user_fraction": 0.1}},
     r"^config key 'evaluation\.cold_user_fraction': item_item mode has no users; set it to 0"),
    ({"interactions": {"group_column": "user"}},
     r"^config key 'interactions\.group_column': got 'user'; expected a column other than the id columns"),
    ({"model": {"id_table_rows": 1000}, "training": {"loss": "squared"}, "interactions": {"target_column": "r"},
      "evaluation": {"baseline_solver": "als"}},
     r"^config key 'evaluation\.baseline_solver': got 'als'; expected gradient with model\.id_table_rows > 0"),
    ({"run": {"mode": "item_item"}, "interactions": {"group_column": "item"}},
     r"^config key 'interactions\.group_column': got 'item'; expected a column other than the id columns"),
])
def test_contradictory_options_are_rejected(tmp_path, sections, pattern):
    with pytest.raises(TowersError, match=pattern):
        C.resolve(minimal(**sections), tmp_path)


@pytest.mark.parametrize("sections", [
    {"evaluation": {"cold_item_fraction": 0.1}, "items": items_with_features()},
    {"evaluation": {"split": "time"}, "interactions": {"time_column": "ts"}},
    {"run": {"mode": "item_item"}, "model": {"shared_tower": True}, "items": items_with_features()},
    {"evaluation": {"top_k": [5, 10], "oracle_users": "u.parquet", "oracle_items": "i.parquet"},
     "training": {"stop_metric": "ndcg@10"}},
    {"training": {"loss": "squared", "stop_metric": "mae"}},
    {"evaluation": {"split": "user_last", "last_n": 3}, "interactions": {"time_column": "ts", "group_column": "order"}},
    {"evaluation": {"split": "user_recent", "test_fraction": 0.2, "cold_item_fraction": 0.1},
     "interactions": {"time_column": "ts", "group_column": "order"}, "items": items_with_features()},
    {"evaluation": {"split": "user_share", "cold_user_fraction": 0.2},
     "users": {"path": "users.csv", "id_column": "user", "features": [{"name": "age", "kind": "numeric"}]}},
    {"run": {"mode": "item_item"}, "interactions": {"group_column": "order", "time_column": "ts"},
     "evaluation": {"split": "time"}, "items": items_with_features()},
])
def test_consistent_combinations_are_accepted(tmp_path, sections):
    C.resolve(minimal(**sections), tmp_path)


@pytest.mark.parametrize("missing", ["path", "query_column", "candidate_column"])
def test_interactions_needs_path_and_both_id_columns(tmp_path, missing):
    raw = minimal()
    del raw["interactions"][missing]
    with pytest.raises(TowersError, match=rf"'interactions\.{missing}' is missing"):
        C.resolve(raw, tmp_path)


def test_default_stop_metric_and_direction(tmp_path):
    cfg = C.resolve(minimal(evaluation={"top_k": [10, 50]}), tmp_path)
    assert cfg.stop_metric == "recall@10"
    cfg = C.resolve(minimal(training={"loss": "squared"}), tmp_path)
    assert cfg.stop_metric == "rmse"
    assert C.lower_is_better("rmse") and C.lower_is_better("mae")
    assert not C.lower_is_better("recall@10") and not C.lower_is_better("auc")


# ---------------------------------------------------------------- paths and files


def test_relative_paths_resolve_against_the_config_folder(tmp_path, monkeypatch):
    cfg_file = write(tmp_path / "project" / "configs" / "run.yaml", """
interactions: {path: ../data/log.csv, query_column: u, candidate_column: i}
items: {path: items.parquet, id_column: i}
evaluation: {oracle_users: /abs/u.parquet, oracle_items: ~/i.parquet}
""")
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    monkeypatch.chdir(elsewhere)
    cfg = C.load(Path("..") / "project" / "configs" / "run.yaml")
    folder = cfg_file.resolve().parent
    assert cfg.interactions.path == str(folder.parent / "data" / "log.csv")  # '..' is collapsed
    assert cfg.items.path == str(folder / "items.parquet")
    assert cfg.evaluation.oracle_users == str(Path("/abs/u.parquet"))
    assert cfg.evaluation.oracle_items == str(Path("~/i.parquet").expanduser())


def test_missing_config_file(tmp_path):
    with pytest.raises(TowersError, match="config file not found"):
        C.load(tmp_path / "nope.yaml")


def test_config_with_byte_order_mark_loads(tmp_path):
    f = tmp_path / "bom.yaml"
    f.write_bytes("\ufeffinteractions: {path: a.csv, query_column: u, candidate_column: i}\n".encode("utf-8"))
    assert C.load(f).interactions.query_column == "u"


def test_config_that_is_not_utf8_is_a_clear_error(tmp_path):
    f = tmp_path / "latin.yaml"
    f.write_bytes("interactions: {path: caf\xe9.csv}\n".encode("latin-1"))
    with pytest.raises(TowersError, match="not UTF-8 text"):
        C.load(f)


def test_empty_config_file_reports_the_first_missing_key(tmp_path):
    with pytest.raises(TowersError, match=r"'interactions\.query_column' is missing"):
        C.load(write(tmp_path / "empty.yaml", ""))


def test_yaml_syntax_error_names_the_line(tmp_path):
    f = write(tmp_path / "broken.yaml", "run:\n  seed: 1\nmodel:\n  hidden: [1, 2\n")
    with pytest.raises(TowersError) as err:
        C.load(f)
    msg = str(err.value)
    assert msg.startswith(str(f)) and "not valid YAML" in msg and "line " in msg


@pytest.mark.parametrize("tag", [
    "!!python/object/apply:os.mkdir [{marker}]",
    "!!python/object:towers.errors.TowersError {{}}",
    "!!python/name:os.system",
])
def test_python_tags_are_rejected_not_executed(tmp_path, tag):
    # yaml.safe_load only builds plain data; a full loader would run os.mkdir here.
    marker = tmp_path / "made_by_yaml"
    text = "interactions: {path: a.csv, query_column: u, candidate_column: i}\nrun:\n  seed: " \
        + tag.format(marker=str(marker)) + "\n"
    f = write(tmp_path / "evil.yaml", text)
    with pytest.raises(TowersError, match="not valid YAML"):
        C.load(f)
    assert not marker.exists()


def test_overrides_apply_on_top_of_the_file(tmp_path):
    f = write(tmp_path / "c.yaml", "interactions: {path: a.csv, query_column: u, candidate_column: i}\n"
                                   "training: {epochs: 9, batch_size: 16}\nusers:\n")
    cfg = C.load(f, {"training": {"epochs": 2}, "users": {"missing_rows": "drop"}, "model": {"dim": 4}})
    assert cfg.training.epochs == 2 and cfg.training.batch_size == 16
    assert cfg.users.missing_rows == "drop"  # the empty 'users:' section accepts overrides
    assert cfg.model.dim == 4


def test_overrides_are_checked_like_file_values(tmp_path):
    f = write(tmp_path / "c.yaml", "interactions: {path: a.csv, query_column: u, candidate_column: i}\n")
    with pytest.raises(TowersError, match=r"'training\.epochs': got 0"):
        C.load(f, {"training": {"epochs": 0}})


def test_top_level_list_file_is_rejected_even_with_overrides(tmp_path):
    f = write(tmp_path / "list.yaml", "- a\n- b\n")
    with pytest.raises(TowersError, match="top level must be a mapping"):
        C.load(f, {"training": {"epochs": 2}})


# ---------------------------------------------------------------- presets and dump


def full_config(tmp_path) -> C.Config:
    return C.resolve(minimal(
        users={"path": "users.csv", "id_column": "user",
               "features": [{"name": "age", "kind": "numeric"}, {"name": "city", "kind": "categorical", "rare_below": 3}]},
        items=items_with_features(features=[{"name": "tags", "kind": "tokens", "separator": ","},
                                            {"name": "emb", "kind": "vector", "length": 8}]),
        model={"hidden": [64, 32], "id_dropout": 0.3, "normalize": True, "temperature": 0.1, "dropout": 0.2},
        evaluation={"cold_item_fraction": 0.2, "top_k": [5, 10]},
    ), tmp_path)


def test_linear_factor_preset(tmp_path):
    cfg = full_config(tmp_path)
    before = copy.deepcopy(cfg)
    preset = C.linear_factor_preset(cfg)
    assert preset.model.hidden == ()
    assert preset.users.features == () and preset.items.features == ()
    assert preset.model.id_dropout == 0.0
    assert preset.model.use_ids is True
    assert preset.model.normalize is False and preset.model.temperature == 1.0
    assert preset.training == cfg.training  # training settings are shared
    assert cfg == before  # the run's own config is untouched


def test_dump_round_trips_through_resolve(tmp_path):
    cfg = full_config(tmp_path)
    text = C.dump(cfg)
    other = tmp_path / "somewhere" / "else"
    back = C.resolve(yaml.safe_load(text), other)  # paths are absolute, so the folder no longer matters
    assert back == cfg
    assert C.dump(back) == text


def test_dump_round_trips_for_item_item(tmp_path):
    cfg = C.resolve(minimal(run={"mode": "item_item"}, model={"shared_tower": True}, items=items_with_features()), tmp_path)
    assert C.resolve(yaml.safe_load(C.dump(cfg)), Path("/")) == cfg


def test_dump_keeps_schema_order_and_plain_yaml(tmp_path):
    text = C.dump(full_config(tmp_path))
    assert "!!" not in text  # only plain YAML types, readable by any loader
    assert [line.rstrip(":") for line in text.splitlines() if line and not line.startswith(" ")] == list(C.SCHEMA)


def test_a_resumed_run_with_another_config_names_the_key_that_changed(tmp_path):
    from towers.runs.folder import RunFolder

    folder = RunFolder(tmp_path / "run.partial")
    folder.path.mkdir()
    then = C.resolve(minimal(training={"epochs": 3}), tmp_path)
    folder.write_config(then)
    assert folder.config_difference(then) == ""
    now = C.resolve(minimal(training={"epochs": 4}), tmp_path)
    assert folder.config_difference(now) == "training.epochs: 3 then, 4 now"


def test_a_run_saved_with_a_key_now_refused_on_its_kind_still_opens(tmp_path):
    # runs trained before keys of other kinds were refused saved them (ignored then): such a run must still load
    from towers.runs.folder import RunFolder

    raw = yaml.safe_load(C.dump(C.resolve(minimal(items={"path": "items.csv", "id_column": "item", "features": [
        {"name": "brand", "kind": "categorical"}]}), tmp_path)))
    raw["items"]["features"][0]["separator"] = ","
    folder = RunFolder(tmp_path / "old_run")
    write(folder.path / RunFolder.CONFIG, yaml.safe_dump(raw))
    with pytest.raises(TowersError, match=r"separator': applies to tokens"):
        C.resolve(copy.deepcopy(raw), tmp_path)  # a user's config with it is refused
    assert folder.read_config().items.features[0].kind == "categorical"


def test_the_first_difference_names_a_feature_entry_not_the_whole_list():
    then = {"items": {"features": [{"name": "brand", "kind": "categorical"}, {"name": "price", "kind": "numeric"}]}}
    now = copy.deepcopy(then)
    now["items"]["features"][1]["kind"] = "categorical"
    assert C.first_difference(then, now) == "items.features[1].kind: 'numeric' then, 'categorical' now"
    assert C.first_difference({"top_k": [10, 20]}, {"top_k": [10, 50]}) == "top_k[1]: 20 then, 50 now"
    assert C.first_difference({"top_k": [10]}, {"top_k": [10, 50]}) == "top_k: [10] then, [10, 50] now"
