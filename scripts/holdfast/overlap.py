"""Test rows already looked at: a new seal may not reuse rows of a test set another experiment opened.

Renaming an experiment, or starting a "fresh" one on the same data, must not launder a test set that was
already seen. At the seal, the new sealed rows are compared (by row key) with every opened test set under
the same results folder: those named in the registry beside it (kept even if the experiment's folder was
deleted or renamed) and every experiment folder with an opening record. Any overlap is refused unless the
config writes a reason (``test.seen_rows_reason``); then every output says "test rows seen before".

Row keys alone would let a new key launder the rows: the same file keyed by its id column in one experiment
and by row content (no data.id) in the next shares no key. So each opening also registers its rows' content
keys (:func:`register_content`, after its one read of the sealed rows), and the new rows are compared by
content too, over the data file's columns as they are (a column added or a value edited makes other rows).

A test set not yet opened is kept out of other experiments' development rows too, for the same data file and
target (:func:`unopened_test_rows`): its split is drawn again on the new experiment's rows, so no sealed file is
read; ``holdfast init`` writes such an experiment's test settings instead of drawing its own
(:func:`unopened_same_file`).
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path
from typing import Any

from . import openings
from .errors import SealedAccessError
from .layout import MANIFEST, TEST

SEEN_BEFORE = "test rows seen before"


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
    """Where an opened test set's content keys sit beside its registered row keys."""
    return keys_file.with_name(keys_file.name.removesuffix(".parquet") + ".content.parquet")


def _content(rows: Any) -> Any:
    """Rows' content keys without the '~2' that tells identical rows of one file apart (a subset numbers them
    differently)."""
    from .dataset import content_keys

    return content_keys(rows).str.split("~", n=1).str[0]


def register_content(keys_file: Path, test: Any) -> None:
    """Register the content keys of an opened test set's rows (``test`` as read from its sealed file) beside its
    row keys, once; only the opening may call this, after its one read of the sealed rows."""
    import pandas as pd

    from ._io import write_parquet
    from .dataset import KEY

    target = content_file(keys_file)
    if not target.exists():
        write_parquet(target, pd.DataFrame({"content_key": _content(test.drop(columns=[KEY]))}))


def unopened_same_file(data_path: str, target: str, results: Path,
                       experiment: str) -> list[tuple[Path, dict[str, Any]]]:
    """(folder, sealed spec) of every other experiment under ``results`` sealed from the same data file (size, then
    sha256) for the same target column and not opened, by folder name. An experiment on another target of the
    file (the demo's regression twin) answers another question, and is left alone."""
    import os

    from ._io import read_json, sha256_file

    if not results.is_dir():
        return []
    size, digest, found = os.stat(data_path).st_size, None, []
    for folder in sorted(p for p in results.iterdir() if p.is_dir() and p.name != experiment):
        try:
            manifest = read_json(folder / MANIFEST)
            recorded, spec = manifest["data"], manifest["spec"]
        except (OSError, ValueError, KeyError, TypeError):
            continue  # not an experiment, or a damaged one: its own audit says so
        if recorded.get("bytes") != size or spec.get("target") != target:
            continue
        digest = digest or sha256_file(data_path)
        if recorded.get("sha256") == digest and openings.count(folder) == 0:
            found.append((folder, spec))
    return found


def unopened_test_rows(frame: Any, development: Any, data_path: str, target: str, results: Path,
                       experiment: str) -> None:
    """Refuse development rows that another experiment under ``results`` sealed as test rows and has not opened.

    Two experiments on one data file with other test settings split it differently, so each would fit on rows the
    other sealed, and the first opening of either would report a figure on rows already used to choose. Only the
    same data file is compared (:func:`unopened_same_file`): the other experiment's split is drawn again on the rows
    already loaded, with the spec its manifest recorded (no sealed file is read). Opened test sets are
    :func:`check`'s.
    """
    import numpy as np

    from .dataset import row_keys
    from .seal import split_masks

    keys_by_id: dict[Any, Any] = {}
    for folder, spec in unopened_same_file(data_path, target, results, experiment):
        if spec.get("id") not in keys_by_id:
            keys_by_id[spec.get("id")] = row_keys(frame, spec.get("id"))
        theirs = split_masks(frame, keys_by_id[spec.get("id")], spec, spec["task"])[0]
        shared = int(np.sum(theirs & np.asarray(development)))
        if shared:
            settings = ", ".join(f"test.{k} {spec[k]!r}" for k in ("scheme", "fraction", "salt", "gap_hours")
                                 if k in spec)
            raise SealedAccessError(
                f"{shared} of the {int(np.sum(development))} development rows of experiment '{experiment}' are sealed "
                f"test rows of experiment '{folder.name}', which sealed the same data file and has not been opened; "
                f"fitting on them here would make its opening score rows already used to choose. Nothing was "
                f"sealed. Use its test settings (data.id {spec.get('id')!r}, {settings}) so that both seal the same "
                f"rows, open '{folder.name}' first, or remove its folder '{folder}' if it will never be opened")


def check(test_keys: Any, results: Path, experiment: str, reason: str | None,
          own_anchor: str | None = None, rows: Callable[[], Any] | None = None) -> dict[str, Any] | None:
    """Refuse sealed rows that another opened test set holds, unless ``reason``; return what to record.

    ``rows`` gives the new sealed rows with the data file's columns (asked for only when an opened test set has
    registered content keys), so that rows keyed another way are still found.
    """
    import pandas as pd

    opened = opened_test_sets(results)
    if not opened:
        return None
    wanted = set(map(str, test_keys))
    content: set[str] | None = None
    overlaps = []
    for anchor, (label, path) in sorted(opened.items(), key=lambda item: item[1][0]):
        if anchor == own_anchor:
            continue
        seen = set(pd.read_parquet(path, columns=["row_key"])["row_key"].astype(str))
        shared = len(wanted & seen)
        if rows is not None and content_file(path).exists():
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
