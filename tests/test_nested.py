"""Nested cross-validation end to end on the demo data: the same stages per outer fold, no leak across."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import pandas as pd
import pytest
from conftest import REPO, run_workflow, write_config

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def nested_run(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The demo data with a small nested configuration (2 outer folds, 3 inner folds, two families)."""
    workdir = tmp_path_factory.mktemp("nested")
    (workdir / "data_demo").mkdir()
    shutil.copy(REPO / "data_demo" / "shipments.csv", workdir / "data_demo" / "shipments.csv")
    config = {
        "experiment": "nested-demo",
        "data": {"path": "data_demo/shipments.csv", "target": "spoiled", "id": "shipment_id", "group": "route",
                 "time": "departed_at", "drop": ["shelf_life_days"]},
        "metrics": ["roc_auc", "accuracy"],
        "test": {"scheme": "stratified", "salt": "nested"},
        "folds": {"scheme": "stratified", "k": 3, "seed": 4},
        "nested": {"k": 2, "seed": 9},
        "candidates": {
            "logistic": {"estimator": "sklearn.linear_model.LogisticRegression",
                         "preprocess": {"scale": "standard"}, "params": {"max_iter": 1000},
                         "grid": {"C": [0.01, 1.0]}},
            "tree": {"estimator": "sklearn.tree.DecisionTreeClassifier", "params": {"random_state": 0},
                     "grid": {"max_depth": [3, 6]}},
        },
        "opening": {"bootstrap": 200},
    }
    write_config(workdir, config)
    result = run_workflow(workdir)
    assert result.returncode == 0, result.stderr[-3000:]
    (workdir.parent / f"{workdir.name}.stdout").write_text(result.stdout)  # beside the experiment, not in it
    return workdir / "results" / "nested-demo"


def test_each_outer_winner_was_chosen_without_its_validation_rows(nested_run: Path) -> None:
    dev = pd.read_parquet(nested_run / "dev.parquet", columns=["row_key"])
    outer = pd.read_parquet(nested_run / "nested/outer_folds.parquet")
    assert sorted(outer["row_key"]) == sorted(dev["row_key"]) and set(outer["fold"]) == {0, 1}
    for fold in (0, 1):
        held_out = set(outer.loc[outer["fold"] == fold, "row_key"])
        inner = pd.read_parquet(nested_run / f"nested/o{fold}/folds.parquet")
        assert not set(inner["row_key"]) & held_out
        assert set(inner["row_key"]) == set(dev["row_key"]) - held_out
        oof = pd.concat(pd.read_parquet(p) for p in (nested_run / f"nested/o{fold}/oof").rglob("*.parquet"))
        assert not set(oof["row_key"]) & held_out  # no held-out row was even predicted inside the selection
        fits = pd.concat(pd.read_parquet(p) for p in (nested_run / f"nested/o{fold}/fits").rglob("*.parquet"))
        assert set(fits["n_train"] + fits["n_val"]) == {len(inner) // 1}
        card = json.loads((nested_run / f"nested/o{fold}/model/card.json").read_text())
        assert card["trained_on"]["rows"] == len(held_out.symmetric_difference(set(dev["row_key"])))
        score = json.loads((nested_run / f"nested/o{fold}/score.json").read_text())
        assert score["rows"] == len(held_out) and score["training_rows"] == len(inner)


def test_summary_reports_the_procedure_and_the_winners(nested_run: Path) -> None:
    summary = json.loads((nested_run / "nested/summary.json").read_text())
    assert summary["outer_folds"] == 2 and len(summary["winners"]) == 2
    scores = summary["metrics"]["roc_auc"]["by_outer_fold"]
    assert summary["metrics"]["roc_auc"]["mean"] == pytest.approx(sum(scores) / 2)
    assert "selection procedure" in summary["note"] and "sealed test set was not used" in summary["note"]


def test_nested_work_never_opens_the_test_set_and_the_audit_passes(nested_run: Path) -> None:
    from holdfast.audit import audit

    entries = [json.loads(line) for line in (nested_run / "ledger.jsonl").read_text().splitlines()]
    assert sum(e["event"] == "open_test" for e in entries) == 1
    assert {e["details"]["scope"] for e in entries if e["event"] == "score_outer"} == {"o0", "o1"}
    assert audit(str(nested_run))["passed"]


def test_the_run_ends_with_the_nested_estimate(nested_run: Path) -> None:
    from holdfast.headline import nested_line as headline

    summary = json.loads((nested_run / "nested" / "summary.json").read_text())
    line = headline(nested_run)
    assert f"roc_auc: {summary['metrics']['roc_auc']['mean']:.4f}" in line  # the primary metric, first in config
    assert all(f"{candidate} ×{count}" in line for candidate, count in summary["winner_counts"].items())
    workdir = nested_run.parents[1]
    assert f"holdfast: {line}" in (workdir.parent / f"{workdir.name}.stdout").read_text().splitlines()


def test_summary_carries_the_corrected_standard_error(nested_run: Path) -> None:
    import math

    summary = json.loads((nested_run / "nested" / "summary.json").read_text())
    outer = [json.loads(p.read_text()) for p in sorted((nested_run / "nested").glob("o*/score.json"))]
    assert len(outer) == summary["outer_folds"] == 2
    j = len(outer)
    n_train = sum(o["training_rows"] for o in outer) / j
    n_val = sum(o["rows"] for o in outer) / j
    for numbers in summary["metrics"].values():
        # Nadeau & Bengio, "Inference for the Generalization Error", Machine Learning 52 (2003): the variance
        # of a mean over J resamples is (1/J + n_val/n_train) * sd^2, written out here without holdfast.stats.
        values = numbers["by_outer_fold"]
        mean = sum(values) / j
        sd2 = sum((v - mean) ** 2 for v in values) / (j - 1)
        assert numbers["se"] == pytest.approx(math.sqrt(sd2 / j), rel=1e-12)
        assert numbers["se_corrected"] == pytest.approx(math.sqrt((1 / j + n_val / n_train) * sd2), rel=1e-12)
        assert numbers["se_corrected"] > numbers["se"]
