"""Checks of the main job against references the project did not write: scikit-learn and scipy."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from holdfast import config as cfg
from holdfast.candidates import build_pipeline, expand
from holdfast.dataset import split_xy
from holdfast.scoring import clopper_pearson


def assert_ranking_matches_cross_val_score(workdir: Path, config_name: str = "config.yaml") -> int:
    """For every candidate: ranking mean == mean of sklearn cross_val_score over PredefinedSplit folds."""
    # Reference implementation: sklearn.model_selection.cross_val_score with PredefinedSplit built from
    # folds.parquet (scikit-learn user guide, "Cross-validation: evaluating estimator performance").
    from sklearn.model_selection import PredefinedSplit, cross_val_score

    config = cfg.load(workdir / config_name)
    exp = workdir / "results" / config["experiment"]
    dev = pd.read_parquet(exp / "dev.parquet")
    folds = pd.read_parquet(exp / "folds.parquet")
    ranking = pd.read_parquet(exp / "ranking.parquet")
    spec = json.loads(json.dumps(cfg.seal_spec(config)))
    x, y = split_xy(dev, spec)
    task = json.loads((exp / "sealed/manifest.json").read_text())["spec"]["task"]
    config = cfg.with_task(config, task)
    primary = config["metrics"][0]
    checked = 0
    for candidates in expand(config).values():
        for candidate in candidates:
            scores: list[float] = []
            for _, part in folds.groupby("repeat"):
                fold_of = part.set_index("row_key")["fold"].reindex(dev["row_key"]).to_numpy()
                pipeline = build_pipeline(candidate, x, 1, ["sklearn"])
                scores += list(cross_val_score(pipeline, x, y, cv=PredefinedSplit(fold_of), scoring=primary,
                                               n_jobs=2))
            row = ranking[(ranking["candidate"] == candidate["id"]) & (ranking["metric"] == primary)].iloc[0]
            assert abs(row["mean"] - np.mean(scores)) <= 1e-12, candidate
            assert abs(row["sd"] - np.std(scores, ddof=1)) <= 1e-12
            checked += 1
    return checked


@pytest.mark.slow
def test_demo_ranking_equals_cross_val_score(demo_finished: Path) -> None:
    assert assert_ranking_matches_cross_val_score(demo_finished) == 9


@pytest.mark.slow
def test_demo_passes_audit_and_folds_equal_stratified_group_kfold(demo_finished: Path) -> None:
    # Reference implementation: sklearn.model_selection.StratifiedGroupKFold(n_splits=k, shuffle=True,
    # random_state=seed + repeat) on the development rows in stored order, grouped by route.
    from holdfast.audit import audit
    from sklearn.model_selection import StratifiedGroupKFold

    exp = demo_finished / "results" / "cold-chain-spoilage"
    assert audit(str(exp))["passed"]
    leakage = json.loads((exp / "leakage.json").read_text())  # the guards are silent on the clean demo
    assert leakage["duplicate_feature_rows_dev_test"] == 0 and leakage["duplicate_feature_rows_within_folds"] == 0
    assert leakage["single_feature"] == []
    assert "warning" not in leakage["summary"]  # time order only noted (leakage.time_order: note) on the demo
    assert leakage["time_order_in_folds"]["scheme"] == "stratified_group"
    assert [f["groups_on_both_sides"] for f in leakage["group_overlap"]["folds"]] == [0] * 5  # whole routes per fold
    dev = pd.read_parquet(exp / "dev.parquet")
    folds = pd.read_parquet(exp / "folds.parquet")
    config = cfg.load(demo_finished / "config.yaml")
    k, seed = config["folds"]["k"], config["folds"]["seed"]
    for repeat in range(config["folds"]["repeats"]):
        ours = folds[folds["repeat"] == repeat].set_index("row_key")["fold"]
        splitter = StratifiedGroupKFold(n_splits=k, shuffle=True, random_state=seed + repeat)
        splits = splitter.split(np.zeros((len(dev), 1)), dev["spoiled"], groups=dev["route"])
        for fold, (_, validation) in enumerate(splits):
            assert set(dev["row_key"].iloc[validation]) == set(ours[ours == fold].index)


@pytest.mark.slow
def test_small_run_ranking_equals_cross_val_score(bc_finished: Path) -> None:
    assert assert_ranking_matches_cross_val_score(bc_finished) == 4


@pytest.mark.parametrize(("successes", "trials"), [(0, 10), (10, 10), (7, 10), (1, 1), (431, 500), (2, 143)])
def test_clopper_pearson_equals_scipy_binomtest(successes: int, trials: int) -> None:
    # Reference: scipy.stats.binomtest(k, n).proportion_ci(method="exact"), the Clopper-Pearson interval
    # (Clopper & Pearson, "The use of confidence or fiducial limits illustrated in the case of the binomial",
    # Biometrika 26(4), 1934).
    from scipy.stats import binomtest

    reference = binomtest(successes, trials).proportion_ci(confidence_level=0.95, method="exact")
    low, high = clopper_pearson(successes, trials, 0.95)
    assert abs(low - reference.low) < 1e-12 and abs(high - reference.high) < 1e-12


@pytest.mark.slow
def test_verdict_accuracy_interval_equals_binomtest(bc_finished: Path) -> None:
    from scipy.stats import binomtest

    verdict: dict[str, Any] = json.loads((bc_finished / "results/bc/final/verdict.json").read_text())
    block = verdict["metrics"]["accuracy"]
    n = verdict["test_rows"]
    correct = round(block["test"] * n)
    assert abs(correct - block["test"] * n) < 1e-9
    reference = binomtest(correct, n).proportion_ci(confidence_level=0.95, method="exact")
    assert block["interval"] == pytest.approx([reference.low, reference.high], abs=1e-12)
    assert block["interval_method"].startswith("exact binomial")


def test_leave_one_out_of_least_squares_equals_the_press_closed_form(tmp_path: Path) -> None:
    # Closed form of leave-one-out CV for linear least squares: CV = (1/n) * sum(((y_i - yhat_i) / (1 - h_ii))^2),
    # h_ii the diagonal of the hat matrix (Hastie, Tibshirani & Friedman, The Elements of Statistical Learning,
    # 2nd ed., 2009, eq. 7.52 in section 7.10.1; Allen, "The relationship between variable selection and data
    # augmentation and a method for prediction", Technometrics 16, 1974: the PRESS statistic).
    from conftest import diabetes_frame
    from holdfast.fit import fit_family
    from holdfast.folds import assign, check
    from holdfast.tally import summarise

    frame = diabetes_frame().head(60).reset_index(drop=True)
    frame.insert(0, "row_key", [f"r{i:03d}" for i in range(len(frame))])
    spec = {"scheme": "loo", "k": 5, "repeats": 1, "seed": 0}  # k is ignored for loo
    folds = assign(frame, spec, "target", None)
    check(folds, frame["row_key"], set(), spec)
    assert folds["fold"].nunique() == 60
    frame.to_parquet(tmp_path / "dev.parquet", index=False)
    folds.to_parquet(tmp_path / "folds.parquet", index=False)
    family = {"family": "ols", "candidates": [{"id": "ols", "family": "ols", "params": {},
                                               "estimator": "sklearn.linear_model.LinearRegression",
                                               "preprocess": {"impute": "median", "scale": "none"}}]}
    columns = {"target": "target", "id": None, "group": None, "time": None, "drop": []}
    fits = [fit_family(str(tmp_path / "dev.parquet"), str(tmp_path / "folds.parquet"), family, columns, 0, f,
                       ["neg_mean_squared_error"], "regression", 1, ["sklearn"], str(tmp_path / f"f{f}.parquet"),
                       str(tmp_path / f"o{f}.parquet"), str(tmp_path / "ledger.jsonl")) for f in range(60)]
    ranking = summarise(pd.concat(fits, ignore_index=True), ["neg_mean_squared_error"], 60)
    x = np.column_stack([np.ones(60), frame.drop(columns=["row_key", "target"]).to_numpy()])
    y = frame["target"].to_numpy()
    hat = x @ np.linalg.solve(x.T @ x, x.T)
    residuals = y - hat @ y
    press = np.mean((residuals / (1 - np.diag(hat))) ** 2)
    assert -ranking.loc[0, "mean"] == pytest.approx(press, rel=1e-9)


def test_leave_one_out_folds_equal_scikit_learn() -> None:
    # Reference implementation: sklearn.model_selection.LeaveOneOut (split i validates row i).
    from holdfast.folds import assign
    from sklearn.model_selection import LeaveOneOut

    dev = pd.DataFrame({"row_key": [f"k{i}" for i in range(12)], "y": np.arange(12.0)})
    table = assign(dev, {"scheme": "loo", "k": 5, "repeats": 1, "seed": 0}, "y", None).set_index("row_key")["fold"]
    for fold, (_, validation) in enumerate(LeaveOneOut().split(np.zeros((12, 1)))):
        assert set(dev["row_key"].iloc[validation]) == set(table[table == fold].index)
