"""The closing lines of a run: the headline numbers, read only from files an audit has just verified.

Every number printed under "audit PASS" must come from a file that the same audit checked against the
ledger: the readers here take the audit's ``verified`` map (relative path -> sha256) and refuse a file
that is not in it or whose bytes changed since. Kept apart from the steps so the end of a run does not
import scikit-learn or skops into Snakemake's main process.
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from . import display
from .layout import CHOICE, NESTED_SUMMARY, VERDICT


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


def verdict_line(exp_dir: str | Path, verified: Mapping[str, str], target_unit: str | None = None) -> str:
    """One line for the end of a run: the winner, its CV estimates and its test score on the primary metric.

    Empty when the experiment has no verdict yet (a run stopped before the opening). Errors are shown as
    positive numbers in the target's unit (holdfast.display).
    """
    exp = Path(exp_dir)
    if not (exp / VERDICT).exists():
        return ""
    verdict, choice = _read(exp, VERDICT, verified), _read(exp, CHOICE, verified)
    metric = choice["metric"]
    block = verdict["metrics"].get(metric)
    if block is None:
        return ""
    corrected = [f"{name} {display.number(metric, block[key], target_unit)}"
                 for key, name in (("cv_corrected_bbc", "BBC-CV"), ("cv_corrected_tibshirani", "Tibshirani–Tibshirani"))
                 if block.get(key) is not None]
    low, high = block["interval"]
    if block.get("test") is None:
        test = f"test {block.get('undefined', 'undefined')}"
    else:
        test = (f"test {display.number(metric, block['test'], target_unit)}, {block['level']:.0%} interval "
                f"{display.interval(metric, low, high, target_unit)}")
    line = (f"winner {verdict['winner']['family']} {verdict['winner']['candidate']}, {display.label(metric)}: "
            f"CV {display.number(metric, block['cv_mean'], target_unit)}"
            + (f" (corrected for selection: {', '.join(corrected)})" if corrected else "")
            + f"; {test}; agreement: {block.get('agreement', 'not judged')}")
    if verdict.get("selection"):
        line += f"; {verdict['selection']['text']}"
    if verdict.get("test_rows_seen_before"):
        line += "; test rows seen before"
    if verdict.get("compromised"):
        line += f"; {verdict['test_set_opened']}: the test estimate is compromised"
    return line


def choice_line(exp_dir: str | Path, verified: Mapping[str, str], target_unit: str | None = None) -> str:
    """Before the opening: the winner, its rule, raw and corrected CV estimates, rounds and candidates tried."""
    exp = Path(exp_dir)
    if not (exp / CHOICE).exists():
        return ""
    choice = _read(exp, CHOICE, verified)
    winner, metric = choice["winner"], choice["metric"]
    corrected = display.corrected_list(choice.get("optimism") or {}, metric, target_unit)
    rounds = (choice.get("rounds") or {}).get("text", "")
    return (f"winner {winner['family']} {winner['candidate']} by {choice['rule'].replace('_', ' ')}: CV "
            f"{display.named(metric, winner['mean'], target_unit)}"
            + (f" (corrected for selection: {corrected})" if corrected else "")
            + (f"; {rounds}" if rounds else ""))


def ranking_lines(exp_dir: str | Path, verified: Mapping[str, str], top: int = 5,
                  target_unit: str | None = None) -> list[str]:
    """The top of the ranking on the primary metric: rank, candidate, mean and corrected standard error."""
    import io

    import pyarrow.parquet as pq

    exp = Path(exp_dir)
    choice = _read(exp, CHOICE, verified)
    name = "ranking.parquet"
    if name not in verified:
        raise UnverifiedFileError(f"'{exp / name}' was not verified by this audit; its numbers are not shown")
    data = (exp / name).read_bytes()
    if hashlib.sha256(data).hexdigest() != verified[name]:
        raise UnverifiedFileError(f"'{exp / name}' changed after the audit verified it; audit again")
    metric = choice["metric"]
    rows = [r for r in pq.read_table(io.BytesIO(data), columns=[
        "candidate", "family", "params", "metric", "mean", "se_corrected", "rank"]).to_pylist()
        if r["metric"] == metric]
    rows.sort(key=lambda r: r["rank"])
    out = [f"ranking by cross-validated {display.label(metric)} ({display.direction(metric)}), top "
           f"{min(top, len(rows))} of {len(rows)}:"]
    for r in rows[:top]:
        mark = "  <- winner" if r["candidate"] == choice["winner"]["candidate"] else ""
        se = "undefined" if r["se_corrected"] is None else f"{r['se_corrected']:.4f}"
        out.append(f"  {r['rank']:>3}. {r['family']} {r['candidate']} {r['params']}: "
                   f"{display.number(metric, r['mean'], target_unit)} (corrected standard error {se}){mark}")
    return out


def nested_line(exp_dir: str | Path, verified: Mapping[str, str], target_unit: str | None = None) -> str:
    """One line for the end of a run: the nested estimate of the selection procedure, and who won where."""
    exp = Path(exp_dir)
    if not (exp / NESTED_SUMMARY).exists():
        return ""
    summary = _read(exp, NESTED_SUMMARY, verified)
    metric = _read(exp, CHOICE, verified)["metric"] if (exp / CHOICE).exists() else next(iter(summary["metrics"]))
    numbers = {"se_corrected": float("nan"), **summary["metrics"][metric]}  # older summaries lack it
    winners = ", ".join(f"{c} ×{n}" for c, n in summary["winner_counts"].items())
    return (f"nested CV of the whole selection ({summary['outer_folds']} outer folds), {display.label(metric)}: "
            f"{display.number(metric, numbers['mean'], target_unit)} (se {numbers['se']:.4f}, corrected se "
            f"{numbers['se_corrected']:.4f}); outer-fold winners: {winners}")


def lines(exp_dir: str | Path, verified: Mapping[str, str], target_unit: str | None = None) -> list[str]:
    """Every headline line the verified files give, in reading order; UnverifiedFileError if one is not verified."""
    return [line for line in (verdict_line(exp_dir, verified, target_unit),
                              nested_line(exp_dir, verified, target_unit)) if line]
