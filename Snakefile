# holdfast: seal -> folds -> fit -> tally -> refit -> open once -> audit.
# This file is an index; rules live in workflow/rules/, computation in scripts/holdfast/.
from snakemake.utils import min_version

min_version("9.0")


include: "workflow/rules/common.smk"
include: "workflow/rules/seal.smk"
include: "workflow/rules/folds.smk"
include: "workflow/rules/fit.smk"
include: "workflow/rules/tally.smk"
include: "workflow/rules/refit.smk"
include: "workflow/rules/open_test.smk"
include: "workflow/rules/audit.smk"
include: "workflow/rules/nested.smk"


rule all:
    input:
        all_targets(),
    default_target: True
