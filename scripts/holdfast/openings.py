"""Every independent record of an experiment's openings, read without pandas or scikit-learn.

An opening leaves five records, four of them written *before* a sealed row is read (write-ahead):
a marker file ``final/openings/started-<n>.json``, an entry in ``sealed/manifest.json``'s ``openings``, a line in
the results folder's registry ``<results>/.holdfast/openings.jsonl`` (outside the experiment folder, so a deleted
or renamed experiment still counts), and an ``opening_started`` ledger line; after the read come the verdict's
archive copy ``final/openings/<n>.json`` and the ``open_test`` ledger line. Whoever decides whether the test set
may be read (the parse-time guard, the opening step) counts the openings from all of them, never the ledger
alone, so deleting ledger lines does not make a test set look unopened.
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from . import ledger
from ._io import canonical_json, read_json, sha256_file, write_json
from .layout import ARCHIVE, MANIFEST, VERDICT

REGISTRY_DIR = ".holdfast"
REGISTRY = "openings.jsonl"


def marker_path(exp: Path, number: int) -> Path:
    """Where the write-ahead marker of opening ``number`` lives."""
    return exp / ARCHIVE / f"started-{number}.json"


def archive_path(exp: Path, number: int) -> Path:
    """The archive copy of opening ``number``'s verdict."""
    return exp / ARCHIVE / f"{number}.json"


def registry_path(exp: Path) -> Path:
    """The results folder's registry of openings (shared by every experiment under it)."""
    return exp.parent / REGISTRY_DIR / REGISTRY


def _numbers(folder: Path, prefix: str) -> list[int]:
    if not folder.is_dir():
        return []
    found = []
    for path in folder.iterdir():
        stem = path.name[len(prefix):-len(".json")] if path.name.startswith(prefix) and path.suffix == ".json" else ""
        if stem.isdigit():
            found.append(int(stem))
    return sorted(found)


def _manifest_openings(exp: Path) -> list[dict[str, Any]]:
    try:
        manifest = read_json(exp / MANIFEST)
    except (OSError, ValueError):
        return []
    entries = manifest.get("openings") if isinstance(manifest, dict) else None
    return [e for e in entries if isinstance(e, dict)] if isinstance(entries, list) else []


def registry_entries(results: Path) -> list[dict[str, Any]]:
    """Every parsable line of a results folder's registry (unparsable lines are skipped, not trusted)."""
    path = results / REGISTRY_DIR / REGISTRY
    if not path.exists():
        return []
    out = []
    for raw in path.read_text(encoding="utf-8", errors="replace").splitlines():
        try:
            entry = json.loads(raw)
        except ValueError:
            continue
        if isinstance(entry, dict):
            out.append(entry)
    return out


def seal_anchor(exp: Path) -> str | None:
    """The hash of the experiment's seal line, as the manifest records it (identifies the seal across renames)."""
    try:
        manifest = read_json(exp / MANIFEST)
    except (OSError, ValueError):
        return None
    return manifest.get("ledger_anchor") if isinstance(manifest, dict) else None


@dataclass
class OpeningRecords:
    """How many openings each independent record shows."""

    ledger_started: int = 0
    ledger_finished: int = 0
    markers: list[int] = field(default_factory=list)
    archive: list[int] = field(default_factory=list)
    manifest: int = 0
    registry: int = 0
    verdict: int = 0
    ledger_readable: bool = True

    @property
    def count(self) -> int:
        """Openings started, by the record that shows the most: the number that decides every refusal."""
        return max(self.ledger_started, self.ledger_finished, max(self.markers, default=0),
                   max(self.archive, default=0), len(self.markers), len(self.archive), self.manifest,
                   self.registry, self.verdict)

    @property
    def finished(self) -> int:
        """Openings that wrote their verdict (by the archive and the ledger)."""
        return max(self.ledger_finished, len(self.archive))

    def by_source(self) -> dict[str, int]:
        """Each record's count, for messages and the audit."""
        return {"ledger (started)": self.ledger_started, "ledger (finished)": self.ledger_finished,
                "markers": len(self.markers), "archive": len(self.archive), "manifest": self.manifest,
                "registry": self.registry, "verdict": self.verdict}


def records(exp_dir: str | os.PathLike[str]) -> OpeningRecords:
    """Count the openings of one experiment in every record that exists; a broken ledger counts what parsed."""
    exp = Path(exp_dir)
    out = OpeningRecords()
    path = exp / "ledger.jsonl"
    if path.exists():
        entries, problems = ledger.verify_chain(path)
        out.ledger_readable = not problems
        out.ledger_started = len(ledger.events(entries, "opening_started"))
        out.ledger_finished = len(ledger.events(entries, "open_test"))
    out.markers = _numbers(exp / ARCHIVE, "started-")
    out.archive = _numbers(exp / ARCHIVE, "")
    out.manifest = len(_manifest_openings(exp))
    anchor = seal_anchor(exp)
    if anchor:
        out.registry = sum(1 for e in registry_entries(exp.parent) if e.get("seal_anchor") == anchor)
    if (exp / VERDICT).exists():
        try:
            number = read_json(exp / VERDICT).get("opening")
            out.verdict = int(number) if isinstance(number, int) else 1
        except (OSError, ValueError, AttributeError):
            out.verdict = 1
    return out


def count(exp_dir: str | os.PathLike[str]) -> int:
    """Openings started for this experiment, by the record that shows the most."""
    return records(exp_dir).count


def write_ahead(exp: Path, number: int, details: dict[str, Any], test_keys_file: str | None,
                rule: str | None = None) -> None:
    """Record that opening ``number`` starts, in every write-ahead record, before any sealed row is read.

    Order: marker, manifest, registry, ledger. Each write is atomic or an fsynced append, so a kill leaves
    every record written so far; any one of them makes the opening count.
    """
    marker = {"opening": number, **details}
    write_json(marker_path(exp, number), marker)
    manifest = read_json(exp / MANIFEST)
    manifest.setdefault("openings", []).append(
        {"opening": number, "started": details["started"], "marker_sha256": sha256_file(marker_path(exp, number))})
    write_json(exp / MANIFEST, manifest)
    registry = registry_path(exp)
    entry = {"experiment": details["experiment"], "folder": exp.name, "opening": number,
             "seal_anchor": manifest.get("ledger_anchor"), "started": details["started"],
             "test_sha256": details["test_sha256"], "test_keys": test_keys_file}
    with ledger.locked(registry):
        registry.parent.mkdir(parents=True, exist_ok=True)
        fd = os.open(registry, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)
        try:
            os.write(fd, (canonical_json(entry) + "\n").encode("utf-8"))
            os.fsync(fd)
        finally:
            os.close(fd)
    ledger.append(exp / "ledger.jsonl", "opening_started", {"opening": number, **details}, rule=rule)
