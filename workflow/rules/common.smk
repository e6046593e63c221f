# Config loading, parse-time guards, wildcard constraints and input functions.
import json
import os
import re
import sys
from pathlib import Path
from snakemake.exceptions import WorkflowError

sys.path.insert(0, str(Path(workflow.basedir) / "scripts"))

from holdfast.layout import group_family  # noqa: E402
from holdfast.job import describe, hand_over  # noqa: E402
from holdfast.plan import checked_config_or_exit, code_hash, prepare_or_exit  # noqa: E402

# The config is read as plain data by holdfast's strict reader (no tags, no template marker, no repeated keys):
# the demo's config/config.yaml when no --configfile is given, and every --configfile is read again and must
# give what Snakemake loaded (`holdfast run` hands Snakemake such a checked copy; see README).
checked_config_or_exit(config, [str(f) for f in workflow.overwrite_configfiles], workflow.config_settings.config,
                       "config/config.yaml")
PLAN = prepare_or_exit(config, main=workflow.is_main_process)
LEDGER = PLAN.path("ledger.jsonl")
SPEC = json.dumps(PLAN.spec, sort_keys=True)  # column roles, task and test partition
METRICS = json.dumps(PLAN.config["metrics"])
ALLOWED = json.dumps(PLAN.config["allowed_modules"])


wildcard_constraints:
    family="|".join(re.escape(group) for group in PLAN.groups),
    repeat=r"\d+",
    fold=r"\d+",
    outer=r"\d+",


def run_step(input, output, params, wildcards, threads, resources, log, rule):
    """Every rule's body: the job, as plain data, runs in a small process of its own that hands it to the local
    worker or runs holdfast.steps itself (holdfast.job). A failed step has already written its one-line message."""
    code = hand_over(describe(rule, input, output, params, wildcards, threads, resources, log, config))
    if code:
        raise WorkflowError(f"holdfast step {rule} failed (exit code {code}); its log is {log[0]}")


def family_json(wildcards):
    return PLAN.family_json(wildcards.family)


def per_family(value_of):
    """The fit rule's threads, priority or a resource: one constant when every family has the same value, else a
    function of the family wildcard. Snakemake calls such a function (and inspects its signature) once per job, which
    at 10,000 fit jobs was a large part of a dry run's time (bench/scale.py)."""
    values = {family: value_of(family) for family in PLAN.groups}
    if len(set(values.values())) == 1:
        return next(iter(values.values()))
    return lambda wildcards: values[wildcards.family]


fit_priority = per_family(PLAN.fit_priority)
family_threads = per_family(PLAN.threads)


def family_resource(name):
    return per_family(lambda family: int(PLAN.config["candidates"][group_family(family)][name]))


def fits_of(kind):
    return PLAN.fit_files(kind)


def learning_files():
    return PLAN.learning_files()


def nested_fits_of(kind):
    def files(wildcards):
        return PLAN.nested_fit_files(kind, int(wildcards.outer))

    return files


def nested_scores():
    return [PLAN.path(f"nested/o{o}/score.json") for o in range(PLAN.config["nested"]["k"])]


def max_threads():
    return max(PLAN.threads(f) for f in PLAN.families)


def refit_threads():
    """Cores for the refit: in a local run every core Snakemake was given (the refit often runs alone at the end,
    and holdfast.refit uses the extra cores only through an estimator's own n_jobs, which splits work, not numbers);
    on a cluster, or when the cores are unknown, the families' declared threads."""
    declared = max_threads()
    if not (workflow.local_exec and workflow.is_main_process):
        return declared
    try:
        return max(declared, int(workflow.cores))
    except (WorkflowError, TypeError, ValueError):
        return declared


def all_targets():
    """Every file of the development loop, the report's included (written_files); once the experiment is closed, the
    verdict and the report (only what exists or can be restored)."""
    page = PLAN.path("report.html")
    if PLAN.closed:  # only what exists or can be restored: nothing up to the opening can run
        verdict = PLAN.path("final/verdict.json")
        targets = [verdict] if Path(verdict).exists() or verdict_to_restore() else [PLAN.path("sealed/manifest.json")]
        if all(Path(PLAN.path(name)).exists() for name in ("ranking.parquet", "choice.json", "model/provenance.json")):
            targets.append(page)
        return targets
    return written_files()


# Every file the development loop writes is a target, or is asked for by a job that will run. Snakemake by itself makes
# a missing file again only when it is a target or a job that reads it has to run anyway, so a deleted fold table,
# fit table, picture or report folder would stay missing (and the audit fail on it) until its step ran for some other
# reason. The rules without wildcards (or with only the nested outer fold's) write a few files each: all are targets.
# The per-fold files (two per fit job, one per learning-curve job) are many: one is a target only when it is missing
# after the job that reads them has run (missing_after). All of them as targets made a dry run of 30,000 fit jobs
# about a fifth slower and its peak memory pass 1 GiB (bench/scale.py).
WHOLE_RULES = ("assign_folds", "record_round", "tally", "refit_winner", "diagnostics", "report")
NESTED_WHOLE_RULES = ("assign_outer_folds", "nested_summary")
PER_OUTER_RULES = ("nested_assign_folds", "nested_tally", "nested_refit_winner", "score_outer")


def written_files():
    """Every file the development loop writes that no job would otherwise make (rule all's input before the
    experiment is closed)."""
    def outputs(names, **wildcards):
        return [str(f) for name in names for f in expand(getattr(rules, name).output, **wildcards)]

    files = outputs(WHOLE_RULES)
    files += missing_after(rules.tally.output.ranking, lambda: fits_of("fits") + fits_of("oof"))
    if learning_files():
        files += outputs(["learning_summary"]) + missing_after(rules.learning_summary.output.summary,
                                                               learning_files)
    k = PLAN.config["nested"]["k"]
    if k:
        files += outputs(NESTED_WHOLE_RULES) + outputs(PER_OUTER_RULES, outer=range(k))
        for outer in range(k):
            files += missing_after(expand(rules.nested_tally.output.ranking, outer=outer)[0],
                                   lambda outer=outer: [f for kind in ("fits", "oof")
                                                        for f in PLAN.nested_fit_files(kind, outer)])
    return files


def missing_after(reader_output, listed):
    """Those of the paths ``listed()`` gives that are not on disk once the job that reads them has run
    (``reader_output`` exists); none before, when that job will ask for them itself (and the list is not even built).
    One listing per folder, not one look per file (a cluster's shared file system is slow at many), and only in the
    main Snakemake: a cluster job's never reads rule all."""
    if not workflow.is_main_process or not os.path.exists(reader_output):
        return []
    by_folder = {}
    for path in listed():
        by_folder.setdefault(os.path.dirname(path), []).append(path)
    missing = []
    for folder, inside in by_folder.items():
        present = set(os.listdir(folder)) if os.path.isdir(folder) else set()
        missing += [path for path in inside if os.path.basename(path) not in present]
    return missing


def report_inputs(wildcards):
    """What the report shows and must follow: ranking, choice and the model's provenance; the nested summary, the
    diagnostics and the learning curve's summary, so the report is the run's last job (once the experiment is
    closed, only when they exist: their rules have left the workflow); and, once the experiment is closed, the
    verdict.

    Not the ledger: it exists only from the seal on, so the first run would record an input set without it and every
    later run would remake the report for "set of input files has changed". Whatever the report shows from the
    ledger changes together with one of these inputs (a round with the ranking, an opening with the verdict).

    Before the last allowed opening the verdict is no input: a model refit after an opening with a written reason
    would make Snakemake open the test set again to bring it up to date. 'holdfast open' remakes the report itself:
    in the opening's own Snakemake when that opening closes the experiment (see closing_opening), else in a second.
    """
    inputs = {name: PLAN.path(path) for name, path in (
        ("ranking", "ranking.parquet"), ("choice", "choice.json"), ("provenance", "model/provenance.json"))}
    nested = PLAN.path("nested/summary.json")
    if PLAN.config["nested"]["k"] and (not PLAN.closed or Path(nested).exists()):
        inputs["nested"] = nested
    diagnosed = PLAN.path("diagnostics/diagnostics.json")
    if not PLAN.closed or Path(diagnosed).exists():
        inputs["diagnostics"] = diagnosed
    # Both of the summary's files: the report shows the picture, and a deleted one is then made again.
    for kind, name in (("json", "learning"), ("png", "learning_picture")):
        learning = PLAN.path(f"diagnostics/learning.{kind}")
        if learning_files() and (not PLAN.closed or Path(learning).exists()):
            inputs[name] = learning
    verdict = PLAN.path("final/verdict.json")
    if (PLAN.closed and (Path(verdict).exists() or verdict_to_restore())) or closing_opening():
        inputs["verdict"] = verdict
    return inputs


def closing_opening():
    """True in the Snakemake that 'holdfast open' starts for the last allowed opening: the report then follows the
    verdict in the same run, with the inputs it will have once the experiment is closed. HOLDFAST_OPENING names the
    opening the confirmation (final/request.json) is for; it opens nothing by itself, the request is what gates the
    opening (see rule open_test)."""
    return (os.environ.get("HOLDFAST_OPENING") == str(PLAN.opened + 1) and PLAN.request is not None
            and PLAN.opened + 1 >= PLAN.allowed_openings)


def verdict_to_restore():
    """The archive copy to put back when the verdict of a closed experiment was deleted ('' otherwise)."""
    return PLAN.verdict_to_restore()


def stop_rescheduling():
    """Cancel the scheduler's pending re-evaluations: Snakemake starts a threading.Timer of up to 1 s (its
    --max-jobs-per-timespan span) after each scheduling pass, and the interpreter waits for the last ones before
    Snakemake can exit. The run is over when onsuccess or onerror runs, so nothing is left for them to do."""
    import threading

    for thread in threading.enumerate():
        if isinstance(thread, threading.Timer):
            thread.cancel()


onerror:
    stop_rescheduling()


onsuccess:
    stop_rescheduling()
    # Closing lines from an audit made now (never a stale audit.json), the receipt with the ledger head, and the
    # headline numbers only when the audit passed, from the files it verified. No step runs any more here, so the
    # audit's exclusive lock does not wait on this run. `holdfast run` and `holdfast open` do this themselves.
    if not os.environ.get("HOLDFAST_CLOSING_BY_CLI"):
        from holdfast.closing import finish

        for line in finish(PLAN.exp, PLAN.config["data"].get("unit"))[1]:
            print(f"holdfast: {line}")
