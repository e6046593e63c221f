"""The ``holdfast`` command: audit an experiment, or check a config before running it."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from .errors import HoldfastError

# Exit codes of `holdfast audit` (the errors' own codes, 1 to 7, are those of errors.py).
AUDIT_PASS, AUDIT_FAIL, NOT_AN_EXPERIMENT = 0, 1, 2
AUDIT_IN_PROGRESS = 75  # a step is writing to the experiment: nothing was checked; try again later


def _audit(args: argparse.Namespace) -> int:
    from .audit import IN_PROGRESS, audit, report

    exp = Path(args.experiment_dir)
    if not (exp / "ledger.jsonl").exists() and not (exp / "sealed").exists():
        sys.stderr.write(f"holdfast: error: '{exp}' is not an experiment directory (no ledger.jsonl, no sealed/); "
                         "pass results/<experiment>\n")
        return NOT_AN_EXPERIMENT
    result = audit(str(exp))
    print(report(result))
    if result["state"] == IN_PROGRESS:
        return AUDIT_IN_PROGRESS
    if not result["passed"]:
        return AUDIT_FAIL  # a failing record vouches for nothing: no numbers
    from .headline import UnverifiedFileError, lines

    try:
        shown = lines(exp, result["verified"])  # only from files this audit verified
    except UnverifiedFileError as exc:
        print(f"  numbers withheld: {exc}")
        return AUDIT_FAIL
    for line in shown:
        print(f"  {line}")
    return AUDIT_PASS


def _check(args: argparse.Namespace) -> int:
    from .config import read_yaml
    from .plan import prepare

    plan = prepare(read_yaml(args.configfile), main=True, results=args.results)
    n = sum(len(c) for c in plan.families.values())
    state = "sealed" if plan.manifest else "not sealed yet"
    print(f"config OK: experiment '{plan.config['experiment']}' ({state}), task {plan.config['task']}, "
          f"{n} candidates in {len(plan.families)} families, {len(plan.fold_ids)} folds, "
          f"primary metric {plan.config['metrics'][0]}")
    return 0


def build_parser() -> argparse.ArgumentParser:
    """The argument parser (exposed for tests and documentation)."""
    parser = argparse.ArgumentParser(prog="holdfast", description=__doc__)
    sub = parser.add_subparsers(dest="command", required=True)
    p_audit = sub.add_parser("audit", help="check an experiment's ledger and files; exit 0 on pass, 1 on fail, "
                             f"{AUDIT_IN_PROGRESS} while a run is in progress (nothing checked)")
    p_audit.add_argument("experiment_dir", help="results/<experiment>")
    p_audit.set_defaults(func=_audit)
    p_check = sub.add_parser("check", help="validate a config and its data without running anything")
    p_check.add_argument("configfile", nargs="?", default="config/config.yaml")
    p_check.add_argument("--results", default="results", help="results folder (default: results)")
    p_check.set_defaults(func=_check)
    return parser


def main(argv: list[str] | None = None) -> int:
    """Entry point; returns the exit code."""
    args = build_parser().parse_args(argv)
    try:
        return int(args.func(args))
    except HoldfastError as exc:
        sys.stderr.write(exc.format_message() + "\n")
        return exc.exit_code
