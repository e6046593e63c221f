"""How many folds a fold spec gives, without importing pandas (the Snakefile needs it in every job)."""

from __future__ import annotations

from typing import Any

MAX_FIT_JOBS = 100_000

# Schemes where every development row is validated exactly once per repeat.
COMPLETE = ("kfold", "stratified", "group", "stratified_group", "loo", "leave_one_group_out")
HOLDOUT = ("holdout", "stratified_holdout")
FORWARD = ("forward", "forward_group")
GROUPED = ("group", "stratified_group", "leave_one_group_out", "forward_group")
STRATIFIED = ("stratified", "stratified_group", "stratified_holdout")
# Keys beyond 'scheme' that each scheme uses; any other key set in the config has no effect and is refused.
KEYS = {
    **{s: ("k", "repeats", "seed") for s in ("kfold", "stratified", "group", "stratified_group")},
    "loo": (), "leave_one_group_out": (),
    **{s: ("fraction", "repeats", "seed") for s in HOLDOUT},
    **{s: ("k", "window", "gap", "min_train") for s in FORWARD},
}
OPTIONAL = ("k", "repeats", "seed", "fraction", "window", "gap", "min_train")


def effective_k(spec: dict[str, Any], n_rows: int, n_groups: int | None = None) -> int:
    """Folds per repeat: k, one per row for leave-one-out, one per group for leave-one-group-out, one for holdout."""
    if spec["scheme"] == "loo":
        return n_rows
    if spec["scheme"] == "leave_one_group_out":
        if n_groups is None:
            raise ValueError("leave_one_group_out needs the number of groups")
        return n_groups
    if spec["scheme"] in HOLDOUT:
        return 1
    return int(spec["k"])


def repeats(spec: dict[str, Any]) -> int:
    """Repeats of the scheme; deterministic schemes have one."""
    return 1 if spec["scheme"] in ("loo", "leave_one_group_out", *FORWARD) else int(spec["repeats"])


def fold_ids(spec: dict[str, Any], n_rows: int, n_groups: int | None = None) -> list[tuple[int, int]]:
    """Every (repeat, fold) pair the spec produces for the development rows."""
    return [(r, f) for r in range(repeats(spec)) for f in range(effective_k(spec, n_rows, n_groups))]
