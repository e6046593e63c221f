"""The tally: combine every fit job's records into a ranking and choose the winner.

Reduce step: per candidate and metric the mean validation score over folds, its
standard deviation and naive standard error; the winner by the selection rule on
the primary metric. A candidate that failed on any fold is ranked last and never wins.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from . import ledger
from ._io import sha256_file, write_atomic, write_json, write_parquet
from .errors import FitError

CAUTION = ("A cross-validated estimate describes data like the development set. It is not a guarantee "
           "under distribution shift; decisions about people must also follow their domain's own rules and review.")


def collect(fit_paths: list[str]) -> pd.DataFrame:
    """All fit records in one frame."""
    return pd.concat([pd.read_parquet(p) for p in sorted(fit_paths)], ignore_index=True)


def summarise(fits: pd.DataFrame, metrics: list[str], expected_folds: int) -> pd.DataFrame:
    """Per candidate and metric: mean, sd, se over folds, number of folds, rank (1 = best)."""
    rows = []
    for (candidate, family, params), part in fits.groupby(["candidate", "family", "params"], sort=True):
        ok = part[part["status"] == "ok"]
        complete = len(ok) == expected_folds == len(part)
        errors = sorted(set(part.loc[part["status"] != "ok", "error"]))
        for metric in metrics:
            values = ok[f"val_{metric}"].to_numpy(dtype=float)
            n = len(values)
            sd = float(np.std(values, ddof=1)) if n > 1 else float("nan")
            rows.append({
                "candidate": candidate, "family": family, "params": params, "metric": metric,
                "mean": float(np.mean(values)) if n else float("nan"), "sd": sd,
                "se": sd / math.sqrt(n) if n > 1 else float("nan"), "folds": n,
                "train_mean": float(np.mean(ok[f"train_{metric}"])) if n else float("nan"),
                "complete": complete, "error": errors[0] if errors else "",
            })
    table = pd.DataFrame(rows)
    table["rank"] = 0
    for _, part in table.groupby("metric"):
        order = part.assign(_bad=~part["complete"]).sort_values(["_bad", "mean", "candidate"],
                                                                   ascending=[True, False, True])
        table.loc[order.index, "rank"] = np.arange(1, len(order) + 1)
    table["rank"] = table["rank"].astype("int32")
    table["folds"] = table["folds"].astype("int32")
    return table.sort_values(["metric", "rank"], kind="stable").reset_index(drop=True)


def choose(ranking: pd.DataFrame, primary: str, rule: str) -> tuple[pd.Series, pd.Series | None]:
    """Winner and runner-up on the primary metric under the selection rule."""
    part = ranking[(ranking["metric"] == primary) & ranking["complete"]].sort_values("rank")
    if part.empty:
        raise FitError(f"no candidate completed every fold on metric '{primary}'; see the fit logs for errors")
    if rule != "best_mean":
        raise FitError(f"selection rule '{rule}' is not implemented; use best_mean")
    winner = part.iloc[0]
    runner = part.iloc[1] if len(part) > 1 else None
    return winner, runner


def _why(winner: pd.Series, runner: pd.Series | None, primary: str, n_candidates: int) -> str:
    text = (f"highest mean validation {primary} ({winner['mean']:.6g}, se {winner['se']:.3g}, {winner['folds']} folds) "
            f"among {n_candidates} candidates")
    if runner is not None:
        margin = winner["mean"] - runner["mean"]
        clear = "more" if margin > winner["se"] else "less"
        text += (f"; the runner-up {runner['candidate']} ({runner['family']}) is {margin:.3g} behind, "
                 f"{clear} than one standard error")
    return text


def plot_ranking(ranking: pd.DataFrame, primary: str, path: str, top: int = 25) -> None:
    """Mean ± one standard error of the primary metric for the best candidates."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    part = ranking[(ranking["metric"] == primary) & ranking["complete"]].sort_values("rank").head(top)
    labels = [f"{f} · {c}" for f, c in zip(part["family"], part["candidate"], strict=True)]
    height = max(2.5, 0.32 * len(part) + 1.2)
    fig, ax = plt.subplots(figsize=(7.5, height))
    ypos = np.arange(len(part))[::-1]
    ax.errorbar(part["mean"], ypos, xerr=part["se"].fillna(0), fmt="o", color="#1f5f8b", ecolor="#8aa9c1", capsize=3)
    ax.set_yticks(ypos, labels, fontsize=8)
    ax.set_xlabel(f"mean validation {primary} (± 1 standard error over folds; greater is better)")
    ax.set_title("Candidates by cross-validated score", fontsize=10)
    ax.grid(axis="x", alpha=0.3)
    fig.tight_layout()

    def _write(tmp: str) -> None:
        fig.savefig(tmp, format="png", dpi=110, metadata={"Software": None})

    write_atomic(path, _write)
    plt.close(fig)


def tally(fit_paths: list[str], candidates: dict[str, dict[str, Any]], metrics: list[str], rule: str,
          expected_folds: int, ranking_path: str, choice_path: str, plot_path: str, ledger_path: str,
          folds_path: str, rule_name: str | None = None) -> dict[str, Any]:
    """Write ranking.parquet, choice.json and the ranking plot; return the choice."""
    fits = collect(fit_paths)
    ranking = summarise(fits, metrics, expected_folds)
    primary = metrics[0]
    winner, runner = choose(ranking, primary, rule)
    n_candidates = int(ranking["candidate"].nunique())
    failed = sorted(set(ranking.loc[~ranking["complete"], "candidate"]))
    choice: dict[str, Any] = {
        "rule": rule,
        "metric": primary,
        "winner": {"candidate": winner["candidate"], "family": winner["family"], "mean": winner["mean"],
                   "se": winner["se"], "folds": int(winner["folds"]), "spec": candidates[winner["candidate"]]},
        "runner_up": None if runner is None else {
            "candidate": runner["candidate"], "family": runner["family"], "mean": runner["mean"], "se": runner["se"]},
        "margin": None if runner is None else float(winner["mean"] - runner["mean"]),
        "candidates": n_candidates,
        "failed_candidates": failed,
        "why": _why(winner, runner, primary, n_candidates),
        "folds_sha256": sha256_file(folds_path),
        "caution": CAUTION,
    }
    write_parquet(ranking_path, ranking)
    plot_ranking(ranking, primary, plot_path)
    write_json(choice_path, choice)
    ledger.append(ledger_path, "tally", {
        "winner": winner["candidate"], "rule": rule, "metric": primary, "candidates": n_candidates,
        "failed": len(failed), "fit_files": len(fit_paths), "ranking_sha256": sha256_file(ranking_path),
        "choice_sha256": sha256_file(choice_path), "plot": str(Path(plot_path).name),
    }, rule=rule_name)
    return choice
