"""Diagnostics: validation curves, the winner's learning curve, confusion matrix, reliability curve and residuals.

The computations are checked against scikit-learn (``sklearn.metrics.confusion_matrix``,
``sklearn.calibration.calibration_curve``) and, after real Snakemake runs, every plotted number is recomputed from
the stored fit records and out-of-fold predictions.
"""

from __future__ import annotations

import itertools
import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import yaml
from conftest import (
    breast_cancer_frame,
    diabetes_frame,
    planned_jobs,
    run_cli,
    run_workflow,
    small_classification_config,
    write_config,
)
from holdfast import ledger
from holdfast._io import sha256_file
from holdfast.config import learning_sizes, validate
from holdfast.diagnostics import axis_label, calibration, confusion, residuals, validation_curves
from holdfast.errors import ConfigError
from holdfast.learning import join_order, nested_subsets, subset_size

# --- units -------------------------------------------------------------------------------------------------------


@pytest.mark.parametrize("labels", [None, np.array([0] * 70 + [1] * 30), np.array(list("abc") * 33 + ["a"])])
def test_learning_subsets_are_nested_of_the_right_sizes_and_seeded(labels: np.ndarray | None) -> None:
    n = 100
    fractions = [0.1, 0.25, 0.5, 0.9, 1.0]
    subsets = nested_subsets(n, fractions, [3, 0, 1], labels)
    assert [len(s) for s in subsets] == [10, 25, 50, 90, 100] == [subset_size(n, f) for f in fractions]
    for small, large in itertools.pairwise(subsets):
        assert set(small) < set(large)
    assert all(len(set(s)) == len(s) and list(s) == sorted(s) for s in subsets)
    again = nested_subsets(n, fractions, [3, 0, 1], labels)
    assert all(np.array_equal(a, b) for a, b in zip(subsets, again, strict=True))
    other = nested_subsets(n, fractions, [4, 0, 1], labels)
    assert not np.array_equal(subsets[1], other[1])
    if labels is not None:  # every prefix keeps each class's share to within one row
        order = join_order(n, [3, 0, 1], labels)
        for m in range(1, n + 1):
            for value in set(labels):
                share = (labels == value).mean()
                assert abs((labels[order[:m]] == value).sum() - m * share) <= 1


def test_confusion_matrix_is_scikit_learns_and_counts_every_row() -> None:
    from sklearn.metrics import confusion_matrix

    rng = np.random.default_rng(0)
    truth = rng.choice(["no", "yes", "maybe"], 300)
    predicted = np.where(rng.random(300) < 0.7, truth, rng.choice(["no", "yes", "maybe"], 300))
    block = confusion(truth, predicted, ["maybe", "no", "yes"])
    # Reference: scikit-learn's confusion_matrix, and an independent count with pandas.
    assert block["matrix"] == confusion_matrix(truth, predicted, labels=["maybe", "no", "yes"]).tolist()
    counted = pd.crosstab(pd.Series(truth, name="t"), pd.Series(predicted, name="p"))
    assert block["matrix"] == counted.loc[["maybe", "no", "yes"], ["maybe", "no", "yes"]].to_numpy().tolist()
    assert block["rows"] == 300 and sum(map(sum, block["matrix"])) == 300


def test_reliability_curve_is_scikit_learns_with_the_rows_of_each_bin() -> None:
    from sklearn.calibration import calibration_curve

    rng = np.random.default_rng(1)
    p = rng.beta(2, 3, 500)
    truth = np.where(rng.random(500) < p, 1, 0)
    [curve] = calibration(truth, np.column_stack([1 - p, p]), [0, 1], 8)
    observed, predicted = calibration_curve(truth, p, n_bins=8, strategy="uniform")
    assert curve["class"] == 1 and np.allclose(curve["observed"], observed)
    assert np.allclose(curve["predicted"], predicted)
    histogram = np.histogram(p, bins=np.linspace(0, 1, 9))[0]  # numpy's own equal-width bins
    assert curve["count"] == histogram[histogram > 0].tolist() and sum(curve["count"]) == 500
    three = calibration(np.array([0, 1, 2] * 20), rng.dirichlet([1, 1, 1], 60), [0, 1, 2], 5)
    assert [c["class"] for c in three] == [0, 1, 2]


def test_residuals_are_truth_minus_prediction_binned_and_sampled() -> None:
    rng = np.random.default_rng(2)
    predicted = rng.normal(10, 3, 5000)
    truth = predicted + rng.normal(0.5, 1, 5000)
    block = residuals(truth, predicted)
    assert block["rows"] == 5000 and block["mean"] == pytest.approx(float(np.mean(truth - predicted)))
    assert sum(b["rows"] for b in block["bins"]) == 5000 and len(block["bins"]) == 10
    assert [b["prediction_mean"] for b in block["bins"]] == sorted(b["prediction_mean"] for b in block["bins"])
    index = np.array(block["points"]["index"])
    assert len(index) == 2000 and np.allclose(block["points"]["residual"], (truth - predicted)[index])


def test_validation_curves_hold_the_other_parameters_at_the_best_and_mark_the_winner() -> None:
    rows = []
    for rate in (0.05, 0.1, 0.5):
        for leaves in (15, 31):
            cid = f"b{rate}-{leaves}"
            for fold in range(3):
                rows.append({"candidate": cid, "family": "boost", "status": "ok", "repeat": 0, "fold": fold,
                             "params": json.dumps({"learning_rate": rate, "max_leaf_nodes": leaves, "loss": "x"}),
                             "val_r2": rate + leaves / 100 + fold / 10, "train_r2": 1.0 - fold / 100})
    fits = pd.DataFrame(rows)
    curves = validation_curves(fits, "r2", winner="b0.1-31")
    assert [(c["family"], c["param"]) for c in curves] == [("boost", "learning_rate"), ("boost", "max_leaf_nodes")]
    rate = curves[0]
    assert rate["chosen_value"] == 0.1 and rate["chosen_is_winner"] and rate["fixed"]["max_leaf_nodes"] == 31
    assert [p["value"] for p in rate["points"]] == [0.05, 0.1, 0.5]
    for point in rate["points"]:
        mine = fits[fits["candidate"] == point["candidate"]]
        assert point["val_mean"] == pytest.approx(mine["val_r2"].mean())
        assert point["train_mean"] == pytest.approx(mine["train_r2"].mean())
    assert axis_label("neg_mean_absolute_error", "days") == "MAE (days)" and axis_label("roc_auc", "days") == "ROC AUC"


BASE = {"experiment": "x", "data": {"path": "d.csv", "target": "y"},
        "candidates": {"a": {"estimator": "sklearn.linear_model.Ridge"}}}


@pytest.mark.parametrize(("block", "message"), [
    ({"learning_curve": {"sizes": [0.5, 0.5]}}, r"'diagnostics.learning_curve.sizes' lists 0.5 twice"),
    ({"learning_curve": {"sizes": [0]}}, r"'diagnostics.learning_curve.sizes.0': 0 is out of range"),
    ({"learning_curve": {"sizes": [1.2]}}, r"'diagnostics.learning_curve.sizes.0': 1.2 is out of range"),
    ({"learning_curve": {"size": [0.5]}}, r"'diagnostics.learning_curve.size' is not known"),
    ({"learning_curve": "yes"}, r"'diagnostics.learning_curve': 'yes' is not of type"),
    ({"calibration_bins": 1}, r"'diagnostics.calibration_bins': 1 is out of range"),
])
def test_bad_diagnostics_settings_name_the_key(block: dict[str, object], message: str) -> None:
    with pytest.raises(ConfigError, match=message):
        validate({**BASE, "diagnostics": block})


def test_learning_curve_settings() -> None:
    assert learning_sizes(validate(BASE)) == [0.25, 0.5, 1.0]
    assert learning_sizes(validate({**BASE, "diagnostics": {"learning_curve": False}})) == []
    assert learning_sizes(validate({**BASE, "diagnostics": {"learning_curve": True}})) == [0.25, 0.5, 1.0]
    assert learning_sizes(validate({**BASE, "diagnostics": {"learning_curve": {"sizes": [1, 0.3]}}})) == [0.3, 1.0]


def test_learning_tables_of_another_candidate_than_the_winner_are_refused(tmp_path: Path) -> None:
    from holdfast._io import write_json
    from holdfast.diagnostics import summarise_learning
    from holdfast.errors import DataError

    write_json(tmp_path / "choice.json", {"metric": "accuracy", "winner": {"candidate": "aaa", "family": "f"}})
    paths = []
    for fold, candidate in enumerate(("aaa", "bbb")):
        path = tmp_path / f"r0f{fold}.parquet"
        pd.DataFrame({"candidate": [candidate], "fraction": [1.0], "n_train": [10], "status": ["ok"],
                      "train_accuracy": [0.9], "val_accuracy": [0.8]}).to_parquet(path)
        paths.append(str(path))
    with pytest.raises(DataError, match=r"tables under diagnostics/learning/ are of candidate bbb, not the winner aaa"):
        summarise_learning(paths, str(tmp_path / "choice.json"), ["accuracy"], None, str(tmp_path / "learning.json"),
                           str(tmp_path / "learning.png"), str(tmp_path / "ledger.jsonl"))
    assert not any((tmp_path / name).exists() for name in ("learning.json", "learning.png", "ledger.jsonl"))
    summary = summarise_learning(paths[:1], str(tmp_path / "choice.json"), ["accuracy"], None,
                                 str(tmp_path / "learning.json"), str(tmp_path / "learning.png"),
                                 str(tmp_path / "ledger.jsonl"))
    assert summary["points"][0]["metrics"]["accuracy"]["val_mean"] == 0.8
    assert (tmp_path / "learning.png").read_bytes().startswith(b"\x89PNG")


# --- real runs -------------------------------------------------------------------------------------------------------


def _fits(exp: Path, kind: str = "fits") -> pd.DataFrame:
    return pd.concat([pd.read_parquet(p) for p in sorted((exp / kind).glob("*/r*f*.parquet"))], ignore_index=True)


def _events(exp: Path, event: str, after: int = -1) -> list[dict[str, object]]:
    return [e["details"] for e in ledger.read(exp / "ledger.jsonl") if e["event"] == event and e["seq"] > after]


@pytest.mark.slow
def test_every_plotted_number_is_the_stored_one_and_an_unchanged_winner_fits_nothing_again(tmp_path: Path) -> None:
    """Breast cancer data (scikit-learn's bundled copy of Wolberg et al.'s Wisconsin data, 1995)."""
    from sklearn.calibration import calibration_curve
    from sklearn.metrics import confusion_matrix

    breast_cancer_frame().to_csv(tmp_path / "data.csv", index=False)
    write_config(tmp_path, small_classification_config())
    first = run_cli(tmp_path, "run", "config.yaml", "--cores", "2")
    assert first.returncode == 0, first.stdout[-3000:] + first.stderr[-3000:]
    assert "learning curve of" in first.stdout and "diagnostics of" in first.stdout
    exp = tmp_path / "results" / "bc"
    result = json.loads((exp / "diagnostics/diagnostics.json").read_text())
    choice = json.loads((exp / "choice.json").read_text())
    winner, metric = choice["winner"]["candidate"], choice["metric"]
    assert result["winner"]["candidate"] == winner and result["metric"] == metric
    fits = _fits(exp)
    # Validation curves: each point is the mean over folds of one candidate's stored scores.
    curves = {(c["family"], c["param"]) for c in result["validation_curves"]}
    assert curves == {("logistic", "C"), ("tree", "max_depth")}
    for curve in result["validation_curves"]:
        for point in curve["points"]:
            mine = fits[fits["candidate"] == point["candidate"]]
            assert json.loads(mine["params"].iloc[0])[curve["param"]] == point["value"]
            assert point["val_mean"] == pytest.approx(mine[f"val_{metric}"].mean(), abs=1e-12)
            assert point["train_mean"] == pytest.approx(mine[f"train_{metric}"].mean(), abs=1e-12)
        if curve["family"] == choice["winner"]["family"]:
            assert curve["chosen_is_winner"] and curve["chosen_candidate"] == winner
            assert curve["chosen_value"] == choice["winner"]["spec"]["params"][curve["param"]]
    # Learning curve: means over the fold tables; the full fold is the winner's stored fit record.
    tables = pd.concat([pd.read_parquet(p) for p in sorted((exp / "diagnostics/learning").glob("r*f*.parquet"))])
    assert sorted(tables["fraction"].unique()) == [0.25, 0.5, 1.0] and set(tables["candidate"]) == {winner}
    assert result["learning_curve"] == {"summary": "learning.json"}
    learning = json.loads((exp / "diagnostics/learning.json").read_text())
    assert learning["candidate"] == winner and learning["files"] == 3
    for point in learning["points"]:
        part = tables[tables["fraction"] == point["fraction"]]
        assert point["metrics"][metric]["val_mean"] == pytest.approx(part[f"val_{metric}"].mean(), abs=1e-12)
        assert point["n_train"] == pytest.approx(part["n_train"].mean())
    full = tables[tables["fraction"] == 1.0].sort_values("fold")
    stored = fits[fits["candidate"] == winner].sort_values("fold")
    assert full[f"val_{metric}"].tolist() == stored[f"val_{metric}"].tolist()
    assert full["n_train"].tolist() == stored["n_train"].tolist()
    smaller = tables[tables["fraction"] < 1.0]
    assert (smaller["n_train"] < smaller["fold"].map(dict(zip(stored["fold"], stored["n_train"], strict=True)))).all()
    # Confusion matrix and reliability curve: scikit-learn on the stored out-of-fold predictions of the winner.
    oof = _fits(exp, "oof")
    oof = oof[oof["candidate"] == winner]
    dev = pd.read_parquet(exp / "dev.parquet").set_index("row_key")
    truth = dev.loc[oof["row_key"], "target"].to_numpy()
    assert result["confusion"]["matrix"] == confusion_matrix(truth, oof["prediction"], labels=[0, 1]).tolist()
    observed, predicted = calibration_curve(truth, oof["proba_1"], n_bins=10, strategy="uniform")
    [curve] = result["calibration"]["curves"]
    assert np.allclose(curve["observed"], observed) and np.allclose(curve["predicted"], predicted)
    assert sum(curve["count"]) == len(oof) == len(dev)
    assert sorted(result["plots"]) == ["calibration", "confusion", "validation"]
    [summary] = _events(exp, "learning_summary")
    assert summary["png_sha256"] == sha256_file(exp / "diagnostics/learning.png") and summary["points"] == 3
    audit = json.loads((exp / "audit.json").read_text())
    assert audit["passed"] and {"diagnostics/diagnostics.json", "diagnostics/learning.json", "diagnostics/learning.png",
                                "diagnostics/learning/r0f2.parquet"} <= set(audit["verified"])
    page = (exp / "report.html").read_text()
    assert '<section id="diagnostics"><h2>Diagnostics</h2>' in page and "withheld" not in page.split(
        'id="diagnostics"')[1].split("</section>")[0]

    ok = run_workflow(tmp_path)  # the ledger joins the report's inputs after the first run: one remake
    assert ok.returncode == 0, ok.stderr[-3000:]
    assert planned_jobs(run_workflow(tmp_path, "-n")) == [], "changing nothing re-runs nothing"
    # A deleted learning-curve picture is made again (the report shows it, so it is one of the report's inputs).
    (exp / "diagnostics/learning.png").unlink()
    planned = planned_jobs(run_workflow(tmp_path, "-n"))
    assert set(planned) == {"learning_summary", "report", "all"}, planned
    # The diagnostics do not wait for the learning-curve jobs (they run beside them); only its summary does.
    planned = planned_jobs(run_workflow(tmp_path, "-n", "--forcerun", "learning_curve"))
    assert set(planned) == {"learning_curve", "learning_summary", "report", "all"}, planned
    assert planned.count("learning_curve") == 3 and "diagnostics" not in planned

    # A non-winning family edited: the tally runs again and the learning-curve jobs follow it, but fit nothing.
    losing = "tree" if choice["winner"]["family"] == "logistic" else "logistic"
    config = yaml.safe_load((tmp_path / "config.yaml").read_text())
    grid = config["candidates"][losing]["grid"]
    key = next(iter(grid))
    grid[key] = grid[key][:1]
    write_config(tmp_path, config)
    before = {p.name: p.read_bytes() for p in (exp / "diagnostics/learning").glob("r*f*.parquet")}
    head = ledger.read(exp / "ledger.jsonl")[-1]["seq"]
    again = run_cli(tmp_path, "run", "config.yaml", "--cores", "2")
    assert again.returncode == 0, again.stdout[-3000:] + again.stderr[-3000:]
    assert json.loads((exp / "choice.json").read_text())["winner"]["candidate"] == winner
    events = _events(exp, "learning_curve", head)
    assert len(events) == 3 and all(e["reused"] and e["fit_seconds"] is None for e in events), events
    assert {p.name: p.read_bytes() for p in (exp / "diagnostics/learning").glob("r*f*.parquet")} == before
    assert "kept from an earlier run" in again.stdout
    redone = json.loads((exp / "diagnostics/diagnostics.json").read_text())
    assert [c["family"] for c in redone["validation_curves"]] == [choice["winner"]["family"]]

    # A table dropped into the cache with invented numbers is not put back: its bytes were never fitted.
    [planted] = sorted((exp / "diagnostics/learning/kept").glob("*-r0f0.parquet"))
    forged = pd.read_parquet(planted)
    forged["val_" + config["metrics"][0]] = 0.999
    forged.to_parquet(planted)
    write_config(tmp_path, small_classification_config())  # the first set-up again: a new tally, a new round
    head = ledger.read(exp / "ledger.jsonl")[-1]["seq"]
    third = run_cli(tmp_path, "run", "config.yaml", "--cores", "2")
    assert third.returncode == 0, third.stdout[-3000:] + third.stderr[-3000:]
    by_fold = {(e["repeat"], e["fold"]): e["reused"] for e in _events(exp, "learning_curve", head)}
    assert by_fold == {(0, 0): False, (0, 1): True, (0, 2): True}, by_fold
    assert not (pd.read_parquet(exp / "diagnostics/learning/r0f0.parquet")["val_" + config["metrics"][0]]
                == 0.999).any()


@pytest.mark.slow
def test_regression_residuals_are_the_stored_out_of_fold_ones_and_the_learning_curve_can_be_off(tmp_path: Path) -> None:
    """Diabetes progression (scikit-learn's bundled diabetes data, Efron et al., Annals of Statistics 2004)."""
    diabetes_frame().to_csv(tmp_path / "data.csv", index=False)
    write_config(tmp_path, {
        "experiment": "progression", "data": {"path": "data.csv", "target": "target", "unit": "points"},
        "task": "regression", "metrics": ["neg_mean_absolute_error", "r2"],
        "test": {"fraction": 0.25, "salt": "r1"}, "folds": {"scheme": "kfold", "k": 3, "seed": 2},
        "diagnostics": {"learning_curve": False},
        "candidates": {"ridge": {"estimator": "sklearn.linear_model.Ridge", "preprocess": {"scale": "standard"},
                                 "grid": {"alpha": [0.1, 10.0, 100.0]}}}})
    result = run_workflow(tmp_path)
    assert result.returncode == 0, result.stderr[-3000:]
    exp = tmp_path / "results" / "progression"
    block = json.loads((exp / "diagnostics/diagnostics.json").read_text())
    assert block["learning_curve"] == {"unavailable": "turned off (diagnostics.learning_curve: false)"}
    assert not (exp / "diagnostics/learning").exists() and "rule learning_curve" not in result.stderr
    assert not (exp / "diagnostics/learning.json").exists() and "rule learning_summary" not in result.stderr
    assert sorted(block["plots"]) == ["residuals", "validation"] and "confusion" not in block
    winner = json.loads((exp / "choice.json").read_text())["winner"]["candidate"]
    oof = _fits(exp, "oof")
    oof = oof[oof["candidate"] == winner].sort_values(["repeat", "fold", "row_key"], kind="stable")
    dev = pd.read_parquet(exp / "dev.parquet").set_index("row_key")
    residual = dev.loc[oof["row_key"], "target"].to_numpy(float) - oof["prediction"].to_numpy(float)
    shown = block["residuals"]
    assert shown["rows"] == len(dev) and shown["mean"] == pytest.approx(residual.mean())
    assert np.allclose(shown["points"]["residual"], residual) and shown["points"]["index"] == list(range(len(dev)))
    assert shown["mean_absolute"] == pytest.approx(-np.mean(_fits(exp).query("candidate == @winner")
                                                            ["val_neg_mean_absolute_error"]), rel=0.05)
    [curve] = block["validation_curves"]
    assert curve["param"] == "alpha" and curve["log_scale"] and [p["value"] for p in curve["points"]] == [
        0.1, 10.0, 100.0]
    text = (exp / "report.html").read_text()
    section = text.split('id="diagnostics"')[1].split("</section>")[0]
    assert "in MAE (smaller is better)" in section and "neg_mean_absolute_error" not in section
    best = next(p for p in curve["points"] if p["candidate"] == winner)
    assert f"{-best['val_mean']:.4f} points" in section, "errors shown positive in the target's unit"
    for event in ("learning_curve", "diagnostics"):  # development rows only: no record of the sealed file
        assert all("test_sha256" not in d for d in _events(exp, event))
