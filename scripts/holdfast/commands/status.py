"""`holdfast status results/<experiment>`: where an experiment stands, in a few lines.

Fit jobs done of those the stored config plans, selection rounds, the choice, whether the test set is sealed
or was opened (when, for which model) and a fresh audit. Read-only: nothing is written, audit.json included.
"""

from __future__ import annotations

import argparse
from typing import Any

from .. import display
from ._common import experiment_folder, short, when
from .summary import Summary, data_text, summarize


def _fit_line(s: Summary) -> str:
    fits = s.fits
    if fits.planned is None:
        return f"{fits.done} fit job(s) recorded; {fits.unknown}"
    split = f" in {fits.per_fold} job(s) per fold" if fits.per_fold != fits.families else ""
    return (f"{fits.done} of {fits.planned} done ({fits.families} family(ies){split} x {fits.folds} fold(s), counting "
            "jobs fitted on the current folds for the current candidates)")


def _seconds(value: float) -> str:
    return f"{value:.1f} s" if value >= 10 else f"{value:.2f} s"


def _time_lines(s: Summary) -> list[str]:
    """The fit jobs' measured time against this machine's cores, and a split that would share them better."""
    b = s.fits.balance
    if b is None:
        return []
    lines = [f"{_seconds(b.total)} in-job over {b.jobs} job(s); on this machine's {b.cores} core(s) no order of them "
             f"ends sooner than {_seconds(b.bound)} ({_seconds(b.even)} if shared evenly)"]
    if b.family is not None and b.split_bound is not None:
        lines.append(f"candidates.{b.family}.jobs_per_fold: {b.per_fold} would lower that to "
                     f"{_seconds(b.split_bound)} (by its candidates' measured seconds; each job also pays its own "
                     "start)")
    return lines


def _winner_line(s: Summary) -> str:
    if s.choice is None:
        return f"not shown: {s.withheld}" if s.withheld else "none yet (no tally)"
    choice, metric = s.choice, s.metric or ""
    corrected = display.corrected_list(choice.get("optimism") or {}, metric, s.unit)
    return (f"{s.winner} by {choice['rule'].replace('_', ' ')}: CV "
            f"{display.named(metric, choice['winner']['mean'], s.unit)}"
            + (f" (corrected for selection: {corrected})" if corrected else ""))


def _test_lines(s: Summary) -> list[str]:
    if not s.openings_started:
        return ["sealed, not opened (holdfast open " + str(s.exp) + " is the one look)"]
    lines = [f"opened {s.openings_started} time(s)"]
    for o in s.openings:
        lines.append(f"opening {o.number} at {when(o.time)}, model {o.family} {o.winner} "
                     f"(model file sha256 {short(o.model_sha256)})")
    if s.openings_started > len(s.openings):
        lines.append(f"{s.openings_started - len(s.openings)} opening(s) recorded before reading but never "
                     "finished; each still counts")
    if s.verdict is not None and s.metric:
        block = s.verdict["metrics"].get(s.metric) or {}
        if block.get("test") is None:
            shown = f"test {display.label(s.metric)} {block.get('undefined', 'undefined')}"
        else:
            shown = (f"test {display.named(s.metric, block['test'], s.unit)}, {block['level']:.0%} interval "
                     f"{display.interval(s.metric, *block['interval'], s.unit)}")
        lines.append(f"{shown} on {s.verdict.get('test_rows')} sealed rows"
                     + (f"; {s.verdict['test_set_opened']}: the test estimate is compromised"
                        if s.verdict.get("compromised") else ""))
    elif s.withheld:
        lines.append(f"test estimate not shown: {s.withheld}")
    return lines


def status_lines(s: Summary) -> list[str]:
    """The status of one experiment as lines of text."""
    fits = s.fits
    rows: list[tuple[str, str]] = [
        ("data", data_text(s)),
        ("test split", s.test_scheme),
        ("folds", s.folds),
        ("fit jobs", _fit_line(s)),
    ]
    rows += [("fit time" if i == 0 else "", line) for i, line in enumerate(_time_lines(s))]
    if fits.nested_planned:
        rows.append(("nested", f"{fits.nested_done} of {fits.nested_planned} inner fit jobs done"))
    rows.append(("rounds", f"{s.rounds} selection round(s)"
                 + (f", {s.candidates_tried} candidate(s) tried in all" if s.candidates_tried is not None else "")))
    rows.append(("winner", _winner_line(s)))
    rows += [("test set" if i == 0 else "", line) for i, line in enumerate(_test_lines(s))]
    rows.append(("audit", f"{s.audit_text()} (made now; {s.ledger_entries} ledger entries)"
                 + ("; details: holdfast audit " + str(s.exp) if s.audit_state == "fail" else "")))
    width = max(len(k) for k, _ in rows) + 1
    return [f"experiment '{s.name}' ({s.exp})"] + [f"  {(k + ':') if k else '':<{width}} {v}" for k, v in rows]


def main(args: argparse.Namespace) -> int:
    """Print the status; exit 0 whenever it could be read (`holdfast audit` is the gate that fails)."""
    for line in status_lines(summarize(experiment_folder(args.experiment_dir), timing=True)):
        print(line)
    return 0


def add_parser(sub: Any) -> None:
    """Register `holdfast status`."""
    p = sub.add_parser("status", help="where an experiment stands: fit jobs, rounds, winner, opening, audit",
                       description=__doc__.split("\n\n")[1])
    p.add_argument("experiment_dir", help="results/<experiment>")
    p.set_defaults(func=main, takes_extra=False)
