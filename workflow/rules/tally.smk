# record_round: the selection set-up about to be tallied; a change after a ranking existed is a new round.
rule record_round:
    input:
        dev=PLAN.path("dev.parquet"),
    output:
        round=PLAN.path("rounds/current.json"),
    log:
        PLAN.path("logs/record_round.log"),
    params:
        setup=PLAN.round_setup(),
        ledger=LEDGER,
        code=code_hash("record_round"),
    resources:
        mem_mb=1000,
        runtime=10,
    run:
        run_step(input, output, params, wildcards, threads, resources, log, rule)


# tally: per-candidate summaries over folds, the ranking and the choice of winner.
rule tally:
    input:
        round=PLAN.path("rounds/current.json"),
        fits=fits_of("fits"),
        oof=fits_of("oof"),
        folds=PLAN.path("folds.parquet"),
        dev=PLAN.path("dev.parquet"),
    output:
        ranking=PLAN.path("ranking.parquet"),
        choice=PLAN.path("choice.json"),
        plot=PLAN.path("plots/ranking.png"),
    log:
        PLAN.path("logs/tally.log"),
    params:
        candidates=json.dumps(PLAN.candidates_by_id(), sort_keys=True),
        metrics=METRICS,
        selection=json.dumps(PLAN.config["selection"], sort_keys=True),
        simplicity=json.dumps(PLAN.simplicity(), sort_keys=True),
        spec=SPEC,
        task=PLAN.config["task"],
        folds=len(PLAN.fold_ids),
        ledger=LEDGER,
        code=code_hash("tally"),
    resources:
        mem_mb=2000,
        runtime=30,
    run:
        run_step(input, output, params, wildcards, threads, resources, log, rule)
