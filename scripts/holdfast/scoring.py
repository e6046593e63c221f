"""Scores through scikit-learn's own scorers, from predictions made once.

A fitted model predicts each row once; :class:`Replay` hands those stored outputs
to any scorer, so every metric, every bootstrap resample and every out-of-fold
re-score sees exactly the numbers the model produced.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from sklearn.base import BaseEstimator, ClassifierMixin, RegressorMixin
from sklearn.metrics import get_scorer, get_scorer_names
from sklearn.utils.metaestimators import available_if

from .errors import ConfigError

RESPONSES = ("predict", "predict_proba", "decision_function")


def model_outputs(model: Any, features: Any) -> dict[str, np.ndarray]:
    """Every response the fitted model offers for these rows."""
    out = {}
    for name in RESPONSES:
        if hasattr(model, name):
            out[name] = np.asarray(getattr(model, name)(features))
    return out


def _has(name: str) -> Any:
    return lambda self: name in self.outputs


class _ReplayBase(BaseEstimator):
    """An already-'fitted' estimator whose inputs are row positions into stored outputs."""

    def __init__(self, outputs: dict[str, np.ndarray], classes: np.ndarray | None = None) -> None:
        self.outputs = outputs
        self.classes = classes
        if classes is not None:
            self.classes_ = classes

    def fit(self, X: Any, y: Any = None) -> _ReplayBase:  # noqa: N803 - scikit-learn's argument name
        return self

    def __sklearn_is_fitted__(self) -> bool:
        return True

    def predict(self, X: Any) -> np.ndarray:  # noqa: N803
        return self.outputs["predict"][np.asarray(X).ravel()]

    @available_if(_has("predict_proba"))
    def predict_proba(self, X: Any) -> np.ndarray:  # noqa: N803
        return self.outputs["predict_proba"][np.asarray(X).ravel()]

    @available_if(_has("decision_function"))
    def decision_function(self, X: Any) -> np.ndarray:  # noqa: N803
        return self.outputs["decision_function"][np.asarray(X).ravel()]


class ReplayClassifier(ClassifierMixin, _ReplayBase):
    """Replay of a classifier's stored outputs."""


class ReplayRegressor(RegressorMixin, _ReplayBase):
    """Replay of a regressor's stored outputs."""


def replay(outputs: dict[str, np.ndarray], task: str, classes: np.ndarray | None = None) -> _ReplayBase:
    """A replay estimator for the task."""
    if task == "classification":
        return ReplayClassifier(outputs, classes)
    return ReplayRegressor(outputs)


def score_outputs(metrics: list[str], model: _ReplayBase, y: Any, rows: np.ndarray | None = None) -> dict[str, float]:
    """Each scorer's value (greater is better) on the given row positions."""
    y = np.asarray(y)
    positions = np.arange(len(y)) if rows is None else rows
    positions_2d = positions.reshape(-1, 1)
    return {name: float(get_scorer(name)(model, positions_2d, y[positions])) for name in metrics}


def metric_kind(name: str) -> str:
    """'classification', 'regression' or 'other' for a scorer name, from its metric's module."""
    scorer = get_scorer(name)
    func = getattr(scorer, "_score_func", None)
    module = getattr(func, "__module__", "") or ""
    if module.endswith(("_classification", "_ranking")):
        return "classification"
    if module.endswith("_regression"):
        return "regression"
    return "other"


def check_metrics(metrics: list[str], task: str) -> None:
    """Every metric is a known scikit-learn scorer that fits the task."""
    names = set(get_scorer_names())
    for position, name in enumerate(metrics):
        if name not in names:
            close = sorted(n for n in names if name.replace("neg_", "") in n)[:4]
            hint = f" (did you mean {', '.join(close)}?)" if close else ""
            raise ConfigError(f"config key 'metrics[{position}]': '{name}' is not a scikit-learn scorer name{hint}; "
                              "see sklearn.metrics.get_scorer_names()")
        kind = metric_kind(name)
        if kind != task:
            raise ConfigError(f"config key 'metrics[{position}]': '{name}' is a {kind} metric but the task is {task}; "
                              "choose a metric for this task")


def clopper_pearson(successes: int, trials: int, level: float) -> tuple[float, float]:
    """Exact binomial interval (Clopper & Pearson, Biometrika 26, 1934) from beta quantiles."""
    from scipy.stats import beta

    alpha = 1.0 - level
    low = 0.0 if successes == 0 else float(beta.ppf(alpha / 2, successes, trials - successes + 1))
    high = 1.0 if successes == trials else float(beta.ppf(1 - alpha / 2, successes + 1, trials - successes))
    return low, high


def bootstrap_interval(metric: str, model: _ReplayBase, y: Any, level: float, draws: int,
                       seed: int) -> tuple[float, float]:
    """Percentile bootstrap interval of a scorer over resampled rows (Efron & Tibshirani 1993, ch. 13)."""
    rng = np.random.default_rng(seed)
    y = np.asarray(y)
    n = len(y)
    scorer = get_scorer(metric)
    values = []
    for _ in range(draws):
        rows = rng.integers(0, n, n)
        try:
            values.append(float(scorer(model, rows.reshape(-1, 1), y[rows])))
        except ValueError:
            continue  # e.g. a resample with one class for roc_auc: skipped, counted below
    if len(values) < draws * 0.9:
        return float("nan"), float("nan")
    alpha = 1.0 - level
    low, high = np.quantile(values, [alpha / 2, 1 - alpha / 2])
    return float(low), float(high)
