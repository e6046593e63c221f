"""How many folds a fold spec gives, without importing pandas (the Snakefile needs it in every job)."""

from __future__ import annotations

from typing import Any

MAX_FIT_JOBS = 5000


def effective_k(spec: dict[str, Any], n_rows: int) -> int:
    """Folds per repeat: k, or one per row for leave-one-out."""
    return n_rows if spec["scheme"] == "loo" else int(spec["k"])


def fold_ids(spec: dict[str, Any], n_rows: int) -> list[tuple[int, int]]:
    """Every (repeat, fold) pair the spec produces for ``n_rows`` development rows."""
    return [(r, f) for r in range(int(spec["repeats"])) for f in range(effective_k(spec, n_rows))]
