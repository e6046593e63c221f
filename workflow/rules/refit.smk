# refit_winner: the chosen candidate fitted on every development row, saved without pickle.
rule refit_winner:
    input:
        choice=PLAN.path("choice.json"),
        dev=PLAN.path("dev.parquet"),
    output:
        model=PLAN.path("model/model.skops"),
        provenance=PLAN.path("model/provenance.json"),
    log:
        PLAN.path("logs/refit_winner.log"),
    params:
        spec=SPEC,
        allowed=ALLOWED,
        ledger=LEDGER,
        code=code_hash("refit_winner"),
    threads: max_threads()
    resources:
        mem_mb=4000,
        runtime=60,
    script:
        JOB_SCRIPT
