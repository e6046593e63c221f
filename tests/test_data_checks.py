"""Checks made before the seal: what they accept, and that what they accept works downstream."""

from __future__ import annotations

import time
from pathlib import Path

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
