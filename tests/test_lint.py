"""Static checks that run with the tests: ruff on all Python, Snakemake's own linter on the workflow."""

from __future__ import annotations

import re
import shutil
import subprocess
import sys
from pathlib import Path

from conftest import REPO

# Snakemake's linter asks for a conda environment or container per rule. holdfast installs itself
# with pip into one virtual environment (README); there is no conda on the machines it targets,
# and an environment file we never run would document software we never tested.
ACCEPTED_LINTS = {"Specify a conda environment or container for each rule."}


def test_ruff_is_clean() -> None:
    result = subprocess.run([sys.executable, "-m", "ruff", "check", str(REPO)], capture_output=True, text=True)
    assert result.returncode == 0, result.stdout + result.stderr


def test_snakemake_lint_has_no_findings_beyond_the_accepted_one(tmp_path: Path) -> None:
    shutil.copytree(REPO / "config", tmp_path / "config")
    shutil.copytree(REPO / "data_demo", tmp_path / "data_demo")
    result = subprocess.run([sys.executable, "-m", "snakemake", "-s", str(REPO / "Snakefile"), "-d", str(tmp_path),
                             "--lint"], capture_output=True, text=True, timeout=300)
    findings = set(re.findall(r"^    \* (.+?):?$", result.stdout + result.stderr, flags=re.M))
    assert findings, "the linter printed nothing: was it run?"  # the accepted lint is always there
    assert findings <= ACCEPTED_LINTS, findings - ACCEPTED_LINTS
