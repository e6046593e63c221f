"""What the everyday commands share: the experiment folder, short hashes, files read only as verified, tables."""

from __future__ import annotations

import hashlib
import json
import os
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

from ..errors import ConfigError
from ..layout import LEDGER

SHORT = 8  # hex digits of a hash shown to people; the full hash is in the ledger and `holdfast log --all`


def experiment_folder(value: str | os.PathLike[str]) -> Path:
    """The experiment folder named on the command line; ConfigError when it is not one."""
    exp = Path(value)
    if not exp.is_dir():
        raise ConfigError(f"experiment folder '{exp}' does not exist; pass results/<experiment> (holdfast list "
                          "shows them)")
    if not (exp / LEDGER).exists() and not (exp / "sealed").exists():
        raise ConfigError(f"'{exp}' is not an experiment folder (no ledger.jsonl, no sealed/); pass "
                          "results/<experiment> (holdfast list shows them)")
    return exp


def short(sha: Any) -> str:
    """The first hex digits of a hash ('-' when there is none)."""
    return str(sha)[:SHORT] if isinstance(sha, str) and sha else "-"


class UnverifiedError(Exception):
    """A number would come from a file the audit did not verify."""


def verified_json(exp: Path, name: str, verified: Mapping[str, str]) -> Any:
    """A JSON file's content, only when the audit verified exactly these bytes."""
    if name not in verified:
        raise UnverifiedError(f"'{exp / name}' was not verified by the audit")
    data = (exp / name).read_bytes()
    if hashlib.sha256(data).hexdigest() != verified[name]:
        raise UnverifiedError(f"'{exp / name}' changed after the audit verified it")
    return json.loads(data)


def table(headers: Sequence[str], rows: Sequence[Sequence[str]], indent: str = "") -> list[str]:
    """Plain fixed-width text: a header line, a rule, then one line per row; columns two spaces apart."""
    widths = [max([len(h), *(len(str(r[i])) for r in rows)]) for i, h in enumerate(headers)]

    def line(cells: Sequence[str]) -> str:
        return (indent + "  ".join(str(c).ljust(w) for c, w in zip(cells, widths, strict=True))).rstrip()

    return [line(headers), line(["-" * w for w in widths]), *(line(r) for r in rows)]


def when(stamp: Any) -> str:
    """A ledger time ('2026-12-02T20:13:48.197987Z') as people read it: '2026-12-02 20:13:48 UTC'."""
    text = str(stamp)
    if len(text) >= 19 and text[10] == "T":
        return f"{text[:10]} {text[11:19]} UTC"
    return text
