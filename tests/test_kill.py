"""SIGKILL in the middle of each stage, then a user's recovery, gives byte for byte the outputs of a clean run.

Each test runs the real Snakemake on the breast cancer experiment in its own process group, watches
Snakemake's job markers (``.snakemake/incomplete/``), the stage's log and the ledger until the stage's
job is running, kills the whole group with SIGKILL, and then recovers the way a user has to:

1. ``snakemake --unlock``: a SIGKILL leaves ``.snakemake/locks/`` behind, and every later run is refused
   with ``LockException`` until they are removed;
2. ``snakemake --rerun-incomplete``. Without the flag, the missing outputs alone make Snakemake re-run an
   interrupted job; but a job killed after it had written all its declared outputs and before Snakemake
   recorded it as finished (as happens to a fit job running beside the one being watched) makes a plain
   rerun stop with ``IncompleteFilesException``. A user cannot tell beforehand, so the test always passes it.

A ledger append is a single write(2) of one line, which a SIGKILL can cut only between memory pages, so
a torn last line is rare; should a kill cut one, the test accepts it only if the audit names the torn
last line. ``test_torn_append_is_named_with_its_line`` pins that message with tests/test_audit.py's
torn-line mutation.

A SIGTERM sent to the holdfast command alone (as ``kill``, ``timeout`` and batch systems send it) must stop its
Snakemake and its job worker too, and leave nothing that keeps a plain rerun from finishing.
"""

from __future__ import annotations

import base64
import contextlib
import json
import os
import shutil
import signal
import subprocess
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pytest
from conftest import (
    _WORKER,
    REPO,
    breast_cancer_frame,
    open_experiment,
    run_workflow,
    small_classification_config,
    write_config,
)
from test_audit import tear_half_line

pytestmark = pytest.mark.slow

EXP = Path("results/bc")
FAMILIES = ("logistic", "tree")
FOLDS = (0, 1, 2)
# Outputs whose bytes do not depend on the run: no timestamps, no object ids (model.skops and its card
# carry the model's hash, the manifest the first ledger line's hash, which holds the seal's time).
COMPARED = ("sealed/test.parquet", "dev.parquet", "folds.parquet", "folds_summary.parquet", "leakage.json",
            "rounds/1.json", "ranking.parquet", "choice.json", "plots/ranking.png", "final/verdict.json",
            "final/openings/1.json")  # history/index.json holds the fits' hashes, and fits hold their timings
POLL = 0.05  # seconds between looks at the experiment while waiting for a stage
WAIT = 600  # seconds a run may take before the test gives up
HANG_GRACE = 5  # seconds a run may live on after one of its jobs died inside Snakemake's worker thread


class RecoveryError(AssertionError):
    """The recovery after the kill did not finish the experiment (the defect a kill test exists to find)."""


@dataclass(frozen=True)
class Job:
    """One Snakemake job of a stage: its declared outputs, its log and the ledger event it appends."""

    rule: str
    outputs: tuple[str, ...]
    log: str
    event: str | None
    match: tuple[tuple[str, Any], ...] = ()

    def recorded(self, entries: list[dict[str, Any]]) -> bool:
        """Whether the ledger holds this job's event."""
        return self.event is not None and any(
            e.get("event") == self.event and all(e["details"].get(k) == v for k, v in self.match) for e in entries)


def fit_job(family: str, fold: int) -> Job:
    """The fit job of one family on one fold (repeat 0)."""
    return Job("fit_family", (f"fits/{family}/r0f{fold}.parquet", f"oof/{family}/r0f{fold}.parquet"),
               f"logs/fit_family/{family}/r0f{fold}.log", "fit",
               (("family", family), ("repeat", 0), ("fold", fold)))


JOBS: dict[str, list[Job]] = {
    "seal": [Job("seal", ("dev.parquet", "sealed/manifest.json"), "logs/seal.log", "seal")],
    "assign_folds": [Job("assign_folds", ("folds.parquet", "folds_summary.parquet", "leakage.json"),
                         "logs/assign_folds.log", "assign_folds")],
    "fit_family": [fit_job(family, fold) for fold in FOLDS for family in FAMILIES],
    "record_round": [Job("record_round", ("rounds/current.json",), "logs/record_round.log", "round")],
    "tally": [Job("tally", ("ranking.parquet", "choice.json", "plots/ranking.png"), "logs/tally.log", "tally")],
    "refit_winner": [Job("refit_winner", ("model/model.skops", "model/provenance.json"), "logs/refit_winner.log",
                         "refit")],
}
# The opening is not part of a run; a killed opening counts as an opening (tests/test_loop.py kills one).
STAGES = tuple(JOBS)
# Targets that finish a stage: running them leaves the experiment just before the next stage.
DONE = {
    "seal": ["sealed/manifest.json"],
    "assign_folds": ["folds.parquet"],
    "fit_family": [out for job in JOBS["fit_family"] for out in job.outputs],
    "record_round": ["rounds/current.json"],
    "tally": ["choice.json"],
    "refit_winner": ["model/provenance.json"],
}


# --- looking at a running experiment -------------------------------------------------------------------------------

def incomplete(work: Path) -> set[str]:
    """Outputs Snakemake has marked as being written by a job that has not finished (its own metadata)."""
    folder = work / ".snakemake" / "incomplete"
    if not folder.is_dir():
        return set()
    marked = set()
    for marker in folder.iterdir():
        if marker.is_file() and not marker.name.startswith("@"):
            try:
                marked.add(base64.urlsafe_b64decode(marker.name).decode())
            except ValueError:
                continue
    return marked


def ledger_bytes(work: Path) -> bytes:
    """The experiment's ledger as it is on disk now (empty before the seal)."""
    path = work / EXP / "ledger.jsonl"
    return path.read_bytes() if path.exists() else b""


def whole_entries(data: bytes) -> list[dict[str, Any]]:
    """The ledger's complete lines (a torn last line is left out)."""
    lines = data.split(b"\n")[:-1]  # the part after the last newline is empty or torn
    return [json.loads(line) for line in lines]


def running_job(work: Path, stage: str) -> Job | None:
    """A job of ``stage`` whose body runs now: marked incomplete, its log opened, its ledger event not yet written."""
    marked = incomplete(work)
    entries = whole_entries(ledger_bytes(work))
    if stage == "fit_family" and not any(e["event"] == "fit" for e in entries):
        return None  # the map stage is killed in its middle: some fits recorded, another one running
    for job in JOBS[stage]:
        if (any(str(EXP / out) in marked for out in job.outputs) and (work / EXP / job.log).exists()
                and not job.recorded(entries)):
            return job
    return None


def hung_job(work: Path) -> Path | None:
    """The log of a job that failed inside Snakemake's worker thread, which leaves the whole run waiting forever."""
    logs = work / EXP / "logs"
    for log in sorted(logs.rglob("*.log")) if logs.is_dir() else []:
        if "Exception in worker" in log.read_text(errors="replace"):
            return log
    return None


# --- running Snakemake -------------------------------------------------------------------------------------------

def start(work: Path, out: Path, *args: str, warm: bool = False) -> subprocess.Popen[bytes]:
    """Start the real Snakemake on ``work`` as the leader of its own process group, output to ``out``.

    Cold jobs (each its own Python with its imports) unless ``warm``: then the session's pre-warmed worker forks
    them, as under ``holdfast run``. The killed runs stay cold, so the cold path is killed too; recoveries are warm.
    """
    cmd = [sys.executable, "-m", "snakemake", "-s", str(REPO / "Snakefile"), "-d", str(work), "--cores", "2",
           *args, "--configfile", str(work / "config.yaml")]
    env = {**os.environ, "PYTHONPATH": str(REPO / "scripts"), **(_WORKER if warm else {})}
    with open(out, "wb") as sink:
        return subprocess.Popen(cmd, stdout=sink, stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL, env=env,
                                start_new_session=True)


def kill_group(proc: subprocess.Popen[bytes]) -> int:
    """SIGKILL Snakemake and every job it spawned at once; wait until none of them is left."""
    os.killpg(proc.pid, signal.SIGKILL)
    code = proc.wait(timeout=30)
    deadline = time.monotonic() + 30
    while time.monotonic() < deadline:
        try:
            os.killpg(proc.pid, 0)
        except ProcessLookupError:
            return code
        time.sleep(POLL)
    raise AssertionError(f"process group {proc.pid} still has members 30 s after SIGKILL")


def tail(out: Path) -> str:
    """The end of a run's output, for failure messages."""
    return out.read_text(errors="replace")[-3000:] if out.exists() else ""


def wait_until(proc: subprocess.Popen[bytes], work: Path, out: Path, seen: Callable[[], Any],
               interval: float = POLL) -> Any:
    """Poll ``seen()`` until it returns something; fail if the run ends, hangs or times out first."""
    deadline, last_look = time.monotonic() + WAIT, 0.0
    while time.monotonic() < deadline:
        found = seen()
        if found:
            return found
        if proc.poll() is not None:
            raise AssertionError(f"the run ended (exit {proc.returncode}) before the awaited moment:\n{tail(out)}")
        if time.monotonic() - last_look >= POLL:  # the logs are read less often than a fast poll looks
            last_look = time.monotonic()
            if (log := hung_job(work)) is not None:
                kill_group(proc)
                raise AssertionError(f"a job failed and the run hung instead of stopping; see {log}:\n"
                                     f"{log.read_text(errors='replace')[-2000:]}")
        time.sleep(interval)
    kill_group(proc)
    raise AssertionError(f"the awaited moment did not come within {WAIT} s:\n{tail(out)}")


def run_to_end(work: Path, out: Path, *args: str) -> None:
    """Run Snakemake to its end; raise RecoveryError if it fails, hangs on a failed job or times out."""
    proc = start(work, out, *args, warm=True)
    deadline, hung_since = time.monotonic() + WAIT, None
    while proc.poll() is None:
        if hung_since is None and hung_job(work) is not None:
            hung_since = time.monotonic()
        if hung_since is not None and time.monotonic() - hung_since > HANG_GRACE:
            kill_group(proc)
            log = hung_job(work)
            raise RecoveryError(f"a job failed and the run hung instead of stopping; see {log}:\n"
                                f"{log.read_text(errors='replace')[-2000:] if log else ''}")
        if time.monotonic() > deadline:
            kill_group(proc)
            raise RecoveryError(f"the run did not end within {WAIT} s:\n{tail(out)}")
        time.sleep(0.2)
    if proc.returncode != 0:
        raise RecoveryError(f"the run failed (exit {proc.returncode}):\n{tail(out)}")


# --- fixtures ----------------------------------------------------------------------------------------------------

def fresh_experiment(work: Path) -> Path:
    """A work folder with the data and config of conftest's breast cancer experiment, nothing run."""
    work.mkdir(parents=True)
    breast_cancer_frame().to_csv(work / "data.csv", index=False)
    write_config(work, small_classification_config())
    return work


@pytest.fixture(scope="module")
def before_stage(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """Copies of one experiment taken just before each stage, built stage by stage with real runs.

    Starting a kill test there instead of from nothing saves running the earlier stages once per test;
    the work folder then holds what an earlier, finished Snakemake run left, Snakemake's metadata included.
    """
    root = tmp_path_factory.mktemp("before_stage")
    work = fresh_experiment(root / "work")
    copies: dict[str, Path] = {}
    for stage in STAGES:
        copies[stage] = root / stage
        shutil.copytree(work, copies[stage], symlinks=True)
        if stage in DONE:
            result = run_workflow(work, *[str(EXP / target) for target in DONE[stage]])
            assert result.returncode == 0, result.stderr[-3000:]
    return copies


# --- the kill test -----------------------------------------------------------------------------------------------

def kill_during(work: Path, stage: str, logs: Path, seen: Callable[[], Any] | None = None,
                interval: float = POLL) -> tuple[Job | None, bytes]:
    """Start the whole workflow, SIGKILL its process group while ``stage`` runs; return the job seen and the ledger."""
    proc = start(work, logs / "killed.out")
    job = wait_until(proc, work, logs / "killed.out", seen or (lambda: running_job(work, stage)), interval)
    code = kill_group(proc)
    assert code == -signal.SIGKILL, f"snakemake ended with {code}, not by the SIGKILL:\n{tail(logs / 'killed.out')}"
    return (job if isinstance(job, Job) else None), ledger_bytes(work)


def assert_torn_append_named(work: Path, data: bytes) -> None:
    """A kill that cut a ledger append: the audit must fail naming the torn last line and nothing else."""
    from holdfast.audit import audit

    last = data.count(b"\n") + 1
    result = audit(str(work / EXP))
    assert result["passed"] is False
    torn = [p for p in result["problems"] if p["code"] == "torn-append"]
    assert torn and f"ledger line {last}," in torn[0]["message"], result["problems"]
    assert "unreadable-line" not in [p["code"] for p in result["problems"]], result["problems"]


def recover(work: Path, logs: Path) -> None:
    """What a user has to do after a SIGKILL: remove Snakemake's stale lock, then rerun the incomplete jobs."""
    locks = work / ".snakemake" / "locks"
    assert locks.is_dir() and any(locks.iterdir()), "a SIGKILL leaves Snakemake's lock files behind"
    unlocked = run_workflow(work, "--unlock", timeout=WAIT)
    assert unlocked.returncode == 0, unlocked.stderr[-3000:]
    assert not locks.exists() or not any(locks.iterdir()), "--unlock must remove the stale lock"
    run_to_end(work, logs / "rerun.out", "--rerun-incomplete")


def assert_same_as_clean_run(work: Path, clean: Path) -> None:
    """After the deliberate opening, every run-independent output equals the clean run's byte for byte, and the
    audit passes."""
    opened = open_experiment(work, "bc")
    assert opened.returncode == 0, opened.stdout[-3000:] + opened.stderr[-3000:]
    for name in COMPARED:
        ours, theirs = work / EXP / name, clean / EXP / name
        assert ours.read_bytes() == theirs.read_bytes(), f"{name} differs from the clean run after the kill"
    cli = subprocess.run([sys.executable, "-m", "holdfast", "audit", str(work / EXP)], capture_output=True,
                         text=True, env={**os.environ, "PYTHONPATH": str(REPO / "scripts")}, timeout=300)
    assert cli.returncode == 0, cli.stdout + cli.stderr
    assert cli.stdout.startswith("PASS") and "test set opened 1 time(s)" in cli.stdout, cli.stdout
    assert json.loads((work / EXP / "audit.json").read_text())["passed"] is True


# The seal's kill test is test_kill_after_the_sealed_file_is_written_then_rerun_matches_clean_run below: it kills
# the seal at its hardest moment (the sealed file written, the manifest not), which a kill at the first sign of
# the seal job would rarely hit; a second full rerun from an earlier moment would add a minute and little else.
@pytest.mark.parametrize("stage", [s for s in STAGES if s != "seal"])
def test_kill_during_stage_then_rerun_matches_clean_run(stage: str, before_stage: dict[str, Path],
                                                        bc_finished: Path, tmp_path: Path) -> None:
    """Kill while one stage's job runs; after unlock and rerun the outputs and the audit are a clean run's."""
    work = tmp_path / "work"
    for attempt in range(3):  # a short job (record_round: milliseconds of body) may end between two looks
        shutil.rmtree(work, ignore_errors=True)
        shutil.copytree(before_stage[stage], work, symlinks=True)
        try:
            job, data = kill_during(work, stage, tmp_path, interval=0.005)
            break
        except AssertionError as exc:
            if "before the awaited moment" not in str(exc) or attempt == 2:
                raise
    # Just before the kill the job's body ran and its ledger event was not written (running_job); after
    # it, Snakemake has still not recorded the job as finished, and nothing after the stage ran.
    assert job is not None and job.rule == stage
    assert {str(EXP / out) for out in job.outputs} & incomplete(work), "the job had finished before the kill"
    assert not (work / EXP / "final/verdict.json").exists()
    assert not any(e["event"] in ("open_test", "opening_started") for e in whole_entries(data))
    if data and not data.endswith(b"\n"):
        assert_torn_append_named(work, data)
        return
    recover(work, tmp_path)
    assert_same_as_clean_run(work, bc_finished)


def test_kill_after_the_sealed_file_is_written_then_rerun_matches_clean_run(bc_finished: Path,
                                                                          tmp_path: Path) -> None:
    """Kill the seal between writing the sealed file and writing its manifest; the rerun must still finish."""
    work = fresh_experiment(tmp_path / "work")
    sealed, manifest = work / EXP / "sealed/test.parquet", work / EXP / "sealed/manifest.json"
    kill_during(work, "seal", tmp_path, seen=lambda: sealed.exists() and not manifest.exists(),
                interval=0.001)
    assert sealed.exists() and {str(EXP / "sealed/manifest.json")} & incomplete(work), "the seal had finished"
    recover(work, tmp_path)
    assert_same_as_clean_run(work, bc_finished)


def test_torn_append_is_named_with_its_line(bc_copy: Path) -> None:
    """A half-written last ledger line (test_audit's mutation) is reported as a torn append naming that line."""
    tear_half_line(bc_copy / EXP)
    assert_torn_append_named(bc_copy, ledger_bytes(bc_copy))


def test_sigterm_to_holdfast_run_stops_snakemake_and_the_worker_and_a_rerun_finishes(tmp_path: Path) -> None:
    # `kill PID`, `timeout` and batch systems send SIGTERM to the holdfast process alone, not to its group. Holdfast
    # passes it to its Snakemake (which stops its jobs, as on Ctrl-C) and stops its job worker; before the fix,
    # holdfast died alone and Snakemake went on running the experiment with nobody watching.
    work = tmp_path / "work"
    work.mkdir()
    breast_cancer_frame().to_csv(work / "data.csv", index=False)
    write_config(work, small_classification_config())
    out = tmp_path / "holdfast.out"
    env = {**os.environ, "PYTHONPATH": str(REPO / "scripts")}
    with open(out, "wb") as sink:
        proc = subprocess.Popen([sys.executable, "-m", "holdfast", "run", "config.yaml", "--cores", "2"], cwd=work,
                                stdout=sink, stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL, env=env,
                                start_new_session=True)
    try:
        wait_until(proc, work, out, lambda: (work / EXP / "fits").is_dir())  # fit jobs are running
        proc.send_signal(signal.SIGTERM)  # to holdfast only
        code = proc.wait(timeout=120)
        assert code == 128 + signal.SIGTERM, tail(out)
        assert "holdfast: terminated (SIGTERM); Snakemake was asked to stop its jobs first" in tail(out), tail(out)
        deadline = time.monotonic() + 30  # Snakemake and the worker end within moments of holdfast
        while time.monotonic() < deadline:
            try:
                os.killpg(proc.pid, 0)
            except ProcessLookupError:
                break
            time.sleep(POLL)
        else:
            left = subprocess.run(["ps", "-o", "pid,args", "-g", str(proc.pid)], capture_output=True, text=True)
            raise AssertionError(f"holdfast ended, but these processes of its run went on:\n{left.stdout}")
    finally:
        with contextlib.suppress(ProcessLookupError):  # whatever the outcome, nothing of the run outlives the test
            os.killpg(proc.pid, signal.SIGKILL)
    # Snakemake stopped cleanly (no lock left), so the user's plain rerun finishes the experiment.
    again = subprocess.run([sys.executable, "-m", "holdfast", "run", "config.yaml", "--cores", "2"], cwd=work,
                           capture_output=True, text=True, stdin=subprocess.DEVNULL, env=env, timeout=WAIT)
    assert again.returncode == 0, again.stdout[-3000:] + again.stderr[-3000:]
    assert (work / EXP / "choice.json").is_file()
