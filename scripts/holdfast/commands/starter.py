"""`holdfast init DATA --target COLUMN [-o my.yaml]`: a starter config for a data file, every choice commented.

The task is inferred from the target (holdfast.dataset.infer_task). Column roles are suggested from names and
values: a column named like an id with a unique text or integer value in every row is the id; a column named
like a group, site, route, patient or customer whose values repeat is the group; a text column whose every
value reads as a date and time is the time; a text column different in almost every row, or one the target
fixes (holdfast.dataset.target_copy), is left out with the reason. Folds: five, stratified for classification,
whole groups when a group is named. A small set of families: a linear model, a random forest and histogram
gradient boosting.
The config is checked as `holdfast check` checks it before it is written; an existing file is never replaced.
"""

from __future__ import annotations

import argparse
import os
import re
import secrets
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import yaml

from ..errors import ConfigError, DataError, HoldfastError, SealedAccessError
from ..layout import sealed_experiment_of

ID_WORDS = {"id", "uuid", "guid"}
GROUP_WORDS = {"group", "site", "route", "patient", "customer", "subject", "user", "store", "clinic", "hospital",
               "household", "school", "account", "device", "batch", "farm", "plant"}
FOLDS = 5
MIN_GROUPS = FOLDS  # whole-group folds need at least one group per fold
DATA_SUFFIXES = (".csv", ".txt", ".parquet", ".pq")


def words(name: str) -> list[str]:
    """The words of a column name: 'shipmentID' and 'shipment_id' both give ['shipment', 'id']."""
    spaced = re.sub(r"([a-z0-9])([A-Z])", r"\1 \2", str(name))
    return [w.lower() for w in re.split(r"[^A-Za-z0-9]+", spaced) if w]


def _named_like_id(name: str) -> bool:
    parts = words(name)
    return bool(ID_WORDS & set(parts)) or (len(parts) == 1 and parts[0].endswith("id") and len(parts[0]) > 2)


def _text(values: Any) -> bool:
    import pandas as pd

    return not (pd.api.types.is_numeric_dtype(values) or pd.api.types.is_bool_dtype(values)
                or pd.api.types.is_datetime64_any_dtype(values))


def _integer(values: Any) -> bool:
    import pandas as pd

    return pd.api.types.is_integer_dtype(values) and not pd.api.types.is_bool_dtype(values)


def _reads_as_times(values: Any) -> bool:
    """Every present value of a text column parses as a date and time (as data.time will read it)."""
    import pandas as pd

    present = values.dropna()
    if present.empty or not present.astype(str).str.contains(r"\d", regex=True).all():
        return False
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # pandas warns when it guesses a format; only the outcome matters here
        try:
            parsed = pd.to_datetime(present, errors="coerce", utc=True)
        except (ValueError, TypeError, OverflowError):
            return False
    return bool(parsed.notna().all())


@dataclass
class Roles:
    """The suggested column roles, each with the reason given in the config."""

    id: str | None = None
    group: str | None = None
    group_values: int = 0
    time: str | None = None
    drop: dict[str, str] = field(default_factory=dict)  # column -> why it is not a feature
    notes: list[str] = field(default_factory=list)  # other findings, as comments


def suggest_roles(frame: Any, target: str, task: str) -> Roles:
    """Id, group, time and columns to drop, from the columns' names and values; a column the check before the seal
    would refuse as a feature (a label of rows, a copy of the target) is dropped with the reason."""
    import pandas as pd

    from ..dataset import labels_rows, target_copy

    roles = Roles()
    n = len(frame)
    for name in frame.columns:
        if name == target:
            continue
        values = frame[name]
        complete = not values.isna().any()
        unique = complete and values.nunique() == n
        if roles.id is None and _named_like_id(name) and unique and (_text(values) or _integer(values)):
            roles.id = name
            continue
        distinct = int(values.nunique())
        if (roles.group is None and GROUP_WORDS & set(words(name)) and complete
                and (_text(values) or _integer(values)) and 2 <= distinct <= n // 2):
            if distinct >= MIN_GROUPS:
                roles.group, roles.group_values = name, distinct
                continue
            roles.notes.append(f"'{name}' looks like a group but has only {distinct} values, too few for "
                               f"{FOLDS} whole-group folds: kept as a feature")
        if pd.api.types.is_datetime64_any_dtype(values) or (_text(values) and _reads_as_times(values)):
            if roles.time is None:
                roles.time = name
            else:
                roles.drop[name] = "dates and times, which no model step reads as times (the first is data.time)"
            continue
        if values.isna().all():
            roles.drop[name] = "empty in every row"
        elif _text(values) and (unique or labels_rows(values) is not None):
            roles.drop[name] = ("a different text value in every row: it names rows and cannot predict new ones (or "
                                "make it data.id)" if unique else "a different text value in almost every row: it "
                                "names rows and cannot predict new ones")
        elif (how := target_copy(values, frame[target], task)) is not None:
            roles.drop[name] = (f"the target fixes it ({how}): a copy of the outcome; if it is recorded before the "
                                "outcome, move it to data.known_before_outcome")
    return roles


def _y(value: Any) -> str:
    """A value as plain YAML on one line (strings quoted only when YAML needs it)."""
    text = yaml.safe_dump(value, default_flow_style=True, allow_unicode=True, width=1 << 30)
    return text.removesuffix("\n...\n").strip()


def _comment(line: str, why: str, column: int = 34) -> str:
    return f"{line.ljust(column)} # {why}" if why else line


def base_name(data: Path) -> str:
    """A valid experiment name made from the data file's name ('shipments' for data/shipments.csv)."""
    base = re.sub(r"[^A-Za-z0-9_.-]+", "-", data.stem).strip("-.") or "experiment"
    return (base if re.match(r"[A-Za-z0-9_]", base) else f"x{base}")[:70]


def experiment_name(data: Path, results: Path) -> str:
    """The data file's name as an experiment name not yet used under ``results``."""
    base = base_name(data)
    name, number = base, 1
    while (results / name).exists():
        number += 1
        name = f"{base}-{number}"
    return name


@dataclass
class Choices:
    """Everything the starter config decides; render() writes it with its reasons."""

    experiment: str
    data_path: str
    target: str
    task: str
    task_why: str
    roles: Roles
    metrics: list[str]
    salt: str
    test_scheme: str
    fold_scheme: str
    notes: list[str] = field(default_factory=list)  # why a first choice gave way, as comments
    fraction: float = 0.2
    test_of: str | None = None  # the unopened experiment sealing rows of this data whose test settings are kept


def schemes(task: str, group: str | None) -> list[tuple[str, str]]:
    """(test scheme, fold scheme) pairs to try, best first: whole groups on both sides, then rows."""
    rows_test, rows_folds = ("stratified", "stratified") if task == "classification" else ("hashed", "kfold")
    if group is None:
        return [(rows_test, rows_folds)]
    if task == "classification":
        return [("stratified_grouped", "stratified_group"), ("grouped", "stratified_group"),
                (rows_test, "stratified_group"), (rows_test, rows_folds)]
    return [("grouped", "group"), (rows_test, "group"), (rows_test, rows_folds)]


TEST_WHY = {
    "stratified": "each class keeps its share among the sealed rows; the test figure is for new rows",
    "hashed": "each row by the hash of its key and the salt: stable when the data grows",
}
FOLD_WHY = {"stratified": "each fold keeps the class shares", "kfold": "shuffled folds"}


def _families(task: str) -> list[tuple[str, str, list[str]]]:
    """(name, why, YAML lines) of the default families."""
    if task == "classification":
        return [
            ("logistic", "a linear baseline: fast, and hard to beat on small or simple data", [
                "estimator: sklearn.linear_model.LogisticRegression",
                "preprocess: {impute: median, scale: standard, categorical: onehot}",
                "params: {max_iter: 2000}",
                "grid: {C: [0.1, 1.0, 10.0]}"]),
            ("forest", "a random forest: non-linear, little tuning needed", [
                "estimator: sklearn.ensemble.RandomForestClassifier",
                "preprocess: {impute: median, categorical: onehot}",
                "params: {n_estimators: 100, random_state: 0}",
                "grid: {min_samples_leaf: [1, 5]}"]),
            ("boosting", "histogram gradient boosting: often the strongest on tables; reads missing values itself",
             ["estimator: sklearn.ensemble.HistGradientBoostingClassifier",
              "preprocess: {impute: none, categorical: onehot}",
              "params: {random_state: 0}",
              "grid: {learning_rate: [0.05, 0.1]}"]),
        ]
    return [
        ("ridge", "a linear baseline with a penalty: fast, and hard to beat on small or simple data", [
            "estimator: sklearn.linear_model.Ridge",
            "preprocess: {impute: median, scale: standard, categorical: onehot}",
            "grid: {alpha: [0.1, 1.0, 10.0]}"]),
        ("forest", "a random forest: non-linear, little tuning needed", [
            "estimator: sklearn.ensemble.RandomForestRegressor",
            "preprocess: {impute: median, categorical: onehot}",
            "params: {n_estimators: 100, random_state: 0}",
            "grid: {min_samples_leaf: [1, 5]}"]),
        ("boosting", "histogram gradient boosting: often the strongest on tables; reads missing values itself", [
            "estimator: sklearn.ensemble.HistGradientBoostingRegressor",
            "preprocess: {impute: none, categorical: onehot}",
            "params: {random_state: 0}",
            "grid: {learning_rate: [0.05, 0.1]}"]),
    ]


METRIC_WHY = {
    "roc_auc": "ROC AUC decides the winner: how well the model ranks the two classes, at any threshold",
    "accuracy": "the share of rows classified right",
    "neg_log_loss": "log loss: how good the class probabilities are (shown as a positive error)",
    "neg_mean_absolute_error": "MAE decides the winner: the typical error in the target's unit (shown positive)",
    "r2": "R²: the share of the target's variance explained",
}


def render(c: Choices) -> str:
    """The starter config as YAML text with a comment on every choice."""
    r = c.roles
    lines = [
        f"# Starter config written by holdfast init for {c.data_path}, target {c.target}. Every choice is commented;",
        "# change what you know better. `holdfast check` validates it, `holdfast run` runs it. Every key:",
        "# workflow/schemas/config.schema.yaml and config/README.md.",
        "",
        _comment(f"experiment: {_y(c.experiment)}", "everything it writes goes under results/<experiment>/"),
        "",
        "data:",
        _comment(f"  path: {_y(c.data_path)}", "read once at the seal; the seal records its fingerprint"),
        _comment(f"  target: {_y(c.target)}", "the column to predict"),
    ]
    if r.id:
        lines.append(_comment(f"  id: {_y(r.id)}", "named like an id, a unique value in every row: the row key, not a "
                              "feature"))
    elif c.test_of:
        lines.append(_comment("  id: null", f"as experiment '{c.test_of}': rows are keyed by a hash of their content"))
    else:
        lines.append(_comment("  id: null", "no column named like an id is unique per row: rows are keyed by a hash "
                              "of their content"))
    if r.group:
        lines.append(_comment(f"  group: {_y(r.group)}", f"{r.group_values} values, each on several rows: rows of one "
                              "group are related, so they are kept together; not a feature"))
    else:
        lines.append(_comment("  group: null", "no column named like a group, site, route, patient or customer with "
                              "repeated values"))
    if r.time:
        lines.append(_comment(f"  time: {_y(r.time)}", "reads as dates and times: leakage.json counts rows out of time "
                              "order; not a feature"))
    else:
        lines.append(_comment("  time: null", "no column reads as dates and times"))
    if r.drop:
        lines.append("  drop:                            # columns that are not features:")
        lines += [_comment(f"    - {_y(name)}", why) for name, why in r.drop.items()]
    else:
        lines.append(_comment("  drop: []", "every other column is a feature"))
    if c.task == "regression":
        lines.append(_comment("  unit: null", "the target's unit (e.g. days): errors are then shown in it"))
    lines += ["", _comment(f"task: {c.task}", c.task_why), ""]
    lines.append("# scikit-learn scorer names; the first decides the winner.")
    lines.append("metrics:")
    lines += [_comment(f"  - {m}", METRIC_WHY.get(m, "")) for m in c.metrics]
    if c.test_scheme in ("grouped", "stratified_grouped"):
        test_why = (f"whole {r.group} values are sealed away: the test figure is for new {r.group} values, as the "
                    "folds' is (stratified: for new rows of known ones)")
    else:
        test_why = TEST_WHY[c.test_scheme]
    kept = (f"as experiment '{c.test_of}' (not opened; it sealed rows of this data): they stay sealed here"
            if c.test_of else "")
    lines += ["", "# The sealed test set: drawn once, read once (holdfast open).", "test:",
              _comment(f"  fraction: {c.fraction}", kept or "a fifth of the rows (common practice)"),
              _comment(f"  scheme: {c.test_scheme}", kept or test_why),
              _comment(f"  salt: {_y(c.salt)}", kept or "drawn at random by holdfast init; another salt, another test "
                       "set"),
              _comment("  reopen_reasons: []", "one written reason per extra look at the test set")]
    if c.fold_scheme in ("group", "stratified_group"):
        folds_why = f"whole {r.group} values per fold" + (", class shares kept as far as they allow"
                                                          if c.fold_scheme == "stratified_group" else "")
    else:
        folds_why = FOLD_WHY[c.fold_scheme]
    lines += ["", "# Cross-validation on the development rows.", "folds:",
              _comment(f"  scheme: {c.fold_scheme}", folds_why),
              _comment(f"  k: {FOLDS}", "five folds (common practice); more folds: less pessimistic, slower"),
              _comment("  repeats: 1", "raise it for steadier estimates on small data"),
              _comment("  seed: 0", "the folds are drawn from this seed: same seed, same folds")]
    lines += ["", "# A small default set of families; each grid value is one candidate.", "candidates:"]
    for name, why, body in _families(c.task):
        lines.append(_comment(f"  {name}:", why))
        lines += [f"    {item}" for item in body]
    lines += ["", "selection:",
              _comment("  rule: best_mean", "the best CV mean wins; choice.json says how optimistic that pick is")]
    notes = r.notes + c.notes
    if notes:
        lines += ["", "# Notes from holdfast init:"] + [f"# - {n}" for n in notes]
    return "\n".join(lines) + "\n"


def _task(frame: Any, target: str) -> tuple[str, str]:
    from ..dataset import MAX_CLASSES_FOR_INFERENCE, infer_task

    values = frame[target]
    task = infer_task(values)
    distinct = int(values.nunique())
    if task == "regression":
        return task, f"inferred: numbers with {distinct} distinct values"
    if not (values.dtype == bool or _text(values)):
        why = f"inferred: {distinct} distinct whole numbers (up to {MAX_CLASSES_FOR_INFERENCE} are read as classes)"
    else:
        why = f"inferred: {distinct} distinct labels"
    return task, why


def _metrics(frame: Any, target: str, task: str) -> list[str]:
    """The default metrics for the task, keeping only those scikit-learn can score on this target."""
    if task == "regression":
        return ["neg_mean_absolute_error", "r2"]
    import numpy as np

    from ..scoring import metric_problem

    y = frame[target].dropna().to_numpy()
    classes = np.unique(y)
    wanted = ["roc_auc", "accuracy", "neg_log_loss"] if len(classes) == 2 else ["accuracy", "neg_log_loss"]
    return [m for m in wanted if metric_problem(m, classes, np.concatenate([classes, y[:20_000]])) is None]


def read_data(path: Path) -> Any:
    """The data file; DataError naming it when init cannot read it."""
    from .._io import read_table

    if not path.is_file():
        raise DataError(f"data file '{path}' does not exist; pass the path of a CSV or Parquet file")
    if path.suffix.lower() not in DATA_SUFFIXES:
        raise DataError(f"data file '{path}' has suffix '{path.suffix}'; holdfast reads .csv and .parquet files")
    if path.stat().st_size == 0:
        raise DataError(f"data file '{path}' is empty; pass a file with a header and rows")
    sealed = sealed_experiment_of(path)
    if sealed is not None:
        raise SealedAccessError(f"data file '{path}' is in the sealed folder of experiment folder '{sealed}', whose "
                                "rows only that experiment's opening reads; pass your own data file")
    return read_table(path)


def starter(data: Path, target: str, out: Path, results: Path = Path("results")) -> tuple[str, list[str]]:
    """The checked starter config's text and what to say about it; nothing is written here."""
    from ..config import parse_yaml
    from ..plan import prepare

    frame = read_data(data)
    if target not in frame.columns:
        shown = ", ".join(map(str, frame.columns[:12])) + (" ..." if len(frame.columns) > 12 else "")
        raise DataError(f"column '{target}' (--target) is not in '{data}'; columns there are: {shown}")
    if frame[target].isna().all():
        raise DataError(f"target column '{target}' of '{data}' is empty in every row; choose the column to predict")
    task, why = _task(frame, target)
    roles = suggest_roles(frame, target, task)
    path_text = os.path.relpath(data) if data.is_absolute() and Path.cwd() in data.parents else str(data)
    salt, name, metrics = secrets.token_hex(4), experiment_name(data, results), _metrics(frame, target, task)
    pairs, fraction, test_of = schemes(task, roles.group), 0.2, None
    kept = _kept_test_settings(data, target, results, name, frame, roles)
    if kept is not None:  # another split of this file would fit on that experiment's sealed rows (overlap.py)
        test_of, spec = kept
        salt, fraction = str(spec["salt"]), float(spec["fraction"])
        pairs = [(spec["scheme"], fold) for fold in dict.fromkeys(f for _, f in pairs)]
    last: HoldfastError | None = None
    notes: list[str] = []
    for test_scheme, fold_scheme in pairs:
        choice = Choices(experiment=name, data_path=path_text, target=target, task=task, task_why=why, roles=roles,
                         metrics=metrics, salt=salt, test_scheme=test_scheme, fold_scheme=fold_scheme,
                         notes=list(notes), fraction=fraction, test_of=test_of)
        text = render(choice)
        try:
            plan = prepare(parse_yaml(text, str(out)), main=True, results=str(results))
        except HoldfastError as exc:
            last = exc
            notes.append(f"test.scheme {test_scheme} with folds.scheme {fold_scheme} did not pass the check: "
                         f"{exc.message}")
            continue
        n = sum(len(c) for c in plan.families.values())
        said = [f"task {task} ({why}); id {roles.id or 'none'}, group {roles.group or 'none'}, time "
                f"{roles.time or 'none'}" + (f"; not features: {', '.join(roles.drop)}" if roles.drop else ""),
                f"test split {test_scheme}, folds {fold_scheme}: {n} candidates in {len(plan.families)} families, "
                f"{len(plan.fold_ids)} folds, primary metric {plan.config['metrics'][0]}; checked as 'holdfast "
                f"check {out}' checks it"]
        return text, said
    assert last is not None
    # The last pair asks least of the data (rows, not groups): what stops it stops them all, so its reason is the one
    # to act on (the first pair's is often only that whole groups cannot keep the classes).
    tried = len(notes)
    raise type(last)(f"no starter config for '{data}' passes the check ({tried} pairs of test and fold schemes tried); "
                     f"the last, test.scheme {test_scheme} with folds.scheme {fold_scheme}: {last.message}")


def _kept_test_settings(data: Path, target: str, results: Path, name: str, frame: Any,
                        roles: Roles) -> tuple[str, dict[str, Any]] | None:
    """The first experiment sealed from ``data`` and not opened whose test settings the starter can write, as
    (its name, its sealed spec); its id and group columns become the starter's. None when there is none. From
    another file whose rows it sealed (a grown or edited copy) only a scheme that places each row (or group) by
    its own hash can be kept: it seals the same rows here."""
    from ..overlap import same_data_file, sealed_values_in, unopened_experiments

    same, others, digest = [], [], []
    for folder, manifest in unopened_experiments(target, results, name):
        if same_data_file(str(data), manifest["data"], digest):
            same.append((folder, manifest["spec"]))
        elif manifest["spec"].get("scheme") in ("hashed", "grouped"):
            shared = sealed_values_in(frame, folder, manifest)
            if shared is not None and shared.rows is not None and shared.rows.any():
                others.append((folder, manifest["spec"]))
    for folder, spec in [*same, *others]:
        columns = [spec.get("id"), spec.get("group") if "grouped" in str(spec.get("scheme")) else None]
        if spec.get("scheme") in (*TEST_WHY, "grouped", "stratified_grouped") and all(
                c is None or c in frame.columns for c in columns):
            if roles.id and roles.id != spec.get("id"):
                roles.drop[roles.id] = (f"an id, but experiment '{folder.name}' keys rows "
                                        f"{'by ' + repr(spec['id']) if spec.get('id') else 'by their content'}, and "
                                        "this one keeps its test settings")
            roles.id = spec.get("id")
            if columns[1] is not None and columns[1] != roles.group:
                roles.group, roles.group_values = columns[1], int(frame[columns[1]].nunique())
            for column in filter(None, columns):
                roles.drop.pop(column, None)
            return folder.name, spec
    return None


def main(args: argparse.Namespace) -> int:
    """Write the starter config, refusing to replace an existing file."""
    data = Path(args.data)
    out = Path(args.output) if args.output else Path(f"{base_name(data)}.yaml")
    if out.exists():
        raise ConfigError(f"'{out}' exists; holdfast init never replaces a file: choose another name with -o")
    if not out.parent.is_dir():
        raise ConfigError(f"folder '{out.parent}' of '{out}' does not exist; create it or choose another -o")
    text, said = starter(data, args.target, out)
    try:
        with open(out, "x", encoding="utf-8") as handle:  # "x": fails rather than replace a file made meanwhile
            handle.write(text)
    except FileExistsError as exc:
        raise ConfigError(f"'{out}' exists; holdfast init never replaces a file: choose another name with -o") from exc
    print(f"holdfast: wrote {out}")
    for line in said:
        print(f"holdfast: {line}")
    print(f"holdfast: read the comments, change what you know better, then: holdfast run {out}")
    return 0


def add_parser(sub: Any) -> None:
    """Register `holdfast init`."""
    p = sub.add_parser("init", help="write a starter config for a data file, every choice commented",
                       description=__doc__.split("\n\n")[1])
    p.add_argument("data", metavar="DATA", help="the CSV or Parquet data file")
    p.add_argument("--target", required=True, metavar="COLUMN", help="the column to predict")
    p.add_argument("-o", "--output", metavar="FILE", help="the config to write (default: <data file name>.yaml); "
                   "an existing file is never replaced")
    p.set_defaults(func=main, takes_extra=False)
