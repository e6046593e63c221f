"""Names of the files under results/<experiment>/ (DESIGN.md's table), in one place."""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

from ._io import read_json
from .errors import ConfigError

MANIFEST = "sealed/manifest.json"
TEST = "sealed/test.parquet"
DEV = "dev.parquet"
FOLDS = "folds.parquet"
RANKING = "ranking.parquet"
CHOICE = "choice.json"
PLOT = "plots/ranking.png"
MODEL = "model/model.skops"
PROVENANCE = "model/provenance.json"
VERDICT = "final/verdict.json"
ARCHIVE = "final/openings"
REQUEST = "final/request.json"
CONFIG_COPY = "config.json"
RECEIPT = "receipt.txt"
LEDGER = "ledger.jsonl"
AUDIT = "audit.json"
NESTED_SUMMARY = "nested/summary.json"
REPORT = "report.html"
REPORT_FIGURES = "report_figures"  # the report's pictures as files, for Snakemake's --report
# Every step holds this lock shared while it runs; the audit takes it exclusively (ledger.locked_if_free),
# so an audit never reads files a step is writing. ledger.locked adds the ".lock" suffix.
STEPS_LOCK = "steps"
# The open_test step holds this one exclusively while it records and makes an opening (opening.open_test).
OPENING_LOCK = "opening"
# The 'holdfast open' command holds this one exclusively for its whole run (its step takes OPENING_LOCK inside it),
# so that two commands started together cannot both find the experiment unopened (cli._open).
OPEN_COMMAND_LOCK = "open-command"


def fit_file(kind: str, family: str, repeat: int, fold: int) -> str:
    """fits/<family>/r<R>f<F>.parquet or oof/<family>/r<R>f<F>.parquet."""
    return f"{kind}/{family}/r{repeat}f{fold}.parquet"


def group_family(group: str) -> str:
    """The family of a fit job's family part: ``forest`` for ``forest.2`` and for ``forest`` (see
    candidates.fit_groups)."""
    return group.split(".", 1)[0]


def read_manifest(exp_dir: str | os.PathLike[str]) -> dict[str, Any] | None:
    """The experiment's seal manifest, or None before the seal."""
    path = Path(exp_dir) / MANIFEST
    return read_json(path) if path.exists() else None


def check_experiment_dir(exp_dir: str | os.PathLike[str], project: str | os.PathLike[str] = ".") -> None:
    """Refuse a results folder, experiment folder or entry of it that is a symbolic link leading out of the project.

    Such a link would send the seal, the ledger and every output somewhere else on the machine.
    """
    exp, root = Path(exp_dir), Path(project).resolve()
    paths = [exp.parent, exp]
    if exp.is_dir() and not exp.is_symlink():
        paths += sorted(exp.iterdir())
    for path in paths:
        if path.is_symlink() and not path.resolve().is_relative_to(root):
            raise ConfigError(f"'{path}' is a symbolic link to '{path.resolve()}', outside the project folder "
                              f"'{root}', so the experiment would write there; nothing was run. Replace it with a "
                              "real folder inside the project")


def sealed_experiment_of(path: str | os.PathLike[str]) -> Path | None:
    """The experiment folder whose sealed folder holds ``path`` (symbolic links and '..' resolved), else None.

    Only an experiment's opening reads the rows of its sealed file: the commands that read a file the user names (a
    config's data.path, holdfast init's data, holdfast predict's new rows) refuse one there before reading it."""
    sealed = Path(MANIFEST).parent.name
    where = Path(path).resolve()
    return next((p.parent for p in where.parents if p.name == sealed and (p.parent / MANIFEST).is_file()), None)
