"""The files the ledger vouches for: one table from each recorded hash to the file it names.

Every step that writes (or reads) a file under results/<experiment>/ records the file's sha256 in its
ledger event. :data:`RECORDED` says, for every such hash, which detail holds it and which file it is
about; nested work is placed by the event's ``scope`` ("main", "outer", "o<O>", "nested").
:func:`verify` checks every file against the latest record for it (files fixed at the seal against
every record), and names recorded files that are missing and evidence files that nothing records.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from ._io import sha256_file
from .ledger import Problem


@dataclass(frozen=True)
class Recorded:
    """One hash an event records: where it sits in the details and which file it is about."""

    event: str
    key: tuple[str, ...]  # the path to the hash inside the event's details
    path: str  # under results/<experiment>/; {scope} is the scope's folder, other fields come from the details
    kind: str  # problem codes: <kind>-missing, <kind>-changed, <kind>-unrecorded
    what: str  # the file in words, for messages
    fixed: bool = False  # written once at the seal: every record must match it, not only the latest
    reported: bool = True  # False: the openings check names this file's problems (it is still verified here)
    scanned: bool = True  # look for such files that no ledger line records
    none_means_absent: bool = False  # the key present with null: the step wrote no such file (its latest record)


# The pictures a diagnostics ledger line names (learning: the older layout's plots/learning.png, recorded null now).
DIAGNOSTICS_PICTURES = ("validation", "learning", "confusion", "calibration", "residuals")

RECORDED: tuple[Recorded, ...] = (
    Recorded("seal", ("files", "test.parquet"), "sealed/test.parquet", "test", "sealed test file", fixed=True),
    Recorded("seal", ("files", "dev.parquet"), "dev.parquet", "dev", "development set", fixed=True),
    Recorded("seal", ("files", "test_rows.parquet"), "sealed/test_rows.parquet", "test-rows",
             "sealed-row hash file", fixed=True),
    Recorded("assign_folds", ("dev_sha256",), "dev.parquet", "dev", "development set", fixed=True),
    Recorded("assign_folds", ("folds_sha256",), "{scope}folds.parquet", "folds", "fold table"),
    Recorded("assign_folds", ("summary_sha256",), "{scope}folds_summary.parquet", "folds-summary",
             "per-fold summary"),
    Recorded("assign_folds", ("leakage_sha256",), "{scope}leakage.json", "leakage", "leakage report"),
    Recorded("fit", ("folds_sha256",), "{scope}folds.parquet", "folds", "fold table"),
    Recorded("fit", ("fits_sha256",), "{scope}fits/{family}/r{repeat}f{fold}.parquet", "fits", "fit job's records"),
    Recorded("fit", ("oof_sha256",), "{scope}oof/{family}/r{repeat}f{fold}.parquet", "oof",
             "fit job's out-of-fold predictions"),
    Recorded("tally", ("ranking_sha256",), "{scope}ranking.parquet", "ranking", "ranking"),
    Recorded("tally", ("choice_sha256",), "{scope}choice.json", "choice", "choice"),
    Recorded("refit", ("choice_sha256",), "{scope}choice.json", "choice", "choice"),
    Recorded("refit", ("dev_sha256",), "dev.parquet", "dev", "development set", fixed=True),
    Recorded("refit", ("model_sha256",), "{scope}model/model.skops", "model", "refit model"),
    Recorded("refit", ("provenance_sha256",), "{scope}model/provenance.json", "provenance",
             "model's provenance record"),
    Recorded("open_test", ("test_sha256",), "sealed/test.parquet", "test", "sealed test file", fixed=True),
    Recorded("open_test", ("model_sha256",), "{scope}model/model.skops", "model", "refit model"),
    Recorded("open_test", ("verdict_sha256",), "final/verdict.json", "verdict", "verdict", reported=False,
             scanned=False),
    Recorded("open_test", ("verdict_sha256",), "final/openings/{opening}.json", "opening-archive",
             "archived verdict of that opening", scanned=False),
    Recorded("open_test", ("marker_sha256",), "final/openings/started-{opening}.json", "opening-marker",
             "write-ahead marker of that opening", scanned=False),
    Recorded("opening_started", ("test_sha256",), "sealed/test.parquet", "test", "sealed test file", fixed=True),
    Recorded("opening_started", ("model_sha256",), "{scope}model/model.skops", "model", "refit model"),
    Recorded("round", ("round_sha256",), "rounds/{round}.json", "round", "selection round's set-up"),
    Recorded("round", ("round_sha256",), "rounds/current.json", "round", "current selection round (a copy of the "
             "latest rounds/<N>.json)", scanned=False),
    Recorded("tally", ("history_index_sha256",), "history/index.json", "history-index",
             "index of every candidate tallied in any round"),
    Recorded("score_outer", ("score_sha256",), "{scope}score.json", "nested-score", "outer fold's score"),
    Recorded("nested_summary", ("summary_sha256",), "{scope}summary.json", "nested-summary", "nested summary"),
    Recorded("learning_curve", ("dev_sha256",), "dev.parquet", "dev", "development set", fixed=True),
    Recorded("learning_curve", ("folds_sha256",), "folds.parquet", "folds", "fold table"),
    Recorded("learning_curve", ("choice_sha256",), "choice.json", "choice", "choice"),
    Recorded("learning_curve", ("fits_sha256",), "fits/{family}/r{repeat}f{fold}.parquet", "fits",
             "fit job's records"),
    Recorded("learning_curve", ("learning_sha256",), "diagnostics/learning/r{repeat}f{fold}.parquet", "learning",
             "learning-curve table of one fold"),
    Recorded("diagnostics", ("choice_sha256",), "choice.json", "choice", "choice"),
    Recorded("diagnostics", ("diagnostics_sha256",), "diagnostics/diagnostics.json", "diagnostics",
             "diagnostics' numbers"),
    *(Recorded("diagnostics", (f"{name}_png_sha256",), f"diagnostics/plots/{name}.png", "diagnostics-plot",
               f"{name} picture of the diagnostics", none_means_absent=True)
      for name in DIAGNOSTICS_PICTURES),
    Recorded("learning_summary", ("choice_sha256",), "choice.json", "choice", "choice"),
    Recorded("learning_summary", ("summary_sha256",), "diagnostics/learning.json", "learning-summary",
             "learning curve's summary"),
    Recorded("learning_summary", ("png_sha256",), "diagnostics/learning.png", "learning-plot",
             "learning curve's picture"),
)

# Hashes in the ledger that name no file under the experiment, and why the audit does not check them there.
NOT_FILES: dict[tuple[str, tuple[str, ...]], str] = {
    ("seal", ("data_sha256",)): "the data file lives outside the experiment; every run's guard compares it",
    ("seal", ("keys", "dev_sha256")): "a digest of the development row keys, checked against dev.parquet's keys",
    ("seal", ("keys", "test_sha256")): "a digest of the sealed row keys, checked against test.parquet's keys",
    ("opening_started", ("request_sha256",)): "the request 'holdfast open' wrote; a later request replaces the file",
    ("round", ("setup_sha256",)): "a digest of the round's set-up, which rounds/<N>.json (checked) holds",
    ("round", ("ranking_seen_sha256",)): "the ranking visible when the change was made; a later tally replaced it",
}

SCOPE_FOLDERS = {"main": "", "outer": "nested/outer_", "nested": "nested/"}
SCOPE_GLOBS = ("", "nested/outer_", "nested/", "nested/o[0-9]*/")
_OUTER = re.compile(r"o(0|[1-9][0-9]*)")
# A path field of a ledger line: a name (family, repeat, fold...), or a family part ``forest.2`` (jobs_per_fold);
# never a separator or '..', so a forged line cannot name a file outside the experiment.
_FIELD = re.compile(r"[A-Za-z0-9_-]{1,80}(\.[1-9][0-9]{0,3})?")


def scope_folder(scope: Any) -> str | None:
    """The folder prefix of a scope's files ('' for the experiment itself), or None for a scope never written."""
    if isinstance(scope, str) and _OUTER.fullmatch(scope):
        return f"nested/{scope}/"
    return SCOPE_FOLDERS.get(scope) if isinstance(scope, str) else None


def _has(details: dict[str, Any], key: tuple[str, ...]) -> bool:
    """Whether the details hold the key at all (its value may be null)."""
    *parents, last = key
    for part in parents:
        details = details.get(part) if isinstance(details, dict) else None
    return isinstance(details, dict) and last in details


def _dig(details: dict[str, Any], key: tuple[str, ...]) -> Any:
    value: Any = details
    for part in key:
        if not isinstance(value, dict):
            return None
        value = value.get(part)
    return value


def file_of(row: Recorded, details: dict[str, Any]) -> str:
    """The file (relative to the experiment) one record names; ValueError if the details cannot name one."""
    folder = scope_folder(details.get("scope", "main"))
    if folder is None:
        raise ValueError(f"scope {details.get('scope')!r} is not one holdfast writes")
    fields = {name: details.get(name) for name in re.findall(r"{(\w+)}", row.path) if name != "scope"}
    for name, value in fields.items():
        if isinstance(value, bool) or not isinstance(value, str | int) or not _FIELD.fullmatch(str(value)):
            raise ValueError(f"its '{name}' is {value!r}")
    return row.path.format(scope=folder, **fields)


@dataclass
class _Record:
    row: Recorded
    entry: dict[str, Any]
    sha: Any


def _records(entries: list[dict[str, Any]], out: list[Problem]) -> dict[str, list[_Record]]:
    """Every recorded hash, grouped by the file it names, in ledger order."""
    by_event: dict[str, list[Recorded]] = {}
    for row in RECORDED:
        by_event.setdefault(row.event, []).append(row)
    found: dict[str, list[_Record]] = {}
    for entry in entries:
        details = entry.get("details")
        if not isinstance(details, dict):
            continue
        for row in by_event.get(str(entry.get("event")), []):
            sha = _dig(details, row.key)
            if sha is None and not (row.none_means_absent and _has(details, row.key)):
                continue
            try:
                name = file_of(row, details)
            except ValueError as exc:
                out.append(Problem("record-names-no-file", f"ledger line seq {entry.get('seq')} (event "
                                   f"{entry.get('event')!r}) records a {row.what}'s sha256 but names no file "
                                   f"holdfast writes: {exc}"))
                continue
            found.setdefault(name, []).append(_Record(row, entry, sha))
    return found


def _sha(path: Path) -> str | None:
    return sha256_file(path) if path.is_file() else None


def _at(record: _Record) -> str:
    return f"seq {record.entry.get('seq')} ({record.entry.get('event')})"


def last_record(entries: list[dict[str, Any]], name: str) -> tuple[Any, dict[str, Any]] | None:
    """The sha256 the ledger last recorded for file ``name`` (relative to the experiment; None: recorded as not
    written) and the ledger line that recorded it; None when no line names the file."""
    records = _records(entries, []).get(name)
    return (records[-1].sha, records[-1].entry) if records else None


def not_as_recorded(exp: Path, entries: list[dict[str, Any]], names: list[str]) -> list[str]:
    """Those of ``names`` (paths relative to ``exp``) whose bytes are not the ones the ledger last recorded for
    them (changed or missing); files the ledger records nothing for are left out. Hashes only these files."""
    found = _records(entries, [])
    out = []
    for name in dict.fromkeys(names):
        records = found.get(name)
        if records and records[-1].sha is not None and _sha(exp / name) != records[-1].sha:
            out.append(name)
    return out


def verify(exp: Path, entries: list[dict[str, Any]], out: list[Problem]) -> dict[str, str]:
    """Check every recorded file; append a problem for each one that is missing, changed or unrecorded.

    Returns the verified files: relative path -> sha256, for every file that matched its records.
    """
    found = _records(entries, out)
    verified: dict[str, str] = {}
    for name, records in sorted(found.items()):
        latest = records[-1]
        row = latest.row
        path = exp / name
        actual = _sha(path)
        fixed = any(r.row.fixed for r in records)
        if latest.sha is None:  # the latest step that could have written it says it wrote none
            if actual is not None:
                out.append(Problem(f"{row.kind}-unrecorded", f"'{path}' exists but {_at(latest)} recorded that "
                                   f"no {row.what} was written"))
            continue
        if actual is None:
            if row.reported:
                out.append(Problem(f"{row.kind}-missing", f"'{path}' is missing, but the ledger recorded the "
                                   f"{row.what}'s sha256 at {_at(latest)}"))
            continue
        wrong = [r for r in (records if fixed else [latest]) if r.sha != actual]
        if wrong:
            if row.reported:
                since = " since the seal" if fixed and wrong[0] is records[0] else ""
                out.append(Problem(f"{row.kind}-changed", f"'{path}' is not the {row.what} the ledger recorded at "
                                   f"{_at(wrong[0])}: its sha256 differs (changed{since})"))
            continue
        verified[name] = actual
    for row in RECORDED:
        if not row.scanned:
            continue
        pattern_fields = {name: "*" for name in re.findall(r"{(\w+)}", row.path) if name != "scope"}
        for folder in SCOPE_GLOBS:
            for path in sorted(exp.glob(row.path.format(scope=folder, **pattern_fields))):
                name = path.relative_to(exp).as_posix()
                if name not in found and path.is_file():
                    found[name] = []  # report each file once, whichever rows match it
                    out.append(Problem(f"{row.kind}-unrecorded", f"'{path}' exists but no ledger line records "
                                       f"it: this {row.what} was not written by a recorded step"))
    return verified
