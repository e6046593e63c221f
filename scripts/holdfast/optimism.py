"""How much the winner's CV estimate flatters it: the optimism estimators and the bootstrap's scorers.

Picking the best of many candidates by their CV means picks, in part, the luckiest; its CV mean is
then optimistic. Two estimates of that optimism, both in the scikit-learn scorer convention
(**greater is better**):

- :func:`tibshirani_bias` -- Tibshirani & Tibshirani (2009), from per-fold scores;
- :func:`bbc_cv` -- bootstrap bias-corrected CV (Tsamardinos, Greasidou & Borboudakis 2018), from the
  stored out-of-fold predictions, with :class:`WeightedScorer` scorers that score many bootstrap
  draws at once (:func:`sklearn_scorer` turns a scorer name into one);

:func:`optimism_summary` puts both beside the raw figure, and :func:`oof_arrays` turns the stored
``oof`` tables into the arrays :func:`bbc_cv` takes.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Hashable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from .errors import DataError
from .stats import score_matrix

Prediction = Any
"""One candidate's out-of-fold predictions over the rows: an array whose first axis is rows
(labels, values or a probability matrix), or a mapping of such arrays named like
:func:`holdfast.scoring.model_outputs` (``predict``, ``predict_proba``, ``decision_function``)."""


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


def best_by_mean(fold_scores: pd.DataFrame | np.ndarray) -> Hashable:
    """The column with the highest mean; ties go to the smallest label (the tally's order)."""
    matrix = score_matrix(fold_scores)
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
    matrix = score_matrix(fold_scores)
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

    def reads(self, outputs: Mapping[str, Any]) -> set[str] | None:
        """The names among ``outputs`` that scoring them reads (None: any of them), so callers may drop the rest."""
        return None

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
    uses: tuple[str, ...] | None = None  # the model outputs per_row reads, when known

    def reads(self, outputs: Mapping[str, Any]) -> set[str] | None:
        return None if self.uses is None else set(self.uses)

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

    def reads(self, outputs: Mapping[str, Any]) -> set[str] | None:
        return {"decision_function"} if "decision_function" in outputs else {"predict_proba"}

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
        index = np.int32 if len(score) < 2**31 else np.int64  # positions only: half the memory per candidate
        return (small.astype(index), large.astype(index), lower.astype(index), lower_or_tied.astype(index),
                np.array(flip))

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
    return RowMeanScorer(_accuracy_rows, "accuracy", uses=("predict",))


def neg_error_rate_scorer() -> RowMeanScorer:
    """Minus the error rate from label predictions: accuracy − 1, greater is better."""
    return RowMeanScorer(lambda y, p: _accuracy_rows(y, p) - 1.0, "neg_error_rate", uses=("predict",))


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
        return RowMeanScorer(_regression_rows(2), name, uses=("predict",))
    if name == "neg_mean_absolute_error":
        return RowMeanScorer(_regression_rows(1), name, uses=("predict",))
    if name == "neg_log_loss" and classes is not None:
        return RowMeanScorer(_log_loss_rows(list(classes)), name, uses=("predict_proba",))
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
# From the stored out-of-fold tables to arrays
# ---------------------------------------------------------------------------------------------

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


def kept_outputs(scorer: Callable[[Any, Prediction], float], outputs: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    """The outputs ``scorer`` reads (all of them for a scorer that does not say), for holding many candidates."""
    reads = scorer.reads(outputs) if isinstance(scorer, WeightedScorer) else None
    return outputs if reads is None else {name: value for name, value in outputs.items() if name in reads}


class OofCollector:
    """The arrays :func:`oof_arrays` gives for the concatenated ``oof`` tables, gathered one table at a time.

    For hundreds of candidates the concatenated tables (a text row key per row and candidate) do not fit in
    memory; here each table's rows go straight to their row's position, and once a candidate's outputs are
    complete only those its scorer reads are kept. ``columns`` and ``prediction_dtype``: the columns and the
    prediction type of the concatenation (:func:`concatenated_columns`), so that arrays and errors are the same.
    """

    def __init__(self, n: int, candidates: Sequence[str], classes: Sequence[Any] | None, columns: Sequence[str],
                 prediction_dtype: Any, scorer: Callable[[Any, Prediction], float] | None = None) -> None:
        self.n = n
        self.candidates = {str(c) for c in candidates}
        self.proba = ([f"proba_{c}" for c in classes] if classes is not None
                      else [c for c in columns if str(c).startswith("proba_")])
        self.columns = list(columns)
        self.prediction_dtype = prediction_dtype
        self.scorer = scorer
        self.parts: dict[tuple[Any, str], dict[str, Any]] = {}

    def add(self, table: pd.DataFrame, rows: np.ndarray) -> None:
        """One ``oof`` table; ``rows[i]``: the position (0..n-1) of its row i, or −1 for a row not counted."""
        use = (rows >= 0) & table["candidate"].astype(str).isin(self.candidates).to_numpy()
        if not use.any():
            return
        part_of = table.loc[use, ["candidate"]].assign(
            repeat=table.loc[use, "repeat"] if "repeat" in table.columns else 0, _row=rows[use])
        predictions = table.loc[use, "prediction"].astype(self.prediction_dtype).to_numpy()
        has_proba = bool(self.proba) and all(c in table.columns for c in self.proba)
        probas = table.loc[use, self.proba].to_numpy(dtype=float) if has_proba else None
        decisions = table.loc[use, "decision"].to_numpy(dtype=float) if "decision" in table.columns else None
        touched = []
        for (candidate, repeat), where in part_of.groupby(["candidate", "repeat"], sort=False).indices.items():
            key = (repeat, str(candidate))
            part = self.parts.get(key)
            if part is None:
                part = self.parts[key] = {
                    "count": np.zeros(self.n, dtype=np.int32), "extra": 0, "outputs": {
                        "predict": np.empty(self.n, dtype=predictions.dtype),
                        "predict_proba": np.full((self.n, len(self.proba)), np.nan) if self.proba else None,
                        "decision_function": np.full(self.n, np.nan) if "decision" in self.columns else None}}
            at = part_of["_row"].to_numpy()[where]
            if part["count"] is None:  # rows after it was complete: duplicates, reported by arrays()
                part["extra"] += len(at)
                continue
            touched.append(key)
            part["count"] += np.bincount(at, minlength=self.n).astype(np.int32)
            outputs = part["outputs"]
            outputs["predict"][at] = predictions[where]
            if outputs["predict_proba"] is not None:
                if probas is None:
                    outputs["predict_proba"] = None  # a table without them: NaN in the concatenation
                else:
                    outputs["predict_proba"][at] = probas[where]
            if outputs["decision_function"] is not None:
                if decisions is None:
                    outputs["decision_function"] = None
                else:
                    outputs["decision_function"][at] = decisions[where]
        for key in touched:
            part = self.parts[key]
            if self.scorer is not None and bool((part["count"] == 1).all()):
                # Every row is in (more rows would be an error): keep only what the scorer reads.
                part["outputs"] = kept_outputs(self.scorer, self._complete(part["outputs"]))
                part["count"] = None

    @staticmethod
    def _complete(outputs: dict[str, Any]) -> dict[str, np.ndarray]:
        out = {"predict": outputs["predict"]}
        for name in ("predict_proba", "decision_function"):
            value = outputs.get(name)
            if value is not None and not np.isnan(value).any():
                out[name] = value
        return out

    def arrays(self) -> list[dict[str, dict[str, np.ndarray]]]:
        """One mapping per repeat (sorted): candidate → outputs; the errors :func:`oof_arrays` raises."""
        missing = [c for c in self.proba if c not in self.columns]
        if missing:
            raise DataError(f"the out-of-fold table has no column(s) {missing}; check the classes passed")
        out = []
        for repeat in sorted({r for r, _ in self.parts}):
            per_candidate: dict[str, dict[str, np.ndarray]] = {}
            for candidate in sorted(c for r, c in self.parts if r == repeat):
                part = self.parts[(repeat, candidate)]
                count = part["count"]
                rows = self.n + part["extra"] if count is None else int(count.sum())
                if part["extra"] or (count is not None and not bool((count == 1).all())):
                    raise DataError(f"candidate '{candidate}' in repeat {repeat} has {rows} out-of-fold rows for "
                                    f"{self.n} dev rows; every row needs exactly one prediction per repeat (drop "
                                    "candidates that failed on a fold)")
                per_candidate[candidate] = part["outputs"] if count is None else self._complete(part["outputs"])
            out.append(per_candidate)
        return out


def concatenated_columns(tables: Sequence[pd.DataFrame]) -> tuple[list[str], Any]:
    """Columns, and the prediction column's type, of ``pandas.concat`` of these tables (empty ones will do)."""
    joined = pd.concat(list(tables), ignore_index=True)
    return list(joined.columns), joined["prediction"].dtype
