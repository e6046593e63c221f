"""Benchmark (not a test): where the CPU seconds of holdfast's whole workflow go, process by process.

bench/head_to_head.py and bench/fixed_cost.py measure each side's CPU seconds in total
(getrusage of every process waited for). This one runs a scenario's whole workflow (run, open,
audit) and then the GridSearchCV script while a sampler thread reads /proc every 20 ms, and sums
the CPU seconds (user + system) of every process the benchmark started, by what the process is:
the holdfast command, Snakemake's main process, the small job processes, the job worker's own
process (its imports), and each child the worker forked, by the rule of the job it ran (matched to
Snakemake's job records by start time) or as the command's own calls (the full check before a
seal, the audits). The script's side: its main process and joblib's worker processes.

Sampling misses what a process used after its last sample (up to 20 ms each) and processes that
lived less than one interval, so the table shows the sampled total beside getrusage's total. The
sampler itself takes a little CPU beside the measured work: compare seconds with head_to_head's
tables, not with these.

Run:  PYTHONPATH=scripts python bench/cpu_split.py [--reps 3] [--only demo|fixed]
      PYTHONPATH=scripts python bench/cpu_split.py --quick      (checks that it works)
"""

from __future__ import annotations

import json
import os
import sys
import threading
import time
from pathlib import Path
from typing import Any

import _common as c
from fixed_cost import one_candidate
from head_to_head import BASELINE, baseline_plan, demo

INTERVAL = 0.02  # seconds between two readings of /proc
TICK = os.sysconf("SC_CLK_TCK")
WRAPPED = c.WRAPPER.splitlines()[0]  # how the measuring wrapper's command line begins
SCRIPT_KINDS = ("script: main process", "script: joblib's worker processes", "script: other processes")


def _boot_time() -> float:
    """The boot time in epoch seconds, to 10 ms (/proc/stat's btime is whole seconds: too coarse to tell which
    job a process belongs to)."""
    with open("/proc/uptime") as handle:
        uptime = float(handle.read().split()[0])
    return time.time() - uptime


class Sampler:
    """Reads /proc every :data:`INTERVAL` seconds; keeps, per process descended from this one, its command line,
    parent, start time (epoch seconds) and the latest CPU seconds seen."""

    def __init__(self) -> None:
        self.root, self.boot = os.getpid(), _boot_time()
        self.seen: dict[tuple[int, int], dict[str, Any]] = {}
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._loop, daemon=True)

    def __enter__(self) -> Sampler:
        self._thread.start()
        return self

    def __exit__(self, *_: Any) -> None:
        self._stop.set()
        self._thread.join()

    def _loop(self) -> None:
        while not self._stop.is_set():
            self._sample()
            time.sleep(INTERVAL)

    def _sample(self) -> None:
        stats: dict[int, tuple[int, int, float]] = {}
        for name in os.listdir("/proc"):
            if not name.isdigit():
                continue
            try:
                with open(f"/proc/{name}/stat") as handle:
                    rest = handle.read().rsplit(")", 1)[1].split()
            except OSError:
                continue
            stats[int(name)] = (int(rest[1]), int(rest[19]), (int(rest[11]) + int(rest[12])) / TICK)
        for pid, (ppid, start, cpu) in stats.items():
            if pid == self.root or not self._descends(pid, stats):
                continue
            entry = self.seen.get((pid, start))
            if entry is None:
                try:
                    with open(f"/proc/{pid}/cmdline", "rb") as handle:
                        cmdline = handle.read().replace(b"\0", b" ").decode(errors="replace")
                except OSError:
                    continue
                entry = self.seen[(pid, start)] = {"pid": pid, "ppid": ppid, "cmd": cmdline,
                                                   "start": self.boot + start / TICK, "cpu": 0.0}
            entry["cpu"] = max(entry["cpu"], cpu)

    def _descends(self, pid: int, stats: dict[int, tuple[int, int, float]]) -> bool:
        for _ in range(64):
            parent = stats.get(pid, (0, 0, 0.0))[0]
            if parent == self.root:
                return True
            if parent <= 1:
                return False
            pid = parent
        return False


def holdfast_kinds(seen: list[dict[str, Any]], records: list[dict[str, Any]]) -> dict[str, list[float]]:
    """CPU seconds of holdfast's processes by kind; a worker child takes the rule of the job whose job process
    started just before it (that process hands the job over), else it is one of the command's own calls."""
    workers = {p["pid"] for p in seen if "holdfast.worker" in p["cmd"]}
    job_procs = sorted((p for p in seen if "holdfast/job.py" in p["cmd"]), key=lambda p: p["start"])
    for proc in job_procs:  # the job process starts shortly after Snakemake records its job's start
        earlier = [r for r in records if r["start"] - 0.1 <= proc["start"] and not r.get("taken")]
        if earlier:
            record = max(earlier, key=lambda r: r["start"])
            record["taken"] = True
            proc["rule"] = record["rule"]
    kinds: dict[str, list[float]] = {}
    for proc in seen:
        cmd = proc["cmd"]
        if WRAPPED in cmd:
            continue  # the benchmark's measuring wrapper (its command line holds the measured one)
        if "holdfast.worker" in cmd and proc["ppid"] in workers:
            handing = [j for j in job_procs if j["start"] <= proc["start"] + 0.02 and not j.get("child")
                       and proc["start"] - j["start"] < 2.0]
            if handing:
                job = max(handing, key=lambda j: j["start"])
                job["child"] = True
                kind = f"worker child: job {job.get('rule', '(rule not recorded)')}"
            else:
                kind = "worker child: the command's calls (check, audits)"
        elif "holdfast.worker" in cmd:
            kind = "job worker's own process (imports, forks)"
        elif "holdfast.snakemake_ready" in cmd or " -m snakemake" in cmd:
            kind = "Snakemake's main process"
        elif "holdfast/job.py" in cmd:
            kind = "job processes (start, hand over, wait)"
        elif "bin/holdfast" in cmd or "-m holdfast " in cmd:
            kind = "holdfast command itself"
        else:
            kind = "other processes (tools they start)"
        kinds.setdefault(kind, []).append(proc["cpu"])
    return kinds


def script_kinds(seen: list[dict[str, Any]]) -> dict[str, list[float]]:
    """CPU seconds of the script's processes: its main process, joblib's workers, anything else."""
    kinds: dict[str, list[float]] = {}
    for proc in seen:
        if WRAPPED in proc["cmd"]:
            continue
        kind = (SCRIPT_KINDS[0] if BASELINE.name in proc["cmd"] else
                SCRIPT_KINDS[1] if "loky" in proc["cmd"] else SCRIPT_KINDS[2])
        kinds.setdefault(kind, []).append(proc["cpu"])
    return kinds


def one_rep(scenario: Any, cores: int, root: Path) -> dict[str, Any]:
    """The scenario's whole workflow, then the script, each under the sampler."""
    workdir, logs = root / "work", root / "logs"
    scenario.make(workdir)
    config = workdir / "config.yaml"
    exp = workdir / "results" / c.experiment_of(config)
    records: list[dict[str, Any]] = []
    run = c.WorkflowRun()
    with Sampler() as sampler:
        for label, cmd in c.holdfast_steps(workdir, config, cores):
            done = {(r["rule"], r["start"]) for r in records}
            run.steps[label] = measured = c.measure(cmd, workdir, logs, f"holdfast-{label}")
            if measured.rc != 0:
                raise c.BenchError(f"holdfast {label} failed in {workdir} (exit {measured.rc}):\n{measured.tail()}")
            # Read after each command: the opening's report replaces the run's report in Snakemake's records.
            records += [r for r in c.job_records(workdir) if (r["rule"], r["start"]) not in done]
    seen = list(sampler.seen.values())
    (logs / "cpu-split-processes.json").write_text(json.dumps({"processes": seen, "jobs": records}, indent=1))
    ours = holdfast_kinds(seen, records)
    plan_path, out_path = logs / "baseline-plan.json", logs / "baseline-result.json"
    plan_path.write_text(json.dumps(baseline_plan(workdir, exp)))
    with Sampler() as sampler:
        script = c.measure([c.PYTHON, BASELINE, exp, plan_path, out_path, cores], workdir, logs, "baseline")
    if script.rc != 0:
        raise c.BenchError(f"the baseline script failed (exit {script.rc}):\n{script.tail()}")
    return {"holdfast": ours, "holdfast_total": run.cpu, "holdfast_wall": run.wall,
            "script": script_kinds(list(sampler.seen.values())), "script_total": script.cpu,
            "script_wall": script.wall}


def report(label: str, reps: list[dict[str, Any]]) -> None:
    """One table per side: CPU seconds by kind of process (medians over reps), with the coverage line."""
    print(label)
    for side in ("holdfast", "script"):
        kinds = sorted({k for rep in reps for k in rep[side]})
        rows = []
        for kind in kinds:
            counts = [len(rep[side].get(kind, [])) for rep in reps]
            seconds = [sum(rep[side].get(kind, [])) for rep in reps]
            rows.append([kind, c.median(counts), c.median(seconds)])
        rows.sort(key=lambda r: -(r[2] or 0.0))
        sampled = c.median([sum(sum(v) for v in rep[side].values()) for rep in reps])
        total = c.median([rep[f"{side}_total"] for rep in reps])
        wall = c.median([rep[f"{side}_wall"] for rep in reps])
        for row in rows:
            row.append(c.pct(c.ratio(row[2], sampled)))
        rows.append(["sampled, every process", "", sampled, ""])
        rows.append(["getrusage, every process waited for", "", total, c.pct(c.ratio(sampled, total))])
        rows.append([f"wall (s); CPU / wall on {reps[0]['cores']} cores", "", wall,
                     c.pct(c.ratio(total / reps[0]["cores"] if total else None, wall))])
        c.table([f"{side}: CPU seconds by process (medians)", "processes", "CPU (s)", "share"], rows)
    print("  share: of the sampled total; getrusage's share column: how much of its total the sampler saw; the last "
          "line: CPU / cores / wall, the whole workflow's use of the cores")
    print("  worker child: a process the job worker forked for one job (its rule from Snakemake's records, matched by "
          "the job process that handed it over) or for a call of the holdfast command (full check, audits)")
    print(f"  holdfast commands: {c.workflow_label()}; script: bench/gridsearch_baseline.py")
    print()


def main(argv: list[str] | None = None) -> int:
    """Parse options, run the scenarios, print the tables."""
    p = c.parser(__doc__)
    p.add_argument("--only", choices=("demo", "fixed"), help="run one scenario")
    args = p.parse_args(argv)
    reps = c.reps_of(args)
    c.header("holdfast CPU split: where each side's CPU seconds go, by process", args, reps)
    scenarios = [s for s in (demo(args.quick), one_candidate(300 if args.quick else 1_000))
                 if args.only in (None, s.name)]
    with c.workspace("cpu-split", args.keep) as root:
        for scenario in scenarios:
            results = []
            for rep in range(reps):
                c.progress(f"{scenario.name} rep {rep + 1}")
                results.append({**one_rep(scenario, args.cores, root / scenario.name / f"rep{rep}"),
                                "cores": args.cores})
            report(scenario.label, results)
    c.footer()
    return 0


if __name__ == "__main__":
    sys.exit(main())
