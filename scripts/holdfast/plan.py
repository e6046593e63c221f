"""What the Snakefile needs at parse time: the checked config, the jobs, and the guards.

The guards run before Snakemake schedules anything (dry runs included): a data file
that changed since the seal, a config whose sealed parts changed, and any change that
would re-open an already opened test set all stop the workflow with one message.
"""

from __future__ import annotations

import math
import os
import re
import sys
from dataclasses import dataclass, field
from functools import cache
from pathlib import Path
from typing import Any

from . import config as cfg
from . import ledger
from ._io import canonical_json, read_json, sha256_file, sha256_text
from .candidates import expand, family_payload, fit_groups
from .errors import ConfigError, DataError, HoldfastError, SealedAccessError
from .layout import DEV, LEDGER, MANIFEST, REQUEST, TEST, fit_file, group_family, read_manifest

PACKAGE = Path(__file__).resolve().parent
STAGE_MODULES = {
    "assign_folds": "folds", "fit_family": "fit", "record_round": "rounds", "tally": "tally", "refit_winner": "refit",
    "open_test": "opening", "score_outer": "nested", "nested_summary": "nested", "report": "report",
    "learning_curve": "learning", "diagnostics": "diagnostics", "learning_summary": "diagnostics",
}


# "from .module import ..." and "from . import a, b" (names in parentheses may span lines), at any indentation.
_RELATIVE_IMPORT = re.compile(r"^[ \t]*from[ \t]+\.(\w*)(?:\.\w+)*[ \t]+import[ \t]+(\([^)]*\)|[^\n]*)", re.M)


@cache
def _relative_imports(module: str) -> frozenset[str]:
    """The package modules ``module`` imports relatively (one level up: ``from .x import y``, ``from . import x``).

    A line scan, not ``ast.parse``: parsing every module took about 0.2 s of each Snakefile parse (each cluster
    job parses it again). A text that only looks like an import (in a string) can add a module, so a hash may
    cover more code than it needs, never less; tests/test_units.py checks the scan against ``ast`` on every
    module. Cached: every stage's hash walks the shared modules again.
    """
    text = (PACKAGE / f"{module}.py").read_text(encoding="utf-8")
    found = set()
    for match in _RELATIVE_IMPORT.finditer(text):
        name, names = match.group(1), match.group(2)
        if name:
            found.add(name)
            continue
        for line in names.strip("()").splitlines():
            for part in line.split("#", 1)[0].replace("\\", "").split(","):
                if part.strip():
                    found.add(part.split()[0])
    return frozenset(m for m in found if (PACKAGE / f"{m}.py").exists())


@cache
def code_hash(stage: str) -> str:
    """Hash of the package modules a stage runs (its module and everything it imports)."""
    todo, seen = [STAGE_MODULES[stage]], set()
    while todo:
        module = todo.pop()
        if module in seen:
            continue
        seen.add(module)
        todo.extend(_relative_imports(module) - seen)
    # steps.py (the adapters) is part of every stage's code, though no stage module imports it.
    parts = {m: sha256_file(PACKAGE / f"{m}.py") for m in sorted(seen | {"__init__", "steps"})}
    return sha256_text(canonical_json(parts))[:16]


# Memory of the data-bound jobs (seal, fold assignment) from the data's size in memory: see Plan.data_mem_mb.
DATA_MEM_BASE_MB = 500
DATA_MEM_FACTOR = 2.0
UPSTREAM = ("assign_folds", "fit_family", "tally", "refit_winner", "open_test")


def upstream_codes() -> dict[str, str]:
    """The code hash of every stage up to and including the opening."""
    return {s: code_hash(s) for s in UPSTREAM}


def upstream_code() -> str:
    """One hash over :func:`upstream_codes` (part of the opening fingerprint)."""
    return sha256_text(canonical_json(upstream_codes()))[:16]


def ensemble_size(params: dict[str, Any]) -> int:
    """A candidate's guessed fit cost in units of one plain model: its declared ``n_estimators`` (an ensemble's
    fit time grows with its number of members), else 1. Only orders the first fit jobs, so no estimator is
    imported to look up a default."""
    size = params.get("n_estimators")
    return size if isinstance(size, int) and not isinstance(size, bool) and size > 1 else 1


@dataclass
class Plan:
    """The checked config of one experiment and the jobs it implies."""

    config: dict[str, Any]
    exp: Path
    families: dict[str, list[dict[str, Any]]]
    manifest: dict[str, Any] | None
    fold_ids: list[tuple[int, int]] = field(default_factory=list)
    opened: int = 0
    main: bool = True
    facts: dict[str, Any] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)  # what the full check could not check, one line each
    _costs: dict[str, float] | None = field(default=None, repr=False)
    _groups: dict[str, list[dict[str, Any]]] | None = field(default=None, repr=False)

    @property
    def groups(self) -> dict[str, list[dict[str, Any]]]:
        """The candidates of each fit job by its family part (the fit rule's family wildcard): the family itself,
        or ``<family>.<i>`` with candidates.<family>.jobs_per_fold above 1 (candidates.fit_groups)."""
        if self._groups is None:
            self._groups = fit_groups(self.config, self.families)
        return self._groups

    @property
    def sealed(self) -> bool:
        """True once the seal's manifest exists: from then on the seal rule is not part of the workflow."""
        return self.manifest is not None

    @property
    def allowed_openings(self) -> int:
        """One opening, plus one per written reason in test.reopen_reasons."""
        return 1 + len(self.config["test"]["reopen_reasons"])

    @property
    def closed(self) -> bool:
        """True when every allowed opening happened: the steps up to the opening leave the workflow.

        Decided in the main process only (job processes define every rule, as they run one job each).
        """
        return self.main and self.opened >= self.allowed_openings

    def verdict_to_restore(self) -> str:
        """The archived verdict to copy back when a closed experiment's verdict was deleted ('' otherwise).

        Only the archive copy whose hash the ledger's last opening recorded qualifies. Also in a job process, which
        defines every rule up to the opening (see :attr:`closed`) but must find this one to run it.
        """
        from .layout import ARCHIVE, VERDICT

        if (self.exp / VERDICT).exists() or not (self.exp / LEDGER).exists():
            return ""
        if not (self.exp / ARCHIVE).is_dir():  # no opening archived a verdict: nothing to restore, no ledger to read
            return ""
        if not self.main:  # a job process (a cluster job, plain Snakemake's own process per job) counts them now
            from . import openings

            if self.manifest is None or openings.records(self.exp).count < self.allowed_openings:
                return ""
        elif not self.closed:
            return ""
        entries, problems = ledger.verify_chain(self.exp / LEDGER)
        finished = ledger.events(entries, "open_test")
        if problems or not finished:
            return ""
        from . import openings

        archive = openings.archive_path(self.exp, int(finished[-1]["details"]["opening"]))
        ok = archive.exists() and sha256_file(archive) == finished[-1]["details"].get("verdict_sha256")
        return str(archive) if ok else ""

    @property
    def request(self) -> str | None:
        """The confirmation ``holdfast open`` wrote for the next opening, if it exists and an opening is allowed."""
        path = self.exp / REQUEST
        return str(path) if path.exists() and not self.closed else None

    @property
    def spec(self) -> dict[str, Any]:
        """The seal spec (column roles, task, test partition)."""
        return cfg.seal_spec(self.config)

    def data_mem_mb(self, floor: int) -> int:
        """A data-bound job's memory request in MB: ``floor``, or more when the data file is large.

        The full check measured the data's size in memory (facts ``data_mb``). bench/data_size.py's 10 M rows x 20
        columns hold 1,499 MB in memory, and the seal peaked at 2,918 MB and the fold assignment at 2,375 MB (about
        1.8 x the data above 220 MB of imports), so the request is 500 MB + 2 x the data (3,498 MB there), never less
        than ``floor``. An estimate from one data shape, not a bound; a profile's set-resources still overrides it.
        Unknown size (no full check recorded): ``floor``.
        """
        size = self.facts.get("data_mb") if self.facts else None
        if not isinstance(size, int | float) or isinstance(size, bool) or size < 0:
            return floor
        return max(floor, math.ceil(DATA_MEM_BASE_MB + DATA_MEM_FACTOR * size))

    def path(self, name: str) -> str:
        """A path inside the experiment directory."""
        return str(self.exp / name)

    def fit_files(self, kind: str) -> list[str]:
        """Every fits/ or oof/ file the fit jobs produce."""
        return [self.path(fit_file(kind, fam, r, f)) for fam in self.groups for r, f in self.fold_ids]

    def learning_files(self) -> list[str]:
        """The learning-curve tables, one per (repeat, fold); none when diagnostics.learning_curve is false."""
        if not cfg.learning_sizes(self.config):
            return []
        return [self.path(f"diagnostics/learning/r{r}f{f}.parquet") for r, f in self.fold_ids]

    def nested_fit_files(self, kind: str, outer: int) -> list[str]:
        """The fits/ or oof/ files of one nested outer fold."""
        return [self.path(f"nested/o{outer}/{fit_file(kind, fam, r, f)}") for fam in self.groups
                for r, f in self.fold_ids]

    def outer_fold_spec(self) -> dict[str, Any]:
        """The outer folds of nested cross-validation: the inner scheme, nested.k folds, one repeat."""
        nested = self.config["nested"]
        return {**self.config["folds"], "k": max(int(nested["k"]), 2), "repeats": 1, "seed": int(nested["seed"])}

    def family_json(self, family: str) -> str:
        """The family's canonical JSON, a param of its fit jobs."""
        return family_payload(family, self.groups[family])

    def parts_json(self) -> str:
        """Canonical JSON {candidate id: family part} for the candidates of families fitted in several jobs per fold
        (a param of the learning-curve jobs, which read the winner's stored fit record); ``{}`` when none is."""
        return canonical_json({c["id"]: group for group, cands in self.groups.items() if group_family(group) != group
                               for c in cands})

    def candidates_by_id(self) -> dict[str, dict[str, Any]]:
        """Every candidate spec keyed by id."""
        return {c["id"]: c for cands in self.families.values() for c in cands}

    def round_setup(self) -> str:
        """The selection set-up of this run as canonical JSON (a param of record_round: a change is a new round)."""
        from .rounds import selection_setup

        return canonical_json(selection_setup(self.config, self.families))

    def simplicity(self) -> dict[str, dict[str, str]]:
        """Each family's declared simplicity parameter and direction (for the one-standard-error rule)."""
        return {name: spec["simplicity"] for name, spec in self.config["candidates"].items()
                if spec.get("simplicity")}

    def fit_costs(self) -> dict[str, float]:
        """Expected seconds of one fit job per family part (:attr:`groups`): measured by its latest fit jobs in the
        ledger, else the family's declared ``cost`` x the part's candidates, else those candidates counted by
        :func:`ensemble_size`. Read once per parse."""
        if self._costs is None:
            measured: dict[str, list[float]] = {}
            path = self.exp / LEDGER
            if self.main and path.exists():
                for entry in ledger.verify_chain(path)[0]:
                    details = entry.get("details") or {}
                    if entry.get("event") == "fit" and details.get("scope", "main") == "main" \
                            and isinstance(details.get("fit_seconds"), int | float):
                        measured.setdefault(str(details.get("family")), []).append(float(details["fit_seconds"]))
            costs = {}
            for family, candidates in self.groups.items():
                declared = self.config["candidates"][group_family(family)].get("cost")
                recent = measured.get(family, [])[-len(self.fold_ids) or None:]
                costs[family] = (sum(recent) / len(recent) if recent else
                                 float(declared) * len(candidates) if declared else
                                 float(sum(ensemble_size(c.get("params") or {}) for c in candidates)))
            self._costs = costs
        return self._costs

    def fit_priority(self, family: str) -> float:
        """Snakemake priority of a family's fit jobs: the longest expected ones start first."""
        return round(self.fit_costs().get(family, 0.0), 3)

    def threads(self, family: str) -> int:
        """Threads declared for the fit jobs of a family (or of one of its parts)."""
        return int(self.config["candidates"][group_family(family)]["threads"])

    def fingerprint(self) -> str:
        """What decides the winner: recorded at the opening, compared at every later parse."""
        return cfg.selection_fingerprint(self.config, upstream_code())

    def fingerprint_parts(self) -> dict[str, str]:
        """The fingerprint's ingredients, hashed one by one: recorded at the opening to name what changed."""
        return cfg.selection_parts(self.config, upstream_codes())


def data_file_as_sealed(path: str | os.PathLike[str], recorded: dict[str, Any]) -> str | None:
    """None when ``path`` is the data file a manifest's ``recorded`` data names (its size and time, else its
    sha256); otherwise the file's sha256 now, or '' when there is no such file."""
    if not os.path.isfile(path):
        return ""
    stat = os.stat(path)
    if stat.st_size == recorded.get("bytes") and stat.st_mtime_ns == recorded.get("mtime_ns"):
        return None
    actual = sha256_file(path)
    return None if actual == recorded.get("sha256") else actual


def _data_unchanged(config: dict[str, Any], manifest: dict[str, Any]) -> None:
    path = config["data"]["path"]
    experiment = config["experiment"]
    recorded = manifest["data"]
    actual = data_file_as_sealed(path, recorded)
    if actual == "":
        raise DataError(f"data file '{path}' of sealed experiment '{experiment}' does not exist; restore it "
                        "(sha256 " + recorded["sha256"][:16] + "…) or name a new experiment")
    if actual is not None:
        raise SealedAccessError(
            f"data file '{path}' changed since experiment '{experiment}' was sealed (sha256 now {actual[:16]}…, "
            f"sealed {recorded['sha256'][:16]}…); nothing was run. The seal never re-runs: set a new 'experiment' "
            "name in the config to seal the new data, or restore the original file")


def _seal_unchanged(config: dict[str, Any], manifest: dict[str, Any], exp: Path) -> None:
    sealed = manifest["spec"]
    current = cfg.seal_spec(config)
    if current.get("task") is None:
        current["task"] = sealed.get("task")
    for key in sorted(set(sealed) | set(current)):
        if sealed.get(key) != current.get(key):
            where = {"fraction": "test.fraction", "scheme": "test.scheme", "salt": "test.salt", "task": "task"}.get(
                key, f"data.{key}")
            now = f"is {current[key]!r}" if key in current else "is not set (or empty)"  # keys kept only when set
            raise SealedAccessError(
                f"config key '{where}' {now} but experiment '{config['experiment']}' was sealed "
                f"with {sealed.get(key)!r}; nothing was run. Put it back, or set a new 'experiment' name to seal again")
    for name in (MANIFEST, TEST, DEV):
        if not (exp / name).exists():
            raise SealedAccessError(f"'{exp / name}' of sealed experiment '{config['experiment']}' is missing; the "
                                    "seal never re-runs: restore the file or set a new 'experiment' name")


def _last_fingerprint_parts(plan: Plan) -> tuple[str | None, dict[str, str] | None]:
    """The fingerprint (and its named parts) recorded by the latest opening: ledger first, else its marker."""
    path = plan.exp / LEDGER
    if path.exists():
        entries, _ = ledger.verify_chain(path)
        for name in ("open_test", "opening_started"):
            found = ledger.events(entries, name)
            if found:
                details = found[-1]["details"]
                return details.get("fingerprint"), details.get("fingerprint_parts")
    from . import openings

    numbers = openings.records(plan.exp).markers
    if numbers:
        try:
            marker = read_json(openings.marker_path(plan.exp, numbers[-1]))
            return marker.get("fingerprint"), marker.get("fingerprint_parts")
        except (OSError, ValueError):
            pass
    return None, None


def _opening_guard(plan: Plan) -> None:
    """Closed experiments: refuse any change to what was opened; say how to go on honestly."""
    if not plan.closed:
        return
    recorded, parts = _last_fingerprint_parts(plan)
    if parts:  # only the config decides what was opened; a closed experiment runs none of the steps' code
        changed = [name for name in cfg.changed_parts(parts, plan.fingerprint_parts()) if name.startswith("config ")]
    else:
        changed = [] if recorded in (None, plan.fingerprint()) else ["the config or the code of the steps"]
    if changed:
        from .opening import last_opening, refusal  # imports scikit-learn: only on the way to refusing

        entries = ledger.verify_chain(plan.exp / LEDGER)[0] if (plan.exp / LEDGER).exists() else []
        raise SealedAccessError(f"{', '.join(changed)} changed since the opening, so the workflow would open the "
                                "test set again; nothing was run. "
                                + refusal(plan.config["experiment"], plan.opened,
                                          last_opening(plan.exp, entries), plan.allowed_openings))


CLOSED_RULES = ("seal", "assign_folds", "fit_family", "record_round", "tally", "refit_winner", "open_test")


def snakemake_flags(argv: list[str] | None = None) -> dict[str, Any]:
    """The forcing and deleting flags of the Snakemake command line that started this process ({} if unknown).

    Snakemake hands the Snakefile no record of them at parse time, so they are read from ``sys.argv`` with
    Snakemake's own argument parser; a process that is not Snakemake's command line gives {}.
    """
    args = sys.argv if argv is None else argv
    program = Path(args[0]).name if args else ""
    if program != "snakemake" and not (program == "__main__.py" and "snakemake" in args[0]):
        return {}
    try:
        from snakemake.cli import get_argument_parser

        known, _ = get_argument_parser().parse_known_args(args[1:])
    except (ImportError, SystemExit):
        return {}
    names = ("forceall", "forcerun", "forcetargets", "delete_all_output", "touch", "until", "omit_from")
    return {name: getattr(known, name, None) for name in names}


def _forced_guard(plan: Plan, flags: dict[str, Any]) -> None:
    """Name, before anything runs, the forcing flags that would touch the seal or what was opened."""
    forced = set(flags.get("forcerun") or [])
    experiment = plan.config["experiment"]
    if plan.sealed and "seal" in forced:
        raise SealedAccessError(f"--forcerun seal: experiment '{experiment}' is sealed and the seal never re-runs; "
                                "nothing was run. Set a new 'experiment' name to draw a new test set")
    if plan.closed:
        named = sorted(forced & set(CLOSED_RULES))
        if named:
            raise SealedAccessError(
                f"--forcerun {' '.join(named)}: the test set of experiment '{experiment}' was opened, so every step "
                "up to the opening is closed and cannot re-run or replace what was opened; nothing was run. Honest "
                "ways on: a new experiment (new name and test.salt), or a written reason in test.reopen_reasons "
                "(every output then says the test estimate is compromised)")
        if flags.get("forceall") or flags.get("delete_all_output") or flags.get("touch"):
            flag = ("--forceall" if flags.get("forceall") else
                    "--delete-all-output" if flags.get("delete_all_output") else "--touch")
            sys.stderr.write(f"holdfast: experiment '{experiment}' was opened: the steps up to the opening are closed "
                             f"and not part of this workflow any more, so {flag} cannot reach the seal, the model or "
                             "the verdict\n")


def _signing_unchanged(config: dict[str, Any], manifest: dict[str, Any]) -> None:
    """Signing is fixed at the seal: a key named later, or another key, is refused (lines would not verify)."""
    path = config["ledger"]["signing_key"]
    recorded = manifest.get("public_key")
    if path is None:
        return
    from .signing import load_private_key, public_key_text

    if recorded is None:
        raise ConfigError(f"config key 'ledger.signing_key' is set but experiment '{config['experiment']}' was sealed "
                          "without signing; signing is fixed at the seal: remove the key or name a new experiment")
    if public_key_text(load_private_key(path)) != recorded:
        raise ConfigError(f"config key 'ledger.signing_key': '{path}' is not the key experiment "
                          f"'{config['experiment']}' was sealed with; restore that key")


def _check_encoders(config: dict[str, Any], text_columns: list[str]) -> None:
    """A family that declares no categorical encoder cannot take text features: say so before any fit."""
    if not text_columns:
        return
    for family, spec in config["candidates"].items():
        if spec["preprocess"].get("categorical", "onehot") == "none":
            raise ConfigError(f"config key 'candidates.{family}.preprocess.categorical' is none but feature column "
                              f"'{text_columns[0]}' is not numeric; set it to onehot, or list the column in data.drop")


def _text_features(frame: Any, spec: dict[str, Any]) -> list[str]:
    import pandas as pd

    from .dataset import feature_columns

    return [c for c in feature_columns(frame, spec) if not (pd.api.types.is_numeric_dtype(frame[c])
                                                            or pd.api.types.is_bool_dtype(frame[c]))]


def prepare(raw: dict[str, Any], main: bool = True, results: str = "results",
            facts: dict[str, Any] | None = None) -> Plan:
    """Validate the config and run the parse-time guards; ``main`` adds the guards and the checks that import
    scikit-learn or read data.

    ``facts`` are what an earlier full check of this very config and data found (see :func:`check_facts`):
    with them the data and estimator checks are not repeated (the guards always run in the main process).
    Job processes (``main`` False) never read the data file before the seal: they do not need the folds.
    """
    config = cfg.validate(raw)
    cfg.check_data_location(config)
    exp = cfg.experiment_dir(config, results)
    from .layout import check_experiment_dir

    check_experiment_dir(exp)
    manifest = read_manifest(exp)
    spec = cfg.seal_spec(config)
    heavy = main and facts is None
    data_mb: float | None = None  # the data's size in memory, measured when the full check loads it
    dev_target = dev_groups = None
    sealed_keys: Any = None
    text_columns: list[str] = []
    n_dev: int | None
    n_groups: int | None
    if manifest is not None:
        _seal_unchanged(config, manifest, exp)
        if main:
            _data_unchanged(config, manifest)
            _signing_unchanged(config, manifest)
        task = manifest["spec"]["task"]
        if heavy and config["folds"]["scheme"] not in ("kfold", "loo"):
            import pandas as pd

            cols = [c for c in (spec["target"], spec["group"]) if c]
            dev = pd.read_parquet(exp / DEV, columns=cols)
            dev_target, dev_groups = dev[spec["target"]], dev[spec["group"]] if spec["group"] else None
        n_dev = int(manifest["counts"]["dev"])
        n_groups = manifest["counts"].get("dev_groups")
        if heavy and any(f["preprocess"].get("categorical") == "none" for f in config["candidates"].values()):
            import pandas as pd

            text_columns = _text_features(pd.read_parquet(exp / DEV).drop(columns=["row_key"]), spec)
    elif facts is not None or not main:
        facts = facts or {}
        task, n_dev, n_groups = facts.get("task") or config.get("task") or "classification", facts.get("n_dev"), \
            facts.get("n_groups")
    else:
        from .dataset import row_keys
        from .seal import check_before_seal, check_development_classes, check_sides, load_checked, split_masks

        frame, task = load_checked(config["data"]["path"], spec)
        data_mb = round(float(frame.memory_usage(deep=True).sum()) / 2**20, 1)
        keys = row_keys(frame, spec["id"])
        test_rows, dropped = split_masks(frame, keys, {**spec, "task": task}, task)
        dev = frame[~test_rows & ~dropped]
        check_sides(int(test_rows.sum()), len(dev), spec, config["data"]["path"])
        n_dev = len(dev)
        n_groups = int(dev[spec["group"]].nunique()) if spec["group"] else None
        text_columns = _text_features(frame, spec)
        if task == "classification":
            check_development_classes(dev[spec["target"]], config["data"]["path"])
        check_before_seal(config, frame, test_rows, dropped, task)
        dev_target, dev_groups = dev[spec["target"]], dev[spec["group"]] if spec["group"] else None
        sealed_keys = keys[test_rows]
        if config["ledger"]["signing_key"]:
            from .signing import check_key_location

            check_key_location(config["ledger"]["signing_key"], exp.parent)
    config = cfg.with_task(config, task)
    families = expand(config)
    from .foldspec import MAX_FIT_JOBS, fold_ids

    needs_rows = config["folds"]["scheme"] in ("loo", "leave_one_group_out")
    known = (n_dev is not None) and (n_groups is not None or config["folds"]["scheme"] != "leave_one_group_out")
    plan = Plan(config=config, exp=exp, families=families, manifest=manifest,
                fold_ids=fold_ids(config["folds"], n_dev or 0, n_groups) if known or not needs_rows else [],
                main=main)
    if main and manifest is not None:
        from . import openings

        plan.opened = openings.records(exp).count
    jobs = len(plan.fold_ids) * len(plan.groups) * (1 + int(config["nested"]["k"]))
    if jobs > MAX_FIT_JOBS:
        raise ConfigError(f"config keys 'folds' and 'candidates' give {jobs} fit jobs ({len(plan.fold_ids)} folds "
                          f"and repeats x {len(plan.groups)} fit jobs per fold), more than {MAX_FIT_JOBS}; use "
                          "fewer folds, repeats, families or jobs_per_fold")
    if heavy:
        from .candidates import check_estimators
        from .folds import check_feasible
        from .scoring import check_metrics

        check_metrics(config["metrics"], task)
        _check_encoders(config, text_columns)
        check_estimators(config, families, task, cfg.allowed_prefixes(config))
        if dev_target is not None:
            from .foldspec import GROUPED, STRATIFIED

            scheme = config["folds"]["scheme"]
            check_feasible(config["folds"], len(dev_target), dev_target if scheme in STRATIFIED else None,
                           dev_groups if scheme in GROUPED else None)
            if manifest is None:  # what the fold step would refuse after the seal, refused before it
                from .seal import check_folds_before_seal

                check_folds_before_seal(config, spec, dev, keys[~test_rows & ~dropped], task)
    if main:
        _opening_guard(plan)
        _forced_guard(plan, snakemake_flags())
    if heavy and manifest is None:  # last: a data or config problem is the user's first fix, the policy comes after
        from .overlap import check as check_overlap

        check_overlap(sealed_keys, exp.parent, config["experiment"], config["test"]["seen_rows_reason"],
                      rows=lambda: frame[test_rows])
        from .overlap import note_lines, unopened_test_rows

        plan.notes = note_lines(unopened_test_rows(frame, ~test_rows & ~dropped, config["data"]["path"],
                                                           spec["target"], exp.parent, config["experiment"]))
    plan.facts = {"task": task, "n_dev": n_dev, "n_groups": n_groups,
                  "data_mb": data_mb if data_mb is not None else (facts or {}).get("data_mb")}
    return plan


FACTS_VERSION = 2  # 2: facts hold data_mb


def facts_key(raw: dict[str, Any]) -> str:
    """What a full check depends on: the config, the data file's size and time, holdfast's checking code and the
    scikit-learn version. Equal keys mean an earlier full check still holds."""
    from importlib.metadata import PackageNotFoundError, version

    data = raw.get("data") if isinstance(raw, dict) else None
    path = data.get("path") if isinstance(data, dict) else None
    stat = os.stat(path) if isinstance(path, str) and os.path.isfile(path) else None
    try:
        sklearn = version("scikit-learn")
    except PackageNotFoundError:
        sklearn = "?"
    checking = {m: sha256_file(PACKAGE / f"{m}.py") for m in ("config", "plan", "candidates", "scoring", "dataset",
                                                             "seal", "folds", "refit")}
    return sha256_text(canonical_json({"config": raw, "data": [stat.st_size, stat.st_mtime_ns] if stat else None,
                                       "code": checking, "sklearn": sklearn, "v": FACTS_VERSION}))


def cached_facts(raw: dict[str, Any],
                 folder: str = ".snakemake/holdfast/checked") -> tuple[dict[str, Any] | None, Path]:
    """The facts a full check of this config recorded, if one did and nothing it depends on changed."""
    path = Path(folder) / f"{facts_key(raw)}.json"
    try:
        return read_json(path), path
    except (OSError, ValueError):
        return None, path


def checked_config(config: dict[str, Any], configfiles: list[str], overrides: dict[str, Any] | None,
                   default: str) -> None:
    """Make Snakemake's ``config`` what holdfast's strict reader gives, or refuse.

    Without --configfile, ``config`` is filled from ``default`` read by the strict reader (Snakemake's own
    reader would run template expressions). With --configfile, Snakemake has already read the files (any
    template expressions in them have run by now: see the README); each is read again here, and a file that
    the strict reader refuses, or that gives other values than Snakemake loaded, stops the workflow.
    """
    from snakemake.utils import update_config

    files = configfiles or [default]
    merged: dict[str, Any] = {}
    for path in files:
        loaded = cfg.read_yaml(path)
        if not isinstance(loaded, dict):
            raise ConfigError(f"config file '{path}' does not hold a mapping of keys to values; see config/config.yaml")
        update_config(merged, loaded)
    update_config(merged, dict(overrides or {}))
    if not configfiles:
        config.clear()
        config.update(merged)
    elif canonical_json(merged) != canonical_json(dict(config)):
        raise ConfigError(f"config file(s) {', '.join(repr(f) for f in files)} gave Snakemake other values than a "
                          "plain reading gives (template expressions?); nothing was run. Write plain values, or "
                          "run 'holdfast run CONFIG', which never lets Snakemake read the file")


def checked_config_or_exit(config: dict[str, Any], configfiles: list[str], overrides: dict[str, Any] | None,
                           default: str) -> None:
    """:func:`checked_config`, turning a holdfast error into one line on stderr and its exit code."""
    try:
        checked_config(config, configfiles, overrides, default)
    except HoldfastError as exc:
        sys.stderr.write(exc.format_message() + "\n")
        raise SystemExit(exc.exit_code) from None


def prepare_or_exit(raw: dict[str, Any], main: bool = True, results: str = "results") -> Plan:
    """:func:`prepare`, turning a holdfast error into one line on stderr and its exit code.

    In the main process, facts of an earlier full check of the same config and data (written by ``holdfast
    run``) spare the checks that import scikit-learn or read the data; the guards always run.
    """
    try:
        facts = cached_facts(raw)[0] if main else None
        return prepare(raw, main=main, results=results, facts=facts)
    except HoldfastError as exc:
        sys.stderr.write(exc.format_message() + "\n")
        raise SystemExit(exc.exit_code) from None


__all__ = ["Plan", "checked_config", "code_hash", "prepare", "prepare_or_exit"]
