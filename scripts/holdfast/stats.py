"""Honest numbers from cross-validation records: uncertainty, comparison, the one-standard-error rule.

Pure functions on numpy arrays and pandas frames (no files, no Snakemake), all in the
scikit-learn scorer convention: **greater is better**. Error-like metrics arrive negated
(``neg_log_loss``, ``neg_mean_squared_error``, ...), so "worse" always means "smaller" here;
callers who show an error rate flip the sign (or take ``1 - accuracy``) at display time.

What each function estimates:

- :func:`corrected_variance` -- the variance of a candidate's CV mean, naive and
  Nadeau--Bengio corrected (resampled folds share training rows, so the naive one is too small).
  It is holdfast's one formula for the corrected standard error (the tally's ranking uses it too).
- :func:`corrected_ttest` -- is the winner really better than another candidate on the same folds?
- :func:`one_standard_error_choice` -- the simplest candidate within one standard error of the best.

The frame helpers :func:`fold_score_matrix` and :func:`fold_sizes` turn the stored ``fits``
tables into the arrays these functions take; :func:`score_matrix` checks such an array.

How optimistic the winner's CV mean is (Tibshirani & Tibshirani, BBC-CV) and the bootstrap's
scorers live in :mod:`holdfast.optimism`; their old names here still work (``stats.bbc_cv``, ...).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Hashable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
from scipy import stats as scipy_stats

from .errors import DataError

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
    matrix = score_matrix(fold_scores)
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


def score_matrix(fold_scores: pd.DataFrame | np.ndarray) -> np.ndarray:
    """The scores as a float folds × candidates array; an error naming any candidate with a NaN or infinite score."""
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


# ---------------------------------------------------------------------------------------------
# Names that moved to holdfast.optimism, still importable from here
# ---------------------------------------------------------------------------------------------

_MOVED = frozenset({
    "Prediction", "TibshiraniEstimate", "best_by_mean", "tibshirani_bias", "tibshirani_caution", "WeightedScorer",
    "RowMeanScorer", "BinaryAUCScorer", "accuracy_scorer", "neg_error_rate_scorer", "sklearn_scorer",
    "replay_scorer", "BBCEstimate", "bbc_cv", "optimism_summary", "oof_arrays",
})


def __getattr__(name: str) -> Any:
    """``stats.bbc_cv`` and the other optimism names, read from :mod:`holdfast.optimism` when first asked for."""
    if name in _MOVED:
        from . import optimism

        return getattr(optimism, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
