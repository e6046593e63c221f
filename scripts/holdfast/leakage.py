"""Leakage guards: duplicated rows across a split, and a single feature that gives the target away.

Most optimistic results are leaks rather than good models. These checks count exact duplicate
feature rows between the development and sealed test rows (at the seal, the only time both are
in memory outside open_test) and between training and validation rows of each fold, and flag any
one feature that alone predicts the target almost perfectly on the development rows.
"""

from __future__ import annotations

import hashlib
from typing import Any

import numpy as np
import pandas as pd

from .dataset import KEY, feature_columns, parse_times


def feature_hashes(frame: pd.DataFrame, spec: dict[str, Any]) -> pd.Series:
    """A hash of each row's feature values only (key, id, target, group, time and drop ignored)."""
    columns = sorted(feature_columns(frame, spec))
    text = frame[columns].astype("string").fillna("\x00").astype(str).agg("\x1f".join, axis=1)
    return pd.Series([hashlib.sha256(t.encode()).hexdigest()[:20] for t in text], index=frame.index)


def duplicates_across(first: pd.DataFrame, second: pd.DataFrame, spec: dict[str, Any]) -> int:
    """How many rows of ``second`` repeat the features of some row of ``first``."""
    if first.empty or second.empty:
        return 0
    return int(feature_hashes(second, spec).isin(set(feature_hashes(first, spec))).sum())


def single_feature_alarms(dev: pd.DataFrame, spec: dict[str, Any], task: str, threshold: float) -> list[dict[str, Any]]:
    """Features that alone predict the target above ``threshold`` (ROC AUC, or R² of a straight line)."""
    from sklearn.metrics import r2_score, roc_auc_score

    target = dev[spec["target"]]
    alarms = []
    binary = task == "classification" and target.nunique() == 2
    for column in feature_columns(dev, spec):
        values = dev[column]
        if pd.api.types.is_numeric_dtype(values) and values.dtype != bool:
            score_input = values.astype(float)
        else:  # a category's share of the positive class (or mean target) is its score
            score_input = target.astype(float).groupby(values.astype(str)).transform("mean") if (
                binary or task == "regression") else None
        if score_input is None:
            continue
        keep = score_input.notna().to_numpy()
        if keep.sum() < 10:
            continue
        x, y = score_input[keep].to_numpy(), target[keep]
        if binary:
            positive = sorted(y.unique())[-1]
            auc = roc_auc_score((y == positive).astype(int), x)
            strength, measure = max(auc, 1 - auc), "ROC AUC"
        elif task == "regression":
            slope, intercept = np.polyfit(x, y.to_numpy(dtype=float), 1) if np.ptp(x) > 0 else (0.0, float(y.mean()))
            strength, measure = r2_score(y, slope * x + intercept), "R²"
        else:
            continue
        if strength >= threshold:
            alarms.append({"feature": column, "measure": measure, "value": float(strength)})
    return alarms


def fold_summary(dev: pd.DataFrame, folds: pd.DataFrame, spec: dict[str, Any], task: str) -> pd.DataFrame:
    """Per repeat and fold: validation rows, groups (and how many also train), class counts or target mean/sd,
    time range, duplicates."""
    hashes = feature_hashes(dev, spec).set_axis(dev[KEY])
    data = dev.set_index(KEY)
    rows = []
    from .folds import fold_masks

    for (repeat, fold), part in folds.groupby(["repeat", "fold"], sort=True):
        keys = part[KEY].to_numpy()
        whole = folds[folds["repeat"] == repeat].reset_index(drop=True)
        training = whole.loc[fold_masks(whole, int(fold))[0], KEY].to_numpy()
        sub = data.loc[keys]
        row: dict[str, Any] = {"repeat": int(repeat), "fold": int(fold), "rows": len(keys),
                               "training_rows": len(training),
                               "duplicates_with_training": int(hashes.loc[keys].isin(set(hashes.loc[training])).sum())}
        if spec.get("group"):
            validation_groups = pd.Index(sub[spec["group"]].unique())
            row["groups"] = len(validation_groups)
            # Counted, never assumed from the scheme: groups with rows on both sides of this fold.
            row["groups_on_both_sides"] = int(validation_groups.isin(set(data.loc[training, spec["group"]])).sum())
        if task == "classification":
            counts = sub[spec["target"]].value_counts()
            for label in sorted(data[spec["target"]].unique(), key=str):
                row[f"class_{label}"] = int(counts.get(label, 0))
        else:
            row["target_mean"] = float(sub[spec["target"]].mean())
            row["target_sd"] = float(sub[spec["target"]].std(ddof=1)) if len(sub) > 1 else float("nan")
        if spec.get("time"):
            times = parse_times(sub[spec["time"]], spec.get("time_unit"))
            row["time_first"], row["time_last"] = str(times.min()), str(times.max())
        rows.append(row)
    return pd.DataFrame(rows)
