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


# Scorers for two classes (the last four score the label 1) and their counterparts for any labels.
MULTICLASS = {"roc_auc": "roc_auc_ovr", "f1": "f1_macro", "precision": "precision_macro", "recall": "recall_macro",
              "jaccard": "jaccard_macro"}


PROBE_ROWS = 20_000


def _probe_model(classes: np.ndarray, rows: int) -> _ReplayBase:
    """A replay classifier over ``classes`` with fixed arbitrary outputs, the shapes a fitted model's would have."""
    proba = np.random.default_rng(0).dirichlet(np.ones(len(classes)), rows)
    outputs = {"predict": classes[proba.argmax(axis=1)], "predict_proba": proba,
               "decision_function": proba[:, 1] if len(classes) == 2 else proba}
    return replay(outputs, "classification", classes)


def metric_problem(name: str, classes: np.ndarray, y: Any) -> str | None:
    """Why the scorer cannot score labels ``y`` for a model of ``classes``, in scikit-learn's words (None: it can).

    The scorer itself is asked, on the same replay the fit jobs and the opening use, so the answer follows
    the installed scikit-learn rather than a list of names.
    """
    y = np.asarray(y)
    return _score_problem(name, _probe_model(np.asarray(classes), len(y)), y)


def _score_problem(name: str, model: _ReplayBase, y: np.ndarray) -> str | None:
    import warnings

    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            value = get_scorer(name)(model, np.arange(len(y)).reshape(-1, 1), y)
    except Exception as exc:  # any failure here is the failure a fit job or the opening would meet
        text = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        return text.rstrip(".")
    if not np.isfinite(value):
        said = [str(w.message).splitlines()[0].rstrip(".") for w in caught if str(w.message)]
        return f"{said[-1]}; the value is NaN" if said else "the value is NaN"
    return None


def labels_text(values: Any, limit: int = 4) -> str:
    """Class labels for a message: 'a', 'b', ... (at most ``limit``)."""
    listed = np.asarray(values).tolist()
    return ", ".join(f"'{v}'" for v in listed[:limit]) + (", ..." if len(listed) > limit else "")


def check_metrics_for_target(metrics: list[str], target: Any, defaults: bool = False) -> None:
    """Every metric can score this classification target (refuses binary-only scorers on three or more classes)."""
    classes = np.unique(np.asarray(target))
    y = np.concatenate([classes, np.asarray(target)[:PROBE_ROWS]])  # every class, and no more rows than needed
    for position, name in enumerate(metrics):
        problem = metric_problem(name, classes, y)
        if problem is None:
            continue
        key = ("config key 'metrics' (not set, so the defaults " + ", ".join(metrics) + " apply)" if defaults
               else f"config key 'metrics[{position}]'")
        instead = MULTICLASS.get(name)
        if len(classes) > 2:
            fix = (f"use {instead} instead" if instead else
                   "use a scorer for several classes, e.g. accuracy, f1_macro or roc_auc_ovr")
            raise ConfigError(f"{key}: '{name}' scores two classes but target '{getattr(target, 'name', '')}' has "
                              f"{len(classes)} ({labels_text(classes)}) (scikit-learn: {problem}); {fix}")
        fix = "recode the target as 0 and 1 (1 = the class of interest)" + (
            f", or use {instead}" if instead and instead.endswith("_macro") else "")
        raise ConfigError(f"{key}: '{name}' cannot score target '{getattr(target, 'name', '')}' with classes "
                          f"{labels_text(classes)} (scikit-learn: {problem}); {fix}")


def check_regression_metrics(metrics: list[str], target: Any) -> None:
    """Every metric can score this regression target's values (a log or deviance error needs positive ones).

    Asked of the scorer with predictions drawn from the target's own values; a model that predicts outside
    that range can still fail later, but a target outside the metric's domain is known now.
    """
    y = np.asarray(target, dtype=float)[:PROBE_ROWS]
    for position, name in enumerate(metrics):
        problem = _score_problem(name, replay({"predict": np.roll(y, 1)}, "regression"), y)
        if problem is not None:
            raise ConfigError(f"config key 'metrics[{position}]': '{name}' cannot score target "
                              f"'{getattr(target, 'name', '')}' (from {y.min():g} to {y.max():g}; scikit-learn: "
                              f"{problem}); choose another metric, e.g. neg_mean_absolute_error")


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
