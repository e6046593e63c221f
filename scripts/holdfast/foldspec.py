"""How many folds a fold spec gives, without importing pandas (the Snakefile needs it in every job)."""

from __future__ import annotations

from typing import Any

MAX_FIT_JOBS = 5000


def effective_k(spec: dict[str, Any], n_rows: int, n_groups: int | None = None) -> int:
    """Folds per repeat: k, one per row for leave-one-out, one per group for leave-one-group-out."""
    if spec["scheme"] == "loo":
        return n_rows
    if spec["scheme"] == "leave_one_group_out":
        if n_groups is None:
            raise ValueError("leave_one_group_out needs the number of groups")
        return n_groups
    return int(spec["k"])


def fold_ids(spec: dict[str, Any], n_rows: int, n_groups: int | None = None) -> list[tuple[int, int]]:
    """Every (repeat, fold) pair the spec produces for the development rows."""
    return [(r, f) for r in range(int(spec["repeats"])) for f in range(effective_k(spec, n_rows, n_groups))]
