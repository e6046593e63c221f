"""The README's promises about the demo, checked against a real run of the demo as shipped."""

from __future__ import annotations

import re
from pathlib import Path

import pytest
from conftest import REPO

pytestmark = pytest.mark.slow


def quoted_closing_lines() -> list[str]:
    """The 'holdfast: ...' lines the README quotes from the demo run."""
    text = (REPO / "README.md").read_text(encoding="utf-8")
    return re.findall(r"^holdfast: .*$", text, flags=re.MULTILINE)


def test_readme_quotes_the_demo_closing_lines_verbatim(demo_finished: Path) -> None:
    """The opening's last lines before the ledger head (which holds a time, so it differs on every run)."""
    quoted = quoted_closing_lines()
    assert len(quoted) == 3, "the README should quote the verdict line, the report line and the audit line"
    printed = [line for line in (demo_finished.parent / f"{demo_finished.name}.stdout").read_text().splitlines()
               if line.startswith("holdfast: ")]
    assert printed[-4:-1] == quoted, printed[-6:]
    assert printed[-1].startswith("holdfast: ledger head ") and "receipt.txt" in printed[-1]
