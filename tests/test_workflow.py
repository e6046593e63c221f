"""End-to-end runs of the real Snakemake workflow on real files: outputs, reruns, the single opening."""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
from collections.abc import Iterator
from pathlib import Path

import pandas as pd
import pytest
import yaml
from conftest import (
    REPO,
    diabetes_frame,
    open_experiment,
    planned_jobs,
    run_cli,
    run_workflow,
    small_classification_config,
    tree_digest,
    write_config,
)

DESIGN_FILES = [
    "sealed/manifest.json", "sealed/test.parquet", "dev.parquet", "folds.parquet", "ranking.parquet",
    "choice.json", "model/model.skops", "model/provenance.json", "final/verdict.json", "ledger.jsonl", "audit.json",
]

pytestmark = pytest.mark.slow


def audit_cli(exp: Path) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "holdfast", "audit", str(exp)], capture_output=True, text=True,
                          env={"PYTHONPATH": str(REPO / "scripts"), "PATH": "/usr/bin:/bin"})


def test_finished_run_has_every_file_and_passes_audit(bc_finished: Path) -> None:
    exp = bc_finished / "results" / "bc"
    for name in DESIGN_FILES:
        assert (exp / name).is_file(), name
    assert list((exp / "fits" / "logistic").glob("r0f*.parquet")) and list((exp / "oof" / "tree").glob("*.parquet"))
    assert not (exp / "sealed" / "test.parquet").stat().st_mode & 0o222, "sealed file must be read-only"
    result = audit_cli(exp)
    assert result.returncode == 0, result.stdout + result.stderr
    assert result.stdout.startswith("PASS")
    assert json.loads((exp / "audit.json").read_text())["passed"] is True


def test_the_run_after_the_first_plans_nothing_before_any_opening(nested_sealed_copy: Path) -> None:
    # The first run parses the workflow before the seal made the ledger; nothing of its record may differ from what
    # the next parse gives, or every later run remakes the report ("set of input files has changed").
    dry = run_workflow(nested_sealed_copy, "-n")
    assert dry.returncode == 0, dry.stderr[-2000:]
    assert planned_jobs(dry) == [], dry.stdout[-3000:] + dry.stderr[-3000:]
    assert "Nothing to be done" in dry.stdout + dry.stderr


def _job_lines(result: subprocess.CompletedProcess[str]) -> Iterator[tuple[str, str]]:
    """(rule, line) for every line of a dry run's job listing that follows a job's 'rule NAME:' header."""
    rule = None
    for line in (result.stdout + result.stderr).splitlines():
        text = line.strip()
        if text.startswith(("rule ", "localrule ")) and text.endswith(":"):
            rule = text.split()[1].rstrip(":")
        elif rule:
            yield rule, text


def _planned_files(result: subprocess.CompletedProcess[str], field: str) -> dict[str, set[str]]:
    """{rule: the files of its planned jobs' `field` line ('input' or 'output')} from a dry run's job listing."""
    files: dict[str, set[str]] = {}
    for rule, text in _job_lines(result):
        if text.startswith(f"{field}: "):
            files.setdefault(rule, set()).update(text[len(field) + 2:].split(", "))
    return files


def test_every_file_the_development_loop_writes_is_a_target_or_made_again_when_deleted(
        nested_sealed_copy: Path) -> None:
    """Snakemake makes a missing file again only when it is a target or a job that reads it has to run anyway.
    Every file a job of the loop writes is one of rule all's inputs, but the per-fold files (two per fit job, one per
    learning-curve job: many), which are targets only when missing; nested outer folds included."""
    dry = run_workflow(nested_sealed_copy, "-n", "--forceall")
    assert dry.returncode == 0, dry.stderr[-2000:]
    written = _planned_files(dry, "output")
    targets = _planned_files(dry, "input")["all"]
    per_fold = {"fit_family", "nested_fit_family", "learning_curve"}
    assert per_fold | {"score_outer", "nested_tally", "report", "diagnostics"} <= set(written)
    assert "results/nested-demo/oof/tree/r0f0.parquet" in written["fit_family"] and "open_test" not in written
    missing = {rule: sorted(files - targets) for rule, files in written.items() if files - targets}
    assert set(missing) == per_fold, missing
    assert not set().union(*(written[rule] for rule in per_fold)) & targets, "present per-fold files are no targets"

    # So a deleted one is made again, per-fold or not: out-of-fold and learning-curve tables, a nested fit table, the
    # report's pictures folder, a nested score, the diagnostics' pictures folder.
    exp = nested_sealed_copy / "results" / "nested-demo"
    deleted = ["oof/tree/r0f1.parquet", "diagnostics/learning/r0f2.parquet", "nested/o0/fits/logistic/r0f0.parquet",
               "report_figures", "nested/o1/score.json", "diagnostics/plots"]
    for name in deleted:
        (exp / name).unlink() if (exp / name).is_file() else shutil.rmtree(exp / name)
    planned = set().union(*_planned_files(run_workflow(nested_sealed_copy, "-n"), "output").values())
    assert {f"results/nested-demo/{name}" for name in deleted} <= planned, planned


def test_a_file_cut_short_after_its_step_stops_the_next_step_with_one_line_and_deleting_it_mends(
        nested_sealed_copy: Path) -> None:
    exp = nested_sealed_copy / "results" / "nested-demo"
    table = exp / "oof/logistic/r0f2.parquet"
    recorded = table.read_bytes()
    table.write_bytes(recorded[:300])  # newer than the ranking: the tally runs again and reads it
    broken = run_cli(nested_sealed_copy, "run", "config.yaml", "--cores", "2")
    assert broken.returncode != 0
    screen = broken.stdout + broken.stderr
    errors = [line for line in screen.splitlines() if line.startswith("holdfast: data error:")]
    assert errors == [f"holdfast: data error: '{table.relative_to(nested_sealed_copy)}' cannot be read (Parquet magic "
                      "bytes not found in footer): it was cut short or changed after the step that wrote it; "
                      "'holdfast audit results/nested-demo' names every file that no longer matches the ledger; put "
                      "back the copy the ledger recorded, or delete the file and run again to have it made again"
                      ], screen
    assert "Traceback" not in screen and "ArrowInvalid" in (exp / "logs/tally.log").read_text()

    table.unlink()
    mended = run_cli(nested_sealed_copy, "run", "config.yaml", "--cores", "2")
    assert mended.returncode == 0, mended.stdout[-3000:] + mended.stderr[-3000:]
    assert "audit PASS" in mended.stdout and table.read_bytes() == recorded


@pytest.mark.parametrize("kind", ["oof", "fits"])
def test_a_table_swapped_for_another_readable_one_is_named_as_changed_not_as_a_failed_fit(
        nested_sealed_copy: Path, kind: str) -> None:
    """Another fold's real table in place of one: every byte reads, so the tally fails on what it finds inside
    (too many out-of-fold rows: a DataError advising to drop failed candidates; missing fold scores: a ValueError
    deeper down). The one line names the swapped file as not what the ledger recorded, with the tally's reason."""
    exp = nested_sealed_copy / "results" / "nested-demo"
    table = exp / f"{kind}/logistic/r0f2.parquet"
    recorded = table.read_bytes()
    table.write_bytes((exp / f"{kind}/logistic/r0f1.parquet").read_bytes())
    broken = run_cli(nested_sealed_copy, "run", "config.yaml", "--cores", "2")
    assert broken.returncode != 0
    screen = broken.stdout + broken.stderr
    errors = [line for line in screen.splitlines() if line.startswith("holdfast: data error:")]
    assert len(errors) == 1, screen
    assert errors[0].startswith(f"holdfast: data error: '{table.relative_to(nested_sealed_copy)}' is not the file "
                                "the ledger last recorded for it: it was changed after the step that wrote it, and "
                                "this step failed on what it read (")
    said = "out-of-fold rows for" if kind == "oof" else "NaN or infinite"
    assert said in errors[0] and "'holdfast audit results/nested-demo' names every file" in errors[0]
    assert "Traceback" not in screen
    if kind == "oof":  # put back (once: the same mechanism for both), the run goes on
        table.write_bytes(recorded)
        mended = run_cli(nested_sealed_copy, "run", "config.yaml", "--cores", "2")
        assert mended.returncode == 0, mended.stdout[-3000:] + mended.stderr[-3000:]
        assert "audit PASS" in mended.stdout


def test_a_picture_deleted_from_the_diagnostics_folder_is_drawn_again_by_holdfast_run(
        nested_sealed_copy: Path) -> None:
    """The folder is the diagnostics rule's output (which pictures exist depends on the winner), so Snakemake alone
    does not see a picture deleted from it: holdfast run names it and runs the diagnostics again."""
    exp = nested_sealed_copy / "results" / "nested-demo"
    listed = json.loads((exp / "diagnostics/diagnostics.json").read_text())["plots"]
    picture = exp / "diagnostics" / sorted(listed.values())[0]
    picture.unlink()
    assert "diagnostics" not in planned_jobs(run_workflow(nested_sealed_copy, "-n")), "plain Snakemake misses it"
    again = run_cli(nested_sealed_copy, "run", "config.yaml", "--cores", "2")
    assert again.returncode == 0, again.stdout[-3000:] + again.stderr[-3000:]
    said = f"holdfast: '{picture.relative_to(nested_sealed_copy)}' is missing: the diagnostics step runs again"
    assert said in again.stdout
    assert picture.is_file() and "audit PASS" in again.stdout


def test_second_run_has_nothing_to_do(bc_copy: Path) -> None:
    dry = run_workflow(bc_copy, "-n")
    assert dry.returncode == 0, dry.stderr[-2000:]
    assert planned_jobs(dry) == []
    assert "Nothing to be done" in dry.stdout + dry.stderr
    before = tree_digest(bc_copy / "results")
    again = run_workflow(bc_copy)
    assert again.returncode == 0
    assert tree_digest(bc_copy / "results") == before


def test_fit_records_are_flat_rows_per_candidate(bc_finished: Path) -> None:
    fits = pd.read_parquet(bc_finished / "results/bc/fits/logistic/r0f1.parquet")
    assert len(fits) == 2 and set(fits["status"]) == {"ok"}
    for column in ("val_accuracy", "train_roc_auc", "n_train", "n_val", "fit_seconds", "candidate"):
        assert column in fits.columns
    oof = pd.read_parquet(bc_finished / "results/bc/oof/logistic/r0f1.parquet")
    assert {"row_key", "candidate", "prediction", "proba_0", "proba_1"} <= set(oof.columns)
    assert len(oof) == 2 * int(fits["n_val"].iloc[0])


def test_editing_one_family_replans_only_its_fits(bc_workdir: Path) -> None:
    choice = "results/bc/choice.json"
    first = run_workflow(bc_workdir, choice)
    assert first.returncode == 0, first.stderr[-3000:]
    config = yaml.safe_load((bc_workdir / "config.yaml").read_text())
    config["candidates"]["tree"]["grid"]["max_depth"] = [2, 4, 6]
    write_config(bc_workdir, config)
    dry = run_workflow(bc_workdir, "-n", choice)
    assert dry.returncode == 0, dry.stderr[-3000:]
    jobs = planned_jobs(dry)
    fits = sorted(j for j in jobs if j.startswith("fit_family"))
    assert fits == [f"fit_family[tree,0,{f}]" for f in range(3)], jobs
    assert "tally" in jobs and "seal" not in jobs and "assign_folds" not in jobs


def test_family_edit_after_opening_stops_before_any_job(bc_copy: Path) -> None:
    config = yaml.safe_load((bc_copy / "config.yaml").read_text())
    config["candidates"]["tree"]["grid"]["max_depth"] = [2, 3]
    write_config(bc_copy, config)
    before = tree_digest(bc_copy / "results")
    for extra in (["-n"], []):
        result = run_workflow(bc_copy, *extra)
        assert result.returncode != 0
        assert "already opened 1 time(s)" in result.stderr
        assert "config 'candidates' changed since the opening" in result.stderr  # names what changed, only that
        assert "config 'folds'" not in result.stderr and "holdfast code" not in result.stderr
        assert "new experiment" in result.stderr and "reopen_reasons" in result.stderr
    assert tree_digest(bc_copy / "results") == before


def test_second_opening_is_refused_and_final_is_untouched(bc_copy: Path) -> None:
    from holdfast.errors import SealedAccessError
    from holdfast.opening import open_test

    exp = bc_copy / "results" / "bc"
    before = tree_digest(exp / "final")
    spec = json.loads(json.dumps({"target": "target", "id": "patient", "group": None, "time": None, "drop": []}))
    with pytest.raises(SealedAccessError, match=r"already opened 1 time\(s\).*optimistic.*new experiment"):
        open_test(str(exp), "bc", spec, ["accuracy"], "classification", [], 0.95, 100, 0,
                  str(exp / "final/verdict.json"))
    assert tree_digest(exp / "final") == before


def test_forced_rerun_of_opening_is_refused_and_a_deleted_verdict_comes_back_without_reading(bc_copy: Path) -> None:
    exp = bc_copy / "results" / "bc"
    verdict = (exp / "final/verdict.json").read_bytes()
    before = tree_digest(exp)
    for extra in (["-n"], []):
        forced = run_workflow(bc_copy, *extra, "--forcerun", "open_test")
        assert forced.returncode == 4, forced.stderr[-3000:]
        assert "--forcerun open_test: the test set of experiment 'bc' was opened" in forced.stderr
    assert tree_digest(exp) == before
    (exp / "final/verdict.json").unlink()
    result = run_workflow(bc_copy)
    assert result.returncode == 0, result.stderr[-3000:]
    assert "restore_verdict" in result.stderr and "open_test" not in planned_jobs(result)
    assert (exp / "final/verdict.json").read_bytes() == verdict
    openings = [json.loads(x) for x in (exp / "ledger.jsonl").read_text().splitlines()]
    assert sum(e["event"] == "open_test" for e in openings) == 1
    assert sum(e["event"] == "opening_started" for e in openings) == 1


def test_reopen_with_a_recorded_reason_marks_everything(bc_copy: Path) -> None:
    config = yaml.safe_load((bc_copy / "config.yaml").read_text())
    config["test"]["reopen_reasons"] = ["auditor asked for the verdict with the corrected metric list"]
    write_config(bc_copy, config)
    result = run_workflow(bc_copy)
    assert result.returncode == 0, result.stderr[-3000:]
    exp = bc_copy / "results" / "bc"
    assert json.loads((exp / "final/verdict.json").read_text())["opening"] == 1  # a run never opens
    reopened = open_experiment(bc_copy, "bc")
    assert reopened.returncode == 0, reopened.stdout[-3000:] + reopened.stderr[-3000:]
    verdict = json.loads((exp / "final/verdict.json").read_text())
    assert verdict["opening"] == 2 and verdict["compromised"] is True
    assert verdict["test_set_opened"] == "test set opened 2 times"
    audit = json.loads((exp / "audit.json").read_text())
    assert audit["passed"] is False and audit["test_set_opened"] == 2
    assert [p["code"] for p in audit["problems"]] == ["opened-more-than-once"]
    assert json.loads((exp / "final/openings/1.json").read_text())["opening"] == 1


def test_changed_data_file_stops_with_fingerprint(bc_copy: Path) -> None:
    data = bc_copy / "data.csv"
    frame = pd.read_csv(data)
    frame.loc[0, "mean_radius"] += 1.0
    frame.to_csv(data, index=False)
    before = tree_digest(bc_copy / "results")
    result = run_workflow(bc_copy, "-n")
    assert result.returncode == 4
    message = result.stderr.strip().splitlines()[-1]
    assert "data file" in message and "'bc'" in message and "sha256" in message and "new 'experiment'" in message
    assert tree_digest(bc_copy / "results") == before


def test_regression_twin_on_diabetes(tmp_path: Path) -> None:
    # scikit-learn's bundled diabetes data (Efron et al., "Least Angle Regression", Ann. Statist. 2004).
    diabetes_frame().to_parquet(tmp_path / "diabetes.parquet", index=False)
    config = {
        "experiment": "diabetes",
        "data": {"path": "diabetes.parquet", "target": "target"},
        "folds": {"scheme": "kfold", "k": 3, "repeats": 2, "seed": 1},
        "candidates": {
            "ridge": {"estimator": "sklearn.linear_model.Ridge", "grid": {"alpha": [0.1, 10.0]}},
            "knn": {"estimator": "sklearn.neighbors.KNeighborsRegressor", "preprocess": {"scale": "standard"},
                    "grid": {"n_neighbors": [5, 15]}},
        },
        "opening": {"bootstrap": 200},
    }
    write_config(tmp_path, config)
    result = run_workflow(tmp_path)
    assert result.returncode == 0, result.stderr[-3000:]
    assert open_experiment(tmp_path, "diabetes").returncode == 0
    exp = tmp_path / "results" / "diabetes"
    verdict = json.loads((exp / "final/verdict.json").read_text())
    assert set(verdict["metrics"]) == {"neg_mean_absolute_error", "r2"}
    assert verdict["metrics"]["r2"]["interval_method"].startswith("percentile bootstrap")
    manifest = json.loads((exp / "sealed/manifest.json").read_text())
    assert manifest["spec"]["task"] == "regression" and manifest["keys"]["from"] == "row content"
    assert audit_cli(exp).returncode == 0


def _open(exp: str, queue: object) -> None:
    from holdfast.errors import SealedAccessError
    from holdfast.opening import open_test

    spec = {"target": "target", "id": "patient", "group": None, "time": None, "drop": []}
    try:
        open_test(exp, "bc", spec, ["accuracy"], "classification", [], 0.95, 100, 0, f"{exp}/final/verdict.json")
        queue.put("opened")  # type: ignore[attr-defined]
    except SealedAccessError:
        queue.put("refused")  # type: ignore[attr-defined]


def test_two_concurrent_openings_give_exactly_one(bc_workdir: Path) -> None:
    import multiprocessing

    first = run_workflow(bc_workdir, "results/bc/model/model.skops")
    assert first.returncode == 0, first.stderr[-3000:]
    exp = str(bc_workdir / "results" / "bc")
    ctx = multiprocessing.get_context("fork")
    queue = ctx.Queue()
    procs = [ctx.Process(target=_open, args=(exp, queue)) for _ in range(2)]
    for proc in procs:
        proc.start()
    for proc in procs:
        proc.join(timeout=300)
    assert sorted(queue.get(timeout=5) for _ in procs) == ["opened", "refused"]
    entries = [json.loads(x) for x in (bc_workdir / "results/bc/ledger.jsonl").read_text().splitlines()]
    assert sum(e["event"] == "open_test" for e in entries) == 1


def test_outputs_are_byte_identical_with_one_core(bc_finished: Path, bc_workdir: Path) -> None:
    import hashlib

    result = run_workflow(bc_workdir, "--cores", "1")
    assert result.returncode == 0, result.stderr[-3000:]
    assert open_experiment(bc_workdir, "bc", "config.yaml", "--cores", "1").returncode == 0
    for name in ("folds.parquet", "ranking.parquet", "choice.json", "final/verdict.json", "dev.parquet",
                 "sealed/test.parquet", "plots/ranking.png"):
        ours = hashlib.sha256((bc_workdir / "results/bc" / name).read_bytes()).hexdigest()
        theirs = hashlib.sha256((bc_finished / "results/bc" / name).read_bytes()).hexdigest()
        assert ours == theirs, name


def test_every_seed_is_recorded_in_the_ledger(bc_finished: Path) -> None:
    """Fold seeds, estimator random_states, the BBC seed and the test interval's seed are all in the ledger."""
    from holdfast import ledger

    config = yaml.safe_load((bc_finished / "config.yaml").read_text())
    entries = ledger.read(bc_finished / "results" / "bc" / "ledger.jsonl")
    by_event = {e["event"]: e["details"] for e in entries}
    assert by_event["assign_folds"]["seeds"] == [config["folds"]["seed"]]
    fits = [e["details"] for e in entries if e["event"] == "fit"]
    tree_states = {v for d in fits if d["family"] == "tree" for v in d["random_states"].values()}
    assert tree_states == {0}  # fixed in the config's params
    logistic_states = {v for d in fits if d["family"] == "logistic" for v in d["random_states"].values()}
    assert logistic_states == {0}  # unseeded in the config: holdfast fixes 0 and records it
    assert by_event["tally"]["bbc_seed"] == 0 and by_event["tally"]["bbc_draws"] > 0
    assert by_event["refit"]["random_state"] in ("0", "None")
    assert by_event["open_test"]["interval_seed"] == config["opening"]["seed"]


def test_a_second_invocation_on_the_same_experiment_stops_with_a_clear_message(bc_copy: Path) -> None:
    """While one run holds the work folder, a second is refused; the first finishes cleanly.

    The first run is frozen (SIGSTOP to its process group) once it holds the lock, so the second always
    meets it: without the freeze the one forced job may finish first and the test would race. Snakemake
    refuses the second either by its lock or, once the first's job has started, by naming that job's
    output as incomplete; following that message's advice (--rerun-incomplete) then meets the lock.
    """
    import os
    import signal
    import time

    from conftest import REPO

    cmd = [sys.executable, "-m", "snakemake", "-s", str(REPO / "Snakefile"), "-d", str(bc_copy), "--cores", "1",
           "--forcerun", "restore_verdict", "--configfile", str(bc_copy / "config.yaml")]
    (bc_copy / "results/bc/final/verdict.json").unlink()  # gives the first run one job to hold the lock with
    env = {**os.environ, "PYTHONPATH": str(REPO / "scripts")}
    first = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env,
                             stdin=subprocess.DEVNULL, start_new_session=True)
    locks = bc_copy / ".snakemake" / "locks"
    deadline = time.monotonic() + 120
    try:
        while not (locks.exists() and any(locks.iterdir())):  # the first run has taken the lock
            assert first.poll() is None and time.monotonic() < deadline, "the first run never took the lock"
            time.sleep(0.02)
        os.killpg(first.pid, signal.SIGSTOP)
        second = run_workflow(bc_copy)
        advised = run_workflow(bc_copy, "--rerun-incomplete")
        # holdfast run says who holds the lock in its own words, not Snakemake's advice to use --unlock.
        through_holdfast = run_cli(bc_copy, "run", "config.yaml", "--cores", "1")
    finally:
        os.killpg(first.pid, signal.SIGCONT)
    _, err = first.communicate(timeout=300)
    assert second.returncode != 0
    assert ("Directory cannot be locked" in second.stderr
            or "IncompleteFilesException" in second.stderr), second.stderr[-2000:]
    assert advised.returncode != 0
    assert "Directory cannot be locked" in advised.stderr, advised.stderr[-2000:]
    said = [line for line in through_holdfast.stderr.splitlines() if line.startswith("holdfast:")]
    assert through_holdfast.returncode == 1 and len(said) == 2, through_holdfast.stderr[-2000:]
    assert said[0].startswith("holdfast: Snakemake could not take its lock on this experiment's files: ") and \
        said[0].endswith("Run again once it has ended ('holdfast status results/bc' shows what it did); pass --unlock "
                         "only when no Snakemake of this project is running"), said[0]
    assert "--unlock argument" not in through_holdfast.stderr
    assert first.returncode == 0, err[-2000:]
    ledger = (bc_copy / "results" / "bc" / "ledger.jsonl").read_text().splitlines()
    assert sum('"event":"open_test"' in line for line in ledger) == 1


def _fit_job_settings(result: subprocess.CompletedProcess[str]) -> dict[str, tuple[str, str]]:
    """family -> (priority, threads) of the fit jobs a dry run prints (every job of a family must agree)."""
    seen: dict[str, set[tuple[str, str]]] = {}
    blocks: list[dict[str, str]] = []
    for line in (result.stdout + result.stderr).splitlines():
        if line.startswith(("rule ", "localrule ", "[")):
            blocks.append({"rule": line.strip()})
        elif blocks and ":" in line:
            key, _, value = line.partition(":")
            blocks[-1][key.strip()] = value.strip()
    refits = [block for block in blocks if block["rule"] == "rule refit_winner:"]
    # the refit goes before the learning-curve jobs (priority 1), and those before the diagnostics (priority 0), that
    # become ready with it
    assert refits and all(block.get("priority") == "2" for block in refits), refits
    curves = [block for block in blocks if block["rule"] == "rule learning_curve:"]
    assert curves and all(block.get("priority") == "1" for block in curves), curves
    assert all(block.get("priority", "0") == "0" for block in blocks if block["rule"] == "rule diagnostics:")
    for block in blocks:
        if block["rule"] == "rule fit_family:":
            family = block["wildcards"].split(",")[0].split("=")[1]
            seen.setdefault(family, set()).add((block.get("priority", "0"), block.get("threads", "1")))
    assert seen, "the dry run planned no fit job"
    assert all(len(s) == 1 for s in seen.values()), seen
    return {family: next(iter(s)) for family, s in seen.items()}


def test_fit_jobs_carry_each_familys_priority_and_threads_in_snakemakes_own_plan(bc_workdir: Path) -> None:
    """Declared costs order the fit jobs (priority = cost x candidates) and threads are per family; with equal values
    the rule takes one constant, so Snakemake's plan must say the same either way."""
    config = small_classification_config()
    config["candidates"]["tree"].update({"cost": 10, "threads": 2})
    write_config(bc_workdir, config)
    settings = _fit_job_settings(run_workflow(bc_workdir, "-n"))
    assert settings == {"logistic": ("2.0", "1"), "tree": ("20.0", "2")}
    config["candidates"]["tree"].update({"cost": 1, "threads": 1})  # now every family has 2 candidates x cost 1
    write_config(bc_workdir, config)
    assert _fit_job_settings(run_workflow(bc_workdir, "-n")) == {"logistic": ("2.0", "1"), "tree": ("2.0", "1")}
    # Unset, a candidate counts as its declared n_estimators (an ensemble of that many members), else as 1.
    config["candidates"]["tree"].update({"cost": None, "estimator": "sklearn.ensemble.RandomForestClassifier",
                                         "params": {"n_estimators": 30, "random_state": 0}})  # x 2 grid points
    write_config(bc_workdir, config)
    assert _fit_job_settings(run_workflow(bc_workdir, "-n")) == {"logistic": ("2.0", "1"), "tree": ("60.0", "1")}


def test_jobs_per_fold_deals_a_familys_candidates_into_parts_in_snakemakes_own_plan(bc_workdir: Path) -> None:
    """candidates.<family>.jobs_per_fold = N: N fit jobs per fold (never more than the family's candidates), each
    with the family's threads and a priority from its own candidates' cost; other families keep one job."""
    config = small_classification_config()
    config["candidates"]["tree"].update({"cost": 10, "threads": 2, "jobs_per_fold": 2,
                                         "grid": {"max_depth": [2, 3, 4]}})  # 3 candidates: parts of 2 and 1
    config["candidates"]["logistic"]["jobs_per_fold"] = 7  # 2 candidates: one job each
    write_config(bc_workdir, config)
    settings = _fit_job_settings(run_workflow(bc_workdir, "-n"))
    assert settings == {"logistic.1": ("1.0", "1"), "logistic.2": ("1.0", "1"), "tree.1": ("20.0", "2"),
                        "tree.2": ("10.0", "2")}, settings
    checked = run_cli(bc_workdir, "check", "config.yaml")
    assert checked.returncode == 0 and "5 candidates in 2 families (4 fit jobs per fold)" in checked.stdout, checked


def test_a_family_fitted_in_parts_gives_the_same_numbers_and_its_old_files_do_not_fail_the_audit(
        bc_finished: Path, bc_workdir: Path) -> None:
    """Each candidate is fitted alone whatever job it is in, so dealing families into parts changes no number: the
    folds, ranking, choice and verdict are byte for byte those of one job per fold (bc_finished). Going back to one
    job per fold leaves the parts' files and ledger lines behind; the audit follows the fit files the tally read
    (its fit_groups), so it passes, and the learning curve finds the winner's stored record in its part."""
    import hashlib

    from holdfast import ledger

    def digest(root: Path, name: str) -> str:
        return hashlib.sha256((root / "results" / "bc" / name).read_bytes()).hexdigest()

    config = small_classification_config()
    for family in ("logistic", "tree"):
        config["candidates"][family]["jobs_per_fold"] = 2
    write_config(bc_workdir, config)
    split = run_workflow(bc_workdir)
    assert split.returncode == 0, split.stderr[-3000:]
    exp = bc_workdir / "results" / "bc"
    assert sorted(p.name for p in (exp / "fits").iterdir()) == ["logistic.1", "logistic.2", "tree.1", "tree.2"]
    assert all(len(pd.read_parquet(f)) == 1 for f in (exp / "fits").rglob("*.parquet"))  # one candidate a job
    for name in ("folds.parquet", "ranking.parquet", "choice.json"):
        assert digest(bc_workdir, name) == digest(bc_finished, name), name
    entries = ledger.read(exp / "ledger.jsonl")
    curve = [e["details"] for e in entries if e["event"] == "learning_curve"]
    assert curve and all(d["family"].split(".")[0] in ("logistic", "tree") and "." in d["family"]
                         and d["fits_sha256"] for d in curve), curve
    audit = run_cli(bc_workdir, "audit", "results/bc")
    assert audit.returncode == 0 and "PASS" in audit.stdout, audit.stdout + audit.stderr

    for family in ("logistic", "tree"):
        config["candidates"][family]["jobs_per_fold"] = 1
    write_config(bc_workdir, config)
    whole = run_workflow(bc_workdir)
    assert whole.returncode == 0, whole.stderr[-3000:]
    assert (exp / "fits" / "tree" / "r0f0.parquet").exists() and (exp / "fits" / "tree.1" / "r0f0.parquet").exists()
    tallies = [e["details"] for e in ledger.read(exp / "ledger.jsonl") if e["event"] == "tally"]
    assert [t["fit_groups"] for t in tallies] == [["logistic.1", "logistic.2", "tree.1", "tree.2"],
                                                  ["logistic", "tree"]]
    audit = run_cli(bc_workdir, "audit", "results/bc")
    assert audit.returncode == 0 and "PASS" in audit.stdout, audit.stdout + audit.stderr
    opened = open_experiment(bc_workdir, "bc")
    assert opened.returncode == 0, opened.stdout[-3000:] + opened.stderr[-3000:]
    for name in ("ranking.parquet", "choice.json", "final/verdict.json"):
        assert digest(bc_workdir, name) == digest(bc_finished, name), name


def _memory_requests(result: subprocess.CompletedProcess[str]) -> dict[str, int]:
    """rule -> mem_mb of each job a dry run prints (the rules that plan more than one job must agree)."""
    found: dict[str, set[int]] = {}
    for rule, text in _job_lines(result):
        if text.startswith("resources:"):
            values = dict(part.strip().split("=", 1) for part in text[len("resources:"):].split(","))
            if "mem_mb" in values:  # the target rule 'all' asks for nothing
                found.setdefault(rule, set()).add(int(values["mem_mb"]))
    assert all(len(v) == 1 for v in found.values()), found
    return {rule: next(iter(v)) for rule, v in found.items()}


def test_seal_and_fold_jobs_ask_for_memory_by_the_size_of_the_data(bc_workdir: Path,
                                                                      monkeypatch: pytest.MonkeyPatch) -> None:
    """A cluster kills a job that outgrows its request: the data-bound jobs ask for 500 MB + 2 x the data's size in
    memory as the full check measured it (never less than 2,000 MB), in Snakemake's own plan."""
    from holdfast._io import read_table
    from holdfast.config import read_yaml
    from holdfast.plan import cached_facts, prepare

    monkeypatch.chdir(bc_workdir)
    raw = read_yaml("config.yaml")
    plan = prepare(raw, main=True)  # the full check, as 'holdfast run' makes it
    measured = read_table("data.csv").memory_usage(deep=True).sum() / 2**20
    assert plan.facts["data_mb"] == pytest.approx(measured, abs=0.05) and 0 < measured < 1
    small = _memory_requests(run_workflow(bc_workdir, "-n"))
    assert small["seal"] == small["assign_folds"] == 2000, small
    # The facts of a full check that found 3,000 MB of data, recorded where 'holdfast run' records them.
    _, path = cached_facts(raw)
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(json.dumps({**plan.facts, "data_mb": 3000.0}), encoding="utf-8")
    large = _memory_requests(run_workflow(bc_workdir, "-n"))
    assert large["seal"] == large["assign_folds"] == 500 + 2 * 3000, large
    assert large["tally"] == small["tally"]  # the jobs that do not hold the data ask for what they did
