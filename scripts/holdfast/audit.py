"""The audit: check a finished experiment against its ledger and name every problem.

It recomputes the hash chain, then checks the files the ledger vouches for: the
sealed test file, the development/test split, the folds, the choice, the model and
the verdict. It reads only the ``row_key`` column of the sealed test file, never its
features or target.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pandas as pd

from . import ledger
from ._io import read_json, sha256_file, write_json
from .dataset import KEY, keys_digest
from .layout import CHOICE, DEV, FOLDS, LEDGER, MANIFEST, MODEL, RANKING, TEST, VERDICT, fit_file
from .ledger import Problem


def _sha(path: Path) -> str | None:
    return sha256_file(path) if path.exists() else None


def _load(path: Path, reader: Any, code: str, out: list[Problem]) -> Any | None:
    """Read a file the audit needs; a damaged file is a problem to report, not a crash."""
    try:
        return reader(path)
    except Exception as exc:  # any parse failure means the file is not what the workflow wrote
        out.append(Problem(code, f"'{path}' cannot be read ({type(exc).__name__}): it was damaged or replaced"))
        return None


def _check_seal(exp: Path, entries: list[dict[str, Any]], out: list[Problem]) -> dict[str, Any] | None:
    seals = ledger.events(entries, "seal")
    if len(seals) != 1:
        out.append(Problem("seal-count", f"the ledger records {len(seals)} seal events; exactly one is expected"))
    if not (exp / MANIFEST).exists():
        out.append(Problem("manifest-missing", f"'{exp / MANIFEST}' is missing"))
        return None
    manifest = _load(exp / MANIFEST, read_json, "manifest-edited", out)
    if not isinstance(manifest, dict) or not isinstance(manifest.get("files"), dict):
        if manifest is not None:
            out.append(Problem("manifest-edited", "sealed/manifest.json lacks its file hashes"))
        return None
    if entries and entries[0].get("hash") != manifest.get("ledger_anchor"):
        out.append(Problem("anchor-mismatch", "the first ledger line is not the seal the manifest anchors: "
                           "the ledger was replaced or its start was rewritten"))
    if seals and seals[0]["details"].get("files") != manifest.get("files"):
        out.append(Problem("manifest-edited", "sealed/manifest.json file hashes differ from the seal's ledger entry"))
    # The seal's ledger entry is the record; the manifest is only a copy that could be edited.
    recorded = seals[0]["details"].get("files") if seals else manifest["files"]
    recorded = recorded if isinstance(recorded, dict) else {}
    test_sha = _sha(exp / TEST)
    if test_sha != recorded.get("test.parquet"):
        out.append(Problem("test-changed", f"'{exp / TEST}' is {'missing' if test_sha is None else 'changed'} "
                           "since the seal (sha256 differs from the seal's record)"))
    dev_sha = _sha(exp / DEV)
    if dev_sha != recorded.get("dev.parquet"):
        out.append(Problem("dev-changed", f"'{exp / DEV}' is {'missing' if dev_sha is None else 'changed'} "
                           "since the seal"))
    return manifest


def _check_split(exp: Path, manifest: dict[str, Any], out: list[Problem]) -> tuple[set[str], set[str]]:
    dev_keys: set[str] = set()
    test_keys: set[str] = set()
    def keys_of(path: Path) -> set[str]:
        return set(pd.read_parquet(path, columns=[KEY])[KEY].astype(str))

    if (exp / DEV).exists():
        dev_keys = _load(exp / DEV, keys_of, "dev-changed", out) or set()
    if (exp / TEST).exists():
        test_keys = _load(exp / TEST, keys_of, "test-changed", out) or set()
    overlap = dev_keys & test_keys
    if overlap:
        out.append(Problem("dev-test-overlap", f"{len(overlap)} row key(s) are in both the development and the "
                           f"sealed test set, e.g. {sorted(overlap)[0]!r}"))
    keys = manifest.get("keys") if isinstance(manifest.get("keys"), dict) else {}
    if dev_keys and keys_digest(dev_keys) != keys.get("dev_sha256"):
        out.append(Problem("dev-keys-changed", "the development row keys differ from those recorded at the seal"))
    if test_keys and keys_digest(test_keys) != keys.get("test_sha256"):
        out.append(Problem("test-keys-changed", "the sealed test row keys differ from those recorded at the seal"))
    return dev_keys, test_keys


def _check_folds(exp: Path, entries: list[dict[str, Any]], dev_keys: set[str], test_keys: set[str],
                 out: list[Problem]) -> None:
    path = exp / FOLDS
    assigned = ledger.events(entries, "assign_folds")
    if not path.exists():
        if assigned:
            out.append(Problem("folds-missing", f"'{path}' is missing but the ledger records a fold assignment"))
        return
    folds = _load(path, pd.read_parquet, "folds-changed", out)
    if folds is None or not {KEY, "repeat", "fold"} <= set(folds.columns):
        return
    named_test = set(folds[KEY].astype(str)) & test_keys
    if named_test:
        out.append(Problem("fold-names-test-row", f"folds.parquet names {len(named_test)} sealed test row(s), "
                           f"e.g. {sorted(named_test)[0]!r}"))
    for repeat, part in folds.groupby("repeat"):
        keys = part[KEY].astype(str)
        if set(keys) != dev_keys or keys.duplicated().any():
            out.append(Problem("fold-coverage", f"in repeat {repeat} the folds do not validate every development "
                               "row exactly once"))
            break
    sha = sha256_file(path)
    if not assigned or assigned[-1]["details"].get("folds_sha256") != sha:
        out.append(Problem("folds-changed", "folds.parquet is not the fold table the ledger recorded"))
    latest: dict[tuple[str, int, int], dict[str, Any]] = {}
    for e in ledger.events(entries, "fit"):
        details = e.get("details") or {}
        latest[(str(details.get("family")), int(details.get("repeat", -1)), int(details.get("fold", -1)))] = e
    stale = [e for e in latest.values() if e["details"].get("folds_sha256") != sha]
    if stale:
        out.append(Problem("fits-on-other-folds", f"{len(stale)} fit job(s) used a fold table other than the current "
                           "folds.parquet (folds changed after the fits)"))
    for (family, repeat, fold), e in sorted(latest.items()):
        fits = exp / fit_file("fits", family, repeat, fold)
        if _sha(fits) != e["details"].get("fits_sha256"):
            out.append(Problem("fits-changed", f"'{fits}' is not the file the ledger recorded for that fit job"))


def _check_choice(exp: Path, entries: list[dict[str, Any]], out: list[Problem]) -> str | None:
    tallies, refits = ledger.events(entries, "tally"), ledger.events(entries, "refit")
    choice_path = exp / CHOICE
    if not choice_path.exists():
        return None
    sha = sha256_file(choice_path)
    if not tallies or tallies[-1]["details"].get("choice_sha256") != sha:
        out.append(Problem("choice-changed", "choice.json is not the choice the ledger recorded at the tally"))
    if _sha(exp / RANKING) != (tallies[-1]["details"].get("ranking_sha256") if tallies else None):
        out.append(Problem("ranking-changed", "ranking.parquet is not the ranking the ledger recorded at the tally"))
    choice = _load(choice_path, read_json, "choice-changed", out)
    try:
        winner = choice["winner"]["candidate"] if choice is not None else None
    except (KeyError, TypeError):
        winner = None
        out.append(Problem("choice-changed", "choice.json does not name a winner"))
    model = exp / MODEL
    if not refits:
        if model.exists():
            out.append(Problem("model-unrecorded", "model/model.skops exists but the ledger records no refit"))
        return None
    refit = refits[-1]["details"]
    if refit.get("winner") != winner:
        out.append(Problem("winner-mismatch", f"choice.json names winner {winner} but the ledger's refit is "
                           f"{refit.get('winner')}"))
    model_sha = _sha(model)
    if model_sha != refit.get("model_sha256"):
        state = "missing" if model_sha is None else "not the file"
        out.append(Problem("model-changed", f"model/model.skops is {state} "
                           "the ledger recorded at the refit"))
    return model_sha


def _check_openings(exp: Path, entries: list[dict[str, Any]], model_sha: str | None,
                    out: list[Problem]) -> int:
    """Count openings in every independent record (holdfast.openings); fail when they disagree."""
    from . import openings as records_of

    openings = ledger.events(entries, "open_test")
    verdict = exp / VERDICT
    found = records_of.records(exp)
    count = found.count
    sources = found.by_source()
    registry_kept = records_of.registry_path(exp).exists()
    if not registry_kept:
        sources.pop("registry")  # a folder copied away from its results/ has no registry beside it
    started = {k: v for k, v in sources.items() if k not in ("ledger (finished)", "archive", "verdict")}
    finished = {k: sources[k] for k in ("ledger (finished)", "archive", "verdict")}
    if len(set(started.values())) > 1 or len(set(finished.values())) > 1:
        shown = ", ".join(f"{k} {v}" for k, v in sources.items())
        out.append(Problem("opening-records-disagree", f"the records of openings disagree ({shown}): an opening "
                           f"was removed from some of them; the test set counts as opened {count} time(s)"))
    if count > 1:
        reasons = [r for e in openings for r in e["details"].get("reasons", [])]
        out.append(Problem("opened-more-than-once", f"the sealed test set was opened {count} times; "
                           f"the test estimate is compromised (recorded reasons: {reasons or 'none'})"))
    if max(finished.values()) < count:
        out.append(Problem("opening-unfinished", f"opening {count} was recorded before the sealed rows were read but "
                           "never wrote its verdict (a crash or a kill); it counts as an opening, and any later "
                           "opening is a second look"))
    if openings:
        last = openings[-1]["details"]
        if not verdict.exists():
            out.append(Problem("verdict-missing", "the ledger records an opening but final/verdict.json is missing"))
        elif sha256_file(verdict) != last.get("verdict_sha256"):
            out.append(Problem("verdict-changed", "final/verdict.json is not the verdict the ledger recorded"))
        archived = records_of.archive_path(exp, int(last.get("opening", len(openings))))
        if archived.exists() and sha256_file(archived) != last.get("verdict_sha256"):
            out.append(Problem("archive-changed", f"'{archived}' is not the verdict the ledger recorded"))
        if model_sha is not None and last.get("model_sha256") != model_sha:
            out.append(Problem("opened-other-model", "the last opening evaluated a model file other than the current "
                               "model/model.skops"))
        refit_seq = [e["seq"] for e in ledger.events(entries, "refit")]
        if not refit_seq or openings[0]["seq"] < refit_seq[0]:
            out.append(Problem("opening-before-refit", "the test set was opened before any refit was recorded"))
    elif verdict.exists():
        out.append(Problem("opening-unrecorded", "final/verdict.json exists but the ledger records no opening "
                           "(the ledger was truncated or the verdict was not made by open_test)"))
    return count


def parse_head(text: str) -> tuple[int, str]:
    """'SEQ:HASH' (as a receipt prints it) into its parts; ValueError when it is not of that form."""
    seq, _, digest = text.strip().partition(":")
    if not seq.isdigit() or len(digest) != 64 or any(c not in "0123456789abcdef" for c in digest):
        raise ValueError(f"expected head 'SEQ:HASH' (a sequence number, a colon and a 64-character hash); got {text!r}")
    return int(seq), digest


def _check_anchor(entries: list[dict[str, Any]], expect_head: tuple[int, str] | None, out: list[Problem]) -> None:
    """The entry a receipt anchored must still be in the ledger, unchanged, at its position."""
    if expect_head is None:
        return
    seq, digest = expect_head
    if seq >= len(entries):
        out.append(Problem("head-missing", f"the receipt's head is entry {seq}, but the ledger has only "
                           f"{len(entries)} entries: lines were cut off the end since the receipt was written"))
    elif entries[seq].get("hash") != digest:
        out.append(Problem("head-changed", f"ledger entry {seq} has hash {str(entries[seq].get('hash'))[:16]}…, not "
                           f"the {digest[:16]}… the receipt recorded: the ledger was rewritten up to that entry"))


def _check_signatures(entries: list[dict[str, Any]], public_key: str | None, out: list[Problem]) -> str | None:
    """Every line signed by the key (the auditor's, else the one recorded at the seal); names bad lines by seq."""
    seals = ledger.events(entries, "seal")
    recorded = seals[0]["details"].get("public_key") if seals else None
    if public_key is not None and recorded is not None and public_key != recorded:
        out.append(Problem("public-key-mismatch", "the seal recorded another public key than the one given: the "
                           "ledger was re-signed with another key"))
    key = public_key or recorded
    if key is None:
        return None
    from .signing import verify

    unsigned = [e.get("seq") for e in entries if not e.get("sig")]
    wrong = [e.get("seq") for e in entries if e.get("sig") and not verify(key, str(e.get("hash")), str(e["sig"]))]
    if unsigned:
        out.append(Problem("unsigned-line", f"ledger line(s) with seq {', '.join(map(str, unsigned[:10]))} carry no "
                           "signature although the experiment is signed"))
    if wrong:
        out.append(Problem("bad-signature", f"ledger line(s) with seq {', '.join(map(str, wrong[:10]))} are not "
                           "signed by the experiment's key: they were written or rewritten without it"))
    return key


def audit(exp_dir: str, expect_head: tuple[int, str] | None = None, public_key: str | None = None) -> dict[str, Any]:
    """Check one experiment directory; return {'passed': bool, 'problems': [...], ...}.

    ``expect_head`` (from a receipt) must still be in the ledger at its position; ``public_key`` (raw base64)
    pins the key every line must be signed with (default: the key recorded at the seal, if any).
    """
    exp = Path(exp_dir)
    entries, problems = ledger.verify_chain(exp / LEDGER)
    _check_anchor(entries, expect_head, problems)
    signed_with = _check_signatures(entries, public_key, problems)
    manifest = _check_seal(exp, entries, problems)
    openings = 0
    if manifest is not None:
        dev_keys, test_keys = _check_split(exp, manifest, problems)
        _check_folds(exp, entries, dev_keys, test_keys, problems)
        model_sha = _check_choice(exp, entries, problems)
        openings = _check_openings(exp, entries, model_sha, problems)
    return {
        "experiment": exp.name,
        "passed": not problems,
        "problems": [{"code": p.code, "message": p.message} for p in problems],
        "ledger_entries": len(entries),
        "ledger_head": entries[-1]["hash"] if entries else None,
        "ledger_head_seq": entries[-1].get("seq") if entries else None,
        "test_set_opened": openings,
        "signed_with": signed_with,
        "head_checked": f"{expect_head[0]}:{expect_head[1]}" if expect_head else None,
        "seen_before": (manifest or {}).get("seen_before") if isinstance(manifest, dict) else None,
        "checks": ["hash chain", "seal anchor", "sealed and development files", "dev/test overlap", "fold coverage",
                   "folds and fits against the ledger", "choice, ranking and model against the ledger",
                   "openings and verdict"],
    }


def audit_to_file(exp_dir: str, out_path: str) -> dict[str, Any]:
    """Run the audit and write its result as JSON (the workflow's last rule)."""
    result = audit(exp_dir)
    write_json(out_path, result)
    return result


def report(result: dict[str, Any]) -> str:
    """The audit as lines of text for a terminal."""
    head = "PASS" if result["passed"] else "FAIL"
    lines = [f"{head}: experiment '{result['experiment']}', {result['ledger_entries']} ledger entries, "
             f"test set opened {result['test_set_opened']} time(s)"]
    lines += [f"  - [{p['code']}] {p['message']}" for p in result["problems"]]
    if result.get("head_checked"):
        lines.append(f"  anchored head {result['head_checked'][:24]}…: "
                     + ("found unchanged" if not any(p["code"].startswith("head-") for p in result["problems"])
                        else "NOT found unchanged"))
    if result.get("signed_with"):
        lines.append(f"  signatures checked against public key {result['signed_with'][:16]}…")
    if result.get("seen_before"):
        listed = ", ".join(o["experiment"] for o in result["seen_before"].get("overlaps", []))
        lines.append(f"  note: test rows seen before (opened by {listed}); reason given: "
                     f"{result['seen_before'].get('reason')}")
    return "\n".join(lines)
