"""Nested cross-validation: how well the whole selection procedure does on rows it never saw.

The outer folds split the development rows; for each outer fold the ordinary stages (folds,
fit jobs, tally, refit) run on the outer-training rows only, under ``nested/o<O>/``. This
module scores each outer fold's refit winner on its outer-validation rows and summarises
the outer folds. The sealed test set is never read.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pandas as pd

from . import ledger
from ._io import read_json, sha256_file, write_json
from .dataset import KEY, split_xy
from .errors import DataError
from .refit import load_model
from .scoring import model_outputs, replay, score_outputs
from .stats import corrected_variance


def outer_rows(dev: pd.DataFrame, outer: pd.DataFrame, fold: int) -> np.ndarray:
    """Mask over dev rows validated in one outer fold."""
    keys = set(outer.loc[outer["fold"] == fold, KEY])
    if not keys:
        raise DataError(f"outer fold {fold} has no rows; lower nested.k")
    return dev[KEY].isin(keys).to_numpy()


def score_outer(dev_path: str, outer_path: str, inner_folds_path: str, fold: int, model_path: str,
                choice_path: str, spec: dict[str, Any], metrics: list[str], task: str, score_path: str,
                ledger_path: str, rule: str | None = None) -> dict[str, Any]:
    """Score outer fold ``fold``'s refit winner on that fold's validation rows."""
    dev = pd.read_parquet(dev_path)
    outer = pd.read_parquet(outer_path)
    validation = outer_rows(dev, outer, fold)
    inner_keys = set(pd.read_parquet(inner_folds_path, columns=[KEY])[KEY])
    leaked = inner_keys & set(dev.loc[validation, KEY])
    if leaked:
        raise DataError(f"outer fold {fold}: {len(leaked)} outer-validation row(s) were used in the inner selection; "
                        "the nested folds are corrupt: delete results/<experiment>/nested and re-run")
    choice = read_json(choice_path)
    events = [e for e in ledger.read(ledger_path) if e["event"] == "refit"
              and e["details"].get("scope") == f"o{fold}"]
    # The types the refit recorded (None for ledgers older than that record: static policy alone).
    recorded = events[-1]["details"] if events else {}
    model = load_model(model_path, recorded.get("model_sha256"), recorded.get("model_types"))
    x, y = split_xy(dev[validation], spec)
    outputs = model_outputs(model, x)
    values = score_outputs(metrics, replay(outputs, task, getattr(model, "classes_", None)), y)
    result = {"outer_fold": fold, "winner": choice["winner"]["candidate"], "family": choice["winner"]["family"],
              "inner_cv_mean": choice["winner"]["mean"], "rows": int(validation.sum()),
              "training_rows": len(inner_keys), "scores": values}
    write_json(score_path, result)
    ledger.append(ledger_path, "score_outer", {"scope": f"o{fold}", "winner": result["winner"],
                                               "rows": result["rows"], "score_sha256": sha256_file(score_path)},
                  rule=rule)
    return result


def summarise(score_paths: list[str], metrics: list[str], summary_path: str, ledger_path: str,
              rule: str | None = None) -> dict[str, Any]:
    """Mean, sd and standard error over outer folds per metric, and which candidate won where."""
    scores = [read_json(p) for p in sorted(score_paths)]
    per_metric = {}
    n_train = [s["training_rows"] for s in scores]
    n_val = [s["rows"] for s in scores]
    for metric in metrics:
        values = np.array([s["scores"][metric] for s in scores], dtype=float)
        sd = float(values.std(ddof=1)) if len(values) > 1 else float("nan")
        # The whole selection is one learning procedure scored by k-fold CV over the outer folds, so the
        # Nadeau & Bengio (2003) correction applies to it as to any candidate (holdfast.stats).
        corrected = corrected_variance(values, n_train, n_val).corrected_se if len(values) > 1 else float("nan")
        per_metric[metric] = {"mean": float(values.mean()), "sd": sd,
                              "se": sd / math.sqrt(len(values)) if len(values) > 1 else float("nan"),
                              "se_corrected": corrected, "by_outer_fold": values.tolist()}
    winners: dict[str, int] = {}
    for s in scores:
        winners[s["winner"]] = winners.get(s["winner"], 0) + 1
    summary = {
        "outer_folds": len(scores),
        "metrics": per_metric,
        "winners": [{"outer_fold": s["outer_fold"], "candidate": s["winner"], "family": s["family"],
                     "inner_cv_mean": s["inner_cv_mean"], "outer_score": s["scores"][metrics[0]]} for s in scores],
        "winner_counts": dict(sorted(winners.items())),
        "note": ("Each number estimates how well the whole selection procedure (these candidates, these folds, this "
                 "rule) does on rows it never saw, not how well one particular model does. The winner may differ "
                 "between outer folds; the sealed test set was not used. se is the naive standard error over outer "
                 "folds (outer training sets overlap, so it is too small); se_corrected is the Nadeau & Bengio "
                 "(2003) corrected one, sqrt((1/J + n_val/n_train) * sd^2) over the J outer folds."),
    }
    write_json(summary_path, summary)
    ledger.append(ledger_path, "nested_summary", {"scope": "nested", "outer_folds": len(scores),
                                                  "summary_sha256": sha256_file(summary_path)}, rule=rule)
    return summary
