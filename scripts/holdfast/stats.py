"""Honest numbers from cross-validation records: uncertainty, comparison, selection rules, optimism.

Pure functions on numpy arrays and pandas frames (no files, no Snakemake), all in the
scikit-learn scorer convention: **greater is better**. Error-like metrics arrive negated
(``neg_log_loss``, ``neg_mean_squared_error``, ...), so "worse" always means "smaller" here;
callers who show an error rate flip the sign (or take ``1 - accuracy``) at display time.

What each function estimates:

- :func:`corrected_variance` -- the variance of a candidate's CV mean, naive and
  Nadeau--Bengio corrected (resampled folds share training rows, so the naive one is too small).
- :func:`corrected_ttest` -- is the winner really better than another candidate on the same folds?
- :func:`one_standard_error_choice` -- the simplest candidate within one standard error of the best.
- :func:`tibshirani_bias` and :func:`bbc_cv` -- how optimistic the winner's CV mean is *because*
  it was the best of many, from per-fold scores and from out-of-fold predictions respectively;
  :func:`optimism_summary` puts both beside the raw figure.

The frame helpers :func:`fold_score_matrix`, :func:`fold_sizes` and :func:`oof_arrays` turn the
stored ``fits`` and ``oof`` tables into the arrays these functions take; :func:`sklearn_scorer`
turns a scorer name into a BBC scorer (vectorised for the common metrics).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Hashable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from scipy import stats as scipy_stats

from .errors import DataError

Prediction = Any
"""One candidate's out-of-fold predictions over the rows: an array whose first axis is rows
(labels, values or a probability matrix), or a mapping of such arrays named like
:func:`holdfast.scoring.model_outputs` (``predict``, ``predict_proba``, ``decision_function``)."""


# ---------------------------------------------------------------------------------------------
# Uncertainty of one candidate's CV mean
# ---------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class VarianceEstimate:
    """The CV mean of one candidate with its naive and corrected variance (of the mean)."""

    mean: float
    sample_variance: float
    naive_variance: float
    corrected_variance: float
    folds: int
    n_train: float
    n_val: float

    @property
    def naive_se(self) -> float:
        """sqrt(sample variance / J): treats the J fold scores as independent (they are not)."""
        return math.sqrt(self.naive_variance)

    @property
    def corrected_se(self) -> float:
        """sqrt((1/J + n_val/n_train) * sample variance): Nadeau--Bengio corrected."""
        return math.sqrt(self.corrected_variance)


def _sizes(value: float | Sequence[float] | np.ndarray, name: str, folds: int) -> float:
    sizes = np.atleast_1d(np.asarray(value, dtype=float))
    if sizes.ndim != 1 or (sizes.size not in (1, folds)):
        raise ValueError(f"'{name}' must be one number or one per fold ({folds}); got shape {sizes.shape}")
    if not np.all(np.isfinite(sizes)) or np.any(sizes <= 0):
        raise ValueError(f"'{name}' must be positive row counts; got {sizes.tolist()[:5]}")
    return float(sizes.mean())


def _scores(values: Sequence[float] | np.ndarray, name: str) -> np.ndarray:
    array = np.asarray(values, dtype=float)
    if array.ndim != 1:
        raise ValueError(f"'{name}' must be one score per fold (1-D); got shape {array.shape}")
    if array.size < 2:
        raise ValueError(f"'{name}' needs at least 2 fold scores for a variance; got {array.size}; "
                         "use k >= 2 folds (or repeats)")
    if not np.all(np.isfinite(array)):
        raise ValueError(f"'{name}' contains NaN or infinite scores; drop candidates that failed on a fold first")
    return array


def corrected_variance(scores: Sequence[float] | np.ndarray, n_train: float | Sequence[float] | np.ndarray,
                       n_val: float | Sequence[float] | np.ndarray) -> VarianceEstimate:
    """Naive and Nadeau--Bengio corrected variance of the mean of J resampled fold scores.

    Fold scores of (repeated) k-fold CV are correlated because training sets overlap, so
    ``s²/J`` understates the variance of their mean. Nadeau & Bengio replace ``1/J`` by
    ``1/J + n_val/n_train``; Bouckaert & Frank apply it to r × k-fold CV with J = r·k.

    Parameters
    ----------
    scores : array of shape (J,)
        One validation score per (repeat, fold), greater is better.
    n_train, n_val : number or array of shape (J,)
        Training and validation rows of each fold. Folds may differ by a row or two (or more
        for grouped folds); the correction uses the **means** over folds, since the formula has
        one ratio for all J resamples.

    Returns
    -------
    VarianceEstimate
        ``mean``, ``sample_variance`` (ddof=1), ``naive_variance`` = s²/J and
        ``corrected_variance`` = (1/J + mean n_val / mean n_train)·s², with the SEs as properties.

    Examples
    --------
    >>> v = corrected_variance([0.80, 0.82, 0.78, 0.84, 0.76], n_train=80, n_val=20)
    >>> round(v.naive_variance, 6), round(v.corrected_variance, 6)
    (0.0002, 0.00045)
    """
    # Nadeau & Bengio, "Inference for the Generalization Error", Machine Learning 52 (2003), the corrected
    # resampled t-test: Var(mean) ≈ (1/J + n2/n1) σ̂², n1 = training rows, n2 = test rows of each resample.
    # Bouckaert & Frank, "Evaluating the replicability of significance tests for comparing learning
    # algorithms", PAKDD 2004: the same correction for r-times repeated k-fold CV with J = r·k.
    values = _scores(scores, "scores")
    folds = values.size
    n1 = _sizes(n_train, "n_train", folds)
    n2 = _sizes(n_val, "n_val", folds)
    s2 = float(np.var(values, ddof=1))
    return VarianceEstimate(mean=float(values.mean()), sample_variance=s2, naive_variance=s2 / folds,
                            corrected_variance=(1.0 / folds + n2 / n1) * s2, folds=folds, n_train=n1, n_val=n2)


# ---------------------------------------------------------------------------------------------
# Comparing two candidates on the same folds
# ---------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class TTestResult:
    """Corrected resampled t-test of paired per-fold differences (a − b)."""

    mean_difference: float
    corrected_se: float
    t: float
    p: float
    df: int
    folds: int


def corrected_ttest(diff_scores: Sequence[float] | np.ndarray, n_train: float | Sequence[float] | np.ndarray,
                    n_val: float | Sequence[float] | np.ndarray) -> TTestResult:
    """Nadeau--Bengio corrected resampled t-test on paired per-fold score differences.

    ``t = mean(d) / sqrt((1/J + n_val/n_train) · s²_d)`` with J − 1 degrees of freedom; the
    p-value is two-sided. Use it to ask whether the winner beats another candidate by more
    than fold-to-fold noise, both having been scored on the same folds.

    Parameters
    ----------
    diff_scores : array of shape (J,)
        Per-(repeat, fold) differences, e.g. winner's score minus the other's on that fold.
    n_train, n_val : number or array of shape (J,)
        As in :func:`corrected_variance` (means over folds are used).

    Returns
    -------
    TTestResult
        Mean difference, corrected SE, t, p, df = J − 1, J.

    Notes
    -----
    Zero variance rule: when every difference is the same value (e.g. identical candidates), the
    statistic is 0/0 or c/0. We return ``t = 0, p = 1`` when that value is 0 (no evidence of any
    difference) and ``t = ±inf, p = 0`` otherwise (the limit of the statistic as the spread → 0).
    "Same value" is tested exactly (``max == min``), so rounding noise still gives a finite t.

    Examples
    --------
    >>> r = corrected_ttest([0.02, 0.01, 0.03, 0.00, 0.04], n_train=80, n_val=20)
    >>> round(r.t, 4), r.df
    (1.8856, 4)
    """
    # Nadeau & Bengio, Machine Learning 52 (2003), corrected resampled t-test; J − 1 degrees of freedom as used
    # for repeated k-fold by Bouckaert & Frank, PAKDD 2004.
    values = _scores(diff_scores, "diff_scores")
    estimate = corrected_variance(values, n_train, n_val)
    df = estimate.folds - 1
    mean = estimate.mean
    if values.max() == values.min():
        if values[0] == 0.0:
            return TTestResult(0.0, 0.0, 0.0, 1.0, df, estimate.folds)
        return TTestResult(float(values[0]), 0.0, math.copysign(math.inf, values[0]), 0.0, df, estimate.folds)
    se = estimate.corrected_se
    t = mean / se
    p = float(2.0 * scipy_stats.t.sf(abs(t), df))
    return TTestResult(mean, se, float(t), min(p, 1.0), df, estimate.folds)


def compare_with_winner(fold_scores: pd.DataFrame, winner: Hashable,
                        n_train: float | Sequence[float] | np.ndarray,
                        n_val: float | Sequence[float] | np.ndarray) -> pd.DataFrame:
    """The corrected t-test of the winner against every other candidate on the same folds.

    Parameters
    ----------
    fold_scores : DataFrame, folds × candidates
        As returned by :func:`fold_score_matrix` (complete columns only).
    winner : column label of the winner.
    n_train, n_val : as in :func:`corrected_variance`.

    Returns
    -------
    DataFrame
        One row per other candidate: ``candidate``, ``mean_difference`` (winner − other, ≥ 0 when
        the winner has the best mean), ``corrected_se``, ``t``, ``p``, ``df``.
    """
    matrix = _matrix(fold_scores)
    if winner not in fold_scores.columns:
        raise ValueError(f"winner '{winner}' is not a column of fold_scores; pass one of its candidate ids")
    position = list(fold_scores.columns).index(winner)
    rows = []
    for j, candidate in enumerate(fold_scores.columns):
        if j == position:
            continue
        result = corrected_ttest(matrix[:, position] - matrix[:, j], n_train, n_val)
        rows.append({"candidate": candidate, "mean_difference": result.mean_difference,
                     "corrected_se": result.corrected_se, "t": result.t, "p": result.p, "df": result.df})
    columns = ["candidate", "mean_difference", "corrected_se", "t", "p", "df"]
    return pd.DataFrame(rows, columns=columns)


# ---------------------------------------------------------------------------------------------
# The one-standard-error rule
# ---------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class OneSEChoice:
    """Which candidate the one-standard-error rule picked, and the numbers behind it."""

    chosen: str
    best: str
    best_mean: float
    best_se: float
    threshold: float
    eligible: tuple[str, ...]
    reason: str


ComplexityKey = str | Mapping[str, Any] | Callable[[pd.Series], Any]


def one_standard_error_choice(summary: pd.DataFrame, primary_best_id: str, complexity_key: ComplexityKey,
                              se_column: str = "se") -> OneSEChoice:
    """The simplest candidate whose mean is within one standard error of the best mean.

    With scores (greater is better) a candidate is eligible when ``mean >= best_mean − best_se``;
    among the eligible the simplest wins (lowest complexity key), then the higher mean, then the
    smaller candidate id, so the choice is deterministic.

    Parameters
    ----------
    summary : DataFrame
        One row per candidate for one metric with columns ``candidate``, ``mean`` and ``se_column``
        (e.g. the primary-metric rows of ``ranking.parquet``). If a ``complete`` column is present,
        candidates that failed on a fold are ignored.
    primary_best_id : str
        The candidate with the best mean (the best-mean rule's winner).
    complexity_key : str, mapping or callable
        Lower = simpler. A column name of ``summary`` holding ranks, a mapping candidate → rank,
        or a function of a summary row returning a sortable key.
    se_column : str, default "se"
        Which standard error to use (the naive ``se`` as in the reference, or a corrected one).

    Returns
    -------
    OneSEChoice
        If the best candidate's SE is NaN (a single fold) the rule cannot widen the band and the
        best candidate is returned, saying so in ``reason``.

    Examples
    --------
    >>> table = pd.DataFrame({"candidate": ["a", "b", "c"], "mean": [0.90, 0.89, 0.80],
    ...                       "se": [0.02, 0.02, 0.02], "depth": [8, 2, 1]})
    >>> one_standard_error_choice(table, "a", "depth").chosen
    'b'
    """
    # Breiman, Friedman, Olshen & Stone, Classification and Regression Trees (1984), the 1-SE rule for pruning;
    # Hastie, Tibshirani & Friedman, The Elements of Statistical Learning, 2nd ed. (2009), §7.10 (7.10.1):
    # "choose the most parsimonious model whose error is no more than one standard error above the error of
    # the best model" (wording from memory) -- with scores, no more than one SE *below* the best mean.
    for column in ("candidate", "mean", se_column):
        if column not in summary.columns:
            raise ValueError(f"summary has no column '{column}'; pass one row per candidate with candidate, "
                             f"mean and {se_column}")
    table = summary
    if "metric" in table.columns and table["metric"].nunique() > 1:
        raise ValueError("summary holds more than one metric; pass the rows of the primary metric only")
    if "complete" in table.columns:
        table = table[table["complete"].astype(bool)]
    if table["candidate"].duplicated().any():
        raise ValueError("summary lists a candidate more than once; pass one row per candidate")
    if primary_best_id not in set(table["candidate"]):
        raise ValueError(f"primary_best_id '{primary_best_id}' is not a (complete) candidate of the summary")
    best = table[table["candidate"] == primary_best_id].iloc[0]
    best_mean, best_se = float(best["mean"]), float(best[se_column])
    if float(table["mean"].max()) > best_mean:
        top = table.loc[table["mean"].idxmax(), "candidate"]
        raise ValueError(f"'{primary_best_id}' does not have the best mean ({best_mean:.6g}); '{top}' has "
                         f"{float(table['mean'].max()):.6g}; pass the best-mean winner as primary_best_id")
    keys = _complexity(table, complexity_key)
    if math.isnan(best_se):
        return OneSEChoice(primary_best_id, primary_best_id, best_mean, best_se, best_mean, (primary_best_id,),
                           f"the best candidate's {se_column} is undefined (one fold), so the one-SE band is empty "
                           "and the best mean was kept")
    threshold = best_mean - best_se
    eligible = table[table["mean"].to_numpy(dtype=float) >= threshold]
    order = sorted(eligible.index, key=lambda i: (keys[i], -float(table.at[i, "mean"]), str(table.at[i, "candidate"])))
    chosen = str(table.at[order[0], "candidate"])
    names = tuple(str(table.at[i, "candidate"]) for i in order)
    if chosen == primary_best_id:
        why = (f"the best candidate is also the simplest of the {len(names)} within one {se_column} "
               f"(mean >= {threshold:.6g} = {best_mean:.6g} − {best_se:.6g})")
    else:
        chosen_mean = float(table.loc[order[0], "mean"])
        why = (f"simplest of the {len(names)} candidates with mean >= {threshold:.6g} (best mean {best_mean:.6g} "
               f"of {primary_best_id} minus its {se_column} {best_se:.6g}); its mean is {chosen_mean:.6g}")
    return OneSEChoice(chosen, primary_best_id, best_mean, best_se, threshold, names, why)


def _complexity(table: pd.DataFrame, key: ComplexityKey) -> dict[Any, Any]:
    if isinstance(key, str):
        if key not in table.columns:
            raise ValueError(f"complexity_key '{key}' is not a column of the summary; pass a column of ranks, "
                             "a mapping candidate -> rank or a function of a row")
        return dict(table[key].items())
    if isinstance(key, Mapping):
        missing = sorted(set(table["candidate"]) - set(key))
        if missing:
            raise ValueError(f"complexity_key has no rank for candidate(s) {missing[:5]}; give every candidate one")
        return {i: key[c] for i, c in table["candidate"].items()}
    if callable(key):
        return {i: key(row) for i, row in table.iterrows()}
    raise ValueError(f"complexity_key must be a column name, a mapping or a function; got {type(key).__name__}")


# ---------------------------------------------------------------------------------------------
# Optimism of the winner from per-fold scores (Tibshirani & Tibshirani 2009)
# ---------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class TibshiraniEstimate:
    """Tibshirani & Tibshirani bias of the winner's CV mean, in score units (≥ 0 = optimism)."""

    winner: Hashable
    raw: float
    bias: float
    corrected: float
    folds: int


def _matrix(fold_scores: pd.DataFrame | np.ndarray) -> np.ndarray:
    matrix = np.asarray(fold_scores, dtype=float)
    if matrix.ndim != 2 or matrix.shape[0] < 1 or matrix.shape[1] < 1:
        raise ValueError(f"fold_scores must be a folds × candidates matrix; got shape {matrix.shape}")
    bad = ~np.all(np.isfinite(matrix), axis=0)
    if bad.any():
        labels = list(fold_scores.columns) if isinstance(fold_scores, pd.DataFrame) else list(range(matrix.shape[1]))
        names = [labels[j] for j in np.flatnonzero(bad)][:5]
        raise ValueError(f"fold_scores has NaN or infinite values for candidate(s) {names}; drop candidates that "
                         "failed on a fold (fold_scores.dropna(axis=1)) first")
    return matrix


def best_by_mean(fold_scores: pd.DataFrame | np.ndarray) -> Hashable:
    """The column with the highest mean; ties go to the smallest label (the tally's order)."""
    matrix = _matrix(fold_scores)
    means = matrix.mean(axis=0)
    labels = list(fold_scores.columns) if isinstance(fold_scores, pd.DataFrame) else list(range(matrix.shape[1]))
    top = np.flatnonzero(means == means.max())
    return sorted((labels[j] for j in top), key=str)[0]


def tibshirani_bias(fold_scores: pd.DataFrame | np.ndarray, winner: Hashable | None = None) -> TibshiraniEstimate:
    """Tibshirani & Tibshirani (2009) estimate of the winner's optimism from per-fold scores.

    Stated for errors, the paper's estimate is ``(1/K) Σ_k [e_k(θ̂) − e_k(θ̂_k)]`` where θ̂ minimises
    the CV error and θ̂_k minimises fold k's error; it is added to the minimum CV error. With scores
    (greater is better, e = −score) this is ``bias = (1/K) Σ_k [max_j s_k(j) − s_k(ŵ)] ≥ 0`` and the
    corrected estimate is ``mean_k s_k(ŵ) − bias``: it moves the winner's estimate towards worse.

    Parameters
    ----------
    fold_scores : DataFrame or array, folds × candidates
        One score per (repeat, fold) and candidate; with repeated CV every (repeat, fold) counts as
        one of the K folds of the formula.
    winner : column label (or index for an array), optional
        The chosen candidate. Default: the best mean (ties → smallest label). Passing the one-SE
        choice gives that candidate's fold-wise shortfall from the per-fold best.

    Returns
    -------
    TibshiraniEstimate
        ``raw`` (winner's CV mean), ``bias`` (≥ 0, in score units), ``corrected`` = raw − bias.

    Examples
    --------
    >>> accuracy = np.array([[0.80, 0.75, 0.70], [0.70, 0.80, 0.75], [0.75, 0.70, 0.90]])
    >>> r = tibshirani_bias(accuracy)
    >>> int(r.winner), round(r.raw, 4), round(r.bias, 4), round(r.corrected, 4)
    (2, 0.7833, 0.05, 0.7333)
    """
    # Tibshirani & Tibshirani, "A bias correction for the minimum error rate in cross-validation", Annals of
    # Applied Statistics 3(2), 822-829 (2009): Bias = (1/K) Σ_k [e_k(θ̂) − e_k(θ̂_k)], corrected error =
    # CV(θ̂) + Bias. Negating scores into errors gives the score form above (the sign flip is ours).
    matrix = _matrix(fold_scores)
    labels = list(fold_scores.columns) if isinstance(fold_scores, pd.DataFrame) else list(range(matrix.shape[1]))
    chosen = best_by_mean(fold_scores) if winner is None else winner
    if chosen not in labels:
        raise ValueError(f"winner '{chosen}' is not a candidate of fold_scores")
    column = matrix[:, labels.index(chosen)]
    shortfall = matrix.max(axis=1) - column
    raw = float(column.mean())
    bias = float(shortfall.mean())
    return TibshiraniEstimate(winner=chosen, raw=raw, bias=bias, corrected=raw - bias, folds=matrix.shape[0])


def tibshirani_caution(folds_per_repeat: int) -> str:
    """A warning for reports when the T&T correction is expected to overshoot (k ≥ 9 folds), else ''.

    When candidates differ mostly by noise, a fold's best score beats the winner's fold score by
    about (√k − 1) times the raw optimism, so the corrected value misses the truth by about
    (√k − 2) times it, on the other side: further than the raw mean once √k − 2 > 1, i.e. k ≥ 9.
    This is holdfast's own derivation, checked by its simulation (bench/optimism.py), not the paper's.
    """
    k = int(folds_per_repeat)
    if k < 9:
        return ""
    return (f"with {k} folds per repeat this correction tends to overshoot: when candidates differ mostly by "
            f"noise it is about {math.sqrt(k) - 1:.1f} times the true optimism, so the corrected value can land "
            "further from the truth than the raw mean, on the pessimistic side; bbc does not share this "
            "(holdfast's own derivation and simulation, bench/optimism.py)")


# ---------------------------------------------------------------------------------------------
# Scorers for the bootstrap: generic callables, and weighted scorers that vectorise over draws
# ---------------------------------------------------------------------------------------------

class WeightedScorer:
    """A scorer that can score many row weightings at once (the fast path of :func:`bbc_cv`).

    A bootstrap resample with duplicates is the same as weighting each row by how many times it
    was drawn, and the out-of-bag rows are weights 0/1. Subclasses implement :meth:`prepare`
    (once per candidate) and :meth:`weighted` (a batch of weight vectors → one score each);
    :meth:`prepare_many` / :meth:`weighted_many` may be overridden to batch over candidates too.
    Calling the scorer like a plain one, ``scorer(y_true, predictions)``, scores all rows once.
    """

    name = "weighted"

    def prepare(self, y_true: np.ndarray, predictions: Prediction) -> Any:
        """Per-candidate state computed once (e.g. per-row scores)."""
        raise NotImplementedError

    def weighted(self, state: Any, weights: np.ndarray) -> np.ndarray:
        """Scores for each column of ``weights`` (shape (n rows, B draws), non-negative); NaN where undefined.

        Rows × draws (not draws × rows) so that picking rows copies contiguous memory: several times
        faster for the gathers and running sums below.
        """
        raise NotImplementedError

    def prepare_many(self, y_true: np.ndarray, predictions: Sequence[Prediction]) -> Any:
        """State for several candidates at once (default: a list of :meth:`prepare` results)."""
        return [self.prepare(y_true, p) for p in predictions]

    def weighted_many(self, state: Any, weights: np.ndarray) -> np.ndarray:
        """Scores of shape (B, candidates) (default: one :meth:`weighted` call per candidate)."""
        return np.column_stack([self.weighted(s, weights) for s in state])

    def select(self, state: Any, j: int) -> Any:
        """The single-candidate state of candidate ``j`` from a :meth:`prepare_many` state."""
        return state[j]

    def __call__(self, y_true: Any, predictions: Prediction) -> float:
        y = np.asarray(y_true)
        return float(self.weighted(self.prepare(y, predictions), np.ones((len(y), 1), dtype=np.int64))[0])


def _output(predictions: Prediction, *names: str) -> np.ndarray:
    if isinstance(predictions, Mapping):
        for name in names:
            if name in predictions:
                return np.asarray(predictions[name])
        raise ValueError(f"predictions have none of {names}; store that model output to use this scorer")
    return np.asarray(predictions)


@dataclass(frozen=True)
class RowMeanScorer(WeightedScorer):
    """A score that is the mean of a per-row score (accuracy, −squared error, −log loss, ...).

    Parameters
    ----------
    per_row : callable (y_true, predictions) -> array of shape (n,)
        Each row's contribution; the score is their (weighted) mean.
    name : str
        A label for reports.
    """

    per_row: Callable[[np.ndarray, Prediction], np.ndarray]
    name: str = "row_mean"

    def prepare(self, y_true: np.ndarray, predictions: Prediction) -> np.ndarray:
        values = np.asarray(self.per_row(y_true, predictions), dtype=float)
        if values.shape != (len(y_true),):
            raise ValueError(f"scorer '{self.name}' per_row returned shape {values.shape}; expected ({len(y_true)},)")
        return values

    def weighted(self, state: np.ndarray, weights: np.ndarray) -> np.ndarray:
        return self.weighted_many(state[:, None], weights)[:, 0]

    def prepare_many(self, y_true: np.ndarray, predictions: Sequence[Prediction]) -> np.ndarray:
        return np.column_stack([self.prepare(y_true, p) for p in predictions])

    def select(self, state: np.ndarray, j: int) -> np.ndarray:
        return state[:, j]

    def weighted_many(self, state: np.ndarray, weights: np.ndarray) -> np.ndarray:
        w = weights.astype(float)
        total = w.sum(axis=0)[:, None]
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(total > 0, (w.T @ state) / np.where(total > 0, total, 1.0), np.nan)


@dataclass(frozen=True)
class BinaryAUCScorer(WeightedScorer):
    """Area under the ROC curve for two classes, on weighted rows (ties count one half).

    Equals :func:`sklearn.metrics.roc_auc_score` on the resampled rows: the trapezoidal area
    under the empirical ROC curve is the Mann--Whitney statistic with ties counted as 1/2
    (Hanley & McNeil, Radiology 143, 1982). Uses ``decision_function`` when present, else the
    positive class's column of ``predict_proba`` (scikit-learn's ``roc_auc`` scorer order).

    Parameters
    ----------
    classes : sequence of the two class labels, sorted; the second is the positive class.
    """

    classes: tuple[Any, ...]
    name: str = "roc_auc"

    def prepare(self, y_true: np.ndarray, predictions: Prediction) -> tuple[np.ndarray, ...]:
        if len(self.classes) != 2:
            raise ValueError(f"BinaryAUCScorer needs exactly two classes; got {list(self.classes)}")
        if isinstance(predictions, Mapping) and "decision_function" in predictions:
            score = np.asarray(predictions["decision_function"], dtype=float)
        else:
            values = _output(predictions, "predict_proba").astype(float)
            score = values[:, 1] if values.ndim == 2 else values
        if not np.all(np.isfinite(score)):
            raise ValueError("roc_auc: the ranking scores contain NaN or infinite values")
        positive = np.asarray(y_true) == self.classes[1]
        # Cumulate the weights of the smaller class (sorted by score) and look them up from the rows of
        # the larger one: the cumulative sum is the slow step, the look-up is cheap.
        flip = positive.sum() < (~positive).sum()
        small = np.flatnonzero(positive if flip else ~positive)
        large = np.flatnonzero(~positive if flip else positive)
        small = small[np.argsort(score[small], kind="mergesort")]
        lower = np.searchsorted(score[small], score[large], side="left")
        lower_or_tied = np.searchsorted(score[small], score[large], side="right")
        return small, large, lower, lower_or_tied, np.array(flip)

    def weighted(self, state: tuple[np.ndarray, ...], weights: np.ndarray) -> np.ndarray:
        small, large, lower, lower_or_tied, flip = state
        exact = weights.dtype.kind in "iub"
        cumulative = np.zeros((small.size + 1, weights.shape[1]), dtype=np.int64 if exact else float)
        np.cumsum(weights[small], axis=0, out=cumulative[1:])
        w_large = weights[large]
        # Each row of the larger class sees the smaller class's weight below it plus half the tied weight:
        # below + (below_or_tied − below)/2 = (below + below_or_tied)/2.
        twice = np.einsum("ij,ij->j", w_large, cumulative[lower] + cumulative[lower_or_tied])
        pairs = w_large.sum(axis=0) * cumulative[-1]
        with np.errstate(invalid="ignore", divide="ignore"):
            share = twice / (2.0 * np.where(pairs > 0, pairs, 1))
        # share = P(small-class score < large-class score) + P(tie)/2: the AUC when the small class is the
        # negative one, one minus the AUC when it is the positive one.
        auc = 1.0 - share if bool(flip) else share
        return np.where(pairs > 0, auc, np.nan)


def _accuracy_rows(y_true: np.ndarray, predictions: Prediction) -> np.ndarray:
    return (_output(predictions, "predict") == np.asarray(y_true)).astype(float)


def accuracy_scorer() -> RowMeanScorer:
    """Accuracy from label predictions (fraction correct); error rate = 1 − accuracy."""
    return RowMeanScorer(_accuracy_rows, "accuracy")


def neg_error_rate_scorer() -> RowMeanScorer:
    """Minus the error rate from label predictions: accuracy − 1, greater is better."""
    return RowMeanScorer(lambda y, p: _accuracy_rows(y, p) - 1.0, "neg_error_rate")


def _label_positions(y_true: np.ndarray, classes: Sequence[Any]) -> np.ndarray:
    lookup = {label: j for j, label in enumerate(classes)}
    try:
        return np.array([lookup[v] for v in np.asarray(y_true).tolist()], dtype=np.intp)
    except KeyError as exc:
        raise ValueError(f"label {exc.args[0]!r} is not one of the classes {list(classes)}") from exc


def _log_loss_rows(classes: Sequence[Any]) -> Callable[[np.ndarray, Prediction], np.ndarray]:
    def rows(y_true: np.ndarray, predictions: Prediction) -> np.ndarray:
        proba = _output(predictions, "predict_proba").astype(float)
        if proba.ndim == 1:
            proba = np.column_stack([1.0 - proba, proba])
        eps = np.finfo(proba.dtype).eps  # scikit-learn's log_loss clips to [eps, 1 − eps] before the log
        picked = proba[np.arange(len(proba)), _label_positions(y_true, classes)]
        return np.log(np.clip(picked, eps, 1.0 - eps))
    return rows


def _regression_rows(power: int) -> Callable[[np.ndarray, Prediction], np.ndarray]:
    def rows(y_true: np.ndarray, predictions: Prediction) -> np.ndarray:
        residual = np.asarray(y_true, dtype=float) - _output(predictions, "predict").astype(float)
        return -np.abs(residual) ** power
    return rows


def sklearn_scorer(name: str, task: str, classes: Sequence[Any] | None = None) -> Callable[[Any, Prediction], float]:
    """A BBC scorer for a scikit-learn scorer name, on stored model outputs.

    Row-mean metrics (``accuracy``, ``neg_mean_squared_error``, ``neg_mean_absolute_error``,
    ``neg_log_loss``) and two-class ``roc_auc`` get a vectorised :class:`WeightedScorer`; every
    other name is scored literally through :func:`holdfast.scoring.replay` and scikit-learn's own
    scorer (correct for any metric, but one scorer call per candidate and draw: slow).

    Parameters
    ----------
    name : scikit-learn scorer name (greater is better).
    task : "classification" or "regression".
    classes : the classifier's classes in ``predict_proba`` column order (sorted, as scikit-learn
        stores ``classes_``); needed for ``neg_log_loss``, ``roc_auc`` and probability outputs.

    Notes
    -----
    The vectorised ``neg_log_loss`` keeps the declared classes; scikit-learn's infers them from
    the resampled labels and raises when a class is missing from a resample.
    """
    if name == "accuracy":
        return accuracy_scorer()
    if name == "neg_mean_squared_error":
        return RowMeanScorer(_regression_rows(2), name)
    if name == "neg_mean_absolute_error":
        return RowMeanScorer(_regression_rows(1), name)
    if name == "neg_log_loss" and classes is not None:
        return RowMeanScorer(_log_loss_rows(list(classes)), name)
    if name == "roc_auc" and classes is not None and len(classes) == 2:
        return BinaryAUCScorer(tuple(classes))
    return replay_scorer(name, task, classes)


def replay_scorer(name: str, task: str, classes: Sequence[Any] | None = None) -> Callable[[Any, Prediction], float]:
    """Any scikit-learn scorer as a plain ``(y_true, outputs) -> float`` callable, via stored outputs."""
    from sklearn.metrics import get_scorer

    from .scoring import replay

    scorer = get_scorer(name)
    labels = None if classes is None else np.asarray(classes)

    def score(y_true: Any, predictions: Prediction) -> float:
        outputs = dict(predictions) if isinstance(predictions, Mapping) else {"predict": np.asarray(predictions)}
        y = np.asarray(y_true)
        model = replay(outputs, task, labels)
        return float(scorer(model, np.arange(len(y)).reshape(-1, 1), y))

    score.__name__ = name
    return score


# ---------------------------------------------------------------------------------------------
# Bootstrap bias-corrected CV (Tsamardinos, Greasidou & Borboudakis 2018)
# ---------------------------------------------------------------------------------------------

@dataclass(frozen=True, eq=False)
class BBCEstimate:
    """Bootstrap bias-corrected CV estimate of the selected candidate's score."""

    estimate: float
    oob_scores: np.ndarray = field(repr=False)
    wins: dict[str, int]
    draws: int
    skipped: int
    repeats: int

    @property
    def spread(self) -> float:
        """Standard deviation of the out-of-bag scores over draws (not a standard error of the estimate)."""
        return float(np.std(self.oob_scores, ddof=1)) if self.oob_scores.size > 1 else float("nan")


def _take(predictions: Prediction, rows: np.ndarray) -> Prediction:
    if isinstance(predictions, Mapping):
        return {key: np.asarray(value)[rows] for key, value in predictions.items()}
    return np.asarray(predictions)[rows]


def _length(predictions: Prediction) -> int:
    if isinstance(predictions, Mapping):
        lengths = {len(np.asarray(v)) for v in predictions.values()}
        if len(lengths) != 1:
            raise ValueError(f"one candidate's outputs have different numbers of rows: {sorted(lengths)}")
        return lengths.pop()
    return len(np.asarray(predictions))


def bbc_cv(oof_predictions_by_candidate: Mapping[str, Prediction] | Sequence[Mapping[str, Prediction]],
           y: Any, scorer: Callable[[Any, Prediction], float], draws: int = 1000, seed: int = 0,
           block: int | None = None) -> BBCEstimate:
    """Bootstrap bias-corrected CV: the score of "pick the best candidate", from out-of-fold predictions.

    Each draw resamples the n rows with replacement; the candidate with the best score on the
    in-bag rows (duplicates counted) is scored on the out-of-bag rows (never drawn). The estimate
    is the mean of those out-of-bag scores over draws. No model is refitted: only the stored
    out-of-fold predictions are re-scored, and the selection step is repeated on data it did not
    score, so the estimate carries no winner's-curse optimism.

    Parameters
    ----------
    oof_predictions_by_candidate : mapping, or a sequence of mappings (one per CV repeat)
        candidate id → that candidate's out-of-fold predictions on all n rows, in the row order of
        ``y`` (see :data:`Prediction`). With repeated CV every row has one prediction per repeat:
        pass one mapping per repeat. A candidate's in-bag (and out-of-bag) score is then the mean
        over repeats of its score in each repeat, the winner of a draw is the best on that
        averaged in-bag score (as the tally chooses by the mean over all repeats' folds), and the
        draw's value is the winner's averaged out-of-bag score. Every repeat sees the same draws.
    y : array of shape (n,)
        True targets in row order.
    scorer : callable (y_true, predictions) -> float, greater is better
        A :class:`WeightedScorer` (``accuracy_scorer()``, :func:`sklearn_scorer` for common names)
        is vectorised over draws; any other callable is called on every resample (slow: draws ×
        candidates × repeats × 2 calls). A draw where a score is undefined (NaN, or the callable
        raises ValueError, e.g. one class only) is skipped and counted in ``skipped``.
    draws : int, default 1000
        Bootstrap draws.
    seed : int, default 0
        Seed of :func:`numpy.random.default_rng`; the same seed gives the same estimate.
    block : int, optional
        Draws per vectorised batch; the default keeps a batch of weights near 2 MB (cache-sized),
        which matters more for speed than fewer, larger batches.

    Returns
    -------
    BBCEstimate
        ``estimate``, the per-draw ``oob_scores``, how often each candidate ``wins`` a draw,
        ``draws`` used, ``skipped`` and ``repeats``. Ties in the in-bag score go to the first
        candidate in sorted id order.

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> y = rng.integers(0, 2, 500)
    >>> preds = {f"c{j}": np.where(rng.random(500) < 0.7, y, 1 - y) for j in range(10)}
    >>> r = bbc_cv(preds, y, accuracy_scorer(), draws=200, seed=1)
    >>> 0.65 < r.estimate < 0.75
    True
    """
    # Tsamardinos, Greasidou & Borboudakis, "Bootstrapping the out-of-sample predictions for efficient and
    # accurate cross-validation", Machine Learning 107 (2018), the BBC-CV algorithm: resample rows of the
    # out-of-sample prediction matrix, select on the in-bag rows, score the selection on the out-of-bag rows,
    # average over draws. Averaging over CV repeats is our extension (documented above).
    repeats = [oof_predictions_by_candidate] if isinstance(oof_predictions_by_candidate, Mapping) \
        else list(oof_predictions_by_candidate)
    if not repeats:
        raise ValueError("oof_predictions_by_candidate is empty; pass one mapping candidate -> predictions")
    names = sorted(repeats[0], key=str)
    if not names:
        raise ValueError("oof_predictions_by_candidate has no candidates")
    for r, mapping in enumerate(repeats):
        if sorted(mapping, key=str) != names:
            raise ValueError(f"repeat {r} has a different set of candidates from repeat 0; pass the same candidates "
                             "(drop those that failed anywhere)")
    y_true = np.asarray(y)
    n = len(y_true)
    if n < 2:
        raise ValueError(f"bbc_cv needs at least 2 rows; got {n}")
    for mapping in repeats:
        for name in names:
            if _length(mapping[name]) != n:
                raise ValueError(f"candidate '{name}' has {_length(mapping[name])} predictions for {n} rows of y")
    if not isinstance(draws, int | np.integer) or draws < 1:
        raise ValueError(f"'draws' must be a positive integer; got {draws!r}")
    if block is None:
        block = max(1, min(int(draws), (1 << 19) // n))
    rng = np.random.default_rng(seed)
    weighted = isinstance(scorer, WeightedScorer)
    states = [scorer.prepare_many(y_true, [m[name] for name in names]) for m in repeats] if weighted else []
    oob_values: list[np.ndarray] = []
    winners: list[np.ndarray] = []
    done = 0
    while done < draws:
        size = min(block, draws - done)
        rows = rng.integers(0, n, size=(size, n))
        done += size
        if weighted:
            best, in_bag, value = _weighted_draws(scorer, states, rows, n)
        else:
            best, in_bag, value = _literal_draws(scorer, repeats, names, y_true, rows, n)
        valid = ~np.isnan(in_bag).any(axis=1) & ~np.isnan(value)
        oob_values.append(value[valid])
        winners.append(best[valid])
    oob = np.concatenate(oob_values)
    if oob.size == 0:
        raise ValueError("every bootstrap draw had an undefined score (e.g. a single class out of bag); "
                         "use more rows or another metric")
    counts = np.bincount(np.concatenate(winners), minlength=len(names))
    return BBCEstimate(estimate=float(oob.mean()), oob_scores=oob,
                       wins={str(name): int(c) for name, c in zip(names, counts, strict=True) if c},
                       draws=int(oob.size), skipped=int(draws - oob.size), repeats=len(repeats))


def _multiplicities(rows: np.ndarray, n: int) -> np.ndarray:
    """How many times each row was drawn in each draw: integer array (n rows, B draws)."""
    size = rows.shape[0]
    flat = (rows * size + np.arange(size)[:, None]).ravel()
    return np.bincount(flat, minlength=n * size).reshape(n, size).astype(np.int32)


def _winners(in_bag: np.ndarray) -> np.ndarray:
    """Per draw, the first candidate with the best in-bag score (NaN never wins)."""
    return np.argmax(np.where(np.isnan(in_bag), -np.inf, in_bag), axis=1)


def _weighted_draws(scorer: WeightedScorer, states: list[Any], rows: np.ndarray,
                    n: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    counts = _multiplicities(rows, n)
    in_bag = np.mean([scorer.weighted_many(state, counts) for state in states], axis=0)
    best = _winners(in_bag)
    outside = (counts == 0).astype(np.int32)
    value = np.full(rows.shape[0], np.nan)
    for j in np.unique(best):  # out-of-bag scores only for each draw's winner
        won = best == j
        columns = np.ascontiguousarray(outside[:, won])
        value[won] = np.mean([scorer.weighted(scorer.select(state, int(j)), columns) for state in states], axis=0)
    return best, in_bag, value


def _literal_draws(scorer: Callable[[Any, Prediction], float], repeats: list[Mapping[str, Prediction]],
                   names: list[str], y_true: np.ndarray, rows: np.ndarray,
                   n: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    size = rows.shape[0]
    in_bag = np.full((size, len(names)), np.nan)
    value = np.full(size, np.nan)
    for b in range(size):
        drawn = rows[b]
        mask = np.ones(n, dtype=bool)
        mask[drawn] = False
        left_out = np.flatnonzero(mask)
        if left_out.size == 0:
            continue
        try:
            for j, name in enumerate(names):
                in_bag[b, j] = np.mean([scorer(y_true[drawn], _take(m[name], drawn)) for m in repeats])
            if np.isnan(in_bag[b]).any():
                continue
            j = int(_winners(in_bag[b:b + 1])[0])
            value[b] = np.mean([scorer(y_true[left_out], _take(m[names[j]], left_out)) for m in repeats])
        except ValueError:
            in_bag[b, :] = np.nan  # an undefined score on this resample: the draw is skipped
    return _winners(in_bag), in_bag, value


# ---------------------------------------------------------------------------------------------
# Both optimism estimates side by side
# ---------------------------------------------------------------------------------------------

def optimism_summary(raw: float, tibshirani: TibshiraniEstimate | None = None,
                     bbc: BBCEstimate | None = None) -> dict[str, Any]:
    """The winner's raw CV mean, each corrected estimate, and the optimism each implies.

    Optimism = raw − corrected, in score units: positive means the raw CV mean flatters the winner.
    For an error shown as a positive number (``1 − accuracy``, or ``−neg_*``) the same optimism is
    the amount the raw error understates the truth.

    Parameters
    ----------
    raw : float
        The winner's CV mean (mean of its per-fold scores).
    tibshirani, bbc : the two estimates, either may be omitted.

    Returns
    -------
    dict
        ``{"raw": ..., "tibshirani": {"corrected", "optimism"} | None, "bbc": {"corrected", "optimism",
        "draws", "skipped"} | None}``.

    Notes
    -----
    BBC scores the pooled out-of-bag rows while ``raw`` averages per-fold scores; for metrics that
    are row means and folds of equal size these agree, otherwise they differ slightly in definition.
    """
    out: dict[str, Any] = {"raw": float(raw), "tibshirani": None, "bbc": None}
    if tibshirani is not None:
        out["tibshirani"] = {"corrected": tibshirani.corrected, "optimism": float(raw) - tibshirani.corrected}
    if bbc is not None:
        out["bbc"] = {"corrected": bbc.estimate, "optimism": float(raw) - bbc.estimate, "draws": bbc.draws,
                      "skipped": bbc.skipped}
    return out


# ---------------------------------------------------------------------------------------------
# From the stored tables to arrays
# ---------------------------------------------------------------------------------------------

def fold_score_matrix(fits: pd.DataFrame, metric: str) -> pd.DataFrame:
    """Validation scores as a (repeat, fold) × candidate frame; NaN where a fit failed or is missing.

    Columns are sorted candidate ids. Drop incomplete candidates with ``.dropna(axis=1)`` before
    the optimism functions, which refuse NaN.
    """
    column = f"val_{metric}"
    for name in ("candidate", "repeat", "fold", "status", column):
        if name not in fits.columns:
            raise DataError(f"the fit records have no column '{name}'; pass the concatenated fits/ tables")
    ok = fits[fits["status"] == "ok"]
    matrix = ok.pivot_table(index=["repeat", "fold"], columns="candidate", values=column, aggfunc="first")
    index = pd.MultiIndex.from_frame(fits[["repeat", "fold"]].drop_duplicates().sort_values(["repeat", "fold"]))
    candidates = sorted(fits["candidate"].unique())
    return matrix.reindex(index=index, columns=candidates)


def fold_sizes(fits: pd.DataFrame, index: pd.Index | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Training and validation rows per (repeat, fold), in the order of ``index`` (default: sorted)."""
    sizes = fits.groupby(["repeat", "fold"])[["n_train", "n_val"]].first()
    if index is not None:
        sizes = sizes.reindex(index)
    return sizes["n_train"].to_numpy(dtype=float), sizes["n_val"].to_numpy(dtype=float)


def oof_arrays(oof: pd.DataFrame, row_keys: Sequence[Any] | np.ndarray,
               classes: Sequence[Any] | None = None) -> list[dict[str, dict[str, np.ndarray]]]:
    """Out-of-fold outputs per repeat and candidate, aligned to ``row_keys``, ready for :func:`bbc_cv`.

    Parameters
    ----------
    oof : DataFrame
        Concatenated ``oof/`` tables (``row_key``, ``candidate``, ``prediction``, optional
        ``proba_<class>`` and ``decision``), plus a ``repeat`` column when CV was repeated (the
        stored files carry the repeat in their name ``r<R>f<F>``; add it when reading them).
    row_keys : the dev rows in the order of ``y``.
    classes : class labels in ``predict_proba`` order; default: the order of the ``proba_`` columns.

    Returns
    -------
    list of dict
        One mapping per repeat (sorted): candidate → ``{"predict", "predict_proba"?, "decision_function"?}``.
    """
    keys = pd.Index(row_keys)
    if keys.has_duplicates:
        raise DataError("row_keys has duplicates; pass each dev row key once")
    if classes is not None:
        proba = [f"proba_{c}" for c in classes]
        missing = [c for c in proba if c not in oof.columns]
        if missing:
            raise DataError(f"the out-of-fold table has no column(s) {missing}; check the classes passed")
    else:
        proba = [c for c in oof.columns if str(c).startswith("proba_")]
    out = []
    groups = oof.groupby("repeat", sort=True) if "repeat" in oof.columns else [(0, oof)]
    for repeat, part in groups:
        per_candidate: dict[str, dict[str, np.ndarray]] = {}
        for candidate, rows in part.groupby("candidate", sort=True):
            indexed = rows.set_index("row_key")
            if indexed.index.has_duplicates or len(indexed) != len(keys) or not keys.isin(indexed.index).all():
                raise DataError(f"candidate '{candidate}' in repeat {repeat} has {len(indexed)} out-of-fold rows "
                                f"for {len(keys)} dev rows; every row needs exactly one prediction per repeat "
                                "(drop candidates that failed on a fold)")
            indexed = indexed.reindex(keys)
            outputs = {"predict": indexed["prediction"].to_numpy()}
            if proba and indexed[proba].notna().all().all():
                outputs["predict_proba"] = indexed[proba].to_numpy(dtype=float)
            if "decision" in indexed.columns and indexed["decision"].notna().all():
                outputs["decision_function"] = indexed["decision"].to_numpy(dtype=float)
            per_candidate[str(candidate)] = outputs
        out.append(per_candidate)
    return out
