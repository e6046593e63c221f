# audit: recompute the ledger's chain and check every recorded file; writes pass/fail with reasons.
rule audit:
    input:
        verdict=PLAN.path("final/verdict.json"),
        choice=PLAN.path("choice.json"),
        folds=PLAN.path("folds.parquet"),
        # Last of all: no other job of this run may still be writing while the audit reads.
        nested=PLAN.path("nested/summary.json") if PLAN.config["nested"]["k"] else [],
    output:
        audit=PLAN.path("audit.json"),
    log:
        PLAN.path("logs/audit.log"),
    params:
        code=code_hash("audit"),
    resources:
        mem_mb=2000,
        runtime=30,
    script:
        JOB_SCRIPT
