"""Real workflow runs with the one-fold holdout and the time-ordered forward folds."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from conftest import breast_cancer_frame, open_experiment, run_workflow, small_classification_config, write_config
from holdfast.audit import audit
from holdfast.folds import fold_masks


def timed_frame() -> pd.DataFrame:
    """Breast cancer data (scikit-learn's bundled set) with a visit time per row and 40 invented clinics."""
    frame = breast_cancer_frame()
    rng = np.random.default_rng(3)
    hours = np.sort(rng.choice(24 * 400, size=len(frame), replace=False))
    frame["visit_at"] = (pd.Timestamp("2024-01-01", tz="UTC") + pd.to_timedelta(rng.permutation(hours), unit="h"))
    frame["visit_at"] = frame["visit_at"].astype(str)
    frame["clinic"] = [f"C{i:02d}" for i in rng.integers(0, 40, len(frame))]
    return frame


@pytest.mark.slow
@pytest.mark.parametrize("folds", [
    {"scheme": "forward", "k": 3, "gap": 5, "min_train": 100},
    {"scheme": "stratified_holdout", "fraction": 0.25, "repeats": 2, "seed": 4},
])
def test_holdout_and_forward_folds_run_end_to_end(tmp_path: Path, folds: dict[str, object]) -> None:
    timed_frame().to_csv(tmp_path / "data.csv", index=False)
    config = small_classification_config()
    config["data"] = {**config["data"], "time": "visit_at", "group": "clinic"}
    config["test"] = {"fraction": 0.2, "scheme": "time_tail", "gap_hours": 24} if folds["scheme"] == "forward" \
        else config["test"]
    config["folds"] = folds
    write_config(tmp_path, config)
    result = run_workflow(tmp_path)
    assert result.returncode == 0, result.stderr[-3000:]
    opened = open_experiment(tmp_path, "bc")
    assert opened.returncode == 0, opened.stdout[-3000:] + opened.stderr[-3000:]
    assert result.returncode == 0, result.stderr[-3000:]
    exp = tmp_path / "results" / "bc"
    table = pd.read_parquet(exp / "folds.parquet")
    ranking = pd.read_parquet(exp / "ranking.parquet")
    choice = json.loads((exp / "choice.json").read_text())
    verdict = json.loads((exp / "final" / "verdict.json").read_text())
    folds_per_repeat = 3 if folds["scheme"] == "forward" else 1
    assert set(ranking["folds"]) == {folds_per_repeat * (2 if folds["scheme"] != "forward" else 1)}
    fits = pd.concat([pd.read_parquet(p) for p in sorted((exp / "fits").glob("*/*.parquet"))])
    for (repeat, fold), part in fits.groupby(["repeat", "fold"]):
        training, validation = fold_masks(table[table["repeat"] == repeat].reset_index(drop=True), int(fold))
        assert set(part["n_train"]) == {int(training.sum())} and set(part["n_val"]) == {int(validation.sum())}
    if folds["scheme"] == "forward":
        assert choice["optimism"]["bbc"] is not None  # every validated row has one prediction
        assert int(table["fold"].isna().sum()) > 0
        assert choice["optimism"]["bbc"]["draws"] > 0
    else:
        assert choice["optimism"]["bbc"] is None and "not computed" in choice["optimism"]["bbc_note"]
        assert choice["winner"]["folds"] == 2
    assert verdict["metrics"]["roc_auc"]["test"] > 0.5
    report = audit(str(exp))
    assert report["passed"], report["problems"]
