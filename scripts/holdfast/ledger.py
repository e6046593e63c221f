"""The ledger: an append-only, hash-chained JSON-lines record of every step that touches data.

Each line holds ``seq``, ``time`` (UTC), ``event``, ``actor``, ``details``, ``prev`` (the
previous line's hash) and ``hash`` (SHA-256 of the line's canonical JSON without ``hash``).
Appends hold an exclusive lock, write one whole line and fsync, so parallel fit jobs
never interleave. :func:`verify_chain` recomputes the chain and names every break.
"""

from __future__ import annotations

import datetime as _dt
import fcntl
import functools
import getpass
import json
import os
import socket
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from ._io import canonical_json, sha256_text
from .errors import LedgerError

GENESIS = "0" * 64
LEDGER_NAME = "ledger.jsonl"
SIGNING = "signing.json"  # beside the ledger: where the private key is and its public half (written at the seal)


def _utc_now() -> str:
    return _dt.datetime.now(_dt.UTC).isoformat(timespec="microseconds").replace("+00:00", "Z")


def actor(rule: str | None = None) -> dict[str, Any]:
    """Who is acting: user, host, process id and the workflow rule, if any."""
    try:
        user = getpass.getuser()
    except (KeyError, OSError):
        user = str(os.getuid())
    who = {"user": user, "host": socket.gethostname(), "pid": os.getpid(), "rule": rule}
    if os.environ.get("SLURM_JOB_ID"):
        who["slurm_job"] = os.environ["SLURM_JOB_ID"]  # evidence that the step ran under the scheduler
    return who


def line_hash(entry: dict[str, Any]) -> str:
    """The hash a ledger line must carry: SHA-256 of its canonical JSON without 'hash' (and without 'sig')."""
    body = {k: v for k, v in entry.items() if k not in ("hash", "sig")}
    return sha256_text(canonical_json(body))


def _signer(ledger: Path) -> Any | None:
    """The Ed25519 private key this experiment's lines are signed with, or None when signing is off."""
    settings = ledger.parent / SIGNING
    if not settings.exists():
        return None
    from .signing import load_private_key

    with open(settings, encoding="utf-8") as handle:
        return load_private_key(json.load(handle)["private_key"])


@contextmanager
def locked(path: str | os.PathLike[str], shared: bool = False) -> Iterator[None]:
    """Hold an advisory lock on ``<path>.lock`` for the block: exclusive, or shared with other shared holders."""
    lock_path = Path(str(path) + ".lock")
    lock_path.parent.mkdir(parents=True, exist_ok=True)
    fd = os.open(lock_path, os.O_RDWR | os.O_CREAT, 0o644)
    try:
        fcntl.flock(fd, fcntl.LOCK_SH if shared else fcntl.LOCK_EX)
        yield
    finally:
        fcntl.flock(fd, fcntl.LOCK_UN)
        os.close(fd)


def holder(path: str | os.PathLike[str]) -> str | None:
    """How others hold the lock on ``<path>.lock`` now: None (nobody), "shared" (runs and their steps) or
    "exclusive" (an audit's instant), found by trying both for an instant.

    Unlike :func:`locked_if_free` it makes no lock file: where none exists, nobody ever held it.
    """
    try:
        fd = os.open(Path(str(path) + ".lock"), os.O_RDONLY)  # flock works on a read-only descriptor
    except OSError:
        return None
    try:
        for mode, held in ((fcntl.LOCK_EX, None), (fcntl.LOCK_SH, "shared")):
            try:
                fcntl.flock(fd, mode | fcntl.LOCK_NB)
                return held  # granted: the exclusive lock means nobody holds it; the shared one, only sharers do
            except BlockingIOError:
                pass
        return "exclusive"
    finally:
        os.close(fd)  # closing the descriptor lets go of whatever was taken


def held_elsewhere(path: str | os.PathLike[str]) -> bool:
    """Whether someone holds the lock on ``<path>.lock`` now (shared or exclusive); makes no lock file."""
    return holder(path) is not None


def held_shared_elsewhere(path: str | os.PathLike[str]) -> bool:
    """Whether others hold the lock on ``<path>.lock`` shared now (a run or its steps), not exclusively (an audit's
    instant). Makes no lock file."""
    return holder(path) == "shared"


@contextmanager
def locked_if_free(path: str | os.PathLike[str]) -> Iterator[bool]:
    """Try the exclusive lock on ``<path>.lock`` without waiting; yield whether it is held for the block.

    Yields False while anyone else holds the lock, shared or exclusive. A lock file that does not exist
    and cannot be made (a read-only copy) means no holder ever used it, so that counts as free.
    """
    lock_path = Path(str(path) + ".lock")
    try:
        fd = os.open(lock_path, os.O_RDWR | os.O_CREAT, 0o644) if lock_path.parent.is_dir() else -1
    except OSError:
        try:
            fd = os.open(lock_path, os.O_RDONLY)  # flock works on a read-only descriptor
        except OSError:
            fd = -1
    if fd < 0:
        yield True
        return
    try:
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            yield False
            return
        try:
            yield True
        finally:
            fcntl.flock(fd, fcntl.LOCK_UN)
    finally:
        os.close(fd)


def _last_entry(path: Path) -> dict[str, Any] | None:
    if not path.exists() or path.stat().st_size == 0:
        return None
    with open(path, "rb") as handle:
        data = handle.read()
    if not data.endswith(b"\n"):
        raise LedgerError(f"ledger '{path}' ends in a torn line (an append was cut off); "
                          f"run 'holdfast audit {path.parent}' and start a new experiment if it fails")
    last = data.rstrip(b"\n").rsplit(b"\n", 1)[-1]
    try:
        return json.loads(last)
    except json.JSONDecodeError as exc:
        raise LedgerError(f"ledger '{path}' has an unreadable last line; run 'holdfast audit {path.parent}'") from exc


def append(path: str | os.PathLike[str], event: str, details: dict[str, Any],
           rule: str | None = None) -> dict[str, Any]:
    """Append one event under the lock and fsync it; return the entry written."""
    ledger = Path(path)
    with locked(ledger):
        last = _last_entry(ledger)
        entry: dict[str, Any] = {
            "seq": 0 if last is None else int(last["seq"]) + 1,
            "time": _utc_now(),
            "event": event,
            "actor": actor(rule),
            "details": details,
            "prev": GENESIS if last is None else str(last["hash"]),
        }
        entry["hash"] = line_hash(entry)
        key = _signer(ledger)
        if key is not None:
            from .signing import sign

            entry["sig"] = sign(key, entry["hash"])
        line = (canonical_json(entry) + "\n").encode("utf-8")
        fd = os.open(ledger, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)
        try:
            os.write(fd, line)
            os.fsync(fd)
        finally:
            os.close(fd)
    return entry


def read(path: str | os.PathLike[str]) -> list[dict[str, Any]]:
    """All entries of a ledger whose chain is intact; raise LedgerError otherwise."""
    entries, problems = verify_chain(path)
    if problems:
        raise LedgerError(f"ledger '{path}' is broken: {problems[0]}; run 'holdfast audit' on the experiment")
    return entries


@dataclass(frozen=True)
class Problem:
    """One reason an audit fails: a short code and a sentence."""

    code: str
    message: str

    def __str__(self) -> str:
        return f"[{self.code}] {self.message}"


def verify_chain(path: str | os.PathLike[str], cached: bool = True) -> tuple[list[dict[str, Any]], list[Problem]]:
    """Recompute the chain. Returns the entries that parsed and every problem found.

    With ``cached`` the result is kept per process for an unchanged file (same size and modification time),
    because one parse asks several times; callers must not change the returned lists. The audit reads afresh.
    """
    ledger = Path(path)
    try:
        stat = ledger.stat()
    except FileNotFoundError:
        return [], [Problem("ledger-missing", f"ledger '{ledger}' does not exist")]
    if not cached:
        return _verify_chain.__wrapped__(str(ledger), stat.st_size, stat.st_mtime_ns)
    return _verify_chain(str(ledger.resolve()), stat.st_size, stat.st_mtime_ns)


@functools.lru_cache(maxsize=8)
def _verify_chain(path: str, size: int, mtime_ns: int) -> tuple[list[dict[str, Any]], list[Problem]]:
    ledger = Path(path)
    problems: list[Problem] = []
    entries: list[dict[str, Any]] = []
    if not ledger.exists():
        return [], [Problem("ledger-missing", f"ledger '{ledger}' does not exist")]
    data = ledger.read_bytes()
    lines = data.split(b"\n")
    if lines and lines[-1] == b"":
        lines = lines[:-1]
    if data and not data.endswith(b"\n"):
        problems.append(Problem("torn-append", f"ledger line {len(lines)}, the last, is incomplete "
                                "(an append was cut off)"))
    prev_hash: str | None = GENESIS
    for number, raw in enumerate(lines, start=1):
        try:
            entry = json.loads(raw)
            if not isinstance(entry, dict):
                raise ValueError("not an object")
        except ValueError:
            if not (number == len(lines) and problems and problems[-1].code == "torn-append"):
                problems.append(Problem("unreadable-line", f"ledger line {number} is not a JSON object"))
            prev_hash = None  # the next line's link cannot be checked; later lines still are
            continue
        expected_seq = number - 1
        if entry.get("hash") != line_hash(entry):
            problems.append(Problem("edited-line", f"ledger line {number} (seq {entry.get('seq')}, "
                                    f"event {entry.get('event')!r}) does not match its own hash: it was edited"))
        if prev_hash is not None and entry.get("prev") != prev_hash:
            problems.append(Problem("broken-link", f"ledger line {number} (seq {entry.get('seq')}) does not link to "
                                    "the line before it: a line was deleted, inserted or reordered"))
        if entry.get("seq") != expected_seq:
            problems.append(Problem("sequence-gap", f"ledger line {number} has seq {entry.get('seq')}, "
                                    f"expected {expected_seq}: lines were deleted, inserted or reordered"))
        entries.append(entry)
        prev_hash = str(entry.get("hash"))
    return entries, problems


def events(entries: list[dict[str, Any]], name: str, scope: str | None = "main") -> list[dict[str, Any]]:
    """Entries of one event type, in ledger order; by default only the experiment's own (not nested) ones."""
    def in_scope(entry: dict[str, Any]) -> bool:
        details = entry.get("details")
        return scope is None or (details.get("scope", "main") if isinstance(details, dict) else "main") == scope

    return [e for e in entries if e.get("event") == name and in_scope(e)]
