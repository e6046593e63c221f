"""Snakemake entry for every rule: hand the injected object to holdfast.steps.run."""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(snakemake.scriptdir).parents[1] / "scripts"))  # noqa: F821 - injected by Snakemake

from holdfast.steps import run

run(snakemake)  # noqa: F821
