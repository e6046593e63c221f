"""Fold assignment: which development row is validated in which fold of which repeat.

scikit-learn's splitters draw the folds; the stored table ``row_key, repeat, fold``
is the source of truth afterwards and is checked for the invariants every scheme
must keep.
"""

from __future__ import annotations

import math
from collections.abc import Iterator
from typing import Any

import numpy as np
import pandas as pd

from .dataset import KEY, key_positions, parse_times, shared_keys
from .errors import ConfigError, DataError
from .foldspec import COMPLETE, FORWARD, GROUPED, HOLDOUT, STRATIFIED, effective_k, repeats
from .leakage import RowIdentity, feature_identity


def _holdout_sizes(fraction: float, n: int) -> tuple[int, int]:
    """(validation, training) rows of a holdout, as ShuffleSplit counts them (ceil for validation)."""
    n_val = math.ceil(fraction * n)
    return n_val, n - n_val


def _forward_window(spec: dict[str, Any], units: int) -> int:
    return int(spec["window"]) if spec.get("window") else units // (int(spec["k"]) + 1)


def check_feasible(spec: dict[str, Any], n_rows: int, target: pd.Series | None, groups: pd.Series | None) -> None:
    """Refuse fold settings that cannot work on this data, before any work is done."""
    n_groups = int(groups.nunique()) if groups is not None else None
    scheme = spec["scheme"]
    if scheme == "leave_one_group_out" and (n_groups or 0) < 2:
        raise ConfigError(f"folds.scheme leave_one_group_out needs at least 2 groups in the development rows, there "
                          f"are {n_groups or 0}; use another scheme")
    if scheme in HOLDOUT:
        n_val, n_train = _holdout_sizes(float(spec["fraction"]), n_rows)
        if n_val < 2 or n_train < 2:
            raise ConfigError(f"config key 'folds.fraction' is {spec['fraction']}: with {n_rows} development rows it "
                              f"leaves {n_val} validation and {n_train} training row(s), fewer than 2 on a side; "
                              "choose a fraction nearer 0.5 or use kfold")
        if scheme == "stratified_holdout":
            assert target is not None
            counts = target.value_counts()
            _check_class_sizes(counts, target, scheme)
            if min(n_val, n_train) < len(counts):
                raise ConfigError(f"config key 'folds.fraction' is {spec['fraction']}: stratified_holdout needs every "
                                  f"one of the {len(counts)} classes on both sides, but class '{counts.idxmin()}' "
                                  f"has {int(counts.min())} row(s) and the smaller side {min(n_val, n_train)}; use "
                                  "folds.scheme: holdout or a fraction nearer 0.5")
        return
    if scheme in FORWARD:
        units, what = (n_groups, "groups") if scheme == "forward_group" else (n_rows, "rows")
        assert units is not None
        k, gap, least = int(spec["k"]), int(spec["gap"]), int(spec["min_train"])
        window = _forward_window(spec, units)
        first_train = units - k * window - gap
        if window < 1:
            raise ConfigError(f"folds ({scheme}): {units} development {what} cannot fill {k} validation windows "
                              "of at least 1; lower folds.k")
        if first_train < least:
            raise ConfigError(f"folds ({scheme}): with {units} development {what}, k={k} windows of {window} and a "
                              f"gap of {gap}, fold 0 would train on {max(first_train, 0)} {what}, fewer than "
                              f"folds.min_train={least}; lower folds.k, folds.window or folds.gap")
        return
    k = effective_k(spec, n_rows, n_groups)
    if scheme == "loo" and n_rows < 2:
        raise ConfigError(f"folds.scheme loo needs at least 2 development rows, there are {n_rows}; add data")
    if k > n_rows:
        raise ConfigError(f"config key 'folds.k' is {k} but there are only {n_rows} development rows; lower folds.k")
    if scheme in ("stratified", "stratified_group"):
        assert target is not None
        counts = target.value_counts()
        _check_class_sizes(counts, target, scheme)
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


def _check_class_sizes(counts: pd.Series, target: pd.Series, scheme: str) -> None:
    """A stratified scheme needs every class on both sides: a class with one development row cannot be."""
    if int(counts.min()) >= 2:
        return
    alone = sorted(map(str, counts.index[counts < 2]))
    other = {"stratified_group": "group", "stratified_holdout": "holdout"}.get(scheme, "kfold")
    more = f" (and {len(alone) - 1} more class(es) too)" if len(alone) > 1 else ""
    raise ConfigError(f"folds.scheme {scheme} needs at least 2 development rows per class but class '{alone[0]}' of "
                      f"'{target.name}' has 1{more}; remove or merge that class's rows in the data file (before the "
                      f"seal), or use folds.scheme: {other}")


def _splits(spec: dict[str, Any], repeat: int, n: int, target: pd.Series | None,
            groups: pd.Series | None) -> Iterator[np.ndarray]:
    """Yield the validation indices of each fold of one repeat (complete and holdout schemes)."""
    from sklearn.model_selection import (
        GroupKFold,
        KFold,
        LeaveOneGroupOut,
        LeaveOneOut,
        ShuffleSplit,
        StratifiedGroupKFold,
        StratifiedKFold,
        StratifiedShuffleSplit,
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
    elif scheme == "holdout":
        splits = ShuffleSplit(n_splits=1, test_size=float(spec["fraction"]), random_state=seed).split(placeholder)
    elif scheme == "stratified_holdout":
        assert target is not None
        splitter = StratifiedShuffleSplit(n_splits=1, test_size=float(spec["fraction"]), random_state=seed)
        splits = splitter.split(placeholder, target.to_numpy())
    else:
        raise ConfigError(f"config key 'folds.scheme': unknown scheme {scheme!r}; see config/README.md")
    for _, validation in splits:
        yield validation


def time_order(dev: pd.DataFrame, time_col: str, time_unit: str | None = None) -> np.ndarray:
    """Positions of the development rows sorted by time; ties keep their stored order."""
    times = parse_times(dev[time_col], time_unit).to_numpy()
    return np.argsort(times, kind="stable")


def _forward(dev: pd.DataFrame, spec: dict[str, Any], time_col: str, group_col: str | None,
             time_unit: str | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Fold (−1: never validated) and train_from (k: never trained on) of every dev row for forward folds.

    The cuts are those of scikit-learn's TimeSeriesSplit(n_splits=k, test_size=window, gap=gap) on the
    rows (forward) or groups (forward_group) in time order. On purpose we also drop from a fold's training
    part every row (group) not strictly earlier than the window's first time, so equal timestamps never
    straddle a cut; with distinct times the folds equal TimeSeriesSplit's.
    """
    times = parse_times(dev[time_col], time_unit).to_numpy()
    k, gap = int(spec["k"]), int(spec["gap"])
    if group_col is None:
        unit_of = np.empty(len(dev), dtype=np.int64)
        unit_of[time_order(dev, time_col, time_unit)] = np.arange(len(dev))  # each row is its own unit, in time order
        first = last = times[np.argsort(unit_of)]
    else:
        frame = pd.DataFrame({"g": dev[group_col].astype(str).to_numpy(), "t": times})
        spans = frame.groupby("g")["t"].agg(["min", "max"])
        spans = spans.reset_index().sort_values(["min", "max", "g"], kind="stable").reset_index(drop=True)
        unit_of = frame["g"].map(pd.Series(spans.index, index=spans["g"])).to_numpy(dtype=np.int64)
        first, last = spans["min"].to_numpy(), spans["max"].to_numpy()
    units = len(first)
    window = _forward_window(spec, units)
    starts = [units - (k - f) * window for f in range(k)]
    unit_fold = np.full(units, -1, dtype=np.int64)
    unit_train = np.full(units, k, dtype=np.int64)
    for f in reversed(range(k)):
        start = starts[f]
        unit_fold[start:start + window] = f
        window_first = first[start:start + window].min()
        allowed = (np.arange(units) < start - gap) & (last < window_first)
        unit_train[allowed] = f
    return unit_fold[unit_of], unit_train[unit_of]


def _small_uint(limit: int) -> str:
    return "uint8" if limit < 2**8 else "uint16" if limit < 2**16 else "uint32"


def assign(dev: pd.DataFrame, spec: dict[str, Any], target_col: str, group_col: str | None,
           time_col: str | None = None, time_unit: str | None = None) -> pd.DataFrame:
    """Draw the fold table ``row_key, repeat, fold, train_from`` for the development rows.

    A row is validated in fold ``fold`` of its repeat (null: in no fold) and is in the training part
    of fold f exactly when it is not validated there and ``train_from <= f``. For every scheme but the
    forward ones train_from is 0, so training is the rest of the development rows.
    """
    scheme = spec["scheme"]
    target = dev[target_col] if scheme in STRATIFIED else None
    groups = dev[group_col] if group_col and scheme in GROUPED else None
    check_feasible(spec, len(dev), target, groups)
    keys = dev[KEY].array  # the column's own (Arrow) strings, not one Python object per row
    parts = []
    k = effective_k(spec, len(dev), int(groups.nunique()) if groups is not None else None)
    for repeat in range(repeats(spec)):
        train_from = np.zeros(len(dev), dtype=np.int64)
        if scheme in FORWARD:
            if time_col is None:
                raise ConfigError(f"folds.scheme {scheme} needs data.time; name the time column")
            fold_of, train_from = _forward(dev, spec, time_col, group_col if scheme == "forward_group" else None,
                                           time_unit)
        else:
            fold_of = np.full(len(dev), -1, dtype=np.int64)
            for fold, validation in enumerate(_splits(spec, repeat, len(dev), target, groups)):
                fold_of[validation] = fold
        parts.append(pd.DataFrame({KEY: keys, "repeat": repeat, "fold": fold_of, "train_from": train_from}))
    for repeat in range(1, len(parts)):
        if np.array_equal(parts[repeat]["fold"].to_numpy(), parts[0]["fold"].to_numpy()):
            raise ConfigError(f"config key 'folds.repeats': repeat {repeat} of scheme {scheme} gives the same "
                              "folds as repeat 0 (its shuffle only reorders groups with tied class shares), so the "
                              "repeats would add nothing; use repeats: 1 or another scheme")
    table = pd.concat(parts, ignore_index=True)
    table["repeat"] = table["repeat"].astype(_small_uint(repeats(spec)))
    fold_type = "UI" + _small_uint(k)[2:]  # nullable UInt: null = validated in no fold
    table["fold"] = table["fold"].astype("Int64").where(table["fold"] >= 0).astype(fold_type)
    table["train_from"] = table["train_from"].astype(_small_uint(k + 1))
    return table


class RepeatFolds:
    """One repeat's rows of the fold table, read once, giving each fold's (training, validation) masks."""

    def __init__(self, part: pd.DataFrame) -> None:
        self.validated = part["fold"].to_numpy(dtype="float64", na_value=np.nan)
        self.train_from = (part["train_from"].to_numpy() if "train_from" in part
                           else np.zeros(len(part), dtype=np.int64))

    def masks(self, fold: int) -> tuple[np.ndarray, np.ndarray]:
        """(training, validation) of one fold: validated there; trained on when not, and train_from <= fold."""
        validation = self.validated == fold
        training = ~validation & (self.train_from <= fold)
        return training, validation


def fold_masks(part: pd.DataFrame, fold: int) -> tuple[np.ndarray, np.ndarray]:
    """(training, validation) masks over one repeat's rows of the fold table for one fold."""
    return RepeatFolds(part).masks(fold)


def _positions(dev_keys: pd.Series, keys: pd.Series) -> np.ndarray:
    """Position of each key among the development rows (−1: not a development row)."""
    dev_keys, keys = dev_keys.reset_index(drop=True), keys.reset_index(drop=True)
    if len(keys) == len(dev_keys) and keys.dtype == dev_keys.dtype and keys.equals(dev_keys):
        return np.arange(len(keys))  # the table lists the rows in development order, as assign writes it
    return key_positions(dev_keys, keys)


def _utc_values(times: pd.Series) -> np.ndarray:
    """Parsed UTC times as plain datetime64 values (comparable without a Python object per row)."""
    return times.dt.tz_convert("UTC").dt.tz_localize(None).to_numpy()


def check(table: pd.DataFrame, dev_keys: pd.Series, test_keys: Any, spec: dict[str, Any],
          groups: pd.Series | None = None, times: pd.Series | None = None, time_unit: str | None = None) -> None:
    """Check the invariants; raise DataError naming the scheme, repeat, fold and count.

    Every scheme: each dev row listed once per repeat, no test key, no empty fold, training and
    validation disjoint and both non-empty. Complete schemes: every row validated exactly once per
    repeat. Grouped schemes: no group on both sides of any fold. Forward schemes: every training row
    strictly earlier than the fold's first validation row, with at least the gap between them.
    ``test_keys``: the sealed row keys (a set, list or Series), or None.
    """
    dev_keys = pd.Series(dev_keys).reset_index(drop=True).astype(str)
    n_dev = len(dev_keys)  # unique: the seal made them so
    scheme = spec["scheme"]
    k = effective_k(spec, n_dev, int(groups.nunique()) if groups is not None else None)
    if test_keys is not None and len(test_keys):
        leaked = shared_keys(table[KEY], test_keys)
        if leaked:
            raise DataError(f"folds ({scheme}) name {len(leaked)} sealed test row(s), e.g. {sorted(leaked)[0]!r}; "
                            "the fold table is corrupt: start a new experiment")
    repeats_of = [(repeat, part.reset_index(drop=True)) for repeat, part in table.groupby("repeat", sort=True)]
    where_of = [_positions(dev_keys, part[KEY].astype(str)) for _, part in repeats_of]
    unknown = pd.concat([part[KEY][where < 0] for (_, part), where in zip(repeats_of, where_of, strict=True)]).nunique()
    if unknown:
        raise DataError(f"folds ({scheme}) name {unknown} row(s) not in the development set; rebuild the folds")
    group_codes, group_names = (pd.factorize(groups.astype(str).reset_index(drop=True), use_na_sentinel=False)
                                if groups is not None else (None, None))
    parsed = parse_times(times, time_unit).reset_index(drop=True) if times is not None else None
    stamps = _utc_values(parsed) if parsed is not None else None
    for (repeat, part), where in zip(repeats_of, where_of, strict=True):
        counts = np.bincount(where, minlength=n_dev)
        distinct = int((counts > 0).sum())
        if distinct != n_dev or int(counts.max()) != 1:
            raise DataError(f"folds ({scheme}), repeat {repeat}: {n_dev - distinct} development row(s) "
                            "missing from the table or listed twice; rebuild the folds")
        never = int(part["fold"].isna().sum())
        if scheme in COMPLETE and never:
            raise DataError(f"folds ({scheme}), repeat {repeat}: {never} development row(s) are never validated; "
                            "rebuild the folds")
        part_groups = group_codes[where] if group_codes is not None else None
        folds_of = RepeatFolds(part)
        for fold in range(k):
            training, validation = folds_of.masks(fold)
            if not validation.any():
                raise DataError(f"folds ({scheme}), repeat {repeat}, fold {fold} is empty (0 rows); lower folds.k")
            if not training.any():
                raise DataError(f"folds ({scheme}), repeat {repeat}, fold {fold} has no training rows; lower folds.k")
            if part_groups is not None and scheme in GROUPED:
                assert group_names is not None
                trained = np.zeros(len(group_names), dtype=bool)
                trained[part_groups[training]] = True
                both = np.unique(part_groups[validation][trained[part_groups[validation]]])
                if both.size:
                    raise DataError(f"folds ({scheme}), repeat {repeat}, fold {fold}: {both.size} group(s) on both "
                                    f"sides, e.g. '{sorted(str(g) for g in group_names[both])[0]}'; rebuild the folds")
            if scheme in FORWARD and stamps is not None:
                assert parsed is not None
                first_shown = parsed.iloc[where[validation]].min()
                _check_forward(stamps[where], training, validation, first_shown, part_groups, spec, int(repeat), fold)


def _check_forward(stamps: np.ndarray, training: np.ndarray, validation: np.ndarray, first_shown: Any,
                   groups: np.ndarray | None, spec: dict[str, Any], repeat: int, fold: int) -> None:
    """Training strictly earlier than validation, with at least ``gap`` rows (groups) between them.

    ``stamps`` and ``groups``: the times and group codes of the repeat's rows; ``first_shown``: the
    first validation time as the message shows it.
    """
    scheme = spec["scheme"]
    train_times, val_times = stamps[training], stamps[validation]
    first = val_times.min()
    later = int((train_times >= first).sum())
    if later:
        raise DataError(f"folds ({scheme}), repeat {repeat}, fold {fold}: {later} training row(s) are not earlier "
                        f"than the first validation time {first_shown}; rebuild the folds")
    between = (stamps > train_times.max()) & (stamps < first)
    count = (int(np.unique(groups[between]).size) if scheme == "forward_group" and groups is not None
             else int(between.sum()))
    if count < int(spec["gap"]):
        raise DataError(f"folds ({scheme}), repeat {repeat}, fold {fold}: only {count} row(s)/group(s) lie between "
                        f"the last training time and the first validation time, fewer than folds.gap="
                        f"{spec['gap']}; rebuild the folds")


def time_overlap(dev: pd.DataFrame, table: pd.DataFrame, time_col: str,
                 time_unit: str | None = None) -> list[dict[str, Any]]:
    """Per fold of a scheme that ignores time: training rows later than the fold's first validation row."""
    times = _utc_values(parse_times(dev[time_col], time_unit).reset_index(drop=True))
    out = []
    for repeat, part in table.groupby("repeat", sort=True):
        part = part.reset_index(drop=True)
        stamps = times[_positions(dev[KEY], part[KEY])]
        folds_of = RepeatFolds(part)
        for fold in sorted(part["fold"].dropna().unique()):
            training, validation = folds_of.masks(int(fold))
            later = int((stamps[training] > stamps[validation].min()).sum())
            if later:
                out.append({"repeat": int(repeat), "fold": int(fold), "training_rows_later": later,
                            "training_rows": int(training.sum())})
    return out


def fold_summary(dev: pd.DataFrame, folds: pd.DataFrame, spec: dict[str, Any], task: str,
                 identity: RowIdentity | None = None) -> pd.DataFrame:
    """Per repeat and fold: validation rows, groups (and how many also train), class counts or target mean/sd,
    time range, duplicates. ``identity``: :func:`leakage.feature_identity` of ``dev``, if already computed."""
    identity = identity if identity is not None else feature_identity(dev, spec)
    target = dev[spec["target"]].reset_index(drop=True)
    group_codes = (pd.factorize(dev[spec["group"]].reset_index(drop=True), use_na_sentinel=False)[0]
                   if spec.get("group") else None)
    labels = sorted(target.unique(), key=str) if task == "classification" else []
    label_codes = pd.Index(labels).get_indexer(target) if labels else None
    times = (parse_times(dev[spec["time"]], spec.get("time_unit")).reset_index(drop=True)
             if spec.get("time") else None)
    rows = []
    for repeat, part in folds.groupby("repeat", sort=True):
        part = part.reset_index(drop=True)
        where = _positions(dev[KEY], part[KEY])
        folds_of = RepeatFolds(part)
        for fold in sorted(int(f) for f in part["fold"].dropna().unique()):
            training, validation = folds_of.masks(fold)
            val, train = where[validation], where[training]
            row: dict[str, Any] = {"repeat": int(repeat), "fold": fold, "rows": len(val), "training_rows": len(train),
                                   "duplicates_with_training": identity.repeated(train, val)}
            if group_codes is not None:
                validation_groups = np.unique(group_codes[val])
                trained = np.zeros(int(group_codes.max()) + 1, dtype=bool)
                trained[group_codes[train]] = True
                row["groups"] = len(validation_groups)
                # Counted, never assumed from the scheme: groups with rows on both sides of this fold.
                row["groups_on_both_sides"] = int(trained[validation_groups].sum())
            if label_codes is not None:
                counts = np.bincount(label_codes[val], minlength=len(labels))
                for j, label in enumerate(labels):
                    row[f"class_{label}"] = int(counts[j])
            else:
                sub = target.iloc[val]
                row["target_mean"] = float(sub.mean())
                row["target_sd"] = float(sub.std(ddof=1)) if len(sub) > 1 else float("nan")
            if times is not None:
                shown = times.iloc[val]
                row["time_first"], row["time_last"] = str(shown.min()), str(shown.max())
            rows.append(row)
    return pd.DataFrame(rows)


def scheme_ignores_time(fold_spec: dict[str, Any]) -> bool:
    """True for fold schemes that may train on rows later than the ones they validate."""
    return fold_spec["scheme"] not in FORWARD


def group_overlap(dev: pd.DataFrame, summary: pd.DataFrame, spec: dict[str, Any], fold_spec: dict[str, Any],
                  mode: str) -> dict[str, Any] | None:
    """Groups with rows on both sides of each fold, from the fold summary's per-fold counts (None: no group column).

    A scheme that keeps groups whole always stops on a count above 0; a scheme that ignores groups is noted,
    warned about or stopped as ``leakage.group_overlap`` says.
    """
    column = spec.get("group")
    if not column:
        return None
    scheme = fold_spec["scheme"]
    counts = summary["groups_on_both_sides"]
    total = int(dev[column].nunique())
    found: dict[str, Any] = {
        "column": column, "scheme": scheme, "scheme_keeps_groups": scheme in GROUPED, "mode": mode,
        "groups": total, "folds_with_overlap": int((counts > 0).sum()), "most_in_a_fold": int(counts.max()),
        "folds": [{"repeat": int(r["repeat"]), "fold": int(r["fold"]), "validation_groups": int(r["groups"]),
                   "groups_on_both_sides": int(r["groups_on_both_sides"])} for _, r in summary.iterrows()],
        "text": f"0 of {total} group(s) of '{column}' on both sides of any of the {len(summary)} fold(s) "
                "(counted per fold)", "warning": None}
    if not found["folds_with_overlap"]:
        return found
    worst = summary.loc[counts.idxmax()]
    found["text"] = (f"in {found['folds_with_overlap']} of {len(summary)} fold(s) groups of '{column}' have rows on "
                     f"both sides (most in repeat {int(worst['repeat'])}, fold {int(worst['fold'])}: "
                     f"{int(worst['groups_on_both_sides'])} of its {int(worst['groups'])} validation group(s); "
                     f"{total} group(s) in all)")
    if scheme in GROUPED:
        raise DataError(f"folds ({scheme}): {found['text']}, though the scheme keeps groups whole; rebuild the folds")
    message = f"folds.scheme {scheme} ignores data.group: {found['text']}"
    keeps = ("forward_group (whole groups per fold, in time order)" if scheme == "forward" else
             "group or stratified_group (whole groups per fold)")
    if mode == "error":
        raise DataError(f"{message}; use folds.scheme: {keeps}, or set leakage.group_overlap: warn")
    if mode == "warn":
        found["warning"] = f"{message}; if the model will meet new groups, use folds.scheme: {keeps}"
    return found


def leakage_report(dev: pd.DataFrame, table: pd.DataFrame, spec: dict[str, Any], task: str,
                   settings: dict[str, Any], manifest: dict[str, Any], summary_path: str,
                   fold_spec: dict[str, Any] | None = None, identity: RowIdentity | None = None) -> dict[str, Any]:
    """Write folds_summary.parquet and return leakage.json's content; duplicates and group overlap may be errors.

    ``identity``: :func:`leakage.feature_identity` of ``dev``, if already computed.
    """
    from ._io import write_parquet

    fold_spec = fold_spec or {"scheme": "kfold"}
    summary = fold_summary(dev, table, spec, task, identity)
    within = int(summary["duplicates_with_training"].sum())
    if within and settings.get("duplicates") == "error":
        worst = summary.sort_values("duplicates_with_training").iloc[-1]
        raise DataError(f"folds: {within} validation row(s) repeat the features of a training row (most in repeat "
                        f"{worst['repeat']}, fold {worst['fold']}: {worst['duplicates_with_training']}); "
                        "remove duplicate rows or set leakage.duplicates: warn")
    at_seal = manifest.get("leakage", {})
    groups = group_overlap(dev, summary, spec, fold_spec, settings.get("group_overlap", "warn"))
    lines = [f"leakage: {at_seal.get('duplicate_feature_rows_dev_test', 0)} test row(s) duplicate development rows; "
             f"{within} validation row(s) duplicate training rows across folds; "
             f"group overlap: {groups['text'] if groups else 'no group column'}"]
    if groups and groups["warning"]:
        lines.append(f"leakage warning: {groups['warning']}")
    lines += [f"leakage warning: feature '{a['feature']}' alone reaches {a['measure']} {a['value']:.3f}"
              for a in at_seal.get("single_feature", [])]
    mode = settings.get("time_order", "note")
    seal_time = at_seal.get("time_order")
    if seal_time and seal_time.get("dev_rows_after_first_test") and mode == "warn":
        lines.append(f"leakage warning: test.scheme {seal_time['scheme']} ignores time: "
                     f"{seal_time['dev_rows_after_first_test']} development row(s) are later than the earliest test "
                     f"row ({seal_time['share']:.0%}); if the model will forecast, use test.scheme: time_tail")
    fold_time = None
    if spec.get("time") and scheme_ignores_time(fold_spec):
        overlap = time_overlap(dev, table, spec["time"], spec.get("time_unit"))
        fold_time = {"column": spec["time"], "scheme": fold_spec["scheme"], "folds": overlap,
                     "training_rows_later": sum(o["training_rows_later"] for o in overlap)}
        if overlap and mode != "note":
            worst = max(overlap, key=lambda o: o["training_rows_later"])
            message = (f"folds.scheme {fold_spec['scheme']} ignores time: in {len(overlap)} "
                       f"fold(s) training rows are later than validation rows (most in repeat {worst['repeat']}, "
                       f"fold {worst['fold']}: {worst['training_rows_later']} of {worst['training_rows']})")
            if mode == "error":
                raise DataError(f"{message}; use folds.scheme: forward or set leakage.time_order: note")
            lines.append(f"leakage warning: {message}; if the model will forecast, use folds.scheme: forward")
    missing = []
    for column in [c for c in summary.columns if str(c).startswith("class_")]:
        for _, row in summary[summary[column] == 0].iterrows():
            missing.append({"repeat": int(row["repeat"]), "fold": int(row["fold"]), "class": column[len("class_"):]})
    lines += [f"fold warning: class '{m['class']}' is missing from the validation rows of repeat {m['repeat']}, "
              f"fold {m['fold']}; its scores for that class are undefined" for m in missing]
    write_parquet(summary_path, summary)
    return {
        "duplicate_feature_rows_dev_test": at_seal.get("duplicate_feature_rows_dev_test"),
        "duplicate_feature_rows_within_folds": within,
        "duplicates_mode": settings.get("duplicates", "warn"),
        "group_overlap": {k: v for k, v in groups.items() if k not in ("text", "warning")} if groups else None,
        "single_feature": at_seal.get("single_feature", []),
        "single_feature_threshold": at_seal.get("single_feature_threshold"),
        "classes_missing_from_validation": missing,
        "time_order_at_seal": seal_time,
        "time_order_in_folds": fold_time,
        "summary": "\n".join(lines),
    }
