"""The tally: corrected uncertainty, the one-standard-error choice and the winner's optimism in the outputs."""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from holdfast.stats import corrected_variance
from holdfast.tally import choose, complexity_ranks, summarise


def fits_table() -> pd.DataFrame:
    """Three candidates x 2 repeats x 3 folds of made-up accuracies, sizes 200 train / 100 validation."""
    scores = {"a": [0.90, 0.86, 0.88, 0.89, 0.87, 0.88], "b": [0.89, 0.87, 0.88, 0.88, 0.86, 0.87],
              "c": [0.80, 0.82, 0.81, 0.83, 0.80, 0.81]}
    rows = []
    for cid, values in scores.items():
        for i, value in enumerate(values):
            rows.append({"candidate": cid, "family": "tree", "params": json.dumps({"max_depth": {"a": 8, "b": 3,
                         "c": 1}[cid]}), "repeat": i // 3, "fold": i % 3, "n_train": 200, "n_val": 100,
                         "status": "ok", "error": "", "val_accuracy": value, "train_accuracy": 1.0})
    return pd.DataFrame(rows)


def test_corrected_standard_error_follows_nadeau_bengio() -> None:
    # Nadeau & Bengio, "Inference for the Generalization Error", Machine Learning 52 (2003): the corrected
    # variance of the mean of J resampled scores is (1/J + n_val/n_train) * s^2.
    ranking = summarise(fits_table(), ["accuracy"], 6)
    row = ranking[ranking["candidate"] == "a"].iloc[0]
    values = np.array([0.90, 0.86, 0.88, 0.89, 0.87, 0.88])
    s2 = values.var(ddof=1)
    assert row["se"] == pytest.approx(math.sqrt(s2 / 6), abs=1e-15)
    assert row["se_corrected"] == pytest.approx(math.sqrt((1 / 6 + 100 / 200) * s2), abs=1e-15)
    assert list(ranking.sort_values("rank")["candidate"]) == ["a", "b", "c"]
    # One formula: the ranking's corrected standard error is stats.corrected_variance's, to the last bit.
    assert row["se_corrected"] == corrected_variance(values, 200, 100).corrected_se


def test_a_fold_score_that_is_nan_leaves_the_corrected_standard_error_undefined() -> None:
    # corrected_variance refuses NaN scores (a metric undefined on a fold, e.g. roc_auc on one class); the
    # tally must still rank the other candidates, so it reports NaN for that candidate rather than failing.
    fits = fits_table()
    fits.loc[(fits["candidate"] == "b") & (fits["fold"] == 1) & (fits["repeat"] == 0), "val_accuracy"] = np.nan
    with pytest.raises(ValueError, match="NaN or infinite"):
        corrected_variance(fits.loc[fits["candidate"] == "b", "val_accuracy"].to_numpy(), 200, 100)
    ranking = summarise(fits, ["accuracy"], 6).set_index("candidate")
    assert math.isnan(ranking.loc["b", "se_corrected"]) and math.isnan(ranking.loc["b", "se"])
    assert ranking.loc["a", "se_corrected"] > 0 and ranking.loc["c", "se_corrected"] > 0
    failed = fits_table()  # a fold that failed outright counts out of the folds, not as NaN
    failed.loc[(failed["candidate"] == "c") & (failed["fold"] == 2) & (failed["repeat"] == 1), "status"] = "error"
    row = summarise(failed, ["accuracy"], 6).set_index("candidate").loc["c"]
    kept = failed.loc[(failed["candidate"] == "c") & (failed["status"] == "ok"), "val_accuracy"].to_numpy()
    assert row["folds"] == 5 and not row["complete"]
    assert row["se_corrected"] == corrected_variance(kept, 200, 100).corrected_se


def test_one_standard_error_rule_picks_the_simplest_within_one_se() -> None:
    # Hastie, Tibshirani & Friedman, The Elements of Statistical Learning, 2nd ed. (2009), section 7.10:
    # the most parsimonious model whose error is within one standard error of the best model's.
    ranking = summarise(fits_table(), ["accuracy"], 6)
    candidates = {cid: {"family": "tree", "params": {"max_depth": d}} for cid, d in (("a", 8), ("b", 3), ("c", 1))}
    ranks = complexity_ranks(candidates, {"family_order": ["tree"]},
                             {"tree": {"param": "max_depth", "simpler": "lower"}})
    winner, runner, best, reason = choose(ranking, "accuracy", "one_standard_error", ranks)
    best_mean, best_se = ranking.loc[ranking["candidate"] == "a", ["mean", "se"]].iloc[0]
    b_mean = ranking.loc[ranking["candidate"] == "b", "mean"].iloc[0]
    assert b_mean >= best_mean - best_se  # b is within one SE of a; c is not
    assert winner["candidate"] == "b" and best["candidate"] == "a" and runner["candidate"] == "a"
    assert "simplest" in reason
    plain, *_ = choose(ranking, "accuracy", "best_mean", ranks)
    assert plain["candidate"] == "a"


@pytest.mark.slow
def test_finished_run_reports_uncertainty_comparison_and_optimism(bc_finished: Path) -> None:
    from scipy.stats import t as student_t

    exp = bc_finished / "results" / "bc"
    ranking = pd.read_parquet(exp / "ranking.parquet")
    choice = json.loads((exp / "choice.json").read_text())
    assert {"se", "se_corrected", "diff_vs_winner", "diff_se", "t", "p"} <= set(ranking.columns)
    primary = ranking[(ranking["metric"] == "accuracy") & (ranking["candidate"] != choice["winner"]["candidate"])]
    for _, row in primary.iterrows():
        # two-sided p of the corrected resampled t statistic with folds - 1 degrees of freedom (scipy.stats.t)
        assert row["p"] == pytest.approx(2 * student_t.sf(abs(row["t"]), row["folds"] - 1), rel=1e-12)
    optimism = choice["optimism"]
    assert optimism["metric"] == "accuracy" and optimism["raw"] == choice["winner"]["mean"]
    for name in ("tibshirani", "bbc"):
        assert optimism[name]["optimism"] == pytest.approx(optimism["raw"] - optimism[name]["corrected"])
        assert optimism[name]["optimism"] >= 0
    assert optimism["tibshirani"]["folds_per_repeat"] == 3 and "caution" not in optimism["tibshirani"]  # k = 3
    verdict = json.loads((exp / "final/verdict.json").read_text())
    block = verdict["metrics"]["accuracy"]
    assert block["cv_corrected_bbc"] == optimism["bbc"]["corrected"]
    assert isinstance(block["cv_corrected_bbc_inside_interval"], bool)
    low, high = block["interval"]
    corrected = [block["cv_corrected_bbc"], block["cv_corrected_tibshirani"]]
    if all(low <= v <= high for v in corrected):
        assert block["agreement"] == "inside"
    elif all(v < low for v in corrected):
        assert block["agreement"] == "test better than cv"
    elif all(v > high for v in corrected):
        assert block["agreement"] == "test worse than cv"
    else:
        assert block["agreement"] == "borderline"
    assert verdict["metrics"]["roc_auc"]["agreement"] in ("inside", "test better than cv", "test worse than cv",
                                                          "borderline")
    assert "cv_corrected_note" in verdict["metrics"]["roc_auc"]


@pytest.mark.slow
def test_a_finished_run_ends_with_the_headline_numbers(bc_finished: Path) -> None:
    from holdfast.audit import audit
    from holdfast.headline import verdict_line as headline

    exp = bc_finished / "results" / "bc"
    verdict = json.loads((exp / "final/verdict.json").read_text())
    block = verdict["metrics"]["accuracy"]
    line = headline(exp, audit(str(exp))["verified"])
    low, high = block["interval"]
    for part in (verdict["winner"]["candidate"], f"CV {block['cv_mean']:.4f}",
                 f"BBC-CV {block['cv_corrected_bbc']:.4f}",
                 f"Tibshirani–Tibshirani {block['cv_corrected_tibshirani']:.4f}", f"test {block['test']:.4f}",
                 f"[{low:.4f}, {high:.4f}]", f"agreement: {block['agreement']}"):
        assert part in line
    stdout = (bc_finished.parent / f"{bc_finished.name}.stdout").read_text()
    assert f"holdfast: {line}" in stdout.splitlines()
    assert headline(bc_finished / "results" / "no-such-experiment", {}) == ""
