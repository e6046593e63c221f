"""Nested cross-validation end to end on the demo data: the same stages per outer fold, no leak across."""

from __future__ import annotations

import json
from pathlib import Path

import pandas as pd
import pytest

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def nested_run(nested_finished: Path) -> Path:
    """The finished nested experiment (conftest.nested_config: 2 outer folds, 3 inner folds, two families)."""
    return nested_finished / "results" / "nested-demo"


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
        card = json.loads((nested_run / f"nested/o{fold}/model/provenance.json").read_text())
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
    result = audit(str(nested_run))
    assert result["passed"], result["problems"]
    # Every scope's own files were checked against the ledger, not only the experiment's.
    for name in ("nested/summary.json", "nested/outer_folds.parquet", "nested/outer_leakage.json",
                 "nested/o0/score.json", "nested/o1/choice.json", "nested/o1/ranking.parquet",
                 "nested/o0/model/model.skops", "nested/o0/model/provenance.json", "nested/o1/folds_summary.parquet",
                 "nested/o0/fits/tree/r0f2.parquet", "nested/o1/oof/logistic/r0f0.parquet"):
        assert name in result["verified"], name


def test_the_run_ends_with_the_nested_estimate(nested_run: Path) -> None:
    from holdfast.audit import audit
    from holdfast.headline import nested_line as headline

    summary = json.loads((nested_run / "nested" / "summary.json").read_text())
    line = headline(nested_run, audit(str(nested_run))["verified"])
    assert f"ROC AUC: {summary['metrics']['roc_auc']['mean']:.4f}" in line  # the primary metric, first in config
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


def test_families_fitted_in_parts_give_the_same_nested_estimate(nested_finished: Path, tmp_path: Path) -> None:
    """candidates.<family>.jobs_per_fold inside each outer fold too: every family in 2 jobs per inner fold gives,
    byte for byte, the outer folds' rankings and choices and the nested summary of one job per fold."""
    import shutil

    from conftest import nested_config, run_workflow, write_config

    (tmp_path / "data_demo").mkdir()
    shutil.copy(nested_finished / "data_demo" / "shipments.csv", tmp_path / "data_demo" / "shipments.csv")
    config = nested_config()
    for family in config["candidates"].values():
        family["jobs_per_fold"] = 2
    write_config(tmp_path, config)
    result = run_workflow(tmp_path)
    assert result.returncode == 0, result.stderr[-3000:]
    split, whole = tmp_path / "results" / "nested-demo", nested_finished / "results" / "nested-demo"
    assert sorted(p.name for p in (split / "nested/o0/fits").iterdir()) == ["logistic.1", "logistic.2", "tree.1",
                                                                          "tree.2"]
    names = ["nested/summary.json", "ranking.parquet", "choice.json"]
    names += [f"nested/o{fold}/{name}" for fold in (0, 1) for name in ("ranking.parquet", "choice.json", "score.json")]
    for name in names:
        assert (split / name).read_bytes() == (whole / name).read_bytes(), name
