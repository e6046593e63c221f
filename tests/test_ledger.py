"""The ledger: hash chain, locked appends from many processes, and detection of every break."""

from __future__ import annotations

import itertools
import json
import multiprocessing
from pathlib import Path

import pytest
from holdfast import ledger
from holdfast.errors import LedgerError


def _appender(path: str, worker: int, count: int) -> None:
    for i in range(count):
        ledger.append(path, "stress", {"worker": worker, "i": i})


def test_chain_links_every_line(tmp_path: Path) -> None:
    path = tmp_path / "ledger.jsonl"
    for i in range(5):
        ledger.append(path, "step", {"i": i}, rule="r")
    entries, problems = ledger.verify_chain(path)
    assert problems == []
    assert [e["seq"] for e in entries] == list(range(5))
    assert entries[0]["prev"] == ledger.GENESIS
    assert all(b["prev"] == a["hash"] for a, b in itertools.pairwise(entries))
    assert {"user", "host", "pid", "rule"} <= set(entries[0]["actor"])
    assert entries[0]["time"].endswith("Z")


def test_parallel_appends_never_interleave_or_vanish(tmp_path: Path) -> None:
    path = str(tmp_path / "ledger.jsonl")
    workers, count = 8, 200  # issue acceptance: at least 8 processes x 200 appends
    ctx = multiprocessing.get_context("fork")
    procs = [ctx.Process(target=_appender, args=(path, w, count)) for w in range(workers)]
    for proc in procs:
        proc.start()
    for proc in procs:
        proc.join(timeout=120)
        assert proc.exitcode == 0
    entries, problems = ledger.verify_chain(path)
    assert problems == []
    assert len(entries) == workers * count
    seen = {(e["details"]["worker"], e["details"]["i"]) for e in entries}
    assert len(seen) == workers * count


@pytest.mark.parametrize(("mutate", "code"), [
    (lambda lines: [lines[0], lines[1].replace('"i":1', '"i":7'), *lines[2:]], "edited-line"),
    (lambda lines: [lines[0], *lines[2:]], "broken-link"),
    (lambda lines: [lines[0], lines[2], lines[1], *lines[3:]], "broken-link"),
    (lambda lines: [*lines[:-1], lines[-1][: len(lines[-1]) // 2]], "torn-append"),
])
def test_each_break_is_named(tmp_path: Path, mutate: object, code: str) -> None:
    path = tmp_path / "ledger.jsonl"
    for i in range(4):
        ledger.append(path, "step", {"i": i})
    lines = path.read_text().splitlines()
    changed = mutate(lines)  # type: ignore[operator]
    torn = code == "torn-append"
    path.write_text("\n".join(changed) + ("" if torn else "\n"))
    _, problems = ledger.verify_chain(path)
    assert code in {p.code for p in problems}


def test_forged_line_with_its_own_valid_hash_still_breaks_the_chain(tmp_path: Path) -> None:
    path = tmp_path / "ledger.jsonl"
    for i in range(3):
        ledger.append(path, "step", {"i": i})
    lines = path.read_text().splitlines()
    forged = json.loads(lines[1])
    forged["details"] = {"i": 99}
    forged["hash"] = ledger.line_hash(forged)
    path.write_text("\n".join([lines[0], json.dumps(forged), *lines[1:]]) + "\n")
    _, problems = ledger.verify_chain(path)
    codes = {p.code for p in problems}
    assert "edited-line" not in codes and "broken-link" in codes


def test_append_refuses_a_torn_ledger(tmp_path: Path) -> None:
    path = tmp_path / "ledger.jsonl"
    ledger.append(path, "step", {})
    path.write_text(path.read_text().rstrip("\n")[:-5])
    with pytest.raises(LedgerError, match="torn line"):
        ledger.append(path, "step", {})
