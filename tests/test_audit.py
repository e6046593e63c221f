"""The audit names every tampering: each reason comes from a real edit of a real finished experiment's files."""

from __future__ import annotations

import json
import subprocess
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pandas as pd
import pytest
from conftest import REPO
from holdfast import ledger
from holdfast._io import canonical_json
from holdfast.audit import audit
from holdfast.opening import open_test

pytestmark = pytest.mark.slow

Mutation = Callable[[Path], None]


# --- helpers -------------------------------------------------------------------------------------------------------

def experiment(workdir: Path) -> Path:
    """The finished breast-cancer experiment inside a copied work folder."""
    return workdir / "results" / "bc"


def audit_cli(exp: Path) -> subprocess.CompletedProcess[str]:
    """Run `python -m holdfast audit <exp>` in a fresh process, as a user would."""
    return subprocess.run([sys.executable, "-m", "holdfast", "audit", str(exp)], capture_output=True, text=True,
                          env={"PYTHONPATH": str(REPO / "scripts"), "PATH": "/usr/bin:/bin"}, timeout=300)


def codes(result: dict[str, Any]) -> list[str]:
    """The problem codes of an audit result, in the order reported."""
    return [p["code"] for p in result["problems"]]


def read_lines(exp: Path) -> list[str]:
    """The ledger's lines without their newlines."""
    return (exp / "ledger.jsonl").read_text(encoding="utf-8").splitlines()


def write_lines(exp: Path, lines: list[str], final_newline: bool = True) -> None:
    """Overwrite the ledger with these lines, as a hand edit would."""
    text = "\n".join(lines) + ("\n" if final_newline and lines else "")
    (exp / "ledger.jsonl").write_text(text, encoding="utf-8")


def entries(exp: Path) -> list[dict[str, Any]]:
    """The ledger's lines parsed as JSON objects."""
    return [json.loads(line) for line in read_lines(exp)]


def rechain(items: list[dict[str, Any]], start: int) -> None:
    """Recompute seq, prev and hash from position ``start`` on, as a careful forger would."""
    prev = ledger.GENESIS if start == 0 else items[start - 1]["hash"]
    for position in range(start, len(items)):
        entry = items[position]
        entry["seq"] = position
        entry["prev"] = prev
        entry["hash"] = ledger.line_hash(entry)
        prev = entry["hash"]


def position_of(items: list[dict[str, Any]], event: str) -> int:
    """Index of the first ledger entry of one event type."""
    return next(i for i, e in enumerate(items) if e["event"] == event)


def edit_json(path: Path, edit: Callable[[Any], None]) -> None:
    """Load a JSON file, change it in place with ``edit`` and write it back in holdfast's own layout."""
    value = json.loads(path.read_text(encoding="utf-8"))
    edit(value)
    path.write_text(json.dumps(value, indent=2, sort_keys=True) + "\n", encoding="utf-8")


def edit_parquet(path: Path, edit: Callable[[pd.DataFrame], pd.DataFrame]) -> None:
    """Rewrite a Parquet file through ``edit``, making it writable first (the sealed file is read-only)."""
    path.chmod(path.stat().st_mode | 0o200)
    edit(pd.read_parquet(path)).to_parquet(path, index=False)


def sealed_keys(exp: Path) -> list[str]:
    """Row keys of the sealed test set (the audit reads this column too, never the features)."""
    return list(pd.read_parquet(exp / "sealed/test.parquet", columns=["row_key"])["row_key"])


def open_again(exp: Path) -> None:
    """A second, recorded opening through the package's only reader of the sealed set."""
    manifest = json.loads((exp / "sealed/manifest.json").read_text(encoding="utf-8"))
    open_test(str(exp), "bc", manifest["spec"], ["accuracy"], "classification",
              ["the reviewer asked for one more look at the test set"], 0.95, 100, 0,
              str(exp / "final/verdict.json"))


# --- mutations: each is one realistic edit of a finished experiment -------------------------------------------------

def unchanged(exp: Path) -> None:
    """Leave the experiment as the workflow wrote it."""


def edit_ledger_value(exp: Path) -> None:
    """Change one number inside the fold-assignment line, keeping its recorded hash."""
    lines = read_lines(exp)
    entry = json.loads(lines[1])
    entry["details"]["rows"] += 1
    lines[1] = canonical_json(entry)
    write_lines(exp, lines)


def edit_ledger_text(exp: Path) -> None:
    """Edit the raw text of a ledger line (k 3 -> 4) with a text editor."""
    lines = read_lines(exp)
    assert '"k":3' in lines[1]
    lines[1] = lines[1].replace('"k":3', '"k":4')
    write_lines(exp, lines)


def delete_middle_line(exp: Path) -> None:
    """Delete one fit line from the middle of the ledger."""
    lines = read_lines(exp)
    del lines[len(lines) // 2]
    write_lines(exp, lines)


def swap_two_lines(exp: Path) -> None:
    """Swap two adjacent fit lines."""
    lines = read_lines(exp)
    lines[3], lines[4] = lines[4], lines[3]
    write_lines(exp, lines)


def insert_forged_line(exp: Path) -> None:
    """Insert a forged fit line that links to its predecessor and carries its own correct hash."""
    items = entries(exp)
    forged = dict(items[5])
    forged.update(seq=items[5]["seq"] + 1, prev=items[5]["hash"], time="2020-01-01T00:00:00.000000Z")
    forged["hash"] = ledger.line_hash(forged)
    lines = read_lines(exp)
    lines.insert(6, canonical_json(forged))
    write_lines(exp, lines)


def drop_opening_line(exp: Path) -> None:
    """Truncate the ledger just before the opening (drop its last line)."""
    write_lines(exp, read_lines(exp)[:-1])


def drop_refit_and_opening(exp: Path) -> None:
    """Truncate the ledger before the refit (drop its last two lines)."""
    write_lines(exp, read_lines(exp)[:-2])


def rewrite_whole_chain(exp: Path) -> None:
    """Replace the ledger by a freshly recomputed, internally consistent chain (new times)."""
    items = entries(exp)
    for entry in items:
        entry["time"] = "2020-01-01T00:00:00.000000Z"
    rechain(items, 0)
    write_lines(exp, [canonical_json(e) for e in items])


def tear_final_newline(exp: Path) -> None:
    """Cut the ledger's last byte, the newline that ends the last append."""
    path = exp / "ledger.jsonl"
    path.write_bytes(path.read_bytes()[:-1])


def tear_half_line(exp: Path) -> None:
    """Cut the ledger in the middle of its last line, as a crash during an append would."""
    path = exp / "ledger.jsonl"
    data = path.read_bytes()
    last_start = data.rstrip(b"\n").rfind(b"\n") + 1
    path.write_bytes(data[: last_start + (len(data) - last_start) // 2])


def garble_middle_line(exp: Path) -> None:
    """Replace a middle ledger line by text that is not JSON."""
    lines = read_lines(exp)
    lines[4] = "this line was overwritten"
    write_lines(exp, lines)


def delete_ledger(exp: Path) -> None:
    """Delete the ledger file altogether."""
    (exp / "ledger.jsonl").unlink()


def append_second_seal(exp: Path) -> None:
    """Append a properly chained second seal event."""
    ledger.append(exp / "ledger.jsonl", "seal", entries(exp)[0]["details"])


def change_test_cell(exp: Path) -> None:
    """Change one feature value of one sealed test row."""
    def edit(frame: pd.DataFrame) -> pd.DataFrame:
        frame.loc[0, "mean_radius"] += 1.0
        return frame

    edit_parquet(exp / "sealed/test.parquet", edit)


def delete_test_file(exp: Path) -> None:
    """Delete the sealed test file."""
    (exp / "sealed/test.parquet").unlink()


def edit_manifest_hash(exp: Path) -> None:
    """Edit the dev.parquet hash recorded in sealed/manifest.json (dev.parquet itself is untouched)."""
    edit_json(exp / "sealed/manifest.json", lambda m: m["files"].__setitem__("dev.parquet", "0" * 64))


def overlap_dev_and_test(exp: Path) -> None:
    """Append one sealed test row to the development set."""
    test = pd.read_parquet(exp / "sealed/test.parquet")
    edit_parquet(exp / "dev.parquet", lambda dev: pd.concat([dev, test.iloc[:1]], ignore_index=True))


def drop_dev_row(exp: Path) -> None:
    """Remove one development row after the seal."""
    edit_parquet(exp / "dev.parquet", lambda dev: dev.iloc[1:].reset_index(drop=True))


def fold_names_test_row(exp: Path) -> None:
    """Put a sealed test row's key into the fold table."""
    key = sealed_keys(exp)[0]

    def edit(folds: pd.DataFrame) -> pd.DataFrame:
        folds.loc[0, "row_key"] = key
        return folds

    edit_parquet(exp / "folds.parquet", edit)


def move_row_between_folds(exp: Path) -> None:
    """After the fits, swap the folds of two rows (coverage stays valid, the table differs)."""
    def edit(folds: pd.DataFrame) -> pd.DataFrame:
        first = folds.index[folds["fold"] == 0][0]
        second = folds.index[folds["fold"] == 1][0]
        folds.loc[first, "fold"], folds.loc[second, "fold"] = 1, 0
        return folds

    edit_parquet(exp / "folds.parquet", edit)


def edit_fit_record(exp: Path) -> None:
    """Improve one validation score in a fit job's output."""
    def edit(fits: pd.DataFrame) -> pd.DataFrame:
        fits.loc[0, "val_accuracy"] = 1.0
        return fits

    edit_parquet(exp / "fits/tree/r0f0.parquet", edit)


def edit_choice_winner(exp: Path) -> None:
    """Name the runner-up as the winner in choice.json."""
    edit_json(exp / "choice.json", lambda c: c["winner"].__setitem__("candidate", c["runner_up"]["candidate"]))


def reorder_ranking(exp: Path) -> None:
    """Rewrite ranking.parquet with its rows in reverse order."""
    edit_parquet(exp / "ranking.parquet", lambda r: r.iloc[::-1].reset_index(drop=True))


def replace_model(exp: Path) -> None:
    """Replace model/model.skops with other bytes."""
    (exp / "model/model.skops").write_bytes(b"a different model")


def edit_verdict(exp: Path) -> None:
    """Improve the test accuracy written in final/verdict.json."""
    edit_json(exp / "final/verdict.json", lambda v: v["metrics"]["accuracy"].__setitem__("test", 0.999))


def delete_verdict(exp: Path) -> None:
    """Delete final/verdict.json."""
    (exp / "final/verdict.json").unlink()


def second_opening(exp: Path) -> None:
    """Open the sealed test set a second time with one recorded reason."""
    open_again(exp)


def hide_second_opening(exp: Path) -> None:
    """Open the test set again, then delete the first opening's line and recompute the chain after it."""
    open_again(exp)
    items = entries(exp)
    first = position_of(items, "open_test")
    del items[first]
    rechain(items, first)
    write_lines(exp, [canonical_json(e) for e in items])


def garble_manifest(exp: Path) -> None:
    """Overwrite sealed/manifest.json with text that is not JSON."""
    (exp / "sealed/manifest.json").write_text("{ this is not json", encoding="utf-8")


def garble_choice(exp: Path) -> None:
    """Overwrite choice.json with text that is not JSON."""
    (exp / "choice.json").write_text("{ this is not json", encoding="utf-8")


def garble_folds(exp: Path) -> None:
    """Overwrite folds.parquet with bytes that are not Parquet."""
    (exp / "folds.parquet").write_bytes(b"not a parquet file")


def strip_fit_detail(exp: Path) -> None:
    """Delete the 'family' field from one fit line (its hash is left as it was)."""
    lines = read_lines(exp)
    entry = json.loads(lines[3])
    del entry["details"]["family"]
    lines[3] = canonical_json(entry)
    write_lines(exp, lines)


# --- the table ---------------------------------------------------------------------------------------------------

CASES = [
    pytest.param(edit_ledger_value, ["edited-line"], [], id="ledger-value-edited"),
    pytest.param(edit_ledger_text, ["edited-line"], [], id="ledger-text-edited"),
    pytest.param(delete_middle_line, ["broken-link", "sequence-gap"], [], id="ledger-middle-line-deleted"),
    pytest.param(swap_two_lines, ["broken-link", "sequence-gap"], [], id="ledger-lines-swapped"),
    pytest.param(insert_forged_line, ["broken-link"], [], id="ledger-forged-line-inserted"),
    pytest.param(drop_opening_line, ["opening-unrecorded"], [], id="ledger-truncated-before-opening"),
    pytest.param(drop_refit_and_opening, ["model-unrecorded", "opening-unrecorded"], [],
                 id="ledger-truncated-before-refit"),
    pytest.param(rewrite_whole_chain, ["anchor-mismatch"], [], id="ledger-rewritten-consistently"),
    pytest.param(tear_final_newline, ["torn-append"], [], id="ledger-torn-newline"),
    pytest.param(tear_half_line, ["torn-append"], [], id="ledger-torn-half-line"),
    pytest.param(garble_middle_line, ["unreadable-line"], [], id="ledger-line-garbled"),
    pytest.param(delete_ledger, ["ledger-missing"], [], id="ledger-deleted"),
    pytest.param(append_second_seal, ["seal-count"], [], id="ledger-second-seal"),
    pytest.param(change_test_cell, ["test-changed"], [], id="test-cell-changed"),
    pytest.param(delete_test_file, ["test-changed"], [], id="test-file-deleted"),
    pytest.param(edit_manifest_hash, ["manifest-edited"], [], id="manifest-hash-edited"),
    pytest.param(edit_manifest_hash, ["manifest-edited"], ["dev-changed"], id="manifest-edit-not-blamed-on-dev"),
    pytest.param(overlap_dev_and_test, ["dev-test-overlap", "dev-changed"], [], id="dev-test-overlap"),
    pytest.param(drop_dev_row, ["dev-changed", "dev-keys-changed", "fold-coverage"], [], id="dev-row-dropped"),
    pytest.param(fold_names_test_row, ["fold-names-test-row"], [], id="fold-names-test-row"),
    pytest.param(move_row_between_folds, ["folds-changed", "fits-on-other-folds"], [], id="folds-changed-after-fits"),
    pytest.param(edit_fit_record, ["fits-changed"], [], id="fit-record-edited"),
    pytest.param(edit_choice_winner, ["choice-changed", "winner-mismatch"], [], id="choice-winner-edited"),
    pytest.param(reorder_ranking, ["ranking-changed"], [], id="ranking-edited"),
    pytest.param(replace_model, ["model-changed", "opened-other-model"], [], id="model-replaced"),
    pytest.param(edit_verdict, ["verdict-changed"], [], id="verdict-edited"),
    pytest.param(delete_verdict, ["verdict-missing"], [], id="verdict-deleted"),
    pytest.param(second_opening, ["opened-more-than-once"], [], id="opened-twice"),
    pytest.param(hide_second_opening, ["opened-more-than-once"], [], id="opened-twice-first-opening-erased"),
    pytest.param(garble_manifest, ["manifest-edited"], [], id="manifest-garbled"),
    pytest.param(garble_choice, ["choice-changed"], [], id="choice-garbled"),
    pytest.param(garble_folds, ["folds-changed"], [], id="folds-garbled"),
    pytest.param(strip_fit_detail, ["edited-line"], [], id="ledger-fit-detail-deleted"),
]


# --- tests -------------------------------------------------------------------------------------------------------

def test_untouched_experiment_passes(bc_copy: Path) -> None:
    exp = experiment(bc_copy)
    result = audit(str(exp))
    assert result["passed"] is True, result["problems"]
    assert result["problems"] == [] and result["test_set_opened"] == 1
    assert result["ledger_head"] == entries(exp)[-1]["hash"]
    cli = audit_cli(exp)
    assert cli.returncode == 0, cli.stdout + cli.stderr
    assert cli.stdout.startswith("PASS: experiment 'bc'") and "test set opened 1 time(s)" in cli.stdout
    from holdfast.headline import verdict_line

    assert f"  {verdict_line(exp)}" in cli.stdout.splitlines()  # the numbers the passing record vouches for


@pytest.mark.parametrize(("mutate", "expected", "absent"), CASES)
def test_each_tampering_is_named(bc_copy: Path, mutate: Mutation, expected: list[str], absent: list[str]) -> None:
    exp = experiment(bc_copy)
    assert audit(str(exp))["passed"] is True, "the copy must pass before it is changed"
    mutate(exp)
    result = audit(str(exp))
    found = codes(result)
    assert result["passed"] is False
    for code in expected:
        assert code in found, (code, result["problems"])
    for code in absent:
        assert code not in found, (code, result["problems"])
    assert all(p["message"] for p in result["problems"])


@pytest.mark.parametrize(("mutate", "expected"), [
    pytest.param(delete_middle_line, "broken-link", id="ledger-middle-line-deleted"),
    pytest.param(change_test_cell, "test-changed", id="test-cell-changed"),
    pytest.param(edit_choice_winner, "winner-mismatch", id="choice-winner-edited"),
    pytest.param(edit_verdict, "verdict-changed", id="verdict-edited"),
    pytest.param(second_opening, "opened-more-than-once", id="opened-twice"),
])
def test_cli_fails_and_prints_every_reason(bc_copy: Path, mutate: Mutation, expected: str) -> None:
    exp = experiment(bc_copy)
    mutate(exp)
    result = audit(str(exp))
    cli = audit_cli(exp)
    assert cli.returncode == 1, cli.stdout + cli.stderr
    assert cli.stdout.startswith("FAIL: experiment 'bc'")
    printed = [line for line in cli.stdout.splitlines() if line.startswith("  - [")]
    assert len(printed) == len(result["problems"])
    for problem in result["problems"]:
        assert f"  - [{problem['code']}] {problem['message']}" in printed
    assert f"[{expected}]" in cli.stdout
    assert not [line for line in cli.stdout.splitlines() if line.startswith("  winner ")]  # vouches for nothing


def test_cli_refuses_a_folder_that_is_no_experiment(tmp_path: Path) -> None:
    cli = audit_cli(tmp_path)
    assert cli.returncode == 2
    assert cli.stderr.strip().startswith("holdfast: error:") and "results/<experiment>" in cli.stderr


def test_opened_twice_reports_the_recorded_reason(bc_copy: Path) -> None:
    exp = experiment(bc_copy)
    second_opening(exp)
    result = audit(str(exp))
    assert result["test_set_opened"] == 2
    [problem] = result["problems"]
    assert problem["code"] == "opened-more-than-once"
    assert "opened 2 times" in problem["message"] and "one more look" in problem["message"]
