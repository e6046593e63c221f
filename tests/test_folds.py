"""Fold assignment: invariants shared by every scheme, reference equality, and refusals."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from holdfast.errors import ConfigError, DataError
from holdfast.folds import assign, check, check_feasible

SCHEMES = [("kfold", 1), ("kfold", 3), ("stratified", 1), ("stratified", 2), ("group", 1), ("group", 3),
           ("stratified_group", 1), ("leave_one_group_out", 1)]


def dev_frame(n: int = 240, seed: int = 0) -> pd.DataFrame:
    """Development rows with a key, a binary target and 12 groups of unequal size."""
    rng = np.random.default_rng(seed)
    weights = np.linspace(1, 3, 12)
    return pd.DataFrame({
        "row_key": [f"k{i:05d}" for i in range(n)],
        "y": (rng.random(n) < 0.3).astype(int),
        "g": rng.choice([f"route{i}" for i in range(12)], size=n, p=weights / weights.sum()),
        "x": rng.normal(size=n),
    })


def spec(scheme: str, repeats: int, k: int = 4, seed: int = 7) -> dict[str, object]:
    return {"scheme": scheme, "k": k, "repeats": repeats, "seed": seed}


def n_folds(scheme: str, dev: pd.DataFrame) -> int:
    return int(dev["g"].nunique()) if scheme == "leave_one_group_out" else 4


@pytest.mark.parametrize(("scheme", "repeats"), SCHEMES)
def test_invariants_hold_for_every_scheme(scheme: str, repeats: int) -> None:
    dev = dev_frame()
    table = assign(dev, spec(scheme, repeats), "y", "g")
    assert list(table.columns) == ["row_key", "repeat", "fold"]
    assert table["fold"].dtype == np.uint8 and table["repeat"].dtype == np.uint8  # compact integer types
    test_keys = {"t1", "t2"}
    check(table, dev["row_key"], test_keys, spec(scheme, repeats), dev["g"])  # raises on any violation
    group_of = dict(zip(dev["row_key"], dev["g"], strict=True))
    for _, part in table.groupby("repeat"):
        # each dev row validated exactly once per repeat
        assert sorted(part["row_key"]) == sorted(dev["row_key"])
        for fold in range(n_folds(scheme, dev)):
            validation = set(part.loc[part["fold"] == fold, "row_key"])
            training = set(part["row_key"]) - validation
            assert validation and training and not validation & training  # disjoint, non-empty
            if scheme in ("group", "stratified_group", "leave_one_group_out"):
                assert not {group_of[k] for k in validation} & {group_of[k] for k in training}
    assert not set(table["row_key"]) & test_keys


@pytest.mark.parametrize(("scheme", "repeats"), SCHEMES)
def test_same_seed_same_folds_other_seed_other_folds(scheme: str, repeats: int) -> None:
    dev = dev_frame()
    first = assign(dev, spec(scheme, repeats), "y", "g")
    assert first.equals(assign(dev, spec(scheme, repeats), "y", "g"))
    if scheme not in ("stratified_group", "leave_one_group_out"):  # seeds only break ties / play no part
        assert not first.equals(assign(dev, spec(scheme, repeats, seed=8), "y", "g"))
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
    with pytest.raises(DataError, match=r"repeat 0: .*validated twice"):
        check(twice, dev["row_key"], set(), spec("group", 1, k=3), dev["g"])
    empty = good.assign(fold=good["fold"].where(good["fold"] != 2, 1))
    with pytest.raises(DataError, match=r"repeat 0, fold 2 is empty"):
        check(empty, dev["row_key"], set(), spec("group", 1, k=3), dev["g"])
    first_group_row = dev.index[dev["g"] == dev["g"].iloc[0]][0]
    split = good.copy()
    split.loc[first_group_row, "fold"] = (split.loc[first_group_row, "fold"] + 1) % 3
    with pytest.raises(DataError, match=r"group '.*' is in 2 folds"):
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
