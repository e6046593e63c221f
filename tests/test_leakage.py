"""Leakage guards, each triggered by a crafted dataset and silent on clean data."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from conftest import breast_cancer_frame, diabetes_frame
from holdfast.errors import DataError
from holdfast.folds import assign, leakage_report
from holdfast.leakage import fold_summary, single_feature_alarms
from holdfast.seal import seal

SPEC = {"target": "target", "id": "patient", "group": None, "time": None, "drop": [], "task": "classification",
        "fraction": 0.25, "scheme": "hashed", "salt": "s"}


def with_copies(frame: pd.DataFrame, n: int) -> pd.DataFrame:
    """The frame plus ``n`` copies of its first rows under new ids (same features, same target)."""
    copies = frame.head(n).copy()
    copies["patient"] = [f"COPY{i:03d}" for i in range(n)]
    return pd.concat([frame, copies], ignore_index=True)


def test_duplicates_across_the_seal_are_counted_or_refused(tmp_path: Path) -> None:
    data = tmp_path / "data.csv"
    with_copies(breast_cancer_frame(), 120).to_csv(data, index=False)
    manifest = seal(data, SPEC, tmp_path / "warn", "warn")
    assert manifest["leakage"]["duplicate_feature_rows_dev_test"] > 0
    with pytest.raises(DataError, match=r"sealed test row\(s\) of .* repeat the features of a development row"):
        seal(data, SPEC, tmp_path / "error", "error", leakage={"duplicates": "error"})
    assert not (tmp_path / "error").exists()  # refused before anything was written


def test_clean_data_raises_no_alarm(tmp_path: Path) -> None:
    data = tmp_path / "data.csv"
    breast_cancer_frame().to_csv(data, index=False)
    manifest = seal(data, SPEC, tmp_path / "clean", "clean")
    assert manifest["leakage"]["duplicate_feature_rows_dev_test"] == 0
    assert manifest["leakage"]["single_feature"] == []


def test_a_feature_that_is_the_target_in_disguise_is_named() -> None:
    rng = np.random.default_rng(0)
    frame = breast_cancer_frame()
    frame["lab_flag"] = frame["target"] + rng.normal(0, 0.05, len(frame))
    alarms = single_feature_alarms(frame.rename(columns={"patient": "row_key"}), {**SPEC, "id": None},
                                   "classification", 0.98)
    assert [a["feature"] for a in alarms] == ["lab_flag"] and alarms[0]["measure"] == "ROC AUC"
    reg = diabetes_frame()
    reg["echo"] = reg["target"] * 2 + rng.normal(0, 1, len(reg))
    alarms = single_feature_alarms(reg, {"target": "target", "drop": []}, "regression", 0.98)
    assert [a["feature"] for a in alarms] == ["echo"] and alarms[0]["measure"] == "R²"


def test_duplicates_between_training_and_validation_rows_are_counted_or_refused(tmp_path: Path) -> None:
    dev = with_copies(breast_cancer_frame(), 60).rename(columns={"patient": "row_key"})
    spec = {**SPEC, "id": None}
    folds = assign(dev, {"scheme": "kfold", "k": 4, "repeats": 1, "seed": 0}, "target", None)
    summary = fold_summary(dev, folds, spec, "classification")
    assert summary["duplicates_with_training"].sum() > 0
    assert {"rows", "training_rows", "class_0", "class_1"} <= set(summary.columns)
    manifest = {"leakage": {"duplicate_feature_rows_dev_test": 0, "single_feature": []}}
    report = leakage_report(dev, folds, spec, "classification", {"duplicates": "warn"}, manifest,
                            str(tmp_path / "summary.parquet"))
    assert report["duplicate_feature_rows_within_folds"] == int(summary["duplicates_with_training"].sum())
    json.dumps(report)  # leakage.json content is plain JSON
    with pytest.raises(DataError, match=r"validation row\(s\) repeat the features of a training row"):
        leakage_report(dev, folds, spec, "classification", {"duplicates": "error"}, manifest,
                       str(tmp_path / "other.parquet"))


def test_a_class_missing_from_a_validation_fold_is_reported(tmp_path: Path) -> None:
    dev = breast_cancer_frame().rename(columns={"patient": "row_key"}).head(40).copy()
    dev["target"] = [0] * 38 + [1] * 2  # two positives cannot reach all four folds
    spec = {**SPEC, "id": None}
    folds = assign(dev, {"scheme": "kfold", "k": 4, "repeats": 1, "seed": 0}, "target", None)
    manifest = {"leakage": {"duplicate_feature_rows_dev_test": 0, "single_feature": []}}
    report = leakage_report(dev, folds, spec, "classification", {"duplicates": "warn"}, manifest,
                            str(tmp_path / "summary.parquet"))
    assert len(report["classes_missing_from_validation"]) >= 2
    assert "class '1' is missing from the validation rows of repeat 0" in report["summary"]


def with_times(frame: pd.DataFrame) -> pd.DataFrame:
    """The frame with an hourly time column in row order (crafted: rows are not a forecast by themselves)."""
    out = frame.copy()
    out["visit_at"] = pd.date_range("2025-03-01", periods=len(out), freq="h", tz="UTC").astype(str)
    return out


def test_a_test_split_that_ignores_time_is_noted_warned_or_refused(tmp_path: Path) -> None:
    data = tmp_path / "data.csv"
    with_times(breast_cancer_frame()).to_csv(data, index=False)
    spec = {**SPEC, "time": "visit_at"}
    noted = seal(data, spec, tmp_path / "note", "note")["leakage"]["time_order"]
    assert noted["dev_rows_after_first_test"] > 0 and noted["mode"] == "note"
    with pytest.raises(DataError, match=r"time column 'visit_at' of .* contradicts the test split \(hashed\): \d+ "
                                        r"development row\(s\) are not earlier than the first test row"):
        seal(data, spec, tmp_path / "error", "error", leakage={"time_order": "error"})
    assert not (tmp_path / "error").exists()
    tail = seal(data, {**spec, "scheme": "time_tail", "gap_hours": 0}, tmp_path / "tail", "tail")
    assert tail["leakage"]["time_order"]["dev_rows_after_first_test"] == 0  # the time split respects time


def test_folds_that_train_on_later_rows_are_noted_warned_or_refused(tmp_path: Path) -> None:
    dev = with_times(breast_cancer_frame()).rename(columns={"patient": "row_key"})
    spec = {**SPEC, "id": None, "time": "visit_at"}
    manifest = {"leakage": {"duplicate_feature_rows_dev_test": 0, "single_feature": []}}
    kfold = {"scheme": "kfold", "k": 4, "repeats": 1, "seed": 0}
    folds = assign(dev, kfold, "target", None, "visit_at")
    for mode in ("note", "warn"):
        report = leakage_report(dev, folds, spec, "classification", {"time_order": mode}, manifest,
                                str(tmp_path / f"{mode}.parquet"), kfold)
        assert report["time_order_in_folds"]["training_rows_later"] > 0
        assert ("ignores time: in 4 fold(s) training rows are later" in report["summary"]) == (mode == "warn")
    with pytest.raises(DataError, match=r"folds.scheme kfold ignores time: in 4 fold\(s\) training rows are later "
                                        r"than validation rows .*use folds.scheme: forward"):
        leakage_report(dev, folds, spec, "classification", {"time_order": "error"}, manifest,
                       str(tmp_path / "error.parquet"), kfold)
    assert not (tmp_path / "error.parquet").exists()
    forward = {"scheme": "forward", "k": 3, "window": None, "gap": 2, "min_train": 1, "repeats": 1}
    report = leakage_report(dev, assign(dev, forward, "target", None, "visit_at"), spec, "classification",
                            {"time_order": "error"}, manifest, str(tmp_path / "forward.parquet"), forward)
    assert report["time_order_in_folds"] is None and "ignores time" not in report["summary"]
