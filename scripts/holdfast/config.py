"""Load, validate and normalise an experiment config.

The JSON-Schema in ``workflow/schemas/config.schema.yaml`` checks shape, types and
fills defaults; the functions here add the cross-field checks the schema cannot
express. Nothing here imports scikit-learn: the Snakefile calls this at parse time.
"""

from __future__ import annotations

import copy
import functools
import json
import os
import re
from pathlib import Path
from typing import Any

import yaml

from ._io import canonical_json, sha256_text
from .errors import ConfigError
from .foldspec import FORWARD, GROUPED, HOLDOUT, KEYS, OPTIONAL, STRATIFIED

ROOT = Path(__file__).resolve().parents[2]
SCHEMA_PATH = ROOT / "workflow" / "schemas" / "config.schema.yaml"

DEFAULT_METRICS = {
    "classification": ["accuracy", "roc_auc", "neg_log_loss"],
    "regression": ["neg_mean_absolute_error", "r2"],
}
ALWAYS_ALLOWED = "sklearn"


MAX_ALIASES = 100
TEMPLATE_MARKER = "__use_yte__"


class _StrictLoader(yaml.SafeLoader):
    """YAML as plain data only: no tags, no duplicate keys, few aliases.

    The safe loader already refuses code-running tags; this one refuses every explicit tag (even harmless
    ones such as ``!!str``), so a config reads the same to every YAML reader, and a key written twice is an
    error instead of silently keeping the last value.
    """

    def __init__(self, stream: Any) -> None:
        super().__init__(stream)
        self._aliases = 0

    def compose_node(self, parent: Any, index: Any) -> Any:
        event = self.peek_event()
        if isinstance(event, yaml.AliasEvent):
            self._aliases += 1
            if self._aliases > MAX_ALIASES:
                raise yaml.YAMLError(f"more than {MAX_ALIASES} aliases (*name); write the values out plainly")
        elif getattr(event, "tag", None) not in (None, "!"):
            mark = event.start_mark
            raise yaml.YAMLError(f"tag '{event.tag}' on line {mark.line + 1}; tags are not allowed, write plain "
                                 "values")
        return super().compose_node(parent, index)

    def construct_mapping(self, node: Any, deep: bool = False) -> Any:
        seen: dict[Any, int] = {}
        for key_node, _ in node.value:
            key = self.construct_object(key_node, deep=True)
            try:
                hash(key)
            except TypeError:
                continue  # the base class reports an unhashable key
            if key in seen:
                raise yaml.YAMLError(f"key '{key}' is written twice (lines {seen[key]} and "
                                     f"{key_node.start_mark.line + 1}); keep one")
            seen[key] = key_node.start_mark.line + 1
        return super().construct_mapping(node, deep=deep)


def parse_yaml(text: str, source: str) -> Any:
    """Parse config text with the strict loader; raise ConfigError naming ``source`` and what is wrong."""
    try:
        data = yaml.load(text, Loader=_StrictLoader)  # a SafeLoader subclass: plain data only
    except yaml.YAMLError as exc:
        first = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise ConfigError(f"config file '{source}' is not plain YAML ({first}); fix it") from exc
    if isinstance(data, dict) and TEMPLATE_MARKER in data:
        raise ConfigError(f"config file '{source}' carries the template marker '{TEMPLATE_MARKER}', which makes "
                          "Snakemake run the expressions in it as code; remove it and write plain values")
    return data


def _json_pairs(source: str) -> Any:
    def hook(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
        out: dict[str, Any] = {}
        for key, value in pairs:
            if key in out:
                raise ConfigError(f"config file '{source}' writes key '{key}' twice; keep one")
            out[key] = value
        return out

    return hook


def read_yaml(path: str | os.PathLike[str]) -> Any:
    """Read a config file as plain data: JSON if it parses as JSON (as Snakemake tries first), else strict YAML."""
    source = Path(path)
    if not source.is_file():
        raise ConfigError(f"config file '{source}' does not exist; pass an existing config file")
    try:
        text = source.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(f"config file '{source}' cannot be read as UTF-8 text ({exc}); save it as UTF-8") from exc
    try:
        data = json.loads(text, object_pairs_hook=_json_pairs(str(source)))
    except ValueError:
        return parse_yaml(text, str(source))
    if isinstance(data, dict) and TEMPLATE_MARKER in data:
        raise ConfigError(f"config file '{source}' carries the template marker '{TEMPLATE_MARKER}'; remove it")
    return data


@functools.cache
def _schema() -> dict[str, Any]:
    # Read once per process: it is only ever read, never changed (defaults are deep-copied where filled). Our own
    # file, so PyYAML's C parser when it has one: 0.01 s against 0.1 s for the pure-Python one, in every process that
    # validates a config (the command, its check, Snakemake's parse); tests/test_config.py checks both read the same.
    loader = getattr(yaml, "CSafeLoader", yaml.SafeLoader)
    with open(SCHEMA_PATH, encoding="utf-8") as handle:
        return yaml.load(handle, Loader=loader)  # a safe loader, C or Python


def _key_path(path: Any) -> str:
    parts = [str(p) for p in path]
    return ".".join(parts) if parts else "<top level>"


def _fill_defaults(instance: Any, schema: dict[str, Any]) -> None:
    """Insert schema defaults into the config in place, recursively."""
    if not isinstance(instance, dict):
        return
    props = schema.get("properties", {})
    for key, sub in props.items():
        if key not in instance and "default" in sub:
            instance[key] = copy.deepcopy(sub["default"])
        if key in instance:
            _fill_defaults(instance[key], sub)
    extra = schema.get("additionalProperties")
    if isinstance(extra, dict):
        for key, value in instance.items():
            if key not in props:
                _fill_defaults(value, extra)


def _schema_message(error: Any) -> str:
    where = _key_path(error.absolute_path)
    if error.validator == "additionalProperties":
        allowed = sorted(error.schema.get("properties", {}))
        extra = sorted(set(error.instance) - set(allowed))
        name = ".".join([*map(str, error.absolute_path), extra[0]]) if extra else where
        return f"config key '{name}' is not known; remove it or use one of: {', '.join(allowed)}"
    if error.validator == "required":
        missing = error.message.split("'")[1] if "'" in error.message else error.message
        name = ".".join([*map(str, error.absolute_path), missing])
        return f"config key '{name}' is required; add it"
    if error.validator == "enum":
        return f"config key '{where}': {error.instance!r} is not one of {error.validator_value}; use one of them"
    if error.validator == "pattern":
        return (f"config key '{where}': {error.instance!r} does not match {error.validator_value}; "
                "start with a letter, digit or '_' and use only letters, digits, '_', '.' and '-'")
    bounds = {"minimum": "at least", "exclusiveMinimum": "greater than", "maximum": "at most",
              "exclusiveMaximum": "less than"}
    if error.validator in bounds:
        return (f"config key '{where}': {error.instance!r} is out of range; "
                f"set it to a number {bounds[error.validator]} {error.validator_value}")
    if error.validator == "propertyNames":
        return (f"config key '{where}': family name {error.instance!r} is not allowed; "
                "start with a letter and use letters, digits, '_' and '-' (at most 40)")
    return f"config key '{where}': {error.message}; see workflow/schemas/config.schema.yaml"


def validate(raw: Any) -> dict[str, Any]:
    """Validate a config mapping against the schema, fill defaults and run cross-field checks.

    Returns a new dict; raises ConfigError naming the first key at fault.
    """
    import jsonschema

    if not isinstance(raw, dict):
        raise ConfigError("config must be a mapping of keys to values; see config/config.yaml for an example")
    _check_size(raw)
    folds_raw = raw.get("folds") if isinstance(raw.get("folds"), dict) else {}
    scheme = folds_raw.get("scheme", "kfold")
    if scheme in KEYS:
        for key in OPTIONAL:
            if key in folds_raw and key not in KEYS[scheme]:
                used = ", ".join(KEYS[scheme]) or "none"
                raise ConfigError(f"config key 'folds.{key}' has no effect with folds.scheme: {scheme} (it uses: "
                                  f"{used}); remove it")
    config = copy.deepcopy(raw)
    schema = _schema()
    _fill_defaults(config, schema)
    validator = jsonschema.Draft202012Validator(schema)
    errors = sorted(validator.iter_errors(config),
                    key=lambda e: (len(e.absolute_path), list(map(str, e.absolute_path))))
    if errors:
        raise ConfigError(_schema_message(errors[0]))
    _strict_checks(config, schema)
    _cross_checks(config)
    return config


MAX_CONFIG_NODES = 100_000


def _check_size(raw: Any) -> None:
    """Refuse configs that expand to huge trees (YAML anchors and aliases nested as a 'bomb')."""
    seen = 0
    stack = [raw]
    while stack:
        node = stack.pop()
        seen += 1
        if seen > MAX_CONFIG_NODES:
            raise ConfigError(f"config expands to more than {MAX_CONFIG_NODES} values (nested YAML anchors and "
                              "aliases?); write the values out plainly")
        if isinstance(node, dict):
            stack.extend(node.values())
        elif isinstance(node, list):
            stack.extend(node)


def _cross_checks(config: dict[str, Any]) -> None:
    data = config["data"]
    folds = config["folds"]
    roles = {"target": data["target"], "id": data["id"], "group": data["group"], "time": data["time"]}
    named = [(k, v) for k, v in roles.items() if v is not None]
    seen: dict[str, str] = {}
    for role, column in named:
        if column in seen:
            raise ConfigError(f"config keys 'data.{seen[column]}' and 'data.{role}' both name column '{column}'; "
                              "give each role its own column")
        seen[column] = role
    for column in data["drop"]:
        if column in seen:
            raise ConfigError(f"config key 'data.drop' lists '{column}', which is data.{seen[column]}; "
                              "remove it from drop")
    for key in ("text", "known_before_outcome"):
        for column in data[key]:
            if column in seen or column in data["drop"]:
                role = f"data.{seen[column]}" if column in seen else "in data.drop"
                raise ConfigError(f"config key 'data.{key}' lists '{column}', which is {role}, not a feature; "
                                  f"remove it from data.{key}")
    if config["test"]["scheme"] == "time_tail" and data["time"] is None:
        raise ConfigError("config key 'test.scheme' is 'time_tail' but 'data.time' is not set; name the time column "
                          "in data.time or choose another scheme")
    if config["test"]["gap_hours"] and config["test"]["scheme"] != "time_tail":
        raise ConfigError("config key 'test.gap_hours' only applies to test.scheme: time_tail; remove it or "
                          "change the scheme")
    for key, scheme in (("folds.scheme", folds["scheme"]), ("test.scheme", config["test"]["scheme"])):
        if scheme in (*GROUPED, "grouped", "stratified_grouped") and data["group"] is None:
            raise ConfigError(f"config key '{key}' is '{scheme}' but 'data.group' is not set; "
                              "name the group column in data.group or choose another scheme")
    if folds["scheme"] in FORWARD and data["time"] is None:
        raise ConfigError(f"config key 'folds.scheme' is '{folds['scheme']}' but 'data.time' is not set; name the "
                          "time column in data.time or choose another scheme")
    if folds["scheme"] in STRATIFIED and config.get("task") == "regression":
        raise ConfigError(f"config key 'folds.scheme' is '{folds['scheme']}' but task is regression; "
                          "use kfold, group or holdout")
    if config["test"]["scheme"] in ("stratified", "stratified_grouped") and config.get("task") == "regression":
        raise ConfigError(f"config key 'test.scheme' is '{config['test']['scheme']}' but task is regression; "
                          "use hashed or grouped")
    if (config["selection"]["rule"] == "one_standard_error" and folds["scheme"] in HOLDOUT
            and int(folds["repeats"]) < 2):
        raise ConfigError(f"config key 'selection.rule' is one_standard_error but folds.scheme {folds['scheme']} "
                          "with one repeat gives one score per candidate and no standard error; raise "
                          "folds.repeats or use best_mean")
    _check_allowed_modules(config)
    allowed = allowed_prefixes(config)
    for family, spec in config["candidates"].items():
        module = spec["estimator"].rsplit(".", 1)[0]
        if not any(module == p or module.startswith(p + ".") for p in allowed):
            raise ConfigError(
                f"config key 'candidates.{family}.estimator': '{spec['estimator']}' is not from an allowed module "
                f"({', '.join(allowed)}); use a scikit-learn estimator or add its module prefix to allowed_modules")
        overlap = sorted(set(spec["params"]) & set(spec["grid"]))
        if overlap:
            raise ConfigError(f"config key 'candidates.{family}': parameter '{overlap[0]}' is in both params and grid; "
                              "keep it in one of them")
    _check_selection(config)
    _check_diagnostics(config)
    if config["nested"]["k"] and folds["scheme"] not in ("kfold", "stratified", "group", "stratified_group"):
        raise ConfigError(f"config keys 'nested.k' and 'folds.scheme: {folds['scheme']}' do not combine (the inner "
                          "folds are drawn with the inner scheme and must cover every row once); use kfold, "
                          "stratified or group folds")
    if config["nested"]["k"] == 1:
        raise ConfigError("config key 'nested.k' is 1; use 0 to turn nested cross-validation off or at least 2")


def _check_diagnostics(config: dict[str, Any]) -> None:
    """``learning_curve: true`` means the defaults; sizes are distinct and kept in increasing order."""
    block = config["diagnostics"]
    if block["learning_curve"] is True:
        sub = _schema()["properties"]["diagnostics"]["properties"]["learning_curve"]
        block["learning_curve"] = {key: copy.deepcopy(spec["default"]) for key, spec in sub["properties"].items()}
    curve = block["learning_curve"]
    if curve is False:
        return
    sizes = [float(s) for s in curve["sizes"]]
    if len(set(sizes)) != len(sizes):
        repeated = sorted({s for s in sizes if sizes.count(s) > 1})[0]
        raise ConfigError(f"config key 'diagnostics.learning_curve.sizes' lists {repeated} twice; give each "
                          "fraction of the training fold once")
    curve["sizes"] = sorted(sizes)


def learning_sizes(config: dict[str, Any]) -> list[float]:
    """The learning curve's fractions of each training fold ([] when diagnostics.learning_curve is false)."""
    curve = (config.get("diagnostics") or {}).get("learning_curve", {})
    return [] if curve is False else [float(s) for s in (curve or {}).get("sizes", [])]


def _pattern_misses(value: Any, schema: dict[str, Any], where: list[str]) -> Any:
    """Yield (key, value, pattern) for every string the schema's pattern matches only in part.

    JSON-Schema patterns are searched, and in Python's re a final '$' also matches before a trailing
    line break, so 'name\n' passes '^...$'; holdfast wants the whole value to match.
    """
    if isinstance(value, str) and "pattern" in schema and not re.fullmatch(schema["pattern"], value):
        yield ".".join(where) or "<top level>", value, schema["pattern"]
    if isinstance(value, dict):
        names = schema.get("propertyNames", {})
        extra = schema.get("additionalProperties")
        for key, item in value.items():
            if "pattern" in names and not re.fullmatch(names["pattern"], str(key)):
                yield ".".join([*where, str(key)]), key, names["pattern"]
            sub = schema.get("properties", {}).get(key, extra if isinstance(extra, dict) else None)
            if sub:
                yield from _pattern_misses(item, sub, [*where, str(key)])
    if isinstance(value, list) and isinstance(schema.get("items"), dict):
        for i, item in enumerate(value):
            yield from _pattern_misses(item, schema["items"], [*where[:-1], f"{where[-1] if where else ''}[{i}]"])


def _strict_checks(config: dict[str, Any], schema: dict[str, Any]) -> None:
    """Checks the schema cannot say: whole-value patterns, real written reasons, a time unit with a time column."""
    for key, value, pattern in _pattern_misses(config, schema, []):
        where = key.encode("unicode_escape").decode("ascii")  # one line, even for a key with a line break
        raise ConfigError(f"config key '{where}': {value!r} matches {pattern} only in part (a trailing line break?); "
                          "remove the extra characters")
    seen: dict[str, int] = {}
    for position, reason in enumerate(config["test"]["reopen_reasons"]):
        plain = " ".join(reason.split())
        if len(plain) < 10:
            raise ConfigError(f"config key 'test.reopen_reasons[{position}]' is blank or shorter than 10 characters "
                              "once spaces are removed; write why the test set is opened again")
        if plain.casefold() in seen:
            raise ConfigError(f"config key 'test.reopen_reasons[{position}]' repeats reopen_reasons"
                              f"[{seen[plain.casefold()]}]; each extra opening needs its own written reason")
        seen[plain.casefold()] = position
    if config["data"].get("time_unit") and config["data"]["time"] is None:
        raise ConfigError("config key 'data.time_unit' is set but 'data.time' is not; name the time column in "
                          "data.time or remove data.time_unit")


def _check_selection(config: dict[str, Any]) -> None:
    """The one-standard-error rule needs a declared notion of 'simpler' for every choice it makes."""
    selection, families = config["selection"], config["candidates"]
    for name, spec in families.items():
        simplicity = spec.get("simplicity")
        if simplicity and simplicity["param"] not in {**spec["params"], **spec["grid"]}:
            raise ConfigError(f"config key 'candidates.{name}.simplicity.param' is '{simplicity['param']}', which is "
                              "neither in params nor in grid; name one of the family's parameters")
        if simplicity:
            values = spec["grid"].get(simplicity["param"], [spec["params"].get(simplicity["param"])])
            if any(isinstance(v, bool) or not isinstance(v, int | float | type(None)) for v in values):
                raise ConfigError(f"config key 'candidates.{name}.simplicity.param': '{simplicity['param']}' takes "
                                  "non-numeric values, which cannot be ordered by simplicity; "
                                  "choose a numeric parameter")
    if selection["rule"] != "one_standard_error":
        if selection["family_order"]:
            raise ConfigError("config key 'selection.family_order' is set but selection.rule is best_mean, which "
                              "ignores it; remove it or use rule: one_standard_error")
        return
    for name, spec in families.items():
        if len(spec["grid"]) and not spec.get("simplicity"):
            raise ConfigError(f"config key 'candidates.{name}.simplicity' is required by the one-standard-error "
                              "rule; say which parameter makes a candidate simpler, e.g. {param: C, simpler: lower}")
    if len(families) > 1 and sorted(selection["family_order"]) != sorted(families):
        raise ConfigError("config key 'selection.family_order' must list every family once, simplest first, for "
                          f"the one-standard-error rule; families: {', '.join(families)}")


TRUSTED_MODULES_ENV = "HOLDFAST_TRUSTED_MODULES"
_MODULE_NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_]*(\.[A-Za-z_][A-Za-z0-9_]*)*")


def operator_trusted_modules() -> list[str]:
    """Module prefixes the operator allowed outside any config file (``HOLDFAST_TRUSTED_MODULES``, comma-separated).

    A config may name extra estimator modules in ``allowed_modules``, but importing a module runs its top-level
    code, so a config file alone must not be able to widen what is imported: each extra module needs this
    consent from whoever runs the workflow (``holdfast run --trust-module NAME`` sets it).
    """
    raw = os.environ.get(TRUSTED_MODULES_ENV, "")
    return [part.strip() for part in raw.split(",") if part.strip()]


def _check_allowed_modules(config: dict[str, Any]) -> None:
    trusted = operator_trusted_modules()
    for position, name in enumerate(config["allowed_modules"]):
        if not isinstance(name, str) or not _MODULE_NAME.fullmatch(name):
            raise ConfigError(f"config key 'allowed_modules[{position}]': {name!r} is not a module name; write a "
                              "dotted Python module name such as xgboost")
        if name == ALWAYS_ALLOWED or name.startswith(ALWAYS_ALLOWED + "."):
            continue
        if not any(name == t or name.startswith(t + ".") for t in trusted):
            raise ConfigError(f"config key 'allowed_modules[{position}]': module '{name}' is not trusted by whoever "
                              "runs holdfast (a config file alone cannot allow an import); if you trust it, run "
                              f"'holdfast run CONFIG --trust-module {name}' or set {TRUSTED_MODULES_ENV}={name}")


def allowed_prefixes(config: dict[str, Any]) -> list[str]:
    """Module prefixes an estimator may come from: sklearn plus the config's extra ones."""
    extra = [p for p in config.get("allowed_modules", []) if p != ALWAYS_ALLOWED]
    return [ALWAYS_ALLOWED, *extra]


def check_data_location(config: dict[str, Any], project: str | os.PathLike[str] = ".") -> None:
    """Refuse a data path outside the project folder unless data.allow_outside_project is set, and a file in an
    experiment's sealed folder always: only that experiment's opening reads its rows."""
    data = config["data"]
    root = Path(project).resolve()
    where = (root / data["path"]).resolve()  # an absolute path replaces root; symlinks are followed
    from .layout import sealed_experiment_of

    sealed = sealed_experiment_of(where)
    if sealed is not None:
        raise ConfigError(f"config key 'data.path': '{data['path']}' names a file in the sealed folder of experiment "
                          f"folder '{sealed}', whose rows only that experiment's opening reads; use your own data file")
    if data.get("allow_outside_project"):
        return
    if not where.is_relative_to(root):
        raise ConfigError(f"config key 'data.path': '{data['path']}' is outside the project folder '{root}'; copy "
                          "the file into the project or set data.allow_outside_project: true")


def load(path: str | os.PathLike[str]) -> dict[str, Any]:
    """Read and validate a config file."""
    return validate(read_yaml(path))


def with_task(config: dict[str, Any], task: str) -> dict[str, Any]:
    """Return the config with the task fixed and metric defaults filled for it."""
    out = copy.deepcopy(config)
    if out.get("task") not in (None, task):
        raise ConfigError(f"config key 'task' is '{out['task']}' but the data was sealed as {task}; "
                          "name a new experiment to change the task")
    out["task"] = task
    if not out.get("metrics"):
        out["metrics"] = list(DEFAULT_METRICS[task])
    if task == "regression":
        for key in ("folds", "test"):
            if out[key]["scheme"] in (*STRATIFIED, "stratified_grouped"):
                raise ConfigError(f"config key '{key}.scheme' is '{out[key]['scheme']}' but the target is continuous "
                                  "(regression); use another scheme")
    return out


def experiment_dir(config: dict[str, Any], results: str | os.PathLike[str] = "results") -> Path:
    """Where an experiment writes: results/<experiment>."""
    return Path(results) / config["experiment"]


def seal_spec(config: dict[str, Any]) -> dict[str, Any]:
    """The parts of a config fixed at the seal; changing any later needs a new experiment."""
    data = config["data"]
    return {
        "target": data["target"], "id": data["id"], "group": data["group"], "time": data["time"],
        "drop": sorted(data["drop"]),
        "task": config.get("task"),
        "fraction": config["test"]["fraction"], "scheme": config["test"]["scheme"], "salt": config["test"]["salt"],
        **({"gap_hours": config["test"]["gap_hours"]} if config["test"]["scheme"] == "time_tail" else {}),
        # Only when set, so experiments sealed before the key existed keep their spec.
        **({"time_unit": data["time_unit"]} if data.get("time_unit") else {}),
        **{key: sorted(data[key]) for key in ("text", "known_before_outcome") if data.get(key)},
    }


def fold_spec(config: dict[str, Any]) -> dict[str, Any]:
    """The settings that determine the fold assignment."""
    return dict(config["folds"])


RESOURCE_KEYS = ("threads", "mem_mb", "runtime", "cost", "jobs_per_fold")


def _without_defaults(value: Any, schema: dict[str, Any]) -> Any:
    """``value`` with every key that holds its schema default left out (recursively).

    The fingerprint of what was opened is taken on this form, so a later holdfast that adds a config key with
    a default, or a user who writes a default out, does not count as a change to what was opened.
    """
    if not isinstance(value, dict):
        return value
    props = schema.get("properties", {})
    extra = schema.get("additionalProperties")
    out = {}
    for key, item in value.items():
        sub = props.get(key, extra if isinstance(extra, dict) else {})
        if "default" in sub and item == sub["default"]:
            continue
        out[key] = _without_defaults(item, sub)
    return out


def _selection_part(config: dict[str, Any]) -> dict[str, Any]:
    # Every key that reaches a param of a rule upstream of (or at) the opening.
    keys = ("data", "task", "metrics", "test", "folds", "candidates", "selection", "allowed_modules", "leakage",
            "opening")
    part = {k: config.get(k) for k in keys}
    # Resources decide where and how fast a fit runs, never what it computes: not part of the fingerprint.
    part["candidates"] = {name: {k: v for k, v in spec.items() if k not in RESOURCE_KEYS}
                          for name, spec in config["candidates"].items()}
    part["test"] = {k: v for k, v in config["test"].items() if k not in ("reopen_reasons", "seen_rows_reason")}
    part["data"] = {k: v for k, v in config["data"].items() if k not in ("path", "allow_outside_project", "unit")}
    props = _schema()["properties"]
    return {k: _without_defaults(v, props.get(k, {})) for k, v in part.items()}


def selection_fingerprint(config: dict[str, Any], code: str) -> str:
    """Hash of everything that decides which model is chosen (and so what an opening evaluates)."""
    return sha256_text(canonical_json({"config": _selection_part(config), "code": code}))


def selection_parts(config: dict[str, Any], codes: dict[str, str]) -> dict[str, str]:
    """Short hashes of each config section and each step's code behind the fingerprint: they name what changed."""
    out = {f"config '{k}'": sha256_text(canonical_json(v))[:16] for k, v in _selection_part(config).items()}
    out.update({f"holdfast code of step '{stage}'": h for stage, h in codes.items()})
    return out


def changed_parts(recorded: Any, current: dict[str, str]) -> list[str]:
    """The names whose hashes differ between a recorded and the current :func:`selection_parts` ([] if unknown)."""
    if not isinstance(recorded, dict) or not recorded:
        return []
    return sorted(name for name in recorded.keys() | current.keys() if recorded.get(name) != current.get(name))


def config_hash(config: dict[str, Any]) -> str:
    """Hash of the whole normalised config, recorded in the ledger."""
    return sha256_text(canonical_json(config))
