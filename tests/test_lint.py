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


# The one finding accepted: Snakemake asks every `script:` rule for a conda environment or container.
# holdfast's jobs run in the Python environment holdfast is installed in, by design (the README's install
# command); a conda file the tests never use would document software nobody checked.
ACCEPTED_LINT = "Specify a conda environment or container for each rule."


def test_snakemake_lint_has_no_findings_but_the_software_environment(tmp_path: Path) -> None:
    shutil.copytree(REPO / "config", tmp_path / "config")
    shutil.copytree(REPO / "data_demo", tmp_path / "data_demo")
    result = subprocess.run([sys.executable, "-m", "snakemake", "-s", str(REPO / "Snakefile"), "-d", str(tmp_path),
                             "--lint"], capture_output=True, text=True, timeout=300)
    output = result.stdout + result.stderr
    findings = [line.strip()[2:].rstrip(":") for line in output.splitlines() if line.strip().startswith("* ")]
    rules = [line for line in output.splitlines() if line.startswith("Lints for rule ")]
    assert findings and rules, output  # the linter really ran and looked at the rules
    assert set(findings) == {ACCEPTED_LINT} and len(findings) == len(rules), output
    assert "Lints for snakefile" not in output, output  # nothing about the files themselves
