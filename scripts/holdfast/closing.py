"""The end of every run: a fresh audit, the receipt with the ledger head, and the lines a person reads.

Used by ``holdfast run``, ``holdfast open`` and the workflow's ``onsuccess`` hook, so a run always ends with an
audit made at that moment (never a stale ``audit.json``) and with the ledger head to keep somewhere else.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from ._io import read_json, sha256_file, write_atomic, write_json
from .layout import AUDIT, CHOICE, RECEIPT, REPORT, VERDICT

RECEIPT_HEAD = "holdfast receipt"


def receipt_text(result: dict[str, Any], exp: Path) -> str:
    """The receipt's text: experiment, ledger head (sequence and hash) and, after an opening, the verdict's hash.

    Deterministic for an unchanged experiment (no clock reading), so a run that changed nothing rewrites the
    same bytes.
    """
    head = result.get("ledger_head_seq")
    lines = [RECEIPT_HEAD, f"experiment: {result['experiment']}", f"folder: {exp}",
             f"ledger head: {head}:{result.get('ledger_head')}", f"ledger entries: {result.get('ledger_entries')}",
             f"audit: {'PASS' if result['passed'] else 'FAIL'}",
             f"test set opened: {result.get('test_set_opened', 0)} time(s)"]
    if (exp / VERDICT).exists():
        lines.append(f"verdict sha256: {sha256_file(exp / VERDICT)}")
    lines.append(f"check later with: holdfast audit {exp} --expect-head {head}:{result.get('ledger_head')}")
    return "\n".join(lines) + "\n"


def write_receipt(result: dict[str, Any], exp: Path) -> Path:
    """Write ``receipt.txt`` (only when its content changes) and return its path."""
    path = exp / RECEIPT
    text = receipt_text(result, exp)
    if not path.exists() or path.read_text(encoding="utf-8") != text:
        write_atomic(path, lambda tmp: Path(tmp).write_text(text, encoding="utf-8"))
    return path


def finish(exp_dir: str | Path, target_unit: str | None = None) -> tuple[dict[str, Any], list[str]]:
    """Audit now, write audit.json and the receipt, and return the result with the closing lines.

    While another run is writing (the audit says 'in progress'), nothing is written and the lines say so.
    """
    from .audit import IN_PROGRESS, audit

    exp = Path(exp_dir)
    if not (exp / "ledger.jsonl").exists():
        return {"state": "none", "passed": False, "problems": []}, []  # nothing was sealed: nothing to audit
    result = audit(str(exp))
    if result["state"] == IN_PROGRESS:
        return result, [f"experiment '{result['experiment']}': audit not made: a run is in progress (another step is "
                        f"writing to it); holdfast audit {exp} when it has finished"]
    write_json(exp / AUDIT, result)
    receipt = write_receipt(result, exp)
    return result, closing_lines(exp, result, receipt, target_unit)


def closing_lines(exp: Path, result: dict[str, Any], receipt: Path, target_unit: str | None = None) -> list[str]:
    """What a person reads at the end of a run, every number from a file this audit verified: the ranking's top
    and the choice (or the verdict), 'sealed, not opened' until the opening, the audit and the ledger head."""
    from .headline import UnverifiedFileError, choice_line, lines, ranking_lines

    out: list[str] = []
    name = result["experiment"]
    codes = dict.fromkeys(p["code"] for p in result["problems"])  # each code once, in the order found
    state = "PASS" if result["passed"] else "FAIL: " + "; ".join(codes)
    opened = (exp / VERDICT).exists()
    if result["passed"]:
        try:
            if not opened and (exp / CHOICE).exists():
                out += [*ranking_lines(exp, result["verified"], target_unit=target_unit),
                        choice_line(exp, result["verified"], target_unit)]
            out += lines(exp, result["verified"], target_unit)
        except UnverifiedFileError as exc:
            state = f"PASS, but numbers withheld: {exc}"
        if not opened and (exp / CHOICE).exists():
            out.append(f"test set sealed, not opened: open it once, when you have decided, with "
                       f"'holdfast open {exp}'")
    if (exp / REPORT).exists():
        out.append(f"report: {exp / REPORT} (one page; open it in a browser or print it)")
    out.append(f"experiment '{name}': audit {state} (test set opened {result.get('test_set_opened', 0)} time(s)); "
               f"details: holdfast audit {exp}")
    out.append(f"ledger head {result.get('ledger_head_seq')}:{str(result.get('ledger_head'))[:16]}… written to "
               f"{receipt}: keep it where the experiment's owner cannot write (a review, a commit)")
    return out


def target_unit_of(exp: Path) -> str | None:
    """The target's unit from the experiment's stored config (a label for display only), if it names one."""
    from .layout import CONFIG_COPY

    try:
        return (read_json(exp / CONFIG_COPY).get("data") or {}).get("unit")
    except (OSError, ValueError, AttributeError):
        return None


def read_audit(exp: Path) -> dict[str, Any] | None:
    """The last audit written, if any (for status displays; never for closing lines)."""
    return read_json(exp / AUDIT) if (exp / AUDIT).exists() else None
