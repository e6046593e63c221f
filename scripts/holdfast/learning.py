"""One learning-curve job: the winner fitted on nested subsets of one training fold (map step of the diagnostics).

Rows join the subsets in one seeded order, stratified by class for classification, so every smaller subset lies
inside every larger one and keeps the class shares to within a row. Each subset is fitted with the winner's own
pipeline and scored on it and on the fold's full validation rows with every configured metric; the full fold (size
1.0) is not fitted again: its scores are the winner's stored fit record. Only development rows are read.

The job runs after every tally (choice.json is its input), but fits only when what it depends on changed: the
winner's spec, the fold table, the development rows, the sizes, seed, metrics and the code. Otherwise it puts back
the table it kept for exactly those inputs (``diagnostics/learning/kept/``), so a tally that keeps the winner costs
no new fits; only a table whose bytes an earlier fitting job recorded in the ledger is put back.
"""

from __future__ import annotations

import shutil
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from . import ledger
from ._io import canonical_json, read_json, sha256_file, sha256_text, write_parquet
from .dataset import split_xy
from .fit import fit_one, fold_rows, limit_threads
from .layout import fit_file

KEPT = "diagnostics/learning/kept"


def join_order(n: int, seed: int | list[int], labels: Any = None) -> np.ndarray:
    """Positions 0..n-1 in the order rows join the learning-curve subsets.

    With ``labels`` (classification), each class's rows are shuffled and spread evenly over the order (the i-th
    of a class's n rows at (i + 1/2) / n, ties between classes in random order), so every prefix keeps each
    class's share to within about one row; without, a plain shuffle. Seeded: same seed, same order.
    """
    rng = np.random.default_rng(seed)
    if labels is None:
        return rng.permutation(n)
    values = pd.Series(np.asarray(labels)).reset_index(drop=True)
    key = np.empty(n, dtype=float)
    for _, members in sorted(values.groupby(values, sort=True).groups.items(), key=lambda kv: str(kv[0])):
        where = rng.permutation(np.asarray(members))
        key[where] = (np.arange(len(where)) + 0.5) / len(where)
    return np.lexsort((rng.random(n), key))


def subset_size(n: int, fraction: float) -> int:
    """Rows in the subset of ``fraction`` of ``n`` training rows (at least one)."""
    return max(1, min(n, round(fraction * n)))


def nested_subsets(n: int, fractions: list[float], seed: int | list[int], labels: Any = None) -> list[np.ndarray]:
    """For each fraction (increasing), the sorted positions of its subset: prefixes of one :func:`join_order`."""
    order = join_order(n, seed, labels)
    return [np.sort(order[:subset_size(n, f)]) for f in fractions]


def input_key(candidate: dict[str, Any], folds_sha256: str, dev_sha256: str, repeat: int, fold: int,
              sizes: list[float], seed: int, metrics: list[str], task: str, code: str) -> str:
    """What a learning-curve table depends on, hashed: equal keys give equal tables."""
    return sha256_text(canonical_json({
        "candidate": candidate, "folds": folds_sha256, "dev": dev_sha256, "repeat": repeat, "fold": fold,
        "sizes": sizes, "seed": seed, "metrics": metrics, "task": task, "code": code}))


def fitted_tables(ledger_path: str, key: str) -> set[str]:
    """Hashes of the tables that learning-curve jobs with this input key fitted (not reused), as the intact ledger
    records them: a kept table is put back only when its bytes are one of these, so a file dropped into the cache
    cannot become a learning curve."""
    if not Path(ledger_path).exists():
        return set()
    entries, problems = ledger.verify_chain(ledger_path)
    if problems:
        return set()
    return {str(e["details"].get("learning_sha256")) for e in entries
            if e.get("event") == "learning_curve" and e["details"].get("key") == key
            and e["details"].get("reused") is False}


def learning_curve(exp_dir: str, dev_path: str, folds_path: str, choice_path: str, spec: dict[str, Any],
                   repeat: int, fold: int, metrics: list[str], task: str, sizes: list[float], seed: int,
                   threads: int, allowed: list[str], out_path: str, ledger_path: str, code: str = "",
                   rule: str | None = None, parts: dict[str, str] | None = None) -> pd.DataFrame:
    """Write diagnostics/learning/r<R>f<F>.parquet: one row per size with training and validation scores.

    ``parts`` maps a candidate of a family fitted in several jobs per fold to its job's family part (forest.2),
    whose fit file holds the winner's stored record; other candidates' records are in their family's file.
    """
    exp = Path(exp_dir)
    choice = read_json(choice_path)
    candidate = choice["winner"]["spec"]
    family = (parts or {}).get(str(candidate["id"]), str(candidate["family"]))
    folds_sha, dev_sha = sha256_file(folds_path), sha256_file(dev_path)
    key = input_key(candidate, folds_sha, dev_sha, repeat, fold, sizes, seed, metrics, task, code)
    kept = exp / KEPT / f"{key[:24]}-r{repeat}f{fold}.parquet"
    details: dict[str, Any] = {}
    if kept.is_file() and sha256_file(kept) in fitted_tables(ledger_path, key[:24]):
        shutil.copyfile(kept, out_path)
        table = pd.read_parquet(out_path)
        reused = True
    else:
        limit_threads(threads)
        table, details = _fit_sizes(exp, dev_path, folds_path, candidate, spec, repeat, fold, metrics, task, sizes,
                                    seed, threads, allowed, family)
        write_parquet(out_path, table)
        kept.parent.mkdir(parents=True, exist_ok=True)
        shutil.copyfile(out_path, kept)
        reused = False
    failed = int((table["status"] != "ok").sum())
    ledger.append(ledger_path, "learning_curve", {
        "scope": "main", "repeat": repeat, "fold": fold, "winner": candidate["id"], "family": family,
        "sizes": sizes, "seed": seed, "reused": reused, "key": key[:24], "points": len(table), "failed": failed,
        "n_train": [int(n) for n in table["n_train"]],
        "dev_sha256": dev_sha, "folds_sha256": folds_sha, "choice_sha256": sha256_file(choice_path),
        "fits_sha256": details.get("fits_sha256"), "learning_sha256": sha256_file(out_path),
        "fit_seconds": None if reused else round(float(table.loc[table["source"] == "fit", "fit_seconds"].sum()), 3),
    }, rule=rule)
    return table


def _fit_sizes(exp: Path, dev_path: str, folds_path: str, candidate: dict[str, Any], spec: dict[str, Any],
               repeat: int, fold: int, metrics: list[str], task: str, sizes: list[float], seed: int, threads: int,
               allowed: list[str], family: str) -> tuple[pd.DataFrame, dict[str, Any]]:
    dev = pd.read_parquet(dev_path)
    folds = pd.read_parquet(folds_path)
    training, validation = fold_rows(dev, folds, repeat, fold)
    x, y = split_xy(dev, spec)
    x_train, y_train = x[training].reset_index(drop=True), y[training].reset_index(drop=True)
    x_val, y_val = x[validation], y[validation]
    subsets = nested_subsets(len(x_train), sizes, [seed, repeat, fold],
                             y_train.to_numpy() if task == "classification" else None)
    rows, details = [], {}
    for fraction, rows_in in zip(sizes, subsets, strict=True):
        base = {"repeat": repeat, "fold": fold, "fraction": fraction}
        if len(rows_in) == len(x_train):  # the full fold: the winner's stored fit record, not a new fit
            stored_path = exp / fit_file("fits", family, repeat, fold)
            stored = pd.read_parquet(stored_path)
            record = stored[stored["candidate"] == candidate["id"]].iloc[0].to_dict()
            details["fits_sha256"] = sha256_file(stored_path)
            rows.append({**base, "source": "fits", **{k: record[k] for k in _columns(metrics)}})
            continue
        record, _, _ = fit_one(candidate, x_train.iloc[rows_in], y_train.iloc[rows_in], x_val, y_val, metrics, task,
                               threads, allowed)
        rows.append({**base, "source": "fit", **{k: record.get(k) for k in _columns(metrics)}})
    return pd.DataFrame(rows), details


def _columns(metrics: list[str]) -> list[str]:
    return ["candidate", "n_train", "n_val", "status", "error", "fit_seconds",
            *[f"train_{m}" for m in metrics], *[f"val_{m}" for m in metrics]]
