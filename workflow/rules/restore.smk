# restore_verdict: after the opening, a deleted final/verdict.json is copied back from the opening's archive copy
# (only when the copy is the one the ledger recorded); nothing is read from the sealed test set.
rule restore_verdict:
    input:
        archive=verdict_to_restore(),
    output:
        verdict=PLAN.path("final/verdict.json"),
    log:
        PLAN.path("logs/restore_verdict.log"),
    resources:
        mem_mb=500,
        runtime=5,
    run:
        run_step(input, output, params, wildcards, threads, resources, log, rule)
