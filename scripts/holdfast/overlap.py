"""Test rows already looked at: a new seal may not reuse rows of a test set another experiment opened.

Renaming an experiment, or starting a "fresh" one on the same data, must not launder a test set that was
already seen. At the seal, the new sealed rows are compared (by row key) with every opened test set under
the same results folder: those named in the registry beside it (kept even if the experiment's folder was
deleted or renamed) and every experiment folder with an opening record. Any overlap is refused unless the
config writes a reason (``test.seen_rows_reason``); then every output says "test rows seen before".
"""

from __future__ import annotations

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


def check(test_keys: Any, results: Path, experiment: str, reason: str | None,
          own_anchor: str | None = None) -> dict[str, Any] | None:
    """Refuse sealed rows that another opened test set holds, unless ``reason``; return what to record."""
    import pandas as pd

    opened = opened_test_sets(results)
    if not opened:
        return None
    wanted = set(map(str, test_keys))
    overlaps = []
    for anchor, (label, path) in sorted(opened.items(), key=lambda item: item[1][0]):
        if anchor == own_anchor:
            continue
        seen = set(pd.read_parquet(path, columns=["row_key"])["row_key"].astype(str))
        shared = len(wanted & seen)
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
