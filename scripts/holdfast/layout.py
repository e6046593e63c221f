"""Names of the files under results/<experiment>/ (DESIGN.md's table), in one place."""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

from ._io import read_json

MANIFEST = "sealed/manifest.json"
TEST = "sealed/test.parquet"
DEV = "dev.parquet"
FOLDS = "folds.parquet"
RANKING = "ranking.parquet"
CHOICE = "choice.json"
PLOT = "plots/ranking.png"
MODEL = "model/model.skops"
CARD = "model/card.json"
VERDICT = "final/verdict.json"
ARCHIVE = "final/openings"
LEDGER = "ledger.jsonl"
AUDIT = "audit.json"
NESTED_SUMMARY = "nested/summary.json"
# Every step holds this lock shared while it runs; the audit takes it exclusively (ledger.locked_if_free),
# so an audit never reads files a step is writing. ledger.locked adds the ".lock" suffix.
STEPS_LOCK = "steps"


def fit_file(kind: str, family: str, repeat: int, fold: int) -> str:
    """fits/<family>/r<R>f<F>.parquet or oof/<family>/r<R>f<F>.parquet."""
    return f"{kind}/{family}/r{repeat}f{fold}.parquet"


def read_manifest(exp_dir: str | os.PathLike[str]) -> dict[str, Any] | None:
    """The experiment's seal manifest, or None before the seal."""
    path = Path(exp_dir) / MANIFEST
    return read_json(path) if path.exists() else None
