"""The holdfast command: run the development loop, open the sealed test set once, audit it, and the everyday
commands around it (status, predict, init, log, list, compare, check)."""

from __future__ import annotations

import argparse
import contextlib
import getpass
import json
import os
import signal
import subprocess
import sys
from collections.abc import Iterator
from pathlib import Path
from typing import Any

from . import __version__
from .errors import ConfigError, HoldfastError, SealedAccessError

REPO = Path(__file__).resolve().parents[2]
SNAKEFILE = REPO / "Snakefile"
# Snakemake options `holdfast run` sets itself: the checked config, the Snakefile and the working folder.
OWN_OPTIONS = ("--configfile", "--configfiles", "--config", "-C", "--snakefile", "-s", "--directory", "-d")
CORE_OPTIONS = ("--cores", "-c", "--jobs", "-j", "--executor", "-e", "--profile", "--workflow-profile")
DRY_RUN = ("-n", "--dry-run", "--dryrun")
PLAIN_FLAGS = (*DRY_RUN, "-p", "--printshellcmds", "--rerun-incomplete", "--ri", "-k", "--keep-going",
               "--force-use-threads")
PLAIN_VALUED = ("--cores", "-c", "--jobs", "-j", "--scheduler")
"""Snakemake options that can neither force, delete, touch nor narrow a run (exact spellings only: argparse would
also take an abbreviation such as --forcer), so a command line of only these needs no parse by Snakemake's parser."""


def forces_nothing(extra: list[str]) -> bool:
    """True when ``extra`` holds only PLAIN_FLAGS and PLAIN_VALUED options with their values: then Snakemake's
    forcing flags are all unset without importing Snakemake's parser (about 3 s of one core beside the checks)."""
    words = iter(extra)
    for word in words:
        name, equals, value = word.partition("=")
        if word in PLAIN_FLAGS or (equals and name in PLAIN_VALUED and value):
            continue
        if word in PLAIN_VALUED:
            following = next(words, None)
            if following is None or following.startswith("-"):
                return False
            continue
        if _attached(word, ("-c", "-j")):
            continue
        return False
    return True


def _attached(word: str, names: tuple[str, ...]) -> bool:
    """True for a short option of ``names`` with its number attached (``-c2``, ``-j4``)."""
    return word[:2] in names and word[2:].isdigit()


def _passes(extra: list[str], names: tuple[str, ...]) -> bool:
    """True when the Snakemake options ``extra`` give one of ``names`` (``--cores 2``, ``--cores=2``, ``-j2``)."""
    return any(w.split("=", 1)[0] in names or _attached(w, names) for w in extra)


# Exit codes of `holdfast audit` (the errors' own codes, 1 to 7, are those of errors.py).
AUDIT_PASS, AUDIT_FAIL, NOT_AN_EXPERIMENT = 0, 1, 2
AUDIT_IN_PROGRESS = 75  # a step is writing to the experiment: nothing was checked; try again later
WORKER_ENV = "HOLDFAST_WORKER"
WORKER_PID_ENV = "HOLDFAST_WORKER_PID"


def _say(line: str) -> None:
    print(f"holdfast: {line}", flush=True)


def _experiment_dir(value: str) -> Path:
    exp = Path(value)
    if not (exp / "ledger.jsonl").exists() and not (exp / "sealed").exists():
        raise ConfigError(f"'{exp}' is not an experiment folder (no ledger.jsonl, no sealed/); pass "
                          "results/<experiment>")
    return exp


def _audit(args: argparse.Namespace) -> int:
    from .audit import IN_PROGRESS, audit, report

    exp = Path(args.experiment_dir)
    if not (exp / "ledger.jsonl").exists() and not (exp / "sealed").exists():
        sys.stderr.write(f"holdfast: error: '{exp}' is not an experiment directory (no ledger.jsonl, no sealed/); "
                         "pass results/<experiment>\n")
        return NOT_AN_EXPERIMENT
    expect = _expected_head(args)
    key = None
    if args.public_key:
        from .signing import read_public_key

        key = read_public_key(args.public_key)
    result = audit(str(exp), expect_head=expect, public_key=key)
    print(report(result))
    if result["state"] == IN_PROGRESS:
        return AUDIT_IN_PROGRESS
    if not result["passed"]:
        return AUDIT_FAIL  # a failing record vouches for nothing: no numbers
    from .closing import target_unit_of
    from .headline import UnverifiedFileError, lines

    try:
        shown = lines(exp, result["verified"], target_unit_of(exp))  # only from files this audit verified
    except UnverifiedFileError as exc:
        print(f"  numbers withheld: {exc}")
        return AUDIT_FAIL
    for line in shown:
        print(f"  {line}")
    return AUDIT_PASS


def _expected_head(args: argparse.Namespace) -> tuple[int, str] | None:
    """The head to expect: --expect-head SEQ:HASH, or the 'ledger head:' line of a --receipt file."""
    from .audit import parse_head

    text = args.expect_head
    if args.receipt:
        lines = [line for line in Path(args.receipt).read_text(encoding="utf-8").splitlines()
                 if line.startswith("ledger head: ")]
        if not lines:
            raise ConfigError(f"receipt '{args.receipt}' has no 'ledger head:' line; pass the receipt.txt a run wrote")
        text = lines[0][len("ledger head: "):]
    if text is None:
        return None
    try:
        return parse_head(text)
    except ValueError as exc:
        raise ConfigError(f"--expect-head: {exc}; copy it from the receipt") from exc


def _check(args: argparse.Namespace) -> int:
    from .config import read_yaml
    from .plan import prepare

    plan = prepare(read_yaml(args.configfile), main=True, results=args.results)
    n = sum(len(c) for c in plan.families.values())
    state = ("opened" if plan.opened else "sealed") if plan.manifest else "not sealed yet"
    split = f" ({len(plan.groups)} fit jobs per fold)" if len(plan.groups) != len(plan.families) else ""
    print(f"config OK: experiment '{plan.config['experiment']}' ({state}), task {plan.config['task']}, "
          f"{n} candidates in {len(plan.families)} families{split}, {len(plan.fold_ids)} folds, "
          f"primary metric {plan.config['metrics'][0]}")
    for note in plan.notes:
        print(f"note: {note}")
    return 0


def _refuse_own_options(extra: list[str]) -> None:
    for word in extra:
        name = word.split("=", 1)[0]
        if name in OWN_OPTIONS:
            raise ConfigError(f"Snakemake option '{name}' is set by holdfast run itself (the checked config, the "
                              "Snakefile and this folder); put every setting in the config file and run from the "
                              "project folder")


def _trust(modules: list[str]) -> None:
    """Pass the operator's --trust-module consent on to Snakemake and its jobs (see config.operator_trusted_modules)."""
    from .config import TRUSTED_MODULES_ENV

    if modules:
        current = [m for m in os.environ.get(TRUSTED_MODULES_ENV, "").split(",") if m]
        os.environ[TRUSTED_MODULES_ENV] = ",".join(dict.fromkeys(current + modules))


def _store_config(raw: dict[str, Any], exp: Path) -> Path:
    """Write the checked config as canonical JSON into the experiment folder (only when it changed)."""
    from ._io import canonical_json, write_atomic
    from .layout import CONFIG_COPY

    path = exp / CONFIG_COPY
    text = canonical_json(raw) + "\n"
    if not path.exists() or path.read_text(encoding="utf-8") != text:
        write_atomic(path, lambda tmp: Path(tmp).write_text(text, encoding="utf-8"))
    return path


def _snakemake(configfile: Path, extra: list[str], exp: Path, show: bool, label: str,
               targets: tuple[str, ...] = (), env_extra: dict[str, str] | None = None) -> int:
    """Run Snakemake on the checked config; its own output goes to a log file unless ``show``."""
    # Targets first and --configfile=PATH: Snakemake's list options would swallow a target written after them.
    argv = [*targets, "-s", str(SNAKEFILE), f"--configfile={configfile}"]
    if not _passes(extra, CORE_OPTIONS):
        argv += ["--cores", "all"]
    if not _passes(extra, ("--scheduler",)):
        # Snakemake's default scheduler builds and solves an integer programme (a cbc process) at every
        # scheduling pass, which at thousands of ready fit jobs kept its main process near one core busy and
        # built a 5,000-job experiment at 78 fit jobs a minute against 127 with the greedy one. Holdfast marks no
        # file temp(), so the ILP's extra aim (deleting temporary files early) never applies, and the greedy
        # scheduler still starts jobs in priority order (longest fits first).
        argv += ["--scheduler", "greedy"]
    if "--force-use-threads" not in extra:
        # Every rule's `run:` block only hands its job to a small process of its own (holdfast.job); in a thread of
        # this Snakemake, not in a new Snakemake per job that imports Snakemake and parses the workflow again.
        argv.append("--force-use-threads")
    argv += extra
    env = {**_job_env(), "HOLDFAST_CLOSING_BY_CLI": "1"}
    env.pop("HOLDFAST_OPENING", None)  # only 'holdfast open' says which opening its Snakemake makes (env_extra)
    env.update(env_extra or {})
    with _warm_worker(extra, env):
        if show:
            from . import ledger
            from .layout import STEPS_LOCK

            with ledger.locked(exp / STEPS_LOCK, shared=True):
                return _launch(argv, env, None).wait()
        return _logged(argv, env, exp, label)


# Snakemake imported ahead of its call (see holdfast.snakemake_ready), started with the command.
_READY: dict[str, subprocess.Popen[str]] = {}
# The Snakemake processes this command has sent their command line (so running its jobs), for SIGTERM to reach.
_LAUNCHED: list[subprocess.Popen[str]] = []
_TERMINATED: list[int] = []  # the SIGTERMs received
_FORWARDED: list[int] = []  # the pids of running Snakemake processes a SIGTERM was passed to


class Terminated(BaseException):
    """SIGTERM reached holdfast before or after its Snakemake ran: unwind so the helper processes are stopped."""


def _on_sigterm(signum: int, frame: object) -> None:
    """SIGTERM (``kill``, ``timeout``, a batch system): hand it to the running Snakemake, else end the command.

    Snakemake stops its jobs on SIGTERM as on Ctrl-C (tested locally only); holdfast then ends as after any failed
    run. Without this, the default action ended holdfast alone and left Snakemake and the job worker running.
    """
    _TERMINATED.append(signum)
    running = [process for process in _LAUNCHED if process.poll() is None]
    for process in running:
        process.send_signal(signal.SIGTERM)
        _FORWARDED.append(process.pid)
    if not running:
        raise Terminated


def _start_ready() -> subprocess.Popen[str]:
    """A process that imports Snakemake now and runs the Snakemake command line it is sent later."""
    return subprocess.Popen([sys.executable, "-m", "holdfast.snakemake_ready"], env=_job_env(),
                            stdin=subprocess.PIPE, text=True)


@contextlib.contextmanager
def _early_snakemake() -> Iterator[None]:
    """Start importing Snakemake as the command starts, so the import overlaps its checks; end it if unused."""
    _READY["process"] = _start_ready()
    try:
        yield
    finally:
        unused = _READY.pop("process", None)
        if unused is not None:
            unused.terminate()
            try:
                unused.wait(timeout=10)
            except subprocess.TimeoutExpired:
                unused.kill()


def _launch(argv: list[str], env: dict[str, str], log: Path | None) -> subprocess.Popen[str]:
    """Snakemake's command line ``argv`` in the process started with the command (or a new one: a second call)."""
    import json

    request = json.dumps({"argv": argv, "env": env, "log": str(log) if log else None}) + "\n"
    process = _READY.pop("process", None)
    for _ in range(2):
        if process is None or process.poll() is not None:
            process = _start_ready()
        try:
            assert process.stdin is not None
            process.stdin.write(request)
            process.stdin.close()
            _LAUNCHED.append(process)
            return process
        except BrokenPipeError:  # it died before reading its request (killed): start another
            process.wait()
            process = None
    raise HoldfastError("could not start Snakemake: the process meant to run it ended twice before reading its "
                        f"command; try 'python -m snakemake --version' with {sys.executable} to see why")


def _local(extra: list[str]) -> bool:
    """True unless the run goes to a cluster (an executor or a profile is named) or the worker is switched off."""
    return not os.environ.get("HOLDFAST_NO_WORKER") and not any(
        w.split("=", 1)[0] in ("--executor", "-e", "--profile", "--workflow-profile") for w in extra)


# The worker of this command, started before its checks so that its imports overlap them (see _early_worker).
_WORKER: dict[str, str] = {}


def _job_env() -> dict[str, str]:
    """The environment Snakemake and its jobs run with: this one, with holdfast's scripts importable."""
    return {**os.environ, "PYTHONPATH": os.pathsep.join(filter(None, [str(REPO / "scripts"),
                                                                      os.environ.get("PYTHONPATH")]))}


@contextlib.contextmanager
def _early_worker(extra: list[str]) -> Iterator[None]:
    """Start the pre-warmed job worker (see holdfast.worker) for a local run as the command starts, stop it at its end.

    Its imports (about two seconds of one core) then overlap the command's own checks instead of the first jobs.
    """
    if not _local(extra) or any(w in DRY_RUN for w in extra):
        yield
        return
    import tempfile

    address = os.path.join(tempfile.gettempdir(), f"holdfast-{os.getuid()}-{os.getpid()}.sock")
    worker = subprocess.Popen([sys.executable, "-m", "holdfast.worker", address], env=_job_env(),
                              stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    _WORKER["address"] = address
    _WORKER["pid"] = str(worker.pid)
    try:
        yield
    finally:
        _WORKER.clear()
        worker.terminate()
        try:
            worker.wait(timeout=10)
        except subprocess.TimeoutExpired:
            worker.kill()
        with contextlib.suppress(FileNotFoundError):
            os.unlink(address)


@contextlib.contextmanager
def _warm_worker(extra: list[str], env: dict[str, str]) -> Iterator[None]:
    """Hand this command's worker to one Snakemake call (none was started for a dry run, a cluster run or with
    HOLDFAST_NO_WORKER: see _early_worker, which saw the same options)."""
    if not _WORKER:
        yield
        return
    env[WORKER_ENV] = _WORKER["address"]
    env[WORKER_PID_ENV] = _WORKER["pid"]  # a job that comes before the worker's socket waits for it
    try:
        yield
    finally:
        env.pop(WORKER_ENV, None)
        env.pop(WORKER_PID_ENV, None)


def _logged(argv: list[str], env: dict[str, str], exp: Path, label: str) -> int:
    """Run Snakemake with its output in a log file, showing holdfast's own progress lines meanwhile."""
    import datetime as dt

    stamp = dt.datetime.now(dt.UTC).strftime("%Y%m%dT%H%M%SZ")
    log = exp / "logs" / f"{label}-{stamp}.log"
    log.parent.mkdir(parents=True, exist_ok=True)
    _say(f"Snakemake's own output goes to {log}")
    from . import ledger
    from .layout import STEPS_LOCK
    from .progress import follow

    # The run holds the experiment's steps lock shared from start to end, so an audit made meanwhile says "in
    # progress" even in the instant between Snakemake deleting a job's old outputs and the job taking the lock.
    log.write_text("", encoding="utf-8")
    with ledger.locked(exp / STEPS_LOCK, shared=True):
        process = _launch(argv, env, log)
        follow(exp, process, _say, log)
    if process.returncode:
        _show_failure(log, exp, label)
    return process.returncode


# Snakemake's LockException: another Snakemake holds locks on files this one would write (exceptions.py).
SNAKEMAKE_LOCKED = "Directory cannot be locked"


def _show_failure(log: Path, exp: Path, label: str) -> None:
    """On failure, the one-line holdfast messages from the log (or its tail) and where to read the rest; when
    Snakemake could not take its lock, who holds it, in place of its advice to use --unlock."""
    text = log.read_text(encoding="utf-8", errors="replace").splitlines()
    if any(SNAKEMAKE_LOCKED in line for line in text):
        from . import ledger
        from .layout import OPEN_COMMAND_LOCK, STEPS_LOCK

        if label == "run" and ledger.held_elsewhere(exp / OPEN_COMMAND_LOCK):
            who = "'holdfast open' of this experiment started as this run began and is running"
        elif ledger.held_elsewhere(exp / STEPS_LOCK):
            who = "another 'holdfast run' or 'holdfast open' of this experiment is running"
        else:
            who = ("no holdfast command of this experiment runs now, so a Snakemake of this project that was killed "
                   "left its lock behind, or a Snakemake started by hand is writing these files")
        sys.stderr.write(f"holdfast: Snakemake could not take its lock on this experiment's files: {who}. Run "
                         f"again once it has ended ('holdfast status {exp}' shows what it did); pass --unlock only "
                         "when no Snakemake of this project is running\n")
        sys.stderr.write(f"holdfast: the {label} failed; Snakemake's full output is in {log}\n")
        return
    ours = [line for line in text if line.startswith("holdfast: ") and "error" in line]
    for line in dict.fromkeys(ours) or text[-15:]:
        sys.stderr.write(line + "\n")
    sys.stderr.write(f"holdfast: the run failed; Snakemake's full output is in {log}\n")


# Audit findings that a re-opening with a written reason brings by design: printed as FAIL (the record is
# honest about them), but not a fault of the run that just finished.
REOPENING_STATES = ("opened-more-than-once", "opened-other-model")


def _finish(exp: Path, target_unit: str | None = None) -> int:
    """Audit now and print the closing lines; exit 1 for any problem beyond :data:`REOPENING_STATES`."""
    result, lines = _in_worker("holdfast.closing:finish", exp, target_unit)
    for line in lines:
        _say(line)
    return 1 if any(p["code"] not in REOPENING_STATES for p in result["problems"]) else 0


def _in_worker(target: str, *args: Any) -> Any:
    """``module:function(*args)`` in a child of this command's worker when one runs, else in this process.

    The worker imports pandas, pyarrow and scikit-learn for the jobs anyway; the command's own heavy work (the
    full check before a seal, the audits) done there spares the command importing them again on the same two
    cores while the worker and Snakemake start. Errors come back as the same exceptions, printed output goes to
    this command's stdout and stderr.
    """
    if _WORKER:
        from .worker import NoAnswerError, call

        try:
            return call(_WORKER["address"], target, *args, pid=_WORKER["pid"])
        except NoAnswerError:
            pass  # the worker could not take it (it ended): do it here
    import importlib

    module, _, name = target.partition(":")
    return getattr(importlib.import_module(module), name)(*args)


def full_check(raw: dict[str, Any], results: str, facts_path: Path) -> dict[str, Any]:
    """plan.prepare in full (data, metrics, estimators, folds, overlap); record the facts it found at ``facts_path``
    (plan.cached_facts) and return them."""
    from ._io import write_json
    from .plan import prepare

    plan = prepare(raw, main=True, results=results)
    for note in plan.notes:
        sys.stderr.write(f"holdfast: note: {note}\n")
    write_json(facts_path, plan.facts)
    return plan.facts


def _prepare_cached(raw: dict[str, Any], results: str = "results") -> Any:
    """plan.prepare in full the first time a config and its data are seen; later with the recorded facts only.

    The facts are written after a full check passed, so the Snakefile's main process (and the next run) skip
    re-reading the data and importing scikit-learn for checks that already passed. The full check runs in the
    worker when there is one (see _in_worker); the guards that read this command's options run here.
    """
    from .plan import cached_facts, prepare

    facts, path = cached_facts(raw)
    if facts is None:
        facts = _in_worker("holdfast.cli:full_check", raw, results, path)
    return prepare(raw, main=True, results=results, facts=facts)


def _run(args: argparse.Namespace, extra: list[str]) -> int:
    from .config import read_yaml
    from .plan import _forced_guard, snakemake_flags

    _refuse_own_options(extra)
    _trust(args.trust_module)
    raw = read_yaml(args.configfile)
    plan = _prepare_cached(raw)
    _forced_guard(plan, {} if forces_nothing(extra) else snakemake_flags(["snakemake", *extra]))
    if plan.exp.is_symlink():
        raise ConfigError(f"results folder '{plan.exp}' is a symbolic link; holdfast writes only into real folders "
                          "inside the project")
    from . import ledger
    from .errors import BusyError
    from .layout import OPEN_COMMAND_LOCK, STEPS_LOCK

    if ledger.held_elsewhere(plan.exp / OPEN_COMMAND_LOCK):  # a glance: no lock file made where none was opened
        raise SealedAccessError(f"'holdfast open' of experiment '{plan.exp}' is running, so this run starts nothing "
                                "(it would replace the config the opening reads, and meet the opening's Snakemake); "
                                f"once the opening has ended, 'holdfast audit {plan.exp}' says what it did")
    if ledger.held_shared_elsewhere(plan.exp / STEPS_LOCK):  # a run's command or its steps hold it
        raise BusyError(f"another run of experiment '{plan.exp}' is under way ('holdfast run', or a step of a "
                        "Snakemake started by hand), so this run starts nothing (it would replace the config that "
                        f"run reads, and meet its Snakemake's lock); run again once it has ended ('holdfast status "
                        f"{plan.exp}' shows what it did)")
    dry = any(w in DRY_RUN for w in extra)
    config_copy = _store_config(raw, plan.exp)
    if plan.closed:
        _say(f"experiment '{plan.config['experiment']}' was opened: nothing up to the opening runs again")
    missing = [] if plan.closed or not forces_nothing(extra) else _pictures_missing(plan.exp)
    if missing:
        more = f" (and {len(missing) - 1} more)" if len(missing) > 1 else ""
        _say(f"'{missing[0]}'{more} is missing: the diagnostics step runs again to draw it")
        extra = [*extra, "--forcerun=diagnostics"]
    code = _snakemake(config_copy, extra, plan.exp, args.show_snakemake or dry, "run")
    if code or dry:
        return code
    return _finish(plan.exp, plan.config["data"].get("unit"))


def _pictures_missing(exp: Path) -> list[str]:
    """Pictures the diagnostics' summary lists that are not in its folder any more.

    The folder ``diagnostics/plots/`` is the rule's output (which pictures exist depends on the winner), so
    Snakemake sees the folder, not a picture deleted from it, and would leave it missing (the audit failing on
    it) until the diagnostics ran for some other reason. A damaged summary is left to the step and the audit.
    """
    from ._io import read_json

    summary = exp / "diagnostics" / "diagnostics.json"
    if not summary.is_file():
        return []
    try:
        listed = read_json(summary).get("plots") or {}
        names = [str(name) for name in listed.values()]
    except (ValueError, OSError, AttributeError):
        return []
    return [str(summary.parent / name) for name in names if not (summary.parent / name).exists()]


def _open(args: argparse.Namespace, extra: list[str]) -> int:
    _refuse_own_options(extra)
    named = [w.split("=", 1)[0] for w in extra if w.split("=", 1)[0] in ("--allowed-rules", "--until", "-U")]
    if named:  # a later option of Snakemake's replaces an earlier one: it would widen what the opening's call may run
        raise ConfigError(f"Snakemake option '{named[0]}' is set by holdfast open itself (only the opening and the "
                          "report run); leave it out")
    _trust(args.trust_module)
    exp = _experiment_dir(args.experiment_dir)
    from . import ledger
    from .layout import OPEN_COMMAND_LOCK

    # One 'holdfast open' at a time, from before it reads whether the experiment was opened to its last line: two
    # started together would otherwise both find it unopened, and the later one's Snakemake would fail on a closed
    # experiment and then print the other's verdict as if it were its own.
    with ledger.locked_if_free(exp / OPEN_COMMAND_LOCK) as free:
        if not free:
            raise SealedAccessError(f"another 'holdfast open' of experiment '{exp}' is running, so this one opens "
                                    f"nothing; once it has ended, 'holdfast audit {exp}' says whether the test set "
                                    "was opened")
        return _open_alone(args, extra, exp)


def _open_alone(args: argparse.Namespace, extra: list[str], exp: Path) -> int:
    """holdfast open, once no other opening of ``exp`` runs (see :func:`_open`)."""
    from ._io import read_json, sha256_file, write_json
    from .config import read_yaml
    from .layout import CHOICE, CONFIG_COPY, MODEL, REQUEST, VERDICT

    config_path = Path(args.config) if args.config else exp / CONFIG_COPY
    if not config_path.exists():
        raise ConfigError(f"'{config_path}' is missing (the experiment was not run with 'holdfast run'); pass the "
                          "experiment's config with --config CONFIG")
    raw = read_yaml(config_path)
    plan = _prepare_cached(raw, results=str(exp.parent))
    if plan.exp.resolve() != exp.resolve():
        raise ConfigError(f"config '{config_path}' names experiment '{plan.config['experiment']}', not the folder "
                          f"'{exp}'; pass the experiment's own config")
    if not plan.sealed:
        raise SealedAccessError(f"experiment '{exp}' is not sealed yet; run 'holdfast run CONFIG' first")
    if plan.closed:
        from . import ledger
        from .opening import last_opening, refusal

        entries = ledger.verify_chain(exp / "ledger.jsonl")[0]
        raise SealedAccessError(refusal(plan.config["experiment"], plan.opened, last_opening(exp, entries),
                                        plan.allowed_openings))
    _same_setup_as_recorded(plan, exp, config_path)
    absent = [str(exp / name) for name in (CHOICE, MODEL) if not (exp / name).exists()]
    if absent:
        # Also after a run whose tally or refit failed: Snakemake deletes a job's old outputs before it runs.
        raise SealedAccessError(f"experiment '{exp}' has no refit winner to open the test set on ('{absent[0]}' is "
                                f"missing); run 'holdfast run {config_path}' first: it makes the file, or says in one "
                                "line why it cannot")
    before = _in_worker("holdfast.audit:audit", str(exp))
    # After a first opening, a reason in the config allows another: the audit then names that state, which is
    # no reason to refuse the opening the reason was written for.
    expected = REOPENING_STATES if plan.opened else ()
    if before["state"] == "in progress":  # another run or opening holds it (two openings started at once)
        raise SealedAccessError(f"experiment '{exp}' is being written by a run or opening in progress, so its test "
                                "set is not opened now; once that has ended, 'holdfast audit' says whether the test "
                                "set was opened")
    if any(p["code"] not in expected for p in before["problems"]):
        problems = "; ".join(f"[{p['code']}] {p['message']}" for p in before["problems"])
        raise SealedAccessError(f"experiment '{exp}' does not pass its audit, so its test set is not opened: "
                                f"{problems}")
    from .showing import opening_preview

    for line in opening_preview(exp, plan):
        _say(line)
    if not args.yes:
        if not sys.stdin.isatty():
            raise SealedAccessError("no terminal to confirm the opening on; run 'holdfast open' in a terminal, or "
                                    "pass --yes in a script")
        answer = input(f"Type 'open' to open the sealed test set of '{plan.config['experiment']}' now "
                       "(this is the one look): ")
        if answer.strip() != "open":
            _say("not opened")
            return 1
    import datetime as dt

    request = {"experiment": plan.config["experiment"], "opening": plan.opened + 1,
               "model_sha256": sha256_file(exp / MODEL), "choice_sha256": sha256_file(exp / CHOICE),
               "winner": read_json(exp / CHOICE)["winner"]["candidate"],
               "requested": dt.datetime.now(dt.UTC).isoformat(timespec="seconds").replace("+00:00", "Z"),
               "by": getpass.getuser(), "confirmed": "--yes" if args.yes else "typed at a terminal"}
    write_json(exp / REQUEST, request)
    config_copy = _store_config(raw, exp)
    target, page = str(exp / VERDICT), str(exp / "report.html")
    if plan.opened + 1 >= plan.allowed_openings:
        # The opening that closes the experiment: one Snakemake makes the verdict and then the report, which takes
        # the verdict as its input there (common.smk: closing_opening), so it can only run after the opening.
        code = _snakemake(config_copy, ["--allowed-rules", "open_test", "report", "--forcerun=report", *extra], exp,
                          args.show_snakemake, "open", targets=(target, page),
                          env_extra={"HOLDFAST_OPENING": str(plan.opened + 1)})
        if code and not _opened_now(exp, plan.opened + 1):
            return code
        report = code
    else:
        code = _snakemake(config_copy, ["--allowed-rules=open_test", *extra], exp, args.show_snakemake, "open",
                          targets=(target,))
        if code:
            return code
        # A further opening stays allowed, so the verdict is no input of the report (see common.smk): the report
        # in a second Snakemake, now that the verdict exists, or it could run beside the opening.
        report = _snakemake(config_copy, ["--allowed-rules=report", "--forcerun=report", *extra], exp,
                            args.show_snakemake, "report", targets=(page,))
    if report:
        _say(f"the report was not remade (the opening itself is done); make it with 'holdfast run {config_path}'")
    return _finish(exp, plan.config["data"].get("unit")) or (1 if report else 0)


def _same_setup_as_recorded(plan: Any, exp: Path, config_path: Path) -> None:
    """Refuse to open with a config whose candidates, folds, metrics or rule are not the latest selection round's.

    The opening scores the model the ledger's refit recorded, but its config is stored as the experiment's own
    (config.json) and the report reads it: a grid edited and never run would then describe candidates that were
    never fitted, beside a verdict they had no part in.
    """
    from . import ledger, rounds
    from ._io import sha256_text

    entries = ledger.read(exp / "ledger.jsonl")
    recorded = ledger.events(entries, "round")
    if not recorded:
        return
    number = int(recorded[-1]["details"]["round"])
    setup_json = plan.round_setup()  # canonical JSON already: its hash is the set-up hash the ledger records
    if sha256_text(setup_json) == recorded[-1]["details"].get("setup_sha256"):
        return
    latest = rounds.recorded_round(exp, number, entries)
    change = rounds.summary(rounds.changes(latest["setup"], json.loads(setup_json))) or "its set-up differs"
    raise ConfigError(f"config '{config_path}' is not what selection round {number} (the latest the ledger records) "
                      f"chose from: {change}; open with the experiment's own config (leave out --config), or run "
                      f"'holdfast run {config_path}' first, which records the change as round {number + 1}")


def _opened_now(exp: Path, number: int) -> bool:
    """True when opening ``number`` finished: its verdict exists (a failed Snakemake may have failed after it)."""
    from ._io import read_json
    from .layout import VERDICT

    try:  # the verdict names its opening
        return read_json(exp / VERDICT).get("opening") == number
    except (OSError, ValueError):
        return False


def build_parser() -> argparse.ArgumentParser:
    """The argument parser (exposed for tests and documentation)."""
    parser = argparse.ArgumentParser(prog="holdfast", description=__doc__)
    parser.add_argument("--version", action="version", version=f"holdfast {__version__}")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")
    p_run = sub.add_parser("run", help="seal (first time), folds, fits, tally, refit; stops before the test set",
                           description="Run the development loop on CONFIG: the seal (first time only), folds, fit "
                           "jobs, tally and refit. Re-runs only what a change touches. Never opens the test set. "
                           "Any further options are handed to Snakemake (e.g. --cores 2, --profile DIR, -n).")
    p_run.add_argument("configfile", help="the experiment's config (YAML or JSON)")
    p_run.add_argument("--trust-module", action="append", default=[], metavar="MODULE",
                       help="allow estimators from MODULE (listed in the config's allowed_modules); repeatable")
    p_run.add_argument("--show-snakemake", action="store_true", help="show Snakemake's job output on the screen")
    p_run.set_defaults(func=_run, takes_extra=True)
    p_open = sub.add_parser("open", help="open the sealed test set once, deliberately, and write the verdict",
                            description="Show what will be opened, ask for confirmation, record the opening before "
                            "reading a sealed row, score the refit winner on the test set and print the verdict.")
    p_open.add_argument("experiment_dir", help="results/<experiment>")
    p_open.add_argument("--yes", action="store_true", help="confirm without asking (for scripts)")
    p_open.add_argument("--config", help="the experiment's config, when it was not run with 'holdfast run'")
    p_open.add_argument("--trust-module", action="append", default=[], metavar="MODULE", help=argparse.SUPPRESS)
    p_open.add_argument("--show-snakemake", action="store_true", help="show Snakemake's job output on the screen")
    p_open.set_defaults(func=_open, takes_extra=True)
    p_audit = sub.add_parser("audit", help="check an experiment's ledger and files; exit 0 on pass, 1 on fail, "
                             f"{AUDIT_IN_PROGRESS} while a run is in progress (nothing checked)")
    p_audit.add_argument("experiment_dir", help="results/<experiment>")
    p_audit.add_argument("--expect-head", metavar="SEQ:HASH", help="fail unless this ledger entry (from a receipt) "
                         "is still in the ledger, unchanged, at that position")
    p_audit.add_argument("--receipt", metavar="FILE", help="read the expected head from a receipt.txt")
    p_audit.add_argument("--public-key", metavar="PEM", help="verify every ledger line's signature with this key")
    p_audit.set_defaults(func=_audit, takes_extra=False)
    p_check = sub.add_parser("check", help="validate a config and its data without running anything")
    p_check.add_argument("configfile", nargs="?", default="config/config.yaml")
    p_check.add_argument("--results", default="results", help="results folder (default: results)")
    p_check.set_defaults(func=_check, takes_extra=False)
    from .commands import add_parsers

    add_parsers(sub)  # status, predict, init, log, list, compare (holdfast/commands/)
    from .preflight import add_command

    add_command(sub)
    return parser


def main(argv: list[str] | None = None) -> int:
    """Entry point; returns the exit code."""
    parser = build_parser()
    args, extra = parser.parse_known_args(argv)
    if extra and not getattr(args, "takes_extra", False):
        parser.error(f"unrecognized arguments: {' '.join(extra)}")
    try:
        if args.func in (_run, _open):
            signal.signal(signal.SIGTERM, _on_sigterm)
            with _early_snakemake(), _early_worker(extra):
                code = int(args.func(args, extra))
            if _TERMINATED:
                raise Terminated
            return code
        return int(args.func(args, extra) if args.takes_extra else args.func(args))
    except HoldfastError as exc:
        sys.stderr.write(exc.format_message() + "\n")
        return exc.exit_code
    except KeyboardInterrupt:
        sys.stderr.write("holdfast: interrupted\n")
        return 130
    except Terminated:
        sys.stderr.write("holdfast: terminated (SIGTERM); Snakemake was asked to stop its jobs first\n"
                         if _FORWARDED else "holdfast: terminated (SIGTERM) while no Snakemake of it was running\n")
        return 128 + signal.SIGTERM


def entry() -> None:
    """The console command: run :func:`main`, then leave without the interpreter's teardown.

    Everything holdfast writes is fsynced and closed before this point. Skipping the teardown avoids an abort
    ('terminate called without an active exception') seen now and then at exit, after the closing lines,
    when native thread pools of the data libraries are torn down. A reader that stops early (``holdfast audit X |
    head -1``) closes the pipe: that ends the command quietly with the shell's code for SIGPIPE, not a traceback.
    """
    try:
        code = main()
        sys.stdout.flush()
    except BrokenPipeError:
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())  # Python's documented recipe (signal module)
        code = 128 + signal.SIGPIPE
    sys.stderr.flush()
    os._exit(code)
