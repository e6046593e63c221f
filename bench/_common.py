"""Shared parts of the speed benchmarks: header, alternating runs, medians, peak memory, tables.

Every speed benchmark prints plain fixed-width tables; none is a timed test. Each measured
command runs in a fresh process under a small wrapper that reports its wall time, the peak
resident memory of the largest process it waited for and the CPU seconds of all of them
(``resource.getrusage(RUSAGE_CHILDREN)`` in the wrapper, so a measurement never includes earlier
ones).

How holdfast's whole workflow is started lives in ONE place, :func:`holdfast_steps`: today a
Snakemake run then ``holdfast audit``; when the CLI offers ``holdfast run`` and ``holdfast open``
they are used instead (detected at run time from ``python -m holdfast --help``).
"""

from __future__ import annotations

import argparse
import base64
import datetime as dt
import json
import os
import platform
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field
from importlib.metadata import PackageNotFoundError, version
from pathlib import Path
from typing import Any

REPO = Path(__file__).resolve().parents[1]
SCRIPTS = REPO / "scripts"
PYTHON = sys.executable
sys.path.insert(0, str(SCRIPTS))  # holdfast from this checkout, with or without PYTHONPATH
PACKAGES = ("snakemake", "scikit-learn", "pandas", "pyarrow", "numpy")

# Runs argv[2:] and writes {"wall", "maxrss_kb", "rc", "start", "end", "cpu"} to argv[1]. ru_maxrss of
# RUSAGE_CHILDREN is the peak of the largest descendant waited for (KiB on Linux), ru_utime + ru_stime
# the CPU seconds of every descendant waited for (a process counts once its parent waited for it, so
# Snakemake's jobs, the job worker's children and joblib's worker processes all count); the wrapper
# itself is not counted, and it has no earlier children.
WRAPPER = """\
import json, resource, subprocess, sys, time
start = time.time(); t0 = time.perf_counter()
rc = subprocess.call(sys.argv[2:])
wall = time.perf_counter() - t0
usage = resource.getrusage(resource.RUSAGE_CHILDREN)
with open(sys.argv[1], "w") as handle:
    json.dump({"wall": wall, "maxrss_kb": usage.ru_maxrss, "rc": rc, "start": start, "end": time.time(),
               "cpu": usage.ru_utime + usage.ru_stime}, handle)
"""


class BenchError(RuntimeError):
    """A measured command failed where the benchmark needs it to succeed."""


# --------------------------------------------------------------------------- arguments and header


def parser(description: str | None) -> argparse.ArgumentParser:
    """The options every speed benchmark takes: --quick, --reps, --cores, --keep."""
    p = argparse.ArgumentParser(description=(description or "").split("\n\n")[0],
                                formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--quick", action="store_true",
                   help="tiny sizes and 1 repetition: only checks that the benchmark works")
    p.add_argument("--reps", type=int, default=None, help="repetitions of each measurement (default 3; --quick: 1)")
    p.add_argument("--cores", type=int, default=2,
                   help="cores given to Snakemake and to GridSearchCV's n_jobs (default 2)")
    p.add_argument("--keep", action="store_true", help="keep the temporary folder and print its path")
    return p


def reps_of(args: argparse.Namespace) -> int:
    """Repetitions: --reps, else 1 with --quick, else 3."""
    reps = args.reps if args.reps is not None else (1 if args.quick else 3)
    if reps < 1:
        raise SystemExit("--reps must be at least 1")
    return reps


def package_versions() -> dict[str, str]:
    """Python and the packages whose speed the benchmarks measure."""
    out = {"python": platform.python_version()}
    for name in PACKAGES:
        try:
            out[name] = version(name)
        except PackageNotFoundError:
            out[name] = "not installed"
    return out


def commit() -> str:
    """This checkout's commit, marked when the working tree has uncommitted changes."""
    try:
        head = subprocess.run(["git", "-C", str(REPO), "rev-parse", "--short", "HEAD"], capture_output=True,
                              text=True, check=True).stdout.strip()
        dirty = subprocess.run(["git", "-C", str(REPO), "status", "--porcelain", "--untracked-files=no"],
                               capture_output=True, text=True, check=True).stdout.strip()
    except (OSError, subprocess.CalledProcessError):
        return "unknown"
    return head + (" (uncommitted changes)" if dirty else "")


def header(title: str, args: argparse.Namespace, reps: int) -> None:
    """Print what was measured, when, on what machine and with which versions."""
    cores = os.cpu_count()
    usable = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else cores
    load = ", ".join(f"{x:.2f}" for x in os.getloadavg())
    print(title)
    print("=" * len(title))
    print(f"date            {dt.datetime.now(dt.UTC).isoformat(timespec='seconds')}")
    print(f"machine         {cores} cores ({usable} usable by this process), {platform.machine()}, "
          f"load average at start {load}")
    print(f"versions        {', '.join(f'{k} {v}' for k, v in package_versions().items())}")
    print(f"holdfast        {REPO} at {commit()}")
    quick = "--quick (tiny sizes: checks that the benchmark works; not its numbers) " if args.quick else ""
    print(f"settings        {quick}reps {reps}, cores {args.cores}")
    print()


def footer() -> None:
    """Print the load average at the end, so a busy machine shows."""
    print(f"load average at end {', '.join(f'{x:.2f}' for x in os.getloadavg())}")


# --------------------------------------------------------------------------- running and measuring


def env() -> dict[str, str]:
    """The environment of every measured process: this checkout's package first on the path."""
    return {**os.environ, "PYTHONPATH": str(SCRIPTS)}


@dataclass
class Measured:
    """One measured command: wall seconds, peak RSS of its largest process, exit code, logs, and the CPU seconds
    (user + system) of every process it started and waited for, its children's children included."""

    wall: float
    maxrss_kb: int
    rc: int
    start: float
    end: float
    stdout: Path
    stderr: Path
    cpu: float

    @property
    def peak_mib(self) -> float:
        return self.maxrss_kb / 1024.0

    def tail(self, lines: int = 15) -> str:
        """The last lines of stderr, then stdout (where Snakemake and holdfast say what went wrong)."""
        text = self.stderr.read_text(errors="replace").strip() or self.stdout.read_text(errors="replace").strip()
        return "\n".join(text.splitlines()[-lines:])


def measure(cmd: Sequence[str], cwd: Path, logs: Path, name: str) -> Measured:
    """Run ``cmd`` in a fresh process under the wrapper; logs go to ``logs/<name>.out|.err``."""
    logs.mkdir(parents=True, exist_ok=True)
    out, err, result = logs / f"{name}.out", logs / f"{name}.err", logs / f"{name}.json"
    with open(out, "w") as o, open(err, "w") as e:
        subprocess.run([PYTHON, "-c", WRAPPER, str(result), *map(str, cmd)], cwd=cwd, env=env(), stdout=o,
                       stderr=e, stdin=subprocess.DEVNULL, check=False)
    if not result.exists():
        raise BenchError(f"{name}: the measuring wrapper itself died (killed?); see {err}")
    data = json.loads(result.read_text())
    return Measured(data["wall"], int(data["maxrss_kb"]), int(data["rc"]), data["start"], data["end"], out, err,
                    data["cpu"])


def python_json(code: str, args: Sequence[str], cwd: Path, logs: Path, name: str) -> tuple[Measured, dict[str, Any]]:
    """Run Python ``code`` in a fresh measured process; it must write a JSON object to ``sys.argv[1]``."""
    target = logs / f"{name}.result.json"
    script = logs / f"{name}.py"
    logs.mkdir(parents=True, exist_ok=True)
    script.write_text(code)
    run = measure([PYTHON, str(script), str(target), *args], cwd, logs, name)
    if run.rc != 0:
        raise BenchError(f"{name} failed (exit {run.rc}):\n{run.tail()}")
    return run, json.loads(target.read_text())


def try_python_json(code: str, args: Sequence[str], cwd: Path, logs: Path,
                    name: str) -> tuple[Measured | None, dict[str, Any] | None, str | None]:
    """:func:`python_json` that reports a failure instead of raising: (run, result, None) or (run, None, why).

    A process killed by a signal (the kernel's out-of-memory killer sends SIGKILL) is named as such.
    """
    target = logs / f"{name}.result.json"
    script = logs / f"{name}.py"
    logs.mkdir(parents=True, exist_ok=True)
    script.write_text(code)
    try:
        run = measure([PYTHON, str(script), str(target), *args], cwd, logs, name)
    except BenchError as exc:
        return None, None, str(exc)
    if run.rc < 0:
        hint = " (out of memory?)" if run.rc == -9 else ""
        return run, None, f"killed by signal {-run.rc}{hint} at peak RSS {run.peak_mib:,.0f} MiB"
    if run.rc != 0:
        return run, None, f"exit {run.rc}: {first_message(run)}"
    return run, json.loads(target.read_text()), None


def first_message(run: Measured) -> str:
    """holdfast's one-line message from a failed run (or the last line of its output)."""
    text = run.stderr.read_text(errors="replace") + "\n" + run.stdout.read_text(errors="replace")
    lines = [ln.strip() for ln in text.splitlines() if ln.strip()]
    for line in lines:
        if "; " in line and ("config key" in line or "fit jobs" in line or "holdfast" in line.lower()):
            return line
    return lines[-1] if lines else f"exit code {run.rc}, no output"


@contextmanager
def workspace(prefix: str, keep: bool) -> Iterator[Path]:
    """A temporary folder for everything a benchmark writes; removed at the end unless ``keep``."""
    root = Path(tempfile.mkdtemp(prefix=f"holdfast-bench-{prefix}-"))
    try:
        yield root
    finally:
        if keep:
            print(f"kept: {root}")
        else:
            shutil.rmtree(root, ignore_errors=True)


def alternate(reps: int, steps: Sequence[tuple[str, Callable[[int], Any]]]) -> dict[str, list[Any]]:
    """Run the steps in turn, ``reps`` times (a, b, a, b, ...); return each step's results in order."""
    out: dict[str, list[Any]] = {name: [] for name, _ in steps}
    for rep in range(reps):
        for name, step in steps:
            t0 = time.perf_counter()
            out[name].append(step(rep))
            progress(f"rep {rep + 1}/{reps} {name}: {time.perf_counter() - t0:.1f} s")
    return out


def progress(message: str) -> None:
    """A progress line on stderr (the tables go to stdout)."""
    sys.stderr.write(f"  [{time.strftime('%H:%M:%S')}] {message}\n")
    sys.stderr.flush()


def median(values: Sequence[float | None]) -> float | None:
    """Median of the values that exist; None when there are none."""
    present = [v for v in values if v is not None]
    return statistics.median(present) if present else None


def ratio(a: float | None, b: float | None) -> float | None:
    """a / b, or None."""
    return a / b if a is not None and b else None


# --------------------------------------------------------------------------- holdfast's workflow


def experiment_of(config: Path) -> str:
    """The experiment name a config names."""
    import yaml

    return str(yaml.safe_load(config.read_text())["experiment"])


def snakemake_cmd(workdir: Path, config: Path, cores: int, *extra: str) -> list[str]:
    """Plain Snakemake on this checkout's Snakefile (``--configfile`` last: it takes every following word)."""
    return [PYTHON, "-m", "snakemake", "-s", str(REPO / "Snakefile"), "-d", str(workdir), "--cores", str(cores),
            *extra, "--configfile", str(config)]


def holdfast_steps(workdir: Path, config: Path, cores: int) -> list[tuple[str, list[str]]]:
    """The commands of holdfast's whole workflow, seal to audit, as (label, argv); run in ``workdir``:
    ``holdfast run`` (seal, folds, fits, tally, refit, report), ``holdfast open --yes`` (the opening and the
    report again), ``holdfast audit``.
    """
    exp = f"results/{experiment_of(config)}"
    return [("run", [PYTHON, "-m", "holdfast", "run", str(config), "--cores", str(cores)]),
            ("open", [PYTHON, "-m", "holdfast", "open", exp, "--yes", "--cores", str(cores)]),
            ("audit", [PYTHON, "-m", "holdfast", "audit", exp])]


def workflow_label() -> str:
    """How the whole workflow is started (printed under the tables)."""
    return "holdfast run CONFIG; holdfast open results/<experiment> --yes; holdfast audit results/<experiment>"


@dataclass
class WorkflowRun:
    """One whole holdfast workflow: wall time of each command and of all of them."""

    steps: dict[str, Measured] = field(default_factory=dict)

    @property
    def wall(self) -> float:
        return sum(m.wall for m in self.steps.values())

    @property
    def start(self) -> float:
        return min(m.start for m in self.steps.values())

    @property
    def cpu(self) -> float:
        return sum(m.cpu for m in self.steps.values())

    @property
    def peak_mib(self) -> float:
        return max(m.peak_mib for m in self.steps.values())


def run_holdfast(workdir: Path, config: Path, cores: int, logs: Path) -> WorkflowRun:
    """Run holdfast's whole workflow once; raise BenchError with the log tail if a command fails."""
    out = WorkflowRun()
    for label, cmd in holdfast_steps(workdir, config, cores):
        run = measure(cmd, workdir, logs, f"holdfast-{label}")
        if run.rc != 0:
            raise BenchError(f"holdfast {label} failed in {workdir} (exit {run.rc}):\n{run.tail()}")
        out.steps[label] = run
    return out


# --------------------------------------------------------------------------- where holdfast's time went


def job_records(workdir: Path) -> list[dict[str, Any]]:
    """Snakemake's own record of each finished job: rule, start (incomplete marker) and end (output mtime).

    Read from .snakemake/metadata (Snakemake's default file persistence): one JSON file per output,
    named by the base64 of the output path. A job's start is the earliest of its outputs' incomplete
    markers, its end the latest output's modification time.
    """
    root = workdir / ".snakemake" / "metadata"
    jobs: dict[tuple[str, tuple[str, ...]], dict[str, Any]] = {}
    for path in root.rglob("*") if root.exists() else []:
        if not path.is_file():
            continue
        try:
            record = json.loads(path.read_text())
        except (json.JSONDecodeError, UnicodeDecodeError):
            continue
        if not isinstance(record, dict) or record.get("starttime") is None or record.get("endtime") is None:
            continue
        parts = [p.lstrip("@") for p in path.relative_to(root).parts]
        output = base64.urlsafe_b64decode("".join(parts)).decode(errors="replace")
        # A job's outputs share its rule and log file (every holdfast rule has one log per job).
        key = (str(record.get("rule")), tuple(record.get("log") or [output]))
        job = jobs.setdefault(key, {"rule": key[0], "start": float(record["starttime"]),
                                    "end": float(record["endtime"]), "outputs": []})
        job["start"] = min(job["start"], float(record["starttime"]))
        job["end"] = max(job["end"], float(record["endtime"]))
        job["outputs"].append(output)
    return sorted(jobs.values(), key=lambda j: j["start"])


def ledger_times(exp: Path) -> list[tuple[str, float]]:
    """(event, UTC time as epoch seconds) of every ledger line."""
    out = []
    path = exp / "ledger.jsonl"
    for line in path.read_text().splitlines() if path.exists() else []:
        entry = json.loads(line)
        stamp = dt.datetime.fromisoformat(entry["time"].replace("Z", "+00:00")).timestamp()
        out.append((entry["event"], stamp))
    return out


def fit_phase(workdir: Path, exp: Path) -> tuple[float | None, str]:
    """Wall time of the fit phase and where it came from (Snakemake's job records, else the ledger)."""
    fits = [j for j in job_records(workdir) if j["rule"] == "fit_family"]
    if fits:
        return (max(j["end"] for j in fits) - min(j["start"] for j in fits),
                "Snakemake's job records (.snakemake/metadata): first fit_family job's start to the last one's "
                "output time")
    events = ledger_times(exp)
    folds = [t for e, t in events if e == "assign_folds"]
    fit_times = [t for e, t in events if e == "fit"]
    if folds and fit_times:
        return (max(fit_times) - folds[-1],
                "the ledger: the fold assignment's event to the last fit event (includes the first job's start-up)")
    return None, "not found: no Snakemake job records and no fit events in the ledger"


def fit_seconds(exp: Path) -> float:
    """Σ fit_seconds over every fits/<family>/r<R>f<F>.parquet (holdfast's in-job fit time)."""
    import pandas as pd

    files = sorted((exp / "fits").rglob("*.parquet"))
    if not files:
        raise BenchError(f"no fit files under {exp / 'fits'}")
    return float(sum(pd.read_parquet(f, columns=["fit_seconds"])["fit_seconds"].sum() for f in files))


def curve_seconds(exp: Path) -> float:
    """Σ in-job fit seconds of the learning-curve jobs that fitted (not put back), as their ledger lines record them:
    diagnostic work holdfast does and the script does not."""
    from holdfast import ledger

    entries = ledger.events(ledger.read(exp / "ledger.jsonl"), "learning_curve")
    seconds = [e["details"].get("fit_seconds") for e in entries]
    return float(sum(s for s in seconds if isinstance(s, int | float)))


def schedule_bound(walls: Sequence[float], cores: int) -> float | None:
    """The shortest time in which ``cores`` cores can run jobs of these wall times whatever the order
    (:func:`holdfast.balance.makespan_bound`, which ``holdfast status`` uses on the in-job seconds)."""
    from holdfast.balance import makespan_bound

    return makespan_bound(walls, cores)


def fit_job_walls(workdir: Path) -> list[float]:
    """Wall seconds of each fit_family job, from Snakemake's job records."""
    return [j["end"] - j["start"] for j in job_records(workdir) if j["rule"] == "fit_family"]


def stage_times(workdir: Path, run: WorkflowRun) -> list[tuple[str, int, float]]:
    """(stage, jobs, Σ job wall seconds): the run's start-up before the first job, each rule, the tail, the rest."""
    records = job_records(workdir)
    if not records:
        return []
    first = run.steps["run"]
    inside = [j for j in records if j["start"] <= first.end]  # the jobs of the run command itself
    out = [("run: start to first job (parse, guards, DAG)", 1, records[0]["start"] - first.start)]
    by_rule: dict[str, list[float]] = {}
    for job in records:
        by_rule.setdefault(job["rule"], []).append(job["end"] - job["start"])
    out += [(f"job {rule}", len(walls), sum(walls)) for rule, walls in by_rule.items()]
    if inside:
        out.append(("run: last job's output to exit", 1, first.end - max(j["end"] for j in inside)))
    out += [(f"command {label} (with any jobs it ran)", 1, m.wall) for label, m in run.steps.items()
            if label != "run"]
    return out


# --------------------------------------------------------------------------- Snakemake's own floor

# The job graph of a holdfast run and opening (seal, round, folds, FITS fit jobs, tally, refit, CURVES learning-curve
# jobs, diagnostics, report; then the opening and the report again), each job shaped like holdfast's: a ``run:`` body
# in a thread of Snakemake (--force-use-threads) that starts a Python process, which only creates the outputs. Run with
# the same scheduler options holdfast passes, it measures what Snakemake itself costs for this graph: its start-up,
# parse and DAG, one Python process per job and its scheduling, and its exit.
FLOOR_SNAKEFILE = """\
import subprocess, sys

FITS = int(config["fits"])
CURVES = int(config["curves"])


def noop(output):
    subprocess.run([sys.executable, "-P", "noop.py", *output], check=True)

rule seal:
    output: "sealed.txt"
    run:
        noop(output)

rule record_round:
    input: "sealed.txt"
    output: "round.txt"
    run:
        noop(output)

rule assign_folds:
    input: "round.txt"
    output: "folds.txt"
    run:
        noop(output)

rule fit_family:
    input: "folds.txt"
    output: "fits/{i}.txt"
    run:
        noop(output)

rule tally:
    input: expand("fits/{i}.txt", i=range(FITS))
    output: "choice.txt"
    run:
        noop(output)

rule refit_winner:
    input: "choice.txt"
    output: "model.txt"
    run:
        noop(output)

rule learning_curve:
    input: "choice.txt"
    output: "curves/{j}.txt"
    run:
        noop(output)

rule diagnostics:
    input: "choice.txt"
    output: "diagnostics.txt"
    run:
        noop(output)

rule learning_summary:
    input: "choice.txt", expand("curves/{j}.txt", j=range(CURVES))
    output: "learning.txt"
    run:
        noop(output)

rule report:
    input: "diagnostics.txt", "model.txt", ["learning.txt"] if CURVES else []
    output: "report.txt"
    run:
        noop(output)

rule open_test:
    input: "report.txt"
    output: "verdict.txt"
    run:
        noop(output)

rule report_opened:
    input: "verdict.txt"
    output: "opened.txt"
    run:
        noop(output)
"""


def floor_shape(workdir: Path) -> dict[str, int]:
    """The counts the floor graph takes from a finished holdfast run: its fit and learning-curve jobs."""
    rules = [j["rule"] for j in job_records(workdir)]
    return {"fits": rules.count("fit_family"), "curves": rules.count("learning_curve")}


def snakemake_floor(shape: dict[str, int], cores: int, root: Path, logs: Path) -> dict[str, Measured]:
    """Snakemake alone on holdfast's job graph with empty jobs: the 'run' (to the report) and the 'open' command."""
    root.mkdir(parents=True, exist_ok=True)
    (root / "floor.smk").write_text(FLOOR_SNAKEFILE)
    (root / "noop.py").write_text('import sys\nfor path in sys.argv[1:]:\n    open(path, "w").close()\n')
    out = {}
    for label, target in (("run", "report.txt"), ("open", "opened.txt")):
        cmd = [PYTHON, "-m", "snakemake", "-s", "floor.smk", "--cores", str(cores), "--scheduler", "greedy",
               "--force-use-threads", "--config", f"fits={shape['fits']}", f"curves={shape['curves']}", "--", target]
        run = measure(cmd, root, logs, f"floor-{label}")
        if run.rc != 0:
            raise BenchError(f"Snakemake alone on the floor graph failed in {root} (exit {run.rc}):\n{run.tail()}")
        out[label] = run
    return out


FLOOR_NOTE = ("Snakemake alone: the same job graph (seal, round, folds, the run's fit and learning-curve jobs, tally, "
              "refit, diagnostics, the learning curve's summary, report; then the opening and the report again) "
              "with empty jobs shaped like holdfast's (a run: body in a thread starting a Python process), the same "
              "--cores, --scheduler greedy and --force-use-threads; what any workflow built of these Snakemake jobs "
              "pays before any work")


# --------------------------------------------------------------------------- tables


def fmt(value: Any, digits: int = 2) -> str:
    """A table cell: numbers rounded, None as '—'."""
    if value is None:
        return "—"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int):
        return f"{value:,}"
    if isinstance(value, float):
        return f"{value:,.{digits}f}"
    return str(value)


def pct(value: float | None) -> str:
    """A share as a whole percentage."""
    return "—" if value is None else f"{100 * value:.0f} %"


def table(headers: Sequence[str], rows: Sequence[Sequence[Any]], title: str | None = None,
          note_last: bool = False) -> None:
    """Print a plain fixed-width table: first column left-aligned, the others right-aligned.

    With ``note_last`` the last column is free text: left-aligned, unpadded and left out of the widths.
    """
    cells = [[fmt(c) if not isinstance(c, str) else c for c in row] for row in rows]
    sized = len(headers) - 1 if note_last else len(headers)
    widths = [max([len(str(headers[i])), *(len(r[i]) for r in cells)]) for i in range(sized)]
    if note_last:
        widths.append(len(str(headers[-1])))

    def render(row: Sequence[str]) -> str:
        parts = []
        for i, (cell, width) in enumerate(zip(row, widths, strict=True)):
            if i == 0 or (note_last and i == len(row) - 1):
                parts.append(cell if note_last and i == len(row) - 1 else cell.ljust(width))
            else:
                parts.append(cell.rjust(width))
        return "  ".join(parts).rstrip()

    if title:
        print(title)
    line = render([str(h) for h in headers])
    print(line)
    print("-" * len(line))
    for row in cells:
        print(render(row))
    print()
