"""`holdfast list [results/]` and `holdfast compare A B`: experiments side by side in plain text tables.

For each experiment: the data file's fingerprint, the test and fold schemes, the winner, its CV estimate raw
and corrected for selection, the test estimate once opened, the rounds, the candidates tried and a fresh
audit. Scores come only from files that audit verified; a failing experiment shows its state, no numbers.
"""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import Any

from .. import display
from ..errors import ConfigError
from ..layout import LEDGER
from ._common import experiment_folder, short, table
from .summary import Summary, summarize

FIELDS = ("experiment", "data", "test split", "folds", "winner", "metric", "CV", "corrected (BBC-CV)",
          "corrected (Tibshirani–Tibshirani)", "test [interval]", "rounds", "tried", "audit")


def row(s: Summary) -> list[str]:
    """One experiment's cells, in the order of :data:`FIELDS`."""
    metric = display.label(s.metric) if s.metric else ("withheld" if s.withheld else "-")
    return [s.name, f"{Path(s.data_path).name} {short(s.data_sha256)}", s.split, s.folds_short, s.winner,
            metric, s.cv(), s.corrected("bbc"), s.corrected("tibshirani"),
            s.test(), str(s.rounds), "-" if s.candidates_tried is None else str(s.candidates_tried), s.audit_text()]


def experiments_under(results: Path) -> list[Path]:
    """Every experiment folder directly under a results folder, by name."""
    if not results.is_dir():
        raise ConfigError(f"results folder '{results}' does not exist; pass the folder that holds the experiments "
                          "(default: results)")
    return sorted(p for p in results.iterdir()
                  if p.is_dir() and not p.name.startswith(".") and ((p / LEDGER).exists() or (p / "sealed").exists()))


def notes(summaries: list[Summary]) -> list[str]:
    """What makes the numbers of these experiments not directly comparable, in words."""
    out = []
    data = {s.data_sha256 for s in summaries}
    if len(data) > 1:
        out.append("the experiments were sealed from different data files: their estimates describe different data")
    splits = {repr(sorted((k, v) for k, v in s.seal_spec.items() if k in ("scheme", "fraction", "salt", "gap_hours")))
              for s in summaries}
    if len(data) == 1 and len(splits) > 1:
        out.append("the same data file was sealed with different test splits (scheme, fraction or salt): their test "
                   "estimates come from different test rows")
    metrics = {s.metric for s in summaries if s.metric}
    if len(metrics) > 1:
        names = ", ".join(sorted(map(display.label, metrics)))
        out.append(f"the winners were chosen on different primary metrics ({names}): their CV and test numbers are "
                   "not comparable")
    out += [f"{s.name}: numbers withheld: {s.withheld}" for s in summaries if s.withheld]
    return out


def list_main(args: argparse.Namespace) -> int:
    """Print one line per experiment under the results folder."""
    results = Path(args.results)
    folders = experiments_under(results)
    if not folders:
        print(f"no experiments under '{results}'")
        return 0
    summaries = [summarize(p) for p in folders]
    for line in table(FIELDS, [row(s) for s in summaries]):
        print(line)
    for line in notes(summaries):
        print(f"note: {line}")
    return 0


def compare_main(args: argparse.Namespace) -> int:
    """Print the experiments as columns, one row per field, then what makes them not comparable."""
    if len(args.experiments) < 2:
        raise ConfigError("holdfast compare needs two or more experiment folders; for one, use holdfast status")
    folders = [experiment_folder(p) for p in args.experiments]
    seen: dict[Path, str] = {}
    for given, folder in zip(args.experiments, folders, strict=True):
        if folder.resolve() in seen:
            raise ConfigError(f"'{given}' and '{seen[folder.resolve()]}' are the same experiment folder; name each "
                              "experiment to compare once")
        seen[folder.resolve()] = given
    summaries = [summarize(p) for p in folders]
    cells = [row(s) for s in summaries]
    rows = [[name, *(c[i] for c in cells)] for i, name in enumerate(FIELDS) if i]
    rows.insert(0, ["folder", *(str(s.exp) for s in summaries)])
    for line in table(["", *(s.name for s in summaries)], rows):
        print(line)
    for line in notes(summaries):
        print(f"note: {line}")
    return 0


def add_parser(sub: Any) -> None:
    """Register `holdfast list` and `holdfast compare`."""
    p = sub.add_parser("list", help="every experiment under a results folder, one line each",
                       description=__doc__.split("\n\n")[1])
    p.add_argument("results", nargs="?", default="results", help="the results folder (default: results)")
    p.set_defaults(func=list_main, takes_extra=False)
    p = sub.add_parser("compare", help="two or more experiments side by side",
                       description=__doc__.split("\n\n")[1])
    p.add_argument("experiments", nargs="+", metavar="EXPERIMENT", help="results/<experiment> folders (two or more)")
    p.set_defaults(func=compare_main, takes_extra=False)
