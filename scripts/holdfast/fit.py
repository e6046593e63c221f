"""One fit job: every candidate of one family on one (repeat, fold).

Map step of the map-then-reduce: each candidate is fitted on the fold's training rows,
scored on its validation rows, and recorded as one flat row (metrics, sizes, seconds,
error). A candidate that fails is recorded with its error; if all fail, the job fails.
"""

from __future__ import annotations

import json
import os
import time
import traceback
import warnings
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from . import ledger
from ._io import sha256_file, write_parquet
from .candidates import build_pipeline
from .dataset import KEY, split_xy
from .errors import FitError
from .folds import fold_masks
from .scoring import model_outputs, replay, score_outputs


def fold_rows(dev: pd.DataFrame, folds: pd.DataFrame, repeat: int, fold: int) -> tuple[np.ndarray, np.ndarray]:
    """Boolean masks over dev rows: (training, validation) for one fold."""
    part = folds[folds["repeat"] == repeat].reset_index(drop=True)
    train_mask, val_mask = fold_masks(part, fold)
    keys = pd.Index(part[KEY])
    if not keys.is_unique:  # never in a checked fold table; kept for the meaning "any listing of the key"
        return (dev[KEY].isin(set(part.loc[train_mask, KEY])).to_numpy(),
                dev[KEY].isin(set(part.loc[val_mask, KEY])).to_numpy())
    where = keys.get_indexer(dev[KEY])  # one hash look-up per dev row; -1: not in the fold table
    listed = where >= 0
    return listed & train_mask[where], listed & val_mask[where]


def fit_one(candidate: dict[str, Any], x_train: pd.DataFrame, y_train: pd.Series, x_val: pd.DataFrame,
            y_val: pd.Series, metrics: list[str], task: str, threads: int,
            allowed: list[str]) -> tuple[dict[str, Any], dict[str, np.ndarray] | None, Any]:
    """Fit and score one candidate. Returns its flat record, validation outputs and classes."""
    record: dict[str, Any] = {"candidate": candidate["id"], "family": candidate["family"],
                              "params": json.dumps(candidate["params"], sort_keys=True),
                              "n_train": len(x_train), "n_val": len(x_val)}
    start = time.perf_counter()
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            model = build_pipeline(candidate, x_train, threads, allowed)
            record["random_state"] = _plain(model.named_steps["model"].get_params(deep=False).get("random_state"))
            model.fit(x_train, y_train)
            record["fit_seconds"] = time.perf_counter() - start
            classes = getattr(model, "classes_", None)
            val_out = model_outputs(model, x_val)
            train_out = model_outputs(model, x_train)
            val_scores = score_outputs(metrics, replay(val_out, task, classes), y_val)
            train_scores = score_outputs(metrics, replay(train_out, task, classes), y_train)
        record.update({f"val_{m}": v for m, v in val_scores.items()})
        record.update({f"train_{m}": v for m, v in train_scores.items()})
        messages = sorted({f"{w.category.__name__}: {str(w.message).splitlines()[0][:160]}" for w in caught})
        record.update({"status": "ok", "error": "", "warnings": " | ".join(messages)})
        return record, val_out, classes
    except Exception as exc:  # a failing candidate must not kill its family
        record.setdefault("fit_seconds", time.perf_counter() - start)
        record.update({f"val_{m}": np.nan for m in metrics})
        record.update({f"train_{m}": np.nan for m in metrics})
        last = traceback.format_exception_only(type(exc), exc)[-1].strip()
        record.update({"status": "failed", "error": last[:500], "warnings": ""})
        return record, None, None


def _plain(seed: Any) -> int | str | None:
    """A random_state as the ledger can hold it (an int, None, or the repr of a generator)."""
    return seed if seed is None or isinstance(seed, int) else repr(seed)


def oof_frame(keys: np.ndarray, candidate: str, outputs: dict[str, np.ndarray], classes: Any) -> pd.DataFrame:
    """Out-of-fold predictions of one candidate: key, prediction, class probabilities."""
    frame = pd.DataFrame({KEY: keys, "candidate": candidate, "prediction": outputs["predict"]})
    if "predict_proba" in outputs and classes is not None:
        for j, label in enumerate(classes):
            frame[f"proba_{label}"] = outputs["predict_proba"][:, j]
    if "decision_function" in outputs and np.ndim(outputs["decision_function"]) == 1:
        frame["decision"] = outputs["decision_function"]
    return frame


def _best(fits: pd.DataFrame, metric: str) -> dict[str, Any] | None:
    """The job's best candidate on its fold by the primary metric (for progress lines; not used to choose)."""
    scores = fits.loc[fits["status"] == "ok", ["candidate", f"val_{metric}"]].dropna()
    if scores.empty:
        return None
    top = scores.sort_values([f"val_{metric}", "candidate"], ascending=[False, True]).iloc[0]
    return {"candidate": str(top["candidate"]), "metric": metric, "score": float(top[f"val_{metric}"])}


def limit_threads(threads: int) -> None:
    """Cap the numeric libraries' thread pools for this process."""
    for var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
        os.environ[var] = str(threads)
    from threadpoolctl import threadpool_limits

    threadpool_limits(limits=threads)


def fit_family(dev_path: str, folds_path: str, family: dict[str, Any], spec: dict[str, Any], repeat: int,
               fold: int, metrics: list[str], task: str, threads: int, allowed: list[str],
               fits_path: str, oof_path: str, ledger_path: str, rule: str | None = None,
               scope: str = "main") -> pd.DataFrame:
    """Fit every candidate of ``family`` on one fold; write the fits and out-of-fold tables."""
    limit_threads(threads)
    dev = pd.read_parquet(dev_path)
    folds = pd.read_parquet(folds_path)
    training, validation = fold_rows(dev, folds, repeat, fold)
    x, y = split_xy(dev, spec)
    x_train, y_train, x_val, y_val = x[training], y[training], x[validation], y[validation]
    keys_val = dev.loc[validation, KEY].to_numpy()
    records, oofs = [], []
    seeds: dict[str, int | str | None] = {}
    for candidate in family["candidates"]:
        record, outputs, classes = fit_one(candidate, x_train, y_train, x_val, y_val, metrics, task, threads, allowed)
        record.update({"repeat": repeat, "fold": fold})
        seeds[candidate["id"]] = record.pop("random_state", None)  # for the ledger, not the fit table
        records.append(record)
        if outputs is not None:
            oofs.append(oof_frame(keys_val, candidate["id"], outputs, classes).assign(repeat=repeat, fold=fold))
    fits = pd.DataFrame(records)
    failed = fits[fits["status"] == "failed"]
    if len(failed) == len(fits):
        grouped = failed.groupby("error").size().sort_values(ascending=False)
        summary = "; ".join(f"{n}x {err}" for err, n in grouped.items())
        raise FitError(f"every candidate of family '{family['family']}' failed on repeat {repeat}, fold {fold}: "
                       f"{summary}; fix the family's estimator or params")
    if len(failed):
        for error, n in failed.groupby("error").size().items():
            warnings.warn(f"family '{family['family']}' r{repeat}f{fold}: {n} candidate(s) failed: {error}",
                          stacklevel=2)
    write_parquet(fits_path, fits)
    write_parquet(oof_path, pd.concat(oofs, ignore_index=True))
    ledger.append(ledger_path, "fit", {
        "scope": scope, "family": family["family"], "repeat": repeat, "fold": fold, "n_train": int(training.sum()),
        "n_val": int(validation.sum()), "candidates": len(fits), "failed": len(failed),
        "folds_sha256": sha256_file(folds_path), "fits": str(Path(fits_path).name),
        "fits_sha256": sha256_file(fits_path), "oof_sha256": sha256_file(oof_path),
        "random_states": seeds, "fit_seconds": round(float(fits["fit_seconds"].sum()), 3),
        "best": _best(fits, metrics[0]),
    }, rule=rule)
    return fits
