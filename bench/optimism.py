"""Benchmark (not a test): how optimistic is the winner's CV error, and do the two corrections fix it?

Simulation with known truth. Each of M candidates predicts every row correctly with its own fixed
probability, so its true error rate is known exactly. Rows are independent. Across candidates the
errors are either independent (rho = 0, the hardest case for both corrections) or share a row
"difficulty" through a Gaussian copula with correlation rho between candidates' latent scores
(rows that fool one model tend to fool the others, as with real models fitted to the same data);
the copula keeps each candidate's error rate exact whatever rho is.
Rows are split at random into k equal folds; a candidate's per-fold error is the mean of its
errors on that fold, its CV estimate the mean over folds, and the winner is the candidate with
the lowest CV error (``holdfast.stats.best_by_mean`` on accuracy). Nothing is trained, so with
equal folds a candidate's CV estimate is its error over all rows whatever k is: raw and BBC are
the same for k = 10 and k = 5, and only T&T (built from per-fold errors) depends on k. The
better candidate sits at a random position, so the first-label tie rule favours no one.
Per replication we record:

- truth: the winner's true error rate,
- raw: the winner's CV error (optimistic: it was picked *because* it looked best),
- T&T: ``holdfast.stats.tibshirani_bias`` corrected error, for k = 10 and k = 5 on the same rows,
- BBC: ``holdfast.stats.bbc_cv`` corrected error from the pooled out-of-fold predictions,

and report their means and mean biases (estimate − truth, error-rate units, ± one standard error
of that mean over replications). Scenario "equal": every candidate has error 0.30. Scenarios
"better by d" (--gaps, default 0.05 and 0.02): one candidate has error 0.30 − d, the rest 0.30.
With 1000 rows one CV estimate has a standard error of about 0.0145, so d = 0.05 is a clear winner
(CV finds it nearly always) and d = 0.02 a close one (CV often picks a noise candidate instead).
Each is run at every rho in --rhos (default 0 and 0.8); rho = 0 is always part of the default
run so the hard case stays visible.

Targets (issue 3): BBC mean bias within ±0.01 for every M, and both corrections closer to the
truth than the raw estimate. They are judged where the issue states them: the equal-error
scenario, whose raw estimate is optimistic by construction, with T&T from holdfast's default
5 folds. The same checks are then printed beyond that scope (T&T from 10 folds; the
better-candidate scenarios), every miss listed, so nothing is hidden; nothing is tuned to pass.

Reading the table (our diagnosis, checked against the printed shares): T&T takes each fold's
maximum over candidates, and a fold's scores are noisier than the CV means (n/k rows instead of
n). When candidates differ only by noise of equal size, a fold's best beats the winner's fold
score by about c·s(1 − 1/√k) (s: sd of one fold's score, c: the expected maximum of M standard
normals) while the raw optimism is about c·s/√k, so T&T's correction is about (√k − 1) times the
raw optimism (our derivation; it matches the equal-scenario rows, and tests/test_stats.py checks it
by simulation). It lands closer to the truth than raw only when √k − 1 < 2, i.e. k < 9: k = 5
does, k = 10 cannot; holdfast's choice.json carries a caution from k = 9 on. With a clear winner
the raw estimate has little or no selection optimism (CV picks the better candidate, and its
estimate was not selected from noise), while both corrections move it towards worse (T&T always,
BBC almost always), so neither can be "closer than raw" there: that part of the target cannot be
met by an estimator that corrects in one direction only. BBC re-selects on bootstrap resamples, which are
noisier than the full CV, so when one candidate is genuinely better BBC's selections find it
less often than CV does and the estimate leans pessimistic (conservative, as its authors note).

Exit status 0 when the issue-3 target (first line of the closing summary) is met, 1 when not.

Run:  PYTHONPATH=scripts python bench/optimism.py            (≈ 3 minutes on 2 cores)
      PYTHONPATH=scripts python bench/optimism.py --reps 100 (quicker, noisier)
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
from scipy.stats import norm

BASE_ERROR = 0.30
DEFAULT_K = 5  # holdfast's default folds.k (workflow/schemas/config.schema.yaml); the headline T&T column
FOLD_COUNTS = (DEFAULT_K, 10)  # 10: the fold count of the T&T paper's examples, shown beside it


def scenario_errors(scenario: str, m: int) -> np.ndarray:
    """True error rates of the M candidates: 'equal', or 'better by d' (candidate 0 has error 0.30 − d)."""
    errors = np.full(m, BASE_ERROR)
    if scenario != "equal":
        errors[0] -= float(scenario.removeprefix("better by "))
    return errors


def replicate(errors: np.ndarray, rows: int, draws: int, rng: np.random.Generator,
              rho: float = 0.0) -> dict[str, float]:
    """One simulated data set: CV, the winner, its true error and the three estimates (error units)."""
    m = errors.size
    # The better candidate sits at a random position: ties go to the first candidate in both
    # best_by_mean and the BBC selection, and a fixed first place would hand it every tie.
    errors = rng.permutation(errors)
    y = rng.integers(0, 2, rows)
    # Latent z_ij = sqrt(rho)·a_i + sqrt(1 − rho)·e_ij is standard normal for every rho, so
    # "wrong iff z_ij < Φ⁻¹(errors[j])" has probability errors[j] exactly (Gaussian copula).
    shared = rng.standard_normal((rows, 1))
    latent = np.sqrt(rho) * shared + np.sqrt(1.0 - rho) * rng.standard_normal((rows, m))
    correct = latent >= norm.ppf(errors)  # row i right for candidate j with probability 1 − errors[j]
    predictions = np.where(correct, y[:, None], 1 - y[:, None])
    order = rng.permutation(rows)
    out: dict[str, float] = {}
    for k in FOLD_COUNTS:
        fold_of = np.empty(rows, dtype=np.intp)
        fold_of[order] = np.arange(rows) % k  # k folds of equal size (rows divisible by k)
        fold_accuracy = np.stack([correct[fold_of == f].mean(axis=0) for f in range(k)])  # k × M
        tt = tibshirani_bias(fold_accuracy)
        out[f"tt{k}"] = 1.0 - tt.corrected
        if k == FOLD_COUNTS[0]:
            winner = int(tt.winner)
            out["raw"] = 1.0 - tt.raw
            out["truth"] = float(errors[winner])
            out["won_best"] = float(errors[winner] == errors.min())
    by_candidate = {f"c{j:02d}": predictions[:, j] for j in range(m)}
    bbc = bbc_cv(by_candidate, y, accuracy_scorer(), draws=draws, seed=int(rng.integers(2**31)))
    out["bbc"] = 1.0 - bbc.estimate
    best = [f"c{j:02d}" for j in np.flatnonzero(errors == errors.min())]
    out["bbc_won_best"] = sum(bbc.wins.get(name, 0) for name in best) / bbc.draws  # share of draws
    return out


def run_cell(scenario: str, rho: float, m: int, reps: int, rows: int, draws: int,
             seed: int) -> tuple[str, float, int, dict]:
    """All replications of one (scenario, rho, M); seeded from those so job order does not matter."""
    errors = scenario_errors(scenario, m)
    gap = round((BASE_ERROR - errors.min()) * 10_000)
    rng = np.random.default_rng(np.random.SeedSequence([seed, gap, m, round(rho * 1000)]))
    results = [replicate(errors, rows, draws, rng, rho) for _ in range(reps)]
    columns = {key: np.array([r[key] for r in results]) for key in results[0]}
    return scenario, rho, m, columns


def summarise(columns: dict[str, np.ndarray]) -> dict[str, float]:
    truth = columns["truth"]
    out = {"truth": truth.mean(), "won_best": columns["won_best"].mean(),
           "bbc_won_best": columns["bbc_won_best"].mean()}
    for key in ("raw", *(f"tt{k}" for k in FOLD_COUNTS), "bbc"):
        bias = columns[key] - truth
        out[key] = columns[key].mean()
        out[f"{key}_bias"] = bias.mean()
        out[f"{key}_se"] = bias.std(ddof=1) / np.sqrt(bias.size)
    return out


def _bias(cell: dict[str, float], key: str) -> str:
    return f"{cell[key + '_bias']:+.4f} ±{cell[key + '_se']:.4f}"


def print_table(scenario: str, rho: float, cells: dict[int, dict[str, float]], reps: int, rows: int,
                draws: int) -> dict[str, list[str]]:
    """One scenario's table; returns the target misses keyed by which T&T fold count was judged."""
    k0, k1 = FOLD_COUNTS
    print(f"\nScenario '{scenario}', rho = {rho:g}: {reps} replications, {rows} rows, BBC {draws} draws, "
          f"raw and BBC from {k0}-fold CV; error-rate units; bias = estimate − winner's true error "
          "(± 1 SE over replications)")
    header = (f"{'M':>3} {'true err':>8} {'raw':>7} {'raw bias':>16} {f'T&T k={k0} bias':>16} "
              f"{f'T&T k={k1} bias':>16} {'BBC':>7} {'BBC bias':>16}  targets (closer than raw?)")
    print(header)
    print("-" * len(header))
    misses: dict[str, list[str]] = {f"tt{k}": [] for k in FOLD_COUNTS}
    for m, s in sorted(cells.items()):
        raw = abs(s["raw_bias"])
        bbc_ok = abs(s["bbc_bias"]) <= 0.01
        bbc_closer = abs(s["bbc_bias"]) < raw
        closer = {k: abs(s[f"tt{k}_bias"]) < raw for k in FOLD_COUNTS}
        flags = (f"BBC ±.01 {'yes' if bbc_ok else 'NO'}; BBC {'yes' if bbc_closer else 'NO'}, "
                 + ", ".join(f"T&T{k} {'yes' if closer[k] else 'NO'}" for k in FOLD_COUNTS))
        for k in FOLD_COUNTS:
            if not (bbc_ok and bbc_closer and closer[k]):
                misses[f"tt{k}"].append(f"{scenario}, rho={rho:g}, M={m}: {flags}")
        print(f"{m:>3} {s['truth']:8.4f} {s['raw']:7.4f} {_bias(s, 'raw'):>16} {_bias(s, f'tt{k0}'):>16} "
              f"{_bias(s, f'tt{k1}'):>16} {s['bbc']:7.4f} {_bias(s, 'bbc'):>16}  {flags}")
    if scenario != "equal":
        share = ", ".join(f"M={m}: {cells[m]['won_best']:.0%}" for m in sorted(cells))
        print(f"    how often CV picked the genuinely better candidate:      {share}")
        share = ", ".join(f"M={m}: {cells[m]['bbc_won_best']:.0%}" for m in sorted(cells))
        print(f"    how often a BBC in-bag selection picked it (all draws): {share}")
    return misses


def uniform_sanity(seed: int, pairs: int = 1_000_000) -> None:
    # Order statistics (common practice; e.g. David & Nagaraja, Order Statistics): for two independent
    # uniform(0,1) estimates, P(min < 0.5) = 1 − 0.5² = 0.75 and E[min] = 1/(M + 1) = 1/3.
    u = np.random.default_rng(seed).random((pairs, 2)).min(axis=1)
    print(f"\nSanity (two independent uniform(0,1) estimates, {pairs:,} pairs): "
          f"E[min] = {u.mean():.4f} (theory 1/3 = 0.3333), P(min < 0.5) = {(u < 0.5).mean():.4f} (theory 0.75)")


def print_targets(misses: dict[str, list[str]], scenarios: list[str], rhos: list[float], ms: list[int]) -> bool:
    """The issue-3 target where it is defined, then the same checks beyond it; True if the target is met."""
    rows_per_scenario = len(rhos) * len(ms)
    print("\nTargets: BBC mean bias within ±0.01, and T&T and BBC each closer to the truth than raw.")
    groups = [(f"Issue 3 target: equal true errors (the raw estimate is optimistic by construction), "
               f"T&T from {DEFAULT_K} folds (holdfast's default)", f"tt{DEFAULT_K}", ["equal"])]
    for k in FOLD_COUNTS[1:]:
        groups.append((f"Beyond the target: equal true errors, T&T from {k} folds", f"tt{k}", ["equal"]))
    if len(scenarios) > 1:
        groups.append((f"Beyond the target: one better candidate, T&T from {DEFAULT_K} folds "
                       "(raw has little optimism when CV finds the better one)", f"tt{DEFAULT_K}", scenarios[1:]))
    met = True
    for index, (title, key, wanted) in enumerate(groups):
        found = [miss for miss in misses[key] if miss.split(",")[0] in wanted]
        met = met and (index > 0 or not found)
        total = rows_per_scenario * len(wanted)
        verdict = f"met in all {total} rows" if not found else f"missed in {len(found)} of {total} rows:"
        print(f"- {title}: {verdict}")
        for miss in found:
            print(f"    {miss}")
    return met


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--reps", type=int, default=400, help="replications per (scenario, M)")
    parser.add_argument("--rows", type=int, default=1000, help="rows per simulated data set (divisible by 10)")
    parser.add_argument("--draws", type=int, default=500, help="BBC bootstrap draws per data set")
    parser.add_argument("--ms", type=str, default="2,5,20,50", help="numbers of candidates")
    parser.add_argument("--rhos", type=str, default="0,0.8",
                        help="correlations between candidates' latent errors (0 = independent)")
    parser.add_argument("--gaps", type=str, default="0.05,0.02",
                        help="error-rate gaps of the one-better scenarios (0.30 against 0.30 − gap)")
    parser.add_argument("--seed", type=int, default=2024)
    parser.add_argument("--jobs", type=int, default=2, help="worker processes")
    args = parser.parse_args(argv)
    if any(args.rows % k for k in FOLD_COUNTS):
        parser.error(f"--rows must be divisible by {FOLD_COUNTS} so folds have equal size")
    ms = [int(v) for v in args.ms.split(",")]
    rhos = [float(v) for v in args.rhos.split(",")]
    if any(not 0.0 <= r < 1.0 for r in rhos):
        parser.error("--rhos must lie in [0, 1)")
    scenarios = ["equal", *(f"better by {float(g):g}" for g in args.gaps.split(",") if g.strip())]
    if any(not 0.0 < float(s.removeprefix("better by ")) < BASE_ERROR for s in scenarios[1:]):
        parser.error(f"--gaps must lie in (0, {BASE_ERROR})")
    start = time.perf_counter()
    cells: dict[tuple[str, float], dict[int, dict[str, float]]] = {(s, r): {} for s in scenarios for r in rhos}
    tasks = [(s, r, m) for s in scenarios for r in rhos for m in sorted(ms, reverse=True)]  # big M first
    with ProcessPoolExecutor(max_workers=args.jobs) as pool:
        futures = [pool.submit(run_cell, s, r, m, args.reps, args.rows, args.draws, args.seed) for s, r, m in tasks]
        for done, future in enumerate(as_completed(futures), start=1):
            scenario, rho, m, columns = future.result()
            cells[scenario, rho][m] = summarise(columns)
            print(f"[{time.perf_counter() - start:6.1f}s] {done}/{len(tasks)} done: {scenario}, rho={rho:g}, M={m}",
                  file=sys.stderr, flush=True)
    misses: dict[str, list[str]] = {f"tt{k}": [] for k in FOLD_COUNTS}
    for scenario in scenarios:
        for rho in rhos:
            for key, found in print_table(scenario, rho, cells[scenario, rho], args.reps, args.rows,
                                          args.draws).items():
                misses[key] += found
    uniform_sanity(args.seed)
    met = print_targets(misses, scenarios, rhos, ms)
    print(f"(total {time.perf_counter() - start:.0f} s)", file=sys.stderr)
    return 0 if met else 1


if __name__ == "__main__":
    raise SystemExit(main())
