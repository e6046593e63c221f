"""Shared fixtures: small real datasets, experiment folders and a real Snakemake runner."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
from pathlib import Path
from typing import Any

import pandas as pd
import pytest
import yaml

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO / "scripts"))


_WORKER: dict[str, str] = {}


@pytest.hookimpl(trylast=True)  # after -m and -k have deselected
def pytest_collection_modifyitems(config: pytest.Config, items: list[pytest.Item]) -> None:
    """SLURM cluster tests run last, and their cluster starts now in a background thread (tests/test_cluster.py).

    Its experiment takes minutes, mostly waiting for the SLURM plugin's status checks; meanwhile the rest of the suite
    runs on the same cores (in one measured suite the cluster's setup alone was 278 of 1343 s).
    """
    cluster = [item for item in items if item.get_closest_marker("cluster")]
    if not cluster or config.option.collectonly:
        return
    items[:] = [item for item in items if not item.get_closest_marker("cluster")] + cluster
    cluster[0].module.start_in_background(config)  # type: ignore[attr-defined]


@pytest.fixture(scope="session", autouse=True)
def warm_worker(tmp_path_factory: pytest.TempPathFactory) -> Any:
    """One pre-warmed job worker (holdfast.worker) for the session's plain Snakemake runs, as `holdfast run` has.

    Jobs then fork with their imports done instead of starting cold, which is most of what a small test
    workflow costs. tests/test_kill.py kills runs started without it, so the cold path stays tested.
    """
    import tempfile
    import time

    address = os.path.join(tempfile.gettempdir(), f"holdfast-test-{os.getpid()}.sock")
    env = {**os.environ, "PYTHONPATH": str(REPO / "scripts")}
    worker = subprocess.Popen([sys.executable, "-m", "holdfast.worker", address], env=env,
                              stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    deadline = time.monotonic() + 120
    while not os.path.exists(address) and worker.poll() is None and time.monotonic() < deadline:
        time.sleep(0.05)
    if os.path.exists(address):
        _WORKER["HOLDFAST_WORKER"] = address
    yield address
    _WORKER.clear()
    worker.terminate()
    try:
        worker.wait(timeout=10)
    except subprocess.TimeoutExpired:
        worker.kill()
    if os.path.exists(address):
        os.unlink(address)


def run_workflow(workdir: Path, *args: str, configfile: str | None = "config.yaml",
                 timeout: int = 1200) -> subprocess.CompletedProcess[str]:
    """Run the real Snakemake on the repository's Snakefile inside ``workdir`` (jobs forked by the warm worker)."""
    cmd = [sys.executable, "-m", "snakemake", "-s", str(REPO / "Snakefile"), "-d", str(workdir), "--cores", "2",
           "--force-use-threads",
           *args]
    if configfile is not None:  # last: --configfile takes every following word
        cmd += ["--configfile", str(workdir / configfile)]
    env = {**os.environ, "PYTHONPATH": str(REPO / "scripts"), **_WORKER}
    return subprocess.run(cmd, capture_output=True, text=True, timeout=timeout, env=env,
                          stdin=subprocess.DEVNULL)


def run_cli(workdir: Path, *args: str, timeout: int = 1200, env: dict[str, str] | None = None,
            stdin: str | None = None) -> subprocess.CompletedProcess[str]:
    """Run the real ``holdfast`` command (``python -m holdfast ...``) inside ``workdir``, as a user would."""
    full_env = {**os.environ, "PYTHONPATH": str(REPO / "scripts"), **(env or {})}
    return subprocess.run([sys.executable, "-m", "holdfast", *args], capture_output=True, text=True, cwd=workdir,
                          timeout=timeout, env=full_env, input=stdin,
                          stdin=None if stdin is not None else subprocess.DEVNULL)


def open_experiment(workdir: Path, experiment: str, configfile: str = "config.yaml",
                    *extra: str) -> subprocess.CompletedProcess[str]:
    """The deliberate opening, through the real CLI: ``holdfast open results/<experiment> --yes``."""
    return run_cli(workdir, "open", f"results/{experiment}", "--yes", "--config", configfile, "--cores", "2", *extra)


def planned_jobs(result: subprocess.CompletedProcess[str]) -> list[str]:
    """Rule names (with wildcards) of the jobs a dry run plans, e.g. 'fit_family[logistic,0,1]'."""
    jobs: list[str] = []
    current: str | None = None
    for line in result.stdout.splitlines() + result.stderr.splitlines():
        text = line.strip()
        if text.startswith(("rule ", "localrule ")) and text.endswith(":"):
            current = text.split()[1].rstrip(":")
            jobs.append(current)
        elif current == "fit_family" and text.startswith("wildcards:") and jobs and jobs[-1] == "fit_family":
            values = [part.split("=")[1] for part in text[len("wildcards:"):].split(",")]
            jobs[-1] = f"fit_family[{','.join(v.strip() for v in values)}]"
    return jobs


def write_config(workdir: Path, config: dict[str, Any], name: str = "config.yaml") -> Path:
    """Write a config file into the work folder."""
    path = workdir / name
    path.write_text(yaml.safe_dump(config, sort_keys=False), encoding="utf-8")
    return path


def breast_cancer_frame() -> pd.DataFrame:
    """scikit-learn's bundled Wisconsin breast cancer data (569 rows), with a text id."""
    from sklearn.datasets import load_breast_cancer

    data = load_breast_cancer(as_frame=True)
    frame = data.frame.rename(columns=lambda c: c.replace(" ", "_"))
    frame.insert(0, "patient", [f"P{i:04d}" for i in range(len(frame))])
    return frame


def diabetes_frame() -> pd.DataFrame:
    """scikit-learn's bundled diabetes regression data (442 rows)."""
    from sklearn.datasets import load_diabetes

    return load_diabetes(as_frame=True).frame


def small_classification_config(data: str = "data.csv", **overrides: Any) -> dict[str, Any]:
    """A fast two-family classification experiment on the breast cancer data."""
    config: dict[str, Any] = {
        "experiment": "bc",
        "data": {"path": data, "target": "target", "id": "patient"},
        "metrics": ["accuracy", "roc_auc"],
        "test": {"fraction": 0.25, "scheme": "hashed", "salt": "s1"},
        "folds": {"scheme": "stratified", "k": 3, "repeats": 1, "seed": 5},
        "candidates": {
            "logistic": {"estimator": "sklearn.linear_model.LogisticRegression",
                         "preprocess": {"scale": "standard"}, "params": {"max_iter": 500},
                         "grid": {"C": [0.1, 1.0]}},
            "tree": {"estimator": "sklearn.tree.DecisionTreeClassifier", "params": {"random_state": 0},
                     "grid": {"max_depth": [2, 4]}},
        },
        "opening": {"bootstrap": 200, "seed": 1},
    }
    for key, value in overrides.items():
        config[key] = value
    return config


@pytest.fixture
def bc_workdir(tmp_path: Path) -> Path:
    """A work folder with the breast cancer CSV and a small config, nothing run yet."""
    breast_cancer_frame().to_csv(tmp_path / "data.csv", index=False)
    write_config(tmp_path, small_classification_config())
    return tmp_path


@pytest.fixture(scope="session")
def bc_finished(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """One finished breast cancer experiment (run once per session; copy it before changing it)."""
    workdir = tmp_path_factory.mktemp("bc_finished")
    breast_cancer_frame().to_csv(workdir / "data.csv", index=False)
    write_config(workdir, small_classification_config())
    result = run_workflow(workdir)
    assert result.returncode == 0, result.stderr[-3000:]
    opened = open_experiment(workdir, "bc")
    assert opened.returncode == 0, opened.stdout[-3000:] + opened.stderr[-3000:]
    # Kept beside the work directory, not in it, so copies and digests of the experiment don't see it.
    (workdir.parent / f"{workdir.name}.stdout").write_text(result.stdout + opened.stdout)
    return workdir


@pytest.fixture(scope="session")
def demo_finished(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The demo experiment exactly as shipped (config/config.yaml on data_demo/shipments.csv), run once."""
    workdir = tmp_path_factory.mktemp("demo")
    (workdir / "data_demo").mkdir()
    shutil.copy(REPO / "data_demo" / "shipments.csv", workdir / "data_demo" / "shipments.csv")
    shutil.copy(REPO / "config" / "config.yaml", workdir / "config.yaml")
    # The README's way: `holdfast run CONFIG`, then the deliberate opening.
    result = run_cli(workdir, "run", "config.yaml", "--cores", "2")
    assert result.returncode == 0, result.stdout[-3000:] + result.stderr[-3000:]
    opened = run_cli(workdir, "open", "results/cold-chain-spoilage", "--yes", "--cores", "2")
    assert opened.returncode == 0, opened.stdout[-3000:] + opened.stderr[-3000:]
    (workdir.parent / f"{workdir.name}.stdout").write_text(result.stdout + opened.stdout)  # beside, not in it
    return workdir


def nested_config() -> dict[str, Any]:
    """A small nested experiment on the demo data (2 outer folds, 3 inner folds, two families, one-SE rule)."""
    return {
        "experiment": "nested-demo",
        "data": {"path": "data_demo/shipments.csv", "target": "spoiled", "id": "shipment_id", "group": "route",
                 "time": "departed_at", "drop": ["shelf_life_days"]},
        "metrics": ["roc_auc", "accuracy"],
        "test": {"scheme": "stratified", "salt": "nested"},
        "folds": {"scheme": "stratified", "k": 3, "seed": 4},
        "nested": {"k": 2, "seed": 9},
        "selection": {"rule": "one_standard_error", "family_order": ["tree", "logistic"]},
        "candidates": {
            "logistic": {"estimator": "sklearn.linear_model.LogisticRegression",
                         "preprocess": {"scale": "standard"}, "params": {"max_iter": 1000},
                         "grid": {"C": [0.01, 1.0]}, "simplicity": {"param": "C", "simpler": "lower"}},
            "tree": {"estimator": "sklearn.tree.DecisionTreeClassifier", "params": {"random_state": 0},
                     "grid": {"max_depth": [3, 6]}, "simplicity": {"param": "max_depth", "simpler": "lower"}},
        },
        "opening": {"bootstrap": 200},
    }


@pytest.fixture(scope="session")
def nested_finished(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """One finished nested experiment on the demo data (run once per session; copy it before changing it)."""
    workdir = tmp_path_factory.mktemp("nested")
    (workdir / "data_demo").mkdir()
    shutil.copy(REPO / "data_demo" / "shipments.csv", workdir / "data_demo" / "shipments.csv")
    write_config(workdir, nested_config())
    result = run_workflow(workdir)
    assert result.returncode == 0, result.stderr[-3000:]
    shutil.copytree(workdir, workdir.parent / f"{workdir.name}-sealed", symlinks=True)  # for nested_sealed_copy
    opened = open_experiment(workdir, nested_config()["experiment"])
    assert opened.returncode == 0, opened.stdout[-3000:] + opened.stderr[-3000:]
    (workdir.parent / f"{workdir.name}.stdout").write_text(result.stdout)  # beside the experiment, not in it
    return workdir


def private_copy(project: Path, target: Path) -> Path:
    """A copy of a project a module-scoped fixture built, for one test to change: file times, symbolic links and
    Snakemake's metadata kept, so Snakemake sees the same state."""
    shutil.copytree(project, target, symlinks=True)
    return target


@pytest.fixture
def bc_copy(bc_finished: Path, tmp_path: Path) -> Path:
    """A private copy of the finished experiment, times and Snakemake metadata included."""
    return private_copy(bc_finished, tmp_path / "work")


@pytest.fixture
def nested_sealed_copy(nested_finished: Path, tmp_path: Path) -> Path:
    """A private copy of the nested experiment as it was before its opening: the development loop's state."""
    return private_copy(nested_finished.parent / f"{nested_finished.name}-sealed", tmp_path / "nested-sealed")


@pytest.fixture
def nested_copy(nested_finished: Path, tmp_path: Path) -> Path:
    """A private copy of the finished nested experiment."""
    return private_copy(nested_finished, tmp_path / "nested-work")


def tree_digest(root: Path) -> dict[str, str]:
    """sha256 of every file under a folder (for 'nothing was overwritten' checks)."""
    import hashlib

    out = {}
    if not root.exists():
        return out
    for path in sorted(root.rglob("*")):
        if path.is_file():
            out[str(path.relative_to(root))] = hashlib.sha256(path.read_bytes()).hexdigest()
    return out
