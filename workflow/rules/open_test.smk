# open_test: the one read of the sealed test set (refused a second time; see holdfast.opening). It runs only on
# the confirmation `holdfast open` writes (final/request.json), which no rule makes.
rule open_test:
    input:
        request=PLAN.path("final/request.json"),
        model=PLAN.path("model/model.skops"),
        provenance=PLAN.path("model/provenance.json"),
        choice=PLAN.path("choice.json"),
        ranking=PLAN.path("ranking.parquet"),
    output:
        verdict=PLAN.path("final/verdict.json"),
    log:
        PLAN.path("logs/open_test.log"),
    params:
        experiment=PLAN.config["experiment"],
        spec=SPEC,
        metrics=METRICS,
        task=PLAN.config["task"],
        reasons=json.dumps(PLAN.config["test"]["reopen_reasons"]),
        opening=json.dumps(PLAN.config["opening"], sort_keys=True),
        fingerprint=PLAN.fingerprint(),
        fingerprint_parts=json.dumps(PLAN.fingerprint_parts(), sort_keys=True),
        code=code_hash("open_test"),
    resources:
        mem_mb=4000,
        runtime=30,
    run:
        run_step(input, output, params, wildcards, threads, resources, log, rule)
