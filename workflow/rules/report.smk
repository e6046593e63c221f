# report: the experiment on one self-contained page (report.html), with an audit made for it. It only reads (no
# ledger line), takes every other target of the run as input so it runs last, and stays in the workflow once the
# test set was opened. Its pictures also go to report_figures/ for Snakemake's own --report.
rule report:
    input:
        unpack(report_inputs),
    output:
        html=report(PLAN.path("report.html"), caption="../report/page.rst", category="holdfast"),
        figures=report(
            directory(PLAN.path("report_figures")),
            patterns=["{name}.png"],
            caption="../report/figures.rst",
            category="holdfast",
        ),
    log:
        PLAN.path("logs/report.log"),
    params:
        unit=PLAN.config["data"].get("unit") or "",
        code=code_hash("report"),
    resources:
        mem_mb=2000,
        runtime=10,
    run:
        run_step(input, output, params, wildcards, threads, resources, log, rule)
