"""Benchmark (not a test): how holdfast's planning scales with the number of fit jobs.

Three measurements, each command in a fresh process (wall time; peak RSS of the largest process,
from ``getrusage(RUSAGE_CHILDREN)`` in a wrapper):

1. dry run (``snakemake -n``) before the seal at 1,000, 10,000 and 30,000 fit jobs: many families
   x folds x repeats on a 400-row data file (stratified 10-fold). A config the package refuses
   (today more than ``foldspec.MAX_FIT_JOBS``) is a row "refused: <message>", not a crash.
2. no-op rerun at 5,000 fit jobs: ``snakemake -n`` on a finished experiment, then a real run that
   plans nothing (the first command of ``_common.holdfast_steps``). The finished state is made
   once by ``holdfast run`` with ``sklearn.dummy.DummyClassifier`` (trivially fast fits; every job
   still pays its start-up), not opened: the development loop's state, whose workflow still holds
   every fit rule (a closed experiment's does not), then reused by every rep; the table says how long
   building it took. ``--state-dir DIR`` keeps it between invocations (reused when present; a stale
   state shows as planned jobs > 0).
3. the Snakefile's parse time with a finished 1,000-job experiment present (each cluster job
   re-parses it): ``snakemake -n`` on it minus ``snakemake -n`` on a one-rule Snakefile (Snakemake's
   own start-up), and the parse alone (Snakemake's API: include and check, after its imports) in a
   job-like process (exec mode remote, as a cluster job) and in a main process (with the guards).

Run:  PYTHONPATH=scripts python bench/scale.py [--reps 3] [--state-dir DIR] [--only dry noop parse]
      Building the finished states runs 6,000 real fit jobs (1,000 took 584 s here, 5,000 about five times that).
      PYTHONPATH=scripts python bench/scale.py --quick     (tiny sizes; checks that it works)
"""

from __future__ import annotations

import json
import re
import sys
import time
from pathlib import Path
from typing import Any

import _common as c

DATA_ROWS = 400
PARSE = """\
import json, sys, time
t0 = time.perf_counter()
from pathlib import Path
from snakemake.api import SnakemakeApi
from snakemake.settings.types import ConfigSettings, OutputSettings, ResourceSettings, WorkflowSettings
from snakemake_interface_executor_plugins.settings import ExecMode
imports = time.perf_counter() - t0
out, mode, snakefile, workdir, config = sys.argv[1:6]
settings = WorkflowSettings(exec_mode=ExecMode.REMOTE if mode == "job" else ExecMode.DEFAULT)
with SnakemakeApi(OutputSettings()) as api:
    workflow = api.workflow(resource_settings=ResourceSettings(cores=1), workflow_settings=settings,
                            config_settings=ConfigSettings(configfiles=[Path(config)]),
                            snakefile=Path(snakefile), workdir=Path(workdir))
    t1 = time.perf_counter()
    parsed = workflow._workflow  # include every .smk and check the rules: the parse
    parse = time.perf_counter() - t1
    main = parsed.is_main_process
Path(out).write_text(json.dumps({"imports": imports, "parse": parse, "main": main}))
"""


def shape(jobs: int) -> tuple[int, int, int]:
    """(families, folds, repeats) giving ``jobs`` fit jobs: 10 folds, up to 100 families, repeats for the rest."""
    k = 10 if jobs >= 100 else 5
    families = min(100, max(1, jobs // (k * 10))) if jobs >= 100 else 2
    repeats = jobs // (families * k)
    if families * k * repeats != jobs:
        raise ValueError(f"{jobs} fit jobs is not families x {k} folds x repeats")
    return families, k, repeats


def write_experiment(workdir: Path, jobs: int, estimator: str) -> tuple[int, int, int]:
    """A 400-row data file and a config with ``jobs`` fit jobs, one candidate per family."""
    import numpy as np
    import pandas as pd
    import yaml
    from sklearn.datasets import make_classification

    workdir.mkdir(parents=True, exist_ok=True)
    x, y = make_classification(n_samples=DATA_ROWS, n_features=5, n_informative=3, random_state=7)
    frame = pd.DataFrame(np.round(x, 5), columns=[f"x{j}" for j in range(5)])
    frame.insert(0, "id", [f"R{i:04d}" for i in range(DATA_ROWS)])
    frame["y"] = y
    frame.to_csv(workdir / "data.csv", index=False)
    families, k, repeats = shape(jobs)
    if estimator == "dummy":  # distinct specs, so distinct candidate ids; random_state does not change a prior
        candidates = {f"f{i:03d}": {"estimator": "sklearn.dummy.DummyClassifier",
                                    "params": {"strategy": "prior", "random_state": i}} for i in range(families)}
    else:
        candidates = {f"f{i:03d}": {"estimator": "sklearn.linear_model.LogisticRegression",
                                    "params": {"C": 1.0 + i}} for i in range(families)}
    config = {"experiment": "scale", "data": {"path": "data.csv", "target": "y", "id": "id"},
              "task": "classification", "metrics": ["accuracy"],
              "test": {"fraction": 0.2, "scheme": "stratified", "salt": "bench-scale"},
              "folds": {"scheme": "stratified", "k": k, "repeats": repeats, "seed": 1},
              "candidates": candidates, "selection": {"rule": "best_mean", "bootstrap": 100},
              "opening": {"bootstrap": 100, "seed": 1}}
    (workdir / "config.yaml").write_text(yaml.safe_dump(config, sort_keys=False))
    return families, k, repeats


def planned(run: c.Measured) -> int | None:
    """Jobs a dry run plans: 0 for "Nothing to be done", else the total of Snakemake's job stats."""
    text = run.stdout.read_text(errors="replace") + run.stderr.read_text(errors="replace")
    if "Nothing to be done" in text:
        return 0
    found = re.findall(r"^total\s+(\d+)\s*$", text, flags=re.MULTILINE)
    return int(found[-1]) if found else None


def outcome(run: c.Measured) -> str:
    """'ok', or why the command stopped (a refusal by holdfast names the key and what to do)."""
    if run.rc == 0:
        return "ok"
    message = c.first_message(run)
    return f"refused: {message}" if "; " in message else f"failed (exit {run.rc}): {message}"


# --------------------------------------------------------------------------- 1. dry runs


BARE = """\
# Snakemake alone: holdfast's job graph without holdfast (no config reading, guards, input functions or params).
FITS = [(f, r, k) for f in range({families}) for r in range({repeats}) for k in range({k})]

rule all:
    input:
        "ranking.txt",

rule split:
    output:
        dev="dev.txt",
        folds="folds.txt",
    script:
        "job.py"

rule fit:
    input:
        dev="dev.txt",
        folds="folds.txt",
    output:
        fits="fits/f{{family}}/r{{repeat}}f{{fold}}.txt",
        oof="oof/f{{family}}/r{{repeat}}f{{fold}}.txt",
    log:
        "logs/f{{family}}/r{{repeat}}f{{fold}}.log",
    threads: 1
    resources:
        mem_mb=1000,
        runtime=60,
    script:
        "job.py"

rule tally:
    input:
        [f"fits/f{{f}}/r{{r}}f{{k}}.txt" for f, r, k in FITS],
        [f"oof/f{{f}}/r{{r}}f{{k}}.txt" for f, r, k in FITS],
    output:
        "ranking.txt",
    script:
        "job.py"
"""


def write_bare(workdir: Path, jobs: int) -> None:
    """A Snakefile with holdfast's graph shape (split -> ``jobs`` fit jobs -> tally) and nothing of holdfast."""
    families, k, repeats = shape(jobs)
    workdir.mkdir(parents=True, exist_ok=True)
    (workdir / "Snakefile").write_text(BARE.format(families=families, repeats=repeats, k=k))
    (workdir / "job.py").write_text("pass\n")


def dry_runs(sizes: list[int], reps: int, cores: int, root: Path) -> None:
    """Dry-run time and peak memory before the seal, per fit-job count; beside each, Snakemake alone on the same
    graph shape (the floor holdfast's planning cannot go below)."""
    dirs = {n: root / f"dry-{n}" for n in sizes}
    bare = {n: root / f"bare-{n}" for n in sizes}
    shapes = {n: write_experiment(dirs[n], n, "logistic") for n in sizes}
    for n in sizes:
        write_bare(bare[n], n)
    runs: dict[int, list[c.Measured]] = {n: [] for n in sizes}
    floor: dict[int, list[c.Measured]] = {n: [] for n in sizes}

    def step(n: int) -> Any:
        def go(rep: int) -> None:
            cmd = c.snakemake_cmd(dirs[n], dirs[n] / "config.yaml", cores, "-n")
            runs[n].append(c.measure(cmd, dirs[n], root / "logs", f"dry-{n}-rep{rep}"))
        return go

    def step_bare(n: int) -> Any:
        def go(rep: int) -> None:
            cmd = [c.PYTHON, "-m", "snakemake", "-s", str(bare[n] / "Snakefile"), "-d", str(bare[n]), "--cores",
                   str(cores), "-n"]
            floor[n].append(c.measure(cmd, bare[n], root / "logs", f"bare-{n}-rep{rep}"))
        return go

    c.alternate(reps, [pair for n in sizes for pair in ((f"dry run {n:,} fit jobs", step(n)),
                                                        (f"Snakemake alone {n:,} fit jobs", step_bare(n)))])
    rows = []
    for n in sizes:
        fams, k, repeats = shapes[n]
        last = runs[n][-1]
        ours, alone = c.median([r.wall for r in runs[n]]), c.median([r.wall for r in floor[n]])
        rows.append([f"{n:,}", f"{fams} x {k} x {repeats}", ours, c.median([r.peak_mib for r in runs[n]]),
                     alone, c.median([r.peak_mib for r in floor[n]]),
                     None if not ours or not alone else f"{ours / alone:.2f}x", c.fmt(planned(last)),
                     outcome(last)])
    c.table(["fit jobs", "families x folds x repeats", "dry run (s)", "peak RSS (MiB)", "Snakemake alone (s)",
             "alone: peak (MiB)", "ratio", "planned jobs", "result"],
            rows, note_last=True,
            title=f"1. dry run before the seal (snakemake -n; {DATA_ROWS}-row data file; medians)")
    print("  Snakemake alone: a generated Snakefile with the same graph (one split job, the fit jobs with two inputs, "
          "two outputs, a log, threads and resources, one tally job reading them all), `script:` bodies, no input "
          "functions, no config: the floor of Snakemake's own planning and dry-run printing at that size")


# --------------------------------------------------------------------------- finished states


def finished_state(where: Path, jobs: int, cores: int) -> dict[str, Any]:
    """A finished experiment with ``jobs`` DummyClassifier fit jobs: reused if built before, else built now."""
    info_path = where / "bench-state.json"
    if info_path.exists():
        info = json.loads(info_path.read_text())
        if info.get("jobs") == jobs and info.get("opened") is False:
            return {**info, "reused": True}
    if where.exists() and any(where.iterdir()):
        raise c.BenchError(f"'{where}' holds something other than a finished {jobs}-job state; empty it or "
                           "pass another --state-dir")
    shape_ = write_experiment(where, jobs, "dummy")
    c.progress(f"building a finished {jobs:,}-fit-job experiment in {where} (holdfast run, DummyClassifier)")
    t0 = time.perf_counter()
    # The run alone, not the opening: a closed experiment drops every rule up to the opening from its workflow, so
    # a no-op rerun or a main-process parse of it would measure a much smaller graph than the development loop's.
    label, cmd = c.holdfast_steps(where, where / "config.yaml", cores)[0]
    run = c.measure(cmd, where, where.parent / f"logs-build-{jobs}", f"holdfast-{label}")
    if run.rc != 0:
        raise c.BenchError(f"building the {jobs:,}-job state failed (exit {run.rc}); see "
                           f"{where.parent}/logs-build-{jobs}")
    info = {"jobs": jobs, "shape": shape_, "build_seconds": time.perf_counter() - t0, "commit": c.commit(),
            "built": time.strftime("%Y-%m-%d %H:%M:%S"), "commands": [label], "opened": False}
    info_path.write_text(json.dumps(info))
    return {**info, "reused": False}


def state_note(info: dict[str, Any], where: Path) -> str:
    """How the finished state was made, for the table's footnote."""
    how = (f"{info['jobs']:,} fit jobs ({' x '.join(map(str, info['shape']))} families x folds x repeats), built by "
           f"holdfast run with DummyClassifier in {info['build_seconds']:.0f} s (not opened: the development loop's "
           "state)")
    return (f"{how}, reused from {where} (built {info['built']} at {info['commit']})" if info["reused"]
            else f"{how} in this invocation")


# --------------------------------------------------------------------------- 2. no-op rerun


def noop(jobs: int, reps: int, cores: int, root: Path, state_dir: Path | None) -> None:
    """A dry run and a real run on a finished experiment: both should plan nothing."""
    where = (state_dir or root) / f"finished-{jobs}"
    info = finished_state(where, jobs, cores)
    config = where / "config.yaml"
    run_cmd = dict(c.holdfast_steps(where, config, cores))["run"]
    dry: list[c.Measured] = []
    real: list[c.Measured] = []
    c.alternate(reps, [
        ("no-op dry run", lambda rep: dry.append(c.measure(c.snakemake_cmd(where, config, cores, "-n"), where,
                                                           root / "logs", f"noop-dry-rep{rep}"))),
        ("no-op real run", lambda rep: real.append(c.measure(run_cmd, where, root / "logs", f"noop-run-rep{rep}"))),
    ])
    rows = [["snakemake -n", c.median([r.wall for r in dry]), c.median([r.peak_mib for r in dry]),
             c.fmt(planned(dry[-1])), outcome(dry[-1])],
            [f"real run (python -m {run_cmd[2]} ...)",
             c.median([r.wall for r in real]), c.median([r.peak_mib for r in real]), c.fmt(planned(real[-1])),
             outcome(real[-1])]]
    c.table(["command on a finished experiment", "wall (s)", "peak RSS (MiB)", "planned jobs", "result"], rows,
            note_last=True, title=f"2. no-op rerun at {jobs:,} fit jobs (medians)")
    print(f"  finished state: {state_note(info, where)}")
    if any(planned(r) for r in dry + real):
        print("  NOT a no-op: jobs were planned (a stale state: delete the state folder to rebuild it)")
    print()


# --------------------------------------------------------------------------- 3. parse time


def parse_time(jobs: int, reps: int, cores: int, root: Path, state_dir: Path | None) -> None:
    """snakemake -n minus Snakemake's start-up, and the parse alone in a job-like and a main process."""
    where = (state_dir or root) / f"finished-{jobs}"
    info = finished_state(where, jobs, cores)
    config = where / "config.yaml"
    trivial = root / "one-rule"
    trivial.mkdir(exist_ok=True)
    (trivial / "Snakefile").write_text('rule all:\n    input:\n        "present.txt",\n')
    (trivial / "present.txt").write_text("")
    logs = root / "logs"
    out: dict[str, list[Any]] = {"dry": [], "startup": [], "job": [], "main": []}

    failures: dict[str, str] = {}

    def api(mode: str, rep: int) -> None:
        run, result, why = c.try_python_json(PARSE, [mode, str(c.REPO / "Snakefile"), str(where), str(config)],
                                             where, logs, f"parse-{mode}-rep{rep}")
        if result is not None and result["main"] != (mode == "main"):
            result, why = None, f"the parse ran with is_main_process={result['main']}"
        if result is None:
            failures[mode] = why or "no result"
        else:
            out[mode].append((run, result))

    c.alternate(reps, [
        ("dry run, finished experiment", lambda rep: out["dry"].append(c.measure(
            c.snakemake_cmd(where, config, cores, "-n"), where, logs, f"parse-dry-rep{rep}"))),
        ("dry run, one-rule Snakefile", lambda rep: out["startup"].append(c.measure(
            [c.PYTHON, "-m", "snakemake", "-s", trivial / "Snakefile", "-d", trivial, "--cores", "1", "-n"], trivial,
            logs, f"parse-startup-rep{rep}"))),
        ("parse, job-like process", lambda rep: api("job", rep)),
        ("parse, main process", lambda rep: api("main", rep)),
    ])
    dry = c.median([r.wall for r in out["dry"]])
    startup = c.median([r.wall for r in out["startup"]])
    rows = [
        [f"snakemake -n, finished {jobs:,}-job experiment", dry, c.median([r.peak_mib for r in out["dry"]])],
        ["snakemake -n, one-rule Snakefile (Snakemake's start-up)", startup,
         c.median([r.peak_mib for r in out["startup"]])],
        ["difference: holdfast's parse, guards and DAG", None if dry is None or startup is None else dry - startup,
         None],
        ["parse alone, job-like process (exec mode remote)", c.median([r["parse"] for _, r in out["job"]]),
         c.median([m.peak_mib for m, _ in out["job"]])],
        ["parse alone, main process (with the guards)", c.median([r["parse"] for _, r in out["main"]]),
         c.median([m.peak_mib for m, _ in out["main"]])],
        ["  (Snakemake API imports before either parse)", c.median([r["imports"] for _, r in out["job"] + out["main"]]),
         None],
    ]
    c.table(["measure", "seconds", "peak RSS (MiB)"], rows,
            title=f"3. Snakefile parse with a finished {jobs:,}-fit-job experiment present (medians)")
    for mode, why in failures.items():
        print(f"  parse alone, {mode} process: failed: {why}")
    print(f"  planned jobs of the dry run: {c.fmt(planned(out['dry'][-1]))} ({outcome(out['dry'][-1])})")
    print("  parse alone: Snakemake's API, WorkflowApi._workflow (include every .smk, check the rules), timed after "
          "its imports in a fresh process; a cluster job pays it once more per job")
    print(f"  finished state: {state_note(info, where)}")
    print()


def main(argv: list[str] | None = None) -> int:
    """Parse options, run the chosen parts, print the tables."""
    p = c.parser(__doc__)
    p.add_argument("--only", nargs="+", choices=("dry", "noop", "parse"), default=["dry", "noop", "parse"],
                   help="which parts to run (default: all)")
    p.add_argument("--state-dir", type=Path, help="keep the finished experiments here and reuse them next time")
    p.add_argument("--noop-jobs", type=int, default=5_000,
                   help="fit jobs of the no-op rerun's finished experiment (default 5,000, the issue's size)")
    p.add_argument("--parse-jobs", type=int, default=1_000,
                   help="fit jobs of the parse measurement's finished experiment (default 1,000, the issue's size; "
                        "the same number as --noop-jobs reuses that state)")
    args = p.parse_args(argv)
    reps = c.reps_of(args)
    c.header("holdfast at scale: dry runs, a no-op rerun and the Snakefile's parse", args, reps)
    from holdfast.foldspec import MAX_FIT_JOBS

    print(f"foldspec.MAX_FIT_JOBS in this checkout: {MAX_FIT_JOBS:,}\n")
    state_dir = args.state_dir.resolve() if args.state_dir else None
    if state_dir:
        state_dir.mkdir(parents=True, exist_ok=True)
    with c.workspace("scale", args.keep) as root:
        if "dry" in args.only:
            dry_runs([20, 6_000] if args.quick else [1_000, 10_000, 30_000], reps, args.cores, root)
        if "noop" in args.only:
            noop(20 if args.quick else args.noop_jobs, reps, args.cores, root, state_dir)
        if "parse" in args.only:
            parse_time(20 if args.quick else args.parse_jobs, reps, args.cores, root, state_dir)
    c.footer()
    return 0


if __name__ == "__main__":
    sys.exit(main())
