"""holdfast's own progress lines while Snakemake runs: one line per step that finished, read from the ledger.

The ledger is the record of what every step did, so following it (rather than Snakemake's job blocks) shows a
person exactly what the experiment gained: a fit job's family and fold, the tally's winner, the opening.
"""

from __future__ import annotations

import contextlib
import json
import re
import subprocess
from collections.abc import Callable
from pathlib import Path
from typing import Any

from . import display

POLL_SECONDS = 0.25


class Tracker:
    """What the progress lines remember across entries: fit jobs done, planned, and the best fold score seen."""

    def __init__(self, fits_total: int | None = None) -> None:
        self.fits_done = 0
        self.fits_total = fits_total
        self.best: dict[str, Any] | None = None

    def fit(self, details: dict[str, Any]) -> str:
        """The line for one finished fit job: family, fold, its best score, the best so far, jobs left."""
        self.fits_done += 1
        best = details.get("best")
        text = f"fit {details.get('family')} r{details.get('repeat')}f{details.get('fold')}:"
        if best:
            metric = best["metric"]
            text += f" best on this fold {display.named(metric, best['score'])} ({best['candidate']})"
            if self.best is None or best["score"] > self.best["score"]:
                self.best = best
            text += f"; best fold score so far {display.number(metric, self.best['score'])}"
        elif details.get("candidates") and details.get("failed") == details.get("candidates"):
            text += " every candidate failed"
        else:
            text += f" {details.get('candidates')} candidate(s) fitted"  # a ledger line older than 'best'
        if details.get("failed"):
            text += f"; {details['failed']} candidate(s) failed"
        if self.fits_total is not None and self.fits_total >= self.fits_done:
            text += f"; {self.fits_done} of {self.fits_total} fit jobs done, {self.fits_total - self.fits_done} left"
        else:
            text += f"; {self.fits_done} fit job(s) done"
        return text


def describe(entry: dict[str, Any], tracker: Tracker) -> str | None:
    """One progress line for a ledger entry of the experiment itself (nested scopes are summarised by count)."""
    details = entry.get("details") or {}
    event = entry.get("event")
    scope = details.get("scope", "main")
    if event == "seal":
        counts = details.get("counts", {})
        text = f"sealed {counts.get('test')} test rows away; {counts.get('dev')} development rows"
        noted = details.get("unopened_notes")
        if isinstance(noted, list) and noted:
            text += f"; {len(noted)} note(s) on unopened experiments of the same target (see 'holdfast audit')"
        return text
    if event == "assign_folds" and scope == "main":
        return (f"folds assigned: {details.get('scheme')}, {details.get('k')} fold(s) x {details.get('repeats')} "
                f"repeat(s) on {details.get('rows')} rows")
    if event == "fit" and scope == "main":
        return tracker.fit(details)
    if event == "round":
        return f"selection round {details.get('round')}: {details.get('summary', '')}".rstrip(": ")
    if event == "tally" and scope == "main":
        return (f"tally: winner {details.get('winner')} by {str(details.get('rule')).replace('_', ' ')} on "
                f"{display.label(str(details.get('metric')))} among {details.get('candidates')} candidate(s)")
    if event == "refit" and scope == "main":
        return f"refit the winner {details.get('winner')} on {details.get('rows')} development rows"
    if event == "opening_started":
        return f"opening {details.get('opening')} recorded; reading the sealed test rows"
    if event == "open_test":
        return f"opening {details.get('opening')} done: verdict written"
    if event == "nested_summary":
        return f"nested cross-validation summarised over {details.get('outer_folds')} outer fold(s)"
    if event == "learning_curve":
        how = "kept from an earlier run (same winner, folds and settings)" if details.get("reused") else \
            f"{details.get('points')} size(s)" + (f", {details['failed']} failed" if details.get("failed") else "")
        return (f"learning curve of {details.get('winner')} r{details.get('repeat')}f{details.get('fold')}: "
                f"{how}")
    if event == "diagnostics":
        return (f"diagnostics of {details.get('winner')}: {details.get('curves')} validation curve(s), "
                f"{details.get('oof_rows')} out-of-fold predictions")
    if event == "learning_summary":
        return (f"learning curve of {details.get('winner')} summarised: {details.get('points')} size(s) over "
                f"{details.get('files')} fold(s)")
    return None


MARK = "progress: "
# Steps whose work can take long enough to need a word on the screen; their logs are followed too.
LONG_STEPS = ("seal.log", "assign_folds.log", "tally.log", "open_test.log", "refit_winner.log")


def note(message: str) -> None:
    """Called inside a long step: one progress line in its log, which ``holdfast run`` shows on the screen."""
    print(f"{MARK}{message}", flush=True)


PLANNED = re.compile(rb"^fit_family\s+(\d+)\s*$", re.MULTILINE)


def planned_fits(log: Path | None) -> int | None:
    """The number of fit jobs Snakemake planned, from the job-stats table it writes to its log."""
    if log is None or not log.exists():
        return None
    found = PLANNED.search(log.read_bytes())
    return int(found.group(1)) if found else None


def _new_lines(path: Path, offsets: dict[Path, int]) -> list[bytes]:
    """Whole lines appended to ``path`` since the last look (a log rewritten from the start is read again)."""
    if not path.exists():
        return []
    size = path.stat().st_size
    start = offsets.get(path, 0)
    if size < start:
        start = 0
    if size == start:
        return []
    with open(path, "rb") as handle:
        handle.seek(start)
        chunk = handle.read(size - start)
    complete = chunk[: chunk.rfind(b"\n") + 1]
    offsets[path] = start + len(complete)
    return complete.splitlines()


def follow(exp: Path, process: subprocess.Popen[Any], say: Callable[[str], None], log: Path | None = None) -> None:
    """Print a line for every new ledger entry, and every progress note of a long step, until ``process`` ends."""
    ledger = exp / "ledger.jsonl"
    offsets = {ledger: ledger.stat().st_size if ledger.exists() else 0}
    for name in LONG_STEPS:  # notes written before this run are not news
        path = exp / "logs" / name
        offsets[path] = path.stat().st_size if path.exists() else 0
    tracker = Tracker()
    while True:
        ended = process.poll() is not None
        if tracker.fits_total is None:
            tracker.fits_total = planned_fits(log)
        for name in LONG_STEPS:
            for raw in _new_lines(exp / "logs" / name, offsets):
                text = raw.decode("utf-8", errors="replace")
                if text.startswith(MARK):
                    say(f"{name[:-len('.log')]}: {text[len(MARK):]}")
        for raw in _new_lines(ledger, offsets):
            try:
                entry = json.loads(raw)
            except ValueError:
                continue
            line = describe(entry, tracker)
            if line:
                say(line)
        if ended:
            return
        with contextlib.suppress(subprocess.TimeoutExpired):  # back at once when Snakemake ends
            process.wait(timeout=POLL_SECONDS)
