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
    corrected = [f"{label} {block[key]:.4f}" for key, label in (("cv_corrected_bbc", "BBC-CV"),
                                                                 ("cv_corrected_tibshirani", "Tibshirani–Tibshirani"))
                 if block.get(key) is not None]
    low, high = block["interval"]
    if block.get("test") is None:
        test = f"test {block.get('undefined', 'undefined')}"
    else:
        test = f"test {block['test']:.4f}, {block['level']:.0%} interval " + (
            f"[{low:.4f}, {high:.4f}]" if low is not None and high is not None else "not available")
    line = (f"winner {verdict['winner']['family']} {verdict['winner']['candidate']}, {metric}: "
            f"CV {block['cv_mean']:.4f}"
            + (f" (corrected for selection: {', '.join(corrected)})" if corrected else "")
            + f"; {test}; agreement: {block.get('agreement', 'not judged')}")
    if verdict.get("selection"):
        line += f"; {verdict['selection']['text']}"
    if verdict.get("test_rows_seen_before"):
        line += "; test rows seen before"
    if verdict.get("compromised"):
        line += f"; {verdict['test_set_opened']}: the test estimate is compromised"
    return line


CORRECTIONS = (("bbc", "BBC-CV"), ("tibshirani", "Tibshirani–Tibshirani"))


def choice_line(exp_dir: str | Path, verified: Mapping[str, str]) -> str:
    """Before the opening: the winner, its rule, raw and corrected CV estimates, rounds and candidates tried."""
    exp = Path(exp_dir)
    if not (exp / CHOICE).exists():
        return ""
    choice = _read(exp, CHOICE, verified)
    winner, metric = choice["winner"], choice["metric"]
    optimism = choice.get("optimism") or {}
    corrected = [f"{label} {optimism[key]['corrected']:.4f}" for key, label in CORRECTIONS
                 if (optimism.get(key) or {}).get("corrected") is not None]
    rounds = (choice.get("rounds") or {}).get("text", "")
    return (f"winner {winner['family']} {winner['candidate']} by {choice['rule']}: CV {metric} {winner['mean']:.4f}"
            + (f" (corrected for selection: {', '.join(corrected)})" if corrected else "")
            + (f"; {rounds}" if rounds else ""))


def ranking_lines(exp_dir: str | Path, verified: Mapping[str, str], top: int = 5) -> list[str]:
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
    out = [f"ranking by {metric} (greater is better), top {min(top, len(rows))} of {len(rows)}:"]
    for r in rows[:top]:
        mark = "  <- winner" if r["candidate"] == choice["winner"]["candidate"] else ""
        out.append(f"  {r['rank']:>3}. {r['family']} {r['candidate']} {r['params']}: {r['mean']:.4f} "
                   f"(corrected se {r['se_corrected']:.4f}){mark}")
    return out


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
