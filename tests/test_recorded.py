"""Every hash a step records is in the audit's table, and the experiment's lock tells a running step apart."""

from __future__ import annotations

import ast
import os
import subprocess
import sys
from pathlib import Path

import pytest
from conftest import REPO
from holdfast import ledger
from holdfast.recorded import NOT_FILES, RECORDED, Recorded, file_of, scope_folder


def appended_hashes() -> list[tuple[str, str, str]]:
    """(module, event, key) of every `*_sha256` detail written by a `ledger.append(...)` call in the package."""
    found = []
    for module in sorted((REPO / "scripts" / "holdfast").glob("*.py")):
        for node in ast.walk(ast.parse(module.read_text(encoding="utf-8"))):
            if not (isinstance(node, ast.Call) and isinstance(node.func, ast.Attribute) and node.func.attr == "append"
                    and isinstance(node.func.value, ast.Name) and node.func.value.id == "ledger"):
                continue
            event, details = node.args[1], node.args[2]
            assert isinstance(event, ast.Constant) and isinstance(details, ast.Dict), (module.name, node.lineno)
            found += [(module.name, event.value, key.value) for key in details.keys
                      if isinstance(key, ast.Constant) and key.value.endswith("_sha256")]
    return found


def row(event: str, *key: str) -> Recorded:
    """The table's row for one recorded hash."""
    [found] = [r for r in RECORDED if r.event == event and r.key == key and "verdict.json" not in r.path]
    return found


def test_every_appended_hash_names_a_checked_file_or_says_why_not() -> None:
    covered = {(r.event, r.key) for r in RECORDED} | set(NOT_FILES)
    hashes = appended_hashes()
    assert {event for _, event, _ in hashes} == {"seal", "assign_folds", "fit", "round", "tally", "refit", "open_test",
                                                 "score_outer", "nested_summary", "learning_curve", "diagnostics",
                                                 "learning_summary"}
    missing = [h for h in hashes if (h[1], (h[2],)) not in covered]
    assert missing == [], "add these to recorded.RECORDED (or NOT_FILES, with the reason)"
    # The seal also records the sealed files' hashes and the row-key digests in blocks, key by key.
    assert {("seal", ("files", "test.parquet")), ("seal", ("files", "dev.parquet")), ("seal", ("keys", "dev_sha256")),
            ("seal", ("keys", "test_sha256"))} <= covered


@pytest.mark.parametrize(("details", "event", "key", "expected"), [
    ({"scope": "main", "family": "tree", "repeat": 0, "fold": 2}, "fit", "fits_sha256", "fits/tree/r0f2.parquet"),
    ({"scope": "o3", "family": "tree", "repeat": 1, "fold": 0}, "fit", "oof_sha256", "nested/o3/oof/tree/r1f0.parquet"),
    ({"scope": "outer"}, "assign_folds", "folds_sha256", "nested/outer_folds.parquet"),
    ({"scope": "outer"}, "assign_folds", "leakage_sha256", "nested/outer_leakage.json"),
    ({"scope": "o1"}, "assign_folds", "summary_sha256", "nested/o1/folds_summary.parquet"),
    ({"scope": "o1"}, "refit", "dev_sha256", "dev.parquet"),
    ({"scope": "o0"}, "refit", "provenance_sha256", "nested/o0/model/provenance.json"),
    ({"scope": "o0"}, "score_outer", "score_sha256", "nested/o0/score.json"),
    ({"scope": "nested"}, "nested_summary", "summary_sha256", "nested/summary.json"),
    ({}, "open_test", "test_sha256", "sealed/test.parquet"),
    ({"opening": 2}, "open_test", "verdict_sha256", "final/openings/2.json"),
])
def test_each_record_names_its_file(details: dict[str, object], event: str, key: str, expected: str) -> None:
    assert file_of(row(event, key), details) == expected


@pytest.mark.parametrize("details", [
    {"scope": "../x", "family": "tree", "repeat": 0, "fold": 0},
    {"scope": "main", "family": "../../etc", "repeat": 0, "fold": 0},
    {"scope": "main", "family": "tree", "repeat": "0/..", "fold": 0},
    {"scope": "o-1", "family": "tree", "repeat": 0, "fold": 0},
    {"scope": "main", "family": "tree", "repeat": True, "fold": 0},
])
def test_a_record_that_names_no_file_is_refused(details: dict[str, object]) -> None:
    with pytest.raises(ValueError, match=r"scope|family|repeat"):
        file_of(row("fit", "fits_sha256"), details)


def test_scope_folders() -> None:
    assert [scope_folder(s) for s in ("main", "outer", "nested", "o0", "o12", "o01", "x", None)] == [
        "", "nested/outer_", "nested/", "nested/o0/", "nested/o12/", None, None, None]


HOLD = """
import sys
from holdfast import ledger
with ledger.locked(sys.argv[1], shared=sys.argv[2] == "shared"):
    print("holding", flush=True)
    sys.stdin.readline()
"""


@pytest.mark.parametrize("mode", ["shared", "exclusive"])
def test_the_lock_is_not_free_while_another_process_holds_it(tmp_path: Path, mode: str) -> None:
    target = tmp_path / "steps"
    assert ledger.held_elsewhere(target) is False
    assert ledger.held_shared_elsewhere(target) is False
    assert not (tmp_path / "steps.lock").exists()  # the glance makes no lock file
    with ledger.locked_if_free(target) as free:
        assert free is True
    assert ledger.held_elsewhere(target) is False
    holder = subprocess.Popen([sys.executable, "-c", HOLD, str(target), mode], stdin=subprocess.PIPE,
                              stdout=subprocess.PIPE, text=True, env={"PYTHONPATH": str(REPO / "scripts")})
    try:
        assert holder.stdout is not None and holder.stdout.readline().strip() == "holding"
        with ledger.locked_if_free(target) as free:
            assert free is False
        assert ledger.held_elsewhere(target) is True
        assert ledger.held_shared_elsewhere(target) is (mode == "shared")  # a run's, not an audit's instant
        if mode == "shared":  # shared holders do not exclude one another
            with ledger.locked(target, shared=True):
                pass
    finally:
        holder.communicate("done\n", timeout=30)
    assert ledger.held_elsewhere(target) is False and ledger.held_shared_elsewhere(target) is False
    with ledger.locked_if_free(target) as free:
        assert free is True


def test_no_folder_means_nothing_holds_it_and_nothing_is_made(tmp_path: Path) -> None:
    with ledger.locked_if_free(tmp_path / "missing" / "steps") as free:
        assert free
    assert not (tmp_path / "missing").exists()


@pytest.mark.skipif(os.geteuid() == 0, reason="root writes through permission bits; needs an ordinary user")
def test_a_read_only_copy_can_still_be_checked(tmp_path: Path) -> None:
    folder = tmp_path / "exp"
    folder.mkdir()
    with ledger.locked_if_free(folder / "steps") as free:  # makes steps.lock
        assert free
    (folder / "steps.lock").chmod(0o444)
    folder.chmod(0o555)
    try:
        with ledger.locked_if_free(folder / "steps") as free:  # opened read-only: flock still works
            assert free
    finally:
        folder.chmod(0o755)


def test_a_picture_the_latest_diagnostics_did_not_draw_must_be_absent(tmp_path: Path) -> None:
    """Round 1 drew a validation curve, round 2 had no numeric grid left: the file is gone and that is fine; a file
    put there after round 2 is named, since no step wrote it."""
    from holdfast._io import sha256_file
    from holdfast.recorded import verify

    picture = tmp_path / "diagnostics/plots/validation.png"
    picture.parent.mkdir(parents=True)
    picture.write_bytes(b"round 1")
    first = {"seq": 1, "event": "diagnostics", "details": {"validation_png_sha256": sha256_file(picture)}}
    second = {"seq": 2, "event": "diagnostics", "details": {"validation_png_sha256": None}}
    problems: list = []
    assert verify(tmp_path, [first], problems) == {"diagnostics/plots/validation.png": sha256_file(picture)}
    assert problems == []
    assert verify(tmp_path, [first, second], problems) == {} and [p.code for p in problems] == [
        "diagnostics-plot-unrecorded"]
    picture.unlink()
    problems.clear()
    assert verify(tmp_path, [first, second], problems) == {} and problems == []
    assert verify(tmp_path, [first], problems) == {} and [p.code for p in problems] == ["diagnostics-plot-missing"]
