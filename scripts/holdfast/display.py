"""How numbers are shown to people: plain metric names, errors as positive numbers in the target's unit.

The files keep scikit-learn's scorer values (greater is better, so errors are negated, ``neg_*``); everything a
person reads — closing lines, the report, status and comparisons — goes through here, so "MAE 3.69 days" is
shown where the files hold -3.69. No heavy imports: used at the end of every run.
"""

from __future__ import annotations

import math
from typing import Any

# Plain names of scikit-learn scorers (the scorer name is kept in the files; this is for reading).
LABELS = {
    "accuracy": "accuracy", "balanced_accuracy": "balanced accuracy", "roc_auc": "ROC AUC",
    "roc_auc_ovr": "ROC AUC (one vs rest)", "roc_auc_ovo": "ROC AUC (one vs one)",
    "roc_auc_ovr_weighted": "ROC AUC (one vs rest, weighted)", "roc_auc_ovo_weighted": "ROC AUC (one vs one, weighted)",
    "average_precision": "average precision", "f1": "F1", "f1_macro": "F1 (macro)", "f1_micro": "F1 (micro)",
    "f1_weighted": "F1 (weighted)", "precision": "precision", "recall": "recall", "jaccard": "Jaccard index",
    "matthews_corrcoef": "Matthews correlation", "top_k_accuracy": "top-k accuracy",
    "neg_log_loss": "log loss", "neg_brier_score": "Brier score",
    "r2": "R²", "explained_variance": "explained variance", "d2_absolute_error_score": "D² (absolute error)",
    "neg_mean_absolute_error": "MAE", "neg_median_absolute_error": "median absolute error",
    "neg_root_mean_squared_error": "RMSE", "neg_mean_squared_error": "MSE", "max_error": "max error",
    "neg_max_error": "max error", "neg_mean_absolute_percentage_error": "MAPE",
    "neg_mean_squared_log_error": "mean squared log error", "neg_root_mean_squared_log_error": "RMSLE",
    "neg_mean_poisson_deviance": "mean Poisson deviance", "neg_mean_gamma_deviance": "mean gamma deviance",
}
# Errors measured in the target's unit (squared for the squared ones); other errors have no unit.
IN_TARGET_UNIT = {"neg_mean_absolute_error", "neg_median_absolute_error", "neg_root_mean_squared_error",
                  "neg_max_error", "max_error"}
IN_SQUARED_UNIT = {"neg_mean_squared_error"}
CORRECTIONS = (("bbc", "BBC-CV"), ("tibshirani", "Tibshirani–Tibshirani"))


def label(metric: str) -> str:
    """The metric's plain name: 'MAE' for neg_mean_absolute_error, 'ROC AUC' for roc_auc."""
    return LABELS.get(metric, metric[4:].replace("_", " ") if metric.startswith("neg_") else metric.replace("_", " "))


def is_error(metric: str) -> bool:
    """True for scorers that are negated errors (shown positive, smaller is better)."""
    return metric.startswith("neg_")


def direction(metric: str) -> str:
    """'smaller is better' for errors, 'greater is better' for scores."""
    return "smaller is better" if is_error(metric) else "greater is better"


def unit(metric: str, target_unit: str | None) -> str:
    """The unit a shown value carries ('' when it has none)."""
    if not target_unit:
        return ""
    if metric in IN_TARGET_UNIT:
        return target_unit
    if metric in IN_SQUARED_UNIT:
        return f"{target_unit}²"
    return ""


def value(metric: str, score: float | None) -> float | None:
    """The number a person reads: the error itself (positive) for negated errors, else the score."""
    if score is None or (isinstance(score, float) and math.isnan(score)):
        return None
    return -float(score) if is_error(metric) else float(score)


def number(metric: str, score: float | None, target_unit: str | None = None, digits: int = 4) -> str:
    """'3.6900 days', '0.8725' or 'undefined'."""
    shown = value(metric, score)
    if shown is None:
        return "undefined"
    text = f"{shown:.{digits}f}"
    u = unit(metric, target_unit)
    return f"{text} {u}" if u else text


def interval(metric: str, low: float | None, high: float | None, target_unit: str | None = None,
             digits: int = 4) -> str:
    """'[0.8806, 0.9194]', with an error's bounds turned positive and put in order."""
    a, b = value(metric, low), value(metric, high)
    if a is None or b is None:
        return "not available"
    a, b = min(a, b), max(a, b)
    u = unit(metric, target_unit)
    return f"[{a:.{digits}f}, {b:.{digits}f}]" + (f" {u}" if u else "")


def spread(metric: str, amount: float | None, target_unit: str | None = None, digits: int = 4) -> str:
    """A standard error, an optimism or a gap between two scores: kept as it is (never negated), with the unit.

    Differences of scorer values read the same way for errors and scores once both are said in words
    ('behind the winner by', 'flatters by'), so only the unit is added.
    """
    if amount is None or (isinstance(amount, float) and math.isnan(amount)):
        return "undefined"
    u = unit(metric, target_unit)
    return f"{float(amount):.{digits}f}" + (f" {u}" if u else "")


def named(metric: str, score: float | None, target_unit: str | None = None, digits: int = 4) -> str:
    """'MAE 3.6900 days', 'ROC AUC 0.8725'."""
    return f"{label(metric)} {number(metric, score, target_unit, digits)}"


def corrected_list(optimism: dict[str, Any], metric: str, target_unit: str | None = None) -> str:
    """'BBC-CV 0.8682, Tibshirani–Tibshirani 0.8706' from an optimism block (or '' when there is none)."""
    parts = [f"{name} {number(metric, (optimism.get(key) or {}).get('corrected'), target_unit)}"
             for key, name in CORRECTIONS if (optimism.get(key) or {}).get("corrected") is not None]
    return ", ".join(parts)
