"""The report: one self-contained page per experiment, its numbers those of the verified files, in a real browser.

The browser is Debian's ``chromium`` run headless; a machine without it gets it from apt-get when the tests run
as root (as tests/test_cluster.py does for SLURM), otherwise the browser tests are skipped (with ``CI=true`` they
fail). Screenshots go to the test's temporary folder and to ``tests/artifacts/`` (git-ignored).
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
import zipfile
from html.parser import HTMLParser
from pathlib import Path

import pandas as pd
import pytest
from conftest import REPO, diabetes_frame, planned_jobs, run_cli, run_workflow, write_config
from holdfast import display, ledger
from holdfast.layout import STEPS_LOCK
from holdfast.report import write_report

pytestmark = pytest.mark.slow

EXP = "results/cold-chain-spoilage"
ARTIFACTS = REPO / "tests" / "artifacts"
FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync", "--hide-scrollbars",
         "--enable-logging=stderr", "--v=0"]
TITLES = ["The job", "Folds", "Ranking", "Per-fold scores", "The choice", "Optimism of the winner",
          "Selection rounds", "Diagnostics", "Verdict", "Audit", "Ledger", "What each number estimates", "Cautions"]


class _Text(HTMLParser):
    """The text a reader sees (no script, no style), and the h2 titles in order."""

    def __init__(self) -> None:
        super().__init__()
        self.parts: list[str] = []
        self.titles: list[str] = []
        self._skip = 0
        self._in_h2 = False

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self._skip += tag in ("script", "style")
        self._in_h2 = self._in_h2 or tag == "h2"
        if tag == "h2":
            self.titles.append("")

    def handle_endtag(self, tag: str) -> None:
        self._skip -= tag in ("script", "style")
        self._in_h2 = self._in_h2 and tag != "h2"

    def handle_data(self, data: str) -> None:
        if not self._skip:
            self.parts.append(data)
            if self._in_h2:
                self.titles[-1] += data


def page_text(markup: str) -> tuple[str, list[str]]:
    """The page's visible text with whitespace collapsed, and its section titles."""
    parser = _Text()
    parser.feed(markup)
    return " ".join(" ".join(parser.parts).split()), parser.titles


def _skip_or_fail(reason: str) -> None:
    if os.environ.get("CI") == "true":
        pytest.fail(f"CI=true but the browser test cannot run here: {reason}", pytrace=False)
    pytest.skip(reason)


@pytest.fixture(scope="session")
def chromium() -> str:
    """Debian's chromium, installed with apt-get when it is missing and the tests run as root."""
    found = shutil.which("chromium")
    if found:
        return found
    if not sys.platform.startswith("linux") or os.geteuid() != 0 or shutil.which("apt-get") is None:
        _skip_or_fail("the browser tests need Debian's chromium package (apt-get install chromium, as root)")
    env = {**os.environ, "DEBIAN_FRONTEND": "noninteractive"}
    install = ["apt-get", "-o", "DPkg::Lock::Timeout=600", "install", "-y", "--no-install-recommends", "chromium"]
    done = subprocess.run(install, env=env, capture_output=True, text=True, stdin=subprocess.DEVNULL, timeout=1800)
    if done.returncode != 0:  # a fresh machine has no package lists yet
        subprocess.run(["apt-get", "-o", "DPkg::Lock::Timeout=600", "update"], env=env, capture_output=True,
                       stdin=subprocess.DEVNULL, timeout=900)
        done = subprocess.run(install, env=env, capture_output=True, text=True, stdin=subprocess.DEVNULL,
                              timeout=1800)
    found = shutil.which("chromium")
    if not found:
        _skip_or_fail(f"apt-get could not install chromium: {(done.stderr or done.stdout)[-500:]}")
    return str(found)


def browse(chromium: str, page: Path, workdir: Path, *action: str) -> subprocess.CompletedProcess[str]:
    """Load a page in headless chromium with a fresh profile; ``action`` is --dump-dom, --screenshot=... etc."""
    profile = workdir / f"profile-{len(list(workdir.glob('profile-*')))}"
    return subprocess.run([chromium, *FLAGS, f"--user-data-dir={profile}", *action, page.resolve().as_uri()],
                          capture_output=True, text=True, timeout=300, stdin=subprocess.DEVNULL)


def console_lines(result: subprocess.CompletedProcess[str]) -> list[str]:
    """Every message the page wrote to the browser console (errors, refused requests, uncaught exceptions)."""
    return [line for line in result.stderr.splitlines() if ":CONSOLE" in line or "Uncaught" in line]


def keep_artifact(path: Path, name: str) -> None:
    ARTIFACTS.mkdir(exist_ok=True)
    shutil.copyfile(path, ARTIFACTS / name)


def test_demo_report_loads_cleanly_and_shows_the_verified_numbers(demo_finished: Path, chromium: str,
                                                                  tmp_path: Path) -> None:
    exp = demo_finished / EXP
    page = exp / "report.html"
    markup = page.read_text(encoding="utf-8")
    assert page.stat().st_mtime > (exp / "final/verdict.json").stat().st_mtime, "holdfast open remakes the report"

    # Self-contained: every picture embedded, no file or address to fetch, a policy that forbids fetching.
    assert "http://" not in markup and "https://" not in markup
    # ranking, test interval, and the diagnostics: validation curves, learning curve, confusion matrix, reliability
    assert markup.count('<img src="data:image/png;base64,') == markup.count("<img") == 6
    assert "<link rel=\"stylesheet\"" not in markup and "<script src" not in markup
    assert "default-src 'none'" in markup

    loaded = browse(chromium, page, tmp_path, "--dump-dom")
    assert loaded.returncode == 0, loaded.stderr[-2000:]
    assert console_lines(loaded) == [], console_lines(loaded)
    text, titles = page_text(loaded.stdout)
    assert titles == TITLES and "could not be made" not in text and "withheld" not in text

    choice = json.loads((exp / "choice.json").read_text())
    verdict = json.loads((exp / "final/verdict.json").read_text())
    metric, winner, unit = choice["metric"], choice["winner"], None  # the demo's target has no unit
    assert f"{display.named(metric, winner['mean'], unit)} over {winner['folds']} folds" in text
    for key in ("bbc", "tibshirani"):
        assert display.number(metric, choice["optimism"][key]["corrected"], unit) in text
        assert display.spread(metric, choice["optimism"][key]["optimism"], unit) in text
    assert "bootstrap bias-corrected cross-validation" in text and "Tibshirani–Tibshirani correction" in text
    assert "BBC" not in text and "T&T" not in text
    assert "chosen after 1 round, 9 candidates tried in all" in text
    for name, block in verdict["metrics"].items():
        shown = f"{display.label(name)} {display.direction(name)} {display.number(name, block['test'], unit)} " \
                f"{display.interval(name, *block['interval'], unit)}"
        assert shown in text, shown
    assert "not opened" not in text
    ranking = pd.read_parquet(exp / "ranking.parquet")
    top = ranking[ranking["metric"] == metric].sort_values("rank").head(5)
    for row in top.itertuples():
        assert f"{row.candidate} " in text and display.number(metric, row.mean, unit) in text
    assert "Audit PASS" in text and "No problem found." in text
    entries = ledger.read(exp / "ledger.jsonl")
    assert all(e["hash"][:12] in text for e in entries) and f"{len(entries)} ledger lines" in text
    assert "distribution shift" in text and "human review" in text

    shot = tmp_path / "report.png"
    taken = browse(chromium, page, tmp_path, "--window-size=1200,2400", f"--screenshot={shot}")
    assert taken.returncode == 0 and console_lines(taken) == [], taken.stderr[-2000:]
    assert shot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" and shot.stat().st_size > 50_000
    keep_artifact(shot, "report-demo.png")
    printed = tmp_path / "report.pdf"
    browse(chromium, page, tmp_path, "--no-pdf-header-footer", f"--print-to-pdf={printed}")
    assert printed.read_bytes()[:5] == b"%PDF-" and printed.read_bytes().count(b"/Type /Page\n") >= 3

    # The console check can fail: the same page with a broken script and a request the policy refuses.
    broken = tmp_path / "broken.html"
    broken.write_text(markup.replace("<main>", '<main><img src="https://example.invalid/x.png">'), encoding="utf-8")
    assert any("violates" in line for line in console_lines(browse(chromium, broken, tmp_path, "--dump-dom")))


def test_snakemake_report_holds_the_page_and_its_pictures(demo_finished: Path, tmp_path: Path) -> None:
    work = tmp_path / "work"
    shutil.copytree(demo_finished, work, symlinks=True)
    made = run_workflow(work, "--report", "snakemake-report.zip")
    assert made.returncode == 0, made.stderr[-3000:]
    names = {Path(n).name for n in zipfile.ZipFile(work / "snakemake-report.zip").namelist()}
    assert {"report.html", "ranking.png", "test_interval.png"} <= names, sorted(names)


def test_sealed_regression_report_shows_errors_positive_in_the_unit(tmp_path: Path, chromium: str) -> None:
    """Diabetes progression (scikit-learn's bundled diabetes data, Efron et al., Annals of Statistics 2004):
    MAE shown as a positive number of 'points', the test set not opened."""
    diabetes_frame().to_csv(tmp_path / "data.csv", index=False)
    write_config(tmp_path, {
        "experiment": "progression", "data": {"path": "data.csv", "target": "target", "unit": "points"},
        "task": "regression", "metrics": ["neg_mean_absolute_error", "r2"],
        "test": {"fraction": 0.25, "salt": "r1"}, "folds": {"scheme": "kfold", "k": 3, "seed": 2},
        "candidates": {"ridge": {"estimator": "sklearn.linear_model.Ridge", "preprocess": {"scale": "standard"},
                                 "grid": {"alpha": [0.1, 10.0]}}}})
    result = run_cli(tmp_path, "run", "config.yaml", "--cores", "2")
    assert result.returncode == 0, result.stdout[-3000:] + result.stderr[-3000:]
    exp = tmp_path / "results" / "progression"
    assert "report: results/progression/report.html" in result.stdout
    loaded = browse(chromium, exp / "report.html", tmp_path, "--dump-dom")
    assert console_lines(loaded) == [], console_lines(loaded)
    text, titles = page_text(loaded.stdout)
    assert titles == TITLES and "could not be made" not in text and "withheld" not in text
    choice = json.loads((exp / "choice.json").read_text())
    mean = choice["winner"]["mean"]
    assert mean < 0 and f"MAE {-mean:.4f} points over 3 folds" in text
    assert display.number("neg_mean_absolute_error", choice["optimism"]["tibshirani"]["corrected"], "points") in text
    assert f"{mean:.4f}" not in text.replace(choice["why"], ""), "an error shown negative outside the tally's words"
    assert "Test set sealed, not opened." in text and "holdfast open results/progression" in text
    assert "Audit PASS" in text


def test_a_failing_audit_withholds_the_numbers_and_names_the_problem(bc_copy: Path, tmp_path: Path) -> None:
    exp = bc_copy / "results" / "bc"
    choice = json.loads((exp / "choice.json").read_text())
    forged = dict(choice, winner=dict(choice["winner"], mean=0.999123))
    (exp / "choice.json").write_text(json.dumps(forged))
    result = write_report(exp, tmp_path / "report.html")
    text, titles = page_text((tmp_path / "report.html").read_text())
    assert result["passed"] is False and titles == TITLES
    assert "Audit FAIL" in text and "choice-changed" in text
    assert "0.9991" not in text and display.number("accuracy", choice["winner"]["mean"]) not in text
    assert text.count("withheld: the audit did not pass") >= 5
    ledger_lines = ledger.read(exp / "ledger.jsonl")
    assert all(e["hash"][:12] in text for e in ledger_lines), "the ledger is shown whatever the audit says"


def test_a_run_in_progress_withholds_everything_but_the_report_step_audits_as_last_step(bc_copy: Path,
                                                                                      tmp_path: Path) -> None:
    exp = bc_copy / "results" / "bc"
    with ledger.locked(exp / STEPS_LOCK, shared=True):  # a step of some run is writing
        busy = write_report(exp, tmp_path / "busy.html")
        last = write_report(exp, tmp_path / "last.html", last_step=True)
    text, _ = page_text((tmp_path / "busy.html").read_text())
    assert busy["state"] == "in progress" and "Audit IN PROGRESS" in text and "withheld: a run was writing" in text
    assert last["state"] == "pass" and "Audit PASS" in page_text((tmp_path / "last.html").read_text())[0]


def test_a_learning_curve_kept_in_the_diagnostics_file_as_before_its_own_step_is_still_shown(bc_copy: Path,
                                                                                                tmp_path: Path) -> None:
    # An experiment closed before rule learning_summary existed keeps its learning curve in diagnostics.json (with
    # the points) and its picture in diagnostics/plots/learning.png, recorded by the diagnostics step's ledger line;
    # nothing remakes them once it is closed. Here that layout is rebuilt from a new experiment's files.
    from holdfast._io import sha256_file, write_json

    exp = bc_copy / "results" / "bc"
    result = json.loads((exp / "diagnostics/diagnostics.json").read_text())
    learning = json.loads((exp / "diagnostics/learning.json").read_text())
    result["learning_curve"] = {k: learning[k] for k in ("candidate", "files", "points")}
    result["learning_curve"]["points"][0]["n_train"] = 12345.0  # tells this file's numbers from learning.json's
    result["plots"]["learning"] = "plots/learning.png"
    write_json(exp / "diagnostics/diagnostics.json", result)
    shutil.copy(exp / "diagnostics/learning.png", exp / "diagnostics/plots/learning.png")
    details = ledger.events(ledger.read(exp / "ledger.jsonl"), "diagnostics")[-1]["details"]
    details.update(diagnostics_sha256=sha256_file(exp / "diagnostics/diagnostics.json"),
                   learning_png_sha256=sha256_file(exp / "diagnostics/plots/learning.png"))
    ledger.append(exp / "ledger.jsonl", "diagnostics", details, rule="diagnostics")
    made = write_report(exp, tmp_path / "old-layout.html")
    assert made["state"] == "pass", made
    html = (tmp_path / "old-layout.html").read_text()
    section = html.split("<h3>Learning curve of the winner</h3>")[1].split("<h3>")[0]
    assert "<img" in section and "withheld" not in section and "Not made" not in section, section[:500]
    assert "12345" in section, section[:2000]

    # That picture changed after its record: the audit names it and the report shows none of the diagnostics.
    (exp / "diagnostics/plots/learning.png").write_bytes(b"not the picture")
    tampered = write_report(exp, tmp_path / "tampered.html")
    text = (tmp_path / "tampered.html").read_text()
    assert tampered["state"] == "fail" and "diagnostics/plots/learning.png" in text, tampered
    assert "<h3>Learning curve of the winner</h3>" not in text


def test_the_report_step_reads_only_and_stays_in_a_closed_experiment(bc_copy: Path) -> None:
    exp = bc_copy / "results" / "bc"
    before = (exp / "ledger.jsonl").read_bytes()
    page = exp / "report.html"
    old = page.stat().st_mtime_ns
    forced = run_workflow(bc_copy, "--forcerun", "report")
    assert forced.returncode == 0, forced.stderr[-3000:]
    assert (exp / "ledger.jsonl").read_bytes() == before, "the report step must not append to the ledger"
    assert page.stat().st_mtime_ns > old and "localrule report:" in forced.stderr
    assert "rule tally" not in forced.stderr and "rule open_test" not in forced.stderr
    assert sorted(p.name for p in (exp / "report_figures").glob("*.png")) == [
        "diagnostics_calibration.png", "diagnostics_confusion.png", "diagnostics_learning.png",
        "diagnostics_validation.png", "ranking.png", "test_interval.png"]
    dry = run_workflow(bc_copy, "-n")
    assert "Nothing to be done" in dry.stdout + dry.stderr, dry.stderr[-2000:]


def test_a_nested_experiment_reports_the_procedure_and_the_report_comes_last(nested_sealed_copy: Path) -> None:
    nested_copy = nested_sealed_copy  # before the opening: the loop may still change and re-run anything
    exp = nested_copy / "results" / "nested-demo"
    summary = json.loads((exp / "nested/summary.json").read_text())
    metric = json.loads((exp / "choice.json").read_text())["metric"]
    text, titles = page_text((exp / "report.html").read_text())
    assert titles == TITLES and "could not be made" not in text and "withheld" not in text
    assert f"{display.named(metric, summary['metrics'][metric]['mean'])} (standard error" in text
    assert "Test set sealed, not opened." in text
    # After the first run the ledger joins the report's inputs (it did not exist before the seal): one remake.
    assert run_workflow(nested_copy).returncode == 0
    assert planned_jobs(run_workflow(nested_copy, "-n")) == []
    # The report waits for the nested summary: a new summary means a new report, and nothing else.
    dry = run_workflow(nested_copy, "-n", "--forcerun", "nested_summary")
    assert sorted(planned_jobs(dry)) == ["all", "nested_summary", "report"], dry.stdout[-2000:]


def test_the_job_names_the_seal_statements_about_features(tmp_path: Path) -> None:
    """Columns kept as text on purpose, and those the target fixes but the config states are recorded before the
    outcome, are named under 'The job' with what the statement means; a seal without them shows neither row."""
    from holdfast.layout import MANIFEST
    from holdfast.report import _job

    spec = {"target": "target", "id": None, "group": None, "time": None, "drop": [], "task": "classification",
            "fraction": 0.25, "scheme": "hashed", "salt": "s"}
    (tmp_path / MANIFEST).parent.mkdir(parents=True)
    (tmp_path / MANIFEST).write_text(json.dumps({"spec": spec, "data": {}, "counts": {}}))
    plain = page_text(_job(tmp_path, []))[0]
    assert "text on purpose" not in plain and "target fixes" not in plain
    (tmp_path / MANIFEST).write_text(json.dumps({"spec": {**spec, "text": ["ward"], "known_before_outcome": ["visits"]},
                                                 "data": {}, "counts": {}}))
    text = page_text(_job(tmp_path, []))[0]
    assert "text on purpose ward (mostly numbers, kept as categories: data.text )" in text  # code set apart
    assert ("features the target fixes visits : in every row the target fixes their values (or blanks); kept because "
            "the config states they are recorded before the outcome") in text
    assert "hold for new rows only if that statement is true" in text
