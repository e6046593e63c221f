"""Diagnostics of the selection (reduce step): what the stored fits and out-of-fold predictions say about the winner.

- validation curves: per family and numeric grid parameter, the mean training and validation score over folds
  against the parameter, the other parameters held at the family's best candidate (the winner in its own family);
- the winner's learning curve, from the learning-curve jobs (:mod:`holdfast.learning`), summarised by a step of its
  own (:func:`summarise_learning`) so that the rest does not wait for those jobs and runs beside them;
- classification: the winner's out-of-fold confusion matrix (scikit-learn's ``confusion_matrix``) and reliability
  curve (scikit-learn's ``calibration_curve``, equal-width bins);
- regression: the winner's out-of-fold residuals (true minus predicted) against its predictions.

Every number goes to ``diagnostics/diagnostics.json`` (the learning curve's to ``diagnostics/learning.json``); the
pictures drawn from them go to ``diagnostics/plots/`` (the learning curve's to ``diagnostics/learning.png``).
Only development rows are read. Scores keep the scorer convention in the JSON (greater is better); the pictures
show errors positive in the target's unit, through :mod:`holdfast.display`.
"""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from . import display, ledger
from ._io import read_json, read_parquet, sha256_file, write_atomic, write_json
from .dataset import KEY
from .errors import DataError
from .layout import group_family

MAX_POINTS = 2000  # residuals drawn as points; more rows are summarised by the bins and sampled for the picture
RESIDUAL_BINS = 10
LEARNING_SUMMARY = "learning.json"  # under diagnostics/, beside diagnostics.json; its picture is learning.png


def _numeric(value: Any) -> bool:
    return isinstance(value, int | float) and not isinstance(value, bool) and math.isfinite(float(value))


def _mean_sd(values: np.ndarray) -> tuple[float | None, float | None]:
    values = values[~np.isnan(values)]
    if not len(values):
        return None, None
    return float(np.mean(values)), float(np.std(values, ddof=1)) if len(values) > 1 else None


def candidate_scores(fits: pd.DataFrame, metric: str) -> pd.DataFrame:
    """Per complete candidate (ok on every fold it was fitted on): family, params, mean and sd over folds of its
    stored training and validation scores."""
    rows = []
    for cid, part in fits.groupby("candidate", sort=True):
        if not bool((part["status"] == "ok").all()):
            continue
        val_mean, val_sd = _mean_sd(part[f"val_{metric}"].to_numpy(dtype=float))
        train_mean, train_sd = _mean_sd(part[f"train_{metric}"].to_numpy(dtype=float))
        rows.append({"candidate": str(cid), "family": str(part["family"].iloc[0]),
                     "params": json.loads(part["params"].iloc[0]), "folds": len(part),
                     "val_mean": val_mean, "val_sd": val_sd, "train_mean": train_mean, "train_sd": train_sd})
    return pd.DataFrame(rows, columns=["candidate", "family", "params", "folds", "val_mean", "val_sd", "train_mean",
                                       "train_sd"])


def validation_curves(fits: pd.DataFrame, metric: str, winner: str) -> list[dict[str, Any]]:
    """One curve per family and grid parameter whose values are all numbers (at least two of them).

    The parameter varies; the family's other parameters stay at its best candidate's values (the winner's in
    the winner's family, else the best mean validation score, ties to the smallest id), as scikit-learn's
    validation curve varies one parameter of one estimator. Points are means over folds of the stored scores.
    """
    scores = candidate_scores(fits, metric)
    curves = []
    for family, part in scores.groupby("family", sort=True):
        params = part["params"].tolist()
        keys = sorted({k for p in params for k in p})
        if winner in set(part["candidate"]):
            best = part[part["candidate"] == winner].iloc[0]
        else:
            ranked = part.assign(order=-part["val_mean"].astype(float)).sort_values(["order", "candidate"])
            best = ranked.iloc[0]
        for key in keys:
            values = [p.get(key) for p in params]
            if len({json.dumps(v) for v in values}) < 2 or not all(_numeric(v) for v in values):
                continue
            fixed = {k: v for k, v in best["params"].items() if k != key}
            members = part[[{k: v for k, v in p.items() if k != key} == fixed for p in params]]
            members = members.assign(value=[float(p[key]) for p in members["params"]]).sort_values("value")
            if len(members) < 2:
                continue
            positive = bool((members["value"] > 0).all())
            curves.append({
                "family": str(family), "param": key, "fixed": fixed,
                "chosen_value": best["params"][key], "chosen_candidate": str(best["candidate"]),
                "chosen_is_winner": str(best["candidate"]) == winner,
                "log_scale": positive and float(members["value"].max()) / float(members["value"].min()) >= 100,
                "points": [{"value": p[key], "candidate": r["candidate"], "folds": int(r["folds"]),
                            "val_mean": r["val_mean"], "val_sd": r["val_sd"], "train_mean": r["train_mean"],
                            "train_sd": r["train_sd"]}
                           for r, p in zip(members.to_dict("records"), members["params"], strict=True)],
            })
    return curves


def learning_summary(table: pd.DataFrame, metrics: list[str]) -> list[dict[str, Any]]:
    """Per training size: mean training rows and, per metric, mean and sd over folds of the training and
    validation scores (failed fits left out and counted)."""
    out = []
    for fraction, part in table.groupby("fraction", sort=True):
        ok = part[part["status"] == "ok"]
        point: dict[str, Any] = {"fraction": float(fraction), "n_train": float(part["n_train"].mean()),
                                 "folds": len(ok), "failed": int(len(part) - len(ok)), "metrics": {}}
        for metric in metrics:
            train_mean, train_sd = _mean_sd(ok[f"train_{metric}"].to_numpy(dtype=float))
            val_mean, val_sd = _mean_sd(ok[f"val_{metric}"].to_numpy(dtype=float))
            point["metrics"][metric] = {"train_mean": train_mean, "train_sd": train_sd, "val_mean": val_mean,
                                        "val_sd": val_sd}
        out.append(point)
    return out


def winner_oof(oof_paths: list[str], dev: pd.DataFrame, target: str, winner: str, family: str) -> pd.DataFrame:
    """The winner's stored out-of-fold rows (every repeat), each with its true target value."""
    frames = []
    for path in sorted(oof_paths):
        if group_family(Path(path).parent.name) != family:  # the family's own files, or its parts' (forest.2)
            continue
        frame = pd.read_parquet(path)
        frames.append(frame[frame["candidate"] == winner])
    oof = pd.concat(frames, ignore_index=True)
    truth = dev.set_index(KEY)[target]
    oof["truth"] = truth.reindex(oof[KEY]).to_numpy()
    return oof.sort_values(["repeat", "fold", KEY], kind="stable").reset_index(drop=True)


def confusion(truth: np.ndarray, predicted: np.ndarray, labels: list[Any]) -> dict[str, Any]:
    """scikit-learn's confusion matrix of out-of-fold predictions: rows true class, columns predicted class."""
    from sklearn.metrics import confusion_matrix

    matrix = confusion_matrix(truth, predicted, labels=labels)
    return {"labels": [_plain(v) for v in labels], "matrix": matrix.astype(int).tolist(), "rows": len(truth)}


def calibration(truth: np.ndarray, proba: np.ndarray, labels: list[Any], bins: int) -> list[dict[str, Any]]:
    """Reliability curves by scikit-learn's ``calibration_curve`` (equal-width bins), with each bin's row count.

    Two classes: one curve, for the second label (the positive class of scikit-learn's binary scorers); more:
    one curve per class, that class against the rest.
    """
    from sklearn.calibration import calibration_curve

    which = [len(labels) - 1] if len(labels) == 2 else list(range(len(labels)))
    edges = np.linspace(0.0, 1.0, bins + 1)
    curves = []
    for j in which:
        hit = (truth == labels[j]).astype(int)
        observed, predicted = calibration_curve(hit, proba[:, j], n_bins=bins, strategy="uniform")
        counts = np.bincount(np.searchsorted(edges[1:-1], proba[:, j]), minlength=bins)
        curves.append({"class": _plain(labels[j]), "predicted": predicted.tolist(), "observed": observed.tolist(),
                       "count": counts[counts > 0].astype(int).tolist()})
    return curves


def residuals(truth: np.ndarray, predicted: np.ndarray, seed: int = 0) -> dict[str, Any]:
    """Out-of-fold residuals (true minus predicted): a summary, bins by prediction quantile, and the points (a
    seeded sample of MAX_POINTS when there are more rows)."""
    residual = truth.astype(float) - predicted.astype(float)
    order = np.argsort(predicted, kind="stable")
    bins = []
    for part in np.array_split(order, min(RESIDUAL_BINS, len(order))):
        r = residual[part]
        bins.append({"rows": len(part), "prediction_mean": float(predicted[part].mean()),
                     "prediction_low": float(predicted[part].min()), "prediction_high": float(predicted[part].max()),
                     "residual_mean": float(r.mean()), "residual_sd": float(r.std(ddof=1)) if len(r) > 1 else None})
    shown = np.arange(len(residual))
    if len(shown) > MAX_POINTS:
        shown = np.sort(np.random.default_rng(seed).choice(len(residual), MAX_POINTS, replace=False))
    return {"rows": len(residual), "mean": float(residual.mean()), "mean_absolute": float(np.abs(residual).mean()),
            "sd": float(residual.std(ddof=1)) if len(residual) > 1 else None,
            "quantiles": {str(q): float(np.quantile(residual, q)) for q in (0.05, 0.25, 0.5, 0.75, 0.95)},
            "bins": bins, "points": {"index": shown.tolist(), "prediction": predicted[shown].astype(float).tolist(),
                                     "residual": residual[shown].tolist()}}


def _plain(value: Any) -> Any:
    return value.item() if isinstance(value, np.generic) else value


def axis_label(metric: str, unit: str | None) -> str:
    """'MAE (days)', 'ROC AUC': the metric's plain name with its unit."""
    shown = display.unit(metric, unit)
    return f"{display.label(metric)} ({shown})" if shown else display.label(metric)


def diagnose(fit_paths: list[str], oof_paths: list[str], learning: bool, dev_path: str, choice_path: str,
             target: str, task: str, metrics: list[str], bins: int, unit: str | None, out_path: str, plots_dir: str,
             ledger_path: str, rule: str | None = None) -> dict[str, Any]:
    """Write diagnostics/diagnostics.json and its pictures; append one ledger line with the hashes of both.

    ``learning``: whether the learning curve is on; its numbers and picture are :func:`summarise_learning`'s.
    """
    choice = read_json(choice_path)
    primary = str(choice["metric"])
    winner, family = str(choice["winner"]["candidate"]), str(choice["winner"]["family"])
    fits = pd.concat([pd.read_parquet(p) for p in sorted(fit_paths)], ignore_index=True)
    result: dict[str, Any] = {
        "winner": {"candidate": winner, "family": family}, "metric": primary, "metrics": metrics, "task": task,
        "validation_curves": validation_curves(fits, primary, winner),
        "validation_note": ("mean over folds of each candidate's stored training and validation scores; the other "
                            "parameters held at the family's best candidate (the winner in its own family)"),
    }
    result["learning_curve"] = {"summary": LEARNING_SUMMARY} if learning else {
        "unavailable": "turned off (diagnostics.learning_curve: false)"}
    dev = read_parquet(dev_path, columns=[KEY, target])
    oof = winner_oof(oof_paths, dev, target, winner, family)
    result["out_of_fold"] = {"rows": len(oof), "repeats": int(oof["repeat"].nunique())}
    if task == "classification":
        labels = sorted(pd.unique(dev[target]).tolist())
        result["confusion"] = confusion(oof["truth"].to_numpy(), oof["prediction"].to_numpy(), labels)
        columns = [f"proba_{c}" for c in labels]
        if all(c in oof.columns for c in columns) and oof[columns].notna().all().all():
            result["calibration"] = {"bins": bins, "strategy": "uniform",
                                     "curves": calibration(oof["truth"].to_numpy(), oof[columns].to_numpy(float),
                                                           labels, bins)}
        else:
            result["calibration"] = {"unavailable": "the winner gives no class probabilities"}
    else:
        result["residuals"] = residuals(oof["truth"].to_numpy(float), oof["prediction"].to_numpy(float))
    pictures = draw(result, unit)
    folder = Path(plots_dir)
    folder.mkdir(parents=True, exist_ok=True)
    result["plots"] = {name: f"plots/{name}.png" for name in sorted(pictures)}
    for name, data in pictures.items():
        write_atomic(folder / f"{name}.png", lambda tmp, data=data: Path(tmp).write_bytes(data))
    write_json(out_path, result)

    def png(name: str) -> str | None:
        path = folder / f"{name}.png"
        return sha256_file(path) if name in pictures else None

    ledger.append(ledger_path, "diagnostics", {
        "scope": "main", "winner": winner, "metric": primary, "curves": len(result["validation_curves"]),
        "oof_rows": len(oof), "choice_sha256": sha256_file(choice_path), "diagnostics_sha256": sha256_file(out_path),
        # learning.png under plots/ is learning_summary's diagnostics/learning.png now; null says this run wrote none
        "validation_png_sha256": png("validation"), "learning_png_sha256": None,
        "confusion_png_sha256": png("confusion"), "calibration_png_sha256": png("calibration"),
        "residuals_png_sha256": png("residuals"),
    }, rule=rule)
    return result


def summarise_learning(learning_paths: list[str], choice_path: str, metrics: list[str], unit: str | None,
                       out_path: str, picture_path: str, ledger_path: str, rule: str | None = None) -> dict[str, Any]:
    """Write diagnostics/learning.json (the winner's learning curve: means and sds over the fold tables) and
    diagnostics/learning.png; append one ledger line with the hashes of both.

    A step of its own, after every learning-curve job, so that :func:`diagnose` does not wait for them. Tables of
    another candidate than the winner are refused: Snakemake remakes every table after each tally.
    """
    choice = read_json(choice_path)
    primary = str(choice["metric"])
    winner = str(choice["winner"]["candidate"])
    table = pd.concat([pd.read_parquet(p) for p in sorted(learning_paths)], ignore_index=True)
    stale = sorted(set(table["candidate"]) - {winner})
    if stale:
        raise DataError(f"the learning-curve tables under diagnostics/learning/ are of candidate {stale[0]}, not "
                        f"the winner {winner}; run 'holdfast run' again to remake them")
    result = {"candidate": winner, "metric": primary, "files": len(learning_paths),
              "points": learning_summary(table, metrics)}
    picture = draw_learning(result, primary, unit)
    write_atomic(picture_path, lambda tmp: Path(tmp).write_bytes(picture))
    write_json(out_path, result)
    ledger.append(ledger_path, "learning_summary", {
        "scope": "main", "winner": winner, "metric": primary, "files": len(learning_paths),
        "points": len(result["points"]), "choice_sha256": sha256_file(choice_path),
        "summary_sha256": sha256_file(out_path), "png_sha256": sha256_file(picture_path),
    }, rule=rule)
    return result


# --- pictures ---------------------------------------------------------------------------------------------------------

INK, TRAIN, VALID, MARK = "#1b1f24", "#8a5a00", "#1d4e89", "#a1261d"


def _shown(metric: str, value: Any) -> float:
    shown = display.value(metric, value)
    return float("nan") if shown is None else shown


def _band(ax: Any, x: list[float], means: list[Any], sds: list[Any], metric: str, color: str, label: str,
          style: str) -> None:
    y = np.array([_shown(metric, m) for m in means])
    sd = np.array([s if s is not None else 0.0 for s in sds], dtype=float)
    ax.plot(x, y, style, color=color, label=label, marker="o", markersize=4)
    ax.fill_between(x, y - sd, y + sd, color=color, alpha=0.12, linewidth=0)


def _png(fig: Any) -> bytes:
    import io

    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=100, metadata={"Software": None}, bbox_inches="tight")
    import matplotlib.pyplot as plt

    plt.close(fig)
    return buffer.getvalue()


def _pyplot() -> Any:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def draw_learning(learning: dict[str, Any], metric: str, unit: str | None) -> bytes:
    """The picture of the winner's learning curve (a :func:`summarise_learning` result)."""
    plt = _pyplot()
    fig, ax = plt.subplots(figsize=(6, 3.8))
    x = [p["n_train"] for p in learning["points"]]
    scores = [p["metrics"][metric] for p in learning["points"]]
    _band(ax, x, [s["train_mean"] for s in scores], [s["train_sd"] for s in scores], metric, TRAIN,
          "training", "--")
    _band(ax, x, [s["val_mean"] for s in scores], [s["val_sd"] for s in scores], metric, VALID,
          "validation", "-")
    ax.set_xlabel("training rows (mean over folds)")
    ax.set_ylabel(axis_label(metric, unit))
    ax.set_title(f"Learning curve of the winner {learning['candidate']}: mean over folds ± 1 sd "
                 f"({display.direction(metric)})", fontsize=9)
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8)
    fig.tight_layout()
    return _png(fig)


def draw(result: dict[str, Any], unit: str | None) -> dict[str, bytes]:
    """The pictures of a diagnostics result, by name (only those it has data for; the learning curve's is
    :func:`draw_learning`'s)."""
    plt = _pyplot()

    metric = result["metric"]
    out: dict[str, bytes] = {}
    curves = result["validation_curves"]
    if curves:
        columns = min(3, len(curves))
        rows = math.ceil(len(curves) / columns)
        fig, axes = plt.subplots(rows, columns, figsize=(4.2 * columns, 3.3 * rows), squeeze=False)
        for ax, curve in zip(axes.flat, curves, strict=False):
            x = [float(p["value"]) for p in curve["points"]]
            _band(ax, x, [p["train_mean"] for p in curve["points"]], [p["train_sd"] for p in curve["points"]],
                  metric, TRAIN, "training", "--")
            _band(ax, x, [p["val_mean"] for p in curve["points"]], [p["val_sd"] for p in curve["points"]],
                  metric, VALID, "validation", "-")
            ax.axvline(float(curve["chosen_value"]), color=MARK, linewidth=1, linestyle=":",
                       label="the winner" if curve["chosen_is_winner"] else "best in family")
            if curve["log_scale"]:
                ax.set_xscale("log")
            ax.set_xlabel(curve["param"])
            ax.set_ylabel(axis_label(metric, unit))
            ax.set_title(f"{curve['family']}: {curve['param']}", fontsize=9)
            ax.grid(alpha=0.3)
            ax.legend(fontsize=7)
        for ax in list(axes.flat)[len(curves):]:
            ax.set_visible(False)
        fig.suptitle(f"Validation curves: mean over folds ± 1 sd ({display.direction(metric)})", fontsize=10)
        fig.tight_layout()
        out["validation"] = _png(fig)
    if "confusion" in result:
        block = result["confusion"]
        matrix = np.array(block["matrix"])
        labels = [str(v) for v in block["labels"]]
        fig, ax = plt.subplots(figsize=(1.2 * len(labels) + 2.6, 1.0 * len(labels) + 1.8))
        ax.imshow(matrix, cmap="Blues")
        for (i, j), count in np.ndenumerate(matrix):
            ax.text(j, i, str(count), ha="center", va="center",
                    color="white" if count > matrix.max() / 2 else INK, fontsize=9)
        ax.set_xticks(range(len(labels)), labels)
        ax.set_yticks(range(len(labels)), labels)
        ax.set_xlabel("predicted class (out of fold)")
        ax.set_ylabel("true class")
        ax.set_title(f"Confusion matrix of the winner, {block['rows']} out-of-fold predictions", fontsize=9)
        fig.tight_layout()
        out["confusion"] = _png(fig)
    if (result.get("calibration") or {}).get("curves"):
        fig, ax = plt.subplots(figsize=(5, 4.4))
        ax.plot([0, 1], [0, 1], ":", color="#777777", label="perfectly calibrated")
        for curve in result["calibration"]["curves"]:
            ax.plot(curve["predicted"], curve["observed"], "-o", markersize=4, label=f"class {curve['class']}")
        ax.set_xlim(0, 1)
        ax.set_ylim(0, 1)
        ax.set_xlabel("mean predicted probability in the bin")
        ax.set_ylabel("observed share of the class")
        ax.set_title(f"Reliability of the winner's probabilities ({result['calibration']['bins']} equal bins)",
                     fontsize=9)
        ax.grid(alpha=0.3)
        ax.legend(fontsize=8)
        fig.tight_layout()
        out["calibration"] = _png(fig)
    if "residuals" in result:
        block = result["residuals"]
        shown = f" ({unit})" if unit else ""
        fig, ax = plt.subplots(figsize=(6, 3.8))
        ax.scatter(block["points"]["prediction"], block["points"]["residual"], s=6, color=VALID, alpha=0.45,
                   linewidths=0, label="rows" if len(block["points"]["index"]) == block["rows"] else
                   f"{len(block['points']['index'])} of {block['rows']} rows")
        ax.plot([b["prediction_mean"] for b in block["bins"]], [b["residual_mean"] for b in block["bins"]], "-o",
                color=MARK, markersize=4, label="mean residual per tenth of the predictions")
        ax.axhline(0, color=INK, linewidth=0.8)
        ax.set_xlabel(f"out-of-fold prediction{shown}")
        ax.set_ylabel(f"residual: true − predicted{shown}")
        ax.set_title("Residuals of the winner, out of fold", fontsize=9)
        ax.grid(alpha=0.3)
        ax.legend(fontsize=8)
        fig.tight_layout()
        out["residuals"] = _png(fig)
    return out
