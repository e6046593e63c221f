"""holdfast's own progress lines while Snakemake runs: one line per step that finished, read from the ledger.

The ledger is the record of what every step did, so following it (rather than Snakemake's job blocks) shows a
person exactly what the experiment gained: a fit job's family and fold, the tally's winner, the opening.
"""

from __future__ import annotations

import json
import subprocess
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

POLL_SECONDS = 0.25


def describe(entry: dict[str, Any], fits_done: int, fits_total: int | None) -> str | None:
    """One progress line for a ledger entry of the experiment itself (nested scopes are summarised by count)."""
    details = entry.get("details") or {}
    event = entry.get("event")
    scope = details.get("scope", "main")
    if event == "seal":
        counts = details.get("counts", {})
        return f"sealed {counts.get('test')} test rows away; {counts.get('dev')} development rows"
    if event == "assign_folds" and scope == "main":
        return (f"folds assigned: {details.get('scheme')}, {details.get('k')} fold(s) x {details.get('repeats')} "
                f"repeat(s) on {details.get('rows')} rows")
    if event == "fit" and scope == "main":
        left = f", {fits_total - fits_done} left" if fits_total is not None and fits_total >= fits_done else ""
        failed = f", {details.get('failed')} failed" if details.get("failed") else ""
        return (f"fit {details.get('family')} r{details.get('repeat')}f{details.get('fold')}: "
                f"{details.get('candidates')} candidate(s){failed} ({fits_done} fit job(s) done{left})")
    if event == "round":
        return f"selection round {details.get('round')}: {details.get('summary', '')}".rstrip(": ")
    if event == "tally" and scope == "main":
        return (f"tally: winner {details.get('winner')} by {details.get('rule')} on {details.get('metric')} "
                f"among {details.get('candidates')} candidate(s)")
    if event == "refit" and scope == "main":
        return f"refit the winner {details.get('winner')} on {details.get('rows')} development rows"
    if event == "opening_started":
        return f"opening {details.get('opening')} recorded; reading the sealed test rows"
    if event == "open_test":
        return f"opening {details.get('opening')} done: verdict written"
    if event == "nested_summary":
        return f"nested cross-validation summarised over {details.get('outer_folds')} outer fold(s)"
    return None


def follow(exp: Path, process: subprocess.Popen[Any], say: Callable[[str], None],
           fits_total: int | None = None) -> None:
    """Print a line for every new ledger entry until ``process`` ends (then once more for the last entries)."""
    ledger = exp / "ledger.jsonl"
    offset = ledger.stat().st_size if ledger.exists() else 0
    fits_done = 0
    while True:
        ended = process.poll() is not None
        if ledger.exists() and ledger.stat().st_size > offset:
            with open(ledger, "rb") as handle:
                handle.seek(offset)
                chunk = handle.read()
            complete = chunk[: chunk.rfind(b"\n") + 1]
            offset += len(complete)
            for raw in complete.splitlines():
                try:
                    entry = json.loads(raw)
                except ValueError:
                    continue
                if entry.get("event") == "fit" and (entry.get("details") or {}).get("scope", "main") == "main":
                    fits_done += 1
                line = describe(entry, fits_done, fits_total)
                if line:
                    say(line)
        if ended:
            return
        time.sleep(POLL_SECONDS)
