"""Every candidate ever tallied, kept for the optimism estimates of later rounds.

A family edited between rounds rewrites its ``fits/`` and ``oof/`` files, so the tally copies what it saw of
each candidate into ``history/`` first: its fit records and its out-of-fold predictions, keyed by candidate and
by the fold table they were scored on. The optimism estimates then count every candidate ever tried, not only
the current set: BBC-CV draws over all of them (out-of-fold predictions are comparable across fold tables),
and the Tibshirani–Tibshirani estimate uses every candidate scored on the current fold table (it needs the
same folds). Predictions are stored by row position in ``dev.parquet`` (fixed at the seal), not by row key,
so hundreds of candidates stay small in memory; the tally archives them one oof/ table at a time.
"""

from __future__ import annotations

import os
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from . import ledger
from ._io import read_json, sha256_file, write_json, write_parquet
from .dataset import KEY
from .errors import DataError
from .recorded import last_record

HISTORY = "history"
INDEX = "history/index.json"
# A tally writes the new index here, records its sha256 in the ledger, and only then moves it over INDEX: so
# INDEX is always the one the latest tally recorded, and a later tally can refuse any other (promote()).
INDEX_NEXT = "history/index.next.json"


def table_id(folds_sha256: str) -> str:
    """Short name of a fold table inside history/."""
    return folds_sha256[:16]


def read_index(exp: Path) -> dict[str, Any]:
    """The history index: candidate id → family, fold table, first round and files (empty before any tally)."""
    path = exp / INDEX
    return read_json(path) if path.exists() else {"candidates": {}, "fold_tables": {}}


def read_index_for_tally(exp: Path, entries: list[dict[str, Any]]) -> dict[str, Any]:
    """The history index a tally builds on: the one the latest tally recorded, refused otherwise.

    A tally that found no index (deleted), or one cut short, edited or with entries taken out, would build on it:
    started afresh, "tried in all" would shrink and the optimism estimates would leave out the candidates of
    earlier rounds; edited consistently (an entry pointing at other predictions, with their sha256), the next
    tally would record the edit and the audit would pass. Before the first tally there is nothing to check.
    """
    found = last_record(entries, INDEX)
    if found is None or found[0] is None:
        return read_index(exp)
    expected, seq = found[0], found[1]["seq"]
    path = exp / INDEX
    ahead = exp / INDEX_NEXT
    if ahead.is_file() and sha256_file(ahead) == expected and (not path.is_file() or sha256_file(path) != expected):
        promote(exp)  # the tally that recorded it stopped before moving it into place
    most = max(int(e["details"].get("candidates_tried") or 0) for e in ledger.events(entries, "tally"))
    tally_at, counting = f"the tally at ledger seq {seq}", f"(counting {most} candidate(s) tried in all)"
    mend = (f"put back the copy the ledger recorded ('holdfast audit {exp}' names the file; the history of earlier "
            "rounds is not made again)")
    if not path.is_file():
        raise DataError(f"'{path}' is missing, but {tally_at} recorded it {counting}: without it this tally would "
                        "count only the current candidates and its optimism estimates would leave out those of "
                        f"earlier rounds; {mend}")
    if sha256_file(path) != expected:
        raise DataError(f"'{path}' is not the history index {tally_at} recorded {counting}: it was cut short or "
                        f"edited since, and this tally's optimism estimates would rest on it; {mend}")
    index = read_json(path)
    if len(index["candidates"]) < most:  # a ledger an older holdfast wrote after such an edit
        raise DataError(f"'{path}' lists {len(index['candidates'])} candidate(s), but an earlier tally counted "
                        f"{most} tried in all: candidates of earlier rounds were taken out of it; {mend}")
    return index


def promote(exp: Path) -> None:
    """Move the index a tally wrote and recorded into place (see :data:`INDEX_NEXT`)."""
    os.replace(exp / INDEX_NEXT, exp / INDEX)


def to_archive(index: dict[str, Any], fits: pd.DataFrame, folds_sha256: str) -> set[str]:
    """Complete candidates whose out-of-fold outputs this tally archives (not yet kept for this fold table)."""
    table = table_id(folds_sha256)
    out = set()
    for cid, part in fits.groupby("candidate", sort=True):
        entry = index["candidates"].get(cid)
        if (entry is None or entry["fold_table"] != table) and bool((part["status"] == "ok").all()):
            out.add(str(cid))
    return out


def archive_oof(exp: Path, oof: pd.DataFrame, rows: np.ndarray, folds_sha256: str,
                wanted: set[str]) -> dict[str, dict[str, str]]:
    """Write history/<table>/oof/<candidate>.parquet for each wanted candidate with rows in this ``oof`` table.

    ``rows``: each row's position in dev.parquet. Called once per table (a family's rows are in its own
    tables), so the out-of-fold outputs of every candidate are never in memory at once.
    """
    if (rows < 0).any():
        unknown = oof.loc[rows < 0, KEY].iloc[0]
        raise DataError(f"out-of-fold row key {unknown!r} is not a row of dev.parquet; the oof/ files do not belong "
                        "to this experiment's seal: rerun the fits")
    table = table_id(folds_sha256)
    files: dict[str, dict[str, str]] = {}
    present = set(oof["candidate"].astype(str).unique()) & wanted
    outputs = [c for c in oof.columns if c == "prediction" or str(c).startswith(("proba_", "decision"))]
    for cid in sorted(present):
        mine = (oof["candidate"] == cid).to_numpy()
        stored = pd.DataFrame({"pos": rows[mine].astype("int32"), "repeat": oof.loc[mine, "repeat"].to_numpy(
            dtype="int16")})
        for column in outputs:
            stored[column] = oof.loc[mine, column].to_numpy()
        stored = stored.sort_values(["repeat", "pos"], kind="stable").reset_index(drop=True)
        oof_file = f"{HISTORY}/{table}/oof/{cid}.parquet"
        write_parquet(exp / oof_file, stored)
        files[cid] = {"oof": oof_file, "oof_sha256": sha256_file(exp / oof_file)}
    return files


def archive(exp: Path, fits: pd.DataFrame, oof_files: dict[str, dict[str, str]], folds_sha256: str,
            round_number: int, candidates: dict[str, dict[str, Any]]) -> dict[str, Any]:
    """Copy each current candidate's fit records into history/ (once per fold table) and index them with the
    out-of-fold files :func:`archive_oof` wrote. Returns the updated index, which is written too.
    """
    index = read_index(exp)
    table = table_id(folds_sha256)
    index["fold_tables"][table] = folds_sha256
    for cid, part in fits.groupby("candidate", sort=True):
        entry = index["candidates"].get(cid)
        if entry is not None and entry["fold_table"] == table:
            continue
        complete = bool((part["status"] == "ok").all())
        fit_file = f"{HISTORY}/{table}/fits/{cid}.parquet"
        write_parquet(exp / fit_file, part.reset_index(drop=True))
        files = {"fits": fit_file, "fits_sha256": sha256_file(exp / fit_file)}
        if complete and cid in oof_files:
            files.update(oof_files[cid])
        index["candidates"][cid] = {
            "family": candidates.get(cid, {}).get("family", str(part["family"].iloc[0])),
            "fold_table": table, "first_round": int(entry["first_round"]) if entry else round_number,
            "complete": complete, **files}
    write_json(exp / INDEX_NEXT, index)  # in place once the tally recorded it (promote)
    return index


def candidates_on(index: dict[str, Any], folds_sha256: str) -> list[str]:
    """Complete candidates scored on this fold table."""
    table = table_id(folds_sha256)
    return sorted(c for c, e in index["candidates"].items() if e["fold_table"] == table and e["complete"])


def _verified(exp: Path, index: dict[str, Any], cid: str, kind: str) -> Path:
    """The history file of candidate ``cid`` (``kind`` 'fits' or 'oof') once its bytes are the ones the index
    recorded: a file cut short, swapped or deleted would change the optimism estimates without a word."""
    entry = index["candidates"][cid]
    path = exp / entry[kind]
    actual = sha256_file(path) if path.is_file() else None
    if actual != entry.get(f"{kind}_sha256"):
        state = "missing" if actual is None else "not the file the index recorded (its sha256 differs)"
        raise DataError(f"'{path}' ({kind} of candidate {cid}, kept in {INDEX} for the optimism estimates of later "
                        f"rounds) is {state}; put back the copy the index recorded ('holdfast audit {exp}' names "
                        "every such file; the history of earlier rounds is not made again)")
    return path


def fits_of(exp: Path, index: dict[str, Any], ids: list[str]) -> pd.DataFrame:
    """The archived fit records of these candidates, concatenated."""
    return pd.concat([pd.read_parquet(_verified(exp, index, c, "fits")) for c in ids], ignore_index=True)


def oof_by_repeat(exp: Path, index: dict[str, Any], ids: list[str], rows: np.ndarray, classes: list[Any] | None,
                  keep: Callable[[dict[str, np.ndarray]], dict[str, np.ndarray]] | None = None,
                  ) -> tuple[list[dict[str, dict[str, np.ndarray]]], list[str]]:
    """Out-of-fold outputs of these candidates on ``rows`` (dev positions), one mapping per shared repeat.

    A candidate without a prediction for every row in each shared repeat is left out and named in the
    second return value (it cannot be compared row by row with the others). ``keep`` may drop outputs
    no one will read; files are read one candidate at a time.
    """
    left_out: list[str] = []
    stored: dict[str, Path] = {}
    repeats: dict[str, set[Any]] = {}
    for cid in ids:
        if "oof" not in index["candidates"][cid]:
            left_out.append(cid)
            continue
        stored[cid] = _verified(exp, index, cid, "oof")
        repeats[cid] = set(pd.read_parquet(stored[cid], columns=["repeat"])["repeat"].unique())
    if not stored:
        return [], left_out
    shared = sorted(set.intersection(*repeats.values()))
    proba = [f"proba_{c}" for c in classes] if classes is not None else None
    out: list[dict[str, dict[str, np.ndarray]]] = [{} for _ in shared]
    for cid, path in stored.items():
        frame = pd.read_parquet(path)
        per_repeat = []
        for repeat in shared:
            part = frame[frame["repeat"] == repeat].set_index("pos")
            if not pd.Index(rows).isin(part.index).all():
                break
            part = part.loc[rows]
            outputs = {"predict": part["prediction"].to_numpy()}
            if proba and all(c in part.columns for c in proba) and part[proba].notna().all().all():
                outputs["predict_proba"] = part[proba].to_numpy(dtype=float)
            if "decision" in part.columns and part["decision"].notna().all():
                outputs["decision_function"] = part["decision"].to_numpy(dtype=float)
            per_repeat.append(keep(outputs) if keep is not None else outputs)
        del frame
        if len(per_repeat) != len(shared):
            left_out.append(cid)
            continue
        for r, outputs in enumerate(per_repeat):
            out[r][cid] = outputs
    return out, sorted(left_out)
