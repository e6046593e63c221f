"""Selection rounds: every change to the candidates, folds, metrics or rule made after a ranking existed.

Each look at a ranking followed by a change makes the eventual winner's CV score more optimistic, so the
changes are counted. The first fits record round 1 with the full selection set-up (canonical candidate specs,
fold spec, metrics, rule) and its hash; every later set-up that differs, once a tally of the previous round
existed, is round N+1 in the ledger with what was added, removed or altered and the hash of the ranking that
was visible when the change was made. A set-up that changes before its round was ever tallied replaces that
round (nothing was seen). The full set-up of each round is kept in ``rounds/<N>.json``.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from . import ledger
from ._io import canonical_json, read_json, sha256_file, sha256_text, write_json
from .errors import DataError
from .recorded import last_record

ROUNDS_DIR = "rounds"
CURRENT = "rounds/current.json"


def selection_setup(config: dict[str, Any], families: dict[str, list[dict[str, Any]]]) -> dict[str, Any]:
    """What a round is made of: the candidates (canonical specs by family), the folds, the metrics and the rule."""
    simplicity = {name: spec["simplicity"] for name, spec in config["candidates"].items() if spec.get("simplicity")}
    return {
        "candidates": {family: [{k: c[k] for k in ("id", "estimator", "preprocess", "params")} for c in cands]
                       for family, cands in sorted(families.items())},
        "folds": dict(sorted(config["folds"].items())),
        "metrics": list(config["metrics"]),
        "selection": {"rule": config["selection"]["rule"], "family_order": list(config["selection"]["family_order"]),
                      "simplicity": simplicity},
    }


def setup_hash(setup: dict[str, Any]) -> str:
    """Hash of a set-up's canonical JSON."""
    return sha256_text(canonical_json(setup))


def changes(old: dict[str, Any], new: dict[str, Any]) -> dict[str, Any]:
    """What differs between two set-ups: families and candidates added, removed or altered; folds, metrics, rule."""
    before, after = old.get("candidates", {}), new.get("candidates", {})
    out: dict[str, Any] = {
        "families_added": sorted(set(after) - set(before)),
        "families_removed": sorted(set(before) - set(after)),
        "families_altered": {},
    }
    for family in sorted(set(before) & set(after)):
        ids_before = {c["id"] for c in before[family]}
        ids_after = {c["id"] for c in after[family]}
        if ids_before != ids_after:
            out["families_altered"][family] = {"candidates_added": sorted(ids_after - ids_before),
                                               "candidates_removed": sorted(ids_before - ids_after)}
    for key in ("folds", "metrics", "selection"):
        if old.get(key) != new.get(key):
            out[f"{key}_changed"] = {"from": old.get(key), "to": new.get(key)}
    return out


def summary(change: dict[str, Any]) -> str:
    """The change in a few words, for progress lines and the report."""
    parts = [f"family {f} added" for f in change.get("families_added", [])]
    parts += [f"family {f} removed" for f in change.get("families_removed", [])]
    for family, diff in change.get("families_altered", {}).items():
        parts.append(f"family {family}: {len(diff['candidates_added'])} candidate(s) added, "
                     f"{len(diff['candidates_removed'])} removed")
    parts += [f"{key} changed" for key in ("folds", "metrics", "selection") if f"{key}_changed" in change]
    return "; ".join(parts)


def _main_events(entries: list[dict[str, Any]], name: str) -> list[dict[str, Any]]:
    return ledger.events(entries, name)


def _recorded(exp: Path, name: str, what: str, mend: str, entries: list[dict[str, Any]]) -> dict[str, Any]:
    """The JSON file ``name`` (relative to ``exp``), once its bytes are the ones the ledger last recorded for it;
    a missing or changed one is refused in one line that says what the file is and how to mend it."""
    path = exp / name
    found = last_record(entries, name)
    actual = sha256_file(path) if path.is_file() else None
    if found is not None and found[0] is not None and actual != found[0]:
        state = "missing" if actual is None else "changed since the ledger recorded it (its sha256 differs)"
        raise DataError(f"'{path}' ({what}, recorded at ledger seq {found[1]['seq']}) is {state}; {mend}")
    return read_json(path)


def recorded_round(exp: Path, number: int, entries: list[dict[str, Any]]) -> dict[str, Any]:
    """rounds/<number>.json, checked against its record (a new round is compared with it, and an unchanged
    set-up is copied from it)."""
    return _recorded(exp, f"{ROUNDS_DIR}/{number}.json", f"selection round {number}'s set-up",
                     f"put back the copy the ledger recorded ('holdfast audit {exp}' names it; a round's record is "
                     "not made again)", entries)


def current_round(exp: Path, entries: list[dict[str, Any]]) -> int:
    """The round number a tally counts, from rounds/current.json once it is the copy the latest round recorded:
    another round's valid copy put in its place would make the choice say the wrong number of rounds."""
    found = _recorded(exp, CURRENT, "the current selection round",
                      "delete it and run again: the record_round step writes it again from the latest round",
                      entries)
    return int(found["round"])


def record_round(exp_dir: str, setup: dict[str, Any], out_path: str, ledger_path: str,
                 rule: str | None = None) -> dict[str, Any]:
    """Record the set-up about to be fitted as the current round (a new one only if the last one was tallied)."""
    exp = Path(exp_dir)
    digest = setup_hash(setup)
    entries = ledger.read(ledger_path) if Path(ledger_path).exists() else []
    rounds = _main_events(entries, "round")
    last = rounds[-1] if rounds else None
    if last is not None and last["details"].get("setup_sha256") == digest:
        current = recorded_round(exp, int(last["details"]["round"]), entries)
        write_json(out_path, current)
        return current
    seen = last is not None and any(e["seq"] > last["seq"] for e in _main_events(entries, "tally"))
    # A set-up replaced before any tally saw it is not a new round: it takes the unseen round's number and is
    # compared with the round before that one.
    number = 1 if last is None else int(last["details"]["round"]) + (1 if seen else 0)
    replaces = last is not None and not seen
    baseline = recorded_round(exp, number - 1, entries) if number > 1 else None
    change = changes(baseline["setup"], setup) if baseline else None
    ranking = exp / "ranking.parquet"
    visible = sha256_file(ranking) if (seen and ranking.exists()) else None
    record = {"round": number, "setup": setup, "setup_sha256": digest, "changes": change,
              "compared_with": number - 1 if baseline else None, "ranking_seen_sha256": visible}
    write_json(exp / ROUNDS_DIR / f"{number}.json", record)
    write_json(out_path, record)
    n_candidates = sum(len(c) for c in setup["candidates"].values())
    first = f"{n_candidates} candidate(s), {len(setup['candidates'])} family(ies)"
    ledger.append(ledger_path, "round", {
        "round": number, "setup_sha256": digest, "candidates": n_candidates,
        "replaces_unseen_setup": replaces, "changes": change,
        "summary": summary(change) if change else first,
        "ranking_seen_sha256": visible, "round_sha256": sha256_file(exp / ROUNDS_DIR / f"{number}.json"),
    }, rule=rule)
    return record


def rounds_so_far(entries: list[dict[str, Any]]) -> int:
    """The number of the latest selection round in a ledger (0 before the first fits)."""
    found = _main_events(entries, "round")
    return int(found[-1]["details"]["round"]) if found else 0
