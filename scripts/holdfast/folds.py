"""Fold assignment: which development row is validated in which fold of which repeat.

scikit-learn's splitters draw the folds; the stored table ``row_key, repeat, fold``
is the source of truth afterwards and is checked for the invariants every scheme
must keep.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

import numpy as np
import pandas as pd

from .dataset import KEY
from .errors import ConfigError, DataError
from .foldspec import effective_k


def check_feasible(spec: dict[str, Any], n_rows: int, target: pd.Series | None, groups: pd.Series | None) -> None:
    """Refuse fold settings that cannot work on this data, before any work is done."""
    n_groups = int(groups.nunique()) if groups is not None else None
    if spec["scheme"] == "leave_one_group_out" and (n_groups or 0) < 2:
        raise ConfigError(f"folds.scheme leave_one_group_out needs at least 2 groups in the development rows, there "
                          f"are {n_groups or 0}; use another scheme")
    k, scheme = effective_k(spec, n_rows, n_groups), spec["scheme"]
    if scheme == "loo" and n_rows < 2:
        raise ConfigError(f"folds.scheme loo needs at least 2 development rows, there are {n_rows}; add data")
    if k > n_rows:
        raise ConfigError(f"config key 'folds.k' is {k} but there are only {n_rows} development rows; lower folds.k")
    if scheme in ("stratified", "stratified_group"):
        assert target is not None
        counts = target.value_counts()
        if k > int(counts.min()):
            raise ConfigError(f"config key 'folds.k' is {k} but class '{counts.idxmin()}' of '{target.name}' has only "
                              f"{int(counts.min())} development rows; lower folds.k to at most {int(counts.min())} "
                              "or use folds.scheme: kfold")
    if scheme in ("group", "stratified_group"):
        assert groups is not None
        n_groups = int(groups.nunique())
        if k > n_groups:
            raise ConfigError(f"config key 'folds.k' is {k} but group column '{groups.name}' has only {n_groups} "
                              f"groups in the development rows; lower folds.k to at most {n_groups}")


def _splits(spec: dict[str, Any], repeat: int, n: int, target: pd.Series | None,
            groups: pd.Series | None) -> Iterator[np.ndarray]:
    """Yield the validation indices of each fold of one repeat."""
    from sklearn.model_selection import (
        GroupKFold,
        KFold,
        LeaveOneGroupOut,
        LeaveOneOut,
        StratifiedGroupKFold,
        StratifiedKFold,
    )

    seed = int(spec["seed"]) + repeat
    k = effective_k(spec, n, int(groups.nunique()) if groups is not None else None)
    placeholder = np.zeros((n, 1))
    scheme = spec["scheme"]
    if scheme == "loo":  # reference: sklearn.model_selection.LeaveOneOut (fold i validates row i)
        splits = LeaveOneOut().split(placeholder)
    elif scheme == "leave_one_group_out":  # fold i validates the i-th group in sorted order
        assert groups is not None
        splits = LeaveOneGroupOut().split(placeholder, groups=groups.to_numpy())
    elif scheme == "kfold":
        splits = KFold(n_splits=k, shuffle=True, random_state=seed).split(placeholder)
    elif scheme == "stratified":
        assert target is not None
        splits = StratifiedKFold(n_splits=k, shuffle=True, random_state=seed).split(placeholder, target.to_numpy())
    elif scheme == "group":
        assert groups is not None
        splits = GroupKFold(n_splits=k, shuffle=True, random_state=seed).split(placeholder, groups=groups.to_numpy())
    elif scheme == "stratified_group":
        assert target is not None and groups is not None
        splitter = StratifiedGroupKFold(n_splits=k, shuffle=True, random_state=seed)
        splits = splitter.split(placeholder, target.to_numpy(), groups=groups.to_numpy())
    else:
        raise ConfigError(f"config key 'folds.scheme': unknown scheme {scheme!r}; use kfold, stratified or group")
    for _, validation in splits:
        yield validation


def _small_uint(limit: int) -> str:
    return "uint8" if limit < 2**8 else "uint16" if limit < 2**16 else "uint32"


def assign(dev: pd.DataFrame, spec: dict[str, Any], target_col: str, group_col: str | None) -> pd.DataFrame:
    """Draw the fold table for the development rows (in their stored order)."""
    target = dev[target_col] if spec["scheme"] in ("stratified", "stratified_group") else None
    groups = dev[group_col] if group_col else None
    check_feasible(spec, len(dev), target, groups)
    keys = dev[KEY].to_numpy()
    parts = []
    for repeat in range(int(spec["repeats"])):
        fold_of = np.full(len(dev), -1, dtype=np.int64)
        for fold, validation in enumerate(_splits(spec, repeat, len(dev), target, groups)):
            fold_of[validation] = fold
        parts.append(pd.DataFrame({KEY: keys, "repeat": repeat, "fold": fold_of}))
    for repeat in range(1, len(parts)):
        if np.array_equal(parts[repeat]["fold"].to_numpy(), parts[0]["fold"].to_numpy()):
            raise ConfigError(f"config key 'folds.repeats': repeat {repeat} of scheme {spec['scheme']} gives the same "
                              "folds as repeat 0 (its shuffle only reorders groups with tied class shares), so the "
                              "repeats would add nothing; use repeats: 1 or another scheme")
    table = pd.concat(parts, ignore_index=True)
    table["repeat"] = table["repeat"].astype(_small_uint(int(spec["repeats"])))
    n_groups = int(groups.nunique()) if groups is not None else None
    table["fold"] = table["fold"].astype(_small_uint(effective_k(spec, len(dev), n_groups)))
    return table


def check(table: pd.DataFrame, dev_keys: pd.Series, test_keys: set[str] | None, spec: dict[str, Any],
          groups: pd.Series | None = None) -> None:
    """Check the invariants: every dev row validated once per repeat, no empty fold,
    no group on both sides of a fold, no test key anywhere. Raises DataError naming the fold."""
    dev_set = set(map(str, dev_keys))
    scheme = spec["scheme"]
    k = effective_k(spec, len(dev_set), int(groups.nunique()) if groups is not None else None)
    if test_keys:
        leaked = set(table[KEY]) & test_keys
        if leaked:
            raise DataError(f"folds ({scheme}) name {len(leaked)} sealed test row(s), e.g. {sorted(leaked)[0]!r}; "
                            "the fold table is corrupt: start a new experiment")
    unknown = set(table[KEY]) - dev_set
    if unknown:
        raise DataError(f"folds ({scheme}) name {len(unknown)} row(s) not in the development set; rebuild the folds")
    group_of = dict(zip(map(str, dev_keys), groups.to_numpy(), strict=True)) if groups is not None else None
    for repeat, part in table.groupby("repeat", sort=True):
        counts = part[KEY].value_counts()
        if len(counts) != len(dev_set) or int(counts.max()) != 1:
            raise DataError(f"folds ({scheme}), repeat {repeat}: {len(dev_set) - len(counts)} development row(s) are "
                            "never validated or some are validated twice; rebuild the folds")
        sizes = part["fold"].value_counts()
        for fold in range(k):
            if int(sizes.get(fold, 0)) == 0:
                raise DataError(f"folds ({scheme}), repeat {repeat}, fold {fold} is empty (0 rows); lower folds.k")
        if group_of is not None and scheme in ("group", "stratified_group", "leave_one_group_out"):
            fold_groups = part.assign(g=part[KEY].map(group_of)).groupby("g")["fold"].nunique()
            split = fold_groups[fold_groups > 1]
            if len(split):
                raise DataError(f"folds ({scheme}), repeat {repeat}: group '{split.index[0]}' is in "
                                f"{int(split.iloc[0])} folds (on both sides of a split); rebuild the folds")


def leakage_report(dev: pd.DataFrame, table: pd.DataFrame, spec: dict[str, Any], task: str,
                   settings: dict[str, Any], manifest: dict[str, Any], summary_path: str) -> dict[str, Any]:
    """Write folds_summary.parquet and return leakage.json's content; duplicates may be an error."""
    from ._io import write_parquet
    from .leakage import fold_summary

    summary = fold_summary(dev, table, spec, task)
    within = int(summary["duplicates_with_training"].sum())
    if within and settings.get("duplicates") == "error":
        worst = summary.sort_values("duplicates_with_training").iloc[-1]
        raise DataError(f"folds: {within} validation row(s) repeat the features of a training row (most in repeat "
                        f"{worst['repeat']}, fold {worst['fold']}: {worst['duplicates_with_training']}); "
                        "remove duplicate rows or set leakage.duplicates: warn")
    write_parquet(summary_path, summary)
    at_seal = manifest.get("leakage", {})
    lines = [f"leakage: {at_seal.get('duplicate_feature_rows_dev_test', 0)} test row(s) duplicate development rows; "
             f"{within} validation row(s) duplicate training rows across folds; group overlap: none"]
    lines += [f"leakage warning: feature '{a['feature']}' alone reaches {a['measure']} {a['value']:.3f}"
              for a in at_seal.get("single_feature", [])]
    missing = []
    for column in [c for c in summary.columns if str(c).startswith("class_")]:
        for _, row in summary[summary[column] == 0].iterrows():
            missing.append({"repeat": int(row["repeat"]), "fold": int(row["fold"]), "class": column[len("class_"):]})
    lines += [f"fold warning: class '{m['class']}' is missing from the validation rows of repeat {m['repeat']}, "
              f"fold {m['fold']}; its scores for that class are undefined" for m in missing]
    return {
        "duplicate_feature_rows_dev_test": at_seal.get("duplicate_feature_rows_dev_test"),
        "duplicate_feature_rows_within_folds": within,
        "duplicates_mode": settings.get("duplicates", "warn"),
        "group_overlap": "none (checked for every fold)" if spec.get("group") else "no group column",
        "single_feature": at_seal.get("single_feature", []),
        "single_feature_threshold": at_seal.get("single_feature_threshold"),
        "classes_missing_from_validation": missing,
        "summary": "\n".join(lines),
    }
