"""Leakage guards: duplicated rows across a split, and a single feature that gives the target away.

Most optimistic results are leaks rather than good models. These checks count exact duplicate
feature rows between the development and sealed test rows (at the seal, the only time both are
in memory outside open_test) and between training and validation rows of each fold (the fold
summary in ``folds.py`` uses :func:`feature_identity`), and flag any one
feature that alone predicts the target almost perfectly on the development rows.

This module knows nothing of folds: ``folds.py`` imports it, never the other way round.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from .dataset import feature_columns

# Multiplier of the polynomial row hash (odd, so multiplication is a bijection of the 64-bit integers).
_HASH_MULTIPLIER = np.uint64(0x9E3779B97F4A7C15)
_CANONICAL_NAN = np.float64("nan").view(np.uint64)

SCREEN_ROWS = 200_000
"""Above this many development rows, a feature's ROC AUC is first measured on a seeded sample of this size."""
SCREEN_RISK = 1e-9
"""The chance, per feature, that the sample rules out a feature whose AUC on all rows reaches the threshold."""


def _column_values(values: pd.Series) -> np.ndarray:
    """One unsigned 64-bit number per row: equal exactly when the values' text is equal (blanks equal each other).

    Text as ``astype("string")`` renders it, which is what two rows "repeat" each other means here. Numbers,
    booleans and times compare by their bits (a float's shortest text is unique to its bits; every NaN is a
    blank), text by itself, anything else by the text of its distinct values.
    """
    dtype = values.dtype
    if isinstance(dtype, np.dtype) and dtype.kind in "fiubMm":
        raw = values.to_numpy()
        if dtype.kind == "f":
            bits = raw.view(f"u{dtype.itemsize}")
            blank = np.isnan(raw)
            if dtype.itemsize < 8 or blank.any():
                bits = bits.astype(np.uint64)
                bits[blank] = _CANONICAL_NAN
            return bits
        if dtype.kind in "Mm":
            return raw.view(np.int64).view(np.uint64)
        return raw.astype(np.uint64) if dtype.kind == "b" or dtype.itemsize < 8 else raw.view(np.uint64)
    if isinstance(dtype, pd.StringDtype):
        codes, uniques = pd.factorize(values)
    elif pd.api.types.is_object_dtype(dtype):
        if pd.api.types.infer_dtype(values, skipna=True) in ("string", "empty"):
            codes, uniques = pd.factorize(values)
        else:  # mixed types: 1 and 1.0 are different text
            codes, uniques = pd.factorize(values.astype("string"))
    else:  # categories, nullable numbers, zoned times, ...: the text of each distinct value decides
        codes, distinct = pd.factorize(values)
        rendered, uniques = pd.factorize(pd.Series(distinct).astype("string"), use_na_sentinel=False)
        codes = np.where(codes >= 0, rendered[np.maximum(codes, 0)], -1)
    return np.where(codes >= 0, codes, len(uniques)).astype(np.uint64)


def _dense_ids(columns: list[np.ndarray]) -> np.ndarray:
    """Exact row identity from per-column values: equal ids exactly when every column is equal."""
    ids = np.zeros(len(columns[0]), dtype=np.int64)
    size = 1
    for column in columns:
        codes, uniques = pd.factorize(column)
        if size * len(uniques) >= 2**62:  # renumber before the product could overflow
            ids, kept = pd.factorize(ids)
            size = len(kept)
        ids = ids * len(uniques) + codes
        size *= len(uniques)
    return pd.factorize(ids)[0].astype(np.int64)


@dataclass(frozen=True)
class RowIdentity:
    """Which rows might repeat another row, and the exact identity of each of them.

    ``rows``: positions (among ``n``) of the rows whose 64-bit hash another row shares; no other row can
    repeat any row. ``ids``: for each of them, an integer equal for two rows exactly when all their values
    are equal.
    """

    n: int
    rows: np.ndarray
    ids: np.ndarray

    def repeated(self, reference: np.ndarray, query: np.ndarray) -> int:
        """How many ``query`` rows repeat some ``reference`` row (each a boolean mask or positions over ``n``)."""
        if not self.rows.size:
            return 0
        in_reference, in_query = _as_mask(reference, self.n)[self.rows], _as_mask(query, self.n)[self.rows]
        seen = np.zeros(int(self.ids.max()) + 1, dtype=bool)
        seen[self.ids[in_reference]] = True
        return int(seen[self.ids[in_query]].sum())


def _as_mask(rows: np.ndarray, n: int) -> np.ndarray:
    if rows.dtype == bool:
        return rows
    mask = np.zeros(n, dtype=bool)
    mask[rows] = True
    return mask


def row_identity(columns: list[pd.Series]) -> RowIdentity:
    """Rows that are equal in every column (as text), found without a Python object per row.

    A 64-bit polynomial hash of the columns sets apart almost every row at once (sorting the hashes
    finds the shared ones); rows whose hash is shared are then compared column by column, so a hash
    collision never makes two rows equal.
    """
    n = len(columns[0]) if columns else 0
    if not columns or n < 2:
        return RowIdentity(n, np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int64))
    hashed = np.zeros(n, dtype=np.uint64)
    for column in columns:
        hashed *= _HASH_MULTIPLIER
        hashed += _column_values(column)
    ordered = np.sort(hashed)
    shared = np.unique(ordered[1:][ordered[1:] == ordered[:-1]])
    del ordered
    if not shared.size:
        return RowIdentity(n, np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int64))
    rows = np.flatnonzero(np.isin(hashed, shared))
    return RowIdentity(n, rows, _dense_ids([_column_values(c.iloc[rows]) for c in columns]))


def feature_identity(frame: pd.DataFrame, spec: dict[str, Any]) -> RowIdentity:
    """:func:`row_identity` over a frame's feature columns only (key, id, target, group, time and drop ignored)."""
    return row_identity([frame[c] for c in sorted(feature_columns(frame, spec))])


def duplicates_across(first: pd.DataFrame, second: pd.DataFrame, spec: dict[str, Any]) -> int:
    """How many rows of ``second`` repeat the features of some row of ``first``."""
    if first.empty or second.empty:
        return 0
    columns = sorted(feature_columns(first, spec))
    identity = row_identity([pd.concat([first[c], second[c]], ignore_index=True) for c in columns])
    return identity.repeated(np.arange(len(first)), np.arange(len(first), identity.n))


def _auc_by_ranks(score: np.ndarray, positive: np.ndarray) -> float:
    """ROC AUC as the Mann–Whitney statistic with average ranks for ties (for screening; not bit-equal to sklearn)."""
    from scipy.stats import rankdata

    ranks = rankdata(score)
    n_pos = int(positive.sum())
    n_neg = len(score) - n_pos
    return (float(ranks[positive].sum()) - n_pos * (n_pos + 1) / 2.0) / (n_pos * n_neg)


def _may_reach_auc(score: np.ndarray, positive: np.ndarray, sample: np.ndarray, threshold: float) -> bool:
    """False only when a seeded sample shows, but for a chance of SCREEN_RISK, that max(AUC, 1 − AUC) < threshold.

    Hoeffding (1963, J. Amer. Statist. Assoc. 58, §5 and §6): the AUC of a sample is a two-sample
    U-statistic with a kernel in [0, 1], so it strays from the AUC of all rows by t or more with chance at
    most 2·exp(−2·m·t²), m the sample's smaller class; sampling without replacement does no worse.
    """
    x, y = score[sample], positive[sample]
    m = min(int(y.sum()), int((~y).sum()))
    if m == 0:
        return True
    margin = math.sqrt(math.log(2.0 / SCREEN_RISK) / (2.0 * m))
    auc = _auc_by_ranks(x, y)
    return max(auc, 1.0 - auc) + margin >= threshold


def _may_reach_r2(x: np.ndarray, y: np.ndarray, threshold: float) -> bool:
    """False when the squared correlation (the R² of a least-squares line) is clearly below the threshold."""
    dx, dy = x - x.mean(), y - y.mean()
    sxx, syy = float(dx @ dx), float(dy @ dy)
    if sxx == 0.0 or syy == 0.0 or not (math.isfinite(sxx) and math.isfinite(syy)):
        return True
    return float(dx @ dy) ** 2 / (sxx * syy) >= threshold - 1e-6


def _category_means(values: pd.Series, target: pd.Series, binary: bool) -> pd.Series:
    """Each row's category's mean target (NaN for a blank category), the score a text feature is judged by.

    A two-class target of integers has integer sums per category, exact in floating point, so counting
    (``bincount``) gives the same numbers as the grouped mean, much faster; other targets use the grouped mean.
    """
    categories = values.astype(str)
    if not (binary and pd.api.types.is_integer_dtype(target.dtype) and isinstance(target.dtype, np.dtype)):
        return target.astype(float).groupby(categories).transform("mean")
    codes, uniques = pd.factorize(categories)
    present = codes >= 0
    y = target.to_numpy().astype(float)
    sums = np.bincount(codes[present], weights=y[present], minlength=len(uniques))
    counts = np.bincount(codes[present], minlength=len(uniques))
    means = np.append(sums / np.maximum(counts, 1), np.nan)
    return pd.Series(means[np.where(present, codes, len(uniques))], index=values.index)


def single_feature_alarms(dev: pd.DataFrame, spec: dict[str, Any], task: str, threshold: float) -> list[dict[str, Any]]:
    """Features that alone predict the target above ``threshold`` (ROC AUC, or R² of a straight line).

    Every alarm's value is computed by scikit-learn on all development rows. A feature that is plainly
    below the threshold is ruled out cheaply first: for R², by its squared correlation; for AUC on more
    than SCREEN_ROWS rows, by a seeded sample (see :func:`_may_reach_auc`).
    """
    from sklearn.metrics import r2_score, roc_auc_score

    target = dev[spec["target"]]
    alarms = []
    binary = task == "classification" and target.nunique() == 2
    positive_label = sorted(target.unique())[-1] if binary else None
    is_positive = (target == positive_label).to_numpy() if binary else None
    sample = None
    if binary and len(dev) > SCREEN_ROWS:
        sample = np.sort(np.random.default_rng(0).choice(len(dev), SCREEN_ROWS, replace=False))
    for column in feature_columns(dev, spec):
        values = dev[column]
        if pd.api.types.is_numeric_dtype(values) and values.dtype != bool:
            score_input = values.astype(float)
        elif binary or task == "regression":  # a category's share of the positive class (or mean target)
            score_input = _category_means(values, target, binary)
        else:
            score_input = None
        if score_input is None:
            continue
        keep = score_input.notna().to_numpy()
        if keep.sum() < 10:
            continue
        if binary:
            assert is_positive is not None
            if sample is not None and not _may_reach_auc(score_input.to_numpy(dtype=float, na_value=np.nan),
                                                         is_positive, sample[keep[sample]], threshold):
                continue
            x, y = score_input[keep].to_numpy(), target[keep]
            auc = roc_auc_score((y == positive_label).astype(int), x)
            strength, measure = max(auc, 1 - auc), "ROC AUC"
        elif task == "regression":
            x, y = score_input[keep].to_numpy(), target[keep]
            if not _may_reach_r2(x.astype(float), y.to_numpy(dtype=float), threshold):
                continue
            slope, intercept = np.polyfit(x, y.to_numpy(dtype=float), 1) if np.ptp(x) > 0 else (0.0, float(y.mean()))
            strength, measure = r2_score(y, slope * x + intercept), "R²"
        else:
            continue
        if strength >= threshold:
            alarms.append({"feature": column, "measure": measure, "value": float(strength)})
    return alarms
