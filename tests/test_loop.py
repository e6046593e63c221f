"""The development loop through the real CLI: run, change, run, open once; rounds, receipts, signing, overlaps.

Every test drives `holdfast run` / `holdfast open` / `holdfast audit` (or plain Snakemake where that is the
point) on scikit-learn's bundled breast cancer data (Wolberg, Street & Mangasarian, UCI, 1995; loaded by
sklearn.datasets.load_breast_cancer) in a temporary folder.
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import pandas as pd
import pytest
import yaml
from conftest import (
    REPO,
    breast_cancer_frame,
    planned_jobs,
    private_copy,
    run_cli,
    run_workflow,
    small_classification_config,
    tree_digest,
    write_config,
)
from holdfast import ledger

pytestmark = pytest.mark.slow

EMPTY_SHA256 = "e3b0c44298fc1c149afbf4c8996fb92427ae41e4649b934ca495991b7852b855"


def entries(exp: Path) -> list[dict[str, Any]]:
    """The ledger's entries, parsed."""
    return [json.loads(line) for line in (exp / "ledger.jsonl").read_text().splitlines()]


def fit_families_since(exp: Path, seq: int) -> list[str]:
    """Family of every fit job the ledger recorded after entry ``seq`` (one item per fit job)."""
    return sorted(e["details"]["family"] for e in entries(exp) if e["event"] == "fit" and e["seq"] > seq)


def edit(workdir: Path, change: Any, name: str = "config.yaml") -> None:
    """Change the config file in place with ``change(config)``."""
    config = yaml.safe_load((workdir / name).read_text())
    change(config)
    write_config(workdir, config, name)


def ok(result: subprocess.CompletedProcess[str]) -> subprocess.CompletedProcess[str]:
    """Assert a CLI call succeeded and return it."""
    assert result.returncode == 0, result.stdout[-3000:] + result.stderr[-3000:]
    return result


@pytest.fixture
def work(tmp_path: Path) -> Path:
    """A project folder with the breast cancer data and conftest's small two-family config."""
    breast_cancer_frame().to_csv(tmp_path / "data.csv", index=False)
    write_config(tmp_path, small_classification_config())
    return tmp_path


# --- the loop: three rounds, only what changed re-runs, one opening --------------------------------------------------

def test_run_change_run_add_run_open_counts_three_rounds_and_reruns_only_what_changed(work: Path) -> None:
    exp = work / "results" / "bc"
    first = ok(run_cli(work, "run", "config.yaml", "--cores", "2"))
    assert "test set sealed, not opened" in first.stdout
    assert not (exp / "final" / "verdict.json").exists(), "a run must never open the test set"
    assert fit_families_since(exp, -1) == ["logistic"] * 3 + ["tree"] * 3

    edit(work, lambda c: c["candidates"]["tree"]["grid"].update(max_depth=[2, 4, 6]))
    plan = run_workflow(work, "-n")
    assert plan.returncode == 0, plan.stderr[-3000:]
    jobs = planned_jobs(plan)
    assert sorted(j for j in jobs if j.startswith("fit_family")) == [f"fit_family[tree,0,{f}]" for f in range(3)]
    assert "seal" not in jobs and "assign_folds" not in jobs and "open_test" not in jobs
    head = entries(exp)[-1]["seq"]
    ok(run_cli(work, "run", "config.yaml", "--cores", "2"))
    assert fit_families_since(exp, head) == ["tree"] * 3

    edit(work, lambda c: c["candidates"].update(knn={
        "estimator": "sklearn.neighbors.KNeighborsClassifier", "preprocess": {"scale": "standard"},
        "grid": {"n_neighbors": [5, 15]}}))
    plan = run_workflow(work, "-n")
    assert sorted(j for j in planned_jobs(plan) if j.startswith("fit_family")) == [
        f"fit_family[knn,0,{f}]" for f in range(3)]
    head = entries(exp)[-1]["seq"]
    ok(run_cli(work, "run", "config.yaml", "--cores", "2"))
    assert fit_families_since(exp, head) == ["knn"] * 3

    opened = ok(run_cli(work, "open", "results/bc", "--yes", "--cores", "2"))
    assert "chosen after 3 selection round(s), 7 candidate(s) tried in all" in opened.stdout
    rounds = [e["details"] for e in entries(exp) if e["event"] == "round"]
    assert [r["round"] for r in rounds] == [1, 2, 3]
    assert rounds[0]["changes"] is None and rounds[0]["ranking_seen_sha256"] is None
    second, third = rounds[1]["changes"], rounds[2]["changes"]
    assert list(second["families_altered"]) == ["tree"] and len(second["families_altered"]["tree"]
                                                                 ["candidates_added"]) == 1
    assert second["families_added"] == [] and second["families_removed"] == []
    assert third["families_added"] == ["knn"] and third["families_altered"] == {}
    assert all(r["ranking_seen_sha256"] for r in rounds[1:]), "a later round names the ranking that was seen"
    verdict = json.loads((exp / "final" / "verdict.json").read_text())
    assert verdict["selection"] == {"rounds": 3, "candidates_tried": 7,
                                    "text": "chosen after 3 rounds, 7 candidates tried in all"}
    choice = json.loads((exp / "choice.json").read_text())
    assert choice["optimism"]["candidates_counted"] == 7 and choice["candidates"] == 7


@pytest.fixture(scope="module")
def two_rounds_once(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """Eight trees that differ only by their seed, then only the best of them kept: two rounds through the CLI,
    once for this module (tests take copies of it)."""
    work = tmp_path_factory.mktemp("rounds")
    breast_cancer_frame().to_csv(work / "data.csv", index=False)
    write_config(work, small_classification_config())
    edit(work, lambda c: c.update(candidates={"tree": {
        "estimator": "sklearn.tree.DecisionTreeClassifier", "params": {"max_features": 0.3},
        "grid": {"random_state": list(range(8))}}}, metrics=["accuracy"]))
    ok(run_cli(work, "run", "config.yaml", "--cores", "2"))
    winner = json.loads((work / "results" / "bc" / "choice.json").read_text())["winner"]["spec"]["params"][
        "random_state"]
    edit(work, lambda c: c["candidates"]["tree"]["grid"].update(random_state=[winner]))
    ok(run_cli(work, "run", "config.yaml", "--cores", "2"))
    return work


@pytest.fixture
def two_rounds(two_rounds_once: Path, tmp_path: Path) -> Path:
    """A private copy of the two-round project, times and Snakemake metadata included."""
    return private_copy(two_rounds_once, tmp_path / "rounds")


def test_optimism_counts_candidates_of_earlier_rounds(two_rounds: Path) -> None:
    """The optimism over both rounds must exceed the last round's alone (selection among noise is optimistic; one
    candidate has nothing to pick)."""
    choice = json.loads((two_rounds / "results" / "bc" / "choice.json").read_text())
    assert choice["rounds"]["count"] == 2 and choice["rounds"]["candidates_tried"] == 8
    assert choice["candidates"] == 1
    everything, last_round = choice["optimism"], choice["optimism"]["this_round_only"]
    assert everything["bbc"]["optimism"] > last_round["bbc"]["optimism"]
    # Tibshirani–Tibshirani is a fold-wise shortfall: one candidate has none, and with these seeds the winner
    # happens to be best on every fold of round 1 too (0 either way); it may never be smaller over more candidates.
    assert everything["tibshirani"]["optimism"] >= last_round["tibshirani"]["optimism"] == 0.0
    assert everything["bbc_candidates"] == 8 and everything["tibshirani_candidates"] == 8


@pytest.mark.parametrize("damage", ["deleted", "cut short", "round 1 taken out", "edited consistently"])
def test_a_lost_or_edited_history_index_stops_the_tally_until_it_is_put_back(two_rounds: Path, damage: str) -> None:
    """The attack: delete history/index.json, cut it, take round 1's candidates out of it, or point an entry at
    other predictions with their sha256, and make the tally run again. Before, the tally built on it: "8
    candidates tried in all" became 1 (or the optimism rested on the edit), it recorded the result, and the audit
    passed. Now the tally stops with one line and writes nothing; put back, it runs."""
    exp = two_rounds / "results" / "bc"
    index_path = exp / "history" / "index.json"
    recorded = index_path.read_bytes()
    index = json.loads(recorded)
    current = json.loads((exp / "choice.json").read_text())["winner"]["candidate"]  # round 2's one candidate
    assert len(index["candidates"]) == 8 and current in index["candidates"]
    said = "is not the history index the tally at ledger seq"
    if damage == "deleted":
        index_path.unlink()
        said = "is missing, but the tally at ledger seq"
    elif damage == "cut short":
        index_path.write_bytes(recorded[:40])
    elif damage == "round 1 taken out":
        index_path.write_text(json.dumps({**index, "candidates": {current: index["candidates"][current]}}))
    else:  # an earlier candidate's entry now names the winner's predictions, sha256 and all: every file matches
        other = sorted(c for c in index["candidates"] if c != current)[0]
        index["candidates"][other].update({k: index["candidates"][current][k] for k in ("oof", "oof_sha256")})
        index_path.write_text(json.dumps(index))
    (exp / "ranking.parquet").unlink()  # the tally must run again
    history = tree_digest(exp / "history")
    ledger_before = (exp / "ledger.jsonl").read_bytes()
    result = run_cli(two_rounds, "run", "config.yaml", "--cores", "2")
    assert result.returncode == 1
    errors = [line for line in result.stderr.splitlines() if line.startswith("holdfast: data error:")]
    assert len(errors) == 1 and said in errors[0], result.stderr[-3000:]
    assert "'results/bc/history/index.json'" in errors[0] and "counting 8 candidate(s) tried in all" in errors[0]
    assert "Traceback" not in result.stderr + result.stdout
    assert tree_digest(exp / "history") == history, "the history the tally refused must stay as it was"
    assert (exp / "ledger.jsonl").read_bytes() == ledger_before, "a refused tally records nothing"
    if damage == "deleted":  # put back (once is enough: the same bytes whatever the damage was), the run goes on
        index_path.write_bytes(recorded)
        ok(run_cli(two_rounds, "run", "config.yaml", "--cores", "2"))
        choice = json.loads((exp / "choice.json").read_text())
        assert choice["rounds"]["candidates_tried"] == 8 and choice["optimism"]["bbc_candidates"] == 8
        assert ok(run_cli(two_rounds, "audit", "results/bc")).stdout.startswith("PASS")


def test_a_tally_stopped_between_recording_its_index_and_moving_it_into_place_is_finished_by_the_next(
        two_rounds: Path) -> None:
    """The tally writes history/index.next.json, records its sha256, then moves it over index.json: stopped in
    between, index.json is the older one. The next tally finds the recorded index waiting and moves it in."""
    exp = two_rounds / "results" / "bc"
    index_path, waiting = exp / "history" / "index.json", exp / "history" / "index.next.json"
    recorded = index_path.read_bytes()
    index_path.rename(waiting)
    index_path.write_text(json.dumps({"candidates": {}, "fold_tables": {}}))  # as if an older index were left
    (exp / "ranking.parquet").unlink()
    ok(run_cli(two_rounds, "run", "config.yaml", "--cores", "2"))
    assert index_path.read_bytes() == recorded and not waiting.exists()
    assert json.loads((exp / "choice.json").read_text())["rounds"]["candidates_tried"] == 8


def _earlier_candidate_file(exp: Path, kind: str, nth: int = 0) -> Path:
    """The history file (``kind`` 'fits' or 'oof') of a round-1 candidate that round 2 no longer has."""
    index = json.loads((exp / "history" / "index.json").read_text())
    current = json.loads((exp / "choice.json").read_text())["winner"]["candidate"]
    return exp / sorted(e[kind] for c, e in index["candidates"].items() if c != current)[nth]


@pytest.mark.parametrize("case", ["round set-up overwritten", "history oof cut short", "history fits swapped"])
def test_a_damaged_round_or_history_file_stops_its_step_with_one_line(two_rounds: Path, case: str) -> None:
    """Files a step finds by itself, not through its inputs: rounds/<n>.json (record_round copies or compares a
    set-up from it) and the history the tally's optimism estimates read. Damaged, each stops its step with one
    line naming it (its sha256 against the ledger's or the index's record); put back, the run goes on."""
    exp = two_rounds / "results" / "bc"
    if case == "round set-up overwritten":
        damaged, forced = exp / "rounds" / "2.json", exp / "rounds" / "current.json"
        original = damaged.read_bytes()
        damaged.write_text('{"round": 2, "setup": {}}\n')  # valid JSON, not what was recorded
        said = "(selection round 2's set-up, recorded at ledger seq"
    else:
        damaged = _earlier_candidate_file(exp, "oof" if "oof" in case else "fits")
        forced, original = exp / "ranking.parquet", damaged.read_bytes()
        if "cut" in case:
            damaged.write_bytes(original[:300])
        else:
            damaged.write_bytes(_earlier_candidate_file(exp, "fits", 1).read_bytes())  # another real fit table
        said = "kept in history/index.json for the optimism estimates of later rounds) is not the file the index"
    forced.unlink()  # the step must run again
    ledger_before = (exp / "ledger.jsonl").read_bytes()
    result = run_cli(two_rounds, "run", "config.yaml", "--cores", "2")
    assert result.returncode == 1
    errors = [line for line in result.stderr.splitlines() if line.startswith("holdfast: data error:")]
    assert len(errors) == 1 and said in errors[0], result.stderr[-3000:]
    assert f"'{damaged.relative_to(two_rounds)}'" in errors[0] and "put back" in errors[0]
    assert "Traceback" not in result.stderr + result.stdout
    assert (exp / "ledger.jsonl").read_bytes() == ledger_before, "a refused step records nothing"
    if case == "history oof cut short":  # put back (once: the other cases are the same mechanism), it runs
        damaged.write_bytes(original)
        ok(run_cli(two_rounds, "run", "config.yaml", "--cores", "2"))
        assert json.loads((exp / "choice.json").read_text())["rounds"]["candidates_tried"] == 8


def test_another_rounds_copy_in_place_of_the_current_round_stops_the_tally_until_deleted(two_rounds: Path) -> None:
    """rounds/current.json is the tally's round number. Round 1's own valid file copied over it made the tally say
    "chosen after 1 round" and record it (only the closing audit objected). Now the tally checks it against the
    ledger's latest round and stops with one line; deleted, record_round writes it again and the run goes on."""
    exp = two_rounds / "results" / "bc"
    current = exp / "rounds" / "current.json"
    current.write_bytes((exp / "rounds" / "1.json").read_bytes())  # newer than the ranking: the tally runs again
    ledger_before = (exp / "ledger.jsonl").read_bytes()
    result = run_cli(two_rounds, "run", "config.yaml", "--cores", "2")
    assert result.returncode == 1
    errors = [line for line in result.stderr.splitlines() if line.startswith("holdfast: data error:")]
    assert len(errors) == 1, result.stderr[-3000:]
    assert "'results/bc/rounds/current.json' (the current selection round, recorded at ledger seq" in errors[0]
    assert "delete it and run again" in errors[0] and "Traceback" not in result.stderr + result.stdout
    assert (exp / "ledger.jsonl").read_bytes() == ledger_before, "a refused tally records nothing"
    current.unlink()
    ok(run_cli(two_rounds, "run", "config.yaml", "--cores", "2"))
    assert json.loads((exp / "choice.json").read_text())["rounds"] == {
        **json.loads((exp / "choice.json").read_text())["rounds"], "count": 2, "candidates_tried": 8}
    assert ok(run_cli(two_rounds, "audit", "results/bc")).stdout.startswith("PASS")


def test_the_audit_names_a_tally_that_counted_fewer_candidates_than_an_earlier_one(two_rounds: Path) -> None:
    """What an older holdfast wrote after a lost history index: a later tally counting fewer candidates tried. The
    ledger stays a consistent chain (forged here as such a run would have written it), so only this check sees it."""
    from holdfast._io import canonical_json

    exp = two_rounds / "results" / "bc"
    assert ok(run_cli(two_rounds, "audit", "results/bc")).stdout.startswith("PASS")
    items = entries(exp)
    last = max(i for i, e in enumerate(items) if e["event"] == "tally")
    again = json.loads(json.dumps(items[last]))
    again["details"]["candidates_tried"] = 1
    items.append(again)
    rechain(items, len(items) - 1)
    (exp / "ledger.jsonl").write_text("".join(canonical_json(e) + "\n" for e in items))
    audit = run_cli(two_rounds, "audit", "results/bc")
    assert audit.returncode == 1, audit.stdout
    problems = [line for line in audit.stdout.splitlines() if line.strip().startswith("- [")]
    assert len(problems) == 1 and "[history-shrank]" in problems[0], audit.stdout
    assert f"seq {len(items) - 1} counted 1 candidate(s) tried in all, fewer than the 8" in problems[0]


# --- the opening: once, deliberately ---------------------------------------------------------------------------------

def test_open_asks_on_a_terminal_refuses_without_one_and_refuses_a_second_time(work: Path) -> None:
    ok(run_cli(work, "run", "config.yaml", "--cores", "2"))
    no_tty = run_cli(work, "open", "results/bc")
    assert no_tty.returncode == 4 and "pass --yes" in no_tty.stderr
    assert not (work / "results/bc/final/verdict.json").exists()
    assert "winner: " in no_tty.stdout and "about to open the sealed test set" in no_tty.stdout
    ok(run_cli(work, "open", "results/bc", "--yes", "--cores", "2"))
    before = tree_digest(work / "results")
    again = run_cli(work, "open", "results/bc", "--yes", "--cores", "2")
    assert again.returncode == 4, again.stdout + again.stderr
    assert "already opened 1 time(s)" in again.stderr and "reopen_reasons" in again.stderr
    assert tree_digest(work / "results") == before
    assert sum(e["event"] == "open_test" for e in entries(work / "results/bc")) == 1


def _start_open(workdir: Path) -> subprocess.Popen[str]:
    """'holdfast open results/bc --yes' started in the background, its output piped."""
    return subprocess.Popen([sys.executable, "-m", "holdfast", "open", "results/bc", "--yes", "--cores", "2"],
                            cwd=workdir, env={**os.environ, "PYTHONPATH": str(REPO / "scripts")},
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, stdin=subprocess.DEVNULL)


def _opening_under_way(workdir: Path) -> tuple[subprocess.Popen[str], str]:
    """An opening started and past its checks (it found the experiment unopened and showed what it opens), and
    what it printed so far."""
    opening = _start_open(workdir)
    shown = []
    assert opening.stdout is not None
    for line in opening.stdout:
        shown.append(line)
        if "after the opening the experiment is closed" in line:
            break
    return opening, "".join(shown)


def test_a_second_opening_started_while_the_first_runs_opens_nothing(two_rounds: Path) -> None:
    """Two 'holdfast open --yes' (two terminals, a script retried): the second starts once the first has found the
    experiment unopened and shown what it opens. Before, the second found it unopened too; its Snakemake then failed
    on the closed experiment and it printed the first one's verdict as its own. Now it is refused in one line and
    opens nothing; the ledger counts one opening and the audit passes."""
    first, shown = _opening_under_way(two_rounds)
    second = _start_open(two_rounds)
    out, err = second.communicate(timeout=900)
    first_out, first_err = first.communicate(timeout=900)
    assert first.returncode == 0, shown + first_out + first_err[-3000:]
    assert second.returncode == 4 and out.count("holdfast: ") == 0, out + err
    said = [line for line in err.splitlines() if line.startswith("holdfast: ")]
    assert len(said) == 1 and "another 'holdfast open' of experiment 'results/bc' is running" in said[0], err
    events = [e["event"] for e in entries(two_rounds / "results" / "bc")]
    assert events.count("opening_started") == 1 and events.count("open_test") == 1
    audited = ok(run_cli(two_rounds, "audit", "results/bc")).stdout
    assert audited.startswith("PASS") and "test set opened 1 time(s)" in audited


def test_a_run_started_while_an_opening_runs_starts_nothing(two_rounds: Path) -> None:
    """A 'holdfast run' while 'holdfast open' runs: before, it rewrote the experiment's config.json under the opening
    and its Snakemake met the opening's (LockException on screen, 'the run failed'). Now it refuses in one line and
    starts nothing; the opening finishes as if alone."""
    logs = two_rounds / "results" / "bc" / "logs"
    runs_before = sorted(logs.glob("run-*.log"))
    opening, shown = _opening_under_way(two_rounds)
    run = run_cli(two_rounds, "run", "config.yaml", "--cores", "2")
    out, err = opening.communicate(timeout=900)
    assert opening.returncode == 0, shown + out + err[-3000:]
    said = [line for line in run.stderr.splitlines() if line.startswith("holdfast: ")]
    assert run.returncode == 4 and len(said) == 1, run.stdout + run.stderr
    assert "'holdfast open' of experiment 'results/bc' is running, so this run starts nothing" in said[0]
    assert sorted(logs.glob("run-*.log")) == runs_before, "no Snakemake was started"
    assert "test set opened 1 time(s)" in ok(run_cli(two_rounds, "audit", "results/bc")).stdout


def test_open_refuses_a_config_that_is_not_the_latest_rounds(two_rounds: Path) -> None:
    """'holdfast open --config' with round 1's grid (or any edit never run): before, it opened and stored that
    config as the experiment's own, so config.json and the report named eight candidates beside a verdict chosen
    from one. Now it is refused in one line naming the change, and nothing is written."""
    shutil.copy(two_rounds / "config.yaml", two_rounds / "earlier.yaml")
    edit(two_rounds, lambda c: c["candidates"]["tree"]["grid"].update(random_state=list(range(8))), "earlier.yaml")
    before = tree_digest(two_rounds / "results")
    result = run_cli(two_rounds, "open", "results/bc", "--yes", "--config", "earlier.yaml", "--cores", "2")
    assert result.returncode == 2, result.stdout + result.stderr
    said = [line for line in result.stderr.splitlines() if line.startswith("holdfast: ")]
    assert len(said) == 1 and "is not what selection round 2 (the latest the ledger records) chose from" in said[0]
    assert "family tree: 7 candidate(s) added, 0 removed" in said[0] and "as round 3" in said[0], said
    after = tree_digest(two_rounds / "results")
    assert after.pop("bc/open-command.lock") == EMPTY_SHA256  # the one-opening-at-a-time lock, empty
    assert after == before, "a refused opening writes nothing"


def test_a_plain_snakemake_target_cannot_open_without_the_request(work: Path) -> None:
    ok(run_cli(work, "run", "config.yaml", "--cores", "2"))
    result = run_workflow(work, "results/bc/final/verdict.json")
    assert result.returncode != 0
    assert "final/request.json" in result.stderr
    assert not (work / "results/bc/final/verdict.json").exists()
    assert not any(e["event"].startswith("open") for e in entries(work / "results/bc"))


def test_a_killed_opening_counts_and_is_named_by_the_audit(work: Path) -> None:
    """SIGKILL after the write-ahead marker and before the verdict: the opening counts everywhere."""
    edit(work, lambda c: c.update(opening={"bootstrap": 300000, "seed": 1}))  # a long read: seconds to kill in
    ok(run_cli(work, "run", "config.yaml", "--cores", "2"))
    exp = work / "results" / "bc"
    marker = exp / "final" / "openings" / "started-1.json"
    env = {**os.environ, "PYTHONPATH": str(REPO / "scripts")}
    proc = subprocess.Popen([sys.executable, "-m", "holdfast", "open", "results/bc", "--yes", "--cores", "2"],
                            cwd=work, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                            stdin=subprocess.DEVNULL, start_new_session=True)
    deadline = time.monotonic() + 600
    while not marker.exists():
        assert proc.poll() is None and time.monotonic() < deadline, "the opening ended before its marker was seen"
        time.sleep(0.005)
    os.killpg(proc.pid, signal.SIGKILL)
    proc.wait(timeout=30)
    assert not (exp / "final" / "verdict.json").exists(), "the verdict was written before the kill"
    audit = run_cli(work, "audit", "results/bc")
    assert audit.returncode == 1
    assert "test set opened 1 time(s)" in audit.stdout and "[opening-unfinished]" in audit.stdout
    shutil.rmtree(work / ".snakemake" / "locks", ignore_errors=True)
    again = run_cli(work, "open", "results/bc", "--yes", "--cores", "2")
    assert again.returncode == 4 and "already opened 1 time(s)" in again.stderr
    plain = run_workflow(work, "-n")
    # Only the report may be remade (the opening's write-ahead records are newer than it); nothing that opens.
    assert plain.returncode == 0 and set(planned_jobs(plain)) <= {"report", "all"}, plain.stdout[-2000:]


# --- flags that used to break an opened experiment -------------------------------------------------------------------

@pytest.fixture(scope="module")
def opened_once(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The small experiment, run and opened through the CLI once for this module (tests take copies of it)."""
    work = tmp_path_factory.mktemp("opened")
    breast_cancer_frame().to_csv(work / "data.csv", index=False)
    write_config(work, small_classification_config())
    ok(run_cli(work, "run", "config.yaml", "--cores", "2"))
    ok(run_cli(work, "open", "results/bc", "--yes", "--cores", "2"))
    return work


@pytest.fixture
def opened(opened_once: Path, tmp_path: Path) -> Path:
    """A private copy of the opened experiment's project, times and Snakemake metadata included."""
    return private_copy(opened_once, tmp_path / "opened")


KEPT = ("model/model.skops", "model/provenance.json", "final/verdict.json", "sealed/manifest.json",
        "sealed/test.parquet", "dev.parquet", "choice.json", "ranking.parquet", "folds.parquet", "ledger.jsonl")


@pytest.mark.parametrize("flags", [["--forceall"], ["--delete-all-output"], ["--touch"], ["-R", "tally"]])
def test_forcing_flags_cannot_replace_or_delete_what_was_opened(opened: Path, flags: list[str]) -> None:
    exp = opened / "results" / "bc"
    before = {name: (exp / name).read_bytes() for name in KEPT}
    dry = run_workflow(opened, "-n", *flags)
    assert "open_test" not in planned_jobs(dry) and "refit_winner" not in planned_jobs(dry)
    real = run_workflow(opened, *flags)
    assert {name: (exp / name).read_bytes() for name in KEPT if (exp / name).exists()} == before
    assert all((exp / name).exists() for name in KEPT), real.stderr[-2000:]
    assert ok(run_cli(opened, "audit", "results/bc")).stdout.startswith("PASS")


@pytest.mark.parametrize("rule", ["refit_winner", "open_test", "tally", "fit_family", "assign_folds", "seal"])
def test_forcing_a_closed_rule_is_refused_by_name_even_in_a_dry_run(opened: Path, rule: str) -> None:
    before = tree_digest(opened / "results")
    for extra in (["-n"], []):
        result = run_workflow(opened, *extra, "--forcerun", rule)
        assert result.returncode == 4, result.stderr[-2000:]
        assert f"--forcerun {rule}" in result.stderr and "nothing was run" in result.stderr
    assert tree_digest(opened / "results") == before


def test_cut_ledger_changed_grid_and_forced_folds_do_not_open_again(opened: Path) -> None:
    """The attack: cut the ledger back to its seal line, change a grid, force the folds: refused, and the audit
    counts the opening from the other records and says they disagree."""
    exp = opened / "results" / "bc"
    lines = (exp / "ledger.jsonl").read_text().splitlines()
    (exp / "ledger.jsonl").write_text(lines[0] + "\n")
    edit(opened, lambda c: c["candidates"]["tree"]["grid"].update(max_depth=[2, 3]))
    archive = (exp / "final" / "openings" / "1.json").read_bytes()
    for extra in (["-n"], []):
        result = run_workflow(opened, *extra, "--forcerun", "assign_folds")
        assert result.returncode == 4, result.stderr[-2000:]
        assert "already opened 1 time(s)" in result.stderr
    assert (exp / "final" / "openings" / "1.json").read_bytes() == archive
    assert not (exp / "final" / "openings" / "2.json").exists()
    audit = run_cli(opened, "audit", "results/bc")
    assert audit.returncode == 1 and "test set opened 1 time(s)" in audit.stdout
    assert "[opening-records-disagree]" in audit.stdout


def test_a_copied_project_and_a_changed_mem_mb_plan_nothing(opened: Path, tmp_path: Path) -> None:
    copy = tmp_path / "copy"
    shutil.copytree(opened, copy)  # new modification times in copy order, as cp -r gives
    dry = run_workflow(copy, "-n")
    assert dry.returncode == 0 and planned_jobs(dry) == [], dry.stderr[-2000:]
    edit(opened, lambda c: c["candidates"]["tree"].update(mem_mb=3000, threads=2, runtime=20))
    dry = run_workflow(opened, "-n")
    assert dry.returncode == 0 and planned_jobs(dry) == [], dry.stderr[-2000:]


# --- receipts, anchored heads and signatures -------------------------------------------------------------------------

def rechain(items: list[dict[str, Any]], start: int) -> None:
    """Recompute seq, prev and hash from ``start`` on, as a careful forger without the signing key would."""
    prev = ledger.GENESIS if start == 0 else items[start - 1]["hash"]
    for position in range(start, len(items)):
        items[position]["seq"] = position
        items[position]["prev"] = prev
        items[position]["hash"] = ledger.line_hash(items[position])
        prev = items[position]["hash"]


def forge_away_first_opening(exp: Path) -> int:
    """Remove every record of opening 1 and renumber opening 2 as 1, consistently, the way a forger would.

    Returns the sequence number of the first ledger line the forger had to rewrite.
    """
    from holdfast._io import canonical_json, sha256_file

    final = exp / "final"
    verdict = json.loads((final / "verdict.json").read_text())
    for key in ("reopen_reasons", "warning"):
        verdict.pop(key, None)
    verdict.update(opening=1, compromised=False, test_set_opened="test set opened 1 time")
    text = json.dumps(verdict, indent=2, sort_keys=True) + "\n"
    for name in ("1.json", "started-1.json"):
        (final / "openings" / name).chmod(0o644)
        (final / "openings" / name).unlink()
    (final / "openings" / "2.json").chmod(0o644)
    (final / "openings" / "2.json").rename(final / "openings" / "1.json")
    (final / "openings" / "1.json").write_text(text)
    (final / "verdict.json").write_text(text)
    marker = json.loads((final / "openings" / "started-2.json").read_text())
    marker["opening"] = 1
    (final / "openings" / "started-2.json").chmod(0o644)
    (final / "openings" / "started-2.json").unlink()
    (final / "openings" / "started-1.json").write_text(json.dumps(marker, indent=2, sort_keys=True) + "\n")
    manifest = json.loads((exp / "sealed" / "manifest.json").read_text())
    manifest["openings"] = [{**manifest["openings"][1], "opening": 1,
                             "marker_sha256": sha256_file(final / "openings" / "started-1.json")}]
    (exp / "sealed" / "manifest.json").write_text(json.dumps(manifest, indent=2, sort_keys=True) + "\n")
    registry = exp.parent / ".holdfast" / "openings.jsonl"
    kept = [json.loads(line) for line in registry.read_text().splitlines()][1:]
    registry.write_text("".join(canonical_json({**e, "opening": 1}) + "\n" for e in kept))
    items = entries(exp)
    first = next(i for i, e in enumerate(items) if e["event"] == "opening_started")
    items = [e for e in items if not (e["event"] in ("opening_started", "open_test")
                                      and e["details"]["opening"] == 1)]
    for e in items:
        if e["event"] in ("opening_started", "open_test"):
            e["details"]["opening"] = 1
        if e["event"] == "open_test":
            e["details"]["reasons"] = []
            e["details"]["verdict_sha256"] = sha256_file(final / "verdict.json")
            e["details"]["marker_sha256"] = sha256_file(final / "openings" / "started-1.json")
    rechain(items, first)
    (exp / "ledger.jsonl").write_text("".join(canonical_json(e) + "\n" for e in items))
    return first


def reopen_after_changing(work: Path) -> str:
    """Run, open, then with a written reason change a grid, run and open again; return the first receipt's head."""
    ok(run_cli(work, "run", "config.yaml", "--cores", "2"))
    ok(run_cli(work, "open", "results/bc", "--yes", "--cores", "2"))
    receipt = (work / "results/bc/receipt.txt").read_text()
    head = next(line for line in receipt.splitlines() if line.startswith("ledger head: "))[len("ledger head: "):]
    assert "verdict sha256: " in receipt
    edit(work, lambda c: (c["test"].update(reopen_reasons=["the first look used the wrong metric set, said the "
                                                           "reviewer"]),
                          c["candidates"]["tree"]["grid"].update(max_depth=[2, 3])))
    ok(run_cli(work, "run", "config.yaml", "--cores", "2"))
    ok(run_cli(work, "open", "results/bc", "--yes", "--cores", "2"))
    return head


def test_a_consistent_forgery_passes_the_plain_audit_but_not_the_receipt(work: Path) -> None:
    exp = work / "results" / "bc"
    head = reopen_after_changing(work)
    assert run_cli(work, "audit", "results/bc").returncode == 1  # honestly: opened twice
    forge_away_first_opening(exp)
    edit(work, lambda c: c["test"].update(reopen_reasons=[]))
    plain = run_cli(work, "audit", "results/bc")
    assert plain.returncode == 0 and "test set opened 1 time(s)" in plain.stdout, plain.stdout  # the limit
    anchored = run_cli(work, "audit", "results/bc", "--expect-head", head)
    assert anchored.returncode == 1 and "[head-changed]" in anchored.stdout, anchored.stdout


def test_with_signing_the_same_forgery_fails_without_any_receipt(work: Path, tmp_path_factory: Any) -> None:
    keys = tmp_path_factory.mktemp("keys")
    subprocess.run(["openssl", "genpkey", "-algorithm", "ed25519", "-out", str(keys / "key.pem")], check=True)
    edit(work, lambda c: c.update(ledger={"signing_key": str(keys / "key.pem")}))
    exp = work / "results" / "bc"
    reopen_after_changing(work)
    assert all(e.get("sig") for e in entries(exp))
    first = forge_away_first_opening(exp)
    plain = run_cli(work, "audit", "results/bc")
    assert plain.returncode == 1 and f"[bad-signature] ledger line(s) with seq {first}," in plain.stdout, plain.stdout
    # An unsigned line is named as such, by its sequence number.
    items = entries(exp)
    del items[-1]["sig"]
    (exp / "ledger.jsonl").write_text("".join(json.dumps(e, sort_keys=True, separators=(",", ":")) + "\n"
                                              for e in items))
    unsigned = run_cli(work, "audit", "results/bc")
    assert f"[unsigned-line] ledger line(s) with seq {items[-1]['seq']}" in unsigned.stdout


# --- several experiments on one data set -----------------------------------------------------------------------------

def test_a_second_experiment_cannot_seal_rows_another_opened_unless_it_says_why(opened: Path) -> None:
    edit(opened, lambda c: c.update(experiment="bc-again"))
    before = tree_digest(opened / "results")
    refused = run_cli(opened, "run", "config.yaml", "--cores", "2")
    assert refused.returncode == 4, refused.stdout + refused.stderr
    assert "in a test set already opened by 'bc (folder bc)'" in refused.stderr
    assert "test.seen_rows_reason" in refused.stderr
    assert tree_digest(opened / "results") == before and not (opened / "results" / "bc-again").exists()
    # Keying the same rows another way (by their content, not the id column) launders nothing either: the opening
    # registered its rows' content keys too.
    edit(opened, lambda c: c["data"].update(id=None, drop=["patient"]))
    rekeyed = run_cli(opened, "run", "config.yaml", "--cores", "2")
    assert rekeyed.returncode == 4 and "in a test set already opened by 'bc (folder bc)'" in rekeyed.stderr, \
        rekeyed.stdout + rekeyed.stderr
    assert tree_digest(opened / "results") == before
    # Nor does a copy of the file with its rows shuffled and a column added: its rows are compared by value over the
    # columns the opened set had (content keys over every column of the file no longer matched them).
    config = yaml.safe_load((opened / "config.yaml").read_text())
    copy = pd.read_csv(opened / config["data"]["path"]).sample(frac=1.0, random_state=7).assign(ward="east")
    copy.to_csv(opened / "copy.csv", index=False)
    edit(opened, lambda c: c["data"].update(path="copy.csv"))
    widened = run_cli(opened, "check", "config.yaml")
    assert widened.returncode == 4 and "in a test set already opened by 'bc (folder bc)'" in widened.stderr, \
        widened.stdout + widened.stderr
    assert tree_digest(opened / "results") == before
    edit(opened, lambda c: c["data"].update(id="patient", drop=[], path=config["data"]["path"]))
    # Renaming the opened experiment's folder, or deleting it, launders nothing: the registry remembers.
    (opened / "results" / "bc").rename(opened / "results" / "renamed")
    assert run_cli(opened, "run", "config.yaml", "--cores", "2").returncode == 4
    shutil.rmtree(opened / "results" / "renamed")
    assert run_cli(opened, "run", "config.yaml", "--cores", "2").returncode == 4
    edit(opened, lambda c: c["test"].update(seen_rows_reason="a second model family for the same review, "
                                                             "agreed with the validator"))
    ok(run_cli(opened, "run", "config.yaml", "--cores", "2"))
    ok(run_cli(opened, "open", "results/bc-again", "--yes", "--cores", "2"))
    exp = opened / "results" / "bc-again"
    verdict = json.loads((exp / "final" / "verdict.json").read_text())
    assert verdict["test_rows_seen_before"]["note"] == "test rows seen before"
    assert "note: test rows seen before" in run_cli(opened, "audit", "results/bc-again").stdout


def test_the_opening_flag_of_holdfast_open_opens_nothing_in_holdfast_run(nested_sealed_copy: Path) -> None:
    # `holdfast open` tells its own Snakemake which opening it makes (HOLDFAST_OPENING), so the report can follow the
    # verdict in that one call. The same variable in a user's shell must not turn `holdfast run` into an opening,
    # even with a valid confirmation waiting (as after an interrupted `holdfast open`).
    exp = nested_sealed_copy / "results" / "nested-demo"
    from holdfast._io import sha256_file

    request = {"experiment": "nested-demo", "opening": 1, "model_sha256": sha256_file(exp / "model" / "model.skops"),
               "choice_sha256": sha256_file(exp / "choice.json"),
               "winner": json.loads((exp / "choice.json").read_text())["winner"]["candidate"],
               "requested": "2026-12-03T00:00:00Z", "by": "test", "confirmed": "--yes"}
    (exp / "final").mkdir(exist_ok=True)
    (exp / "final" / "request.json").write_text(json.dumps(request))
    result = run_cli(nested_sealed_copy, "run", "config.yaml", "--cores", "2", env={"HOLDFAST_OPENING": "1"})
    assert result.returncode == 0, result.stdout[-3000:] + result.stderr[-3000:]
    assert not (exp / "final" / "verdict.json").exists(), "holdfast run opened the test set"
    events = [e["event"] for e in ledger.verify_chain(exp / "ledger.jsonl")[0]]
    assert "open_test" not in events and "opening_started" not in events, events
    assert "test set opened 0 time(s)" in result.stdout, result.stdout[-2000:]
