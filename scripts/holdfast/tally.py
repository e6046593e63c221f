"""The tally: combine every fit job's records into a ranking and choose the winner.

Reduce step. Per candidate and metric: the mean validation score over folds, its standard
deviation, the naive standard error and the Nadeau-Bengio corrected one. The winner comes from
the selection rule on the primary metric; a corrected resampled t-test compares it with every
other candidate; and two estimators say how optimistic its CV mean is because it was the best
of many (Tibshirani & Tibshirani 2009 from per-fold scores, BBC-CV from out-of-fold predictions).
A candidate that failed on any fold is ranked last and never wins.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from . import display, ledger, stats
from . import optimism as optimism_estimates
from ._io import read_parquet, sha256_file, write_atomic, write_json, write_parquet
from .dataset import KEY, key_positions
from .errors import FitError
from .history import (
    INDEX_NEXT,
    archive,
    archive_oof,
    candidates_on,
    fits_of,
    oof_by_repeat,
    promote,
    read_index_for_tally,
    to_archive,
)
from .optimism import OofCollector
from .rounds import current_round

CAUTION = ("A cross-validated estimate describes data like the development set. It is not a guarantee "
           "under distribution shift; decisions about people must also follow their domain's own rules and review.")
SE_NOTE = ("se: naive standard error of the mean over folds (sd/sqrt(folds)); it ignores that folds share "
           "training rows and so understates the uncertainty. se_corrected: Nadeau & Bengio (2003) corrected "
           "standard error, sqrt((1/J + n_val/n_train) * sd^2) over the J = k x repeats folds.")


def collect(fit_paths: list[str]) -> pd.DataFrame:
    """All fit records in one frame."""
    return pd.concat([pd.read_parquet(p) for p in sorted(fit_paths)], ignore_index=True)


def summarise(fits: pd.DataFrame, metrics: list[str], expected_folds: int) -> pd.DataFrame:
    """Per candidate and metric: mean, sd, se, se_corrected, folds, rank (1 = best)."""
    sizes = fits.groupby(["repeat", "fold"])[["n_train", "n_val"]].first()
    n_train, n_val = float(sizes["n_train"].mean()), float(sizes["n_val"].mean())
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
                "se": sd / math.sqrt(n) if n > 1 else float("nan"),
                "se_corrected": corrected_se(values, n_train, n_val),
                "folds": n, "train_mean": float(np.mean(ok[f"train_{metric}"])) if n else float("nan"),
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


def corrected_se(values: np.ndarray, n_train: float, n_val: float) -> float:
    """The Nadeau–Bengio corrected standard error of a candidate's CV mean (:func:`stats.corrected_variance`,
    holdfast's one formula for it), or NaN where it is undefined: fewer than two fold scores, or a fold
    score that is NaN or infinite (a metric undefined on that fold), which ``corrected_variance`` refuses.
    """
    if len(values) < 2 or not np.all(np.isfinite(values)):
        return float("nan")
    return stats.corrected_variance(values, n_train, n_val).corrected_se


def complexity_ranks(candidates: dict[str, dict[str, Any]], selection: dict[str, Any],
                     simplicity: dict[str, dict[str, str]]) -> dict[str, tuple[float, float]]:
    """Order candidates from simplest: by the declared family order, then the family's simplicity parameter."""
    order = {name: i for i, name in enumerate(selection.get("family_order", []))}
    ranks = {}
    for cid, cand in candidates.items():
        declared = simplicity.get(cand["family"])
        value = 0.0
        if declared:
            raw = cand["params"].get(declared["param"])
            value = math.inf if raw is None else float(raw)
            value = value if declared["simpler"] == "lower" else -value
        ranks[cid] = (float(order.get(cand["family"], 0)), value)
    return ranks


def choose(ranking: pd.DataFrame, primary: str, rule: str, complexity: dict[str, tuple[float, float]]
           ) -> tuple[pd.Series, pd.Series | None, pd.Series, str]:
    """Winner, runner-up, best-mean candidate and the reason, on the primary metric under the rule."""
    part = ranking[(ranking["metric"] == primary) & ranking["complete"]].sort_values("rank")
    if part.empty:
        raise FitError(f"no candidate completed every fold on metric '{primary}'; see the fit logs for errors")
    best = part.iloc[0]
    if rule == "best_mean":
        winner, reason = best, "highest mean"
    elif rule == "one_standard_error":
        picked = stats.one_standard_error_choice(part, best["candidate"], complexity)
        winner, reason = part[part["candidate"] == picked.chosen].iloc[0], picked.reason
    else:
        raise FitError(f"selection rule '{rule}' is not known; use best_mean or one_standard_error")
    others = part[part["candidate"] != winner["candidate"]]
    runner = others.iloc[0] if len(others) else None
    return winner, runner, best, reason


def _why(rule: str, winner: pd.Series, runner: pd.Series | None, primary: str, n_candidates: int,
         reason: str) -> str:
    text = (f"{rule}: {winner['candidate']} ({winner['family']}), mean validation {primary} {winner['mean']:.6g} "
            f"(se {winner['se']:.3g}, corrected se {winner['se_corrected']:.3g}, {winner['folds']} folds) among "
            f"{n_candidates} candidates; {reason}")
    if runner is not None:
        margin = winner["mean"] - runner["mean"]
        clear = "more" if abs(margin) > winner["se"] else "less"
        text += (f"; the next best, {runner['candidate']} ({runner['family']}), differs by {margin:.3g}, "
                 f"{clear} than one standard error")
    return text


def candidate_labels(candidates: dict[str, dict[str, Any]], ids: list[str]) -> dict[str, str]:
    """Plot labels: family, the parameters that vary within the family, and the id."""
    by_family: dict[str, list[str]] = {}
    for cid in ids:
        by_family.setdefault(candidates[cid]["family"], []).append(cid)
    labels: dict[str, str] = {}
    for family, members in by_family.items():
        everyone = [c for c, spec in candidates.items() if spec["family"] == family]
        keys = sorted({k for c in everyone for k in candidates[c].get("params", {})})
        varying = [k for k in keys if len({repr(candidates[c].get("params", {}).get(k)) for c in everyone}) > 1]
        for cid in members:
            params = candidates[cid].get("params", {})
            shown = ", ".join(f"{k}={params[k]!r}".replace("'", "") if k in params else f"{k}=default"
                              for k in varying)
            labels[cid] = f"{family} · {shown} · {cid}" if shown else f"{family} · {cid}"
    return labels


CORRECTION_NAMES = {"bbc": "bootstrap bias-corrected", "tibshirani": "Tibshirani–Tibshirani"}


def plot_ranking(ranking: pd.DataFrame, primary: str, path: str, winner: str, rule: str,
                 corrected: dict[str, float], labels: dict[str, str], top: int = 25) -> None:
    """The best candidates' CV means with naive and corrected standard errors; the winner and its corrections marked."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    complete = ranking[(ranking["metric"] == primary) & ranking["complete"]].sort_values("rank")
    part = complete.head(top)
    if winner not in set(part["candidate"]):  # the one-SE rule may pick a candidate outside the top rows
        part = pd.concat([part.head(top - 1), complete[complete["candidate"] == winner]])
    height = max(2.8, 0.34 * len(part) + 1.6)
    fig, ax = plt.subplots(figsize=(8.5, height))
    ypos = np.arange(len(part))[::-1]
    sign = -1.0 if display.is_error(primary) else 1.0  # errors drawn as people read them: positive
    means = sign * part["mean"].to_numpy()
    ax.errorbar(means, ypos, xerr=part["se_corrected"].fillna(0).to_numpy(), fmt="none", ecolor="#b9c9d6",
                elinewidth=1, capsize=4, label="± 1 corrected standard error (Nadeau–Bengio)")
    ax.errorbar(means, ypos, xerr=part["se"].fillna(0).to_numpy(), fmt="none", ecolor="#5b84a6", elinewidth=2.5,
                capsize=0, label="± 1 naive standard error")
    is_winner = (part["candidate"] == winner).to_numpy()
    ax.plot(means[~is_winner], ypos[~is_winner], "o", color="#1f5f8b", markersize=5, linestyle="none")
    ax.plot(means[is_winner], ypos[is_winner], "D", color="#b35900", markersize=7, linestyle="none",
            label=f"winner ({rule.replace('_', ' ')})")
    for (name, value), marker in zip(sorted(corrected.items()), ("x", "+"), strict=False):
        ax.plot([sign * value], ypos[is_winner], marker, color="#b35900", markersize=9, linestyle="none",
                label=f"winner corrected for selection ({CORRECTION_NAMES.get(name, name)})")
    names = [labels.get(c, c) for c in part["candidate"]]
    ax.set_yticks(ypos, names, fontsize=7.5)
    for tick, flag in zip(ax.get_yticklabels(), is_winner, strict=True):
        if flag:
            tick.set_fontweight("bold")
    ax.set_xlabel(f"mean validation {display.label(primary)} over folds ({display.direction(primary)})")
    shown = f"best {len(part)} of {len(complete)}" if len(part) < len(complete) else f"all {len(part)}"
    ax.set_title(f"Candidates by cross-validated score ({shown})", fontsize=10)
    ax.grid(axis="x", alpha=0.3)
    fig.tight_layout()
    below = 0.62 / (ax.get_position().height * height)  # about 0.6 inch under the axes: clear of the x label
    ax.legend(fontsize=7, loc="upper center", bbox_to_anchor=(0.5, -below), ncol=2, frameon=False)

    def _write(tmp: str) -> None:  # tight: long labels and the legend below the axes stay inside the image
        fig.savefig(tmp, format="png", dpi=110, metadata={"Software": None}, bbox_inches="tight")

    write_atomic(path, _write)
    plt.close(fig)


def add_comparison(ranking: pd.DataFrame, matrix: pd.DataFrame, winner: str, primary: str,
                   n_train: np.ndarray, n_val: np.ndarray) -> pd.DataFrame:
    """Columns diff_vs_winner, diff_se, t, p (corrected resampled t-test) on the primary metric's rows."""
    tests = stats.compare_with_winner(matrix, winner, n_train, n_val).set_index("candidate")
    out = ranking.copy()
    for column, source in (("diff_vs_winner", "mean_difference"), ("diff_se", "corrected_se"), ("t", "t"),
                           ("p", "p")):
        values = out["candidate"].map(tests[source]).astype(float)
        out[column] = values.where(out["metric"] == primary)
    return out


def optimism(gathered: OofCollector | None, dev: pd.DataFrame, target: str, primary: str, task: str,
             matrix: pd.DataFrame, winner: str, draws: int, seed: int,
             scorer: Callable[[Any, Any], float] | None) -> dict[str, Any]:
    """How much the winner's CV mean flatters it: Tibshirani & Tibshirani (2009) and BBC-CV (2018).

    ``gathered``: the complete candidates' out-of-fold outputs on the rows of ``dev`` (:func:`gather_oof`),
    None when there are fewer than two such rows.
    """
    raw = float(matrix[winner].mean())
    tt = optimism_estimates.tibshirani_bias(matrix, winner)
    bbc, bbc_note = None, ""
    if gathered is not None and scorer is not None:
        arrays = gathered.arrays()
        bbc = optimism_estimates.bbc_cv(arrays, dev[target].to_numpy(), scorer, draws=draws, seed=seed)
    else:
        bbc_note = ("not computed: BBC needs out-of-fold predictions of the same rows in every repeat, and "
                    "repeated holdouts validate different rows in each repeat")
    summary = optimism_estimates.optimism_summary(raw, tt, bbc)
    summary.update({
        "metric": primary, "winner": winner,
        "note": ("optimism = raw CV mean - corrected estimate (score units; positive = the raw mean flatters the "
                 "winner). tibshirani: Tibshirani & Tibshirani, Ann. Appl. Stat. 3(2), 2009, from per-fold scores; "
                 "bbc: bootstrap bias-corrected CV, Tsamardinos, Greasidou & Borboudakis, Machine Learning 107, "
                 "2018, from the stored out-of-fold predictions (it estimates the best-mean selection procedure)."),
    })
    folds_per_repeat = int(matrix.index.get_level_values("fold").nunique())
    summary["tibshirani"]["folds_per_repeat"] = folds_per_repeat
    caution = optimism_estimates.tibshirani_caution(folds_per_repeat)
    if caution:
        summary["tibshirani"]["caution"] = caution
    if summary["bbc"] is not None:
        summary["bbc"]["seed"] = seed
    else:
        summary["bbc_note"] = bbc_note
    return summary


def validated_in_every_repeat(folds_table: pd.DataFrame, dev_keys: pd.Series) -> np.ndarray:
    """Mask over the development rows: validated in every repeat when every repeat validates the same rows,
    else none (BBC compares each row's predictions across repeats)."""
    rows = key_positions(dev_keys, folds_table[KEY])
    validated = folds_table["fold"].notna().to_numpy() & (rows >= 0)
    per_repeat = []
    for repeat in sorted(folds_table["repeat"].unique()):
        mask = np.zeros(len(dev_keys), dtype=bool)
        mask[rows[validated & (folds_table["repeat"] == repeat).to_numpy()]] = True
        per_repeat.append(mask)
    if not per_repeat or any(not np.array_equal(mask, per_repeat[0]) for mask in per_repeat[1:]):
        return np.zeros(len(dev_keys), dtype=bool)
    return per_repeat[0]


def gather_oof(oof_paths: list[str], dev_keys: pd.Series, counted: np.ndarray, candidates: list[str],
               classes: list[Any] | None, scorer: Callable[[Any, Any], float] | None, exp: Path | None = None,
               wanted: set[str] | None = None, folds_sha256: str = "") -> tuple[OofCollector, dict[str, Any]]:
    """The complete candidates' out-of-fold outputs on the ``counted`` development rows, read one family's
    tables at a time (with ``exp``: the ``wanted`` candidates' outputs archived in history/ on the way).

    Each table is first given the columns and types the concatenation of all of them would have, so the
    arrays, the archived files and any error are those of concatenating every table at once, as before:
    only the memory differs (200 candidates x 100,000 rows took over 3.7 GiB that way).
    """
    import pyarrow.parquet as pq

    paths = sorted(oof_paths)
    template = pd.concat([pq.read_schema(p).empty_table().to_pandas() for p in paths], ignore_index=True)
    position = np.where(counted, np.cumsum(counted) - 1, -1)  # dev position -> position among counted rows
    gathered = OofCollector(int(counted.sum()), candidates, classes, list(template.columns),
                            template["prediction"].dtype, scorer)
    archived: dict[str, Any] = {}
    for _, group in itertools.groupby(paths, key=lambda p: str(Path(p).parent)):
        table = pd.concat([read_parquet(p) for p in group], ignore_index=True)
        for column in template.columns:
            if column not in table.columns:
                table[column] = np.nan  # as the concatenation fills a column another table has
            elif table[column].dtype != template[column].dtype:
                table[column] = table[column].astype(template[column].dtype)
        table = table[list(template.columns)]
        rows = key_positions(dev_keys, table[KEY])
        gathered.add(table, np.where(rows >= 0, position[np.maximum(rows, 0)], -1))
        if exp is not None and wanted:
            archived.update(archive_oof(exp, table, rows, folds_sha256, wanted))
    return gathered, archived


def rounds_summary(index: dict[str, Any], round_number: int, folds_sha256: str) -> dict[str, Any]:
    """How many rounds and candidates the choice rests on, and which candidates were scored on which folds."""
    by_table: dict[str, list[str]] = {}
    for cid, entry in sorted(index["candidates"].items()):
        by_table.setdefault(entry["fold_table"], []).append(cid)
    tried = len(index["candidates"])
    return {
        "count": round_number, "candidates_tried": tried,
        "scored_on": {index["fold_tables"].get(t, t): ids for t, ids in sorted(by_table.items())},
        "current_folds_sha256": folds_sha256,
        "text": f"chosen after {round_number} round{'s' if round_number != 1 else ''}, {tried} candidate"
                f"{'s' if tried != 1 else ''} tried in all",
    }


def optimism_over_history(exp: Path, index: dict[str, Any], dev: pd.DataFrame, rows: np.ndarray, target: str,
                          primary: str, task: str, winner: str, raw: float, folds_sha256: str, draws: int,
                          seed: int) -> dict[str, Any]:
    """The winner's optimism counting every candidate ever tallied (history/), not only the current set.

    ``rows``: the positions in dev.parquet of the rows of ``dev``.

    BBC-CV draws over every complete candidate of every round; Tibshirani–Tibshirani compares the winner's
    fold scores with the best of every candidate scored on the current fold table.
    """
    same_folds = candidates_on(index, folds_sha256)
    matrix = stats.fold_score_matrix(fits_of(exp, index, same_folds), primary).dropna(axis=1)
    tt = optimism_estimates.tibshirani_bias(matrix, winner) if winner in matrix.columns else None
    classes = sorted(pd.unique(dev[target]).tolist()) if task == "classification" else None
    complete = sorted(c for c, e in index["candidates"].items() if e["complete"])
    bbc, left_out = None, []
    if len(dev) >= 2:
        scorer = optimism_estimates.sklearn_scorer(primary, task, classes)
        arrays, left_out = oof_by_repeat(exp, index, complete, rows, classes,
                                         keep=lambda outputs: optimism_estimates.kept_outputs(scorer, outputs))
        if arrays and arrays[0]:
            bbc = optimism_estimates.bbc_cv(arrays, dev[target].to_numpy(), scorer, draws=draws, seed=seed)
    summary = optimism_estimates.optimism_summary(raw, tt, bbc)
    summary.update({
        "metric": primary, "winner": winner, "scope": "every candidate tried in every selection round",
        "tibshirani_candidates": len(matrix.columns), "bbc_candidates": len(complete) - len(left_out),
        "left_out": left_out,
        "note": ("optimism = raw CV mean - corrected estimate (score units; positive = the raw mean flatters the "
                 "winner), counting every candidate tried in every round: BBC-CV (Tsamardinos, Greasidou & "
                 "Borboudakis, Machine Learning 107, 2018) over the stored out-of-fold predictions of all of them; "
                 "Tibshirani & Tibshirani (Ann. Appl. Stat. 3(2), 2009) over those scored on the current folds."),
    })
    if summary["tibshirani"] is not None:
        folds_per_repeat = int(matrix.index.get_level_values("fold").nunique())
        summary["tibshirani"]["folds_per_repeat"] = folds_per_repeat
        caution = optimism_estimates.tibshirani_caution(folds_per_repeat)
        if caution:
            summary["tibshirani"]["caution"] = caution
    if summary["bbc"] is not None:
        summary["bbc"]["seed"] = seed
    return summary


def tally(fit_paths: list[str], oof_paths: list[str], dev_path: str, candidates: dict[str, dict[str, Any]],
          metrics: list[str], selection: dict[str, Any], simplicity: dict[str, dict[str, str]], target: str,
          task: str, expected_folds: int, ranking_path: str, choice_path: str, plot_path: str, ledger_path: str,
          folds_path: str, rule_name: str | None = None, scope: str = "main",
          with_rounds: bool = False) -> dict[str, Any]:
    """Write ranking.parquet, choice.json and the ranking plot; return the choice.

    With ``with_rounds`` (the experiment's own tally, not a nested one) the candidates are also archived in
    history/ and the optimism estimates count every candidate tried in every selection round; the round number
    comes from the experiment's ``rounds/current.json``.
    """
    fits = collect(fit_paths)
    ranking = summarise(fits, metrics, expected_folds)
    primary = metrics[0]
    rule = selection["rule"]
    complexity = complexity_ranks(candidates, selection, simplicity)
    winner, runner, best, reason = choose(ranking, primary, rule, complexity)
    matrix = stats.fold_score_matrix(fits, primary)
    complete = sorted(ranking.loc[ranking["complete"], "candidate"].unique())
    matrix = matrix[complete]
    n_train, n_val = stats.fold_sizes(fits, matrix.index)
    if len(complete) > 1:
        ranking = add_comparison(ranking, matrix, winner["candidate"], primary, n_train, n_val)
    else:
        ranking = ranking.assign(diff_vs_winner=np.nan, diff_se=np.nan, t=np.nan, p=np.nan)
    dev_all = read_parquet(dev_path, columns=[KEY, target])
    # Rows validated in every repeat (all inner rows for complete schemes; holdout and forward folds
    # validate some rows only). Nested: the fold table lists the inner rows only.
    folds_table = read_parquet(folds_path, columns=[KEY, "repeat", "fold"])
    every = validated_in_every_repeat(folds_table, dev_all[KEY])
    dev = dev_all[every]
    folds_sha256 = sha256_file(folds_path)
    classes = sorted(pd.unique(dev[target]).tolist()) if task == "classification" else None
    scorer = optimism_estimates.sklearn_scorer(primary, task, classes) if len(dev) >= 2 else None
    wanted: set[str] = set()
    round_number = 0
    if with_rounds:  # the files this tally builds on, each the copy the ledger last recorded
        entries = ledger.read(ledger_path) if Path(ledger_path).exists() else []
        round_number = current_round(Path(ranking_path).parent, entries)
        wanted = to_archive(read_index_for_tally(Path(ranking_path).parent, entries), fits, folds_sha256)
        del entries
    gathered, archived = gather_oof(oof_paths, dev_all[KEY], every, list(matrix.columns), classes, scorer,
                                    Path(ranking_path).parent if with_rounds else None, wanted,
                                    folds_sha256)
    optimistic = optimism(gathered if len(dev) >= 2 else None, dev, target, primary, task, matrix,
                          winner["candidate"], int(selection["bootstrap"]), int(selection["seed"]), scorer)
    del gathered
    rounds_info: dict[str, Any] | None = None
    if with_rounds:
        index = archive(Path(ranking_path).parent, fits, archived, folds_sha256, round_number, candidates)
        current = set(ranking["candidate"])
        rounds_info = rounds_summary(index, round_number, folds_sha256)
        if set(index["candidates"]) - current:  # earlier rounds tried more: count them too
            this_round = optimistic
            optimistic = optimism_over_history(Path(ranking_path).parent, index, dev, np.flatnonzero(every), target,
                                               primary, task, winner["candidate"],
                                               float(matrix[winner["candidate"]].mean()), folds_sha256,
                                               int(selection["bootstrap"]), int(selection["seed"]))
            optimistic["this_round_only"] = {k: this_round.get(k) for k in ("tibshirani", "bbc")}
        optimistic["candidates_counted"] = rounds_info["candidates_tried"]
    n_candidates = int(ranking["candidate"].nunique())
    failed = sorted(set(ranking.loc[~ranking["complete"], "candidate"]))
    primary_rows = ranking[ranking["metric"] == primary].set_index("candidate")
    comparison = [
        {"candidate": cid, "family": row["family"], "mean": row["mean"], "diff_vs_winner": row["diff_vs_winner"],
         "diff_se": row["diff_se"], "t": row["t"], "p": row["p"]}
        for cid, row in primary_rows.sort_values("rank").iterrows()
        if cid != winner["candidate"] and row["complete"]
    ][:10]
    choice: dict[str, Any] = {
        "rule": rule,
        # What the rule needs besides the ranking, so the audit can re-apply it to ranking.parquet.
        "rule_settings": {"family_order": list(selection.get("family_order") or []), "simplicity": simplicity},
        "metric": primary,
        "winner": {"candidate": winner["candidate"], "family": winner["family"], "mean": winner["mean"],
                   "se": winner["se"], "se_corrected": winner["se_corrected"], "folds": int(winner["folds"]),
                   "spec": candidates[winner["candidate"]]},
        "best_mean": {"candidate": best["candidate"], "family": best["family"], "mean": best["mean"],
                      "se": best["se"]},
        "runner_up": None if runner is None else {
            "candidate": runner["candidate"], "family": runner["family"], "mean": runner["mean"], "se": runner["se"]},
        "margin": None if runner is None else float(winner["mean"] - runner["mean"]),
        "comparison": comparison,
        "comparison_note": ("winner minus each other candidate on the same folds; diff_se, t and p from the "
                            "corrected resampled t-test (Nadeau & Bengio 2003), two-sided, folds - 1 degrees of "
                            "freedom. Folds overlap, so p-values are approximate; many comparisons are made."),
        "optimism": optimistic,
        **({"rounds": rounds_info} if rounds_info is not None else {}),
        "uncertainty_note": SE_NOTE,
        "candidates": n_candidates,
        "failed_candidates": failed,
        "why": _why(rule, winner, runner, primary, n_candidates, reason),
        "folds_sha256": sha256_file(folds_path),
        "caution": CAUTION,
    }
    write_parquet(ranking_path, ranking)
    corrected = {name: optimistic[name]["corrected"] for name in ("bbc", "tibshirani")
                 if optimistic.get(name) and optimistic[name].get("corrected") is not None}
    shown_ids = sorted(ranking.loc[ranking["metric"] == primary, "candidate"])
    plot_ranking(ranking, primary, plot_path, winner["candidate"], rule, corrected,
                 candidate_labels(candidates, shown_ids))
    write_json(choice_path, choice)
    ledger.append(ledger_path, "tally", {
        "scope": scope, "winner": winner["candidate"], "rule": rule, "metric": primary, "candidates": n_candidates,
        "failed": len(failed), "fit_files": len(fit_paths), "ranking_sha256": sha256_file(ranking_path),
        "fit_groups": sorted({Path(p).parent.name for p in fit_paths}),
        "choice_sha256": sha256_file(choice_path), "plot": str(Path(plot_path).name),
        "bbc_seed": int(selection["seed"]), "bbc_draws": int(selection["bootstrap"]),
        **({"round": rounds_info["count"], "candidates_tried": rounds_info["candidates_tried"],
            "history_index_sha256": sha256_file(Path(ranking_path).parent / INDEX_NEXT)}
           if rounds_info is not None else {}),
    }, rule=rule_name)
    if rounds_info is not None:
        promote(Path(ranking_path).parent)  # recorded first, so the index in place is always a recorded one
    return choice
