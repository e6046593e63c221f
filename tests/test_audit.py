"""The audit names every tampering: each reason comes from a real edit of a real finished experiment's files."""

from __future__ import annotations

import json
import shutil
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

Mutation = Callable[[Path], Path | None]  # a new path when it moves the experiment


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
    at = position_of(entries(exp), "assign_folds")
    entry = json.loads(lines[at])
    entry["details"]["rows"] += 1
    lines[at] = canonical_json(entry)
    write_lines(exp, lines)


def edit_ledger_text(exp: Path) -> None:
    """Edit the raw text of a ledger line (k 3 -> 4) with a text editor."""
    lines = read_lines(exp)
    at = position_of(entries(exp), "assign_folds")
    assert '"k":3' in lines[at]
    lines[at] = lines[at].replace('"k":3', '"k":4')
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
    """Truncate the ledger just before the opening (drop its two lines: the write-ahead one and the verdict's)."""
    write_lines(exp, read_lines(exp)[:position_of(entries(exp), "opening_started")])


def drop_refit_and_opening(exp: Path) -> None:
    """Truncate the ledger before the refit (drop it and the opening's lines)."""
    write_lines(exp, read_lines(exp)[:position_of(entries(exp), "refit")])


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


def delete_row_hashes(exp: Path) -> None:
    """Delete the sealed rows' hash file (what keeps other experiments off the unopened test rows)."""
    (exp / "sealed/test_rows.parquet").unlink()


def swap_row_hashes(exp: Path) -> None:
    """Replace the sealed rows' hashes with others (a file that would let other experiments fit on them)."""
    edit_parquet(exp / "sealed/test_rows.parquet", lambda frame: frame.assign(row_hash=frame["row_hash"] + 1))


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


# --- mutations of files the ledger records a hash for, and of what those files say ----------------------------------

def forge_record(exp: Path, event: str, scope: str = "main", of: dict[str, Any] | None = None,
                 **changes: Any) -> None:
    """Append a properly chained copy of the latest ``event`` of ``scope`` (whose details include ``of``) with
    ``changes``, as a forger would."""
    items = [e for e in entries(exp) if e["event"] == event and e["details"].get("scope", "main") == scope
             and (of or {}).items() <= e["details"].items()]
    ledger.append(exp / "ledger.jsonl", event, {**items[-1]["details"], **changes})


def sha(path: Path) -> str:
    """The sha256 of a file, as the ledger records it."""
    from holdfast._io import sha256_file

    return sha256_file(path)


def edit_leakage(exp: Path) -> None:
    """Rewrite the leakage report's summary to say all is well."""
    edit_json(exp / "leakage.json", lambda r: r.__setitem__("summary", "no leakage found"))


def delete_folds_summary(exp: Path) -> None:
    """Delete folds_summary.parquet."""
    (exp / "folds_summary.parquet").unlink()


def edit_oof(exp: Path) -> None:
    """Change the out-of-fold predictions of one fit job (they feed the BBC correction)."""
    def edit(oof: pd.DataFrame) -> pd.DataFrame:
        return oof.iloc[::-1].reset_index(drop=True)

    edit_parquet(exp / "oof/logistic/r0f1.parquet", edit)


def edit_card(exp: Path) -> None:
    """Change the model card's recorded training rows."""
    edit_json(exp / "model/provenance.json", lambda c: c["trained_on"].__setitem__("rows", 10_000))


def edit_archive(exp: Path) -> None:
    """Improve the test score in the archived verdict of the first opening."""
    edit_json(exp / "final/openings/1.json", lambda v: v["metrics"]["accuracy"].__setitem__("test", 0.999))


def delete_archive(exp: Path) -> None:
    """Delete the archived verdict of the first opening."""
    (exp / "final/openings/1.json").unlink()


def invent_nested_summary(exp: Path) -> None:
    """Put a nested summary into an experiment that never ran nested CV."""
    (exp / "nested").mkdir()
    (exp / "nested/summary.json").write_text(json.dumps({
        "outer_folds": 5, "winner_counts": {"16b25da3ac": 5}, "winners": [],
        "metrics": {"accuracy": {"mean": 0.99, "sd": 0.001, "se": 0.0005, "se_corrected": 0.001,
                                 "by_outer_fold": [0.99] * 5}}}, indent=2), encoding="utf-8")


def invent_fit_file(exp: Path) -> None:
    """Add a fit file for a family that never ran (a copy of another family's)."""
    (exp / "fits/boost").mkdir()
    shutil.copy(exp / "fits/tree/r0f0.parquet", exp / "fits/boost/r0f0.parquet")


def rename_folder(exp: Path) -> Path:
    """Rename results/bc to results/bc-final, as if it were another experiment."""
    target = exp.with_name("bc-final")
    exp.rename(target)
    return target


def forge_record_outside(exp: Path) -> None:
    """Append a fit record whose family names a path outside the experiment."""
    forge_record(exp, "fit", family="../../elsewhere")


def choice_names_runner_up(exp: Path) -> None:
    """Name the runner-up as winner with its true ranking numbers, and record the new choice at a forged tally."""
    choice = json.loads((exp / "choice.json").read_text())
    ranking = pd.read_parquet(exp / "ranking.parquet")
    row = ranking[(ranking["metric"] == choice["metric"])
                  & (ranking["candidate"] == choice["runner_up"]["candidate"])].iloc[0]
    old = choice["winner"]
    from holdfast.candidates import candidate_id

    params = json.loads(row["params"])
    spec = {**old["spec"], "params": params, "id": row["candidate"]}  # the runner-up is of the winner's family
    assert candidate_id(spec["estimator"], spec["preprocess"], params) == row["candidate"]
    choice["winner"] = {"candidate": row["candidate"], "family": row["family"], "mean": float(row["mean"]),
                        "se": float(row["se"]), "se_corrected": float(row["se_corrected"]),
                        "folds": int(row["folds"]), "spec": spec}
    choice["runner_up"] = {"candidate": old["candidate"], "family": old["family"], "mean": old["mean"],
                           "se": old["se"]}
    edit_json(exp / "choice.json", lambda c: c.update(choice))
    forge_record(exp, "tally", winner=row["candidate"], choice_sha256=sha(exp / "choice.json"))


def choice_improves_winner_mean(exp: Path) -> None:
    """Improve the winner's CV mean in choice.json and record the new choice at a forged tally."""
    edit_json(exp / "choice.json", lambda c: c["winner"].__setitem__("mean", 0.999))
    forge_record(exp, "tally", choice_sha256=sha(exp / "choice.json"))


def choice_claims_one_se_rule(exp: Path) -> None:
    """Say the choice followed the one-standard-error rule, without its settings, at a forged tally."""
    def edit(choice: dict[str, Any]) -> None:
        choice["rule"] = "one_standard_error"
        choice.pop("rule_settings", None)

    edit_json(exp / "choice.json", edit)
    forge_record(exp, "tally", rule="one_standard_error", choice_sha256=sha(exp / "choice.json"))


def choice_breaks_one_se_rule(exp: Path) -> None:
    """Declare the one-SE rule with settings under which it picks another candidate than the recorded winner."""
    def edit(choice: dict[str, Any]) -> None:
        choice["rule"] = "one_standard_error"
        choice["rule_settings"] = {"family_order": ["logistic", "tree"],
                                   "simplicity": {"logistic": {"param": "C", "simpler": "lower"},
                                                  "tree": {"param": "max_depth", "simpler": "lower"}}}

    edit_json(exp / "choice.json", edit)
    forge_record(exp, "tally", rule="one_standard_error", choice_sha256=sha(exp / "choice.json"))


def winner_spec_changed(exp: Path) -> None:
    """Change the winner's parameters in its spec (what the refit builds), keeping its id; forge the tally."""
    edit_json(exp / "choice.json", lambda c: c["winner"]["spec"]["params"].__setitem__("C", 1000.0))
    forge_record(exp, "tally", choice_sha256=sha(exp / "choice.json"))


def ranking_improves_a_loser(exp: Path) -> None:
    """Raise a losing candidate's mean in ranking.parquet (still below the winner); forge the tally's record."""
    def edit(ranking: pd.DataFrame) -> pd.DataFrame:
        last = ranking.index[(ranking["metric"] == "accuracy") & (ranking["rank"] == ranking["rank"].max())][0]
        ranking.loc[last, "mean"] += 0.01
        return ranking

    edit_parquet(exp / "ranking.parquet", edit)
    forge_record(exp, "tally", ranking_sha256=sha(exp / "ranking.parquet"))


def garbage_fit_file_with_record(exp: Path) -> None:
    """Overwrite a fit file with bytes that are not Parquet and record their hash at a forged fit event."""
    (exp / "fits/tree/r0f0.parquet").write_bytes(b"not a parquet file")
    forge_record(exp, "fit", of={"family": "tree", "repeat": 0, "fold": 0},
                 fits_sha256=sha(exp / "fits/tree/r0f0.parquet"))


# --- nested experiments: every scope's files are recorded too -----------------------------------------------------

def nested_exp(workdir: Path) -> Path:
    """The finished nested experiment inside a copied work folder."""
    return workdir / "results" / "nested-demo"


def edit_nested_summary(exp: Path) -> None:
    """Improve the nested estimate in nested/summary.json."""
    edit_json(exp / "nested/summary.json", lambda s: s["metrics"]["roc_auc"].__setitem__("mean", 0.99))


def forge_nested_summary(exp: Path) -> None:
    """Improve the nested estimate and record the new summary at a forged nested_summary event."""
    edit_nested_summary(exp)
    forge_record(exp, "nested_summary", scope="nested", summary_sha256=sha(exp / "nested/summary.json"))


def delete_nested_summary(exp: Path) -> None:
    """Delete nested/summary.json."""
    (exp / "nested/summary.json").unlink()


def edit_outer_score(exp: Path) -> None:
    """Improve one outer fold's score file."""
    edit_json(exp / "nested/o1/score.json", lambda s: s["scores"].__setitem__("roc_auc", 0.99))


def forge_outer_score_winner(exp: Path) -> None:
    """Say outer fold 1 was won by another candidate, recording the score file at a forged score_outer event."""
    ranking = pd.read_parquet(exp / "nested/o1/ranking.parquet")

    def edit(score: dict[str, Any]) -> None:
        score["winner"] = sorted(set(ranking["candidate"]) - {score["winner"]})[0]

    edit_json(exp / "nested/o1/score.json", edit)
    forge_record(exp, "score_outer", scope="o1", score_sha256=sha(exp / "nested/o1/score.json"))


def edit_inner_fit(exp: Path) -> None:
    """Improve one validation score inside an outer fold's inner selection."""
    def edit(fits: pd.DataFrame) -> pd.DataFrame:
        fits.loc[0, "val_roc_auc"] = 1.0
        return fits

    edit_parquet(exp / "nested/o0/fits/tree/r0f1.parquet", edit)


def edit_inner_oof(exp: Path) -> None:
    """Reorder one inner fit job's out-of-fold predictions."""
    edit_parquet(exp / "nested/o1/oof/logistic/r0f2.parquet", lambda o: o.iloc[::-1].reset_index(drop=True))


def edit_outer_folds(exp: Path) -> None:
    """Move one row to the other outer fold."""
    def edit(folds: pd.DataFrame) -> pd.DataFrame:
        folds.loc[0, "fold"] = 1 - folds.loc[0, "fold"]
        return folds

    edit_parquet(exp / "nested/outer_folds.parquet", edit)


def edit_inner_choice(exp: Path) -> None:
    """Name another winner in an outer fold's choice."""
    edit_json(exp / "nested/o0/choice.json",
              lambda c: c["winner"].__setitem__("candidate", c["runner_up"]["candidate"]))


def replace_inner_model(exp: Path) -> None:
    """Replace an outer fold's refit model."""
    (exp / "nested/o1/model/model.skops").write_bytes(b"a different model")


def delete_inner_card(exp: Path) -> None:
    """Delete an outer fold's model card."""
    (exp / "nested/o0/model/provenance.json").unlink()


def edit_inner_leakage(exp: Path) -> None:
    """Rewrite an outer fold's leakage report."""
    edit_json(exp / "nested/o0/leakage.json", lambda r: r.__setitem__("summary", "no leakage found"))


def forge_inner_one_se_choice(exp: Path) -> None:
    """In outer fold 0, name the candidate the one-SE rule did not pick, and forge that scope's tally record."""
    choice = json.loads((exp / "nested/o0/choice.json").read_text())
    ranking = pd.read_parquet(exp / "nested/o0/ranking.parquet")
    rows = ranking[(ranking["metric"] == choice["metric"]) & (ranking["candidate"] != choice["winner"]["candidate"])]
    row = rows.sort_values("rank").iloc[0]
    choice["winner"].update(candidate=row["candidate"], family=row["family"], mean=float(row["mean"]),
                            se=float(row["se"]), se_corrected=float(row["se_corrected"]), folds=int(row["folds"]))
    edit_json(exp / "nested/o0/choice.json", lambda c: c.update(choice))
    forge_record(exp, "tally", scope="o0", winner=row["candidate"], choice_sha256=sha(exp / "nested/o0/choice.json"))


# --- the table ---------------------------------------------------------------------------------------------------

CASES = [
    pytest.param(edit_ledger_value, ["edited-line"], [], id="ledger-value-edited"),
    pytest.param(edit_ledger_text, ["edited-line"], [], id="ledger-text-edited"),
    pytest.param(delete_middle_line, ["broken-link", "sequence-gap"], [], id="ledger-middle-line-deleted"),
    pytest.param(swap_two_lines, ["broken-link", "sequence-gap"], [], id="ledger-lines-swapped"),
    pytest.param(insert_forged_line, ["broken-link"], [], id="ledger-forged-line-inserted"),
    pytest.param(drop_opening_line, ["opening-unrecorded", "opening-records-disagree"], [],
                 id="ledger-truncated-before-opening"),
    pytest.param(drop_refit_and_opening, ["model-unrecorded", "opening-unrecorded", "opening-records-disagree"], [],
                 id="ledger-truncated-before-refit"),
    pytest.param(rewrite_whole_chain, ["anchor-mismatch"], [], id="ledger-rewritten-consistently"),
    pytest.param(tear_final_newline, ["torn-append"], [], id="ledger-torn-newline"),
    pytest.param(tear_half_line, ["torn-append"], [], id="ledger-torn-half-line"),
    pytest.param(garble_middle_line, ["unreadable-line"], [], id="ledger-line-garbled"),
    pytest.param(delete_ledger, ["ledger-missing"], [], id="ledger-deleted"),
    pytest.param(append_second_seal, ["seal-count"], [], id="ledger-second-seal"),
    pytest.param(change_test_cell, ["test-changed"], [], id="test-cell-changed"),
    pytest.param(delete_test_file, ["test-missing"], [], id="test-file-deleted"),
    pytest.param(delete_row_hashes, ["test-rows-missing"], [], id="row-hashes-deleted"),
    pytest.param(swap_row_hashes, ["test-rows-changed"], [], id="row-hashes-changed"),
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
    pytest.param(edit_leakage, ["leakage-changed"], [], id="leakage-report-edited"),
    pytest.param(delete_folds_summary, ["folds-summary-missing"], [], id="folds-summary-deleted"),
    pytest.param(edit_oof, ["oof-changed"], [], id="out-of-fold-predictions-edited"),
    pytest.param(edit_card, ["provenance-changed"], [], id="model-provenance-edited"),
    pytest.param(edit_archive, ["opening-archive-changed"], [], id="archived-verdict-edited"),
    pytest.param(delete_archive, ["opening-archive-missing"], [], id="archived-verdict-deleted"),
    pytest.param(invent_nested_summary, ["nested-summary-unrecorded"], [], id="nested-summary-invented"),
    pytest.param(invent_fit_file, ["fits-unrecorded"], ["fits-changed"], id="fit-file-invented"),
    pytest.param(rename_folder, ["folder-renamed"], [], id="folder-renamed"),
    pytest.param(forge_record_outside, ["record-names-no-file"], [], id="ledger-record-names-outside-path"),
    pytest.param(choice_names_runner_up, ["choice-breaks-rule", "winner-mismatch"],
                 ["choice-changed", "choice-not-from-ranking"], id="choice-forged-with-record"),
    pytest.param(choice_improves_winner_mean, ["choice-not-from-ranking"], ["choice-changed", "choice-breaks-rule"],
                 id="choice-winner-mean-forged-with-record"),
    pytest.param(choice_claims_one_se_rule, ["choice-rule-unverifiable"], ["choice-changed"],
                 id="choice-rule-without-settings"),
    pytest.param(choice_breaks_one_se_rule, ["choice-breaks-rule"], ["choice-changed", "choice-not-from-ranking"],
                 id="choice-breaks-declared-one-se-rule"),
    pytest.param(winner_spec_changed, ["winner-spec-mismatch"], ["choice-changed"], id="winner-spec-edited"),
    pytest.param(ranking_improves_a_loser, ["ranking-disagrees-with-fits"], ["ranking-changed", "choice-breaks-rule"],
                 id="ranking-forged-with-record"),
    pytest.param(garbage_fit_file_with_record, ["check-failed"], ["fits-changed", "oof-changed"],
                 id="garbage-fit-file-forged"),
]

NESTED_CASES = [
    pytest.param(edit_nested_summary, ["nested-summary-changed"], [], id="nested-summary-edited"),
    pytest.param(forge_nested_summary, ["nested-summary-disagrees"], ["nested-summary-changed"],
                 id="nested-summary-forged-with-record"),
    pytest.param(delete_nested_summary, ["nested-summary-missing"], [], id="nested-summary-deleted"),
    pytest.param(edit_outer_score, ["nested-score-changed"], [], id="outer-score-edited"),
    pytest.param(forge_outer_score_winner, ["nested-score-disagrees", "nested-summary-disagrees"],
                 ["nested-score-changed"], id="outer-score-forged-with-record"),
    pytest.param(edit_inner_fit, ["fits-changed"], [], id="inner-fit-edited"),
    pytest.param(edit_inner_oof, ["oof-changed"], [], id="inner-oof-edited"),
    pytest.param(edit_outer_folds, ["folds-changed"], [], id="outer-folds-edited"),
    pytest.param(edit_inner_choice, ["choice-changed"], [], id="inner-choice-edited"),
    pytest.param(replace_inner_model, ["model-changed"], [], id="inner-model-replaced"),
    pytest.param(delete_inner_card, ["provenance-missing"], [], id="inner-provenance-deleted"),
    pytest.param(edit_inner_leakage, ["leakage-changed"], [], id="inner-leakage-report-edited"),
    pytest.param(forge_inner_one_se_choice, ["choice-breaks-rule"], ["choice-changed"],
                 id="inner-one-se-choice-forged-with-record"),
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

    assert f"  {verdict_line(exp, result['verified'])}" in cli.stdout.splitlines()  # what the record vouches for
    assert result["leftovers"] == [] and "note: '" not in cli.stdout  # counted, not printed whatever is there


def test_files_an_interrupted_write_left_are_named_as_notes(bc_copy: Path) -> None:
    """A temporary file of an atomic write (a step killed while writing) and a history index a tally wrote but did
    not record are read by nothing, so the audit still passes; it names each one, so that every file of the folder
    is accounted for. A recorded index is not called a leftover."""
    exp = experiment(bc_copy)
    (exp / "fits" / ".r0f0.parquet.k1ll3d.tmp").parent.mkdir(parents=True, exist_ok=True)
    (exp / "fits" / ".r0f0.parquet.k1ll3d.tmp").write_bytes(b"half a file")
    (exp / "history" / "index.next.json").write_text("{}", encoding="utf-8")
    result = audit(str(exp))
    assert result["passed"] is True, result["problems"]
    assert [left["file"] for left in result["leftovers"]] == ["fits/.r0f0.parquet.k1ll3d.tmp",
                                                               "history/index.next.json"]
    notes = [line for line in audit_cli(exp).stdout.splitlines() if line.startswith("  note: ")]
    assert notes == [
        "  note: 'fits/.r0f0.parquet.k1ll3d.tmp' is a temporary file of a write that stopped before it finished; no "
        "step reads it, and that step's next write removes it",
        "  note: 'history/index.next.json' is a history index a tally wrote but stopped before recording; no step "
        "reads it, and the next tally replaces it"]
    # The index the latest tally recorded, waiting to be moved into place, is not a leftover.
    (exp / "history" / "index.next.json").write_bytes((exp / "history" / "index.json").read_bytes())
    assert [left["file"] for left in audit(str(exp))["leftovers"]] == ["fits/.r0f0.parquet.k1ll3d.tmp"]


@pytest.mark.parametrize(("mutate", "expected", "absent"), CASES)
def test_each_tampering_is_named(bc_copy: Path, mutate: Mutation, expected: list[str], absent: list[str]) -> None:
    exp = experiment(bc_copy)
    assert audit(str(exp))["passed"] is True, "the copy must pass before it is changed"
    exp = mutate(exp) or exp
    result = audit(str(exp))
    found = codes(result)
    assert result["passed"] is False and result["state"] == "fail"
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


@pytest.mark.parametrize(("mutate", "expected", "absent"), NESTED_CASES)
def test_each_nested_tampering_is_named(nested_copy: Path, mutate: Mutation, expected: list[str],
                                        absent: list[str]) -> None:
    exp = nested_exp(nested_copy)
    assert audit(str(exp))["passed"] is True, "the copy must pass before it is changed"
    mutate(exp)
    result = audit(str(exp))
    found = codes(result)
    assert result["passed"] is False
    for code in expected:
        assert code in found, (code, result["problems"])
    for code in absent:
        assert code not in found, (code, result["problems"])


def _recorded_hashes(details: Any, trail: tuple[str, ...] = ()) -> list[tuple[str, ...]]:
    """Every place in an event's details that holds a file or key hash (keys ending in _sha256, seal 'files')."""
    found = []
    if isinstance(details, dict):
        for key, value in details.items():
            here = (*trail, key)
            if key.endswith("_sha256") or (trail == ("files",) and isinstance(value, str)):
                found.append(here)
            found += _recorded_hashes(value, here)
    return found


@pytest.mark.parametrize("which", ["bc", "nested"])
def test_every_hash_in_a_real_ledger_is_checked_or_says_why_not(which: str, request: pytest.FixtureRequest) -> None:
    from holdfast.recorded import NOT_FILES, RECORDED

    workdir = request.getfixturevalue("bc_finished" if which == "bc" else "nested_finished")
    exp = experiment(workdir) if which == "bc" else nested_exp(workdir)
    checked = {(row.event, row.key) for row in RECORDED}
    seen = set()
    for entry in entries(exp):
        for key in _recorded_hashes(entry["details"]):
            seen.add((entry["event"], key))
            assert (entry["event"], key) in checked or (entry["event"], key) in NOT_FILES, (entry["event"], key)
    result = audit(str(exp))
    assert result["passed"], result["problems"]
    # Every file named by a hash was verified: the evidence files, not only the ones the headline reads.
    on_disk = {p.relative_to(exp).as_posix() for p in exp.rglob("*") if p.is_file()}
    unverified = on_disk - set(result["verified"])
    # Not evidence, so no ledger line names them: logs and pictures; the checked config copy that holdfast run hands
    # Snakemake (the ledger records the config's own fingerprint); the opening request (its hash is named, see
    # recorded.NOT_FILES); the receipt, audit.json and the report, which are made from an audit, not checked by one;
    # the learning-curve cache (put back only when the ledger records its bytes from a real fit, see learning.py).
    assert all(name.startswith(("logs/", "plots/", "nested/o0/plots/", "nested/o1/plots/", "report_figures/",
                                "diagnostics/learning/kept/")) or name.endswith("/.snakemake_timestamp")
               or name.endswith(".lock")
               or name in ("ledger.jsonl", "audit.json", "sealed/manifest.json", "config.json", "final/request.json",
                           "receipt.txt", "report.html") for name in unverified), sorted(unverified)


@pytest.mark.parametrize(("mutate", "expected"), [
    pytest.param(edit_verdict, "verdict-changed", id="verdict-edited"),
    pytest.param(invent_nested_summary, "nested-summary-unrecorded", id="nested-summary-invented"),
])
def test_failing_audit_prints_no_numbers(bc_copy: Path, mutate: Mutation, expected: str) -> None:
    exp = experiment(bc_copy)
    mutate(exp)
    cli = audit_cli(exp)
    assert cli.returncode == 1 and f"[{expected}]" in cli.stdout, cli.stdout + cli.stderr
    shown = [line for line in cli.stdout.splitlines() if line.startswith(("  winner ", "  nested CV"))]
    assert shown == []


def test_headline_reads_only_files_the_audit_verified(bc_copy: Path) -> None:
    from holdfast.headline import UnverifiedFileError, lines, verdict_line

    exp = experiment(bc_copy)
    result = audit(str(exp))
    assert result["passed"] and "final/verdict.json" in result["verified"]
    assert lines(exp, result["verified"]) == [verdict_line(exp, result["verified"])]
    without = {k: v for k, v in result["verified"].items() if k != "choice.json"}
    with pytest.raises(UnverifiedFileError, match=r"choice\.json' was not verified by this audit"):
        verdict_line(exp, without)
    edit_verdict(exp)  # after the audit: the bytes it verified are gone
    with pytest.raises(UnverifiedFileError, match=r"verdict\.json' changed after the audit verified it"):
        lines(exp, result["verified"])


def test_closing_lines_come_from_an_audit_made_at_the_end_of_the_run(bc_copy: Path) -> None:
    """A verdict edited after the opening, its old time kept, then `holdfast run` (the experiment is closed: no
    step runs): the closing lines come from an audit made then, FAIL, with no numbers, and audit.json is rewritten."""
    import os

    from conftest import run_cli

    exp = experiment(bc_copy)
    verdict = exp / "final/verdict.json"
    stat = verdict.stat()
    low, _ = json.loads(verdict.read_text())["metrics"]["accuracy"]["interval"]
    edit_json(verdict, lambda v: v["metrics"]["accuracy"].__setitem__("test", low / 2))  # outside its own interval
    os.utime(verdict, ns=(stat.st_atime_ns, stat.st_mtime_ns))
    result = run_cli(bc_copy, "run", "config.yaml", "--cores", "2")
    assert result.returncode == 1, result.stdout[-3000:] + result.stderr[-3000:]
    closing = [line for line in result.stdout.splitlines() if line.startswith("holdfast: ")]
    assert "holdfast: experiment 'bc': audit FAIL: verdict-changed (test set opened 1 time(s)); details: holdfast " \
           "audit results/bc" in closing, result.stdout[-3000:]
    assert not any(line.startswith("holdfast: winner") for line in closing)  # no numbers under a failing audit
    stored = json.loads((exp / "audit.json").read_text())
    assert stored["state"] == "fail" and codes(stored) == ["verdict-changed"]  # rewritten by that audit


# --- a run in progress ---------------------------------------------------------------------------------------------

HOLD = """
import sys
from holdfast import ledger
with ledger.locked(sys.argv[1], shared=True):
    print("holding", flush=True)
    sys.stdin.readline()
"""


def test_audit_while_a_step_holds_the_experiment_says_in_progress(bc_copy: Path) -> None:
    """Another process holds the experiment as a step does (shared lock): no false FAIL, a distinct exit code."""
    from holdfast.cli import AUDIT_IN_PROGRESS
    from holdfast.layout import STEPS_LOCK

    exp = experiment(bc_copy)
    (exp / "choice.json").write_text("{ half written", encoding="utf-8")  # what a step in mid-write can leave
    holder = subprocess.Popen([sys.executable, "-c", HOLD, str(exp / STEPS_LOCK)], stdin=subprocess.PIPE,
                              stdout=subprocess.PIPE, text=True, env={"PYTHONPATH": str(REPO / "scripts")})
    try:
        assert holder.stdout is not None and holder.stdout.readline().strip() == "holding"
        result = audit(str(exp))
        assert result["state"] == "in progress" and result["problems"] == [] and result["passed"] is False
        assert result["verified"] == {}
        cli = audit_cli(exp)
        assert cli.returncode == AUDIT_IN_PROGRESS == 75, cli.stdout + cli.stderr
        assert cli.stdout.startswith("IN PROGRESS: experiment 'bc': a run is in progress")
    finally:
        holder.communicate("done\n", timeout=60)
    assert holder.returncode == 0
    after = audit(str(exp))
    assert after["state"] == "fail" and "choice-changed" in codes(after)  # once free, the same files fail


def test_audit_during_a_real_run_says_in_progress_and_the_run_ends_with_a_fresh_pass(bc_workdir: Path) -> None:
    """Freeze a real run (``holdfast run``, its worker in the same process group) while one of its steps holds the
    experiment; audit; let it finish."""
    import os
    import signal
    import time

    from holdfast import ledger
    from holdfast.layout import STEPS_LOCK

    exp = experiment(bc_workdir)
    cmd = [sys.executable, "-m", "holdfast", "run", "config.yaml", "--cores", "2"]
    run = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, stdin=subprocess.DEVNULL,
                           cwd=bc_workdir, env={**os.environ, "PYTHONPATH": str(REPO / "scripts")},
                           start_new_session=True)

    def held() -> bool:  # by a step after the seal (before it, the folder is not an experiment yet)
        if not (exp / "ledger.jsonl").is_file():
            return False
        with ledger.locked_if_free(exp / STEPS_LOCK) as free:
            return not free

    deadline = time.monotonic() + 600
    frozen = False
    try:
        while not frozen:
            assert run.poll() is None and time.monotonic() < deadline, "no step was ever seen holding the experiment"
            if held():
                os.killpg(run.pid, signal.SIGSTOP)
                frozen = held()  # the step may have finished between the look and the stop
                if not frozen:
                    os.killpg(run.pid, signal.SIGCONT)
            time.sleep(0.01)
        cli = audit_cli(exp)
    finally:
        os.killpg(run.pid, signal.SIGCONT)
    out, err = run.communicate(timeout=900)
    assert cli.returncode == 75 and cli.stdout.startswith("IN PROGRESS"), cli.stdout + cli.stderr
    assert run.returncode == 0, err[-3000:]
    closing = [line for line in out.splitlines() if line.startswith("holdfast: ")]
    assert closing[-2].startswith("holdfast: experiment 'bc': audit PASS (test set opened 0 time(s))"), out[-3000:]
    assert closing[-1].startswith("holdfast: ledger head ")
    assert any(line.startswith("holdfast: winner ") for line in closing)
    assert json.loads((exp / "audit.json").read_text())["state"] == "pass"  # written by the run's closing audit


def test_a_one_se_choice_other_than_the_best_mean_is_recognised(bc_finished: Path, tmp_path: Path) -> None:
    """The real tally, run under the one-SE rule on the finished experiment's fits, picks a simpler candidate than
    the best mean; the audit's reading of the rule agrees with it (and its own check then passes)."""
    from conftest import small_classification_config
    from holdfast.audit import _choice_against_ranking
    from holdfast.candidates import expand
    from holdfast.config import validate
    from holdfast.tally import tally

    exp = experiment(bc_finished)
    candidates = {c["id"]: c for family in expand(validate(small_classification_config())).values() for c in family}
    simplicity = {"logistic": {"param": "C", "simpler": "lower"}, "tree": {"param": "max_depth", "simpler": "lower"}}
    fits = sorted(str(p) for p in (exp / "fits").rglob("*.parquet"))
    oof = sorted(str(p) for p in (exp / "oof").rglob("*.parquet"))
    choice = tally(fits, oof, str(exp / "dev.parquet"), candidates, ["accuracy", "roc_auc"],
                   {"rule": "one_standard_error", "family_order": ["logistic", "tree"], "bootstrap": 200, "seed": 0},
                   simplicity, "target", "classification", 3, str(tmp_path / "ranking.parquet"),
                   str(tmp_path / "choice.json"), str(tmp_path / "ranking.png"), str(tmp_path / "ledger.jsonl"),
                   str(exp / "folds.parquet"))
    assert choice["winner"]["candidate"] != choice["best_mean"]["candidate"]  # the rule did pick another
    assert choice["rule_settings"] == {"family_order": ["logistic", "tree"], "simplicity": simplicity}
    problems: list[Any] = []
    recorded = ledger.read(tmp_path / "ledger.jsonl")[-1]["details"]
    _choice_against_ranking(tmp_path / "choice.json", json.loads((tmp_path / "choice.json").read_text()),
                            pd.read_parquet(tmp_path / "ranking.parquet"), recorded, problems)
    assert problems == []
    # The recorded settings are what the check applies: with higher C called simpler, the rule keeps the best.
    edit_json(tmp_path / "choice.json",
              lambda c: c["rule_settings"]["simplicity"]["logistic"].__setitem__("simpler", "higher"))
    _choice_against_ranking(tmp_path / "choice.json", json.loads((tmp_path / "choice.json").read_text()),
                            pd.read_parquet(tmp_path / "ranking.parquet"), recorded, problems)
    assert [p.code for p in problems] == ["choice-breaks-rule"]
    assert f"picks {choice['best_mean']['candidate']}" in problems[0].message
