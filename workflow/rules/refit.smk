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
        declared_threads=max_threads(),  # what numeric libraries are limited to; extra cores go to n_jobs only
    threads: refit_threads()
    # Before the learning-curve jobs (priority 1) and the diagnostics, which become ready with it: the refit is the
    # longest job after the tally and the one the opening waits for. With equal priorities the greedy scheduler took
    # two learning-curve jobs first (larger inputs) and left the refit to run alone at the end (mixed grid: 27.6 s
    # alone after 213 s).
    priority: 2
    resources:
        mem_mb=4000,
        runtime=60,
    run:
        run_step(input, output, params, wildcards, threads, resources, log, rule)
