"""The workflow on a real SLURM cluster: the fixture starts slurmctld and slurmd on this machine.

``tests/cluster/start_cluster.sh`` installs the Debian packages it lacks, writes /etc/slurm/slurm.conf
and starts munged, slurmctld and slurmd; ``stop_cluster.sh`` stops them by PID and removes the
config again (while it exists without a controller, every Snakemake call on the machine is ~10 s
slower). Both need root and apt-get: elsewhere the test is skipped, but with ``CI=true`` it fails.

Run it alone with ``pytest -m cluster``; leave it out with ``-m "not cluster"``.
"""

from __future__ import annotations

import fcntl
import os
import re
import shutil
import subprocess
import sys
import time
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import pytest
from conftest import REPO, breast_cancer_frame, small_classification_config, write_config

pytestmark = [pytest.mark.cluster, pytest.mark.slow]

CLUSTER_SCRIPTS = REPO / "tests" / "cluster"
PROFILE = REPO / "workflow" / "profiles" / "slurm"
SLURM_CONF = Path("/etc/slurm/slurm.conf")
OURS = "# written by start_cluster.sh"  # first line of the configs the start script writes
LOCK = Path("/tmp/holdfast-slurm.lock")  # one cluster test per machine at a time (shared config, ports)
LOCK_WAIT = 1800  # seconds to wait for another session's cluster test
START_TIMEOUT = 600  # a fresh machine installs the packages first (~25 s measured)
RUN_TIMEOUT = 900  # ~2.5 min measured on 2 cores
UNSUPPORTED = 2  # start_cluster.sh's exit status when this machine cannot run a cluster
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


@pytest.fixture(scope="module")
def slurm_cluster() -> Iterator[Cluster]:
    """A single-node SLURM cluster on this machine for the module's tests; always stopped afterwards."""
    reason = _cannot_run()
    if reason is not None:
        _skip_or_fail(reason)
    base = Path(os.environ.get("HOLDFAST_SLURM_BASE", "/tmp/holdfast-slurm"))
    env = _client_env(base)
    with LOCK.open("a") as lock:
        deadline = time.monotonic() + LOCK_WAIT
        while True:  # another test session on this machine may be using the cluster
            try:
                fcntl.flock(lock, fcntl.LOCK_EX | fcntl.LOCK_NB)
                break
            except BlockingIOError:
                if time.monotonic() > deadline:
                    pytest.fail(f"{LOCK} still held after {LOCK_WAIT} s by another cluster test", pytrace=False)
                time.sleep(2)
        try:
            started = _script("start_cluster.sh", env, START_TIMEOUT)
            sys.stderr.write(started.stdout)
            if started.returncode == UNSUPPORTED:
                _skip_or_fail((started.stderr.strip().splitlines() or ["start_cluster.sh: unsupported"])[-1])
            assert started.returncode == 0, (
                f"start_cluster.sh exited {started.returncode}\n{started.stdout[-3000:]}\n{started.stderr[-6000:]}")
            yield Cluster(base=base, env=env)
        finally:
            stopped = _script("stop_cluster.sh", env, 120)
            sys.stderr.write(stopped.stdout + stopped.stderr)
            left = SLURM_CONF.is_file() and SLURM_CONF.read_text().startswith(OURS)
            assert not left, f"stop_cluster.sh left {SLURM_CONF} behind: every Snakemake call would wait ~10 s"


def _submitted(output: str) -> dict[str, tuple[str, Path]]:
    """The plugin's 'submitted with SLURM jobid' lines: 'rule_<name>/<wildcards>' -> (job id, SLURM log)."""
    found = {}
    for jobid, log in re.findall(r"submitted with SLURM jobid (\d+) \(log: (\S+?)\)", output):
        path = Path(log)
        found["/".join(path.parts[path.parts.index("slurm_logs") + 1:-1])] = (jobid, path)
    return found


def test_workflow_runs_on_slurm(slurm_cluster: Cluster, tmp_path: Path) -> None:
    config = small_classification_config()
    folds = config["folds"]
    expected_fits = {f"{family}_{repeat}_{fold}" for family in config["candidates"]
                     for repeat in range(folds["repeats"]) for fold in range(folds["k"])}
    workdir = tmp_path / "work"
    workdir.mkdir()
    breast_cancer_frame().to_csv(workdir / "data.csv", index=False)
    write_config(workdir, config)
    cmd = ["timeout", "-k", "15", str(RUN_TIMEOUT),
           sys.executable, "-m", "snakemake", "-s", str(REPO / "Snakefile"), "-d", str(workdir),
           "--executor", "slurm", "--profile", str(PROFILE), "--jobs", "4",
           # the test cluster has no accounting database: squeue (MinJobAge=3600) instead of sacct
           "--slurm-status-command", "squeue",
           "--slurm-keep-successful-logs",  # evidence below that each fit ran as a SLURM job
           "--configfile", str(workdir / "config.yaml")]
    run = subprocess.run(cmd, cwd=workdir, env=slurm_cluster.env, stdin=subprocess.DEVNULL,
                         capture_output=True, text=True, check=False)
    output = run.stdout + run.stderr
    assert run.returncode == 0, f"snakemake exited {run.returncode}:\n{output[-6000:]}"

    # 1. The plugin submitted one SLURM job per family x fold, and each ran as a SLURM job step ...
    fits = {key.split("/", 1)[1]: value for key, value in _submitted(output).items()
            if key.startswith("rule_fit_family/")}
    assert set(fits) == expected_fits, output[-4000:]
    for jobid, log in fits.values():
        assert log.name == f"{jobid}.log" and log.is_file(), log
        assert "--executor slurm-jobstep" in log.read_text(), f"{log} is not the log of a SLURM job step"
    # 2. ... which the controller ran to completion, named by this run and labelled with its rule.
    run_id = re.search(r"SLURM run ID: (\S+)", output)
    assert run_id is not None, output[-4000:]
    history = subprocess.run(["squeue", "--states=all", "--noheader", "--name", run_id.group(1),
                              "--format=%i|%T|%k"], env=slurm_cluster.env, capture_output=True, text=True,
                             timeout=30, check=True).stdout
    controller = {line.split("|")[0]: line.split("|", 2)[1:] for line in history.splitlines() if line}
    for wildcards, (jobid, _) in fits.items():
        assert controller.get(jobid) == ["COMPLETED", f"rule_fit_family_wildcards_{wildcards}"], history

    # 3. Every file the design names, and an audit that passes.
    exp = workdir / "results" / "bc"
    missing = [name for name in DESIGN_FILES if not (exp / name).is_file()]
    missing += [f"{kind}/{family}/r{repeat}f{fold}.parquet" for kind in ("fits", "oof")
                for family, repeat, fold in (w.rsplit("_", 2) for w in expected_fits)
                if not (exp / kind / family / f"r{repeat}f{fold}.parquet").is_file()]
    assert not missing, missing
    audit = subprocess.run([sys.executable, "-m", "holdfast", "audit", "results/bc"], cwd=workdir,
                           env=slurm_cluster.env, capture_output=True, text=True, timeout=300, check=False)
    assert audit.returncode == 0, audit.stdout + audit.stderr
    assert audit.stdout.startswith("PASS"), audit.stdout
