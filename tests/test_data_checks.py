"""Checks made before the seal: what they accept, and that what they accept works downstream."""

from __future__ import annotations

import re
import time
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from conftest import breast_cancer_frame, small_classification_config, write_config
from holdfast import config as cfg
from holdfast.candidates import expand
from holdfast.dataset import check_label_spelling, feature_columns, parse_times
from holdfast.errors import ConfigError
from holdfast.folds import assign
from holdfast.layout import check_experiment_dir
from holdfast.seal import seal

START = 1_735_689_600  # 2025-01-01T00:00:00Z in Unix epoch seconds


def with_epoch_seconds(frame: pd.DataFrame, seed: int = 3) -> pd.DataFrame:
    """The frame with hourly visit times in epoch seconds, in shuffled row order (crafted)."""
    out = frame.copy()
    out["visit_at"] = START + 3600 * np.random.default_rng(seed).permutation(len(out))
    return out


def test_epoch_seconds_would_be_read_as_nanoseconds_without_a_unit() -> None:
    # Why numbers in data.time are refused without data.time_unit: pandas counts them in nanoseconds.
    assert parse_times(pd.Series([START]))[0] == pd.Timestamp("1970-01-01 00:00:01.735689600", tz="UTC")
    assert parse_times(pd.Series([START]), "s")[0] == pd.Timestamp("2025-01-01", tz="UTC")


def test_time_tail_on_epoch_seconds_seals_the_latest_rows(tmp_path: Path) -> None:
    frame = with_epoch_seconds(breast_cancer_frame())
    frame.to_csv(tmp_path / "data.csv", index=False)
    spec = {"target": "target", "id": "patient", "group": None, "time": "visit_at", "time_unit": "s", "drop": [],
            "task": None, "fraction": 0.25, "scheme": "time_tail", "salt": "s", "gap_hours": 0}
    manifest = seal(tmp_path / "data.csv", spec, tmp_path / "exp", "exp")
    sealed = set(pd.read_parquet(tmp_path / "exp" / "sealed" / "test.parquet")["patient"])
    latest = set(frame.sort_values("visit_at", ascending=False)["patient"].head(round(0.25 * len(frame))))
    assert sealed == latest  # counted here from the raw seconds, without holdfast's time parsing
    assert manifest["spec"]["time_unit"] == "s"


def test_forward_folds_on_epoch_seconds_equal_those_on_the_same_times_as_text() -> None:
    dev = with_epoch_seconds(breast_cancer_frame()).rename(columns={"patient": "row_key"})
    text = dev.assign(visit_at=pd.to_datetime(dev["visit_at"], unit="s", utc=True).astype(str))
    forward = {"scheme": "forward", "k": 4, "window": None, "gap": 2, "min_train": 1, "repeats": 1}
    from_seconds = assign(dev, forward, "target", None, "visit_at", "s")
    assert from_seconds.equals(assign(text, forward, "target", None, "visit_at"))


def test_seal_spec_holds_time_unit_only_when_set() -> None:
    # Experiments sealed before data.time_unit existed keep an unchanged spec.
    base = small_classification_config()
    assert "time_unit" not in cfg.seal_spec(cfg.validate(base))
    timed = {**base, "data": {**base["data"], "time": "visit_at", "time_unit": "ms"}}
    assert cfg.seal_spec(cfg.validate(timed))["time_unit"] == "ms"


def test_a_nested_column_listed_in_drop_is_sealed_and_never_a_feature(tmp_path: Path,
                                                                      monkeypatch: pytest.MonkeyPatch) -> None:
    from holdfast.plan import prepare

    frame = breast_cancer_frame()
    frame["tags"] = [["follow-up"] * (i % 3) for i in range(len(frame))]
    frame.to_parquet(tmp_path / "data.parquet", index=False)
    config = small_classification_config("data.parquet")
    config["data"]["drop"] = ["tags"]
    write_config(tmp_path, config)
    monkeypatch.chdir(tmp_path)
    plan = prepare(config, main=True)
    assert plan.manifest is None and plan.config["task"] == "classification"
    seal("data.parquet", plan.spec, "results/bc", "bc")
    dev = pd.read_parquet("results/bc/dev.parquet")
    assert [len(tags) for tags in dev["tags"]] == [int(p[1:]) % 3 for p in dev["patient"]]  # kept as sealed
    assert "tags" not in feature_columns(dev, plan.spec)


def test_a_column_of_codes_listed_in_data_text_is_sealed_as_text(tmp_path: Path,
                                                                 monkeypatch: pytest.MonkeyPatch) -> None:
    """Mostly digits but text on purpose (ward codes '12', '07', 'ICU'): data.text lets it through as text, the same
    column without it is refused (tests/test_bad_input.py), and a column of real words is never looked at twice."""
    from holdfast.dataset import check_numbers_read_as_text
    from holdfast.errors import DataError
    from holdfast.plan import prepare

    frame = breast_cancer_frame()
    frame["ward"] = [("ICU" if i % 10 == 0 else f"{i % 13:02d}") for i in range(len(frame))]
    frame["site"] = [("north" if i % 2 else "south") for i in range(len(frame))]
    frame.to_csv(tmp_path / "data.csv", index=False)
    config = small_classification_config("data.csv")
    write_config(tmp_path, config)
    monkeypatch.chdir(tmp_path)
    with pytest.raises(DataError, match=r"feature column 'ward' holds numbers in 512 of its 569 filled cells and text "
                                        r"in 57 \('ICU'\)"):
        prepare(config, main=True)
    config["data"]["text"] = ["ward"]
    plan = prepare(config, main=True)
    seal("data.csv", plan.spec, "results/bc", "bc")
    dev = pd.read_parquet("results/bc/dev.parquet")
    assert dev["ward"].map(type).eq(str).all() and "ward" in feature_columns(dev, plan.spec)
    check_numbers_read_as_text(pd.Series(["7", "north", "south", "east"] * 3, name="site"), "data.csv")  # words: passes
    check_numbers_read_as_text(pd.Series(["1", "2", None, "3"], name="n"), "data.csv")  # all numbers: passes


@pytest.mark.parametrize("labels", [["yes", "no"], ["yes", "no", "yes please"], ["A", "B", "AB"], [0, 1, 2]])
def test_labels_that_differ_in_more_than_spaces_or_case_pass(labels: list[object]) -> None:
    check_label_spelling(pd.Series(labels * 3, name="answer"), "data.csv")


def test_grids_are_counted_before_they_are_built() -> None:
    config = cfg.validate(small_classification_config())
    config["candidates"]["logistic"]["grid"] = {"C": [0.1, 1.0, 10.0], "tol": [1e-4, 1e-3, 1e-2, 1e-1]}
    assert sum(len(c) for c in expand(config).values()) == 3 * 4 + 2
    config["candidates"]["logistic"]["grid"] = {f"p{i}": list(range(60)) for i in range(5)}
    started = time.perf_counter()
    with pytest.raises(ConfigError, match=r"expand to 777600002 candidates, more than max_candidates \(500\)"):
        expand(config)
    assert time.perf_counter() - started < 5  # building 777,600,000 candidates would take hours


def test_symlinks_inside_the_project_are_allowed_and_outside_refused(tmp_path: Path) -> None:
    project, outside = tmp_path / "project", tmp_path / "outside"
    (project / "store" / "bc").mkdir(parents=True)
    outside.mkdir()
    (project / "results").symlink_to(project / "store", target_is_directory=True)
    check_experiment_dir(project / "results" / "bc", project)  # a link that stays inside the project
    (project / "store" / "bc" / "final").symlink_to(outside, target_is_directory=True)
    with pytest.raises(ConfigError, match=r"'.*results/bc/final' is a symbolic link to '.*outside', outside the "
                                          r"project folder"):
        check_experiment_dir(project / "results" / "bc", project)


def _copies_refused(frame: pd.DataFrame, task: str, **spec: Any) -> str | None:
    """The refusal of check_target_copies on ``frame`` (target column 'target'), or None when it passes."""
    from holdfast.dataset import check_target_copies
    from holdfast.errors import DataError

    try:
        check_target_copies(frame, {"target": "target", "id": None, "group": None, "time": None, "drop": [], **spec},
                            task, "data.csv")
    except DataError as exc:
        return str(exc)
    return None


# scikit-learn's bundled data sets (scikit-learn developers, "Toy datasets", scikit-learn User Guide, section 8.1,
# 2024): real measurements, none recorded after the outcome, so none of their features may be refused as a copy of
# the target. Digits has 1,797 rows, so its columns go through the first-1,000-rows pass and, for its always-blank
# (constant) pixels, the whole-column pass.
@pytest.mark.parametrize(("loader", "task"), [("load_breast_cancer", "classification"), ("load_iris", "classification"),
                                              ("load_wine", "classification"), ("load_digits", "classification"),
                                              ("load_diabetes", "regression")])
def test_no_feature_of_a_real_data_set_is_taken_for_the_target(loader: str, task: str) -> None:
    from sklearn import datasets

    assert _copies_refused(getattr(datasets, loader)(as_frame=True).frame, task) is None


def _diabetes_with(name: str, make: Any) -> pd.DataFrame:
    from sklearn.datasets import load_diabetes

    frame = load_diabetes(as_frame=True).frame
    frame[name] = make(frame["target"])
    return frame


@pytest.mark.parametrize(("make", "task", "pattern"), [
    (lambda: breast_cancer_frame().assign(flag=lambda f: f["target"].map({0: "M", 1: "B"})), "classification",
     r"feature column 'flag' is fixed by target column 'target' in 'data\.csv': in all 569 rows where it is filled, "
     r"each class has one value of it \(0 -> 'M', 1 -> 'B'\)"),
    (lambda: breast_cancer_frame().assign(agency=lambda f: np.where(f["target"] == 0, "collector A", None)),
     "classification", r"feature column 'agency' .*: in all 569 rows it is blank exactly where the class is 1;"),
    (lambda: breast_cancer_frame().assign(agency=lambda f: np.where(f["target"] == 0, np.arange(len(f)), np.nan)),
     "classification", r"feature column 'agency' .*: in all 569 rows it is blank exactly where the class is 1;"),
    (lambda: _diabetes_with("log_target", np.log), "regression",
     r"feature column 'log_target' .*: in all 442 rows where it is filled, the higher the target, the higher it is"),
    (lambda: _diabetes_with("minus", lambda t: -t), "regression", r"the higher the target, the lower it is"),
    (lambda: _diabetes_with("band", lambda t: pd.cut(t, [0, 100, 200, 400], labels=False)), "regression",
     r"feature column 'band' .* the higher the target, the higher it is"),
    (lambda: _diabetes_with("claim", lambda t: np.where(t > 150, 1.0, np.nan)), "regression",
     r"feature column 'claim' .*: in all 442 rows it is blank exactly where the target is at most 150\.0;"),
], ids=["relabelled", "blank-for-one-class", "ids-blank-for-one-class", "log", "negated", "banded", "blank-below"])
def test_a_feature_the_target_fixes_is_refused(make: Any, task: str, pattern: str) -> None:
    """Copies made here from the target (crafted): each is named, with how the target fixes it."""
    message = _copies_refused(make(), task)
    assert message is not None and re.search(pattern, message), message


def test_a_copy_broken_only_after_the_first_thousand_rows_passes_and_a_whole_copy_does_not() -> None:
    """The first 1,000 rows only decide that a column needs the whole look; the whole decides (digits: 1,797 rows)."""
    from sklearn.datasets import load_digits

    frame = load_digits(as_frame=True).frame
    frame["copy"] = frame["target"] * 10
    assert _copies_refused(frame, "classification") is not None
    frame.loc[1500, "copy"] = -1  # one row past the first thousand breaks it: a real feature may look like this
    assert _copies_refused(frame, "classification") is None


def test_too_few_rows_or_rows_per_class_cannot_tell_a_copy_from_chance() -> None:
    small = breast_cancer_frame().iloc[:29].assign(flag=lambda f: f["target"] * 2)
    assert _copies_refused(small, "classification") is None  # fewer than MIN_ROWS_FOR_COPY rows
    rows = pd.DataFrame({"target": np.repeat(np.arange(40), 5), "same": np.repeat(np.arange(40), 5) % 7})
    assert _copies_refused(rows, "classification") is None  # 5 rows a class: any column can be constant in them


def test_a_column_declared_known_before_the_outcome_is_sealed(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """A column the target fixes whose owner states it is recorded before the outcome: data.known_before_outcome lets
    it through, and the statement is part of the seal spec (the seal's ledger line records it; changing it later is
    refused like any seal setting)."""
    from holdfast.errors import DataError, SealedAccessError
    from holdfast.plan import prepare

    frame = breast_cancer_frame()
    frame["visits"] = frame["target"] + 1  # crafted: stands for a column the owner knows is recorded first
    frame.to_csv(tmp_path / "data.csv", index=False)
    config = small_classification_config("data.csv")
    monkeypatch.chdir(tmp_path)
    with pytest.raises(DataError, match=r"feature column 'visits' is fixed by target column 'target'"):
        prepare(config, main=True)
    config["data"]["known_before_outcome"] = ["visits"]
    plan = prepare(config, main=True)
    assert plan.spec["known_before_outcome"] == ["visits"]
    seal("data.csv", plan.spec, "results/bc", "bc")
    assert "visits" in feature_columns(pd.read_parquet("results/bc/dev.parquet"), plan.spec)
    config["data"]["known_before_outcome"] = []
    changed = (r"'data\.known_before_outcome' is not set \(or empty\) but experiment 'bc' was sealed with "
               r"\['visits'\]")
    with pytest.raises(SealedAccessError, match=changed):
        prepare(config, main=True)  # the statement is fixed at the seal
    assert "known_before_outcome" not in cfg.seal_spec(cfg.validate(config))  # unset: the spec of before the key


def test_text_features_that_rows_share_pass_and_one_that_labels_rows_does_not() -> None:
    """A category, and a note with 85 % of its cells different, pass; a reference different in 95 % of rows is
    refused (the cut is 90 %, dataset.DISTINCT_SHARE). Crafted columns beside scikit-learn's breast cancer data."""
    from holdfast.dataset import check_row_labels
    from holdfast.errors import DataError

    rows = len(breast_cancer_frame())
    check_row_labels(pd.Series([f"W{i % 12}" for i in range(rows)], name="ward"), "data.csv")
    distinct = int(0.85 * rows)
    check_row_labels(pd.Series([f"n{i % distinct}" for i in range(rows)], name="note"), "data.csv")
    check_row_labels(pd.Series([f"r{i}" for i in range(29)], name="few"), "data.csv")  # too few rows to judge
    labels = pd.Series([f"R{i % int(0.95 * rows)}" for i in range(rows)] + [None] * 5, name="ref")
    with pytest.raises(DataError, match=rf"feature column 'ref' has {int(0.95 * rows)} different values in its "
                                        rf"{rows} filled cells \('R0', 'R1', \.\.\.\)"):
        check_row_labels(labels, "data.csv")
