# Nested cross-validation (nested.k > 0): the same stages, reused with an outer-fold wildcard,
# on the outer-training rows under nested/o<O>/; each outer winner is scored on its outer-validation rows.
use rule assign_folds as assign_outer_folds with:
    output:
        folds=PLAN.path("nested/outer_folds.parquet"),
        summary=PLAN.path("nested/outer_folds_summary.parquet"),
        leakage=PLAN.path("nested/outer_leakage.json"),
    log:
        PLAN.path("logs/nested/assign_outer_folds.log"),
    params:
        spec=SPEC,
        folds=json.dumps(PLAN.outer_fold_spec(), sort_keys=True),
        test=PLAN.path("sealed/test.parquet"),
        manifest=PLAN.path("sealed/manifest.json"),
        task=PLAN.config["task"],
        leakage=json.dumps(PLAN.config["leakage"], sort_keys=True),
        ledger=LEDGER,
        code=code_hash("assign_folds"),
        scope="outer",


use rule assign_folds as nested_assign_folds with:
    input:
        dev=PLAN.path("dev.parquet"),
        outer=PLAN.path("nested/outer_folds.parquet"),
    output:
        folds=PLAN.path("nested/o{outer}/folds.parquet"),
        summary=PLAN.path("nested/o{outer}/folds_summary.parquet"),
        leakage=PLAN.path("nested/o{outer}/leakage.json"),
    log:
        PLAN.path("logs/nested/o{outer}/assign_folds.log"),


use rule fit_family as nested_fit_family with:
    input:
        dev=PLAN.path("dev.parquet"),
        folds=PLAN.path("nested/o{outer}/folds.parquet"),
    output:
        fits=PLAN.path("nested/o{outer}/fits/{family}/r{repeat}f{fold}.parquet"),
        oof=PLAN.path("nested/o{outer}/oof/{family}/r{repeat}f{fold}.parquet"),
    log:
        PLAN.path("logs/nested/o{outer}/fit_family/{family}/r{repeat}f{fold}.log"),


use rule tally as nested_tally with:
    input:
        fits=nested_fits_of("fits"),
        oof=nested_fits_of("oof"),
        folds=PLAN.path("nested/o{outer}/folds.parquet"),
        dev=PLAN.path("dev.parquet"),
    output:
        ranking=PLAN.path("nested/o{outer}/ranking.parquet"),
        choice=PLAN.path("nested/o{outer}/choice.json"),
        plot=PLAN.path("nested/o{outer}/plots/ranking.png"),
    log:
        PLAN.path("logs/nested/o{outer}/tally.log"),


use rule refit_winner as nested_refit_winner with:
    input:
        choice=PLAN.path("nested/o{outer}/choice.json"),
        dev=PLAN.path("dev.parquet"),
        folds=PLAN.path("nested/o{outer}/folds.parquet"),
    output:
        model=PLAN.path("nested/o{outer}/model/model.skops"),
        provenance=PLAN.path("nested/o{outer}/model/provenance.json"),
    log:
        PLAN.path("logs/nested/o{outer}/refit_winner.log"),


rule score_outer:
    input:
        dev=PLAN.path("dev.parquet"),
        outer=PLAN.path("nested/outer_folds.parquet"),
        folds=PLAN.path("nested/o{outer}/folds.parquet"),
        model=PLAN.path("nested/o{outer}/model/model.skops"),
        choice=PLAN.path("nested/o{outer}/choice.json"),
    output:
        score=PLAN.path("nested/o{outer}/score.json"),
    log:
        PLAN.path("logs/nested/o{outer}/score_outer.log"),
    params:
        spec=SPEC,
        metrics=METRICS,
        task=PLAN.config["task"],
        ledger=LEDGER,
        code=code_hash("score_outer"),
    resources:
        mem_mb=2000,
        runtime=30,
    run:
        run_step(input, output, params, wildcards, threads, resources, log, rule)


rule nested_summary:
    input:
        scores=nested_scores(),
    output:
        summary=PLAN.path("nested/summary.json"),
    log:
        PLAN.path("logs/nested/summary.log"),
    params:
        metrics=METRICS,
        ledger=LEDGER,
        code=code_hash("nested_summary"),
    resources:
        mem_mb=1000,
        runtime=10,
    run:
        run_step(input, output, params, wildcards, threads, resources, log, rule)
