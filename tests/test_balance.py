"""How the measured fit jobs can share the cores (holdfast.balance) and the split `holdfast status` suggests."""

from __future__ import annotations

import itertools
import math
import random
from pathlib import Path

import pytest
from conftest import run_cli
from holdfast import ledger
from holdfast.balance import balance, makespan_bound


def optimum(seconds: list[float], cores: int) -> float:
    """The shortest makespan by trying every assignment of jobs to cores (the definition, for small cases)."""
    best = float("inf")
    for assignment in itertools.product(range(cores), repeat=len(seconds)):
        loads = [0.0] * cores
        for job, core in zip(seconds, assignment, strict=True):
            loads[core] += job
        best = min(best, max(loads))
    return best


def test_the_bound_never_exceeds_the_true_optimum_and_meets_it_on_known_cases() -> None:
    # Two cores, jobs 3, 3, 2, 2, 2: the best schedule is 6 (3+3 | 2+2+2), while longest-first gives 7; a worked
    # example of R. L. Graham, "Bounds on multiprocessing timing anomalies", SIAM J. Appl. Math. 17(2), 1969
    # (from memory). Three jobs of 5 on two cores: one core runs two, 10.
    assert makespan_bound([3, 3, 2, 2, 2], 2) == pytest.approx(6) == optimum([3, 3, 2, 2, 2], 2)
    assert makespan_bound([5, 5, 5], 2) == pytest.approx(10) == optimum([5, 5, 5], 2)
    assert makespan_bound([], 2) is None and makespan_bound([1.0], 0) is None
    rng = random.Random(20261204)
    for _ in range(200):
        cores = rng.choice([2, 3])
        jobs = [round(rng.uniform(0.1, 10), 2) for _ in range(rng.randint(1, 7))]
        assert makespan_bound(jobs, cores) <= optimum(jobs, cores) + 1e-9, (jobs, cores)


def test_a_family_whose_jobs_cannot_share_two_cores_gets_the_smallest_split_that_can() -> None:
    # 4 candidates of 10 s in each of 5 folds (jobs of 40 s) beside 5 jobs of 1 s: on 2 cores, three of the five
    # long jobs fall on one core (120 s) against 102.5 s evenly; dealt into 2 jobs per fold (20 s each), the bound
    # is the even share.
    jobs = {"forest": [40.0] * 5, "logistic": [1.0] * 5}
    b = balance(jobs, {"forest": [[10.0] * 4 for _ in range(5)]}, {"forest": 1}, cores=2)
    assert (b.jobs, b.total, b.even, b.bound) == (10, 205.0, 102.5, 120.0)
    assert (b.family, b.per_fold, b.split_bound) == ("forest", 2, 102.5)
    even = balance({"forest": [10.0] * 4, "logistic": [10.0] * 4}, {"forest": [[5.0, 5.0]] * 4}, {}, cores=2)
    assert even.bound == even.even == 40.0 and even.family is None  # already even: nothing suggested
    alone = balance({"forest": [50.0]}, {"forest": [[50.0]]}, {"forest": 1}, cores=2)
    assert alone.bound == 50.0 and alone.family is None  # one candidate: no split can help


def test_status_reports_the_fit_time_the_ledger_records(bc_finished: Path) -> None:
    """The Σ in-job seconds shown are the current fit lines' own, summed here independently."""
    lines = ledger.events(ledger.read(bc_finished / "results" / "bc" / "ledger.jsonl"), "fit", "main")
    latest = {(d["family"], d["repeat"], d["fold"]): d["fit_seconds"] for d in (e["details"] for e in lines)}
    result = run_cli(bc_finished, "status", "results/bc")
    assert result.returncode == 0, result.stderr
    row = next(line for line in result.stdout.splitlines() if line.strip().startswith("fit time:"))
    total = math.fsum(latest.values())  # exactly rounded, as holdfast.balance sums
    shown = f"{total:.1f} s" if total >= 10 else f"{total:.2f} s"
    assert row.split("fit time:")[1].strip().startswith(f"{shown} in-job over {len(latest)} job(s)"), (shown, row)
