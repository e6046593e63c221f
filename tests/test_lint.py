"""Static checks that run with the tests: ruff on all Python, Snakemake's own linter on the workflow."""

from __future__ import annotations

import shutil
import subprocess
import sys
from pathlib import Path

from conftest import REPO


def test_ruff_is_clean() -> None:
    result = subprocess.run([sys.executable, "-m", "ruff", "check", str(REPO)], capture_output=True, text=True)
    assert result.returncode == 0, result.stdout + result.stderr


def test_snakemake_lint_has_no_findings(tmp_path: Path) -> None:
    # Every rule's body is `run: run_step(...)`: a `script:` rule drew Snakemake's request for a conda environment
    # or container, which a `run:` rule (run by the Snakemake that holdfast is installed beside) does not.
    shutil.copytree(REPO / "config", tmp_path / "config")
    shutil.copytree(REPO / "data_demo", tmp_path / "data_demo")
    result = subprocess.run([sys.executable, "-m", "snakemake", "-s", str(REPO / "Snakefile"), "-d", str(tmp_path),
                             "--lint"], capture_output=True, text=True, timeout=300)
    output = result.stdout + result.stderr
    findings = [line.strip() for line in output.splitlines() if line.strip().startswith("* ")]
    assert result.returncode == 0, output
    assert "Congratulations, your workflow is in a good condition!" in output, output  # the linter ran to its end
    assert not findings and "Lints for" not in output, output
