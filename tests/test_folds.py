"""Fold assignment: invariants shared by every scheme, reference equality, and refusals."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from holdfast.errors import ConfigError, DataError
from holdfast.folds import assign, check, check_feasible, fold_masks

SCHEMES = [("kfold", 1), ("kfold", 3), ("stratified", 1), ("stratified", 2), ("group", 1), ("group", 3),
           ("stratified_group", 1), ("leave_one_group_out", 1), ("loo", 1), ("holdout", 1), ("holdout", 3),
           ("stratified_holdout", 2), ("forward", 1), ("forward_group", 1)]
COMPLETE = {"kfold", "stratified", "group", "stratified_group", "leave_one_group_out", "loo"}
GROUPED = {"group", "stratified_group", "leave_one_group_out", "forward_group"}
FORWARD = {"forward", "forward_group"}


def dev_frame(n: int = 240, seed: int = 0) -> pd.DataFrame:
    """Development rows with a key, a binary target, 12 groups of unequal size and a shuffled time column.

    Each group is one calendar week (as with weekly batches), so forward_group has groups that do not
    overlap in time; the rows are stored in random order, so nothing may rely on the stored order.
    """
    rng = np.random.default_rng(seed)
    weights = np.linspace(1, 3, 12)
    y = (rng.random(n) < 0.3).astype(int)
    group = rng.choice(12, size=n, p=weights / weights.sum())
    x = rng.normal(size=n)
    hours = group * 24 * 7 + rng.integers(0, 24 * 7, size=n)
    return pd.DataFrame({
        "row_key": [f"k{i:05d}" for i in range(n)],
        "y": y,
        "g": [f"route{i}" for i in group],
        "t": pd.Timestamp("2025-01-06", tz="UTC") + pd.to_timedelta(hours, unit="h"),
        "x": x,
    })


def spec(scheme: str, repeats: int, k: int = 4, seed: int = 7, **extra: object) -> dict[str, object]:
    base: dict[str, object] = {"scheme": scheme, "k": k, "repeats": repeats, "seed": seed, "fraction": 0.2,
                               "window": None, "gap": 0, "min_train": 1}
    if scheme in FORWARD:
        base["gap"] = 1
    return {**base, **extra}


def n_folds(scheme: str, dev: pd.DataFrame) -> int:
    return {"leave_one_group_out": int(dev["g"].nunique()), "loo": len(dev), "holdout": 1,
            "stratified_holdout": 1}.get(scheme, 4)


@pytest.mark.parametrize(("scheme", "repeats"), SCHEMES)
def test_invariants_hold_for_every_scheme(scheme: str, repeats: int) -> None:
    """The same checks for every scheme, written here independently of holdfast.folds.check."""
    dev = dev_frame(60 if scheme == "loo" else 240)
    setting = spec(scheme, repeats)
    table = assign(dev, setting, "y", "g", "t")
    assert list(table.columns) == ["row_key", "repeat", "fold", "train_from"]
    assert str(table["fold"].dtype) in ("UInt8", "UInt16") and table["repeat"].dtype == np.uint8
    test_keys = {"t1", "t2"}
    check(table, dev["row_key"], test_keys, setting, dev["g"], dev["t"])  # raises on any violation
    group_of = dict(zip(dev["row_key"], dev["g"], strict=True))
    time_of = dict(zip(dev["row_key"], dev["t"], strict=True))
    order = dev.sort_values("t", kind="stable")["row_key"].tolist()
    position = {key: i for i, key in enumerate(order)}
    group_rank = {g: i for i, g in enumerate(dev.groupby("g")["t"].min().sort_values().index)}
    assert table["repeat"].nunique() == (1 if scheme in FORWARD or scheme == "loo" else repeats)
    for _, part in table.groupby("repeat"):
        part = part.reset_index(drop=True)
        assert sorted(part["row_key"]) == sorted(dev["row_key"])  # every dev row listed once per repeat
        validated_in = part["fold"].value_counts(dropna=True)
        if scheme in COMPLETE:  # each dev row validated exactly once per repeat
            assert part["fold"].notna().all() and int(validated_in.sum()) == len(dev)
        else:  # at most once: a row has one fold or none
            assert part["fold"].isna().any()
        for fold in range(n_folds(scheme, dev)):
            training_mask, validation_mask = fold_masks(part, fold)
            validation = set(part.loc[validation_mask, "row_key"])
            training = set(part.loc[training_mask, "row_key"])
            assert validation and training and not validation & training  # disjoint, non-empty
            if scheme in GROUPED:  # groups never split
                assert not {group_of[k] for k in validation} & {group_of[k] for k in training}
            if scheme in FORWARD:  # training strictly earlier, with at least the gap between
                assert max(time_of[k] for k in training) < min(time_of[k] for k in validation)
                if scheme == "forward":
                    between = min(position[k] for k in validation) - max(position[k] for k in training) - 1
                else:
                    between = (min(group_rank[group_of[k]] for k in validation)
                               - max(group_rank[group_of[k]] for k in training) - 1)
                assert between >= setting["gap"]
            if scheme not in FORWARD:  # training is every other dev row
                assert training | validation == set(dev["row_key"])
    assert not set(table["row_key"]) & test_keys


@pytest.mark.parametrize(("scheme", "repeats"), SCHEMES)
def test_same_seed_same_folds_other_seed_other_folds(scheme: str, repeats: int) -> None:
    dev = dev_frame()
    dev = dev_frame(60) if scheme == "loo" else dev
    first = assign(dev, spec(scheme, repeats), "y", "g", "t")
    assert first.equals(assign(dev, spec(scheme, repeats), "y", "g", "t"))
    if scheme not in ("stratified_group", "leave_one_group_out", "loo", *FORWARD):  # seeds play no part there
        assert not first.equals(assign(dev, spec(scheme, repeats, seed=8), "y", "g", "t"))
    if repeats > 1:  # repeats differ from each other
        by_repeat = [part["fold"].to_numpy() for _, part in first.groupby("repeat")]
        assert not np.array_equal(by_repeat[0], by_repeat[1])


def test_stratified_folds_equal_scikit_learn_stratified_kfold() -> None:
    # Reference implementation: sklearn.model_selection.StratifiedKFold(n_splits=k, shuffle=True,
    # random_state=seed + repeat) on the same rows in the same order.
    from sklearn.model_selection import StratifiedKFold

    dev = dev_frame(301, seed=3)
    table = assign(dev, spec("stratified", 2, k=5, seed=11), "y", None)
    for repeat in range(2):
        ours = table[table["repeat"] == repeat].set_index("row_key")["fold"]
        splitter = StratifiedKFold(n_splits=5, shuffle=True, random_state=11 + repeat)
        for fold, (_, validation) in enumerate(splitter.split(np.zeros((len(dev), 1)), dev["y"])):
            assert set(dev["row_key"].iloc[validation]) == set(ours[ours == fold].index)


def test_group_and_plain_folds_equal_scikit_learn() -> None:
    # Reference implementations: sklearn.model_selection.KFold and GroupKFold (shuffle=True, random_state=seed).
    from sklearn.model_selection import GroupKFold, KFold

    dev = dev_frame(200, seed=5)
    for scheme, splitter in (("kfold", KFold(4, shuffle=True, random_state=7)),
                             ("group", GroupKFold(4, shuffle=True, random_state=7))):
        table = assign(dev, spec(scheme, 1), "y", "g").set_index("row_key")["fold"]
        groups = dev["g"] if scheme == "group" else None
        for fold, (_, validation) in enumerate(splitter.split(np.zeros((len(dev), 1)), dev["y"], groups)):
            assert set(dev["row_key"].iloc[validation]) == set(table[table == fold].index)


def test_repeats_that_repeat_themselves_are_refused() -> None:
    # scikit-learn's StratifiedGroupKFold shuffles only among groups with the same class distribution, so on
    # data like this every seed gives the same folds: repeats would silently add nothing.
    dev = dev_frame()
    with pytest.raises(ConfigError, match=r"'folds.repeats': repeat 1 of scheme stratified_group gives the same"):
        assign(dev, spec("stratified_group", 2), "y", "g")


def test_stratified_group_folds_equal_scikit_learn() -> None:
    # Reference implementation: sklearn.model_selection.StratifiedGroupKFold(n_splits=k, shuffle=True,
    # random_state=seed + repeat) with the same target and groups, rows in stored order.
    from sklearn.model_selection import StratifiedGroupKFold

    dev = dev_frame(260, seed=9)
    table = assign(dev, spec("stratified_group", 1, k=4, seed=3), "y", "g")
    for repeat in range(1):
        ours = table[table["repeat"] == repeat].set_index("row_key")["fold"]
        splitter = StratifiedGroupKFold(n_splits=4, shuffle=True, random_state=3 + repeat)
        for fold, (_, validation) in enumerate(splitter.split(np.zeros((len(dev), 1)), dev["y"], dev["g"])):
            assert set(dev["row_key"].iloc[validation]) == set(ours[ours == fold].index)


def test_leave_one_group_out_equals_scikit_learn() -> None:
    # Reference implementation: sklearn.model_selection.LeaveOneGroupOut (split i holds out the i-th group).
    from sklearn.model_selection import LeaveOneGroupOut

    dev = dev_frame(150, seed=2)
    table = assign(dev, spec("leave_one_group_out", 1), "y", "g").set_index("row_key")["fold"]
    splits = list(LeaveOneGroupOut().split(np.zeros((len(dev), 1)), groups=dev["g"]))
    assert table.nunique() == len(splits) == dev["g"].nunique()
    for fold, (_, validation) in enumerate(splits):
        assert set(dev["row_key"].iloc[validation]) == set(table[table == fold].index)


def test_check_catches_each_broken_table() -> None:
    dev = dev_frame(60)
    good = assign(dev, spec("group", 1, k=3), "y", "g")
    with pytest.raises(DataError, match=r"name 1 sealed test row"):
        check(good.replace({"row_key": {"k00000": "t1"}}), dev["row_key"], {"t1"}, spec("group", 1, k=3), dev["g"])
    twice = pd.concat([good, good.iloc[:1]], ignore_index=True)
    with pytest.raises(DataError, match=r"repeat 0: .*listed twice"):
        check(twice, dev["row_key"], set(), spec("group", 1, k=3), dev["g"])
    empty = good.assign(fold=good["fold"].where(good["fold"] != 2, 1))
    with pytest.raises(DataError, match=r"repeat 0, fold 2 is empty"):
        check(empty, dev["row_key"], set(), spec("group", 1, k=3), dev["g"])
    first_group_row = dev.index[dev["g"] == dev["g"].iloc[0]][0]
    split = good.copy()
    split.loc[first_group_row, "fold"] = (split.loc[first_group_row, "fold"] + 1) % 3
    with pytest.raises(DataError, match=r"repeat 0, fold \d: 1 group\(s\) on both sides, e.g. 'route"):
        check(split, dev["row_key"], set(), spec("group", 1, k=3), dev["g"])


@pytest.mark.parametrize(("setting", "message"), [
    (spec("stratified", 1, k=9), r"'folds.k' is 9 but class '1' of 'y' has only 8"),
    (spec("group", 1, k=5), r"'folds.k' is 5 but group column 'g' has only 4 groups"),
    (spec("kfold", 1, k=50), r"'folds.k' is 50 but there are only 40 development rows"),
])
def test_impossible_settings_are_refused_before_work(setting: dict[str, object], message: str) -> None:
    dev = pd.DataFrame({"row_key": [f"k{i}" for i in range(40)], "y": [1] * 8 + [0] * 32,
                        "g": [f"g{i % 4}" for i in range(40)]})
    with pytest.raises(ConfigError, match=message):
        check_feasible(setting, len(dev), dev["y"], dev["g"])


def _sets(table: pd.DataFrame, fold: int, repeat: int = 0) -> tuple[set[str], set[str]]:
    part = table[table["repeat"] == repeat].reset_index(drop=True)
    training, validation = fold_masks(part, fold)
    return set(part.loc[training, "row_key"]), set(part.loc[validation, "row_key"])


@pytest.mark.parametrize("window", [None, 30])
def test_forward_folds_equal_scikit_learn_time_series_split(window: int | None) -> None:
    # Reference implementation: sklearn.model_selection.TimeSeriesSplit(n_splits=k, test_size=window, gap=gap)
    # on the rows sorted by time (distinct times here, so our tie rule plays no part).
    from sklearn.model_selection import TimeSeriesSplit

    dev = dev_frame(203, seed=4)
    dev["t"] = pd.Timestamp("2025-01-01", tz="UTC") + pd.to_timedelta(np.random.default_rng(1).permutation(203),
                                                                        unit="min")
    table = assign(dev, spec("forward", 1, k=5, gap=3, window=window), "y", None, "t")
    order = dev["row_key"].to_numpy()[np.argsort(dev["t"].to_numpy())]
    splits = list(TimeSeriesSplit(n_splits=5, test_size=window, gap=3).split(order))
    assert len(splits) == 5 == table["fold"].nunique()
    for fold, (train, validation) in enumerate(splits):
        assert _sets(table, fold) == (set(order[train]), set(order[validation]))


def test_forward_group_folds_equal_time_series_split_over_groups() -> None:
    # No scikit-learn splitter keeps groups whole in time order; the reference is TimeSeriesSplit(n_splits=k,
    # gap=gap) applied to the groups sorted by their first time, each group then expanded to its rows.
    from sklearn.model_selection import TimeSeriesSplit

    dev = dev_frame(240, seed=6)  # weekly groups: they do not overlap in time, so no group is dropped
    table = assign(dev, spec("forward_group", 1, k=3, gap=1), "y", "g", "t")
    groups = dev.groupby("g")["t"].min().sort_values().index.to_numpy()
    for fold, (train, validation) in enumerate(TimeSeriesSplit(n_splits=3, gap=1).split(groups)):
        rows = [set(dev.loc[dev["g"].isin(groups[part]), "row_key"]) for part in (train, validation)]
        assert _sets(table, fold) == (rows[0], rows[1])


def test_forward_folds_drop_training_rows_tied_with_the_window_on_purpose() -> None:
    # Where we differ from TimeSeriesSplit on purpose: with equal timestamps at a cut, TimeSeriesSplit cuts by
    # position and would train on rows as late as the first validation row; we leave those rows out of training
    # so every training row is strictly earlier than every validation row.
    dev = dev_frame(100, seed=2)
    dev["t"] = pd.Timestamp("2025-01-01", tz="UTC") + pd.to_timedelta(np.arange(100) // 10, unit="D")  # 10 per day
    table = assign(dev, spec("forward", 1, k=3, gap=0, window=25), "y", None, "t")
    time_of = dict(zip(dev["row_key"], dev["t"], strict=True))
    for fold in range(3):
        training, validation = _sets(table, fold)
        assert max(time_of[k] for k in training) < min(time_of[k] for k in validation)
    training, validation = _sets(table, 0)  # the window starts at row 25, mid-day 2: rows 20-24 share its day
    assert len(training) == 20 and len(validation) == 25


def test_holdout_folds_equal_scikit_learn_shuffle_splits() -> None:
    # Reference implementations: sklearn.model_selection.ShuffleSplit and StratifiedShuffleSplit(n_splits=1,
    # test_size=fraction, random_state=seed + repeat): our one fold validates their test indices.
    from sklearn.model_selection import ShuffleSplit, StratifiedShuffleSplit

    dev = dev_frame(157, seed=8)
    for scheme, make in (("holdout", ShuffleSplit), ("stratified_holdout", StratifiedShuffleSplit)):
        table = assign(dev, spec(scheme, 2, seed=21, fraction=0.3), "y", None)
        for repeat in range(2):
            splitter = make(n_splits=1, test_size=0.3, random_state=21 + repeat)
            train, validation = next(splitter.split(np.zeros((len(dev), 1)), dev["y"]))
            keys = dev["row_key"].to_numpy()
            assert _sets(table, 0, repeat) == (set(keys[train]), set(keys[validation]))


def test_check_catches_broken_forward_tables() -> None:
    dev = dev_frame(120, seed=3)
    setting = spec("forward", 1, k=3, gap=2)
    good = assign(dev, setting, "y", None, "t")
    check(good, dev["row_key"], set(), setting, None, dev["t"])
    late = good.copy()  # put the latest row of all into fold 0's training part
    latest = dev.loc[dev["t"].idxmax(), "row_key"]
    late.loc[late["row_key"] == latest, ["fold", "train_from"]] = [pd.NA, 0]
    with pytest.raises(DataError, match=r"folds \(forward\), repeat 0, fold 0: 1 training row\(s\) are not earlier"):
        check(late, dev["row_key"], set(), setting, None, dev["t"])
    with pytest.raises(DataError, match=r"fold 0: only 2 row\(s\)/group\(s\) lie between .* fewer than folds.gap=3"):
        check(good, dev["row_key"], set(), {**setting, "gap": 3}, None, dev["t"])


@pytest.mark.parametrize(("setting", "message"), [
    (spec("holdout", 1, fraction=0.02), r"'folds.fraction' is 0.02: with 40 development rows it leaves 1 "
                                        r"validation and 39 training row\(s\), fewer than 2 on a side"),
    (spec("holdout", 1, fraction=0.97), r"leaves 39 validation and 1 training row\(s\)"),
    (spec("stratified_holdout", 1, fraction=0.25), r"folds.scheme stratified_holdout needs at least 2 development "
                                                   r"rows per class but class '2' of 'y' has 1; remove or merge that "
                                                   r"class's rows .*, or use folds.scheme: holdout"),
    (spec("forward", 1, k=4, window=9, gap=2), r"folds \(forward\): with 40 development rows, k=4 windows of 9 and a "
                                               r"gap of 2, fold 0 would train on 2 rows, fewer than folds.min_train=3"),
    (spec("forward_group", 1, k=4, gap=1),
     r"folds \(forward_group\): 4 development groups cannot fill 4 validation windows"),
])
def test_impossible_holdout_and_forward_settings_are_refused(setting: dict[str, object], message: str) -> None:
    dev = pd.DataFrame({"row_key": [f"k{i}" for i in range(40)], "y": [1] * 8 + [0] * 32,
                        "g": [f"g{i % 4}" for i in range(40)]})
    if setting["scheme"] == "forward":
        setting = {**setting, "min_train": 3}
    if setting["scheme"] == "stratified_holdout":
        dev.loc[0, "y"] = 2  # a third class with a single row cannot be on both sides
    groups = dev["g"] if setting["scheme"] == "forward_group" else None
    with pytest.raises(ConfigError, match=message):
        check_feasible(setting, len(dev), dev["y"], groups)
