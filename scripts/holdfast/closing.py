"""The end of every run: a fresh audit, the receipt with the ledger head, and the lines a person reads.

Used by ``holdfast run``, ``holdfast open`` and the workflow's ``onsuccess`` hook, so a run always ends with an
audit made at that moment (never a stale ``audit.json``) and with the ledger head to keep somewhere else.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from ._io import read_json, sha256_file, write_atomic, write_json
from .layout import AUDIT, CHOICE, RECEIPT, VERDICT

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


def finish(exp_dir: str | Path, in_progress_ok: bool = False) -> tuple[dict[str, Any], list[str]]:
    """Audit now, write audit.json and the receipt, and return the result with the closing lines."""
    from .audit import audit

    exp = Path(exp_dir)
    result = audit(str(exp))
    write_json(exp / AUDIT, result)
    receipt = write_receipt(result, exp)
    return result, closing_lines(exp, result, receipt)


def closing_lines(exp: Path, result: dict[str, Any], receipt: Path) -> list[str]:
    """What a person reads at the end of a run: the choice, the verdict or 'sealed, not opened', the audit."""
    from .headline import lines as headline

    out: list[str] = []
    name = result["experiment"]
    if result["passed"]:
        opened = (exp / VERDICT).exists()
        if not opened and (exp / CHOICE).exists():
            out += ranking_lines(exp) + choice_lines(exp)
        out += headline(exp)
        if not opened and (exp / CHOICE).exists():
            out.append(f"test set sealed, not opened: open it once, when you have decided, with "
                       f"'holdfast open {exp}'")
    state = "PASS" if result["passed"] else "FAIL: " + "; ".join(p["code"] for p in result["problems"])
    out.append(f"experiment '{name}': audit {state} (test set opened {result.get('test_set_opened', 0)} time(s)); "
               f"details: holdfast audit {exp}")
    out.append(f"ledger head {result.get('ledger_head_seq')}:{str(result.get('ledger_head'))[:16]}… written to "
               f"{receipt}: keep it where the experiment's owner cannot write (a review, a commit)")
    return out


CORRECTION_LABELS = (("bbc", "BBC-CV"), ("tibshirani", "Tibshirani–Tibshirani"))


def ranking_lines(exp: Path, top: int = 5) -> list[str]:
    """The top of the ranking on the primary metric: rank, candidate, mean and corrected standard error."""
    import pyarrow.parquet as pq

    choice = read_json(exp / CHOICE)
    metric = choice["metric"]
    rows = [r for r in pq.read_table(exp / "ranking.parquet", columns=[
        "candidate", "family", "params", "metric", "mean", "se_corrected", "rank", "complete"]).to_pylist()
        if r["metric"] == metric]
    rows.sort(key=lambda r: r["rank"])
    out = [f"ranking by {metric} (greater is better), top {min(top, len(rows))} of {len(rows)}:"]
    for r in rows[:top]:
        mark = "  <- winner" if r["candidate"] == choice["winner"]["candidate"] else ""
        out.append(f"  {r['rank']:>3}. {r['family']} {r['candidate']} {r['params']}: {r['mean']:.4f} "
                   f"(corrected se {r['se_corrected']:.4f}){mark}")
    return out


def choice_lines(exp: Path) -> list[str]:
    """The choice in one line: winner, rule, raw and corrected CV estimates, rounds and candidates tried."""
    choice = read_json(exp / CHOICE)
    winner, metric = choice["winner"], choice["metric"]
    optimism = choice.get("optimism") or {}
    corrected = [f"{label} {optimism[key]['corrected']:.4f}" for key, label in CORRECTION_LABELS
                 if (optimism.get(key) or {}).get("corrected") is not None]
    rounds = (choice.get("rounds") or {}).get("text", "")
    return [f"winner {winner['family']} {winner['candidate']} by {choice['rule']}: CV {metric} {winner['mean']:.4f}"
            + (f" (corrected for selection: {', '.join(corrected)})" if corrected else "")
            + (f"; {rounds}" if rounds else "")]


def verdict_hash(exp: Path) -> str | None:
    """sha256 of the verdict, when there is one."""
    return sha256_file(exp / VERDICT) if (exp / VERDICT).exists() else None


def read_audit(exp: Path) -> dict[str, Any] | None:
    """The last audit written, if any (for status displays; never for closing lines)."""
    return read_json(exp / AUDIT) if (exp / AUDIT).exists() else None
