"""Scores through scikit-learn's own scorers, from predictions made once.

A fitted model predicts each row once; :class:`Replay` hands those stored outputs
to any scorer, so every metric, every bootstrap resample and every out-of-fold
re-score sees exactly the numbers the model produced.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

import numpy as np
from sklearn.base import BaseEstimator, ClassifierMixin, RegressorMixin
from sklearn.metrics import get_scorer, get_scorer_names
from sklearn.utils.metaestimators import available_if

from .errors import ConfigError

RESPONSES = ("predict", "predict_proba", "decision_function")


def model_outputs(model: Any, features: Any) -> dict[str, np.ndarray]:
    """Every response the fitted model offers for these rows, each the array ``model.<response>(features)`` gives.

    A Pipeline's preprocessing runs once for all responses (Pipeline.predict & co. transform the rows
    and call the last step), and a response that scikit-learn computes from another one is taken from it
    with the same arithmetic (:data:`DERIVED`): one pass over a forest's trees instead of two, and over
    a boosted ensemble's instead of three.
    """
    from sklearn.pipeline import Pipeline

    final, rows = model, features
    if isinstance(model, Pipeline) and len(model.steps) > 1:
        final, rows = model.steps[-1][1], model[:-1].transform(features)
    rules = _derivations(final) if len(features) else {}
    out: dict[str, np.ndarray] = {}
    for name in ("decision_function", "predict_proba", "predict"):  # sources before what is derived from them
        if name in rules and rules[name][0] in out:
            source, derive = rules[name]
            out[name] = derive(final, out[source])
        elif hasattr(final, name):
            out[name] = np.asarray(getattr(final, name)(rows))
    return {name: out[name] for name in RESPONSES if name in out}


def _labels_from_decision(estimator: Any, decision: np.ndarray) -> np.ndarray:
    """Labels as LinearClassifierMixin.predict and HistGradientBoostingClassifier.predict compute them:
    one column, the second class where the decision is > 0; several, the class of the largest."""
    indices = (decision > 0).astype(np.intp) if decision.ndim == 1 else np.argmax(decision, axis=1)
    return np.asarray(estimator.classes_).take(indices, axis=0)


def _labels_from_proba(estimator: Any, proba: np.ndarray) -> np.ndarray:
    """Labels as ForestClassifier.predict computes them for one output: the most probable class."""
    return np.asarray(estimator.classes_).take(np.argmax(proba, axis=1), axis=0)


def _proba_from_raw(estimator: Any, decision: np.ndarray) -> np.ndarray:
    """Probabilities as HistGradientBoostingClassifier.predict_proba computes them from the raw predictions,
    which its decision_function returns (one column raveled, which the loss accepts as it is)."""
    return np.asarray(estimator._loss.predict_proba(decision))


_HGB = "sklearn.ensemble._hist_gradient_boosting.gradient_boosting.HistGradientBoostingClassifier"
# Response -> {the scikit-learn method (module.qualname, so nothing is imported to ask) that only turns another
# response into this one: (that response, the same arithmetic)}. Read off scikit-learn 1.9's code; each is
# compared with the real method by tests/test_units.py, and a subclass that overrides the method is not matched.
DERIVED: dict[str, dict[str, tuple[str, Any]]] = {
    "predict": {
        "sklearn.linear_model._base.LinearClassifierMixin.predict": ("decision_function", _labels_from_decision),
        f"{_HGB}.predict": ("decision_function", _labels_from_decision),
        "sklearn.ensemble._forest.ForestClassifier.predict": ("predict_proba", _labels_from_proba),
    },
    "predict_proba": {f"{_HGB}.predict_proba": ("decision_function", _proba_from_raw)},
}
# Where the method computes from its own raw predictions rather than by calling the source response, the
# source must be the method that returns those raw predictions (a subclass could override it).
SOURCE_METHODS = {(f"{_HGB}.predict_proba", "decision_function"): f"{_HGB}.decision_function",
                  (f"{_HGB}.predict", "decision_function"): f"{_HGB}.decision_function"}


def _method_name(estimator: Any, name: str) -> str:
    method = getattr(type(estimator), name, None)
    return f"{getattr(method, '__module__', '')}.{getattr(method, '__qualname__', '')}"


def _derivations(estimator: Any) -> dict[str, tuple[str, Any]]:
    """Response -> (source response, derivation) for the responses of this estimator :data:`DERIVED` covers."""
    if getattr(estimator, "n_outputs_", 1) != 1 or not hasattr(estimator, "classes_"):
        return {}
    found = {}
    for name, known in DERIVED.items():
        method = _method_name(estimator, name)
        if method not in known:
            continue
        source = known[method][0]
        wanted = SOURCE_METHODS.get((method, source))
        if wanted is None or _method_name(estimator, source) == wanted:
            found[name] = known[method]
    return found


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


# How far a weighted scorer's value may stray from scikit-learn's on the same resample, relative to the larger
# of 1 and the scores' size: rounding from a different summation order, a few units in the last place times
# the rows. tests/test_stats.py pins the weighted scorers to scikit-learn within 1e-12 relative.
AGREEMENT = 1e-9


def bootstrap_interval(metric: str, model: _ReplayBase, y: Any, level: float, draws: int,
                       seed: int) -> tuple[float, float]:
    """Percentile bootstrap interval of a scorer over resampled rows (Efron & Tibshirani 1993, ch. 13).

    Each resample is scored by scikit-learn's scorer on the replayed outputs; one it refuses with a
    ValueError (e.g. one class only for roc_auc) is skipped, and with more than 10 % skipped there is no
    interval. Metrics with a vectorised scorer in :mod:`holdfast.stats` score every resample at once
    (:func:`_vectorised_scores`), and the interval is still exactly the one-by-one loop's.
    """
    y = np.asarray(y)
    n = len(y)
    scorer = get_scorer(metric)
    alpha = 1.0 - level
    quantiles = [alpha / 2, 1 - alpha / 2]
    values = _vectorised_scores(metric, scorer, model, y, draws, seed, quantiles)
    if values is None:
        rng = np.random.default_rng(seed)
        scored = (_score_resample(scorer, model, y, rng.integers(0, n, n)) for _ in range(draws))
        values = np.array([v for v in scored if v is not None], dtype=float)
    if len(values) < draws * 0.9:
        return float("nan"), float("nan")
    low, high = np.quantile(values, quantiles)
    return float(low), float(high)


def _score_resample(scorer: Any, model: _ReplayBase, y: np.ndarray, rows: np.ndarray) -> float | None:
    """scikit-learn's score of one resample; None when the scorer refuses it with a ValueError."""
    try:
        return float(scorer(model, rows.reshape(-1, 1), y[rows]))
    except ValueError:
        return None


def _resamples(seed: int, n: int, draws: int, block: int) -> Iterator[tuple[int, np.ndarray]]:
    """The resamples in order, as (number of the first draw, rows of shape (draws in the block, n)).

    The same numbers as one ``rng.integers(0, n, n)`` call per draw: numpy's generator keeps its
    buffered bits in its own state, so a call for a whole block continues the stream exactly.
    """
    rng = np.random.default_rng(seed)
    for first in range(0, draws, block):
        yield first, rng.integers(0, n, size=(min(block, draws - first), n))


def _vectorised_scores(metric: str, scorer: Any, model: _ReplayBase, y: np.ndarray, draws: int, seed: int,
                       quantiles: list[float]) -> np.ndarray | None:
    """The scores of the resamples scikit-learn does not refuse, exact wherever the quantiles can see them.

    None when the metric has no weighted scorer in :mod:`holdfast.stats` (or it disagrees with
    scikit-learn): the caller then scores resample by resample. The weighted scorer scores every
    resample at once from multiplicity weights; it agrees with scikit-learn to rounding, not bit for
    bit. So scikit-learn re-scores (1) every resample the weighted scorer cannot vouch for: an undefined
    score, or a class of the model absent from it (scikit-learn's log loss refuses that); and (2) every
    resample within twice :data:`AGREEMENT` of an order statistic a quantile interpolates. As long as
    every weighted score is within :data:`AGREEMENT` of scikit-learn's (checked on each re-scored
    resample; a miss falls back to the loop), any other resample lies on the same side of those order
    statistics for both scorers, so the order statistics, and with them the interval, are scikit-learn's.
    """
    from . import optimism as stats  # the weighted scorers and resample multiplicities live in optimism.py

    task = "classification" if isinstance(model, ReplayClassifier) else "regression"
    classes = getattr(model, "classes", None)
    weighted = stats.sklearn_scorer(metric, task, None if classes is None else list(classes))
    n = len(y)
    if not isinstance(weighted, stats.WeightedScorer) or n == 0 or draws < 1:
        return None
    try:
        state = weighted.prepare(y, model.outputs)
    except ValueError:
        return None  # e.g. non-finite ranking scores, or a label the model does not know: scikit-learn decides
    members = [y == label for label in classes] if task == "classification" and classes is not None else []
    block = max(1, min(draws, (1 << 19) // n))  # about 2 MB of weights per block, as optimism.bbc_cv
    values = np.empty(draws)
    unsure = np.zeros(draws, dtype=bool)
    for first, rows in _resamples(seed, n, draws, block):
        counts = stats._multiplicities(rows, n)
        span = slice(first, first + len(rows))
        values[span] = weighted.weighted(state, counts)
        unsure[span] = np.isnan(values[span])
        for member in members:
            unsure[span] |= counts[member].sum(axis=0) == 0
    skipped = np.zeros(draws, dtype=bool)
    for number, value in zip(np.flatnonzero(unsure), _rescore(scorer, model, y, seed, draws, block, unsure),
                             strict=True):
        skipped[number] = value is None
        values[number] = np.nan if value is None else value
    kept = ~skipped
    if kept.sum() < draws * 0.9 or np.isnan(values[kept]).any():
        return values[kept]  # no interval, or scikit-learn's own NaN score: the quantiles are NaN either way
    near = np.zeros(draws, dtype=bool)
    tolerance = AGREEMENT * max(1.0, float(np.abs(values[kept]).max()))
    ordered = np.sort(values[kept])
    for q in quantiles:
        below = int(np.floor((len(ordered) - 1) * q))  # numpy's 'linear' method reads ranks below and below + 1
        for rank in range(max(below - 1, 0), min(below + 3, len(ordered))):
            near |= np.abs(values - ordered[rank]) <= 2 * tolerance
    near &= kept & ~unsure
    for number, value in zip(np.flatnonzero(near), _rescore(scorer, model, y, seed, draws, block, near),
                             strict=True):
        if value is None or not abs(value - values[number]) <= tolerance:
            return None  # the weighted scorer is not scikit-learn's here: score every resample one by one
        values[number] = value
    return values[kept]


def _rescore(scorer: Any, model: _ReplayBase, y: np.ndarray, seed: int, draws: int, block: int,
             wanted: np.ndarray) -> list[float | None]:
    """scikit-learn's score of the resamples marked in ``wanted``, in draw order (their rows drawn again)."""
    out: list[float | None] = []
    if not wanted.any():
        return out
    last = int(np.flatnonzero(wanted)[-1])
    for first, rows in _resamples(seed, len(y), draws, block):
        if first > last:
            break
        for offset in np.flatnonzero(wanted[first:first + len(rows)]):
            out.append(_score_resample(scorer, model, y, rows[offset]))
    return out
