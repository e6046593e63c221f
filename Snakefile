# holdfast: seal -> folds -> fit -> tally -> refit, then (holdfast open) the one opening of the sealed test set.
# This file is an index; rules live in workflow/rules/, computation in scripts/holdfast/.
from snakemake.utils import min_version

min_version("9.0")


include: "workflow/rules/common.smk"


report: "workflow/report/workflow.rst"


# The seal leaves the workflow once it happened, and every step up to the opening leaves it once the test set
# was opened (PLAN.closed): no flag can then re-run them or delete what they wrote (see DEVELOPERS.md).
if not PLAN.sealed:

    include: "workflow/rules/seal.smk"


if not PLAN.closed:

    include: "workflow/rules/folds.smk"
    include: "workflow/rules/fit.smk"
    include: "workflow/rules/tally.smk"
    include: "workflow/rules/refit.smk"
    include: "workflow/rules/open_test.smk"
    include: "workflow/rules/nested.smk"
    include: "workflow/rules/diagnostics.smk"


# A job process (a cluster job, or the Snakemake plain Snakemake starts per job without --force-use-threads) is never
# "closed", but the one restoring the verdict must still find its rule.
if (PLAN.closed or not workflow.is_main_process) and verdict_to_restore():

    include: "workflow/rules/restore.smk"


# The report only reads, so it stays in every mode, the closed one included.
include: "workflow/rules/report.smk"


rule all:
    input:
        all_targets(),
    default_target: True
