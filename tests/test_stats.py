"""holdfast.stats and holdfast.optimism against hand-worked examples, scipy/scikit-learn, and the rules as their
sources state them.

Every reference sits in a comment beside its check. Scores follow scikit-learn: greater is better.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pandas as pd
import pytest
from holdfast.errors import DataError
from holdfast.optimism import (
    BinaryAUCScorer,
    OofCollector,
    RowMeanScorer,
    WeightedScorer,
    accuracy_scorer,
    bbc_cv,
    best_by_mean,
    concatenated_columns,
    kept_outputs,
    neg_error_rate_scorer,
    oof_arrays,
    optimism_summary,
    replay_scorer,
    sklearn_scorer,
    tibshirani_bias,
    tibshirani_caution,
)
from holdfast.stats import (
    compare_with_winner,
    corrected_ttest,
    corrected_variance,
    fold_score_matrix,
    fold_sizes,
    one_standard_error_choice,
)
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats as scipy_stats
from sklearn import metrics

# ---------------------------------------------------------------------------------------------
# Nadeau–Bengio corrected variance
# ---------------------------------------------------------------------------------------------


def test_nb_variance_hand_worked_example() -> None:
    # Nadeau & Bengio, "Inference for the Generalization Error", Machine Learning 52 (2003), corrected resampled
    # t-test: Var(mean) ≈ (1/J + n2/n1)·σ̂². By hand, 5-fold CV on 100 rows (n1 = 80 train, n2 = 20 validation):
    #   scores 0.80 0.82 0.78 0.84 0.76 -> mean 0.80
    #   deviations 0, .02, −.02, .04, −.04 -> squares 0 + .0004 + .0004 + .0016 + .0016 = .004
    #   s² = .004 / (5 − 1) = .001
    #   naive     = s²/J            = .001 / 5            = .0002
    #   corrected = (1/5 + 20/80)·s² = (.2 + .25)·.001     = .00045   (se = sqrt(.00045) = .0212132)
    v = corrected_variance([0.80, 0.82, 0.78, 0.84, 0.76], n_train=80, n_val=20)
    assert v.mean == pytest.approx(0.80, abs=1e-15)
    assert v.sample_variance == pytest.approx(0.001, rel=1e-12)
    assert v.naive_variance == pytest.approx(0.0002, rel=1e-12)
    assert v.corrected_variance == pytest.approx(0.00045, rel=1e-12)
    assert v.corrected_se == pytest.approx(math.sqrt(0.00045), rel=1e-12) == pytest.approx(0.0212132, abs=1e-7)
    assert v.folds == 5


def _nb_direct(scores: np.ndarray, n1: np.ndarray, n2: np.ndarray) -> tuple[float, float]:
    """The paper's formula written out literally, with the fold sizes averaged (our documented choice)."""
    # Nadeau & Bengio (2003): σ̂² = Σ (x_j − x̄)² / (J − 1); corrected Var = (1/J + n2/n1) σ̂².
    j = len(scores)
    xbar = sum(scores) / j
    s2 = sum((x - xbar) ** 2 for x in scores) / (j - 1)
    ratio = (sum(n2) / j) / (sum(n1) / j)
    return s2 / j, (1 / j + ratio) * s2


@settings(max_examples=60, deadline=None)
@given(st.integers(2, 30), st.integers(0, 10_000), st.integers(2, 10))
def test_nb_variance_equals_direct_formula(folds: int, seed: int, k: int) -> None:
    rng = np.random.default_rng(seed)
    scores = rng.normal(0.7, 0.05, folds)
    n_val = rng.integers(90, 110, folds).astype(float)  # fold sizes differ by a few rows
    n_train = n_val * (k - 1) + rng.integers(-3, 4, folds)
    naive, corrected = _nb_direct(scores, n_train, n_val)
    v = corrected_variance(scores, n_train, n_val)
    assert v.naive_variance == pytest.approx(naive, rel=1e-10, abs=1e-300)
    assert v.corrected_variance == pytest.approx(corrected, rel=1e-10, abs=1e-300)
    assert v.corrected_variance >= v.naive_variance
    assert v.n_train == pytest.approx(n_train.mean()) and v.n_val == pytest.approx(n_val.mean())


@pytest.mark.parametrize(("scores", "n_train", "n_val", "match"), [
    ([0.5], 80, 20, "at least 2"),
    ([0.5, float("nan")], 80, 20, "NaN"),
    ([[0.5, 0.6]], 80, 20, "1-D"),
    ([0.5, 0.6, 0.7], [80, 80], 20, "one per fold"),
    ([0.5, 0.6], 0, 20, "positive"),
])
def test_nb_variance_refuses_bad_input(scores: Any, n_train: Any, n_val: Any, match: str) -> None:
    with pytest.raises(ValueError, match=match):
        corrected_variance(scores, n_train, n_val)


# ---------------------------------------------------------------------------------------------
# Corrected resampled t-test
# ---------------------------------------------------------------------------------------------


def test_corrected_ttest_hand_formula_and_scipy_p() -> None:
    # Nadeau & Bengio (2003), corrected resampled t-test, J − 1 df (Bouckaert & Frank, PAKDD 2004). By hand:
    #   d = .02 .01 .03 .00 .04 -> mean .02; squares of deviations .0001+.0001+.0004+.0004 = .001; s² = .00025
    #   corrected var = (1/5 + 20/80)·.00025 = .0001125; se = .0106066; t = .02 / .0106066 = 1.885618
    # p: scipy.stats.t survival function, two-sided: 2·t.sf(|t|, J − 1).
    r = corrected_ttest([0.02, 0.01, 0.03, 0.00, 0.04], n_train=80, n_val=20)
    assert r.mean_difference == pytest.approx(0.02, abs=1e-15)
    assert r.corrected_se == pytest.approx(math.sqrt(0.0001125), rel=1e-12)
    assert r.t == pytest.approx(0.02 / math.sqrt(0.0001125), rel=1e-12)
    assert r.t == pytest.approx(1.885618, abs=1e-6)
    assert r.df == 4
    assert r.p == 2 * scipy_stats.t.sf(abs(r.t), 4)


@pytest.mark.parametrize("seed", range(5))
def test_corrected_ttest_p_is_scipy_t_survival(seed: int) -> None:
    rng = np.random.default_rng(seed)
    diffs = rng.normal(-0.01, 0.03, 10 * 3)  # 3 × 10-fold
    r = corrected_ttest(diffs, n_train=900, n_val=100)
    assert r.p == 2 * scipy_stats.t.sf(abs(r.t), len(diffs) - 1)  # scipy.stats.t, two-sided
    assert np.sign(r.t) == np.sign(diffs.mean())


def test_corrected_ttest_without_correction_is_the_ordinary_paired_t() -> None:
    # With n_val/n_train → 0 the correction vanishes and the statistic is Student's one-sample t on the
    # differences: reference scipy.stats.ttest_1samp(d, 0).
    d = np.array([0.013, -0.004, 0.021, 0.008, 0.017, 0.002])
    r = corrected_ttest(d, n_train=1e15, n_val=1)
    ref = scipy_stats.ttest_1samp(d, 0.0)
    assert r.t == pytest.approx(ref.statistic, rel=1e-9)
    assert r.p == pytest.approx(ref.pvalue, rel=1e-7)


@pytest.mark.parametrize(("diffs", "t", "p"), [
    ([0.0, 0.0, 0.0, 0.0], 0.0, 1.0),             # identical candidates: no evidence of a difference
    ([0.01, 0.01, 0.01], math.inf, 0.0),          # a constant non-zero difference: the limit as spread → 0
    ([-0.02, -0.02, -0.02, -0.02], -math.inf, 0.0),
])
def test_corrected_ttest_zero_variance_rule(diffs: list[float], t: float, p: float) -> None:
    r = corrected_ttest(diffs, n_train=90, n_val=10)
    assert r.t == t and r.p == p and r.corrected_se == 0.0


def test_compare_with_winner_uses_paired_fold_differences() -> None:
    scores = pd.DataFrame({"a": [0.80, 0.82, 0.78, 0.84, 0.76], "b": [0.78, 0.81, 0.75, 0.84, 0.72],
                           "c": [0.80, 0.82, 0.78, 0.84, 0.76]})
    table = compare_with_winner(scores, "a", n_train=80, n_val=20).set_index("candidate")
    # a − b = .02 .01 .03 .00 .04: the hand example above
    assert table.loc["b", "t"] == pytest.approx(1.885618, abs=1e-6)
    assert table.loc["c", "p"] == 1.0 and table.loc["c", "t"] == 0.0
    assert list(table.index) == ["b", "c"]


# ---------------------------------------------------------------------------------------------
# One-standard-error rule
# ---------------------------------------------------------------------------------------------


def _esl_one_se(errors: dict[str, float], se_of_best: float, complexity: dict[str, int]) -> str:
    """The rule as Hastie, Tibshirani & Friedman state it for errors (ESL 2nd ed., §7.10.1)."""
    # ESL §7.10.1: "choose the most parsimonious model whose error is no more than one standard error above
    # the error of the best model" (wording from memory; Breiman et al. 1984). Ties in parsimony: lower error,
    # then id (ours).
    best_error = min(errors.values())
    ok = [c for c, e in errors.items() if e <= best_error + se_of_best]
    return sorted(ok, key=lambda c: (complexity[c], errors[c], c))[0]


# Each case: candidates (id, mean score, se, complexity rank), the best-mean id, the expected choice.
ONE_SE_CASES = [
    pytest.param([("a", 0.90, 0.02, 3), ("b", 0.89, 0.02, 2), ("c", 0.87, 0.02, 1)], "a", "b",
                 id="simpler-within-band"),
    pytest.param([("a", 0.90, 0.02, 1), ("b", 0.89, 0.02, 2), ("c", 0.70, 0.02, 0)], "a", "a",
                 id="best-is-simplest-eligible"),
    pytest.param([("a", 0.75, 0.25, 2), ("b", 0.50, 0.10, 1), ("c", 0.4999, 0.1, 0)], "a", "b",
                 id="exactly-on-the-threshold-counts"),  # 0.75 − 0.25 = 0.5 exactly in binary floating point
    pytest.param([("a", 0.90, 0.02, 5), ("b", 0.89, 0.02, 1), ("c", 0.895, 0.02, 1)], "a", "c",
                 id="complexity-tie-higher-mean"),
    pytest.param([("a", 0.90, 0.02, 5), ("c", 0.89, 0.02, 1), ("b", 0.89, 0.02, 1)], "a", "b",
                 id="complexity-and-mean-tie-smaller-id"),
    pytest.param([("a", 0.90, 0.0, 5), ("b", 0.90, 0.0, 1)], "a", "b", id="zero-se-equal-means"),
    pytest.param([("b", 0.90, 0.01, 5), ("a", 0.90, 0.01, 6), ("c", 0.50, 0.01, 0)], "a", "b",
                 id="tied-best-means"),
]


@pytest.mark.parametrize(("rows", "best", "expected"), ONE_SE_CASES)
def test_one_se_choice_matches_esl_rule(rows: list[tuple[str, float, float, int]], best: str, expected: str) -> None:
    summary = pd.DataFrame(rows, columns=["candidate", "mean", "se", "complexity"])
    choice = one_standard_error_choice(summary, best, "complexity")
    assert choice.chosen == expected
    # the same rule on errors (error = −score), as the book states it
    errors = {c: -m for c, m, _, _ in rows}
    best_se = dict(zip(summary["candidate"], summary["se"], strict=True))[best]
    assert _esl_one_se(errors, best_se, dict(zip(summary["candidate"], summary["complexity"], strict=True))) \
        == expected
    assert choice.chosen in choice.eligible and choice.best == best
    assert choice.threshold == pytest.approx(choice.best_mean - choice.best_se)


def test_one_se_choice_key_forms_and_incomplete_candidates() -> None:
    summary = pd.DataFrame({"candidate": ["deep", "mid", "stump", "broken"], "mean": [0.90, 0.89, 0.885, 0.95],
                            "se": [0.02, 0.02, 0.02, 0.01], "complete": [True, True, True, False],
                            "max_depth": [12, 4, 1, 0]})
    assert one_standard_error_choice(summary, "deep", "max_depth").chosen == "stump"  # 'broken' never counts
    assert one_standard_error_choice(summary, "deep", {"deep": 3, "mid": 1, "stump": 2, "broken": 0}).chosen == "mid"
    assert one_standard_error_choice(summary, "deep", lambda row: -row["max_depth"]).chosen == "deep"


def test_one_se_choice_single_fold_keeps_best_and_says_why() -> None:
    summary = pd.DataFrame({"candidate": ["a", "b"], "mean": [0.9, 0.89], "se": [float("nan")] * 2, "k": [2, 1]})
    choice = one_standard_error_choice(summary, "a", "k")
    assert choice.chosen == "a" and "undefined" in choice.reason


@pytest.mark.parametrize(("best", "key", "match"), [
    ("b", "k", "does not have the best mean"),
    ("zz", "k", "not a \\(complete\\) candidate"),
    ("a", "nope", "not a column"),
    ("a", {"a": 1}, "no rank"),
])
def test_one_se_choice_refusals(best: str, key: Any, match: str) -> None:
    summary = pd.DataFrame({"candidate": ["a", "b"], "mean": [0.9, 0.89], "se": [0.01, 0.01], "k": [2, 1]})
    with pytest.raises(ValueError, match=match):
        one_standard_error_choice(summary, best, key)


# ---------------------------------------------------------------------------------------------
# Tibshirani & Tibshirani bias
# ---------------------------------------------------------------------------------------------


def test_tibshirani_hand_computed_table() -> None:
    # Tibshirani & Tibshirani, Ann. Appl. Stat. 3(2), 2009: Bias = (1/K) Σ_k [e_k(θ̂) − e_k(θ̂_k)], θ̂ minimises
    # the CV error, θ̂_k minimises fold k's error; corrected error = CV(θ̂) + Bias. Per-fold errors by hand:
    #            A     B     C
    #   fold 1  .20   .25   .30      fold minimum .20
    #   fold 2  .30   .20   .25      fold minimum .20
    #   fold 3  .25   .30   .10      fold minimum .10
    #   CV      .25   .25   .21667   -> θ̂ = C
    #   Bias = [(.30 − .20) + (.25 − .20) + (.10 − .10)] / 3 = .15 / 3 = .05
    #   corrected error = .21667 + .05 = .26667.  As accuracy (1 − error): raw .78333, corrected .73333.
    errors = pd.DataFrame({"A": [0.20, 0.30, 0.25], "B": [0.25, 0.20, 0.30], "C": [0.30, 0.25, 0.10]})
    r = tibshirani_bias(1.0 - errors)
    assert r.winner == "C"
    assert r.bias == pytest.approx(0.05, abs=1e-12)
    assert r.raw == pytest.approx(1 - 0.65 / 3, abs=1e-12)
    assert r.corrected == pytest.approx(1 - 0.65 / 3 - 0.05, abs=1e-12)
    assert 1 - r.corrected == pytest.approx(0.266667, abs=1e-6)  # back in error units
    # scores as neg errors give the same bias (sign convention only)
    neg = tibshirani_bias(-errors)
    assert neg.winner == "C" and neg.bias == pytest.approx(0.05, abs=1e-12)
    assert neg.corrected == pytest.approx(-(0.65 / 3 + 0.05), abs=1e-12)


def test_tibshirani_for_a_chosen_candidate_and_arrays() -> None:
    errors = np.array([[0.20, 0.25, 0.30], [0.30, 0.20, 0.25], [0.25, 0.30, 0.10]])
    # for A (not the best mean): shortfalls 0, .10, .15 -> .08333
    r = tibshirani_bias(1 - errors, winner=0)
    assert r.winner == 0 and r.bias == pytest.approx(0.25 / 3, abs=1e-12)
    with pytest.raises(ValueError, match="NaN"):
        tibshirani_bias(pd.DataFrame({"a": [0.1, np.nan], "b": [0.2, 0.3]}))


@settings(max_examples=50, deadline=None)
@given(st.integers(2, 12), st.integers(1, 30), st.integers(0, 10_000))
def test_tibshirani_bias_is_non_negative_and_moves_down(folds: int, candidates: int, seed: int) -> None:
    scores = np.random.default_rng(seed).normal(0.7, 0.05, (folds, candidates))
    r = tibshirani_bias(scores)
    assert r.bias >= 0 and r.corrected <= r.raw
    assert r.raw == pytest.approx(scores.mean(axis=0).max())


@pytest.mark.parametrize("k", [4, 16])
def test_tibshirani_correction_is_about_sqrt_k_minus_one_times_the_optimism(k: int) -> None:
    # holdfast's own derivation (stats.tibshirani_caution), checked here by simulation, not a published
    # source: M candidates with equal true score and independent N(0, 1) fold scores. The winner's true
    # optimism is E[max_j mean_k] = c/sqrt(k); T&T's correction is about c(1 - 1/sqrt(k)), a ratio of sqrt(k) - 1.
    rng = np.random.default_rng(7)
    reps, m = 4000, 20
    scores = rng.standard_normal((reps, k, m))
    optimism = scores.mean(axis=1).max(axis=1).mean()  # true score is 0
    correction = np.mean([tibshirani_bias(one).bias for one in scores])
    assert correction / optimism == pytest.approx(math.sqrt(k) - 1, rel=0.1)


def test_tibshirani_caution_from_nine_folds() -> None:
    assert tibshirani_caution(5) == "" and tibshirani_caution(8) == ""
    assert "10 folds" in tibshirani_caution(10) and "2.2 times" in tibshirani_caution(10)


def test_best_by_mean_breaks_ties_by_smallest_label() -> None:
    assert best_by_mean(pd.DataFrame({"b": [0.5, 0.7], "a": [0.7, 0.5], "c": [0.1, 0.2]})) == "a"


# ---------------------------------------------------------------------------------------------
# Scorers: the vectorised weighted path equals scikit-learn on the resampled rows
# ---------------------------------------------------------------------------------------------


def _classification_outputs(n: int, seed: int, ties: bool = False) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    rng = np.random.default_rng(seed)
    y = (rng.random(n) < 0.35).astype(int)
    logit = rng.normal(size=n) + 1.2 * y
    if ties:
        logit = np.round(logit, 0)  # few distinct scores: many ties
    proba1 = 1 / (1 + np.exp(-logit))
    outputs = {"predict": (proba1 > 0.5).astype(int), "predict_proba": np.column_stack([1 - proba1, proba1]),
               "decision_function": logit}
    return y, outputs


REFERENCES = {
    # sklearn.metrics functions: the definitions our vectorised scorers must reproduce on resampled rows
    "accuracy": lambda y, o: metrics.accuracy_score(y, o["predict"]),
    "roc_auc": lambda y, o: metrics.roc_auc_score(y, o["decision_function"]),
    "neg_log_loss": lambda y, o: -metrics.log_loss(y, o["predict_proba"], labels=[0, 1]),
}


@pytest.mark.parametrize("name", sorted(REFERENCES))
@pytest.mark.parametrize("ties", [False, True])
def test_weighted_scorer_equals_sklearn_on_resampled_rows(name: str, ties: bool) -> None:
    y, outputs = _classification_outputs(300, seed=3, ties=ties)
    scorer = sklearn_scorer(name, "classification", classes=[0, 1])
    assert isinstance(scorer, WeightedScorer)
    state = scorer.prepare(y, outputs)
    rng = np.random.default_rng(4)
    rows = rng.integers(0, len(y), size=(12, len(y)))
    counts = np.stack([np.bincount(r, minlength=len(y)) for r in rows], axis=1)  # rows × draws
    outside = (counts == 0).astype(int)
    in_bag = scorer.weighted(state, counts)
    out_bag = scorer.weighted(state, outside)
    for b in range(rows.shape[0]):
        take = {k: v[rows[b]] for k, v in outputs.items()}
        assert in_bag[b] == pytest.approx(REFERENCES[name](y[rows[b]], take), rel=1e-12, abs=1e-12)
        left = np.flatnonzero(outside[:, b])
        assert out_bag[b] == pytest.approx(REFERENCES[name](y[left], {k: v[left] for k, v in outputs.items()}),
                                           rel=1e-12, abs=1e-12)
    # and called plainly on all rows, each equals scikit-learn's own scorer through the replay estimator
    assert scorer(y, outputs) == pytest.approx(replay_scorer(name, "classification", [0, 1])(y, outputs), rel=1e-12)


@pytest.mark.parametrize("name", ["neg_mean_squared_error", "neg_mean_absolute_error"])
def test_weighted_regression_scorers_equal_sklearn(name: str) -> None:
    # Reference implementation: scikit-learn's own scorers (sklearn.metrics.get_scorer), reached through
    # replay_scorer, on the full rows and on a bootstrap resample.
    rng = np.random.default_rng(8)
    y = rng.normal(size=200)
    outputs = {"predict": y + rng.normal(scale=0.5, size=200)}
    scorer = sklearn_scorer(name, "regression")
    assert isinstance(scorer, RowMeanScorer)
    assert scorer(y, outputs) == pytest.approx(replay_scorer(name, "regression")(y, outputs), rel=1e-12)
    rows = rng.integers(0, 200, 200)
    counts = np.bincount(rows, minlength=200)[:, None]
    reference = replay_scorer(name, "regression")(y[rows], {"predict": outputs["predict"][rows]})
    assert scorer.weighted(scorer.prepare(y, outputs), counts)[0] == pytest.approx(reference, rel=1e-12)


def test_auc_uses_probabilities_when_no_decision_function_and_flips_classes() -> None:
    y, outputs = _classification_outputs(400, seed=5)
    only_proba = {"predict_proba": outputs["predict_proba"]}
    reference = metrics.roc_auc_score(y, outputs["predict_proba"][:, 1])
    assert BinaryAUCScorer((0, 1))(y, only_proba) == pytest.approx(reference, rel=1e-12)
    # the positive class as the majority (the other branch of the running sum)
    assert BinaryAUCScorer((0, 1))(1 - y, {"decision_function": -outputs["decision_function"]}) == pytest.approx(
        metrics.roc_auc_score(1 - y, -outputs["decision_function"]), rel=1e-12)


def test_accuracy_and_error_rate_scorers() -> None:
    y = np.array([0, 1, 1, 0, 1])
    pred = np.array([0, 1, 0, 0, 0])
    assert accuracy_scorer()(y, pred) == pytest.approx(0.6)  # 3 of 5 correct
    assert neg_error_rate_scorer()(y, pred) == pytest.approx(-0.4)
    assert accuracy_scorer()(y, {"predict": pred}) == pytest.approx(0.6)


def test_sklearn_scorer_falls_back_to_replay_for_other_metrics() -> None:
    y, outputs = _classification_outputs(120, seed=2)
    scorer = sklearn_scorer("balanced_accuracy", "classification", classes=[0, 1])
    assert not isinstance(scorer, WeightedScorer)
    assert scorer(y, outputs) == pytest.approx(metrics.balanced_accuracy_score(y, outputs["predict"]))


# ---------------------------------------------------------------------------------------------
# BBC-CV
# ---------------------------------------------------------------------------------------------


def _null_predictions(n: int, m: int, accuracy: float, seed: int) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    """M candidates whose every prediction is right with probability `accuracy`, independently."""
    rng = np.random.default_rng(seed)
    y = rng.integers(0, 2, n)
    return y, {f"c{j:02d}": np.where(rng.random(n) < accuracy, y, 1 - y) for j in range(m)}


def test_bbc_is_deterministic_with_a_seed() -> None:
    y, preds = _null_predictions(500, 8, 0.7, seed=0)
    a = bbc_cv(preds, y, accuracy_scorer(), draws=300, seed=42)
    b = bbc_cv(dict(reversed(list(preds.items()))), y, accuracy_scorer(), draws=300, seed=42)  # order-free
    c = bbc_cv(preds, y, accuracy_scorer(), draws=300, seed=43)
    assert a.estimate == b.estimate and np.array_equal(a.oob_scores, b.oob_scores) and a.wins == b.wins
    assert a.estimate != c.estimate
    assert a.draws == 300 and a.skipped == 0 and sum(a.wins.values()) == 300


def test_bbc_near_truth_while_the_raw_maximum_is_optimistic() -> None:
    # Tsamardinos, Greasidou & Borboudakis, Machine Learning 107 (2018): with candidates of equal true performance,
    # the best CV score is optimistic and BBC-CV removes the optimism. Truth here: accuracy 0.7 for every candidate.
    # Averaged over 20 independent data sets so the check does not rest on one lucky seed.
    truth, raw, bbc = 0.7, [], []
    for rep in range(20):
        y, preds = _null_predictions(2000, 50, truth, seed=100 + rep)
        raw.append(max(np.mean(p == y) for p in preds.values()))
        bbc.append(bbc_cv(preds, y, accuracy_scorer(), draws=200, seed=rep).estimate)
    # expected optimism of the raw max ≈ E[max of 50 normals]·sd ≈ 2.25 · sqrt(.21/2000) ≈ .023 (from memory)
    assert np.mean(raw) - truth > 0.015
    assert abs(np.mean(bbc) - truth) < 0.006
    assert abs(np.mean(bbc) - truth) < (np.mean(raw) - truth) / 3


def test_bbc_obvious_winner() -> None:
    y = np.array([0, 1] * 50)
    preds = {"right": y.copy(), "wrong": 1 - y}
    r = bbc_cv(preds, y, accuracy_scorer(), draws=50, seed=0)
    assert r.estimate == 1.0 and r.wins == {"right": 50}


def test_bbc_weighted_path_equals_the_literal_algorithm() -> None:
    # The vectorised path must give what the algorithm says literally: resample rows, score every candidate on the
    # in-bag rows with the plain scorer, score the best on the out-of-bag rows. Candidates of clearly different
    # quality keep in-bag ties (which float rounding could break differently) away.
    rng = np.random.default_rng(11)
    n = 240
    y = rng.integers(0, 2, n)
    preds = {f"c{j}": np.where(rng.random(n) < 0.55 + 0.07 * j, y, 1 - y) for j in range(5)}
    fast = bbc_cv(preds, y, accuracy_scorer(), draws=120, seed=5)
    slow = bbc_cv(preds, y, lambda t, p: metrics.accuracy_score(t, p), draws=120, seed=5)
    assert fast.wins == slow.wins
    np.testing.assert_allclose(fast.oob_scores, slow.oob_scores, rtol=0, atol=1e-12)

    yb, outputs = _classification_outputs(300, seed=9)
    cands = {f"m{j}": {"decision_function": outputs["decision_function"] * (1 + j) + rng.normal(size=300) * j}
             for j in range(4)}
    fast = bbc_cv(cands, yb, BinaryAUCScorer((0, 1)), draws=60, seed=2)
    slow = bbc_cv(cands, yb, lambda t, o: metrics.roc_auc_score(t, o["decision_function"]), draws=60, seed=2)
    assert fast.wins == slow.wins
    np.testing.assert_allclose(fast.oob_scores, slow.oob_scores, rtol=0, atol=1e-12)


def test_bbc_with_repeats_averages_over_repeats() -> None:
    y, preds = _null_predictions(400, 6, 0.7, seed=1)
    single = bbc_cv(preds, y, accuracy_scorer(), draws=200, seed=3)
    doubled = bbc_cv([preds, preds], y, accuracy_scorer(), draws=200, seed=3)
    assert doubled.repeats == 2 and doubled.estimate == pytest.approx(single.estimate, abs=1e-12)
    _, other = _null_predictions(400, 6, 0.7, seed=2)
    other = {k: np.where(np.random.default_rng(7).random(400) < 0.7, y, 1 - y) for k in other}
    mixed = bbc_cv([preds, other], y, accuracy_scorer(), draws=200, seed=3)
    literal = bbc_cv([preds, other], y, lambda t, p: metrics.accuracy_score(t, p), draws=200, seed=3)
    assert mixed.estimate == pytest.approx(literal.estimate, abs=1e-12)


@pytest.mark.filterwarnings("ignore::sklearn.exceptions.UndefinedMetricWarning")
def test_bbc_skips_draws_where_the_score_is_undefined() -> None:
    # roc_auc is undefined when a resample holds one class (scikit-learn returns NaN with a warning, or raises in
    # older versions); those draws are skipped and counted, in the literal and the vectorised path alike.
    y = np.array([0, 0, 0, 0, 1, 1])
    outputs = {"a": {"predict": y, "decision_function": np.array([0.1, 0.2, 0.3, 0.6, 0.5, 0.9])},
               "b": {"predict": y, "decision_function": np.array([0.4, 0.1, 0.2, 0.3, 0.8, 0.7])}}
    r = bbc_cv(outputs, y, replay_scorer("roc_auc", "classification", [0, 1]), draws=40, seed=0)
    assert r.skipped > 0 and r.draws + r.skipped == 40
    fast = bbc_cv(outputs, y, BinaryAUCScorer((0, 1)), draws=40, seed=0)
    assert fast.draws == r.draws and fast.estimate == pytest.approx(r.estimate, abs=1e-12)


@pytest.mark.parametrize(("kwargs", "match"), [
    ({"draws": 0}, "positive integer"),
    ({"y": np.zeros(3)}, "predictions for 3 rows"),
])
def test_bbc_refusals(kwargs: dict[str, Any], match: str) -> None:
    y, preds = _null_predictions(50, 3, 0.7, seed=0)
    args = {"y": y, "draws": 10, **kwargs}
    with pytest.raises(ValueError, match=match):
        bbc_cv(preds, args["y"], accuracy_scorer(), draws=args["draws"], seed=0)
    with pytest.raises(ValueError, match="different set of candidates"):
        bbc_cv([preds, {"x": preds["c00"]}], y, accuracy_scorer(), draws=5, seed=0)


def test_optimism_summary_signs() -> None:
    scores = 1 - pd.DataFrame({"A": [0.20, 0.30, 0.25], "B": [0.25, 0.20, 0.30], "C": [0.30, 0.25, 0.10]})
    tt = tibshirani_bias(scores)
    y, preds = _null_predictions(300, 4, 0.7, seed=0)
    bbc = bbc_cv(preds, y, accuracy_scorer(), draws=50, seed=0)
    out = optimism_summary(tt.raw, tt, bbc)
    assert out["tibshirani"]["optimism"] == pytest.approx(0.05)
    assert out["bbc"]["optimism"] == pytest.approx(tt.raw - bbc.estimate)
    assert optimism_summary(0.5)["bbc"] is None


# ---------------------------------------------------------------------------------------------
# Order statistics sanity (common practice)
# ---------------------------------------------------------------------------------------------


def test_min_of_two_uniforms() -> None:
    # Order statistics (common practice; e.g. David & Nagaraja, Order Statistics): for U1, U2 iid uniform(0,1),
    # P(min < 1/2) = 1 − (1/2)² = 3/4 and E[min] = 1/(M + 1) = 1/3.
    u = np.random.default_rng(2024).random((400_000, 2)).min(axis=1)
    assert abs(u.mean() - 1 / 3) < 0.003  # sd of the mean ≈ .236/sqrt(4e5) ≈ .0004
    assert abs((u < 0.5).mean() - 0.75) < 0.004  # sd ≈ sqrt(.75·.25/4e5) ≈ .0007


@pytest.mark.parametrize("m", [5, 20, 50])
def test_min_of_m_uniforms(m: int) -> None:
    # E[min of M iid uniform(0,1)] = 1/(M + 1) (order statistics; common practice).
    u = np.random.default_rng(m).random((100_000, m)).min(axis=1)
    assert abs(u.mean() - 1 / (m + 1)) < 0.003


# ---------------------------------------------------------------------------------------------
# From the stored tables
# ---------------------------------------------------------------------------------------------


def _fits() -> pd.DataFrame:
    rows = []
    for repeat in (0, 1):
        for fold in (0, 1, 2):
            for cand, base in (("b", 0.7), ("a", 0.8)):
                status = "failed" if (cand, repeat, fold) == ("b", 1, 2) else "ok"
                rows.append({"candidate": cand, "family": "f", "repeat": repeat, "fold": fold, "n_train": 66 + fold,
                             "n_val": 34 - fold, "val_accuracy": base + 0.01 * fold if status == "ok" else np.nan,
                             "status": status})
    return pd.DataFrame(rows)


def test_fold_score_matrix_and_sizes() -> None:
    matrix = fold_score_matrix(_fits(), "accuracy")
    assert list(matrix.columns) == ["a", "b"] and matrix.shape == (6, 2)
    assert np.isnan(matrix.loc[(1, 2), "b"]) and matrix.loc[(0, 1), "a"] == pytest.approx(0.81)
    complete = matrix.dropna(axis=1)
    assert list(complete.columns) == ["a"]
    n_train, n_val = fold_sizes(_fits(), matrix.index)
    assert n_train.tolist() == [66, 67, 68] * 2 and n_val.tolist() == [34, 33, 32] * 2
    with pytest.raises(DataError, match="val_roc_auc"):
        fold_score_matrix(_fits(), "roc_auc")


def test_oof_arrays_align_to_row_keys() -> None:
    oof = pd.DataFrame({"row_key": ["k2", "k0", "k1", "k1", "k2", "k0"] * 2, "candidate": ["a"] * 3 + ["b"] * 3
                        + ["a"] * 3 + ["b"] * 3, "prediction": [1, 0, 1, 1, 0, 0] * 2,
                        "proba_0": [0.2, 0.9, 0.4, 0.3, 0.6, 0.8] * 2, "proba_1": [0.8, 0.1, 0.6, 0.7, 0.4, 0.2] * 2,
                        "repeat": [0] * 6 + [1] * 6})
    arrays = oof_arrays(oof, ["k0", "k1", "k2"], classes=[0, 1])
    assert len(arrays) == 2 and sorted(arrays[0]) == ["a", "b"]
    assert arrays[0]["a"]["predict"].tolist() == [0, 1, 1]
    np.testing.assert_allclose(arrays[1]["b"]["predict_proba"][:, 1], [0.2, 0.7, 0.4])
    with pytest.raises(DataError, match="exactly one prediction"):
        oof_arrays(oof[oof["row_key"] != "k2"], ["k0", "k1", "k2"])


def _oof_tables(seed: int) -> tuple[list[pd.DataFrame], list[str]]:
    """Three out-of-fold tables as fit jobs write them (one per family and fold): one family with class
    probabilities and a decision function, one without a decision function, over 40 rows in 2 repeats."""
    rng = np.random.default_rng(seed)
    keys = [f"k{i:02d}" for i in range(40)]
    tables = []
    for candidates, decision in ((["a", "b"], True), (["c"], False)):  # two families
        for repeat in (0, 1):
            rows = []
            for cid in candidates:
                p1 = rng.random(40)
                part = pd.DataFrame({"row_key": list(rng.permutation(keys)), "candidate": cid,
                                     "prediction": (p1 > 0.5).astype(int), "proba_0": 1 - p1, "proba_1": p1})
                if decision:
                    part["decision"] = np.log(p1 / (1 - p1))
                rows.append(part.assign(repeat=repeat, fold=0))
            tables.append(pd.concat(rows, ignore_index=True))
    return tables, keys


def _gathered(tables: list[pd.DataFrame], keys: list[str], scorer: Any = None,
              classes: list[Any] | None = None) -> OofCollector:
    columns, prediction_dtype = concatenated_columns([t.iloc[:0] for t in tables])
    collector = OofCollector(len(keys), ["a", "b", "c"], classes, columns, prediction_dtype, scorer)
    position = {k: i for i, k in enumerate(keys)}
    for table in tables:
        collector.add(table, table["row_key"].map(position).to_numpy())
    return collector


def test_oof_collector_gives_the_arrays_of_the_concatenated_tables() -> None:
    # The reference is oof_arrays on pandas.concat of every table (what the tally did before it read
    # the tables one at a time): same candidates, same outputs, same values, in each repeat.
    tables, keys = _oof_tables(0)
    expected = oof_arrays(pd.concat(tables, ignore_index=True), keys, classes=[0, 1])
    got = _gathered(tables, keys, classes=[0, 1]).arrays()
    assert len(got) == len(expected) == 2
    for mine, theirs in zip(got, expected, strict=True):
        assert sorted(mine) == sorted(theirs) == ["a", "b", "c"]
        for cid in theirs:
            assert sorted(mine[cid]) == sorted(theirs[cid])  # 'c' has no decision_function in either
            for name, value in theirs[cid].items():
                np.testing.assert_array_equal(mine[cid][name], value)
                assert mine[cid][name].dtype == value.dtype


def test_oof_collector_keeps_only_what_the_scorer_reads_and_bbc_does_not_change() -> None:
    tables, keys = _oof_tables(1)
    y = np.random.default_rng(2).integers(0, 2, len(keys))
    scorer = sklearn_scorer("roc_auc", "classification", [0, 1])
    pruned = _gathered(tables, keys, scorer, classes=[0, 1]).arrays()
    assert sorted(pruned[0]["a"]) == ["decision_function"] and sorted(pruned[0]["c"]) == ["predict_proba"]
    full = oof_arrays(pd.concat(tables, ignore_index=True), keys, classes=[0, 1])
    assert kept_outputs(scorer, full[0]["a"]).keys() == {"decision_function"}
    assert kept_outputs(accuracy_scorer(), full[0]["a"]).keys() == {"predict"}
    assert bbc_cv(pruned, y, scorer, draws=50, seed=4).estimate == bbc_cv(full, y, scorer, draws=50, seed=4).estimate


def test_oof_collector_refuses_what_oof_arrays_refuses() -> None:
    tables, keys = _oof_tables(3)
    short = [t[t["row_key"] != "k07"] for t in tables]
    with pytest.raises(DataError, match=r"candidate 'a' in repeat 0 has 39 out-of-fold rows for 40 dev rows"):
        _gathered(short, keys).arrays()
    twice = [*tables, tables[0]]
    with pytest.raises(DataError, match=r"candidate 'a' in repeat 0 has 80 out-of-fold rows for 40 dev rows"):
        _gathered(twice, keys, sklearn_scorer("roc_auc", "classification", [0, 1])).arrays()
    with pytest.raises(DataError, match=r"no column\(s\) \['proba_2'\]"):
        _gathered(tables, keys, classes=[0, 1, 2]).arrays()


def test_the_optimism_names_still_import_from_stats() -> None:
    from holdfast import optimism, stats

    assert stats.bbc_cv is optimism.bbc_cv and stats.tibshirani_bias is optimism.tibshirani_bias
    with pytest.raises(AttributeError):
        _ = stats.no_such_name
