"""One experiment's state, gathered for `holdfast status`, `holdfast list` and `holdfast compare`.

Counts (fit jobs, rounds, openings, schemes) come from the ledger, whose chain the audit checks; scores come
only from files a fresh audit verified (choice.json, final/verdict.json), as in the closing lines of a run.
Nothing is written: the audit here does not rewrite audit.json.
"""

from __future__ import annotations

import contextlib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from .. import display, ledger
from .._io import read_json
from ..balance import Balance, balance
from ..errors import HoldfastError
from ..foldspec import KEYS
from ..layout import CHOICE, CONFIG_COPY, LEDGER, MANIFEST, VERDICT
from ._common import UnverifiedError, short, verified_json


@dataclass
class FitJobs:
    """Fit jobs of the current candidates on the current folds: done, planned, and why the plan is unknown."""

    done: int = 0
    planned: int | None = None
    families: int = 0
    per_fold: int = 0  # fit jobs per fold: the families, or more with jobs_per_fold
    folds: int = 0
    unknown: str = ""  # why the planned number could not be worked out
    nested_done: int = 0
    nested_planned: int = 0
    balance: Balance | None = None  # how the measured fit jobs can share this machine's cores (all jobs done)


@dataclass
class Opening:
    """One finished opening, from its ledger line."""

    number: int
    time: str
    winner: str
    family: str
    model_sha256: str


@dataclass
class Summary:
    """What a person asks of one experiment, each part from the record that vouches for it."""

    exp: Path
    name: str
    audit_state: str = "not made"  # pass | fail | in progress
    audit_codes: list[str] = field(default_factory=list)
    ledger_entries: int = 0
    ledger_broken: bool = False
    data_path: str = "-"
    data_sha256: str = ""
    seal_spec: dict[str, Any] = field(default_factory=dict)
    test_scheme: str = "-"
    split: str = "-"  # the test scheme in a few characters, for tables
    folds: str = "-"
    folds_short: str = "-"
    fits: FitJobs = field(default_factory=FitJobs)
    rounds: int = 0
    candidates_tried: int | None = None
    openings_started: int = 0
    openings: list[Opening] = field(default_factory=list)
    unit: str | None = None
    choice: dict[str, Any] | None = None
    verdict: dict[str, Any] | None = None
    withheld: str = ""  # why scores are not shown
    notes: list[str] = field(default_factory=list)

    @property
    def metric(self) -> str | None:
        """The primary metric the winner was chosen on."""
        return self.choice["metric"] if self.choice else None

    @property
    def winner(self) -> str:
        """'family candidate' of the winner, or '-'."""
        if not self.choice:
            return "withheld" if self.withheld else "-"
        return f"{self.choice['winner']['family']} {self.choice['winner']['candidate']}"

    def cv(self) -> str:
        """The winner's raw CV estimate on the primary metric, as a person reads it."""
        if not self.choice:
            return "withheld" if self.withheld else "-"
        return display.number(self.metric or "", self.choice["winner"]["mean"], self.unit)

    def corrected(self, key: str) -> str:
        """The winner's CV estimate corrected for selection ('bbc' or 'tibshirani'), or '-'."""
        if not self.choice:
            return "withheld" if self.withheld else "-"
        value = ((self.choice.get("optimism") or {}).get(key) or {}).get("corrected")
        return display.number(self.metric or "", value, self.unit) if value is not None else "-"

    def test(self) -> str:
        """The test estimate on the primary metric with its interval, 'not opened', or why it is not shown."""
        if not self.openings and not self.openings_started:
            return "not opened"
        if not self.verdict or not self.metric:
            return "withheld" if self.withheld else "no verdict"
        block = self.verdict["metrics"].get(self.metric) or {}
        if block.get("test") is None:
            return str(block.get("undefined", "undefined"))
        low, high = block["interval"]
        return (f"{display.number(self.metric, block['test'], self.unit)} "
                f"{display.interval(self.metric, low, high, self.unit)}")

    def audit_text(self) -> str:
        """'PASS', 'FAIL (code, code)' or 'IN PROGRESS'."""
        if self.audit_state == "fail":
            return f"FAIL ({', '.join(self.audit_codes)})"
        return self.audit_state.upper()


def _fold_text(details: dict[str, Any]) -> tuple[str, str]:
    """The fold scheme of an assign_folds line, in words and in a few characters."""
    scheme = str(details.get("scheme"))
    used = KEYS.get(scheme, ())
    k, repeats = details.get("k"), details.get("repeats")
    if "k" in used and "repeats" in used:
        return f"{scheme}, {k} folds x {repeats} repeat(s)", f"{scheme} {k}x{repeats}"
    if "k" in used:
        return f"{scheme}, {k} windows", f"{scheme} {k}"
    if "repeats" in used:
        return f"{scheme}, {repeats} repeat(s)", f"{scheme} x{repeats}"
    return scheme, scheme


def _test_text(details: dict[str, Any]) -> tuple[str, str]:
    """The test split of the seal line, in words and in a few characters."""
    spec, counts = details.get("spec") or {}, details.get("counts") or {}
    fraction = spec.get("fraction")
    scheme = f"{spec.get('scheme')}" + (f" {fraction:.0%}" if isinstance(fraction, int | float) else "")
    return f"{scheme}: {counts.get('test')} test / {counts.get('dev')} development rows", scheme


def _planned(exp: Path) -> tuple[Any, str]:
    """The plan of the stored config (config.json) for this folder, or None and why not."""
    if not (exp / CONFIG_COPY).exists():
        return None, (f"'{exp / CONFIG_COPY}' is missing (the experiment was not run with 'holdfast run'), so the "
                      "planned number is unknown")
    from ..plan import prepare

    try:
        raw = read_json(exp / CONFIG_COPY)
        # Counting reads no data: where the data file lies does not matter here.
        raw = {**raw, "data": {**raw["data"], "allow_outside_project": True}}
        return prepare(raw, main=False, results=str(exp.parent)), ""
    except HoldfastError as exc:
        return None, f"the stored config cannot be planned ({exc.message})"
    except (OSError, ValueError, KeyError, TypeError) as exc:
        return None, f"'{exp / CONFIG_COPY}' cannot be read ({type(exc).__name__})"


def fit_jobs(exp: Path, entries: list[dict[str, Any]], timing: bool = False) -> FitJobs:
    """Fit jobs done of those the stored config plans.

    A (family, repeat, fold) job counts as done when its latest fit line was made on the scope's current fold
    table (the latest assign_folds line's folds_sha256) for exactly the family's current candidates (the
    line's random_states name every candidate id). Planned: the stored config's fold ids x fit jobs per fold
    (families, or their parts with jobs_per_fold), as holdfast.plan.prepare gives them; nested scopes are counted
    apart.
    """
    out = FitJobs()
    plan, out.unknown = _planned(exp)
    if plan is not None and plan.exp.resolve() != exp.resolve():
        plan, out.unknown = None, (f"the stored config names experiment '{plan.config['experiment']}', not this "
                                   "folder, so the planned number is unknown")
    if plan is None:
        out.done = len({(d.get("family"), d.get("repeat"), d.get("fold"))
                        for d in (e["details"] for e in ledger.events(entries, "fit"))})
        return out
    ids = {group: {c["id"] for c in cands} for group, cands in plan.groups.items()}
    jobs = {(group, r, f) for group in plan.groups for r, f in plan.fold_ids}
    out.families, out.per_fold = len(plan.families), len(plan.groups)
    out.folds, out.planned = len(plan.fold_ids), len(jobs)

    def current_in(scope: str) -> dict[tuple[Any, Any, Any], dict[str, Any]]:
        folds = ledger.events(entries, "assign_folds", scope)
        current = folds[-1]["details"].get("folds_sha256") if folds else None
        latest: dict[tuple[Any, Any, Any], dict[str, Any]] = {}
        for entry in ledger.events(entries, "fit", scope):
            d = entry["details"]
            latest[(d.get("family"), d.get("repeat"), d.get("fold"))] = d
        return {key: d for key, d in latest.items() if key in jobs and d.get("folds_sha256") == current
                and set(d.get("random_states") or {}) == ids[key[0]]}

    def done_in(scope: str) -> int:
        return len(current_in(scope))

    main = current_in("main")
    out.done = len(main)
    if timing and out.done == out.planned:
        out.balance = _balance(exp, plan, main)
    outer = int(plan.config["nested"]["k"])
    out.nested_planned = outer * len(jobs)
    out.nested_done = sum(done_in(f"o{o}") for o in range(outer))
    return out


def usable_cores() -> int:
    """The cores this process may run on (what `holdfast run` gives Snakemake unless told otherwise)."""
    import os

    return len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count() or 1


def _balance(exp: Path, plan: Any, current: dict[tuple[Any, Any, Any], dict[str, Any]]) -> Balance | None:
    """How the current fit jobs' measured in-job seconds can share this machine's cores, and whether splitting the
    family of the longest job would help. Per-candidate seconds come from the fit files the ledger recorded (a file
    whose bytes differ gives no suggestion); families with more than one thread a job are not judged."""
    import hashlib

    import pandas as pd

    from ..layout import fit_file, group_family

    if any(int(plan.config["candidates"][f].get("threads", 1)) > 1 for f in plan.families):
        return None
    jobs: dict[str, list[float]] = {}
    for (group, _, _), d in sorted(current.items(), key=lambda kv: str(kv[0])):
        if not isinstance(d.get("fit_seconds"), int | float):
            return None
        jobs.setdefault(str(group), []).append(float(d["fit_seconds"]))
    if not jobs:
        return None
    longest = group_family(max(jobs, key=lambda part: max(jobs[part])))
    order = [c["id"] for c in plan.families[longest]]
    parts = [g for g in plan.groups if group_family(g) == longest]
    seconds: dict[tuple[int, int], dict[str, float]] = {}
    for (group, repeat, fold), d in current.items():
        if group not in parts:
            continue
        path = exp / fit_file("fits", str(group), int(repeat), int(fold))
        try:
            if hashlib.sha256(path.read_bytes()).hexdigest() != d.get("fits_sha256"):
                return balance(jobs, {}, {}, usable_cores())
            table = pd.read_parquet(path, columns=["candidate", "fit_seconds"])
        except (OSError, ValueError, KeyError):
            return balance(jobs, {}, {}, usable_cores())
        seconds.setdefault((int(repeat), int(fold)), {}).update(
            {str(c): float(s) for c, s in zip(table["candidate"], table["fit_seconds"], strict=True)})
    folds = [[by_id.get(cid, 0.0) for cid in order] for _, by_id in sorted(seconds.items())]
    return balance(jobs, {longest: folds}, {longest: len(parts)}, usable_cores())


def _openings(entries: list[dict[str, Any]]) -> list[Opening]:
    families = {e["details"].get("model_sha256"): e["details"].get("family") for e in ledger.events(entries, "refit")}
    return [Opening(number=int(e["details"].get("opening", i + 1)), time=str(e.get("time")),
                    winner=str(e["details"].get("winner")),
                    family=str(families.get(e["details"].get("model_sha256"), "?")),
                    model_sha256=str(e["details"].get("model_sha256")))
            for i, e in enumerate(ledger.events(entries, "open_test"))]


def summarize(exp: Path, timing: bool = False) -> Summary:
    """Audit the experiment now and gather its summary (nothing is written); with ``timing``, also how the fit
    jobs' measured seconds can share this machine's cores (`holdfast status`)."""
    from .. import openings
    from ..audit import IN_PROGRESS, audit
    from ..closing import target_unit_of

    result = audit(str(exp))
    out = Summary(exp=exp, name=str(result.get("experiment") or exp.name), audit_state=result["state"],
                  audit_codes=list(dict.fromkeys(p["code"] for p in result["problems"])),
                  unit=target_unit_of(exp))
    if result["state"] == IN_PROGRESS:
        out.withheld = "a run is in progress: nothing was checked"
    elif not result["passed"]:
        out.withheld = "the audit fails: a failing record vouches for no number"
    entries, problems = ledger.verify_chain(exp / LEDGER, cached=False)
    out.ledger_entries, out.ledger_broken = len(entries), bool(problems)
    seals = ledger.events(entries, "seal")
    if seals:
        out.data_sha256 = str(seals[0]["details"].get("data_sha256") or "")
        out.test_scheme, out.split = _test_text(seals[0]["details"])
        out.seal_spec = dict(seals[0]["details"].get("spec") or {})
    with contextlib.suppress(OSError, ValueError, KeyError, TypeError):  # only a label; the fingerprint is above
        out.data_path = str(read_json(exp / MANIFEST)["data"]["path"])
    folds = ledger.events(entries, "assign_folds")
    if folds:
        out.folds, out.folds_short = _fold_text(folds[-1]["details"])
    out.fits = fit_jobs(exp, entries, timing)
    out.rounds = max((int(e["details"].get("round", 0)) for e in ledger.events(entries, "round")), default=0)
    tallies = ledger.events(entries, "tally")
    if tallies:
        out.candidates_tried = tallies[-1]["details"].get("candidates_tried")
    out.openings_started = openings.records(exp).count
    out.openings = _openings(entries)
    if not out.withheld:
        try:
            if (exp / CHOICE).exists():
                out.choice = verified_json(exp, CHOICE, result["verified"])
            if (exp / VERDICT).exists():
                out.verdict = verified_json(exp, VERDICT, result["verified"])
        except UnverifiedError as exc:
            out.choice = out.verdict = None
            out.withheld = str(exc)
    return out


def data_text(summary: Summary) -> str:
    """'data.csv (sha256 e05a362a)'."""
    return f"{summary.data_path} (sha256 {short(summary.data_sha256)})"
