"""`holdfast log results/<experiment>`: the ledger as a timeline people can read.

One line per ledger entry: its sequence number, when (UTC), which step, what it did, and the files it read and
wrote with short hashes (the files come from the table of what each event records, holdfast.recorded).
``--all`` adds every field of every entry, full hashes included. A broken chain is said first; the entries
that still parse are shown.
"""

from __future__ import annotations

import argparse
import json
from pathlib import Path
from typing import Any

from .. import ledger
from ..layout import LEDGER, MANIFEST
from ..progress import Tracker, describe
from ..recorded import DIAGNOSTICS_PICTURES, RECORDED, file_of
from ._common import experiment_folder, short, when

# For every hash an event records (recorded.RECORDED): did the step read that file, write it, or name the file
# it is about to read (the opening's write-ahead line)? tests/test_commands.py checks that every row is here.
DIRECTION: dict[tuple[str, tuple[str, ...]], str] = {
    ("seal", ("files", "test.parquet")): "wrote", ("seal", ("files", "dev.parquet")): "wrote",
    ("seal", ("files", "test_rows.parquet")): "wrote",
    ("assign_folds", ("dev_sha256",)): "read", ("assign_folds", ("folds_sha256",)): "wrote",
    ("assign_folds", ("summary_sha256",)): "wrote", ("assign_folds", ("leakage_sha256",)): "wrote",
    ("fit", ("folds_sha256",)): "read", ("fit", ("fits_sha256",)): "wrote", ("fit", ("oof_sha256",)): "wrote",
    ("tally", ("ranking_sha256",)): "wrote", ("tally", ("choice_sha256",)): "wrote",
    ("tally", ("history_index_sha256",)): "wrote",
    ("refit", ("choice_sha256",)): "read", ("refit", ("dev_sha256",)): "read",
    ("refit", ("model_sha256",)): "wrote", ("refit", ("provenance_sha256",)): "wrote",
    ("open_test", ("test_sha256",)): "read", ("open_test", ("model_sha256",)): "read",
    ("open_test", ("verdict_sha256",)): "wrote", ("open_test", ("marker_sha256",)): "read",
    ("opening_started", ("test_sha256",)): "to read", ("opening_started", ("model_sha256",)): "to read",
    ("round", ("round_sha256",)): "wrote",
    ("score_outer", ("score_sha256",)): "wrote", ("nested_summary", ("summary_sha256",)): "wrote",
    ("learning_curve", ("dev_sha256",)): "read", ("learning_curve", ("folds_sha256",)): "read",
    ("learning_curve", ("choice_sha256",)): "read", ("learning_curve", ("fits_sha256",)): "read",
    ("learning_curve", ("learning_sha256",)): "wrote",
    ("diagnostics", ("choice_sha256",)): "read", ("diagnostics", ("diagnostics_sha256",)): "wrote",
    **{("diagnostics", (f"{name}_png_sha256",)): "wrote"
       for name in DIAGNOSTICS_PICTURES},
    ("learning_summary", ("choice_sha256",)): "read", ("learning_summary", ("summary_sha256",)): "wrote",
    ("learning_summary", ("png_sha256",)): "wrote",
}
VERBS = ("read", "to read", "wrote")


def _dig(details: dict[str, Any], key: tuple[str, ...]) -> Any:
    value: Any = details
    for part in key:
        value = value.get(part) if isinstance(value, dict) else None
    return value


def files_of(entry: dict[str, Any], data_path: str = "data file") -> dict[str, dict[str, list[str]]]:
    """The files one entry names, by verb ('read', 'to read', 'wrote'): short hash -> file names."""
    details = entry.get("details") if isinstance(entry.get("details"), dict) else {}
    out: dict[str, dict[str, list[str]]] = {verb: {} for verb in VERBS}
    if entry.get("event") == "seal" and details.get("data_sha256"):
        out["read"].setdefault(short(details["data_sha256"]), []).append(data_path)
    for row in RECORDED:
        if row.event != entry.get("event"):
            continue
        sha = _dig(details, row.key)
        if not isinstance(sha, str):
            continue
        try:
            name = file_of(row, details)
        except ValueError:
            name = f"? ({row.what})"
        names = out[DIRECTION.get((row.event, row.key), "read")].setdefault(short(sha), [])
        if name not in names:
            names.append(name)
    return out


def _what(entry: dict[str, Any], tracker: Tracker) -> str:
    details = entry.get("details") if isinstance(entry.get("details"), dict) else {}
    scope = details.get("scope", "main")
    if entry.get("event") == "fit" and "best" not in details:
        # Fit lines written before holdfast recorded each job's best score: progress.describe would read the
        # missing score as "every candidate failed".
        text = (f"fit {details.get('family')} r{details.get('repeat')}f{details.get('fold')}: "
                f"{details.get('candidates')} candidate(s), {details.get('failed', 0)} failed")
    else:
        text = describe(entry, tracker)
    if text is None:
        text = str(entry.get("event"))
        if entry.get("event") == "fit":
            text += f" {details.get('family')} r{details.get('repeat')}f{details.get('fold')}"
        elif entry.get("event") in ("tally", "refit"):
            text += f": winner {details.get('winner')}"
    if scope != "main":
        text += f" [nested scope {scope}]"
    return text


def line(entry: dict[str, Any], tracker: Tracker, data_path: str = "data file") -> str:
    """One readable line for one ledger entry (``tracker`` carries the fit jobs seen so far, as in a run's lines)."""
    parts = [_what(entry, tracker)]
    for verb, found in files_of(entry, data_path).items():
        if found:
            parts.append(f"{verb} " + ", ".join(f"{' + '.join(names)} ({sha})" for sha, names in found.items()))
    return f"{entry.get('seq', '?'):>4}  {when(entry.get('time'))}  {entry.get('event', '?'):<15}  " + " | ".join(parts)


def _flat(value: Any, prefix: str) -> list[str]:
    if isinstance(value, dict) and value:
        return [text for key in sorted(value) for text in _flat(value[key], f"{prefix}.{key}" if prefix else key)]
    if isinstance(value, list) and any(isinstance(v, dict | list) for v in value):
        return [text for i, item in enumerate(value) for text in _flat(item, f"{prefix}[{i}]")]
    return [f"{prefix}: {json.dumps(value, ensure_ascii=False)}"]


def timeline(exp: Path, every_field: bool = False) -> list[str]:
    """The whole ledger as lines: a header naming the chain's state, then one line per entry."""
    path = exp / LEDGER
    if not path.exists():
        return [f"'{path}' does not exist: nothing was recorded (the experiment was never sealed)"]
    entries, problems = ledger.verify_chain(path, cached=False)
    try:
        data_path = str(json.loads((exp / MANIFEST).read_text(encoding="utf-8"))["data"]["path"])
    except (OSError, ValueError, KeyError, TypeError):
        data_path = "data file"
    state = "chain intact" if not problems else f"chain BROKEN ({len(problems)} problem(s))"
    out = [f"ledger of '{exp}': {len(entries)} entries, {state}; times in UTC, hashes shortened to sha256 prefixes"]
    out += [f"  - {p}" for p in problems]
    tracker = Tracker()
    for entry in entries:
        out.append(line(entry, tracker, data_path))
        if every_field:
            out += [f"        {text}" for text in _flat(entry, "")]
    return out


def main(args: argparse.Namespace) -> int:
    """Print the timeline; exit 1 when the chain is broken (the lines that parse are still shown)."""
    exp = experiment_folder(args.experiment_dir)
    for text in timeline(exp, args.all):
        print(text)
    return 0 if not ledger.verify_chain(exp / LEDGER, cached=False)[1] else 1


def add_parser(sub: Any) -> None:
    """Register `holdfast log`."""
    p = sub.add_parser("log", help="the ledger as a readable timeline: when, which step, files read and written",
                       description=__doc__.split("\n\n")[1])
    p.add_argument("experiment_dir", help="results/<experiment>")
    p.add_argument("--all", action="store_true", help="show every field of every entry, full hashes included")
    p.set_defaults(func=main, takes_extra=False)
