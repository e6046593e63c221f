# tally: per-candidate summaries over folds, the ranking and the choice of winner.
rule tally:
    input:
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
    script:
        JOB_SCRIPT
