"""Benchmark (not a test): the winner's optimism when the candidates are real learners on a tuning grid.

bench/optimism.py fixes every candidate's predictions, so nothing is trained and a CV estimate is
pessimistic about nothing. Here each candidate is a k-nearest-neighbour classifier (scikit-learn's
NearestNeighbors, voting like KNeighborsClassifier with uniform weights; checked against it on the
first replication) and the M candidates are M odd neighbour counts spread evenly over 1..99, a
tuning grid whose neighbours are strongly correlated. Data come from
``sklearn.datasets.make_classification``: the first --rows rows are the experiment, a further
--pool rows from the same draw give the truth. Per replication and fold count k:

- winner: the lowest k-fold CV error (``holdfast.stats.best_by_mean`` on accuracy),
- truth: the error on the pool of the winner refitted on all rows (what holdfast's refit ships),
- raw: the winner's CV error; T&T: ``holdfast.stats.tibshirani_bias``; BBC: ``holdfast.stats.bbc_cv``
  on the pooled out-of-fold predictions of the same k-fold CV.

The CV estimate now has two biases of opposite sign: optimism from picking the best of M, and
pessimism because each fold trains on (k − 1)/k of the rows while the shipped model trains on all
of them. The table shows which wins on this data; it makes no claim beyond it.

Run:  PYTHONPATH=scripts python bench/optimism_knn.py          (≈ 3 minutes on 2 cores)
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from concurrent.futures import ProcessPoolExecutor, as_completed
from pathlib import Path

os.environ.setdefault("OMP_NUM_THREADS", "1")  # one BLAS thread per worker process
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "scripts"))

import numpy as np  # imported after the thread settings above
from holdfast.optimism import accuracy_scorer, bbc_cv, tibshirani_bias
from sklearn.datasets import make_classification
from sklearn.model_selection import KFold
from sklearn.neighbors import KNeighborsClassifier, NearestNeighbors

FOLD_COUNTS = (10, 5)


def neighbour_grid(m: int) -> np.ndarray:
    """M distinct odd neighbour counts spread evenly over 1..99 (odd: a binary vote never ties)."""
    grid = np.unique(2 * np.round(np.linspace(0, 49, m)).astype(int) + 1)
    if grid.size != m:
        raise ValueError(f"cannot place {m} distinct odd neighbour counts in 1..99")
    return grid


def knn_predictions(x_train: np.ndarray, y_train: np.ndarray, x_new: np.ndarray, grid: np.ndarray) -> np.ndarray:
    """Predicted 0/1 labels of x_new for every neighbour count in grid: (rows, M), one neighbour search."""
    index = NearestNeighbors(n_neighbors=int(grid.max())).fit(x_train)
    near = index.kneighbors(x_new, return_distance=False)
    ones = np.cumsum(y_train[near], axis=1)[:, grid - 1]  # votes for class 1 among the first k neighbours
    return (2 * ones > grid).astype(np.int64)


def check_against_sklearn(x: np.ndarray, y: np.ndarray, grid: np.ndarray) -> None:
    """The shared-search votes equal KNeighborsClassifier's predictions (first replication only)."""
    half = len(y) // 2
    ours = knn_predictions(x[:half], y[:half], x[half:], grid)
    for j, k in enumerate(grid):
        theirs = KNeighborsClassifier(n_neighbors=int(k)).fit(x[:half], y[:half]).predict(x[half:])
        agree = float(np.mean(theirs == ours[:, j]))
        if agree < 0.999:  # distance ties may order neighbours differently; anything more is a bug
            raise AssertionError(f"k={k}: only {agree:.3%} of predictions equal KNeighborsClassifier's")


def replicate(m: int, rows: int, pool: int, draws: int, seed: int, first: bool) -> dict[str, float]:
    """One data set: for each k, the CV winner, its refitted true error, and raw, T&T and BBC (error units)."""
    grid = neighbour_grid(m)
    x, y = make_classification(n_samples=rows + pool, n_features=10, n_informative=4, n_redundant=2,
                               flip_y=0.1, class_sep=0.8, random_state=seed)
    x_cv, y_cv, x_pool, y_pool = x[:rows], y[:rows], x[rows:], y[rows:]
    if first:
        check_against_sklearn(x_cv, y_cv, grid)
    out: dict[str, float] = {}
    for k in FOLD_COUNTS:
        fold_accuracy = np.empty((k, m))
        oof = np.empty((rows, m), dtype=np.int64)
        for f, (train, val) in enumerate(KFold(n_splits=k, shuffle=True, random_state=seed).split(x_cv)):
            predicted = knn_predictions(x_cv[train], y_cv[train], x_cv[val], grid)
            oof[val] = predicted
            fold_accuracy[f] = (predicted == y_cv[val][:, None]).mean(axis=0)
        tt = tibshirani_bias(fold_accuracy)
        winner = int(tt.winner)
        shipped = knn_predictions(x_cv, y_cv, x_pool, grid[winner : winner + 1])[:, 0]
        out[f"truth{k}"] = float(np.mean(shipped != y_pool))
        out[f"raw{k}"] = 1.0 - tt.raw
        out[f"tt{k}"] = 1.0 - tt.corrected
        bbc = bbc_cv({f"c{j:02d}": oof[:, j] for j in range(m)}, y_cv, accuracy_scorer(), draws=draws, seed=seed)
        out[f"bbc{k}"] = 1.0 - bbc.estimate
        out[f"k{k}"] = float(grid[winner])
    return out


def run_cell(m: int, reps: int, rows: int, pool: int, draws: int, seed: int) -> tuple[int, dict[str, np.ndarray]]:
    """All replications for one M; replication r uses data seed seed·1000 + r for every M (paired)."""
    results = [replicate(m, rows, pool, draws, seed * 1000 + r, first=(r == 0)) for r in range(reps)]
    return m, {key: np.array([r[key] for r in results]) for key in results[0]}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--reps", type=int, default=200, help="replications (data sets) per M")
    parser.add_argument("--rows", type=int, default=500, help="rows of each experiment")
    parser.add_argument("--pool", type=int, default=20_000, help="fresh rows that give each winner's true error")
    parser.add_argument("--draws", type=int, default=500, help="BBC bootstrap draws")
    parser.add_argument("--ms", type=str, default="2,5,20,50", help="grid sizes (numbers of candidates)")
    parser.add_argument("--seed", type=int, default=11)
    parser.add_argument("--jobs", type=int, default=2, help="worker processes")
    args = parser.parse_args(argv)
    ms = sorted(int(v) for v in args.ms.split(","))
    start = time.perf_counter()
    cells: dict[int, dict[str, np.ndarray]] = {}
    with ProcessPoolExecutor(max_workers=args.jobs) as pool:
        futures = [pool.submit(run_cell, m, args.reps, args.rows, args.pool, args.draws, args.seed)
                   for m in reversed(ms)]
        for future in as_completed(futures):
            m, columns = future.result()
            cells[m] = columns
            print(f"[{time.perf_counter() - start:6.1f}s] M={m} done", file=sys.stderr, flush=True)
    print(f"\nk-NN tuning grids on make_classification data: {args.reps} data sets of {args.rows} rows, truth from "
          f"{args.pool:,} fresh rows, BBC {args.draws} draws; error-rate units; bias = estimate − the refitted "
          "winner's true error (± 1 SE over data sets). KNeighborsClassifier agreement checked on data set 0.")
    for k in FOLD_COUNTS:
        print(f"\n{k}-fold CV")
        header = (f"{'M':>3} {'true err':>8} {'raw bias':>16} {'T&T bias':>16} {'BBC bias':>16}  closer than raw?"
                  "   median chosen k")
        print(header)
        print("-" * len(header))
        for m in ms:
            c = cells[m]
            truth = c[f"truth{k}"]
            bias = {name: c[f"{name}{k}"] - truth for name in ("raw", "tt", "bbc")}
            text = {name: f"{b.mean():+.4f} ±{b.std(ddof=1) / np.sqrt(b.size):.4f}" for name, b in bias.items()}
            closer = ", ".join(f"{label} {'yes' if abs(bias[name].mean()) < abs(bias['raw'].mean()) else 'NO'}"
                               for name, label in (("tt", "T&T"), ("bbc", "BBC")))
            print(f"{m:>3} {truth.mean():8.4f} {text['raw']:>16} {text['tt']:>16} {text['bbc']:>16}  {closer:<16}"
                  f"   {np.median(c[f'k{k}']):.0f}")
    print(f"(total {time.perf_counter() - start:.0f} s)", file=sys.stderr)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
