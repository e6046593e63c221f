"""What the Snakefile needs at parse time: the checked config, the jobs, and the guards.

The guards run before Snakemake schedules anything (dry runs included): a data file
that changed since the seal, a config whose sealed parts changed, and any change that
would re-open an already opened test set all stop the workflow with one message.
"""

from __future__ import annotations

import ast
import os
import sys
from dataclasses import dataclass, field
from functools import cache
from pathlib import Path
from typing import Any

from . import config as cfg
from . import ledger
from ._io import canonical_json, sha256_file, sha256_text
from .candidates import expand, family_payload
from .errors import ConfigError, DataError, HoldfastError, SealedAccessError
from .layout import CARD, CHOICE, DEV, FOLDS, LEDGER, MANIFEST, MODEL, RANKING, TEST, VERDICT, fit_file, read_manifest

PACKAGE = Path(__file__).resolve().parent
STAGE_MODULES = {
    "assign_folds": "folds", "fit_family": "fit", "tally": "tally", "refit_winner": "refit",
    "open_test": "opening", "audit": "audit", "score_outer": "nested", "nested_summary": "nested",
}


@cache
def _relative_imports(module: str) -> frozenset[str]:
    # Cached: every stage's hash walks the shared modules again, and every job re-parses the Snakefile.
    tree = ast.parse((PACKAGE / f"{module}.py").read_text(encoding="utf-8"))
    found = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom) and node.level == 1:
            if node.module:
                found.add(node.module.split(".")[0])
            else:
                found.update(alias.name for alias in node.names)
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


def upstream_code() -> str:
    """Hash of the code of every stage up to and including the opening."""
    upstream = ("assign_folds", "fit_family", "tally", "refit_winner", "open_test")
    return sha256_text(canonical_json({s: code_hash(s) for s in upstream}))[:16]


@dataclass
class Plan:
    """The checked config of one experiment and the jobs it implies."""

    config: dict[str, Any]
    exp: Path
    families: dict[str, list[dict[str, Any]]]
    manifest: dict[str, Any] | None
    fold_ids: list[tuple[int, int]] = field(default_factory=list)

    @property
    def spec(self) -> dict[str, Any]:
        """The seal spec (column roles, task, test partition)."""
        return cfg.seal_spec(self.config)

    def path(self, name: str) -> str:
        """A path inside the experiment directory."""
        return str(self.exp / name)

    def fit_files(self, kind: str) -> list[str]:
        """Every fits/ or oof/ file the fit jobs produce."""
        return [self.path(fit_file(kind, fam, r, f)) for fam in self.families for r, f in self.fold_ids]

    def nested_fit_files(self, kind: str, outer: int) -> list[str]:
        """The fits/ or oof/ files of one nested outer fold."""
        return [self.path(f"nested/o{outer}/{fit_file(kind, fam, r, f)}") for fam in self.families
                for r, f in self.fold_ids]

    def outer_fold_spec(self) -> dict[str, Any]:
        """The outer folds of nested cross-validation: the inner scheme, nested.k folds, one repeat."""
        nested = self.config["nested"]
        return {**self.config["folds"], "k": max(int(nested["k"]), 2), "repeats": 1, "seed": int(nested["seed"])}

    def family_json(self, family: str) -> str:
        """The family's canonical JSON, a param of its fit jobs."""
        return family_payload(family, self.families[family])

    def candidates_by_id(self) -> dict[str, dict[str, Any]]:
        """Every candidate spec keyed by id."""
        return {c["id"]: c for cands in self.families.values() for c in cands}

    def simplicity(self) -> dict[str, dict[str, str]]:
        """Each family's declared simplicity parameter and direction (for the one-standard-error rule)."""
        return {name: spec["simplicity"] for name, spec in self.config["candidates"].items()
                if spec.get("simplicity")}

    def threads(self, family: str) -> int:
        """Threads declared for a family's fit jobs."""
        return int(self.config["candidates"][family]["threads"])

    def fingerprint(self) -> str:
        """What decides the winner: recorded at the opening, compared at every later parse."""
        return cfg.selection_fingerprint(self.config, upstream_code())

    def upstream_outputs(self) -> list[str]:
        """Files that must be unchanged after the opening for it to stand."""
        names = [DEV, FOLDS, RANKING, CHOICE, MODEL, CARD]
        return [self.path(n) for n in names] + self.fit_files("fits") + self.fit_files("oof")


def _data_unchanged(config: dict[str, Any], manifest: dict[str, Any]) -> None:
    path = config["data"]["path"]
    experiment = config["experiment"]
    if not os.path.isfile(path):
        raise DataError(f"data file '{path}' of sealed experiment '{experiment}' does not exist; restore it "
                        "(sha256 " + manifest["data"]["sha256"][:16] + "…) or name a new experiment")
    recorded = manifest["data"]
    stat = os.stat(path)
    if stat.st_size == recorded["bytes"] and stat.st_mtime_ns == recorded["mtime_ns"]:
        return
    actual = sha256_file(path)
    if actual != recorded["sha256"]:
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
            raise SealedAccessError(
                f"config key '{where}' is {current.get(key)!r} but experiment '{config['experiment']}' was sealed "
                f"with {sealed.get(key)!r}; nothing was run. Put it back, or set a new 'experiment' name to seal again")
    for name in (MANIFEST, TEST, DEV):
        if not (exp / name).exists():
            raise SealedAccessError(f"'{exp / name}' of sealed experiment '{config['experiment']}' is missing; the "
                                    "seal never re-runs: restore the file or set a new 'experiment' name")


def _opening_guard(plan: Plan) -> None:
    path = plan.exp / LEDGER
    if not path.exists():
        return
    entries = ledger.read(path)
    openings = ledger.events(entries, "open_test")
    allowed = 1 + len(plan.config["test"]["reopen_reasons"])
    if not openings or len(openings) < allowed:
        return
    from .opening import refusal

    why = ""
    if openings[-1]["details"].get("fingerprint") != plan.fingerprint():
        why = "the config or code that decides the winner changed since the opening"
    verdict = plan.exp / VERDICT
    if not why and verdict.exists():
        limit = verdict.stat().st_mtime_ns
        for name in plan.upstream_outputs():
            if not os.path.exists(name):
                why = f"'{name}' is missing and would be rebuilt"
                break
            if os.stat(name).st_mtime_ns > limit:
                why = f"'{name}' is newer than the verdict and would trigger a rebuild"
                break
    if why:
        raise SealedAccessError(f"{why}, so the workflow would open the test set again; nothing was run. "
                                + refusal(plan.config["experiment"], openings, allowed))


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


def prepare(raw: dict[str, Any], main: bool = True, results: str = "results") -> Plan:
    """Validate the config and run the parse-time guards; ``main`` adds the checks that import scikit-learn."""
    config = cfg.validate(raw)
    cfg.check_data_location(config)
    exp = cfg.experiment_dir(config, results)
    manifest = read_manifest(exp)
    spec = cfg.seal_spec(config)
    dev_target = dev_groups = None
    if manifest is not None:
        _seal_unchanged(config, manifest, exp)
        if main:
            _data_unchanged(config, manifest)
        task = manifest["spec"]["task"]
        if main and config["folds"]["scheme"] not in ("kfold", "loo"):
            import pandas as pd

            cols = [c for c in (spec["target"], spec["group"]) if c]
            dev = pd.read_parquet(exp / DEV, columns=cols)
            dev_target, dev_groups = dev[spec["target"]], dev[spec["group"]] if spec["group"] else None
        n_dev = int(manifest["counts"]["dev"])
        n_groups = manifest["counts"].get("dev_groups")
        text_columns: list[str] = []
        if main and any(f["preprocess"].get("categorical") == "none" for f in config["candidates"].values()):
            import pandas as pd

            text_columns = _text_features(pd.read_parquet(exp / DEV).drop(columns=["row_key"]), spec)
    else:
        from .dataset import row_keys
        from .seal import check_development_classes, check_sides, load_checked, split_masks

        frame, task = load_checked(config["data"]["path"], spec)
        keys = row_keys(frame, spec["id"])
        test_rows, dropped = split_masks(frame, keys, {**spec, "task": task}, task)
        dev = frame[~test_rows & ~dropped]
        check_sides(int(test_rows.sum()), len(dev), spec, config["data"]["path"])
        n_dev = len(dev)
        n_groups = int(dev[spec["group"]].nunique()) if spec["group"] else None
        text_columns = _text_features(frame, spec) if main else []
        if main:
            if task == "classification":
                check_development_classes(dev[spec["target"]], config["data"]["path"])
            dev_target, dev_groups = dev[spec["target"]], dev[spec["group"]] if spec["group"] else None
    config = cfg.with_task(config, task)
    families = expand(config)
    from .foldspec import MAX_FIT_JOBS, fold_ids

    plan = Plan(config=config, exp=exp, families=families, manifest=manifest,
                fold_ids=fold_ids(config["folds"], n_dev, n_groups))
    jobs = len(plan.fold_ids) * len(families) * (1 + int(config["nested"]["k"]))
    if jobs > MAX_FIT_JOBS:
        raise ConfigError(f"config key 'folds' gives {jobs} fit jobs ({len(plan.fold_ids)} folds x {len(families)} "
                          f"families), more than {MAX_FIT_JOBS}; use fewer folds (e.g. kfold instead of loo)")
    if main:
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
        _opening_guard(plan)
    return plan


def prepare_or_exit(raw: dict[str, Any], main: bool = True, results: str = "results") -> Plan:
    """:func:`prepare`, turning a holdfast error into one line on stderr and its exit code."""
    try:
        return prepare(raw, main=main, results=results)
    except HoldfastError as exc:
        sys.stderr.write(exc.format_message() + "\n")
        raise SystemExit(exc.exit_code) from None


__all__ = ["Plan", "code_hash", "prepare", "prepare_or_exit"]
