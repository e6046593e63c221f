"""The closing lines of a run: the headline numbers, read only from files an audit has just verified.

Every number printed under "audit PASS" must come from a file that the same audit checked against the
ledger: the readers here take the audit's ``verified`` map (relative path -> sha256) and refuse a file
that is not in it or whose bytes changed since. Kept apart from the steps so the end of a run does not
import scikit-learn or skops into Snakemake's main process.
"""

from __future__ import annotations

import hashlib
import json
import os
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from .layout import AUDIT, CHOICE, LEDGER, NESTED_SUMMARY, VERDICT


class UnverifiedFileError(Exception):
    """A headline number would come from a file the audit did not verify."""


def _read(exp: Path, name: str, verified: Mapping[str, str]) -> Any:
    """A JSON file's content, only if the audit verified exactly these bytes."""
    path = exp / name
    if name not in verified:
        raise UnverifiedFileError(f"'{path}' was not verified by this audit; its numbers are not shown")
    data = path.read_bytes()
    if hashlib.sha256(data).hexdigest() != verified[name]:
        raise UnverifiedFileError(f"'{path}' changed after the audit verified it; its numbers are not shown, "
                             "audit again")
    return json.loads(data)


def verdict_line(exp_dir: str | Path, verified: Mapping[str, str]) -> str:
    """One line for the end of a run: the winner, its CV estimates and its test score on the primary metric.

    Empty when the experiment has no verdict yet (a run stopped before the opening).
    """
    exp = Path(exp_dir)
    if not (exp / VERDICT).exists():
        return ""
    verdict, choice = _read(exp, VERDICT, verified), _read(exp, CHOICE, verified)
    metric = choice["metric"]
    block = verdict["metrics"].get(metric)
    if block is None:
        return ""
    corrected = [f"{label} {block[key]:.4f}" for key, label in (("cv_corrected_bbc", "BBC"),
                                                                 ("cv_corrected_tibshirani", "T&T"))
                 if block.get(key) is not None]
    low, high = block["interval"]
    line = (f"winner {verdict['winner']['family']} {verdict['winner']['candidate']}, {metric}: "
            f"CV {block['cv_mean']:.4f}"
            + (f" (corrected for selection: {', '.join(corrected)})" if corrected else "")
            + f"; test {block['test']:.4f}, {block['level']:.0%} interval [{low:.4f}, {high:.4f}]; "
            f"agreement: {block.get('agreement', 'not judged')}")
    if verdict.get("compromised"):
        line += f"; {verdict['test_set_opened']}: the test estimate is compromised"
    return line


def nested_line(exp_dir: str | Path, verified: Mapping[str, str]) -> str:
    """One line for the end of a run: the nested estimate of the selection procedure, and who won where."""
    exp = Path(exp_dir)
    if not (exp / NESTED_SUMMARY).exists():
        return ""
    summary = _read(exp, NESTED_SUMMARY, verified)
    metric = _read(exp, CHOICE, verified)["metric"] if (exp / CHOICE).exists() else next(iter(summary["metrics"]))
    numbers = {"se_corrected": float("nan"), **summary["metrics"][metric]}  # older summaries lack it
    winners = ", ".join(f"{c} ×{n}" for c, n in summary["winner_counts"].items())
    return (f"nested CV of the whole selection ({summary['outer_folds']} outer folds), {metric}: "
            f"{numbers['mean']:.4f} (se {numbers['se']:.4f}, corrected se {numbers['se_corrected']:.4f}); "
            f"outer-fold winners: {winners}")


def lines(exp_dir: str | Path, verified: Mapping[str, str]) -> list[str]:
    """Every headline line the verified files give, in reading order; UnverifiedFileError if one is not verified."""
    return [line for line in (verdict_line(exp_dir, verified), nested_line(exp_dir, verified)) if line]


def closing_lines(exp_dir: str | os.PathLike[str], experiment: str) -> list[str]:
    """The end of a run: a fresh audit (written to audit.json when the workflow keeps one), then, only when it
    passed, the headline numbers from the files it verified.

    The audit is made now, not read from an audit.json that a file edited since could have made stale.
    """
    exp = Path(exp_dir)
    if not (exp / LEDGER).exists():
        return []  # nothing was sealed yet: there is no record to audit
    from .audit import IN_PROGRESS, audit, audit_to_file

    result = audit_to_file(exp, exp / AUDIT) if (exp / AUDIT).exists() else audit(exp)
    where = f"details: holdfast audit {exp}"
    if result["state"] == IN_PROGRESS:
        return [f"experiment '{experiment}': audit not made: a run is in progress (another step is writing to "
                f"it); {where} when it has finished"]
    out: list[str] = []
    codes = dict.fromkeys(p["code"] for p in result["problems"])  # each code once, in the order found
    state = "PASS" if result["passed"] else "FAIL: " + "; ".join(codes)
    if result["passed"]:
        try:
            out += lines(exp, result["verified"])
        except UnverifiedFileError as exc:
            state = f"PASS, but numbers withheld: {exc}"
    out.append(f"experiment '{experiment}': audit {state} (test set opened {result['test_set_opened']} time(s)); "
               f"{where}")
    return out
