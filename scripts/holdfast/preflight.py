"""``holdfast preflight --profile DIR``: check a SLURM profile against the cluster before a run.

A cluster run that cannot work often fails late and quietly: Snakemake's SLURM plugin waits for ever on job
states when ``sacct`` has no accounting database behind it, a mistyped partition is refused only at the
first submission, and a job whose environment lacks holdfast fails minutes later in a log on a compute
node. This module asks the cluster the same questions first, in seconds: do ``sbatch``, ``squeue`` and
``sinfo`` answer, can the plugin learn job states (``sacct``, or ``squeue`` with a long enough MinJobAge),
are the profile's partition and account accepted, and does one tiny probe job write under the results
folder and import holdfast and Snakemake with the Python that jobs run (the submitting interpreter, or the
``python`` on the job's PATH when the profile keeps software off the shared file system). Each problem is one
line with its fix; the summary line says whether the cluster is ready.

Only the standard library is imported at module level (the CLI imports this module to list the command).
"""

from __future__ import annotations

import argparse
import getpass
import os
import re
import secrets
import shlex
import shutil
import subprocess
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from .errors import ConfigError

REPO = Path(__file__).resolve().parents[2]
RULE_FILES = REPO / "workflow" / "rules"
SLURM_COMMANDS = ("sbatch", "squeue", "sinfo", "scontrol")
ANSWER_TIMEOUT = 30  # seconds for one SLURM command to answer
PLUGIN_INIT_DEFAULT = 40  # the plugin's default slurm-init-seconds-before-status-checks
PLUGIN_MAX_INTERVAL = 180  # the plugin's longest wait between two status checks (its max_sleep_time)
LATENCY_DEFAULT = 5  # Snakemake's default --latency-wait, seconds
PROBE_MINUTES = 5  # the probe job's time limit
PROBE_MEM_MB = 500  # the probe job's memory when the profile sets none
ENDED = {"COMPLETED", "FAILED", "CANCELLED", "TIMEOUT", "NODE_FAIL", "OUT_OF_MEMORY", "BOOT_FAIL", "DEADLINE",
         "PREEMPTED", "REVOKED", "SPECIAL_EXIT"}
OUT_OF_SERVICE = ("down", "drain", "drng", "fail", "inval", "maint", "unk", "npc", "powered")  # sinfo %t states
IMPORT_CHECK = "import sys, holdfast, snakemake; print(sys.executable); print(holdfast.__file__)"


@dataclass
class Findings:
    """What the checks found, printed as they come: one line per check, problems with their fix."""

    say: Callable[[str], None]
    passed: list[str] = field(default_factory=list)
    problems: list[str] = field(default_factory=list)

    def ok(self, text: str) -> None:
        self.passed.append(text)
        self.say(f"  ok: {text}")

    def problem(self, text: str) -> None:
        self.problems.append(text)
        self.say(f"  problem: {text}")


@dataclass(frozen=True)
class Answer:
    """One SLURM command's reply; ``code`` is None when it is not installed or gave no answer in time."""

    code: int | None
    out: str
    err: str

    @property
    def fine(self) -> bool:
        return self.code == 0

    def why(self) -> str:
        """The first line of what went wrong, for a one-line message."""
        return _first_line(self.err) or _first_line(self.out) or f"exit status {self.code}"


def _first_line(text: str, width: int = 160) -> str:
    for line in text.splitlines():
        if line.strip():
            line = line.strip()
            return line if len(line) <= width else line[:width - 3] + "..."
    return ""


def _last_line(text: str) -> str:
    lines = [line.strip() for line in text.splitlines() if line.strip()]
    return _first_line(lines[-1]) if lines else ""


def _ask(cmd: list[str], timeout: float = ANSWER_TIMEOUT, stdin: str | None = None,
         env: dict[str, str] | None = None) -> Answer:
    """Run one command with a time limit; never raises for a missing command or a hang."""
    try:
        done = subprocess.run(cmd, input=stdin, capture_output=True, text=True, timeout=timeout, env=env,
                              stdin=None if stdin is not None else subprocess.DEVNULL, check=False)
    except FileNotFoundError:
        return Answer(None, "", f"{cmd[0]}: command not found")
    except subprocess.TimeoutExpired:
        return Answer(None, "", f"{cmd[0]} gave no answer within {timeout:g} s")
    return Answer(done.returncode, done.stdout, done.stderr)


# ---------------------------------------------------------------- the profile


@dataclass(frozen=True)
class Profile:
    """A Snakemake profile's settings, read as plain data (keys with dashes, as on Snakemake's command line)."""

    path: Path
    settings: dict[str, Any]

    def get(self, key: str, default: Any = None) -> Any:
        return self.settings.get(key, default)

    def pairs(self, key: str) -> dict[str, str]:
        """A key=value option (default-resources, groups, set-threads) as a mapping, from either YAML form."""
        return _pairs(self.get(key), key, self.path)

    def rule_resources(self) -> dict[str, dict[str, str]]:
        """set-resources as rule -> resource -> value, from either YAML form."""
        value = self.get("set-resources")
        out: dict[str, dict[str, str]] = {}
        if isinstance(value, dict):
            for rule, resources in value.items():
                out[str(rule)] = _pairs(resources, f"set-resources: {rule}", self.path)
        elif value is not None:
            for rule_key, item in _pairs(value, "set-resources", self.path).items():
                rule, _, key = rule_key.partition(":")
                out.setdefault(rule, {})[key] = item
        return out

    def number(self, key: str, default: int) -> int:
        value = self.get(key, default)
        try:
            return int(value)
        except (TypeError, ValueError) as exc:
            raise ConfigError(f"profile '{self.path}': '{key}' is {value!r}, not a whole number; write a number "
                              "of seconds") from exc


def _unquote(value: Any) -> str:
    text = str(value).strip()
    if len(text) >= 2 and text[0] == text[-1] and text[0] in "'\"":
        return text[1:-1]
    return text


def _pairs(value: Any, key: str, source: Path) -> dict[str, str]:
    if value is None:
        return {}
    if isinstance(value, dict):
        return {str(k): _unquote(v) for k, v in value.items()}
    if isinstance(value, list):
        out = {}
        for item in value:
            name, sep, text = str(item).partition("=")
            if not sep:
                raise ConfigError(f"profile '{source}': '{key}' entry {item!r} is not NAME=VALUE; write it as "
                                  "NAME=VALUE or as a mapping")
            out[name.strip()] = _unquote(text)
        return out
    raise ConfigError(f"profile '{source}': '{key}' is {value!r}; write a mapping (name: value) or a list of "
                      "NAME=VALUE")


PROFILE_FILE = re.compile(r"(?:profile|config)(?:\.v(\d+)\+)?\.yaml")


def _profile_file(folder: Path) -> Path | None:
    """The file Snakemake reads in a profile folder: (profile|config)[.vN+].yaml with the highest N it runs."""
    from importlib.metadata import version

    major = int(version("snakemake").split(".")[0])
    found = []
    for path in sorted(folder.iterdir()):
        match = PROFILE_FILE.fullmatch(path.name)
        if match and path.is_file() and int(match.group(1) or 0) <= major:
            found.append((int(match.group(1) or 0), path))
    return max(found, key=lambda item: item[0])[1] if found else None


def find_profile(name: str) -> Path | None:
    """Where Snakemake's --profile NAME finds its YAML: a file, a folder, or a folder of that name in the
    current folder, ~/.config/snakemake or /etc/xdg/snakemake (Snakemake's own search, without importing it:
    importing Snakemake's command line loads every executor plugin)."""
    given = Path(name).expanduser()
    if given.is_file():
        return given
    if given.exists():
        return _profile_file(given) if given.is_dir() else None
    config_home = Path(os.environ.get("XDG_CONFIG_HOME") or Path.home() / ".config")
    for base in (Path.cwd(), config_home / "snakemake", Path("/etc/xdg/snakemake")):
        candidate = base / name
        if candidate.is_file():
            return candidate
        if candidate.is_dir():
            found = _profile_file(candidate)
            if found is not None:
                return found
    return None


def read_profile(name: str) -> Profile:
    """Find the profile's YAML as Snakemake does (a folder's config.yaml, or a file) and read it as plain data."""
    from .config import parse_yaml

    path = find_profile(name)
    if path is None:
        raise ConfigError(f"profile '{name}' has no config.yaml (nor profile.yaml); pass the folder that holds "
                          "the profile's config.yaml, e.g. workflow/profiles/slurm")
    data = parse_yaml(path.read_text(encoding="utf-8"), str(path))
    if not isinstance(data, dict):
        raise ConfigError(f"profile '{path}' is not a mapping of Snakemake options; write 'option: value' lines")
    return Profile(path, {str(k): v for k, v in data.items()})


def workflow_rules() -> set[str]:
    """Every rule name the workflow can have (rule NAME, use rule ... as NAME), read from workflow/rules/."""
    names: set[str] = set()
    for path in sorted(RULE_FILES.glob("*.smk")):
        text = path.read_text(encoding="utf-8")
        names.update(re.findall(r"^(?:rule|checkpoint)\s+(\w+)\s*:", text, flags=re.MULTILINE))
        names.update(re.findall(r"^use\s+rule\s+\w+\s+as\s+(\w+)", text, flags=re.MULTILINE))
    return names


def _check_profile(profile: Profile, found: Findings) -> bool:
    """The profile's own settings; False when it is not a SLURM profile (nothing further to check)."""
    import importlib.util

    executor = profile.get("executor")
    if executor != "slurm":
        what = "does not set 'executor'" if executor is None else f"sets executor '{executor}'"
        found.problem(f"profile '{profile.path}' {what}, so 'holdfast run --profile' would not submit to SLURM; "
                      "add the line 'executor: slurm'")
        return False
    if importlib.util.find_spec("snakemake_executor_plugin_slurm") is None:
        found.problem("Snakemake's SLURM executor plugin is not installed in this environment; run "
                      "pip install 'holdfast-selection[cluster]'")
    rules = workflow_rules()
    named = [(key, rule) for key in ("groups", "set-threads") for rule in profile.pairs(key)]
    named += [("set-resources", rule) for rule in profile.rule_resources()]
    unknown = [f"{key} '{rule}'" for key, rule in named if rule not in rules]
    if unknown:
        found.problem(f"profile '{profile.path}' names rules the workflow does not have ({', '.join(unknown)}); "
                      f"remove those lines (the rules are: {', '.join(sorted(rules))})")
    else:
        found.ok(f"profile '{profile.path}': executor slurm" + (f", {len(named)} rule setting(s) name existing "
                                                                "rules" if named else ""))
    return True


# ---------------------------------------------------------------- the cluster


@dataclass
class Cluster:
    """What the SLURM commands said about the cluster."""

    partitions: dict[str, str] = field(default_factory=dict)  # name -> availability (up, down, ...)
    node_states: dict[str, set[str]] = field(default_factory=dict)  # name -> its nodes' states (idle, drain, ...)
    default_partition: str | None = None
    version: str = ""


def _check_commands(found: Findings) -> Cluster | None:
    """sbatch, squeue, sinfo and scontrol on PATH, and the controller answering; None when it cannot go on."""
    missing = [name for name in SLURM_COMMANDS if shutil.which(name) is None]
    if missing:
        found.problem(f"SLURM commands not on PATH: {', '.join(missing)}; run preflight on the cluster's login "
                      "node, or make SLURM's commands available first (e.g. 'module load slurm')")
        return None
    queue = _ask(["squeue", "--noheader", "-u", getpass.getuser(), "-o", "%i"])
    if not queue.fine:
        found.problem(f"squeue gets no answer from the SLURM controller ({queue.why()}); check 'scontrol ping' "
                      "and, if it fails, ask the cluster's administrators")
        return None
    info = _ask(["sinfo", "--noheader", "-o", "%P|%a|%t"])
    if not info.fine:
        found.problem(f"sinfo gets no answer from the SLURM controller ({info.why()}); check 'scontrol ping' "
                      "and, if it fails, ask the cluster's administrators")
        return None
    cluster = Cluster(version=_first_line(_ask(["sinfo", "--version"]).out))
    for line in info.out.splitlines():
        name, _, rest = line.strip().partition("|")
        if not name:
            continue
        if name.endswith("*"):
            name = name[:-1]
            cluster.default_partition = name
        cluster.partitions[name], _, nodes = rest.partition("|")
        cluster.node_states.setdefault(name, set()).add(nodes.rstrip("*~#!%$@^-"))
    listed = ", ".join(p + ("*" if p == cluster.default_partition else "") for p in cluster.partitions)
    found.ok(f"{cluster.version or 'SLURM'} answers: {', '.join(SLURM_COMMANDS)} (partitions: {listed or 'none'})")
    return cluster


def min_job_age() -> int | None:
    """SLURM's MinJobAge in seconds (how long squeue still lists a finished job), or None if unreadable."""
    shown = _ask(["scontrol", "show", "config"])
    match = re.search(r"^\s*MinJobAge\s*=\s*(\d+)\s*(\w*)", shown.out, flags=re.MULTILINE)
    if not shown.fine or match is None:
        return None
    value, unit = int(match.group(1)), match.group(2).lower()
    return value * 3600 if unit in ("h", "hour", "hours") else value


def _check_job_states(profile: Profile, found: Findings) -> None:
    """Can the plugin learn job states? It asks sacct, or squeue when the profile says so and MinJobAge allows."""
    status = profile.get("slurm-status-command")
    if status not in (None, "sacct", "squeue"):
        found.problem(f"profile '{profile.path}': slurm-status-command is {status!r}; write sacct or squeue")
        return
    init = profile.number("slurm-init-seconds-before-status-checks", PLUGIN_INIT_DEFAULT)
    age = min_job_age()
    age_text = "unknown (scontrol show config does not say)" if age is None else f"{age} s"
    installed = shutil.which("sacct") is not None
    sacct = _ask(["sacct", "--noheader", "-X", "-S", "now-1minute", "-o", "JobID"]) if installed else None
    answers = sacct is not None and sacct.fine
    used = status or ("sacct" if installed else "squeue")
    switched = used == "squeue" and installed and (age is None or age < 3 * init)  # the plugin's own rule
    if switched:
        used = "sacct"
    if used == "sacct" and not answers:
        why = "it is not installed" if sacct is None else sacct.why()
        if switched:
            found.problem(f"the plugin asks sacct for job states when MinJobAge ({age_text}) is below 3 x "
                          f"slurm-init-seconds-before-status-checks ({init} s), and sacct does not answer ({why}), "
                          f"so a run would wait for ever; set slurm-init-seconds-before-status-checks to at most "
                          f"{max(1, (age or 3) // 3)} in the profile")
        else:
            found.problem(f"sacct does not answer ({why}), and the plugin asks it for job states, so a run would "
                          "wait for ever; add the line 'slurm-status-command: squeue' to the profile")
        return
    if used == "squeue" and age is not None and age < PLUGIN_MAX_INTERVAL:
        fix = ("remove 'slurm-status-command: squeue' from the profile (sacct answers)" if answers else
               "ask the cluster's administrators to raise MinJobAge to 300 s or more")
        found.problem(f"MinJobAge is {age} s: squeue forgets a finished job before the plugin's next status check "
                      f"(up to {PLUGIN_MAX_INTERVAL} s apart) and a run would wait for ever on it; {fix}")
        return
    extra = "" if answers else f"; sacct: {sacct.why() if sacct else 'not installed'}"
    found.ok(f"job states: the plugin asks {used} (MinJobAge {age_text}, first check after {init} s{extra})")


def resource_values(profile: Profile, resource: str) -> dict[str, list[str]]:
    """Each value of a resource in the profile -> where it is set (default-resources, set-resources: RULE)."""
    where: dict[str, list[str]] = {}
    places = [("default-resources", profile.pairs("default-resources"))]
    places += [(f"set-resources: {rule}", resources) for rule, resources in profile.rule_resources().items()]
    for place, resources in places:
        # SLURM takes a comma-separated list of partitions (the first that can start the job runs it)
        for value in re.split(r"[,\s]+", resources.get(resource, "")):
            if value:
                where.setdefault(value, []).append(place)
    return where


def _in_service(state: str) -> bool:
    """Whether nodes in this sinfo state (%t, flags stripped) can start jobs now or later."""
    return not state.startswith(OUT_OF_SERVICE)


def _check_partitions(profile: Profile, cluster: Cluster, found: Findings) -> bool:
    """Each partition the profile names (or else the cluster's default) exists, is up and has a node in service."""
    values = resource_values(profile, "slurm_partition")
    named = {p: f"{'; '.join(where)}: slurm_partition" for p, where in values.items()}
    listed = ", ".join(cluster.partitions) or "none"
    if not named:
        if cluster.default_partition is None:
            found.problem(f"the profile sets no slurm_partition and the cluster has no default partition; add "
                          f"slurm_partition under default-resources, one of: {listed}")
            return False
        named = {cluster.default_partition: "the cluster's default; the profile sets none"}
    bad = False
    for partition, where in named.items():
        if partition not in cluster.partitions:
            found.problem(f"partition '{partition}' ({where}) does not exist on this cluster; set slurm_partition "
                          f"to one of: {listed} (as 'sinfo' lists them)")
        elif cluster.partitions[partition] != "up":
            found.problem(f"partition '{partition}' ({where}) is {cluster.partitions[partition]}, not up; choose "
                          f"another of: {listed}, or wait until it is up")
        elif not any(_in_service(state) for state in cluster.node_states[partition]):
            found.problem(f"partition '{partition}' ({where}) has no node in service (its nodes are "
                          f"{', '.join(sorted(cluster.node_states[partition]))}); choose another of: {listed}, or "
                          "ask the cluster's administrators")
        else:
            continue
        bad = True
    if not bad:
        found.ok("partition: " + ", ".join(f"{p} ({where}; up)" for p, where in named.items()))
    return not bad


def _check_accounts(profile: Profile, found: Findings) -> bool:
    """Check each account as the plugin does: sacctmgr's list for this user, else sshare's."""
    named = resource_values(profile, "slurm_account")
    if not named:
        found.ok("account: none set, SLURM charges your default account")
        return True
    user = getpass.getuser()
    listing = _ask(["sacctmgr", "--noheader", "-s", "list", "user", user, "format=account%256"])
    source = "sacctmgr"
    if not listing.fine or not listing.out.strip():
        listing, source = _ask(["sshare", "-U", "--format", "Account%256", "--noheader"]), "sshare"
        if not listing.fine:
            found.problem(f"account '{next(iter(named))}' cannot be checked: sacctmgr and sshare do not answer "
                          f"({listing.why()}), and the plugin then stops the run; remove slurm_account from the "
                          "profile, or ask the cluster's administrators")
            return False
    accounts = {line.strip().lower() for line in listing.out.splitlines() if line.strip()}
    if not accounts:
        found.ok(f"account: {', '.join(named)} (this cluster keeps no accounts to check it against)")
        return True
    bad = [account for account in named if account.lower() not in accounts]
    for account in bad:
        found.problem(f"account '{account}' ({'; '.join(named[account])}: slurm_account) is not one of yours "
                      f"({', '.join(sorted(accounts))}, as {source} lists them for {user}); set slurm_account to "
                      "one of those")
    if not bad:
        found.ok(f"account: {', '.join(named)} (one of yours, as {source} lists them)")
    return not bad


def _request(profile: Profile) -> list[str]:
    """sbatch options for the profile's default account and partition."""
    resources = profile.pairs("default-resources")
    options = []
    if resources.get("slurm_account"):
        options += ["--account", resources["slurm_account"]]
    if resources.get("slurm_partition"):
        options += ["--partition", resources["slurm_partition"]]
    return options


def default_sizes(profile: Profile) -> tuple[int | None, int | None]:
    """The default runtime (minutes) and memory (MB) as Snakemake reads them ('1h', '2GB' included), or None."""
    from snakemake.resources import Resource
    from snakemake_interface_common.exceptions import WorkflowError

    resources = profile.pairs("default-resources")
    try:
        runtime = Resource.parse_human_friendly("runtime", resources["runtime"]) if "runtime" in resources else None
        if "mem_mb" in resources:
            mem = Resource.parse_human_friendly("mem_mb", resources["mem_mb"])
        else:
            mem = Resource.parse_human_friendly("mem", resources["mem"]) if "mem" in resources else None
        return (None if runtime is None else int(runtime)), (None if mem is None else int(mem))
    except (WorkflowError, ValueError, TypeError) as exc:
        raise ConfigError(f"profile '{profile.path}': default-resources runtime or mem is not a size Snakemake "
                          f"reads ({exc}); write minutes and MB (runtime: 30, mem_mb: 1000) or '1h', '2GB'") from exc


def _check_test_submission(profile: Profile, env: dict[str, str], found: Findings) -> bool:
    runtime, mem = default_sizes(profile)
    options = [f"--time={runtime}"] if runtime else []
    options += [f"--mem={mem}"] if mem else []
    test = _ask(["sbatch", "--test-only", "--job-name=holdfast-preflight", *_request(profile), *options,
                 "--wrap=true"], env=env)
    size = " and ".join(filter(None, [runtime and f"{runtime} min", mem and f"{mem} MB"])) or "the default size"
    if not test.fine:
        found.problem(f"sbatch --test-only refuses a job of {size} with the profile's default-resources: "
                      f"{test.why()}; change those default-resources")
        return False
    found.ok(f"sbatch --test-only accepts a job of {size}")
    return True


# ---------------------------------------------------------------- the probe job


def job_environment() -> dict[str, str]:
    """The environment 'holdfast run' hands Snakemake, which its jobs inherit (sbatch --export=ALL)."""
    return {**os.environ,
            "PYTHONPATH": os.pathsep.join(filter(None, [str(REPO / "scripts"), os.environ.get("PYTHONPATH")]))}


def probe_script(folder: Path) -> str:
    """The probe job: write under the results folder, then import holdfast and snakemake with two interpreters."""
    where = shlex.quote(str(folder))
    return "\n".join([
        "#!/bin/sh",
        f"probe={where}",
        'hostname > "$probe/node" || exit 3',
        "check() {",
        f'  "$2" -c {shlex.quote(IMPORT_CHECK)} > "$probe/$1.out" 2>&1',
        '  echo $? > "$probe/$1.code"',
        "}",
        'if command -v python > "$probe/path.which" 2>/dev/null; then check path python; fi',
        f"check own {shlex.quote(sys.executable)}",
        'echo done > "$probe/done"',
        "",
    ])


def _job_state(jobid: str) -> tuple[str, str] | None:
    """The job's state and reason from squeue, or None once squeue no longer lists it."""
    shown = _ask(["squeue", "--noheader", "--states=all", "-j", jobid, "-o", "%T|%r"])
    line = _first_line(shown.out) if shown.fine else ""
    if not line:
        return None
    state, _, reason = line.partition("|")
    return state, reason


def _read(path: Path) -> str:
    try:
        return path.read_text(encoding="utf-8", errors="replace")
    except OSError:
        return ""


def _check_probe(profile: Profile, results: Path, timeout: float, env: dict[str, str], found: Findings) -> None:
    """Submit one tiny job that writes under the results folder and imports holdfast; read what it wrote."""
    try:
        results.mkdir(parents=True, exist_ok=True)
        folder = results / f".preflight-{secrets.token_hex(4)}"
        folder.mkdir()
    except OSError as exc:
        found.problem(f"cannot make folder '{results}' here ({exc.strerror}); run preflight from the project "
                      "folder you will run holdfast from")
        return
    try:
        _probe(profile, folder.resolve(), timeout, env, found, results)
    finally:
        shutil.rmtree(folder, ignore_errors=True)


def _wait(jobid: str, folder: Path, deadline: float, latency: float) -> tuple[str, str, bool]:
    """Wait for the probe's last file, or its end plus ``latency`` s; its last state, reason and whether it ended."""
    state, reason, ended_at = "PENDING", "", None
    while not (folder / "done").exists():
        now = time.monotonic()
        seen = _job_state(jobid)
        if seen is not None:
            state, reason = seen
        if ended_at is None and (seen is None or state in ENDED):
            ended_at = now  # ended (or gone from squeue): give a shared file system latency-wait to show files
        if ended_at is not None and now - ended_at > latency:
            break
        if now > deadline:
            return state, reason, False
        time.sleep(1.0)
    return state, reason, True


def _probe(profile: Profile, folder: Path, timeout: float, env: dict[str, str], found: Findings,
           results: Path) -> None:
    mem = default_sizes(profile)[1] or PROBE_MEM_MB
    submitted = _ask(["sbatch", "--parsable", "--job-name=holdfast-preflight", *_request(profile),
                      f"--time={PROBE_MINUTES}", f"--mem={mem}", f"--output={folder}/slurm-%j.out",
                      f"--chdir={Path.cwd()}", "--export=ALL"], stdin=probe_script(folder), env=env)
    jobid = submitted.out.strip().split(";")[0]
    if not submitted.fine or not jobid.isdigit():
        found.problem(f"sbatch cannot submit the probe job ({submitted.why()}); fix the profile's "
                      "default-resources (slurm_partition, slurm_account, mem_mb)")
        return
    start = time.monotonic()
    try:
        state, reason, ended = _wait(jobid, folder, start + timeout, profile.number("latency-wait", LATENCY_DEFAULT))
    except BaseException:  # interrupted: the probe must not run on after preflight is gone
        _ask(["scancel", jobid])
        raise
    if not ended:
        _ask(["scancel", jobid])
        waiting = f"still {state}" + (f" (reason: {reason})" if reason and reason != "None" else "")
        found.problem(f"probe job {jobid} is {waiting} after {timeout:g} s and was cancelled; run preflight "
                      "again when the queue is shorter, or give it longer with --timeout SECONDS")
        return
    seconds = time.monotonic() - start
    said = _last_line(_read(folder / f"slurm-{jobid}.out"))
    said = f" (the job said: {said})" if said else ""
    node = _first_line(_read(folder / "node"))
    if not node:
        found.problem(f"probe job {jobid} ended {state} without writing to '{results}' from a compute node{said}; "
                      f"run holdfast from a folder that the compute nodes share and can write (not a local /tmp)")
        return
    if not (folder / "done").exists():
        found.problem(f"probe job {jobid} on node {node} ended {state} before it finished{said}; run preflight "
                      "again, and if it repeats, ask the cluster's administrators about that node")
        return
    found.ok(f"probe job {jobid} ran on node {node} and wrote under '{results}' (answered in {seconds:.0f} s)")
    _check_job_python(profile, folder, found)


def jobs_use_path_python(profile: Profile) -> bool:
    """Whether jobs run 'python' from their PATH rather than the submitting interpreter.

    Snakemake's remote executors start jobs with the submitting interpreter (sys.executable) while the
    software is on a shared file system (``--shared-fs-usage`` with ``software-deployment``, the default), and
    with 'python' from the job's PATH otherwise.
    """
    usage = profile.get("shared-fs-usage")
    if usage is None:
        return False
    words = usage if isinstance(usage, list) else str(usage).split()
    return "software-deployment" not in [str(w) for w in words]


def _interpreter(folder: Path, name: str) -> tuple[bool, str, Path | None, str]:
    """What the probe saw for one interpreter: imports fine, sys.executable, holdfast's file, last error line."""
    out = _read(folder / f"{name}.out")
    lines = [line.strip() for line in out.splitlines() if line.strip()]
    fine = _first_line(_read(folder / f"{name}.code")) == "0" and len(lines) >= 2
    return fine, lines[0] if fine else "", Path(lines[1]).resolve() if fine else None, _last_line(out)


def _check_job_python(profile: Profile, folder: Path, found: Findings) -> None:
    """The interpreter jobs will run must import holdfast (this same copy) and snakemake; say which python it is."""
    import holdfast

    ours = Path(holdfast.__file__).resolve()
    which = _first_line(_read(folder / "path.which"))
    path_fine, path_exe, path_holdfast, path_error = _interpreter(folder, "path")
    if path_fine and path_holdfast == ours:
        on_path = f"'python' on PATH there is {which} and imports this holdfast"
    elif path_fine:
        on_path = f"'python' on PATH there is {which} and imports holdfast from {path_holdfast.parent.parent}"
    elif which:
        on_path = f"'python' on PATH there is {which} and cannot import holdfast and snakemake ({path_error})"
    else:
        on_path = "no 'python' is on PATH there"
    if jobs_use_path_python(profile):
        fix = ("start 'holdfast run' from a shell whose PATH has the environment's bin first (e.g. activate it): "
               "jobs inherit the submitting shell's environment")
        if path_fine and path_holdfast == ours:
            found.ok(f"in jobs {on_path} ({path_exe}), and snakemake; jobs run it (shared-fs-usage without "
                     "software-deployment)")
        else:
            found.problem(f"jobs run 'python' from their PATH (the profile's shared-fs-usage leaves out "
                          f"software-deployment), and {on_path}; {fix}")
        return
    own_fine, _, own_holdfast, own_error = _interpreter(folder, "own")
    if not own_fine:
        found.problem(f"jobs run {sys.executable} (the interpreter that submits them), which cannot import "
                      f"holdfast and snakemake on the compute node ({own_error}); install the environment on a "
                      "file system the compute nodes share")
    elif own_holdfast != ours:
        found.problem(f"jobs run {sys.executable}, which imports holdfast from {own_holdfast.parent.parent} on the "
                      f"compute node but from {ours.parent.parent} here; unset PYTHONPATH or point it at the same "
                      "copy for both")
    else:
        found.ok(f"in jobs {sys.executable} (the interpreter that submits them) imports holdfast (from "
                 f"{ours.parent.parent}) and snakemake; {on_path}")


# ---------------------------------------------------------------- the command


def preflight(profile_name: str, results: str = "results", timeout: float = 300.0,
              say: Callable[[str], None] = print) -> Findings:
    """Run every check against ``profile_name`` (a profile folder or file); print each finding as it comes."""
    profile = read_profile(profile_name)
    default_sizes(profile)  # settings it cannot read stop it here, before any check
    for key, default in (("latency-wait", LATENCY_DEFAULT),
                         ("slurm-init-seconds-before-status-checks", PLUGIN_INIT_DEFAULT)):
        profile.number(key, default)
    found = Findings(say)
    say(f"holdfast: preflight of profile '{profile.path}' (results folder '{results}')")
    if not _check_profile(profile, found):
        return found
    cluster = _check_commands(found)
    if cluster is None:
        return found
    _check_job_states(profile, found)
    env = job_environment()
    settings_ok = _check_partitions(profile, cluster, found)
    settings_ok = _check_accounts(profile, found) and settings_ok
    if settings_ok and _check_test_submission(profile, env, found):
        _check_probe(profile, Path(results), timeout, env, found)
    return found


def command(args: argparse.Namespace) -> int:
    """``holdfast preflight``: exit 0 when every check passed, 1 otherwise."""
    found = preflight(args.profile, args.results, args.timeout)
    checks = len(found.passed) + len(found.problems)
    if found.problems:
        n = len(found.problems)
        print(f"holdfast: preflight: {n} problem{'s' if n > 1 else ''} in {checks} checks; fix "
              f"{'them' if n > 1 else 'it'} and run 'holdfast preflight --profile {args.profile}' again", flush=True)
        return 1
    print(f"holdfast: preflight: all {checks} checks passed; run 'holdfast run CONFIG --profile {args.profile}'",
          flush=True)
    return 0


def add_command(sub: Any) -> None:
    """Register ``holdfast preflight`` on the CLI's subcommands."""
    p = sub.add_parser("preflight", help="before a cluster run: check SLURM, the profile and one probe job",
                       description="Check that SLURM answers, that Snakemake's SLURM plugin can learn job states, "
                       "that the profile's partition and account are accepted, and that one probe job can write under "
                       "the results folder and import holdfast and Snakemake with the Python jobs run. One line per "
                       "problem, with its fix; exit 0 when all pass, 1 otherwise.")
    p.add_argument("--profile", required=True, help="the Snakemake profile for the cluster (folder or file)")
    p.add_argument("--results", default="results", help="results folder the run will write (default: results)")
    p.add_argument("--timeout", type=float, default=300.0, metavar="SECONDS",
                   help="how long to wait for the probe job (default: 300)")
    p.set_defaults(func=command, takes_extra=False)
