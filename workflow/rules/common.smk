# Config loading, parse-time guards, wildcard constraints and input functions.
import json
import sys
from pathlib import Path

sys.path.insert(0, str(Path(workflow.basedir) / "scripts"))

from holdfast.plan import code_hash, job_script, prepare_or_exit  # noqa: E402

if not workflow.overwrite_configfiles:
    # The demo experiment; --configfile replaces it entirely (no merging of two experiments).
    workflow.configfile("config/config.yaml")

PLAN = prepare_or_exit(config, main=workflow.is_main_process)
# Every rule's body: one generated script that hands the job to holdfast.steps.run (see plan.job_script).
JOB_SCRIPT = job_script()
LEDGER = PLAN.path("ledger.jsonl")
SPEC = json.dumps(PLAN.spec, sort_keys=True)  # column roles, task and test partition
METRICS = json.dumps(PLAN.config["metrics"])
ALLOWED = json.dumps(PLAN.config["allowed_modules"])


wildcard_constraints:
    family="|".join(PLAN.families),
    repeat=r"\d+",
    fold=r"\d+",
    outer=r"\d+",


def family_json(wildcards):
    return PLAN.family_json(wildcards.family)


def family_threads(wildcards):
    return PLAN.threads(wildcards.family)


def family_resource(name):
    def resource(wildcards):
        return int(PLAN.config["candidates"][wildcards.family][name])

    return resource


def fits_of(kind):
    return PLAN.fit_files(kind)


def nested_fits_of(kind):
    def files(wildcards):
        return PLAN.nested_fit_files(kind, int(wildcards.outer))

    return files


def nested_scores():
    return [PLAN.path(f"nested/o{o}/score.json") for o in range(PLAN.config["nested"]["k"])]


def max_threads():
    return max(PLAN.threads(f) for f in PLAN.families)


def all_targets():
    targets = [
        PLAN.path("ranking.parquet"),
        PLAN.path("choice.json"),
        PLAN.path("final/verdict.json"),
        PLAN.path("audit.json"),
    ]
    if PLAN.config["nested"]["k"]:
        targets.append(PLAN.path("nested/summary.json"))
    return targets


onsuccess:
    # Closing lines from an audit made now (rewriting audit.json), never from a stored audit.json that a file
    # edited since could have made stale; the headline numbers only when it passed, read from the files it
    # verified. No step is running at this point, so the audit's exclusive lock does not wait on this run.
    from holdfast.headline import closing_lines

    for line in closing_lines(PLAN.exp, PLAN.config["experiment"]):
        print(f"holdfast: {line}")
