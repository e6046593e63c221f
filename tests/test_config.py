"""Config validation: schema errors name the key, cross-field errors say the fix."""

from __future__ import annotations

import copy
from typing import Any

import pytest
from conftest import REPO, small_classification_config
from holdfast import config as cfg
from holdfast.errors import ConfigError


def base() -> dict[str, Any]:
    return small_classification_config()


def edit(path: str, value: Any) -> dict[str, Any]:
    config = copy.deepcopy(base())
    node = config
    keys = path.split(".")
    for key in keys[:-1]:
        node = node.setdefault(key, {})
    if value is ...:
        del node[keys[-1]]
    else:
        node[keys[-1]] = value
    return config


@pytest.mark.parametrize(("config", "message"), [
    (edit("folds.kk", 3), r"config key 'folds.kk' is not known; remove it or use one of: fraction, gap, k, "
                          r"min_train, repeats, scheme, seed, window"),
    (edit("metricz", ["accuracy"]), r"config key 'metricz' is not known"),
    (edit("data.target", ...), r"config key 'data.target' is required"),
    (edit("folds.k", 0), r"config key 'folds.k': 0 is out of range; set it to a number at least 2"),
    (edit("folds.k", -3), r"config key 'folds.k'"),
    (edit("test.fraction", 1.0), r"config key 'test.fraction'"),
    (edit("test.fraction", 0), r"config key 'test.fraction'"),
    (edit("folds.scheme", "leave-p-out"), r"config key 'folds.scheme': 'leave-p-out' is not one of"),
    ({**base(), "folds": {"scheme": "loo", "k": 4}}, r"config key 'folds.k' has no effect with folds.scheme: loo"),
    ({**base(), "folds": {"scheme": "loo"}, "nested": {"k": 2}}, r"'nested.k' and 'folds.scheme: loo' do not"),
    (edit("nested.k", 1), r"config key 'nested.k' is 1; use 0 to turn nested cross-validation off"),
    ({**base(), "folds": {"scheme": "holdout", "k": 4}},
     r"config key 'folds.k' has no effect with folds.scheme: holdout \(it uses: fraction, repeats, seed\)"),
    ({**base(), "folds": {"scheme": "kfold", "fraction": 0.3}}, r"'folds.fraction' has no effect with folds.scheme"),
    ({**base(), "folds": {"scheme": "forward", "repeats": 2}}, r"'folds.repeats' has no effect with .*: forward"),
    ({**base(), "folds": {"scheme": "forward"}}, r"'folds.scheme' is 'forward' but 'data.time' is not set"),
    ({**base(), "folds": {"scheme": "holdout", "fraction": 1.5}}, r"config key 'folds.fraction'"),
    ({**base(), "folds": {"scheme": "holdout"}, "selection": {"rule": "one_standard_error"}},
     r"'selection.rule' is one_standard_error but folds.scheme holdout with one repeat gives one score"),
    ({**base(), "folds": {"scheme": "holdout"}, "nested": {"k": 3}}, r"'nested.k' and 'folds.scheme: holdout' do"),
    (edit("test.scheme", "stratified_grouped"), r"'test.scheme' is 'stratified_grouped' but 'data.group' is not"),
    (edit("experiment", "../escape"), r"config key 'experiment'"),
    (edit("experiment", "a/b"), r"config key 'experiment'"),
    (edit("folds.scheme", "group"), r"'folds.scheme' is 'group' but 'data.group' is not set"),
    (edit("candidates.bad", {"estimator": "os.system"}), r"'candidates.bad.estimator': 'os.system' is not from an"),
    (edit("candidates.logistic.params", {"C": 1.0}), r"parameter 'C' is in both params and grid"),
    (edit("data.group", "target"), r"'data.target' and 'data.group' both name column 'target'"),
    (edit("task", "clustering"), r"config key 'task'"),
    # Python's re lets a pattern's final '$' match before a trailing line break; whole values must match.
    (edit("experiment", "bc\n"), r"config key 'experiment': 'bc\\n' matches .* only in part"),
    (edit("candidates.logistic.estimator", "sklearn.linear_model.LogisticRegression\n"),
     r"config key 'candidates.logistic.estimator': .* only in part"),
    (edit("candidates.tree\n", {"estimator": "sklearn.tree.DecisionTreeClassifier"}),
     r"config key 'candidates.tree\\n': 'tree\\n' matches .* only in part"),
    (edit("allowed_modules", ["sklearn", "numpy\n"]), r"config key 'allowed_modules\[1\]': 'numpy\\n' matches"),
    (edit("test.reopen_reasons", [" " * 10]), r"'test.reopen_reasons\[0\]' is blank or shorter than 10 characters"),
    (edit("test.reopen_reasons", ["-" + " " * 12 + "x"]), r"'test.reopen_reasons\[0\]' is blank or shorter than"),
    (edit("test.reopen_reasons", ["the labels were fixed", "the labels  were fixed "]),
     r"'test.reopen_reasons\[1\]' repeats reopen_reasons\[0\]"),
    (edit("data.time_unit", "s"), r"config key 'data.time_unit' is set but 'data.time' is not"),
    (edit("data.time_unit", "days"), r"config key 'data.time_unit': 'days' is not one of"),
    (edit("leakage.group_overlap", "ignore"), r"config key 'leakage.group_overlap': 'ignore' is not one of"),
])
def test_schema_and_cross_field_errors(config: dict[str, Any], message: str) -> None:
    with pytest.raises(ConfigError, match=message):
        cfg.validate(config)


def test_defaults_are_filled_from_the_schema() -> None:
    config = cfg.validate({"experiment": "x", "data": {"path": "d.csv", "target": "y"},
                           "candidates": {"m": {"estimator": "sklearn.linear_model.Ridge"}}})
    assert config["test"] == {"fraction": 0.2, "scheme": "hashed", "salt": "holdfast", "reopen_reasons": [],
                              "gap_hours": 0, "seen_rows_reason": None}
    assert config["ledger"] == {"signing_key": None}
    assert config["folds"] == {"scheme": "kfold", "k": 5, "repeats": 1, "seed": 0, "fraction": 0.2, "window": None,
                               "gap": 0, "min_train": 1}
    assert config["candidates"]["m"]["preprocess"] == {"impute": "median", "scale": "none", "categorical": "onehot"}
    assert config["allowed_modules"] == ["sklearn"]


def test_the_schema_reads_the_same_with_pyyamls_c_and_python_parsers() -> None:
    # holdfast.config._schema uses PyYAML's C parser when the installed PyYAML has one; the pure-Python SafeLoader is
    # the reference (PyYAML offers CSafeLoader as the LibYAML-based equivalent of SafeLoader; from memory).
    import yaml

    with open(cfg.SCHEMA_PATH, encoding="utf-8") as handle:
        reference = yaml.safe_load(handle)
    assert cfg._schema() == reference
    if hasattr(yaml, "CSafeLoader"):
        with open(cfg.SCHEMA_PATH, encoding="utf-8") as handle:
            assert yaml.load(handle, Loader=yaml.CSafeLoader) == reference


def test_shipped_configs_are_valid() -> None:
    for name in ("config.yaml", "regression.yaml"):
        cfg.load(REPO / "config" / name)


def test_unsafe_yaml_tags_are_refused(tmp_path: Any) -> None:
    path = tmp_path / "c.yaml"
    path.write_text("experiment: !!python/object/apply:os.system ['echo hi']\n")
    with pytest.raises(ConfigError, match="is not plain YAML"):
        cfg.load(path)


def test_yaml_alias_bombs_are_refused_quickly(tmp_path: Any) -> None:
    # A "billion laughs" document: nine levels of aliases, each repeating the one below nine times.
    lines = ["experiment: x", "data: {path: d.csv, target: y}", "candidates: {m: {estimator: sklearn.a.B}}",
             'l0: &l0 ["lol","lol","lol","lol","lol","lol","lol","lol","lol"]']
    lines += [f"l{i}: &l{i} [{','.join([f'*l{i - 1}'] * 9)}]" for i in range(1, 9)]
    path = tmp_path / "bomb.yaml"
    path.write_text("\n".join(lines) + "\n")
    with pytest.raises(ConfigError, match=r"config expands to more than 100000 values"):
        cfg.load(path)


def test_changed_parts_name_what_differs_and_fall_back_when_unrecorded() -> None:
    from holdfast.config import changed_parts

    recorded = {"config 'folds'": "a", "config 'candidates'": "b", "holdfast code of step 'tally'": "c"}
    current = {"config 'folds'": "a", "config 'candidates'": "B", "holdfast code of step 'tally'": "C"}
    assert changed_parts(recorded, current) == ["config 'candidates'", "holdfast code of step 'tally'"]
    assert changed_parts(recorded, {**recorded, "config 'opening'": "d"}) == ["config 'opening'"]  # new ingredient
    assert changed_parts(None, current) == [] and changed_parts({}, current) == []  # recorded before parts
