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
    quoted = quoted_closing_lines()
    assert len(quoted) == 2, "the README should quote the headline line and the audit line"
    printed = (demo_finished.parent / f"{demo_finished.name}.stdout").read_text().splitlines()
    assert quoted == [line for line in printed if line.startswith("holdfast: ")]
