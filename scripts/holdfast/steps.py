"""Adapters from a Snakemake job's named fields to the package functions.

Every rule's job reaches :func:`run` as a :class:`holdfast.job.Job` (input, output, params, wildcards,
threads, log, rule, config as plain data; see holdfast.job). The adapter
sends output to the rule's log before any heavy import, reads named fields and calls
exactly one package function. A holdfast error becomes one line in the log and on
stderr, and the job's exit code.
"""

from __future__ import annotations

import json
import os
import sys
from pathlib import Path
from typing import Any

from .errors import DataError, HoldfastError, first_sentence


def _redirect_log(path: str) -> int:
    """Send fds 1 and 2 to the log file; return a copy of the original stderr."""
    os.makedirs(os.path.dirname(path) or ".", exist_ok=True)
    fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o644)
    sys.stdout.flush()
    sys.stderr.flush()
    original = os.dup(2)
    os.dup2(fd, 1)
    os.dup2(fd, 2)
    os.close(fd)
    return original


def seal(smk: Any) -> None:
    """Rule seal -> holdfast.seal.seal."""
    from .seal import seal as run_seal

    # The data path is read from the config, not a param: moving the file must not re-run the seal.
    exp = str(Path(smk.output.manifest).parents[1])
    # Leakage settings come from the config too: a changed param would make Snakemake re-run the seal.
    manifest = run_seal(smk.config["data"]["path"], json.loads(smk.params.spec), exp, smk.params.experiment,
                        rule=smk.rule, leakage=smk.config.get("leakage"),
                        seen_rows_reason=(smk.config.get("test") or {}).get("seen_rows_reason"),
                        signing_key=(smk.config.get("ledger") or {}).get("signing_key"))
    print(f"sealed {manifest['counts']['test']} test rows; {manifest['counts']['dev']} development rows")
    leaks = manifest["leakage"]
    if leaks["duplicate_feature_rows_dev_test"]:
        print(f"WARNING leakage: {leaks['duplicate_feature_rows_dev_test']} test row(s) duplicate development rows")
    for alarm in leaks["single_feature"]:
        print(f"WARNING leakage: feature '{alarm['feature']}' alone reaches {alarm['measure']} {alarm['value']:.3f}")


def _scope(smk: Any) -> str:
    """'main' for the experiment itself, 'o<O>' inside nested outer fold O."""
    outer = getattr(smk.wildcards, "outer", None)
    return "main" if outer is None else f"o{outer}"


def assign_folds(smk: Any) -> None:
    """Rule assign_folds -> holdfast.folds.assign and check (nested: on the outer-training rows)."""
    from concurrent.futures import ThreadPoolExecutor, wait

    import pandas as pd

    from . import ledger
    from ._io import read_json, read_parquet, sha256_file, write_json, write_parquet
    from .folds import assign, check, leakage_report
    from .leakage import feature_identity

    spec, fold_spec = json.loads(smk.params.spec), json.loads(smk.params.folds)
    dev = read_parquet(smk.input.dev)
    scope = _scope(smk)
    if scope != "main":
        from .nested import outer_rows

        dev = dev[~outer_rows(dev, pd.read_parquet(smk.input.outer), int(smk.wildcards.outer))]
        dev = dev.reset_index(drop=True)
    with ThreadPoolExecutor(max_workers=2) as helper:  # duplicate rows are found beside the fold draw
        identity = helper.submit(feature_identity, dev, spec)
        table = assign(dev, fold_spec, spec["target"], spec["group"], spec.get("time"), spec.get("time_unit"))
        groups = dev[spec["group"]] if spec["group"] else None
        times = dev[spec["time"]] if spec.get("time") else None
        test_keys = pd.read_parquet(smk.params.test, columns=["row_key"])["row_key"]
        check(table, dev["row_key"], test_keys, fold_spec, groups, times, spec.get("time_unit"))
        # The fold table passed its checks: it is written, and the development file hashed, beside the leakage
        # report (both release the GIL). The report can still refuse; then the written table is removed.
        written = helper.submit(write_parquet, smk.output.folds, table)
        dev_sha256 = helper.submit(sha256_file, smk.input.dev)
        try:
            report = leakage_report(dev, table, spec, smk.params.task, json.loads(smk.params.leakage),
                                    read_json(smk.params.manifest), smk.output.summary, fold_spec, identity.result())
            written.result()
        except BaseException:
            wait([written])
            Path(smk.output.folds).unlink(missing_ok=True)
            raise
    write_json(smk.output.leakage, report)
    n_folds, n_repeats = int(table["fold"].max()) + 1, int(table["repeat"].max()) + 1
    randomised = fold_spec["scheme"] not in ("loo", "leave_one_group_out", "forward", "forward_group")
    ledger.append(smk.params.ledger, "assign_folds", {
        "scope": getattr(smk.params, "scope", scope), "scheme": fold_spec["scheme"], "k": n_folds,
        "repeats": n_repeats, "seeds": [fold_spec["seed"] + r for r in range(n_repeats)] if randomised else [],
        "rows": len(dev),
        "folds_sha256": sha256_file(smk.output.folds), "dev_sha256": dev_sha256.result(),
        "leakage_sha256": sha256_file(smk.output.leakage), "summary_sha256": sha256_file(smk.output.summary),
    }, rule=smk.rule)
    print(report["summary"])
    print(f"assigned {len(dev)} rows to {n_folds} folds x {n_repeats} repeat(s) ({fold_spec['scheme']})")


def fit_family(smk: Any) -> None:
    """Rule fit_family -> holdfast.fit.fit_family."""
    from .fit import fit_family as run_fit

    fits = run_fit(smk.input.dev, smk.input.folds, json.loads(smk.params.family), json.loads(smk.params.spec),
                   int(smk.wildcards.repeat), int(smk.wildcards.fold), json.loads(smk.params.metrics),
                   smk.params.task, int(smk.threads), json.loads(smk.params.allowed), smk.output.fits,
                   smk.output.oof, smk.params.ledger, rule=smk.rule, scope=_scope(smk))
    print(fits.drop(columns=["params"]).to_string())


def tally(smk: Any) -> None:
    """Rule tally -> holdfast.tally.tally."""
    from .tally import tally as run_tally

    spec = json.loads(smk.params.spec)
    choice = run_tally(list(smk.input.fits), list(smk.input.oof), smk.input.dev, json.loads(smk.params.candidates),
                       json.loads(smk.params.metrics), json.loads(smk.params.selection),
                       json.loads(smk.params.simplicity), spec["target"], smk.params.task, int(smk.params.folds),
                       smk.output.ranking, smk.output.choice, smk.output.plot, smk.params.ledger, smk.input.folds,
                       rule_name=smk.rule, scope=_scope(smk), with_rounds=hasattr(smk.input, "round"))
    print(choice["why"])


def record_round(smk: Any) -> None:
    """Rule record_round -> holdfast.rounds.record_round."""
    from .rounds import record_round as run_record

    exp = str(Path(smk.output.round).parents[1])
    record = run_record(exp, json.loads(smk.params.setup), smk.output.round, smk.params.ledger, rule=smk.rule)
    print(f"selection round {record['round']}")


def refit_winner(smk: Any) -> None:
    """Rule refit_winner -> holdfast.refit.refit_winner."""
    from .refit import refit_winner as run_refit

    declared = int(getattr(smk.params, "declared_threads", smk.threads))
    card = run_refit(smk.input.choice, smk.input.dev, json.loads(smk.params.spec), declared,
                     json.loads(smk.params.allowed), smk.output.model, smk.output.provenance, smk.params.ledger,
                     rule=smk.rule, folds_path=getattr(smk.input, "folds", None), scope=_scope(smk),
                     workers=int(smk.threads))
    print(f"refit {card['candidate']['id']} on {card['trained_on']['rows']} rows; {int(smk.threads)} core(s) for "
          f"the estimator's own n_jobs, numeric libraries limited to {declared} thread(s)")


def open_test(smk: Any) -> None:
    """Rule open_test -> holdfast.opening.open_test."""
    from .opening import open_test as run_open

    opening = json.loads(smk.params.opening)
    exp = str(Path(smk.output.verdict).parents[1])
    verdict = run_open(exp, smk.params.experiment, json.loads(smk.params.spec),
                       json.loads(smk.params.metrics), smk.params.task, json.loads(smk.params.reasons),
                       opening["confidence"], opening["bootstrap"], opening["seed"], smk.output.verdict,
                       fingerprint=smk.params.fingerprint,
                       fingerprint_parts=json.loads(smk.params.fingerprint_parts), rule=smk.rule,
                       request_path=smk.input.request, threads=int(smk.threads))
    print(json.dumps(verdict["metrics"], indent=2))


def learning_curve(smk: Any) -> None:
    """Rule learning_curve -> holdfast.learning.learning_curve (the winner on nested subsets of one fold)."""
    from .learning import learning_curve as run_learning

    exp = str(Path(smk.output.learning).parents[2])
    curve = json.loads(smk.params.curve)
    table = run_learning(exp, smk.input.dev, smk.input.folds, smk.input.choice, json.loads(smk.params.spec),
                         int(smk.wildcards.repeat), int(smk.wildcards.fold), json.loads(smk.params.metrics),
                         smk.params.task, [float(s) for s in curve["sizes"]], int(curve["seed"]), int(smk.threads),
                         json.loads(smk.params.allowed), smk.output.learning, smk.params.ledger,
                         code=smk.params.code, rule=smk.rule, parts=json.loads(smk.params.parts))
    print(table.to_string())


def diagnostics(smk: Any) -> None:
    """Rule diagnostics -> holdfast.diagnostics.diagnose."""
    from .diagnostics import diagnose

    spec = json.loads(smk.params.spec)
    result = diagnose(list(smk.input.fits), list(smk.input.oof), bool(smk.params.learning), smk.input.dev,
                      smk.input.choice, spec["target"], smk.params.task, json.loads(smk.params.metrics),
                      int(smk.params.bins), smk.params.unit or None, smk.output.diagnostics, smk.output.plots,
                      smk.params.ledger, rule=smk.rule)
    print(f"diagnostics of {result['winner']['candidate']}: {len(result['validation_curves'])} validation "
          f"curve(s); pictures: {', '.join(result['plots']) or 'none'}")


def learning_summary(smk: Any) -> None:
    """Rule learning_summary -> holdfast.diagnostics.summarise_learning (after every learning-curve job)."""
    from .diagnostics import summarise_learning

    result = summarise_learning(list(smk.input.learning), smk.input.choice, json.loads(smk.params.metrics),
                                smk.params.unit or None, smk.output.summary, smk.output.picture, smk.params.ledger,
                                rule=smk.rule)
    print(f"learning curve of {result['candidate']} summarised: {len(result['points'])} size(s) over "
          f"{result['files']} fold table(s)")


def report(smk: Any) -> None:
    """Rule report -> holdfast.report.write_report (reads only; the run's last job, see audit.audit)."""
    from .report import write_report

    exp = str(Path(smk.output.html).parent)
    result = write_report(exp, smk.output.html, smk.output.figures, target_unit=smk.params.unit or None,
                          last_step=True)
    print(f"report written to {smk.output.html}; audit {result['state']}")


def restore_verdict(smk: Any) -> None:
    """Rule restore_verdict: copy the opening's archived verdict back (the guard checked it against the ledger)."""
    import shutil

    shutil.copyfile(smk.input.archive, smk.output.verdict)
    print(f"restored {smk.output.verdict} from {smk.input.archive}")


def score_outer(smk: Any) -> None:
    """Rule score_outer -> holdfast.nested.score_outer."""
    from .nested import score_outer as run_score

    result = run_score(smk.input.dev, smk.input.outer, smk.input.folds, int(smk.wildcards.outer), smk.input.model,
                       smk.input.choice, json.loads(smk.params.spec), json.loads(smk.params.metrics),
                       smk.params.task, smk.output.score, smk.params.ledger, rule=smk.rule)
    print(json.dumps(result, indent=2))


def nested_summary(smk: Any) -> None:
    """Rule nested_summary -> holdfast.nested.summarise."""
    from .nested import summarise

    summary = summarise(list(smk.input.scores), json.loads(smk.params.metrics), smk.output.summary,
                        smk.params.ledger, rule=smk.rule)
    print(json.dumps(summary, indent=2))


STEPS = {f.__name__: f for f in (seal, assign_folds, fit_family, record_round, tally, refit_winner, open_test,
                                 restore_verdict, report, learning_curve, diagnostics, learning_summary,
                                 score_outer, nested_summary)}
# Nested copies of the stages run the same adapters (Snakemake's `use rule ... as nested_<rule>`).
STEPS.update({f"nested_{name}": STEPS[name] for name in ("assign_folds", "fit_family", "tally", "refit_winner")})
STEPS["assign_outer_folds"] = assign_folds


# Steps that do not hold the experiment while they run: the audit takes the same lock exclusively itself.
UNLOCKED = {"audit"}


def run(smk: Any) -> None:
    """Run the step named by the rule, logging to its log file.

    Every step but the audit holds the experiment's steps lock shared for its whole run, so an audit
    started meanwhile says "a run is in progress" instead of reading half-written files.
    """
    stderr = _redirect_log(smk.log[0])
    try:
        if smk.rule in UNLOCKED:
            STEPS[smk.rule](smk)
        else:
            from . import ledger
            from .config import experiment_dir
            from .layout import STEPS_LOCK

            with ledger.locked(experiment_dir(smk.config) / STEPS_LOCK, shared=True):
                STEPS[smk.rule](smk)
    except HoldfastError as exc:
        changed = changed_inputs(smk) if isinstance(exc, DataError) else []
        _fail(DataError(_changed_message(smk, changed, exc.message)) if changed else exc, stderr)
    except Exception as exc:
        damaged = unreadable_files(smk)
        changed = [] if damaged else changed_inputs(smk)
        if not damaged and not changed:
            raise  # a failure of the step itself: its traceback goes to the log
        import traceback

        traceback.print_exc()  # what the step tripped on, for the log; the one line below says why
        message = _damaged_message(smk, damaged) if damaged else _changed_message(smk, changed, first_sentence(exc))
        _fail(DataError(message), stderr)


def _fail(exc: HoldfastError, stderr: int) -> None:
    """Write the error's one line to the log and to the job's stderr, and end the step with StepError."""
    print(exc.format_message(), flush=True)
    os.write(stderr, (exc.format_message() + "\n").encode())
    # An ordinary exception, not SystemExit, so that run() is safe to call in any thread (a SystemExit
    # in a Snakemake worker thread leaves the run waiting for ever); the job script exits 1 on it.
    raise StepError(exc.format_message()) from None


def _job_files(smk: Any) -> list[str]:
    """The job's input files and the params naming an existing Parquet or JSON file, each once."""
    paths = [p for p in smk.input if isinstance(p, str)]
    paths += [p for p in smk.params if isinstance(p, str) and p.endswith((".parquet", ".json")) and os.path.isfile(p)]
    return list(dict.fromkeys(paths))


def unreadable_files(smk: Any) -> list[tuple[str, str]]:
    """The job's Parquet and JSON files (its inputs, and params naming an existing file) that cannot be read
    whole, each with pyarrow's or json's reason; empty when every one reads.

    Asked only after a step failed with an error holdfast did not raise on purpose: a recorded file that was cut
    short or overwritten after the step that wrote it then gets one line naming it instead of a traceback.
    """
    damaged = []
    for path in _job_files(smk):
        reason = _unreadable(path)
        if reason is not None:
            damaged.append((path, reason))
    return damaged


def _unreadable(path: str) -> str | None:
    """Why the whole of a Parquet or JSON file cannot be read, or None when it can (or is neither)."""
    try:
        if path.endswith(".parquet"):
            import pyarrow.parquet as pq

            with pq.ParquetFile(path) as source:
                for _ in source.iter_batches(batch_size=1 << 16):
                    pass
        elif path.endswith(".json"):
            with open(path, encoding="utf-8") as handle:
                json.load(handle)
    except Exception as exc:  # what pyarrow or json says, up to its first full stop, is the reason shown
        return first_sentence(exc)
    return None


def changed_inputs(smk: Any) -> list[str]:
    """The job's files (as :func:`_job_files`) whose bytes are no longer those the ledger last recorded for them.

    Asked only after a step failed: a table swapped for another readable one (another fold's, an edited copy)
    makes a step fail on what it finds inside, with advice meant for a failed fit; the file is the cause. Empty
    when the ledger cannot be read (the audit says why) or records none of them.
    """
    from . import ledger
    from .config import experiment_dir
    from .layout import LEDGER
    from .recorded import not_as_recorded

    exp = experiment_dir(smk.config)
    try:
        entries = ledger.read(exp / LEDGER)
    except Exception:  # no ledger yet, or a broken one: nothing to compare with here
        return []
    names = []
    for path in _job_files(smk):
        try:
            names.append(Path(path).resolve().relative_to(exp.resolve()).as_posix())
        except ValueError:
            continue  # outside the experiment (the data file): not recorded
    return [str(exp / name) for name in not_as_recorded(exp, entries, names)]


def _mend(smk: Any, paths: list[str]) -> str:
    """What to do about changed files: put the recorded copy back, or (not for the seal's files) have it remade."""
    from .config import experiment_dir
    from .layout import DEV, MANIFEST, TEST

    exp = experiment_dir(smk.config)
    sealed = {str(exp / name) for name in (DEV, MANIFEST, TEST)}
    if any(p in sealed for p in paths):
        return "put back the copy the ledger recorded (the seal never runs again)"
    return "put back the copy the ledger recorded, or delete the file and run again to have it made again"


def _changed_message(smk: Any, changed: list[str], reason: str) -> str:
    """The one line for a step that failed with files among its inputs that are not what the ledger recorded."""
    from .config import experiment_dir

    exp = experiment_dir(smk.config)
    more = f" (and {len(changed) - 1} more of this step's files)" if len(changed) > 1 else ""
    return (f"'{changed[0]}' is not the file the ledger last recorded for it{more}: it was changed after the step "
            f"that wrote it, and this step failed on what it read ({reason}); 'holdfast audit {exp}' names every "
            f"file that no longer matches the ledger; {_mend(smk, changed)}")


def _damaged_message(smk: Any, damaged: list[tuple[str, str]]) -> str:
    """The one line for a step that failed on files changed after they were written: the first, how many, what
    to do (the seal's own files are never made again, so they must be put back)."""
    from .config import experiment_dir

    exp = experiment_dir(smk.config)
    path, reason = damaged[0]
    more = f" (and {len(damaged) - 1} more of this step's files)" if len(damaged) > 1 else ""
    return (f"'{path}' cannot be read ({reason}){more}: it was cut short or changed after the step that wrote it; "
            f"'holdfast audit {exp}' names every file that no longer matches the ledger; "
            f"{_mend(smk, [p for p, _ in damaged])}")


class StepError(Exception):
    """A job's holdfast error, re-raised so Snakemake marks the job failed and stops the run."""
