"""The audit: check an experiment against its ledger and name every problem.

It recomputes the hash chain, then checks every file whose sha256 the ledger records (the table in
``recorded.py``), then what those files say: the development/test split, the folds, the ranking against
the fit records, the choice against the ranking and its declared rule, the count of candidates tried (it
never falls from one tally to the next), the nested summary against the outer scores, the model and the
openings. It reads only the ``row_key`` column of the sealed test file, never its features or target. It
runs only while no step is writing: every step holds the experiment's steps lock shared, and the audit
takes it exclusively or reports that a run is in progress.
"""

from __future__ import annotations

import json
import math
import os
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from . import ledger
from ._io import read_json, sha256_file, write_json
from .dataset import KEY, keys_digest
from .layout import (
    CHOICE,
    DEV,
    FOLDS,
    LEDGER,
    MANIFEST,
    MODEL,
    NESTED_SUMMARY,
    RANKING,
    STEPS_LOCK,
    TEST,
    VERDICT,
    fit_file,
    group_family,
)
from .ledger import Problem
from .overlap import note_lines, noted_at_seal
from .recorded import last_record, scope_folder, verify

PASS, FAIL, IN_PROGRESS = "pass", "fail", "in progress"
CHECKS = ["hash chain", "seal anchor and experiment name", "every file whose sha256 the ledger records",
          "dev/test overlap", "fold coverage", "fits on the current folds", "ranking against the fit records",
          "choice against the ranking and its rule",
          "no tally counting fewer candidates tried than an earlier one", "nested summary against the outer scores",
          "model against the choice", "openings and verdict"]


def _sha(path: Path) -> str | None:
    return sha256_file(path) if path.exists() else None


def _load(path: Path, reader: Any, code: str, out: list[Problem]) -> Any | None:
    """Read a file the audit needs; a damaged file is a problem to report, not a crash."""
    try:
        return reader(path)
    except Exception as exc:  # any parse failure means the file is not what the workflow wrote
        out.append(Problem(code, f"'{path}' cannot be read ({type(exc).__name__}): it was damaged or replaced"))
        return None


def _same(a: Any, b: Any) -> bool:
    """Equal values; a missing number (None, from JSON) equals NaN."""
    def number(x: Any) -> float | None:
        if x is None:
            return math.nan
        if isinstance(x, bool) or not isinstance(x, int | float | np.integer | np.floating):
            return None
        return float(x)

    x, y = number(a), number(b)
    if x is not None and y is not None:
        return (math.isnan(x) and math.isnan(y)) or x == y
    return bool(a == b)


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
    # The seal's ledger entry is the record (recorded.py checks the sealed and development files against
    # it); the manifest is only a copy that could be edited.
    recorded = seals[0]["details"].get("experiment") if seals else manifest.get("experiment")
    name = Path(os.path.abspath(exp)).name
    if recorded is not None and recorded != name:
        out.append(Problem("folder-renamed", f"the folder '{exp}' is named '{name}' but its seal records experiment "
                           f"'{recorded}': it was renamed, or copied from that experiment; audit it as "
                           f"results/{recorded}"))
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
    if not path.exists():
        return  # a recorded fold table that is missing is named by recorded.verify
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
    stale = [e for e in _current_fits(entries, "main").values() if e["details"].get("folds_sha256") != sha]
    if stale:
        out.append(Problem("fits-on-other-folds", f"{len(stale)} fit job(s) used a fold table other than the current "
                           "folds.parquet (folds changed after the fits)"))


def _latest_fits(entries: list[dict[str, Any]], scope: str) -> dict[tuple[str, int, int], dict[str, Any]]:
    """The last fit event of each (family, repeat, fold) in one scope."""
    latest: dict[tuple[str, int, int], dict[str, Any]] = {}
    for e in ledger.events(entries, "fit", scope):
        details = e.get("details") or {}
        try:
            latest[(str(details.get("family")), int(details.get("repeat", -1)), int(details.get("fold", -1)))] = e
        except (TypeError, ValueError):
            continue  # recorded.verify names a fit line whose details name no file
    return latest


def _current_fits(entries: list[dict[str, Any]], scope: str) -> dict[tuple[str, int, int], dict[str, Any]]:
    """:func:`_latest_fits` of the fit jobs the scope's latest tally read, when it recorded them (``fit_groups``):
    files of a family part that an edit of jobs_per_fold left unused are not the ranking's."""
    latest = _latest_fits(entries, scope)
    tallies = ledger.events(entries, "tally", scope)
    groups = (tallies[-1].get("details") or {}).get("fit_groups") if tallies else None
    if not isinstance(groups, list):
        return latest
    return {key: e for key, e in latest.items() if key[0] in groups}


def _check_choice(exp: Path, entries: list[dict[str, Any]], out: list[Problem]) -> str | None:
    refits = ledger.events(entries, "refit")
    choice_path = exp / CHOICE
    if not choice_path.exists() or not refits:
        return None  # a choice or model without its record is named by recorded.verify
    choice = _load(choice_path, read_json, "choice-changed", out)
    try:
        winner = choice["winner"]["candidate"] if choice is not None else None
    except (KeyError, TypeError):
        winner = None
        out.append(Problem("choice-changed", "choice.json does not name a winner"))
    refit = refits[-1]["details"]
    if refit.get("winner") != winner:
        out.append(Problem("winner-mismatch", f"choice.json names winner {winner} but the ledger's refit is "
                           f"{refit.get('winner')}"))
    return _sha(exp / MODEL)


def _scopes_with(entries: list[dict[str, Any]], event: str) -> list[str]:
    """Every scope with at least one event of this type, the experiment's own first."""
    scopes = {str((e.get("details") or {}).get("scope", "main")) for e in ledger.events(entries, event, None)}
    return sorted(scopes, key=lambda s: (s != "main", len(s), s))


def _read_verified(exp: Path, name: str, verified: dict[str, str], reader: Any, code: str,
                   out: list[Problem]) -> Any | None:
    """A verified file's content (None for a file whose hash did not match: its problem is already named)."""
    if name not in verified:
        return None
    return _load(exp / name, reader, code, out)


def _check_rankings(exp: Path, entries: list[dict[str, Any]], verified: dict[str, str],
                    out: list[Problem]) -> None:
    """In every scope with a tally: the ranking agrees with the fit records and the choice with the ranking."""
    for scope in _scopes_with(entries, "tally"):
        folder = scope_folder(scope)
        if folder is None:
            continue
        ranking = _read_verified(exp, folder + RANKING, verified, pd.read_parquet, "ranking-changed", out)
        choice = _read_verified(exp, folder + CHOICE, verified, read_json, "choice-changed", out)
        if ranking is None or not isinstance(choice, dict):
            continue
        needed = {"candidate", "family", "params", "metric", "mean", "se", "se_corrected", "folds", "complete"}
        if not needed <= set(ranking.columns):
            out.append(Problem("ranking-disagrees-with-fits", f"'{exp / folder / RANKING}' lacks the column(s) "
                               f"{sorted(needed - set(ranking.columns))}"))
            continue
        tally = ledger.events(entries, "tally", scope)[-1]["details"]
        _ranking_against_fits(exp, entries, scope, folder, ranking, tally, verified, out)
        _choice_against_ranking(exp / folder / CHOICE, choice, ranking, tally, out)


def _ranking_against_fits(exp: Path, entries: list[dict[str, Any]], scope: str, folder: str, ranking: pd.DataFrame,
                          tally: dict[str, Any], verified: dict[str, str], out: list[Problem]) -> None:
    """Recompute each candidate's mean, folds and completeness from the fit files the tally read."""
    where = exp / folder / RANKING
    folds_sha = verified.get(folder + FOLDS)
    families = set(ranking["family"])
    used = sorted(folder + fit_file("fits", family, repeat, fold)
                  for (family, repeat, fold), e in _current_fits(entries, scope).items()
                  if group_family(family) in families and e["details"].get("folds_sha256") == folds_sha)
    if folds_sha is None or any(name not in verified for name in used):
        return  # the fold table or a fit file failed its own check, already named
    if len(used) != tally.get("fit_files"):
        out.append(Problem("ranking-disagrees-with-fits", f"'{where}' was made from {tally.get('fit_files')} fit "
                           f"file(s) (the tally's record) but {len(used)} fit job(s) of its families ran on the "
                           "current fold table"))
        return
    metrics = sorted({f"val_{metric}" for metric in ranking["metric"]})
    fits = _fit_columns([exp / name for name in used], ["candidate", "status", *metrics])
    expected = len({name.rsplit("/", 1)[1] for name in used})  # folds per family: r<R>f<F>.parquet names
    ranked, fitted = set(ranking["candidate"]), set(fits["candidate"])
    if ranked != fitted:
        odd = sorted(ranked ^ fitted)
        out.append(Problem("ranking-disagrees-with-fits", f"'{where}' and its fit files do not hold the same "
                           f"candidates: {len(odd)} are in only one of them, e.g. {odd[0]}"))
        return
    wrong = []
    for row in ranking.itertuples(index=False):
        part = fits[fits["candidate"] == row.candidate]
        ok = part[part["status"] == "ok"]
        column = f"val_{row.metric}"
        values = ok[column].to_numpy(dtype=float) if column in ok.columns else np.array([math.nan])
        mean = float(np.mean(values)) if len(values) else math.nan
        complete = len(ok) == expected == len(part)
        if not (_same(mean, row.mean) and int(row.folds) == len(values) and bool(row.complete) == complete):
            wrong.append(f"candidate {row.candidate} {row.metric}: ranking mean {row.mean!r} over {row.folds} "
                         f"fold(s), the fit files give {mean!r} over {len(values)}")
    if wrong:
        out.append(Problem("ranking-disagrees-with-fits", f"'{where}' is not what its fit files give for "
                           f"{len(wrong)} candidate/metric pair(s), e.g. {wrong[0]}"))


def _fit_columns(paths: list[Path], columns: list[str]) -> pd.DataFrame:
    """The named columns of the fit files, in order, as one frame (a column a file lacks is missing there).

    Read with Arrow, only these columns, and converted once: a finished experiment has one fit file per fit job,
    and reading each whole with pandas cost about 2.4 ms a file (2.4 s of every closing audit at 1,000 jobs).
    """
    import pyarrow as pa
    import pyarrow.parquet as pq

    tables = []
    for path in paths:
        source = pq.ParquetFile(path)
        tables.append(source.read(columns=[c for c in columns if c in source.schema_arrow.names]))
    return pa.concat_tables(tables, promote_options="default").to_pandas()


def _order(rows: pd.DataFrame) -> list[Any]:
    """Complete rows from the best mean down, ties to the smaller candidate id (the tally's order)."""
    return sorted(rows.itertuples(index=False),
                  key=lambda r: (math.isnan(float(r.mean)), -float(r.mean) if not math.isnan(float(r.mean)) else 0.0,
                                 str(r.candidate)))


def _rule_winner(rule: Any, choice: dict[str, Any], ranked: list[Any], rows: pd.DataFrame) -> tuple[str | None, str]:
    """The candidate the declared rule picks from the ranking, or None and why it cannot be said."""
    if rule == "best_mean":
        return str(ranked[0].candidate), ""
    if rule != "one_standard_error":
        return None, f"it declares rule {rule!r}, which holdfast does not have"
    settings = choice.get("rule_settings")
    if not isinstance(settings, dict) or not isinstance(settings.get("simplicity"), dict):
        return None, ("it declares the one-standard-error rule without the simplicity settings it used "
                      "(rule_settings); it was written by an older holdfast or edited")
    from .stats import one_standard_error_choice
    from .tally import complexity_ranks

    try:
        candidates = {str(r.candidate): {"family": r.family, "params": json.loads(r.params)}
                      for r in rows.itertuples(index=False)}
        ranks = complexity_ranks(candidates, {"family_order": settings.get("family_order") or []},
                                 settings["simplicity"])
        picked = one_standard_error_choice(rows, str(ranked[0].candidate), ranks)
    except (ValueError, TypeError, KeyError) as exc:
        return None, f"its one-standard-error settings cannot be applied to the ranking ({exc})"
    return picked.chosen, ""


def _choice_against_ranking(where: Path, choice: dict[str, Any], ranking: pd.DataFrame, tally: dict[str, Any],
                            out: list[Problem]) -> None:
    """The winner is the one the declared rule picks from the ranking, and its numbers are the ranking's."""
    primary, rule = choice.get("metric"), choice.get("rule")
    winner = choice.get("winner") if isinstance(choice.get("winner"), dict) else {}
    for field, value in (("metric", primary), ("rule", rule), ("winner", winner.get("candidate"))):
        if tally.get(field) != value:
            out.append(Problem("choice-not-from-ranking", f"'{where}' gives {field} {value!r} but the tally recorded "
                               f"{tally.get(field)!r}"))
            return
    rows = ranking[(ranking["metric"] == primary) & ranking["complete"].astype(bool)]
    ranked = _order(rows)
    if not ranked:
        out.append(Problem("choice-not-from-ranking", f"'{where}' names a winner but the ranking has no complete "
                           f"candidate on {primary!r}"))
        return
    expected, why = _rule_winner(rule, choice, ranked, rows)
    if expected is None:
        out.append(Problem("choice-rule-unverifiable", f"'{where}' cannot be checked against its rule: {why}"))
    elif expected != winner.get("candidate"):
        out.append(Problem("choice-breaks-rule", f"'{where}' names winner {winner.get('candidate')} but rule {rule} "
                           f"picks {expected} from ranking.parquet"))
    by_id = {str(r.candidate): r for r in ranked}
    best = ranked[0]
    others = [r for r in ranked if r.candidate != winner.get("candidate")]
    claims = [("winner", winner, by_id.get(str(winner.get("candidate"))), ("family", "mean", "se", "se_corrected",
                                                                          "folds")),
              ("best_mean", choice.get("best_mean"), best, ("candidate", "family", "mean", "se")),
              ("runner_up", choice.get("runner_up"), others[0] if others else None, ("candidate", "family", "mean",
                                                                                    "se"))]
    for label, claim, row, fields in claims:
        if claim is None and row is None:
            continue
        if not isinstance(claim, dict) or row is None:
            out.append(Problem("choice-not-from-ranking", f"'{where}': {label} is {claim!r} but the ranking "
                               f"{'has no such complete candidate' if row is None else 'has one'}"))
            continue
        for field in fields:
            if not _same(claim.get(field), getattr(row, field)):
                out.append(Problem("choice-not-from-ranking", f"'{where}': {label} {field} is {claim.get(field)!r} "
                                   f"but ranking.parquet gives {getattr(row, field)!r}"))
                break
    _check_spec(where, winner, out)


def _check_spec(where: Path, winner: dict[str, Any], out: list[Problem]) -> None:
    """The winner's spec (what the refit builds) is the candidate its id names."""
    from .candidates import candidate_id

    spec = winner.get("spec")
    try:
        same = (spec["id"] == winner.get("candidate") and spec["family"] == winner.get("family")
                and candidate_id(spec["estimator"], spec["preprocess"], spec["params"]) == spec["id"])
    except (KeyError, TypeError, ValueError):
        same = False
    if not same:
        out.append(Problem("winner-spec-mismatch", f"'{where}': the winner's spec is not candidate "
                           f"{winner.get('candidate')} (its id does not match its estimator, preprocessing and "
                           "parameters): the refit would build another model"))


def _check_nested_summary(exp: Path, entries: list[dict[str, Any]], verified: dict[str, str],
                          out: list[Problem]) -> None:
    """nested/summary.json holds what its outer folds' score files give, and each score is its fold's winner's."""
    summary = _read_verified(exp, NESTED_SUMMARY, verified, read_json, "nested-summary-changed", out)
    if not isinstance(summary, dict):
        return
    recorded = ledger.events(entries, "nested_summary", "nested")[-1]["details"].get("outer_folds")
    names = [f"nested/o{o}/score.json" for o in range(int(recorded))] if isinstance(recorded, int) else []
    if any(name not in verified for name in names):
        return  # a missing or changed score file is already named
    scores = [read_json(exp / name) for name in names]
    for outer, (name, score) in enumerate(zip(names, scores, strict=True)):
        choice = _read_verified(exp, f"nested/o{outer}/{CHOICE}", verified, read_json, "choice-changed", out)
        if not isinstance(choice, dict):
            continue  # its own problem is already named
        chosen = (choice["winner"]["candidate"], choice["winner"]["mean"])
        if (score.get("winner"), score.get("inner_cv_mean")) != chosen:
            out.append(Problem("nested-score-disagrees", f"'{exp / name}' scores winner {score.get('winner')} "
                               f"(inner CV mean {score.get('inner_cv_mean')!r}) but nested/o{outer}/choice.json "
                               f"chose {chosen[0]} ({chosen[1]!r})"))
    where = exp / NESTED_SUMMARY
    try:
        wrong = []
        claimed = [(w["outer_fold"], w["candidate"], w["inner_cv_mean"]) for w in summary["winners"]]
        if claimed != [(s["outer_fold"], s["winner"], s["inner_cv_mean"]) for s in scores]:
            wrong.append(f"winners {claimed} against the score files")
        if summary["outer_folds"] != len(scores):
            wrong.append(f"outer_folds {summary['outer_folds']} against {len(scores)} score files")
        counts: dict[str, int] = {}
        for score in scores:
            counts[score["winner"]] = counts.get(score["winner"], 0) + 1
        if summary["winner_counts"] != dict(sorted(counts.items())):
            wrong.append(f"winner_counts {summary['winner_counts']} against {counts}")
        for metric, numbers in summary["metrics"].items():
            values = [float(score["scores"][metric]) for score in scores]
            if numbers["by_outer_fold"] != values or not _same(numbers["mean"], float(np.array(values).mean())):
                wrong.append(f"{metric} mean {numbers['mean']!r} over {numbers['by_outer_fold']} against "
                             f"the scores {values}")
    except (KeyError, TypeError, AttributeError) as exc:
        wrong = [f"it lacks {exc}"]
    if wrong:
        out.append(Problem("nested-summary-disagrees", f"'{where}' is not what its outer folds' score files give: "
                           f"{wrong[0]}"))


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


def _result(exp: Path, state: str, entries: list[dict[str, Any]], problems: list[Problem],
            verified: dict[str, str], openings: int, extra: dict[str, Any] | None = None) -> dict[str, Any]:
    return {
        "experiment": Path(os.path.abspath(exp)).name,
        "state": state,
        "passed": state == PASS,
        "problems": [{"code": p.code, "message": p.message} for p in problems],
        "ledger_entries": len(entries),
        "ledger_head": entries[-1]["hash"] if entries else None,
        "ledger_head_seq": entries[-1].get("seq") if entries else None,
        "test_set_opened": openings,
        "verified": dict(sorted(verified.items())),
        "checks": CHECKS if state != IN_PROGRESS else [],
        **(extra or {}),
    }


def _check_history(exp: Path, entries: list[dict[str, Any]], verified: dict[str, str], out: list[Problem]) -> None:
    """Every file the (verified) history index lists is the one it recorded: the optimism counts on them."""
    name = "history/index.json"
    if name not in verified:
        return
    index = read_json(exp / name)
    for cid, entry in sorted(index.get("candidates", {}).items()):
        for kind in ("fits", "oof"):
            if kind not in entry:
                continue
            path = exp / entry[kind]
            actual = _sha(path)
            if actual != entry.get(f"{kind}_sha256"):
                state = "missing" if actual is None else "changed"
                out.append(Problem(f"history-{state}", f"'{path}' ({kind} of candidate {cid}, kept for the optimism "
                                   f"estimates of later rounds) is {state} since the tally recorded it"))
            else:
                verified[entry[kind]] = actual


def _check_tried_count(exp: Path, entries: list[dict[str, Any]], verified: dict[str, str],
                       out: list[Problem]) -> None:
    """No tally counted fewer candidates tried in all than an earlier one: the history only grows, so a smaller
    count means candidates of earlier rounds were dropped, and that tally's optimism estimates leave them out."""
    most, most_seq = 0, None
    for entry in ledger.events(entries, "tally"):
        tried = entry.get("details", {}).get("candidates_tried")
        if tried is None:
            continue
        if int(tried) < most:
            out.append(Problem("history-shrank", f"the tally at ledger seq {entry['seq']} counted {int(tried)} "
                               f"candidate(s) tried in all, fewer than the {most} the tally at seq {most_seq} "
                               "counted: candidates of earlier rounds were dropped from history/index.json, and "
                               "that tally's optimism estimates leave them out"))
        elif int(tried) > most:
            most, most_seq = int(tried), entry["seq"]


def _guarded(name: str, check: Any, exp: Path, entries: list[dict[str, Any]], verified: dict[str, str],
             out: list[Problem]) -> None:
    """Run a check of what verified files say; content no holdfast step writes is a problem, not a crash."""
    try:
        check(exp, entries, verified, out)
    except Exception as exc:  # files that match forged records can hold anything
        out.append(Problem("check-failed", f"the {name} check could not read what it checks ({type(exc).__name__}: "
                           f"{exc}): a file or ledger record holds what no holdfast step writes"))


def _leftovers(exp: Path, entries: list[dict[str, Any]]) -> list[dict[str, str]]:
    """Files a write that stopped before it finished left behind, and nothing reads: temporary files of the atomic
    writes (``_io.write_atomic``: ``.<name>.<random>.tmp``) and a history index a tally wrote but never recorded. No
    number depends on them, so they are notes, not problems; said so that the folder's every file is accounted for."""
    from .history import INDEX, INDEX_NEXT

    found = [{"file": path.relative_to(exp).as_posix(),
              "why": "a temporary file of a write that stopped before it finished; no step reads it, and that "
                     "step's next write removes it"}
             for path in sorted(exp.rglob(".*.tmp")) if path.is_file()]
    ahead = exp / INDEX_NEXT
    recorded = last_record(entries, INDEX)
    if ahead.is_file() and (recorded is None or _sha(ahead) != recorded[0]):
        found.append({"file": INDEX_NEXT, "why": "a history index a tally wrote but stopped before recording; no "
                                                 "step reads it, and the next tally replaces it"})
    return found


def _audit_now(exp: Path, expect_head: tuple[int, str] | None, public_key: str | None) -> dict[str, Any]:
    entries, problems = ledger.verify_chain(exp / LEDGER, cached=False)
    _check_anchor(entries, expect_head, problems)
    signed_with = _check_signatures(entries, public_key, problems)
    verified = verify(exp, entries, problems) if entries else {}
    manifest = _check_seal(exp, entries, problems)
    openings = 0
    if manifest is not None:
        dev_keys, test_keys = _check_split(exp, manifest, problems)
        _check_folds(exp, entries, dev_keys, test_keys, problems)
        _guarded("ranking and choice", _check_rankings, exp, entries, verified, problems)
        _guarded("nested summary", _check_nested_summary, exp, entries, verified, problems)
        _guarded("history", _check_history, exp, entries, verified, problems)
        _guarded("candidates tried", _check_tried_count, exp, entries, verified, problems)
        model_sha = _check_choice(exp, entries, problems)
        openings = _check_openings(exp, entries, model_sha, problems)
    extra = {"signed_with": signed_with,
             "head_checked": f"{expect_head[0]}:{expect_head[1]}" if expect_head else None,
             "seen_before": manifest.get("seen_before") if isinstance(manifest, dict) else None,
             "unopened_notes": noted_at_seal(entries),
             "leftovers": _leftovers(exp, entries)}
    return _result(exp, FAIL if problems else PASS, entries, problems, verified, openings, extra)


def audit(exp_dir: str | os.PathLike[str], expect_head: tuple[int, str] | None = None,
          public_key: str | None = None, last_step: bool = False) -> dict[str, Any]:
    """Check one experiment directory; return {'state': 'pass' | 'fail' | 'in progress', 'problems': [...], ...}.

    ``expect_head`` (from a receipt) must still be in the ledger at its position; ``public_key`` (raw base64)
    pins the key every line must be signed with (default: the key recorded at the seal, if any).

    'verified' maps every file whose recorded sha256 matched (relative path -> sha256); the headline reads
    only those. While a step holds the experiment (a run is in progress) nothing is checked: the state is
    'in progress' with no problems, because files being written would look like tampering.

    ``last_step`` is for a step its run makes after every other step (the report, whose rule takes every other
    target as input): the only holder of the lock is then that run itself, which writes nothing more, so the
    audit reads even when the lock is held. Snakemake's own lock keeps a second run out of the folder meanwhile.
    """
    exp = Path(exp_dir)
    with ledger.locked_if_free(exp / STEPS_LOCK) as free:
        if not free and not last_step:
            return _result(exp, IN_PROGRESS, [], [], {}, 0)
        return _audit_now(exp, expect_head, public_key)


def audit_to_file(exp_dir: str | os.PathLike[str], out_path: str | os.PathLike[str]) -> dict[str, Any]:
    """Run the audit and write its result as JSON (the workflow's last rule, and the run's closing lines)."""
    result = audit(exp_dir)
    write_json(out_path, result)
    return result


def report(result: dict[str, Any]) -> str:
    """The audit as lines of text for a terminal."""
    if result.get("state") == IN_PROGRESS:
        return (f"IN PROGRESS: experiment '{result['experiment']}': a run is in progress (a step is writing to it), "
                "so nothing was checked; audit again when the run has finished")
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
    lines += [f"  note: at the seal, {line}" for line in note_lines(result.get("unopened_notes") or [])]
    lines += [f"  note: '{left['file']}' is {left['why']}" for left in result.get("leftovers") or []]
    return "\n".join(lines)
