"""How evenly a run's fit jobs can share the cores, from their measured seconds.

A family of a few expensive candidates (large ensembles) fitted in one job per fold makes jobs so long that, at
the end of a local run, one core works alone on the last of them while the others wait. No order of the jobs can
help; splitting the family into more jobs per fold (``candidates.<family>.jobs_per_fold``) can. This module gives
the shortest time the measured jobs allow on some cores, and for the family with the longest job, the smallest
number of jobs per fold that would bring that time close to an even share, estimated by dealing the family's
measured candidates exactly as :func:`holdfast.candidates.fit_groups` would.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

#: A split is suggested when the measured jobs cannot finish within this factor of an even share of the work,
#: and the split brings the shortest possible time down by at least the same margin (common practice: ignore
#: differences of a few per cent, well inside a shared machine's run-to-run spread).
SLACK = 1.05


def makespan_bound(seconds: Sequence[float], cores: int) -> float | None:
    """The shortest time in which ``cores`` cores can run jobs of these durations, one job per core at a time,
    whatever the order: a lower bound on the makespan.

    At least Σ / cores and the longest job; and for every k, among the k·cores + 1 longest jobs one core must run
    k + 1, so at least the sum of the k + 1 shortest of them (a pigeonhole argument, proved by this sentence; the
    setting is scheduling on identical machines as in R. L. Graham, "Bounds on multiprocessing timing anomalies",
    SIAM J. Appl. Math. 17(2), 1969; reference from memory).
    """
    if not seconds or cores < 1:
        return None
    p = sorted((float(s) for s in seconds), reverse=True)
    bound = max(sum(p) / cores, p[0])
    k = 1
    while k * cores + 1 <= len(p):
        top = p[:k * cores + 1]
        bound = max(bound, sum(top[-(k + 1):]))
        k += 1
    return bound


@dataclass(frozen=True)
class Balance:
    """The measured fit jobs on ``cores`` cores, and a split that would let them share the cores better."""

    jobs: int
    total: float  # Σ in-job fit seconds
    cores: int
    bound: float  # no order of the jobs finishes sooner
    family: str | None = None  # the family to split, if a split helps
    per_fold: int = 1  # its suggested jobs per fold
    split_bound: float | None = None  # the bound with that split, estimated from its candidates' measured seconds

    @property
    def even(self) -> float:
        """Σ / cores: the time if the work could be shared perfectly."""
        return self.total / self.cores


def balance(jobs: dict[str, list[float]], family_candidates: dict[str, list[list[float]]],
            per_fold_now: dict[str, int], cores: int) -> Balance | None:
    """The balance of the measured fit jobs, with a suggested split.

    ``jobs`` maps each job's family part (``forest`` or ``forest.2``) to the in-job seconds of its jobs, one per
    fold. ``family_candidates`` maps a family to, for each fold, its candidates' fit seconds in the family's
    candidate order (only families that may be split need to be given). ``per_fold_now`` is each family's current
    jobs per fold. None when no job was measured.
    """
    seconds = [s for part in jobs.values() for s in part]
    bound = makespan_bound(seconds, cores)
    if bound is None:
        return None
    total = math.fsum(seconds)  # correctly rounded: the same whatever the jobs' order
    plain = Balance(jobs=len(seconds), total=total, cores=cores, bound=bound)
    if bound <= SLACK * total / cores:
        return plain
    longest = max(jobs, key=lambda part: max(jobs[part]))
    family = longest.split(".", 1)[0]
    folds = family_candidates.get(family)
    if not folds:
        return plain
    others = [s for part, values in jobs.items() if part.split(".", 1)[0] != family for s in values]
    best: tuple[float, int] | None = None
    for n in range(per_fold_now.get(family, 1) + 1, max(len(c) for c in folds) + 1):
        dealt = [sum(c[i::n]) for c in folds for i in range(min(n, len(c)))]
        split = makespan_bound(others + dealt, cores) or bound
        if best is None or split < best[0] / SLACK:
            best = (split, n)
        if split <= SLACK * total / cores:
            break
    if best is None or best[0] * SLACK > bound:
        return plain
    return Balance(jobs=len(seconds), total=total, cores=cores, bound=bound, family=family, per_fold=best[1],
                   split_bound=best[0])
