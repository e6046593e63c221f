"""Test rows already looked at: a new seal may not reuse rows of a test set another experiment opened.

Renaming an experiment, or starting a "fresh" one on the same data, must not launder a test set that was
already seen. At the seal, the new sealed rows are compared (by row key) with every opened test set under
the same results folder: those named in the registry beside it (kept even if the experiment's folder was
deleted or renamed) and every experiment folder with an opening record. Any overlap is refused unless the
config writes a reason (``test.seen_rows_reason``); then every output says "test rows seen before".

Row keys alone would let a new key launder the rows: the same file keyed by its id column in one experiment
and by row content (no data.id) in the next shares no key. So each opening also registers its rows' value hashes
(:func:`register_rows`, after its one read of the sealed rows; openings before them registered content keys), and
the new rows are compared by value too, over the columns the opened set had (a column added to the file does not
hide a row; a value edited makes another row).

A test set not yet opened is kept out of other experiments' development rows too, for the same target
(:func:`unopened_test_rows`). On the same data file its split is drawn again on the new experiment's rows, so no
sealed file is read. On another file (a grown or edited copy, one rebuilt from the same source) rows are matched
by value with the hashes of its sealed rows that its seal wrote (:data:`SEALED_ROWS`, recorded in the ledger,
so deleting it to escape the check fails the audit); experiments sealed before those hashes were written are
compared on the same file only. A copy without one of the columns it sealed (an id or an unused column dropped) is
compared over every feature and the target instead, where its seal kept those hashes too. An experiment that could
not be compared is named in a note, never passed over in silence; so are development rows equal to its sealed rows
in every feature and the target but not in every column (ids renumbered: counted, not refused). ``holdfast init``
writes such an experiment's test settings instead of drawing its own, when they seal the same rows here.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from . import openings
from .errors import SealedAccessError
from .layout import MANIFEST, TEST

SEEN_BEFORE = "test rows seen before"
# The sealed rows' value hashes, written by the seal beside its sealed file (:func:`write_sealed_rows`).
SEALED_ROWS = "sealed/test_rows.parquet"


def opened_test_sets(results: Path) -> dict[str, tuple[str, Path]]:
    """seal anchor → (experiment label, file with its sealed row keys) for every opened test set under ``results``."""
    found: dict[str, tuple[str, Path]] = {}
    registry_dir = results / openings.REGISTRY_DIR
    for entry in openings.registry_entries(results):
        anchor, keys = entry.get("seal_anchor"), entry.get("test_keys")
        if isinstance(anchor, str) and isinstance(keys, str) and (registry_dir / keys).exists():
            found.setdefault(anchor, (f"{entry.get('experiment')} (folder {entry.get('folder')})", registry_dir / keys))
    if results.is_dir():
        for folder in sorted(p for p in results.iterdir() if p.is_dir() and (p / MANIFEST).exists()):
            anchor = openings.seal_anchor(folder)
            if anchor and anchor not in found and (folder / TEST).exists() and openings.count(folder) > 0:
                found[anchor] = (folder.name, folder / TEST)
    return found


def content_file(keys_file: Path) -> Path:
    """Where an opened test set's content keys sit beside its registered row keys (openings before the row hashes)."""
    return keys_file.with_name(keys_file.name.removesuffix(".parquet") + ".content.parquet")


def rows_file(keys_file: Path) -> Path:
    """Where an opened test set's row hashes (:func:`row_hashes`) sit beside its registered row keys."""
    return keys_file.with_name(keys_file.name.removesuffix(".parquet") + ".rows.parquet")


def _content(rows: Any) -> Any:
    """Rows' content keys without the '~2' that tells identical rows of one file apart (a subset numbers them
    differently)."""
    from .dataset import content_keys

    return content_keys(rows).str.split("~", n=1).str[0]


_COLUMNS = b"holdfast_columns"  # the Parquet metadata key of the columns a file of row hashes covers
# The seal's second hash of each sealed row, over the features and the target only (column and metadata key).
LABELLED = "labelled_hash"
_LABELLED_COLUMNS = b"holdfast_labelled_columns"


def _write_hashes(path: Path, rows: Any, mode: int | None = None, labelled: Any = None) -> None:
    """Write the sorted :func:`row_hashes` of ``rows`` (no row order kept) and the columns they cover; with
    ``labelled`` (the same rows' features and target), their hashes too, sorted on their own."""
    import json

    import numpy as np
    import pyarrow as pa
    import pyarrow.parquet as pq

    from ._io import write_atomic

    columns = {"row_hash": np.sort(row_hashes(rows))}
    metadata = {_COLUMNS: json.dumps([str(c) for c in rows.columns])}
    if labelled is not None:
        columns[LABELLED] = np.sort(row_hashes(labelled))
        metadata[_LABELLED_COLUMNS] = json.dumps(sorted(str(c) for c in labelled.columns))
    table = pa.table(columns).replace_schema_metadata(metadata)
    write_atomic(path, lambda tmp: pq.write_table(table, tmp), mode=mode)


def _read_hashes(path: Path) -> tuple[Any, tuple[str, ...]]:
    """(row hashes, the columns they cover) from a file :func:`_write_hashes` wrote."""
    import json

    import pyarrow.parquet as pq

    table = pq.read_table(path, columns=["row_hash"])
    return table.column("row_hash").to_numpy(), tuple(json.loads((table.schema.metadata or {}).get(_COLUMNS, b"[]")))


def _read_labelled(path: Path) -> tuple[Any, tuple[str, ...]] | None:
    """(hashes over the features and the target, those columns) from a seal's file of row hashes; None when its
    seal kept none (sealed before they were written)."""
    import json

    import pyarrow.parquet as pq

    metadata = pq.read_schema(path).metadata or {}
    if _LABELLED_COLUMNS not in metadata:
        return None
    table = pq.read_table(path, columns=[LABELLED])
    return table.column(LABELLED).to_numpy(), tuple(json.loads(metadata[_LABELLED_COLUMNS]))


def _hashes_over(frame: Any, columns: tuple[str, ...], cache: dict[tuple[str, ...], Any]) -> Any | None:
    """:func:`row_hashes` of ``frame`` over ``columns`` (kept in ``cache`` by column list), or None when ``frame``
    lacks one of them: a copy of the data with a column added is still compared, one with a column removed is not."""
    if not columns or not set(columns) <= set(map(str, frame.columns)):
        return None
    if columns not in cache:
        cache[columns] = row_hashes(frame.set_axis(list(map(str, frame.columns)), axis=1)[list(columns)])
    return cache[columns]


def register_rows(keys_file: Path, test: Any) -> None:
    """Register the row hashes of an opened test set's rows (``test`` as read from its sealed file) beside its row
    keys, once; only the opening may call this, after its one read of the sealed rows. (Openings before the row
    hashes registered content keys: 30 µs a row of 20 columns against half of one.)"""
    from .dataset import KEY

    target = rows_file(keys_file)
    if not target.exists():
        _write_hashes(target, test.drop(columns=[KEY]))


def _registered_rows(path: Path) -> tuple[Any, tuple[str, ...]] | None:
    """(row hashes, the columns they cover) of an opened test set found at ``path`` (a registry keys file, or an
    experiment's sealed file, beside which its seal wrote them), or None when none were written."""
    from ._io import read_json

    if path.parent.name == "sealed" and path.name == Path(TEST).name:
        folder = path.parent.parent
        if not (folder / SEALED_ROWS).is_file():
            return None
        try:
            return _sealed_hashes(folder / SEALED_ROWS, read_json(folder / MANIFEST))
        except (OSError, ValueError, KeyError, TypeError):
            return None
    return _read_hashes(rows_file(path)) if rows_file(path).is_file() else None


def _sealed_hashes(path: Path, manifest: dict[str, Any]) -> tuple[Any, tuple[str, ...]]:
    """A seal's row hashes and their columns; files written by 504be47..7c5e505 keep no columns inside: those are
    the manifest's data columns (the seal hashed every column of the file)."""
    hashes, columns = _read_hashes(path)
    return hashes, columns or tuple(str(c) for c in manifest["data"]["columns"])


def row_hashes(rows: Any) -> Any:
    """A 64-bit hash of each row's values, over its columns sorted by name (pandas' ``hash_pandas_object``).

    Numbers (and booleans) are hashed as float64, so a column read as integers from one file and as floats from an
    edited copy (a blank added) still agrees; text, categories and Arrow strings hash alike; other objects (nested
    lists) by their repr. Neither the row order, the column order nor the file format enters. About half a
    microsecond a row of 20 columns; 64 bits make a chance match between millions of rows unlikely (about one in
    a million at 8 M against 2 M rows).
    """
    import pandas as pd

    columns = {}
    for name in sorted(rows.columns, key=str):
        values = rows[name]
        if pd.api.types.is_bool_dtype(values.dtype) or pd.api.types.is_numeric_dtype(values.dtype):
            values = values.astype("float64")
        elif pd.api.types.is_object_dtype(values.dtype) and pd.api.types.infer_dtype(values) not in ("string", "empty"):
            values = values.map(repr)  # lists, arrays, mixed values: hashed by their text, as pandas cannot hash them
        columns[str(name)] = values
    return pd.util.hash_pandas_object(pd.DataFrame(columns, index=rows.index, copy=False), index=False).to_numpy()


def write_sealed_rows(exp: Path, test: Any, spec: dict[str, Any]) -> str:
    """Write the sealed rows' hashes to :data:`SEALED_ROWS`, read-only, and return the file's sha256: over every
    column, and over the features and the target (``spec``'s), for a copy of the data that lacks a column the model
    does not use. Only the seal calls this, on the rows it is sealing (a seal finished after a kill seals the same
    rows, in the same bytes)."""
    from ._io import sha256_file
    from .dataset import KEY, feature_columns

    labelled = test[[spec["target"], *feature_columns(test, spec)]]
    _write_hashes(exp / SEALED_ROWS, test.drop(columns=[KEY]), mode=0o444, labelled=labelled)
    return sha256_file(exp / SEALED_ROWS)


def unopened_experiments(target: str, results: Path, experiment: str) -> list[tuple[Path, dict[str, Any]]]:
    """(folder, manifest) of every other experiment under ``results`` sealed for the same target column and not
    opened, by folder name. An experiment on another target of the data (the demo's regression twin) answers
    another question, and is left alone."""
    from ._io import read_json

    if not results.is_dir():
        return []
    found = []
    for folder in sorted(p for p in results.iterdir() if p.is_dir() and p.name != experiment):
        try:
            manifest = read_json(folder / MANIFEST)
            recorded, spec = manifest["data"], manifest["spec"]
        except (OSError, ValueError, KeyError, TypeError):
            continue  # not an experiment, or a damaged one: its own audit says so
        if isinstance(recorded, dict) and spec.get("target") == target and openings.count(folder) == 0:
            found.append((folder, manifest))
    return found


def same_data_file(data_path: str, recorded: dict[str, Any], digest: list[str]) -> bool:
    """Whether ``data_path`` is the file the manifest's data record names (size, then sha256; ``digest`` keeps the
    sha256 between experiments, so the file is hashed at most once)."""
    import os

    from ._io import sha256_file

    if recorded.get("bytes") != os.stat(data_path).st_size:
        return False
    if not digest:
        digest.append(sha256_file(data_path))
    return recorded.get("sha256") == digest[0]


def _their_file(folder: Path, manifest: dict[str, Any]) -> Path | None:
    """The file of row hashes an unopened experiment's seal wrote (None: sealed before holdfast wrote them); refused
    when the file is missing or is not the one its seal recorded, since the check could then be escaped."""
    from ._io import sha256_file

    recorded = manifest.get("files", {}).get(Path(SEALED_ROWS).name)
    path = folder / SEALED_ROWS
    if recorded is None and not path.exists():
        return None
    if not path.is_file() or sha256_file(path) != recorded:
        raise SealedAccessError(
            f"'{path}' is {'missing' if not path.is_file() else 'not the file its seal recorded'}: it tells which "
            f"rows experiment '{folder.name}' sealed and has not opened, so no other experiment's rows can be "
            f"checked against them (its audit names the same problem). Restore it from a backup, or remove the "
            f"folder '{folder}' if that experiment will never be opened")
    return path


@dataclass(frozen=True)
class SealedMatch:
    """Which rows of a frame hold the values of a row another experiment sealed, as far as its row hashes tell.

    ``rows`` is None when no comparison could be made; ``over`` says which columns were compared; ``missing`` names
    the columns of its seal the frame lacks (why it was compared over the features and target only, or not at all).
    """

    rows: Any | None
    over: str
    missing: tuple[str, ...] = ()
    labelled: bool = True  # whether its seal kept hashes over the features and target
    similar: Any | None = None  # beside a comparison over every column: the rows equal over features and target


EVERY_COLUMN, FEATURES_AND_TARGET = "every column", "every feature and the target"


def sealed_values_in(frame: Any, folder: Path, manifest: dict[str, Any],
                     cache: dict[tuple[str, ...], Any] | None = None, similar: bool = False) -> SealedMatch | None:
    """Which rows of ``frame`` have the values of a row the experiment in ``folder`` sealed: over every column it
    sealed when ``frame`` has them all (extra columns ignored), else over its features and target when its seal kept
    those hashes and ``frame`` has them. None when it wrote no row hashes (sealed by an older holdfast). ``cache``
    keeps the hashes of ``frame`` by column list between experiments. With ``similar``, a comparison over every
    column also says which rows are equal over the features and target (``SealedMatch.similar``)."""
    import numpy as np

    path = _their_file(folder, manifest)
    if path is None:
        return None
    cache = {} if cache is None else cache
    hashes, columns = _sealed_hashes(path, manifest)
    labelled = _read_labelled(path)

    def over_labels() -> Any | None:
        by_label = _hashes_over(frame, labelled[1], cache) if labelled is not None else None
        return None if by_label is None else np.isin(by_label, labelled[0])

    ours = _hashes_over(frame, columns, cache)
    if ours is not None:
        return SealedMatch(np.isin(ours, hashes), EVERY_COLUMN, similar=over_labels() if similar else None)
    missing = tuple(c for c in columns if c not in set(map(str, frame.columns)))
    alike = over_labels()
    if alike is None:
        return SealedMatch(None, EVERY_COLUMN, missing, labelled is not None)
    return SealedMatch(alike, FEATURES_AND_TARGET, missing)


def _named(columns: tuple[str, ...], most: int = 3) -> str:
    """'a', 'b' and 2 more."""
    shown = ", ".join(f"'{c}'" for c in columns[:most])
    return shown + (f" and {len(columns) - most} more" if len(columns) > most else "")


def unopened_test_rows(frame: Any, development: Any, data_path: str, target: str, results: Path,
                       experiment: str) -> list[dict[str, str]]:
    """Refuse development rows that another experiment under ``results`` sealed as test rows and has not opened.

    Two experiments on one data file with other test settings split it differently, so each would fit on rows the
    other sealed, and the first opening of either would report a figure on rows already used to choose. For the
    same data file the other experiment's split is drawn again on the rows already loaded, with the spec its
    manifest recorded (exact; no sealed file is read). For another file (a grown or edited copy, a file rebuilt
    from the same source) the rows are compared by value with the row hashes its seal wrote
    (:data:`SEALED_ROWS`), over the columns it sealed when this file has them all, else over its features and
    target. Returns a note for each experiment that could not be compared, or whose sealed rows equal development
    rows in every feature and the target but not in every column (:func:`note_lines` words them).
    Opened test sets are :func:`check`'s.
    """
    import numpy as np

    from .dataset import row_keys
    from .seal import split_masks

    development = np.asarray(development)
    keys_by_id: dict[Any, Any] = {}
    hashes_by_columns: dict[tuple[str, ...], Any] = {}
    digest: list[str] = []
    notes = []
    for folder, manifest in unopened_experiments(target, results, experiment):
        spec, recorded = manifest["spec"], manifest["data"]
        if same_data_file(data_path, recorded, digest):
            if spec.get("id") not in keys_by_id:
                keys_by_id[spec.get("id")] = row_keys(frame, spec.get("id"))
            theirs = split_masks(frame, keys_by_id[spec.get("id")], spec, spec["task"])[0]
            shared, how = int(np.sum(theirs & development)), "sealed the same data file"
        else:
            match = sealed_values_in(frame, folder, manifest, hashes_by_columns, similar=True)
            if match is None or match.rows is None:
                why = ("it was sealed before holdfast kept hashes of sealed rows, so only its own data file "
                       f"'{recorded.get('path')}' is checked" if match is None else
                       f"this data file lacks {_named(match.missing)} of the columns it sealed"
                       + (" (a feature among them)" if match.labelled else
                          " (it was sealed before holdfast kept hashes over the features and target alone)"))
                notes.append({"experiment": folder.name, "note": (
                    f"could not be compared with these development rows: {why}; if this data file is a copy of "
                    "its data, fitting here may use rows its opening will score")})
                continue
            shared = int(np.sum(match.rows & development))
            alike = 0 if match.similar is None else int(np.sum(match.similar & ~match.rows & development))
            if alike and not shared:
                notes.append({"experiment": folder.name, "note": (
                    f"{alike} of these {int(np.sum(development))} development rows equal one of its sealed rows "
                    "in every feature and the target, though not in every column it sealed; if they are the same "
                    "records (ids renumbered, another column edited), fitting here uses rows its opening will "
                    "score")})
            how = f"sealed rows with the same values in {match.over} from '{recorded.get('path')}'" + (
                f" (this file lacks {_named(match.missing)}, so only the features and target were compared)"
                if match.missing else "")
        if shared:
            settings = ", ".join(f"test.{k} {spec[k]!r}" for k in ("scheme", "fraction", "salt", "gap_hours")
                                 if k in spec)
            if how.startswith("sealed the same") or spec.get("scheme") in ("hashed", "grouped"):
                way = (f"Use its test settings (data.id {spec.get('id')!r}, {settings}) so that "
                       + ("both seal the same rows" if how.startswith("sealed the same") else
                          "the rows it sealed are sealed here too"))
            else:
                way = (f"Remove those rows from this data file (its test.scheme {spec.get('scheme')!r} draws from "
                       "the whole file, so its settings would seal other rows of this one)")
            raise SealedAccessError(
                f"{shared} of the {int(np.sum(development))} development rows of experiment '{experiment}' are sealed "
                f"test rows of experiment '{folder.name}', which {how} and has not been opened; fitting on them "
                f"here would make its opening score rows already used to choose. Nothing was sealed. {way}, open "
                f"'{folder.name}' first, or remove its folder '{folder}' if it will never be opened")
    return notes


def noted_at_seal(entries: list[dict[str, Any]]) -> list[dict[str, str]]:
    """The notes :func:`unopened_test_rows` gave at this experiment's seal, as its ledger line records them (the
    ledger, not the manifest, so an edit shows as a broken chain)."""
    from . import ledger

    seals = ledger.events(entries, "seal")
    found = seals[0]["details"].get("unopened_notes") if seals else None
    return [n for n in found if isinstance(n, dict)] if isinstance(found, list) else []


def note_lines(notes: list[dict[str, str]]) -> list[str]:
    """The notes :func:`unopened_test_rows` returns, one line each."""
    return [f"experiment '{n.get('experiment')}' (same target, sealed, not opened): {n.get('note')}" for n in notes
            if isinstance(n, dict)]


def check(test_keys: Any, results: Path, experiment: str, reason: str | None,
          own_anchor: str | None = None, rows: Callable[[], Any] | None = None) -> dict[str, Any] | None:
    """Refuse sealed rows that another opened test set holds, unless ``reason``; return what to record.

    ``rows`` gives the new sealed rows with the data file's columns (asked for only when an opened test set has
    registered row hashes or content keys), so that rows keyed another way are still found: by value over the
    columns the opened set had (a column added to the file does not hide them).
    """
    import numpy as np
    import pandas as pd

    opened = opened_test_sets(results)
    if not opened:
        return None
    wanted = set(map(str, test_keys))
    content: set[str] | None = None
    new_rows: Any = None
    hashes_by_columns: dict[tuple[str, ...], Any] = {}
    overlaps = []
    for anchor, (label, path) in sorted(opened.items(), key=lambda item: item[1][0]):
        if anchor == own_anchor:
            continue
        seen = set(pd.read_parquet(path, columns=["row_key"])["row_key"].astype(str))
        shared = len(wanted & seen)
        registered = _registered_rows(path) if rows is not None else None
        if registered is not None:
            new_rows = rows() if new_rows is None else new_rows
            ours = _hashes_over(new_rows, registered[1], hashes_by_columns)
            if ours is not None:
                shared = max(shared, int(np.isin(ours, registered[0]).sum()))
        elif rows is not None and content_file(path).exists():
            if content is None:
                content = set(_content(rows()))
            seen_content = set(pd.read_parquet(content_file(path), columns=["content_key"])["content_key"])
            shared = max(shared, len(content & seen_content))
        if shared:
            overlaps.append({"experiment": label, "rows": shared, "seal_anchor": anchor})
    if not overlaps:
        return None
    listed = ", ".join(f"'{o['experiment']}' ({o['rows']} rows)" for o in overlaps)
    if not reason:
        raise SealedAccessError(
            f"{sum(o['rows'] for o in overlaps)} of the {len(wanted)} rows experiment '{experiment}' would seal were "
            f"in a test set already opened by {listed}; a test set that was looked at is not fresh, whatever the "
            "experiment is called. Nothing was sealed. Use other rows (another test.salt or new data), or write "
            "why in test.seen_rows_reason (every output then says 'test rows seen before')")
    return {"reason": reason, "overlaps": overlaps, "note": SEEN_BEFORE}
