"""Leakage guards, each triggered by a crafted dataset and silent on clean data."""

from __future__ import annotations

import json
import re
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import yaml
from conftest import REPO, breast_cancer_frame, diabetes_frame, run_cli, run_workflow, write_config
from holdfast.errors import DataError
from holdfast.folds import assign, fold_summary, leakage_report
from holdfast.leakage import single_feature_alarms
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
    # In a results folder of its own: another split of the same file beside the unopened 'note' is refused
    # (overlap.unopened_test_rows).
    tail = seal(data, {**spec, "scheme": "time_tail", "gap_hours": 0}, tmp_path / "own" / "tail", "tail")
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


def with_clinics(frame: pd.DataFrame, n: int = 12) -> pd.DataFrame:
    """The frame as development rows with a crafted group column: patient i attends clinic i mod n."""
    out = frame.rename(columns={"patient": "row_key"})
    out["clinic"] = [f"C{i % n:02d}" for i in range(len(out))]
    return out


def groups_on_both_sides(dev: pd.DataFrame, folds: pd.DataFrame, column: str) -> list[int]:
    """Per fold, counted here without holdfast: validation groups that also have a training row."""
    group_of = dict(zip(dev["row_key"], dev[column], strict=True))
    counts = []
    for fold in sorted(folds["fold"].unique()):
        validation = {group_of[k] for k in folds.loc[folds["fold"] == fold, "row_key"]}
        training = {group_of[k] for k in folds.loc[folds["fold"] != fold, "row_key"]}
        counts.append(len(validation & training))
    return counts


def test_group_overlap_is_counted_per_fold_and_noted_warned_or_refused(tmp_path: Path) -> None:
    dev = with_clinics(breast_cancer_frame())
    spec = {**SPEC, "id": None, "group": "clinic"}
    manifest = {"leakage": {"duplicate_feature_rows_dev_test": 0, "single_feature": []}}
    stratified = {"scheme": "stratified", "k": 4, "repeats": 1, "seed": 0}
    folds = assign(dev, stratified, "target", "clinic")
    expected = groups_on_both_sides(dev, folds, "clinic")
    assert expected == [12, 12, 12, 12]  # 12 clinics of ~47 patients: every clinic is on both sides of every fold
    for mode in ("note", "warn"):
        report = leakage_report(dev, folds, spec, "classification", {"group_overlap": mode}, manifest,
                                str(tmp_path / f"{mode}.parquet"), stratified)
        found = report["group_overlap"]
        assert [f["groups_on_both_sides"] for f in found["folds"]] == expected
        assert list(pd.read_parquet(tmp_path / f"{mode}.parquet")["groups_on_both_sides"]) == expected
        assert found["folds_with_overlap"] == 4 and found["groups"] == 12 and not found["scheme_keeps_groups"]
        assert "group overlap: in 4 of 4 fold(s) groups of 'clinic' have rows on both sides" in report["summary"]
        assert ("leakage warning: folds.scheme stratified ignores data.group" in report["summary"]) == (mode == "warn")
    with pytest.raises(DataError, match=r"folds.scheme stratified ignores data.group: in 4 of 4 fold\(s\) groups of "
                                        r"'clinic' have rows on both sides \(most in repeat 0, fold 0: 12 of its 12 "
                                        r"validation group\(s\); 12 group\(s\) in all\); use folds.scheme: group"):
        leakage_report(dev, folds, spec, "classification", {"group_overlap": "error"}, manifest,
                       str(tmp_path / "error.parquet"), stratified)
    assert not (tmp_path / "error.parquet").exists()


def test_group_overlap_advice_names_a_scheme_of_the_same_kind() -> None:
    """Forward folds that split groups are pointed to forward_group (groups whole, still in time order), not to
    group or stratified_group, which would drop the time order the user chose."""
    from holdfast.folds import group_overlap

    dev = pd.DataFrame({"site": ["a", "b", "a", "b"]})
    summary = pd.DataFrame({"repeat": [0, 0], "fold": [0, 1], "groups": [2, 2], "groups_on_both_sides": [2, 1]})
    spec = {"group": "site"}
    forward = {"scheme": "forward", "k": 2}
    with pytest.raises(DataError, match=r"use folds.scheme: forward_group \(whole groups per fold, in time order\)"):
        group_overlap(dev, summary, spec, forward, "error")
    assert group_overlap(dev, summary, spec, forward, "warn")["warning"].endswith("use folds.scheme: forward_group "
                                                                                 "(whole groups per fold, in time "
                                                                                 "order)")
    with pytest.raises(DataError, match=r"use folds.scheme: group or stratified_group \(whole groups per fold\)"):
        group_overlap(dev, summary, spec, {"scheme": "kfold", "k": 2}, "error")


def test_grouped_folds_report_zero_from_the_count_not_the_scheme(tmp_path: Path) -> None:
    dev = with_clinics(breast_cancer_frame())
    spec = {**SPEC, "id": None, "group": "clinic"}
    manifest = {"leakage": {"duplicate_feature_rows_dev_test": 0, "single_feature": []}}
    grouped = {"scheme": "stratified_group", "k": 4, "repeats": 1, "seed": 0}
    folds = assign(dev, grouped, "target", "clinic")
    report = leakage_report(dev, folds, spec, "classification", {"group_overlap": "error"}, manifest,
                            str(tmp_path / "grouped.parquet"), grouped)
    assert groups_on_both_sides(dev, folds, "clinic") == [0, 0, 0, 0]
    assert [f["groups_on_both_sides"] for f in report["group_overlap"]["folds"]] == [0, 0, 0, 0]
    assert "group overlap: 0 of 12 group(s) of 'clinic' on both sides of any of the 4 fold(s)" in report["summary"]
    # The same scheme name over a table that does split a clinic: the count, not the name, decides.
    broken = folds.copy()
    broken.loc[broken.index[0], "fold"] = (int(broken.loc[broken.index[0], "fold"]) + 1) % 4
    with pytest.raises(DataError, match=r"folds \(stratified_group\): in \d of 4 fold\(s\) groups of 'clinic' have "
                                        r"rows on both sides .* though the scheme keeps groups whole"):
        leakage_report(dev, broken, spec, "classification", {"group_overlap": "note"}, manifest,
                       str(tmp_path / "broken.parquet"), grouped)
    no_group = leakage_report(dev, folds, {**spec, "group": None}, "classification", {}, manifest,
                              str(tmp_path / "none.parquet"), grouped)
    assert no_group["group_overlap"] is None and "group overlap: no group column" in no_group["summary"]


@pytest.mark.slow
def test_demo_with_folds_that_ignore_routes_counts_every_route_on_both_sides(tmp_path: Path) -> None:
    """The demo as it was (group: route, folds.scheme: stratified): leakage.json used to say 'none'."""
    (tmp_path / "data_demo").mkdir()
    shutil.copy(REPO / "data_demo" / "shipments.csv", tmp_path / "data_demo" / "shipments.csv")
    config = yaml.safe_load((REPO / "config" / "config.yaml").read_text(encoding="utf-8"))
    assert config["leakage"]["group_overlap"] == "error"  # as shipped
    config["folds"]["scheme"] = "stratified"
    write_config(tmp_path, config)
    exp = tmp_path / "results" / config["experiment"]

    refused = run_workflow(tmp_path, "--until", "assign_folds")

    said = [line for line in refused.stderr.splitlines() if line.startswith("holdfast:")]
    assert refused.returncode != 0 and len(said) == 1, refused.stderr[-3000:]  # one line, the fold step's own
    last = said[0]
    assert re.fullmatch(r"holdfast: data error: folds.scheme stratified ignores data.group: in 5 of 5 fold\(s\) "
                        r"groups of 'route' have rows on both sides \(most in repeat 0, fold \d: 40 of its 40 "
                        r"validation group\(s\); 40 group\(s\) in all\); use folds.scheme: group or stratified_group "
                        r"\(whole groups per fold\), or set leakage.group_overlap: warn", last), last
    # Refused before the seal (the folds of the rows the seal would leave were drawn and checked at the start), as
    # `holdfast check` refuses it: fixing the folds needs no sealed test set to have been drawn.
    assert not (exp / "sealed" / "manifest.json").exists() and not (exp / "folds.parquet").exists()
    checked = run_cli(tmp_path, "check", "config.yaml")
    assert checked.returncode == 3 and checked.stderr.strip() == last, checked.stdout + checked.stderr

    config["leakage"]["group_overlap"] = "warn"
    write_config(tmp_path, config)
    warned = run_workflow(tmp_path, "--until", "assign_folds")
    assert warned.returncode == 0, warned.stderr[-3000:]
    dev, folds = pd.read_parquet(exp / "dev.parquet"), pd.read_parquet(exp / "folds.parquet")
    leakage = json.loads((exp / "leakage.json").read_text())
    assert groups_on_both_sides(dev, folds, "route") == [40] * 5
    assert [f["groups_on_both_sides"] for f in leakage["group_overlap"]["folds"]] == [40] * 5
    assert list(pd.read_parquet(exp / "folds_summary.parquet")["groups_on_both_sides"]) == [40] * 5
    assert "leakage warning: folds.scheme stratified ignores data.group" in leakage["summary"]

    config["folds"]["scheme"] = "stratified_group"  # as shipped now
    write_config(tmp_path, config)
    grouped = run_workflow(tmp_path, "--until", "assign_folds")
    assert grouped.returncode == 0, grouped.stderr[-3000:]
    dev, folds = pd.read_parquet(exp / "dev.parquet"), pd.read_parquet(exp / "folds.parquet")
    leakage = json.loads((exp / "leakage.json").read_text())
    assert groups_on_both_sides(dev, folds, "route") == [0] * 5
    assert [f["groups_on_both_sides"] for f in leakage["group_overlap"]["folds"]] == [0] * 5
    assert "group overlap: 0 of 40 group(s) of 'route'" in leakage["summary"] and "warning" not in leakage["summary"]


def test_a_fold_table_refused_by_the_leakage_report_is_not_left_behind(tmp_path: Path) -> None:
    """The fold table is written beside the leakage report; when the report refuses the folds (time_order: error and
    k-fold on time-stamped rows), the real workflow stops at assign_folds with that message, and neither the table
    nor a ledger line for it stays. Before the seal the same folds are refused at the start (nothing sealed); after
    it (the guard set to error once sealed) by the fold step."""
    from conftest import small_classification_config

    with_times(breast_cancer_frame()).to_csv(tmp_path / "data.csv", index=False)
    config = small_classification_config()
    config["data"]["time"] = "visit_at"
    config["test"] = {"fraction": 0.25, "scheme": "time_tail", "gap_hours": 0}
    config["folds"] = {"scheme": "kfold", "k": 3, "repeats": 1, "seed": 5}
    config["leakage"] = {"time_order": "error"}
    write_config(tmp_path, config)
    exp = tmp_path / "results" / "bc"
    said = r"folds.scheme kfold ignores time: in 3 fold\(s\) training rows are later than validation rows"
    before = run_workflow(tmp_path)
    assert before.returncode != 0 and re.search(said, before.stderr), before.stderr[-3000:]
    assert not (exp / "dev.parquet").exists()  # refused before the seal
    config["leakage"] = {"time_order": "note"}
    write_config(tmp_path, config)
    assert run_workflow(tmp_path, "--until", "seal").returncode == 0
    config["leakage"] = {"time_order": "error"}
    write_config(tmp_path, config)
    result = run_workflow(tmp_path)
    assert result.returncode != 0
    assert re.search(said, result.stdout + result.stderr), (result.stdout + result.stderr)[-3000:]
    assert (exp / "dev.parquet").exists()  # the seal ran
    assert not (exp / "folds.parquet").exists()
    events = [json.loads(line)["event"] for line in (exp / "ledger.jsonl").read_text().splitlines()]
    assert "seal" in events and "assign_folds" not in events, events
    # Outside Snakemake (which also deletes a failed job's outputs), the step itself removes the table it wrote.
    from types import SimpleNamespace as Job

    from holdfast.config import seal_spec, validate, with_task
    from holdfast.steps import assign_folds

    checked = with_task(validate(config), "classification")
    out = tmp_path / "direct"
    out.mkdir()
    job = Job(rule="assign_folds", wildcards=Job(), log=[str(out / "assign_folds.log")],
              input=Job(dev=str(exp / "dev.parquet")),
              output=Job(folds=str(out / "folds.parquet"), summary=str(out / "folds_summary.parquet"),
                         leakage=str(out / "leakage.json")),
              params=Job(spec=json.dumps({**seal_spec(checked), "task": "classification"}, sort_keys=True),
                         folds=json.dumps(checked["folds"], sort_keys=True), test=str(exp / "sealed" / "test.parquet"),
                         manifest=str(exp / "sealed" / "manifest.json"), task="classification",
                         leakage=json.dumps(checked["leakage"], sort_keys=True), ledger=str(out / "ledger.jsonl")))
    with pytest.raises(DataError, match="ignores time"):
        assign_folds(job)
    assert not (out / "folds.parquet").exists() and not (out / "ledger.jsonl").exists()
