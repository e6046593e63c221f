"""Benchmark (not a test): holdfast's whole workflow against the script it replaces, on the same folds.

Per repetition, alternating: holdfast's whole workflow, seal to audit, in a fresh folder (the
commands come from ``_common.holdfast_steps``), then bench/gridsearch_baseline.py, which runs
``GridSearchCV(pipeline, grid, cv=PredefinedSplit(...), n_jobs=CORES, refit=False)`` per family over
holdfast's stored folds of that repetition, refits the winner on all development rows and scores
it once on the sealed test rows. Both build candidates with ``holdfast.candidates.build_pipeline``;
the script's CV means, winner and test scores are checked against holdfast's ranking.parquet,
choice.json and verdict ("identical: yes/no" with the largest difference).

Scenarios:
- demo: config/config.yaml on data_demo/shipments.csv, as shipped (copied into the temp folder);
- mixed grid: 13 candidates (5 logistic, 4 random forests of 200 trees, 4 histogram boosting) on
  20,000 development rows of a seeded synthetic binary problem from scikit-learn's
  ``make_classification`` (Guyon, "Design of experiments for the NIPS 2003 variable selection
  benchmark", 2003: Gaussian clusters on hypercube vertices), two of its informative features cut
  into quantile bins and stored as text categories;
- mixed grid, forests in parts: the same data and candidates, the forest family with
  ``jobs_per_fold: 4`` (one fit job per forest candidate and fold); the script is unchanged;
- mixed grid, lean: the forests in the jobs per fold ``holdfast status`` suggests after a plain mixed run
  (LEAN_FOREST_JOBS) and ``diagnostics.learning_curve: false``: holdfast doing the script's work and no more
  (it still checks, records, tallies with its optimism estimates, makes diagnostics and the report, and audits).

Printed per scenario (medians over the repetitions; ratios from the same runs): wall time of the
whole workflow and of the fit phase on each side; Σ in-job fit time (holdfast: Σ fit_seconds of
fits/; script: Σ GridSearchCV mean_fit_time × splits, plus its refit); the limit Σ in-job work /
cores; each side's parallel efficiency (limit / wall); peak memory; where holdfast's time went.

Run:  PYTHONPATH=scripts python bench/head_to_head.py [--reps 3] [--cores 2]   (full size: ≈ 10 min per rep)
      PYTHONPATH=scripts python bench/head_to_head.py --quick                   (checks that it works)
"""

from __future__ import annotations

import json
import shutil
import sys
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import _common as c

BASELINE = Path(__file__).resolve().parent / "gridsearch_baseline.py"
TOLERANCE = 1e-9  # CV means and test scores must agree to this; identical fits give 0.0
LEAN_FOREST_JOBS = 2  # what `holdfast status` suggests on the plain mixed grid's kept runs


@dataclass
class Scenario:
    """A named experiment: ``make(workdir)`` writes its data file and config.yaml into workdir."""

    name: str
    label: str
    make: Callable[[Path], None]


# --------------------------------------------------------------------------- scenarios


def demo(quick: bool) -> Scenario:
    """The shipped demo; --quick keeps its first 1,000 data rows."""

    def make(workdir: Path) -> None:
        (workdir / "data_demo").mkdir(parents=True)
        source = c.REPO / "data_demo" / "shipments.csv"
        target = workdir / "data_demo" / "shipments.csv"
        if quick:
            lines = source.read_text().splitlines(keepends=True)
            target.write_text("".join(lines[:1001]))
        else:
            shutil.copy(source, target)
        shutil.copy(c.REPO / "config" / "config.yaml", workdir / "config.yaml")

    return Scenario("demo", "demo (config/config.yaml on data_demo/shipments.csv"
                    + (", first 1,000 rows)" if quick else ")"), make)


def mixed_frame(dev_rows: int, seed: int) -> Any:
    """A seeded synthetic binary problem with 14 numeric and 2 text features, sized for ``dev_rows``.

    sklearn.datasets.make_classification (8 informative, 2 redundant, 6 noise features, 5 % flipped
    labels); features 0 and 1 are cut into 6 and 8 quantile bins and stored as text categories.
    """
    import numpy as np
    import pandas as pd
    from sklearn.datasets import make_classification

    n = round(dev_rows / 0.8)  # the test partition takes 20 %
    x, y = make_classification(n_samples=n, n_features=16, n_informative=8, n_redundant=2, flip_y=0.05,
                               class_sep=0.8, shuffle=False, random_state=seed)
    order = np.random.default_rng(seed).permutation(n)
    x, y = x[order], y[order]
    frame = pd.DataFrame({"id": [f"R{i:06d}" for i in range(n)]})
    frame["cat_a"] = pd.qcut(x[:, 0], 6, labels=[f"a{i}" for i in range(6)]).astype(str)
    frame["cat_b"] = pd.qcut(x[:, 1], 8, labels=[f"b{i}" for i in range(8)]).astype(str)
    for j in range(2, 16):
        frame[f"x{j:02d}"] = np.round(x[:, j], 5)
    frame["y"] = y
    return frame


def mixed(quick: bool, forest_jobs: int = 1, curves: bool = True) -> Scenario:
    """13 candidates: logistic, random forests, histogram boosting on a synthetic set; with ``forest_jobs`` > 1 the
    forest family's candidates are dealt into that many fit jobs per fold (candidates.<family>.jobs_per_fold);
    without ``curves``, no learning curve (diagnostics.learning_curve: false), which the script does not make."""
    dev_rows, trees = (800, 10) if quick else (20_000, 200)

    def make(workdir: Path) -> None:
        import yaml

        workdir.mkdir(parents=True)
        mixed_frame(dev_rows, seed=20260).to_csv(workdir / "data.csv", index=False)
        config = {
            "experiment": "mixed-grid",
            "data": {"path": "data.csv", "target": "y", "id": "id"},
            "task": "classification",
            "metrics": ["roc_auc", "accuracy", "neg_log_loss"],
            "test": {"fraction": 0.2, "scheme": "stratified", "salt": "bench-mixed"},
            "folds": {"scheme": "stratified", "k": 5, "repeats": 1, "seed": 11},
            "candidates": {
                "logistic": {"estimator": "sklearn.linear_model.LogisticRegression",
                             "preprocess": {"impute": "median", "scale": "standard", "categorical": "onehot"},
                             "params": {"max_iter": 2000}, "grid": {"C": [0.001, 0.01, 0.1, 1.0, 10.0]}},
                "forest": {"estimator": "sklearn.ensemble.RandomForestClassifier",
                           "preprocess": {"impute": "median", "categorical": "onehot"},
                           "params": {"n_estimators": trees, "random_state": 7},
                           "grid": {"max_features": ["sqrt", 0.5], "min_samples_leaf": [1, 5]}, "mem_mb": 2000},
                "boosting": {"estimator": "sklearn.ensemble.HistGradientBoostingClassifier",
                             "preprocess": {"impute": "none", "categorical": "onehot"},
                             "params": {"random_state": 7},
                             "grid": {"learning_rate": [0.05, 0.1], "max_leaf_nodes": [15, 31]}},
            },
            "selection": {"rule": "best_mean"},
            "opening": {"confidence": 0.95, "bootstrap": 1000, "seed": 3},
        }
        if forest_jobs > 1:
            config["candidates"]["forest"]["jobs_per_fold"] = forest_jobs
        if not curves:
            config["diagnostics"] = {"learning_curve": False}
        (workdir / "config.yaml").write_text(yaml.safe_dump(config, sort_keys=False))

    label = (f"mixed grid (13 candidates: logistic, forests of {trees} trees, histogram boosting; "
             f"{dev_rows:,} development rows of make_classification)")
    if not curves:
        return Scenario("mixed-lean", label[:-1] + f"; forests in {forest_jobs} fit jobs per fold, no learning "
                        "curve: the script's work)", make)
    if forest_jobs > 1:
        return Scenario("mixed-parts", label[:-1] + f"; forests in {forest_jobs} fit jobs per fold)", make)
    return Scenario("mixed", label, make)


# --------------------------------------------------------------------------- one repetition


def baseline_plan(workdir: Path, exp: Path) -> dict[str, Any]:
    """What the baseline script needs: holdfast's expanded candidates, grids, metrics and feature columns."""
    import pandas as pd
    import pyarrow.parquet as pq
    from holdfast.candidates import expand
    from holdfast.config import allowed_prefixes, read_yaml, seal_spec, validate, with_task
    from holdfast.dataset import feature_columns

    manifest = json.loads((exp / "sealed" / "manifest.json").read_text())
    config = with_task(validate(read_yaml(workdir / "config.yaml")), manifest["spec"]["task"])
    if config["selection"]["rule"] != "best_mean":
        raise c.BenchError("the baseline script mirrors selection.rule best_mean only")
    folds = pd.read_parquet(exp / "folds.parquet")
    if folds["repeat"].nunique() != 1 or (folds["train_from"] != 0).any():
        raise c.BenchError("PredefinedSplit holds one repeat of complete folds; use repeats: 1 and a k-fold scheme")
    families = expand(config)
    names = pq.read_schema(exp / "dev.parquet").names
    return {
        "families": [{"name": n, "grid": config["candidates"][n]["grid"], "candidates": cands}
                     for n, cands in families.items()],
        "metrics": config["metrics"], "target": config["data"]["target"], "allowed": allowed_prefixes(config),
        "features": feature_columns(pd.DataFrame(columns=names), seal_spec(config)),
        "n_candidates": sum(len(v) for v in families.values()), "n_families": len(families),
        "k": int(folds["fold"].max()) + 1, "dev_rows": int(manifest["counts"]["dev"]),
        "test_rows": int(manifest["counts"]["test"]),
    }


def compare(exp: Path, script: dict[str, Any]) -> dict[str, Any]:
    """The script's CV means, winner and test scores against holdfast's ranking, choice and verdict."""
    import pandas as pd

    ranking = pd.read_parquet(exp / "ranking.parquet")
    ours = {(r.candidate, r.metric): float(r.mean) for r in ranking.itertuples()}
    theirs = {(cid, m): v for cid, means in script["cv_means"].items() for m, v in means.items()}
    missing = set(ours) ^ set(theirs)
    cv_diff = max((abs(ours[k] - theirs[k]) for k in set(ours) & set(theirs)), default=float("nan"))
    winner = json.loads((exp / "choice.json").read_text())["winner"]["candidate"]
    verdict = json.loads((exp / "final" / "verdict.json").read_text())["metrics"]
    test_diff = max(abs(float(verdict[m]["test"]) - v) for m, v in script["test"].items())
    same = not missing and cv_diff <= TOLERANCE and test_diff <= TOLERANCE and winner == script["winner"]
    return {"identical": same, "cv_diff": cv_diff, "test_diff": test_diff, "values": len(ours),
            "missing": len(missing), "winner": winner, "script_winner": script["winner"]}


def run_scenario(scenario: Scenario, reps: int, cores: int, root: Path) -> list[dict[str, Any]]:
    """Alternate holdfast and the script ``reps`` times; return one record per repetition."""
    records: list[dict[str, Any]] = [{} for _ in range(reps)]

    def holdfast(rep: int) -> None:
        workdir = root / scenario.name / f"rep{rep}" / "work"
        logs = root / scenario.name / f"rep{rep}" / "logs"
        scenario.make(workdir)
        config = workdir / "config.yaml"
        exp = workdir / "results" / c.experiment_of(config)
        run = c.run_holdfast(workdir, config, cores, logs)
        phase, source = c.fit_phase(workdir, exp)
        records[rep].update(workdir=workdir, exp=exp, logs=logs, run=run, fit_phase=phase, fit_phase_source=source,
                            fit_sum=c.fit_seconds(exp), stages=c.stage_times(workdir, run),
                            curve_sum=c.curve_seconds(exp), fit_walls=c.fit_job_walls(workdir),
                            plan=baseline_plan(workdir, exp))

    def script(rep: int) -> None:
        rec = records[rep]
        plan_path, out_path = rec["logs"] / "baseline-plan.json", rec["logs"] / "baseline-result.json"
        plan_path.write_text(json.dumps(rec["plan"]))
        run = c.measure([c.PYTHON, BASELINE, rec["exp"], plan_path, out_path, cores], rec["workdir"], rec["logs"],
                        "baseline")
        if run.rc != 0:
            raise c.BenchError(f"the baseline script failed (exit {run.rc}):\n{run.tail()}")
        rec.update(script_run=run, script=json.loads(out_path.read_text()))
        rec["same"] = compare(rec["exp"], rec["script"])

    def floor(rep: int) -> None:
        rec = records[rep]
        rec["floor"] = c.snakemake_floor(c.floor_shape(rec["workdir"]), cores, root / scenario.name / f"rep{rep}" /
                                         "floor", rec["logs"])

    c.alternate(reps, [(f"{scenario.name} holdfast", holdfast), (f"{scenario.name} script", script),
                       (f"{scenario.name} Snakemake alone", floor)])
    return records


# --------------------------------------------------------------------------- report


def report(scenario: Scenario, records: list[dict[str, Any]], cores: int) -> dict[str, float | None]:
    """The comparison table, the identity check and the breakdown of each side's time; returns the medians."""
    plan = records[0]["plan"]
    print(f"{scenario.label}")
    families = f"{plan['n_families']} famil{'y' if plan['n_families'] == 1 else 'ies'}"
    print(f"  {plan['n_candidates']} candidate(s) in {families} x {plan['k']} folds; "
          f"{plan['dev_rows']:,} development rows, {plan['test_rows']:,} sealed test rows; "
          f"medians of {len(records)} alternating rep(s)")
    rows: dict[str, list[tuple[float | None, float | None]]] = {}

    def add(name: str, h: float | None, s: float | None) -> None:
        rows.setdefault(name, []).append((h, s))

    for rec in records:
        sc = rec["script"]
        h_wall, s_wall = rec["run"].wall, rec["script_run"].wall
        s_fit = sc["cv_fit_sum_s"]
        refit = sc["refit_s"] if rec["same"]["winner"] == sc["winner"] else None
        h_limit_fit, s_limit_fit = rec["fit_sum"] / cores, s_fit / cores
        h_limit = (rec["fit_sum"] + refit) / cores if refit is not None else None
        s_limit = (s_fit + sc["refit_s"]) / cores
        h_limit_curves = (rec["fit_sum"] + refit + rec["curve_sum"]) / cores if refit is not None else None
        bound = c.schedule_bound(rec["fit_walls"], cores)
        add("whole workflow wall (s)", h_wall, s_wall)
        add("fit phase wall (s)", rec["fit_phase"], sc["search_s"])
        add("Σ in-job CV fit time (s)", rec["fit_sum"], s_fit)
        add("refit of the winner, in job (s)", None, sc["refit_s"])
        add("limit, fit phase: Σ CV fit / cores (s)", h_limit_fit, s_limit_fit)
        add("limit, whole: Σ (CV fit + refit) / cores (s)", h_limit, s_limit)
        add("Σ in-job learning-curve fit time (s)", rec["curve_sum"], None)
        add("limit, whole, with the learning curves (s)", h_limit_curves, s_limit)
        add("fit phase, shortest any order of its jobs allows (s)", bound, None)
        add("parallel efficiency, fit phase", c.ratio(h_limit_fit, rec["fit_phase"]), c.ratio(s_limit_fit,
                                                                                              sc["search_s"]))
        add("parallel efficiency, fit phase, best its jobs allow", c.ratio(h_limit_fit, bound), None)
        add("parallel efficiency, whole", c.ratio(h_limit, h_wall), c.ratio(s_limit, s_wall))
        add("peak RSS of the largest process (MiB)", rec["run"].peak_mib, rec["script_run"].peak_mib)
        h_cpu, s_cpu = rec["run"].cpu, rec["script_run"].cpu
        add("CPU time, every process (user + system, s)", h_cpu, s_cpu)
        add("whole workflow at full use of the cores: CPU / cores (s)", h_cpu / cores, s_cpu / cores)
        add("parallel efficiency, whole, by CPU time", c.ratio(h_cpu / cores, h_wall), c.ratio(s_cpu / cores,
                                                                                                s_wall))
        add("lowest ratio this CPU time allows: CPU / cores / script's wall", c.ratio(h_cpu / cores, s_wall), None)
    table, medians = [], {}
    for name, pairs in rows.items():
        h = c.median([p[0] for p in pairs])
        s = c.median([p[1] for p in pairs])
        medians[f"holdfast {name}"], medians[f"script {name}"] = h, s
        if "efficiency" in name:
            table.append([name, c.pct(h), c.pct(s), ""])
        elif "lowest ratio" in name:
            table.append([name, "" if h is None else f"{h:.2f}x", "", ""])
        else:
            r = c.ratio(h, s) if "refit" not in name and "curve" not in name else None
            table.append([name, h, s, "" if r is None else f"{r:.2f}x"])
    c.table(["measure", "holdfast", "script", "holdfast / script"], table)
    per_rep = [rec["run"].wall / rec["script_run"].wall for rec in records]
    print(f"  whole-workflow ratio per rep: {', '.join(f'{r:.2f}x' for r in per_rep)}")
    for i, rec in enumerate(records):
        same = rec["same"]
        print(f"  rep {i + 1} identical: {'yes' if same['identical'] else 'NO'} (max |Δ| over {same['values']} CV "
              f"means {same['cv_diff']:.3g}, over test scores {same['test_diff']:.3g}; winner holdfast "
              f"{same['winner']}, script {same['script_winner']}"
              + (f"; {same['missing']} candidate x metric values on one side only" if same["missing"] else "") + ")")
    print(f"  holdfast fit phase from {records[0]['fit_phase_source']}")
    print("  holdfast records no refit time, so its whole-workflow limit uses the script's refit of the same "
          "winner on the same rows")
    print("  learning curves: holdfast's diagnostic fits of the winner on smaller training sets (ledger "
          "'learning_curve' lines that fitted); the script makes none, so its limit with them is its plain limit")
    print("  CPU time: user + system seconds of every process each side started and waited for (Snakemake, its "
          "jobs, the job worker and its children; joblib's worker processes), from getrusage(RUSAGE_CHILDREN); "
          "no schedule runs the same work on the cores in less than CPU / cores, so the lowest ratio is a bound "
          "for this much work, reached only at 100 % use of every core from the first second to the last")
    print("  shortest any order allows: a lower bound on running the measured fit_family jobs (wall times from "
          "Snakemake's records) on the cores, one job per core at a time (bench/_common.py: schedule_bound); "
          "finer jobs would lower it")
    print(f"  holdfast commands: {c.workflow_label()}")
    print(f"  script: bench/gridsearch_baseline.py, GridSearchCV(n_jobs={cores}) per family, a fresh Python process; "
          "its refit uses the libraries' default threads, as a practitioner's would (holdfast's jobs use their "
          "declared threads)")
    print()
    stages: dict[str, list[tuple[int, float]]] = {}
    for rec in records:
        for name, jobs, seconds in rec["stages"]:
            stages.setdefault(name, []).append((jobs, seconds))
    breakdown = [[name, c.median([j for j, _ in v]), c.median([s for _, s in v]),
                  c.median([s / j for j, s in v])] for name, v in stages.items()]
    c.table(["holdfast: where the wall time went (medians)", "jobs", "Σ job wall (s)", "per job (s)"], breakdown)
    script_rows = [
        ("Python start-up and imports", [r["script"]["imports_s"] for r in records]),
        ("GridSearchCV, every family (fit phase)", [r["script"]["search_s"] for r in records]),
        ("refit of the winner", [r["script"]["refit_s"] for r in records]),
        ("reading files, test score, exit", [r["script_run"].wall - r["script"]["imports_s"] - r["script"]["search_s"]
                                             - r["script"]["refit_s"] for r in records]),
    ]
    c.table(["script: where the wall time went (medians)", "seconds"],
            [[name, c.median(v)] for name, v in script_rows])
    shape = c.floor_shape(records[0]["workdir"])
    floor_both = [sum(m.wall for m in r["floor"].values()) for r in records]
    c.table([f"Snakemake alone, same graph, empty jobs ({shape['fits']} fit, {shape['curves']} curve)", "seconds"], [
        ["run (to the report)", c.median([r["floor"]["run"].wall for r in records])],
        ["open (the opening, the report again)", c.median([r["floor"]["open"].wall for r in records])],
        ["both: the floor of this job graph", c.median(floor_both)],
        ["both: CPU time (user + system)", c.median([sum(m.cpu for m in r["floor"].values()) for r in records])],
        ["holdfast's whole workflow above the floor", c.median([r["run"].wall - f
                                                                for r, f in zip(records, floor_both, strict=True)])],
    ])
    print(f"  {c.FLOOR_NOTE}")
    medians["floor both (s)"] = c.median(floor_both)
    medians["identical"] = float(all(rec["same"]["identical"] for rec in records))
    return medians


def cpu_note(m: dict[str, float | None]) -> None:
    """Under a ratio target: the lowest ratio the measured CPU time of each side allows on these cores."""
    h_cpu, s_cpu = m["holdfast CPU time, every process (user + system, s)"], m["script CPU time, every process (user "
                                                                               "+ system, s)"]
    lowest = m["holdfast lowest ratio this CPU time allows: CPU / cores / script's wall"]
    if h_cpu is None or s_cpu is None or lowest is None:
        return
    print(f"        holdfast's processes used {h_cpu:.2f} CPU seconds, the script's {s_cpu:.2f} "
          f"({h_cpu / s_cpu:.2f}x): even at 100 % use of every core from start to end, that much work allows no "
          f"ratio below {lowest:.2f}x")


def judge(target: str, value: float | None, limit: float, quick: bool, unit: str = "") -> None:
    """One line on an issue-13 target: the measured median against the limit (not judged with --quick)."""
    shown = "—" if value is None else (f"{100 * value:.0f} %" if unit == "%" else f"{value:.2f}{unit}")
    if quick:
        verdict = "not judged (--quick sizes)"
    elif value is None:
        verdict = "not measured"
    else:
        verdict = "met" if (value >= limit if unit == "%" else value <= limit) else "NOT met"
    print(f"target  {target}: measured {shown}: {verdict}")


def main(argv: list[str] | None = None) -> int:
    """Parse options, run both scenarios, print the tables."""
    p = c.parser(__doc__)
    p.add_argument("--only", choices=("demo", "mixed", "mixed-parts", "mixed-lean"), help="run one scenario")
    args = p.parse_args(argv)
    reps = c.reps_of(args)
    c.header("holdfast head to head: the whole workflow against the GridSearchCV script", args, reps)
    scenarios = [s for s in (demo(args.quick), mixed(args.quick), mixed(args.quick, forest_jobs=4),
                             mixed(args.quick, forest_jobs=LEAN_FOREST_JOBS, curves=False))
                 if args.only in (None, s.name)]
    with c.workspace("head-to-head", args.keep) as root:
        results = {s.name: report(s, run_scenario(s, reps, args.cores, root), args.cores) for s in scenarios}
    wall = "whole workflow wall (s)"
    if "demo" in results:
        m = results["demo"]
        judge("demo, whole workflow <= 1.3x the script", c.ratio(m[f"holdfast {wall}"], m[f"script {wall}"]), 1.3,
              args.quick, "x")
        floor, script = m["floor both (s)"], m[f"script {wall}"]
        if floor is not None and script:
            print(f"        Snakemake alone needs {floor:.2f} s for this job graph with empty jobs, "
                  f"{100 * floor / script:.0f} % of the script's {script:.2f} s; 1.3x leaves "
                  f"{1.3 * script - floor:.2f} s above it for all of holdfast's work")
        cpu_note(m)
    for name in ("mixed", "mixed-parts", "mixed-lean"):
        if name not in results:
            continue
        m = results[name]
        label = "mixed grid" + {"mixed": "", "mixed-parts": ", forests in parts",
                                "mixed-lean": ", forests in parts, no learning curve"}[name]
        judge(f"{label}, whole workflow <= 1.0x the script", c.ratio(m[f"holdfast {wall}"], m[f"script {wall}"]),
              1.0, args.quick, "x")
        judge(f"{label}, holdfast fit-phase efficiency >= 90 %", m["holdfast parallel efficiency, fit phase"], 0.9,
              args.quick, "%")
        best = m["holdfast parallel efficiency, fit phase, best its jobs allow"]
        if best is not None:
            print(f"        its measured fit jobs allow at most {100 * best:.0f} % in any order")
        with_curves, script = m["holdfast limit, whole, with the learning curves (s)"], m[f"script {wall}"]
        if with_curves is not None and script:
            print(f"        holdfast's work with its learning curves needs {with_curves:.2f} s on these cores at 100 % "
                  f"efficiency: {with_curves / script:.2f}x the script's whole {script:.2f} s")
        cpu_note(m)
    for name, m in results.items():
        if not m["identical"]:
            print(f"WARNING {name}: the script's numbers differ from holdfast's in some rep; see 'identical' above")
    c.footer()
    return 0


if __name__ == "__main__":
    sys.exit(main())
