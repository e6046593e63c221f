"""Checks of the main job against references the project did not write: scikit-learn and scipy."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from holdfast import config as cfg
from holdfast import scoring
from holdfast.candidates import build_pipeline, expand
from holdfast.dataset import split_xy
from holdfast.scoring import bootstrap_interval, clopper_pearson, replay


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


def loop_interval(metric: str, model: Any, y: np.ndarray, level: float, draws: int,
                  seed: int) -> tuple[float, float]:
    """The percentile bootstrap, one scikit-learn scorer call per resample: the reference for the vectorised one."""
    # Efron & Tibshirani, An Introduction to the Bootstrap (1993), ch. 13, the percentile interval; each
    # resample scored by scikit-learn's own scorer (sklearn.metrics.get_scorer) on the replayed outputs, a
    # resample it refuses with ValueError skipped. This is holdfast's loop before it was vectorised.
    from sklearn.metrics import get_scorer

    rng = np.random.default_rng(seed)
    scorer = get_scorer(metric)
    values = []
    for _ in range(draws):
        rows = rng.integers(0, len(y), len(y))
        try:
            values.append(float(scorer(model, rows.reshape(-1, 1), y[rows])))
        except ValueError:
            continue
    if len(values) < draws * 0.9:
        return float("nan"), float("nan")
    low, high = np.quantile(values, [(1 - level) / 2, 1 - (1 - level) / 2])
    return float(low), float(high)


def _binary(n: int, positives: float, seed: int, ties: bool = False) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    rng = np.random.default_rng(seed)
    y = (rng.random(n) < positives).astype(int)
    logit = rng.normal(size=n) + 1.5 * y
    if ties:
        logit = np.round(logit)
    proba = 1 / (1 + np.exp(-logit))
    return y, {"predict": (proba > 0.5).astype(int), "predict_proba": np.column_stack([1 - proba, proba]),
               "decision_function": logit}


def _without_decision(y: np.ndarray, outputs: dict[str, np.ndarray]) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    return y, {name: value for name, value in outputs.items() if name != "decision_function"}


def _three_classes(n: int, seed: int) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    rng = np.random.default_rng(seed)
    y = rng.choice(np.array(["a", "b", "c"]), size=n, p=[0.6, 0.3, 0.1])
    proba = rng.dirichlet(np.ones(3), n)
    return y, {"predict": np.array(["a", "b", "c"])[proba.argmax(axis=1)], "predict_proba": proba}


def _regression(n: int, seed: int) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    rng = np.random.default_rng(seed)
    y = rng.normal(size=n) * 10
    return y, {"predict": y + rng.standard_t(3, size=n)}


INTERVAL_CASES = {
    "auc, decision function": ("roc_auc", "classification", lambda: _binary(400, 0.3, 1)),
    "auc, many ties": ("roc_auc", "classification", lambda: _binary(300, 0.3, 2, ties=True)),
    "auc, probabilities only": ("roc_auc", "classification", lambda: _without_decision(*_binary(250, 0.2, 3))),
    "auc, a few one-class resamples": ("roc_auc", "classification", lambda: _binary(40, 0.05, 9)),
    "auc, many one-class resamples": ("roc_auc", "classification", lambda: _binary(12, 0.05, 4)),
    "log loss": ("neg_log_loss", "classification", lambda: _binary(500, 0.4, 5)),
    "log loss, a class missing from a few resamples": ("neg_log_loss", "classification", lambda: _three_classes(45, 6)),
    "log loss, a class missing from many resamples": ("neg_log_loss", "classification", lambda: _three_classes(30, 6)),
    "squared error": ("neg_mean_squared_error", "regression", lambda: _regression(300, 7)),
    "absolute error": ("neg_mean_absolute_error", "regression", lambda: _regression(333, 8)),
    "no weighted scorer: balanced accuracy": ("balanced_accuracy", "classification", lambda: _binary(200, 0.3, 10)),
    "no weighted scorer: r2": ("r2", "regression", lambda: _regression(150, 11)),
}


@pytest.mark.filterwarnings("ignore:Only one class is present in y_true")  # the one-class cases, on purpose
@pytest.mark.parametrize(("case", "exact_only"), [(case, False) for case in sorted(INTERVAL_CASES)] + [
    ("auc, many ties", True), ("log loss, a class missing from a few resamples", True), ("absolute error", True)])
def test_bootstrap_interval_equals_the_one_by_one_loop_to_the_bit(case: str, exact_only: bool,
                                                                  monkeypatch: pytest.MonkeyPatch) -> None:
    # The vectorised interval must be the reference loop's exactly (==, not approx): the verdict of a rerun is
    # compared byte for byte. exact_only: a zero tolerance sends every rounding difference to the one-by-one
    # fallback, which must give the same interval too.
    metric, task, make = INTERVAL_CASES[case]
    y, outputs = make()
    classes = np.unique(y) if task == "classification" else None
    if exact_only:
        monkeypatch.setattr(scoring, "AGREEMENT", 0.0)
    model = replay(outputs, task, classes)
    for level, draws, seed in [(0.95, 80, 0), (0.9, 61, 12)]:
        expected = loop_interval(metric, model, y, level, draws, seed)
        got = bootstrap_interval(metric, model, y, level, draws, seed)
        assert np.array_equal(got, expected, equal_nan=True), (case, level, got, expected)
        # scikit-learn 1.9's roc_auc gives NaN (with a warning) on a one-class resample, so one such resample
        # leaves no interval; log loss refuses a resample without every class, which is skipped
        assert np.isnan(got).all() == ("one-class" in case
                                       or case.endswith("many resamples")), (case, got)


def test_block_draws_continue_the_per_draw_stream() -> None:
    # numpy's Generator keeps its buffered bits in its state, so drawing a block of resamples in one call gives
    # the same rows as one call per resample (what the vectorised bootstrap relies on; numpy's Generator docs).
    for n in (1, 7, 250, 1601):
        one_by_one = np.random.default_rng(3)
        expected = np.stack([one_by_one.integers(0, n, n) for _ in range(23)])
        got = np.concatenate([rows for _, rows in scoring._resamples(3, n, 23, 5)])
        assert np.array_equal(got, expected)


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
