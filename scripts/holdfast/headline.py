"""The closing lines of a run: the headline numbers, read from the files the steps wrote.

Kept apart from the steps so the end of a run reads two JSON files without importing
scikit-learn or skops into Snakemake's main process.
"""

from __future__ import annotations

from pathlib import Path

from ._io import read_json
from .layout import CHOICE, NESTED_SUMMARY, VERDICT


def verdict_line(exp_dir: str | Path) -> str:
    """One line for the end of a run: the winner, its CV estimates and its test score on the primary metric.

    Empty when the experiment has no verdict yet (a run stopped before the opening).
    """
    exp = Path(exp_dir)
    if not (exp / VERDICT).exists() or not (exp / CHOICE).exists():
        return ""
    verdict, choice = read_json(exp / VERDICT), read_json(exp / CHOICE)
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


def nested_line(exp_dir: str | Path) -> str:
    """One line for the end of a run: the nested estimate of the selection procedure, and who won where."""
    path = Path(exp_dir) / NESTED_SUMMARY
    if not path.exists():
        return ""
    summary = read_json(path)
    choice = Path(exp_dir) / CHOICE
    metric = read_json(choice)["metric"] if choice.exists() else next(iter(summary["metrics"]))
    numbers = {"se_corrected": float("nan"), **summary["metrics"][metric]}  # older summaries lack it
    winners = ", ".join(f"{c} ×{n}" for c, n in summary["winner_counts"].items())
    return (f"nested CV of the whole selection ({summary['outer_folds']} outer folds), {metric}: "
            f"{numbers['mean']:.4f} (se {numbers['se']:.4f}, corrected se {numbers['se_corrected']:.4f}); "
            f"outer-fold winners: {winners}")


def lines(exp_dir: str | Path) -> list[str]:
    """Every headline line that the experiment's files can give, in reading order."""
    return [line for line in (verdict_line(exp_dir), nested_line(exp_dir)) if line]
