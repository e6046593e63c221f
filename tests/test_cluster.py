"""holdfast on a real SLURM cluster: preflight, a run and an opening there, checked against a local run.

The fixture starts slurmctld and slurmd on this machine.

``tests/cluster/start_cluster.sh`` installs the Debian packages it lacks, writes /etc/slurm/slurm.conf
and starts munged, slurmctld and slurmd; ``stop_cluster.sh`` stops them by PID and removes the
config again (while it exists without a controller, every Snakemake call on the machine is ~10 s
slower). Both need root and apt-get: elsewhere the test is skipped, but with ``CI=true`` it fails.

The cluster's experiment spends most of its minutes waiting for the SLURM plugin's status checks, so it starts in a
background thread as soon as pytest has collected the tests (``start_in_background``, called from conftest.py), and
these tests run last: the rest of the suite runs while the cluster works.

Run it alone with ``pytest -m cluster``; leave it out with ``-m "not cluster"``.
"""

from __future__ import annotations

import fcntl
import hashlib
import json
import os
import re
import shutil
import subprocess
import sys
import tempfile
import threading
import time
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import pandas as pd
import pytest
from conftest import REPO, breast_cancer_frame, planned_jobs, small_classification_config, write_config
from holdfast.config import parse_yaml

pytestmark = [pytest.mark.cluster, pytest.mark.slow]

CLUSTER_SCRIPTS = REPO / "tests" / "cluster"
PROFILE = REPO / "workflow" / "profiles" / "slurm"
SLURM_CONF = Path("/etc/slurm/slurm.conf")
OURS = "# written by start_cluster.sh"  # first line of the configs the start script writes
LOCK = Path("/tmp/holdfast-slurm.lock")  # one cluster test per machine at a time (shared config, ports)
LOCK_WAIT = 1800  # seconds to wait for another session's cluster test
START_TIMEOUT = 600  # a fresh machine installs the packages first (~25 s measured)
RUN_TIMEOUT = 900  # one holdfast command; the longest, the first cluster run, took ~2.5 min on 2 busy cores
UNSUPPORTED = 2  # start_cluster.sh's exit status when this machine cannot run a cluster
COMPARED = ["folds.parquet", "ranking.parquet", "choice.json", "final/verdict.json"]  # byte for byte
DESIGN_FILES = [
    "sealed/manifest.json", "sealed/test.parquet", "dev.parquet", "folds.parquet", "ranking.parquet",
    "choice.json", "plots/ranking.png", "model/model.skops", "model/provenance.json", "final/verdict.json",
    "ledger.jsonl", "audit.json",
]


@dataclass(frozen=True)
class Cluster:
    base: Path  # the daemons' state, logs and pid files
    env: dict[str, str]  # environment for Snakemake and the SLURM client commands


def _cannot_run() -> str | None:
    """Why this machine cannot start a cluster, or None."""
    if not sys.platform.startswith("linux"):
        return f"a SLURM cluster needs Linux, not {sys.platform}"
    if os.geteuid() != 0:
        return "starting a SLURM cluster needs root (installs packages, writes /etc/slurm/slurm.conf)"
    for tool in ("apt-get", "dpkg-query", "timeout", "bash"):
        if shutil.which(tool) is None:
            return f"starting a SLURM cluster needs {tool} (Debian or Ubuntu)"
    return None


def _skip_or_fail(reason: str) -> None:
    if os.environ.get("CI") == "true":
        pytest.fail(f"CI=true but the SLURM cluster test cannot run here: {reason}", pytrace=False)
    pytest.skip(reason)


def _client_env(base: Path) -> dict[str, str]:
    """os.environ less SLURM_*/SBATCH_*/SRUN_* (srun and sbatch read them as options), venv first on PATH."""
    env = {k: v for k, v in os.environ.items() if not k.startswith(("SLURM_", "SBATCH_", "SRUN_"))}
    # Jobs inherit the submitting environment (sbatch --export=ALL): the interpreter running the
    # tests, with Snakemake and holdfast's dependencies, must come first on PATH inside jobs too.
    env["PATH"] = os.pathsep.join([str(Path(sys.executable).parent), "/usr/local/sbin", "/usr/sbin", "/sbin",
                                   env.get("PATH", "/usr/local/bin:/usr/bin:/bin")])
    env["PYTHONPATH"] = str(REPO / "scripts")
    env["HOLDFAST_SLURM_BASE"] = str(base)
    return env


def _script(name: str, env: dict[str, str], timeout: int) -> subprocess.CompletedProcess[str]:
    return subprocess.run(["timeout", "-k", "10", str(timeout), "bash", str(CLUSTER_SCRIPTS / name)],
                          env=env, stdin=subprocess.DEVNULL, capture_output=True, text=True, check=False)


class _Background:
    """The cluster started, and its experiment taken through, in a thread beside the rest of the suite."""

    def __init__(self) -> None:
        self.base = Path(os.environ.get("HOLDFAST_SLURM_BASE", "/tmp/holdfast-slurm"))
        self.env = _client_env(self.base)
        self.root = Path(tempfile.mkdtemp(prefix="holdfast-cluster-test-"))
        self.skip: str | None = None  # why this machine cannot run a cluster
        self.failed: BaseException | None = None  # the cluster did not start
        self.experiment: Experiment | None = None
        self.experiment_error: BaseException | None = None  # the cluster started, its experiment failed
        self.start_output = ""  # start_cluster.sh's lines, shown by the fixture (a thread's output has no test)
        self.started = False
        self.stopped = False
        self._lock_file = LOCK.open("a")
        self._thread = threading.Thread(target=self._work, name="slurm-cluster", daemon=True)
        self._done = threading.Event()  # set when _work returns, whatever happened

    def _work(self) -> None:
        try:
            self._steps()
        finally:
            self._done.set()

    def _steps(self) -> None:
        try:
            self.skip = _cannot_run()
            if self.skip is not None:
                return
            deadline = time.monotonic() + LOCK_WAIT
            while True:  # another test session on this machine may be using the cluster
                try:
                    fcntl.flock(self._lock_file, fcntl.LOCK_EX | fcntl.LOCK_NB)
                    break
                except BlockingIOError:
                    if time.monotonic() > deadline:
                        raise AssertionError(f"{LOCK} still held after {LOCK_WAIT} s by another cluster test") from None
                    time.sleep(2)
            started = _script("start_cluster.sh", self.env, START_TIMEOUT)
            self.start_output = started.stdout
            if started.returncode == UNSUPPORTED:
                self.skip = (started.stderr.strip().splitlines() or ["start_cluster.sh: unsupported"])[-1]
                return
            self.started = True  # from here on, stop_cluster.sh runs whatever happens
            assert started.returncode == 0, (
                f"start_cluster.sh exited {started.returncode}\n{started.stdout[-3000:]}\n{started.stderr[-6000:]}")
        except BaseException as exc:  # reported by the fixture, in the main thread
            self.failed = exc
            return
        try:
            self.experiment = _on_the_cluster(Cluster(self.base, self.env), self.root)
        except BaseException as exc:
            self.experiment_error = exc

    def start(self) -> None:
        self._thread.start()

    def wait(self) -> None:
        """Until the cluster's experiment ended (each holdfast command it runs has its own time limit).

        An Event, not Thread.join: a Ctrl-C that interrupts join() leaves Python 3.11 taking the thread as ended
        (is_alive() False, later joins return at once; CPython bpo-45274's handling), and stop() would then stop the
        cluster under a running holdfast command and leave that command behind.
        """
        self._done.wait()

    def stop(self) -> None:
        """Stop the cluster (once) and free the lock; a pytest clean-up, so an interrupted session stops it too."""
        if self.stopped:
            return
        self.stopped = True
        if not self._done.is_set():  # the session was interrupted while the experiment ran: end its command
            _end_running()
        self._done.wait(timeout=RUN_TIMEOUT)
        try:
            if self.started:
                stopped = _script("stop_cluster.sh", self.env, 120)
                sys.stderr.write(stopped.stdout + stopped.stderr)
        finally:
            self._lock_file.close()  # frees the lock
            if self.failed is None and self.experiment_error is None:
                shutil.rmtree(self.root, ignore_errors=True)
            else:
                sys.stderr.write(f"the cluster's work folder is kept for a look: {self.root}\n")
        left = SLURM_CONF.is_file() and SLURM_CONF.read_text().startswith(OURS)
        assert not left, f"stop_cluster.sh left {SLURM_CONF} behind: every Snakemake call would wait ~10 s"


_BACKGROUND: list[_Background] = []


def start_in_background(config: pytest.Config) -> None:
    """Start the cluster and its experiment now, in a thread (conftest.py calls this once it collected them)."""
    if not _BACKGROUND:
        background = _Background()
        _BACKGROUND.append(background)
        config.add_cleanup(background.stop)
        background.start()


@pytest.fixture(scope="module")
def slurm_cluster(request: pytest.FixtureRequest) -> Iterator[Cluster]:
    """A single-node SLURM cluster on this machine, once its background experiment ended; stopped afterwards."""
    start_in_background(request.config)  # no-op when conftest.py started it at collection
    background = _BACKGROUND[0]
    background.wait()  # the tests below compare SLURM's job lists: no experiment job may still be submitted
    sys.stderr.write(background.start_output)
    try:
        if background.skip is not None:
            _skip_or_fail(background.skip)
        if background.failed is not None:
            raise background.failed
        yield Cluster(base=background.base, env=background.env)
    finally:
        background.stop()


# The test's copy of the shipped profile: its groups and comments as shipped, settings for this cluster.
TEST_SETTINGS = {
    # "jobs" stays the shipped profile's 100: SLURM itself runs what fits on the node's 4 CPUs and starts each queued
    # job as one ends; with 4, Snakemake held the other fit jobs back until a status check saw one end.
    "latency-wait": 5,  # one machine: outputs are there at once
    # The plugin's first status check 1 s after a submission, then 10 s later each time: a step of ~15 s
    # is seen finished after ~33 s (40 s first wait, the plugin's default, makes it ~90 s).
    "slurm-init-seconds-before-status-checks": 1,
    "slurm-status-command": "squeue",  # the test cluster has no accounting database (sacct cannot answer)
}


def _test_profile(folder: Path, partition: str = "debug") -> Path:
    """A copy of workflow/profiles/slurm/config.yaml with the test cluster's settings (a user's edited copy)."""
    shipped = parse_yaml((PROFILE / "config.yaml").read_text(encoding="utf-8"), "profile")
    profile = {**shipped, **TEST_SETTINGS,
               "default-resources": {**shipped["default-resources"], "slurm_partition": partition, "runtime": 10,
                                     "mem_mb": 500}}
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "config.yaml").write_text(json.dumps(profile, indent=1), encoding="utf-8")  # JSON is YAML
    return folder


# The holdfast commands under way (each under `timeout`), so that an interrupted session can end them (see
# _Background.stop); _STOPPING refuses new ones once it began.
_RUNNING: set[subprocess.Popen[str]] = set()
_RUNNING_LOCK = threading.Lock()
_STOPPING = threading.Event()


def _end_running() -> None:
    """SIGTERM to every `timeout` under way: it passes the signal to its command's process group (holdfast, its
    Snakemake, their jobs), and sends SIGKILL 15 s later to whatever is left."""
    _STOPPING.set()
    with _RUNNING_LOCK:
        running = list(_RUNNING)
    for process in running:
        if process.poll() is None:
            process.terminate()


def _holdfast(workdir: Path, env: dict[str, str], *args: str) -> subprocess.CompletedProcess[str]:
    """The real holdfast command in ``workdir``; ``timeout -k`` ends the whole process group if it hangs, and an
    interrupted session ends it at once (:func:`_end_running`)."""
    if _STOPPING.is_set():
        raise RuntimeError("the test session is stopping: no new holdfast command")
    process = subprocess.Popen(["timeout", "-k", "15", str(RUN_TIMEOUT), sys.executable, "-m", "holdfast", *args],
                               cwd=workdir, env=env, stdin=subprocess.DEVNULL, stdout=subprocess.PIPE,
                               stderr=subprocess.PIPE, text=True)
    with _RUNNING_LOCK:
        _RUNNING.add(process)
    try:
        if _STOPPING.is_set():  # the session began to stop while this command started
            process.terminate()
        out, err = process.communicate()
    finally:
        with _RUNNING_LOCK:
            _RUNNING.discard(process)
    return subprocess.CompletedProcess(process.args, process.returncode, out, err)


def _ok(result: subprocess.CompletedProcess[str], what: str) -> str:
    output = result.stdout + result.stderr
    assert result.returncode == 0, f"{what} exited {result.returncode}:\n{output[-6000:]}"
    return output


def _problems(output: str) -> list[str]:
    return [line.strip()[len("problem: "):] for line in output.splitlines() if line.strip().startswith("problem: ")]


def _edited(config: dict) -> dict:
    """The same experiment with one family edited: the tree's depth grid (a new selection round)."""
    candidates = {**config["candidates"], "tree": {**config["candidates"]["tree"], "grid": {"max_depth": [2, 3]}}}
    return {**config, "candidates": candidates}


def _ledger(workdir: Path) -> list[dict]:
    lines = (workdir / "results" / "bc" / "ledger.jsonl").read_text(encoding="utf-8").splitlines()
    return [json.loads(line) for line in lines]


def _sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


@dataclass(frozen=True)
class Experiment:
    """One work folder taken through: run (config A), run (one family edited), open; what each step left."""

    workdir: Path
    outputs: dict[str, str]  # step -> holdfast's output
    first: dict[str, str]  # sha256 of COMPARED files (the verdict excepted) after the first run
    before_edit: int  # ledger lines before the run with the edited family
    before_open: int  # ledger lines before the opening


def _take_through(workdir: Path, env: dict[str, str], *options: str) -> Experiment:
    """Run config A, then A with the tree family edited, then open the test set; ``options`` go to each."""
    workdir.mkdir()
    breast_cancer_frame().to_csv(workdir / "data.csv", index=False)
    config = small_classification_config()
    write_config(workdir, config)
    outputs = {"first run": _ok(_holdfast(workdir, env, "run", "config.yaml", *options), "holdfast run")}
    exp = workdir / "results" / "bc"
    first = {name: _sha256(exp / name) for name in COMPARED[:-1]}
    write_config(workdir, _edited(config))
    outputs["plan"] = _ok(_holdfast(workdir, env, "run", "config.yaml", "-n", *options), "holdfast run -n")
    before_edit = len(_ledger(workdir))
    outputs["edited run"] = _ok(_holdfast(workdir, env, "run", "config.yaml", *options), "holdfast run (edited)")
    before_open = len(_ledger(workdir))
    outputs["open"] = _ok(_holdfast(workdir, env, "open", "results/bc", "--yes", *options), "holdfast open")
    return Experiment(workdir, outputs, first, before_edit, before_open)


@pytest.fixture(scope="module")
def local_experiment(tmp_path_factory: pytest.TempPathFactory) -> Experiment:
    """The reference: the same steps on this machine (pre-warmed worker, 2 cores), no cluster involved."""
    env = {k: v for k, v in os.environ.items() if not k.startswith(("SLURM_", "SBATCH_", "SRUN_"))}
    env["PYTHONPATH"] = str(REPO / "scripts")
    return _take_through(tmp_path_factory.mktemp("local") / "work", env, "--cores", "2")


def _on_the_cluster(cluster: Cluster, root: Path) -> Experiment:
    """The same steps on the cluster, with preflight first, through the test's copy of the shipped profile."""
    profile = _test_profile(root / "profile")
    workdir = root / "work"
    workdir.mkdir()
    checked = _holdfast(workdir, cluster.env, "preflight", "--profile", str(profile), "--timeout", "120")
    assert checked.returncode == 0 and not _problems(checked.stdout), checked.stdout + checked.stderr
    assert not list((workdir / "results").iterdir()), "preflight left its probe folder behind"
    shutil.rmtree(workdir)
    experiment = _take_through(workdir, cluster.env, "--profile", str(profile))
    experiment.outputs["preflight"] = checked.stdout
    return experiment


@pytest.fixture(scope="module")
def cluster_experiment(slurm_cluster: Cluster) -> Experiment:
    """What `_on_the_cluster` left, run in the background thread while the rest of the suite ran."""
    background = _BACKGROUND[0]
    if background.experiment_error is not None:
        raise background.experiment_error
    assert background.experiment is not None
    return background.experiment


def test_preflight_passes_on_the_cluster(cluster_experiment: Experiment) -> None:
    lines = cluster_experiment.outputs["preflight"].splitlines()
    assert lines[-1].startswith("holdfast: preflight: all ") and "checks passed" in lines[-1], lines
    checks = [line.strip() for line in lines[1:-1]]
    assert checks and all(line.startswith("ok: ") for line in checks), lines
    text = "\n".join(checks)
    assert "job states: the plugin asks squeue (MinJobAge 3600 s" in text, text
    assert "partition: debug (default-resources: slurm_partition; up)" in text, text
    assert re.search(r"probe job \d+ ran on node \S+ and wrote under 'results'", text), text
    assert f"in jobs {sys.executable} (the interpreter that submits them) imports holdfast (from {REPO / 'scripts'})" \
        in text, text


@pytest.mark.parametrize(("case", "expected"), [
    # A copied profile still names another cluster's partition: refused before any job is submitted.
    ("wrong partition", "partition 'gpu' (default-resources: slurm_partition) does not exist on this cluster; set "
                        "slurm_partition to one of: debug (as 'sinfo' lists them)"),
    # The shipped profile as it is, on a cluster without an accounting database: the plugin would ask sacct.
    ("shipped profile", "sacct does not answer (Slurm accounting storage is disabled), and the plugin asks it for "
                        "job states, so a run would wait for ever; add the line 'slurm-status-command: squeue' to "
                        "the profile"),
])
def test_preflight_names_a_broken_profile(slurm_cluster: Cluster, tmp_path: Path, case: str, expected: str) -> None:
    profile = _test_profile(tmp_path / "profile", "gpu") if case == "wrong partition" else PROFILE
    before = subprocess.run(["squeue", "--noheader", "--states=all", "-o", "%i"], env=slurm_cluster.env,
                            capture_output=True, text=True, timeout=30, check=True).stdout.split()
    result = _holdfast(tmp_path, slurm_cluster.env, "preflight", "--profile", str(profile), "--timeout", "120")
    assert result.returncode == 1, result.stdout + result.stderr
    assert _problems(result.stdout) == [expected], result.stdout
    assert result.stdout.splitlines()[-1].startswith("holdfast: preflight: 1 problem in "), result.stdout
    after = subprocess.run(["squeue", "--noheader", "--states=all", "-o", "%i"], env=slurm_cluster.env,
                           capture_output=True, text=True, timeout=30, check=True).stdout.split()
    probed = len(set(after) - set(before))
    # The wrong partition stops the checks before the probe job; the shipped profile's probe still runs.
    assert probed == (0 if case == "wrong partition" else 1), (before, after)


def test_cluster_run_gives_the_local_bytes(local_experiment: Experiment, cluster_experiment: Experiment) -> None:
    local, cluster = (e.workdir / "results" / "bc" for e in (local_experiment, cluster_experiment))
    assert cluster_experiment.first == local_experiment.first, "the first run's folds, ranking or choice differ"
    for name in COMPARED:
        assert _sha256(cluster / name) == _sha256(local / name), name
    # Fits: the same rows and numbers; only the measured fit time differs. Out-of-fold predictions: the same bytes.
    fits = sorted(p.relative_to(local) for p in (local / "fits").rglob("*.parquet"))
    assert len(fits) == 6 and fits == sorted(p.relative_to(cluster) for p in (cluster / "fits").rglob("*.parquet"))
    for name in fits:
        pd.testing.assert_frame_equal(pd.read_parquet(cluster / name).drop(columns="fit_seconds"),
                                      pd.read_parquet(local / name).drop(columns="fit_seconds"))
        oof = Path("oof", *name.parts[1:])
        assert _sha256(cluster / oof) == _sha256(local / oof), oof
    missing = [name for name in DESIGN_FILES if not (cluster / name).is_file()]
    assert not missing, missing
    audit = json.loads((cluster / "audit.json").read_text(encoding="utf-8"))
    assert audit["passed"] is True, audit["problems"]


@pytest.mark.parametrize("where", ["local", "cluster"])
def test_an_edit_reruns_only_its_family(local_experiment: Experiment, cluster_experiment: Experiment,
                                        where: str) -> None:
    experiment = local_experiment if where == "local" else cluster_experiment
    tree_fits = [f"fit_family[tree,0,{fold}]" for fold in range(3)]
    # Snakemake's plan for the edited config: the tree's fit jobs, and no logistic one.
    planned = planned_jobs(subprocess.CompletedProcess([], 0, experiment.outputs["plan"], ""))
    assert sorted(job for job in planned if job.startswith("fit_family")) == tree_fits, experiment.outputs["plan"]
    # What ran: fit events recorded by the edited run.
    ran = _ledger(experiment.workdir)[experiment.before_edit:experiment.before_open]
    fits = sorted(f"fit_family[{e['details']['family']},{e['details']['repeat']},{e['details']['fold']}]"
                  for e in ran if e["event"] == "fit")
    assert fits == tree_fits, [e["event"] for e in ran]


def test_cluster_jobs_ran_under_slurm(local_experiment: Experiment, cluster_experiment: Experiment,
                                      slurm_cluster: Cluster) -> None:
    by_rule = [e for e in _ledger(cluster_experiment.workdir) if e["actor"]["rule"]]
    assert {e["event"] for e in by_rule} >= {"seal", "assign_folds", "round", "fit", "tally", "refit", "open_test"}
    # Every step a rule ran records the SLURM job it ran in, and the controller knows each as completed ...
    jobs = {e["actor"].get("slurm_job") for e in by_rule}
    assert None not in jobs, [e["event"] for e in by_rule if "slurm_job" not in e["actor"]]
    shown = subprocess.run(["squeue", "--noheader", "--states=all", "-j", ",".join(sorted(jobs)), "-o", "%i|%T"],
                           env=slurm_cluster.env, capture_output=True, text=True, timeout=30, check=True).stdout
    states = dict(line.split("|") for line in shown.split())
    assert states == dict.fromkeys(jobs, "COMPLETED"), shown
    # ... the grouped steps of the first run shared a job (the profile's groups: seal and fold assignment; round
    # record, tally and refit; the learning curve's folds and its summary; the diagnostics, connected to neither in
    # the workflow, are a job of their own), and each fit job was a SLURM job of its own ...
    job_of: dict[str, str] = {}
    for entry in by_rule:
        job_of.setdefault(entry["event"], entry["actor"]["slurm_job"])
    assert job_of["seal"] == job_of["assign_folds"] and job_of["round"] == job_of["tally"] == job_of["refit"], job_of
    first_summary = next(i for i, e in enumerate(by_rule) if e["event"] == "learning_summary")
    first_run = by_rule[:first_summary + 1]
    curves = {e["actor"]["slurm_job"] for e in first_run if e["event"] in ("learning_curve", "learning_summary")}
    assert len(curves) == 1 and sum(e["event"] == "learning_curve" for e in first_run) == 3 and \
        job_of["diagnostics"] not in curves | {job_of["refit"], job_of["seal"]}, \
        [(e["event"], e["actor"]["slurm_job"]) for e in by_rule]
    fit_jobs = [e["actor"]["slurm_job"] for e in by_rule if e["event"] == "fit"]
    assert len(fit_jobs) == 6 + 3 and len(set(fit_jobs)) == len(fit_jobs), fit_jobs
    # ... while the local run's steps ran on this machine, outside any SLURM job.
    assert all("slurm_job" not in e["actor"] for e in _ledger(local_experiment.workdir)), "a local step ran in SLURM"
