"""Benchmark (not a test): what holdfast's whole workflow costs when there is almost no work to do.

One candidate (logistic regression), stratified group 5-fold, the first 1,000 rows of
data_demo/shipments.csv (800 development rows after the seal), whole workflow seal to audit,
alternating with the same GridSearchCV script as bench/head_to_head.py on the same stored folds.
Almost all of holdfast's time here is fixed cost: process start-up, imports, scheduling and the
serial steps; the tables show where it went, and Snakemake alone on the same job graph with empty
jobs shows the part no holdfast change can remove.

Run:  PYTHONPATH=scripts python bench/fixed_cost.py [--reps 3]    (≈ 1 min per rep)
      PYTHONPATH=scripts python bench/fixed_cost.py --quick       (checks that it works)
"""

from __future__ import annotations

import sys
from pathlib import Path

import _common as c
from head_to_head import Scenario, judge, report, run_scenario


def one_candidate(rows: int) -> Scenario:
    """The demo's data and settings cut down to its first ``rows`` rows and one logistic candidate."""

    def make(workdir: Path) -> None:
        import yaml

        (workdir / "data_demo").mkdir(parents=True)
        lines = (c.REPO / "data_demo" / "shipments.csv").read_text().splitlines(keepends=True)
        (workdir / "data_demo" / "shipments.csv").write_text("".join(lines[: rows + 1]))
        config = yaml.safe_load((c.REPO / "config" / "config.yaml").read_text())
        config["experiment"] = "fixed-cost"
        config["candidates"] = {"logistic": {
            "estimator": "sklearn.linear_model.LogisticRegression",
            "preprocess": {"impute": "median", "scale": "standard", "categorical": "onehot"},
            "params": {"max_iter": 2000, "C": 1.0}}}
        config["folds"] = {"scheme": "stratified_group", "k": 5, "repeats": 1, "seed": 11}  # the demo groups by route
        (workdir / "config.yaml").write_text(yaml.safe_dump(config, sort_keys=False))

    return Scenario("fixed", f"fixed cost: one logistic candidate, 5 folds, the first {rows:,} rows of "
                    "data_demo/shipments.csv (the demo's other settings)", make)


def main(argv: list[str] | None = None) -> int:
    """Parse options, run the scenario, print the tables."""
    args = c.parser(__doc__).parse_args(argv)
    reps = c.reps_of(args)
    c.header("holdfast fixed cost: one candidate, whole workflow, against the GridSearchCV script", args, reps)
    scenario = one_candidate(300 if args.quick else 1_000)
    with c.workspace("fixed-cost", args.keep) as root:
        medians = report(scenario, run_scenario(scenario, reps, args.cores, root), args.cores)
    judge("one candidate, whole workflow <= 8 s", medians["holdfast whole workflow wall (s)"], 8.0, args.quick, " s")
    floor = medians["floor both (s)"]
    if floor is not None:
        print(f"        Snakemake alone needs {floor:.2f} s for this job graph with empty jobs (table above), "
              f"{'leaving' if floor < 8.0 else 'over the target by'} {abs(8.0 - floor):.2f} s "
              f"{'for everything holdfast adds' if floor < 8.0 else 'before holdfast adds anything'}")
    c.footer()
    return 0


if __name__ == "__main__":
    sys.exit(main())
