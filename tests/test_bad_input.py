"""Bad configs and bad data stop the real workflow with one 'holdfast:' line and leave results/ untouched."""

from __future__ import annotations

import re
import subprocess
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
import yaml
from conftest import REPO, breast_cancer_frame, run_cli, run_workflow, tree_digest, write_config
from holdfast.dataset import hash_unit

Edit = Callable[[Path, dict[str, Any]], None]
CONFIG_ERROR, DATA_ERROR = 2, 3
FRESH = "fresh"


# --- helpers -------------------------------------------------------------------------------------------------------

def use_data(workdir: Path, config: dict[str, Any], frame: pd.DataFrame) -> None:
    """Write ``frame`` as the data file of a new experiment, so the case exercises a fresh seal."""
    frame.to_csv(workdir / "bad.csv", index=False)
    config["experiment"] = FRESH
    config["data"]["path"] = "bad.csv"


def snapshot(root: Path) -> tuple[dict[str, str], list[str]]:
    """Every file's sha256 and every path (folders too) under ``root``, to prove nothing was written."""
    paths = sorted(str(p.relative_to(root)) for p in root.rglob("*")) if root.exists() else []
    return tree_digest(root), paths


def last_stderr_line(stderr: str) -> str:
    """The last non-empty line of a run's stderr: the one line a user reads."""
    lines = [line for line in stderr.splitlines() if line.strip()]
    return lines[-1] if lines else ""


def assert_refused(result: subprocess.CompletedProcess[str], exit_code: int, pattern: str, results: Path,
                   before: tuple[dict[str, str], list[str]]) -> None:
    """The run ended with ``exit_code``, its last stderr line is holdfast's one line matching ``pattern``, it printed no
    traceback, and nothing under ``results`` changed."""
    last = last_stderr_line(result.stderr)
    assert result.returncode == exit_code, result.stdout + result.stderr[-3000:]
    assert last.startswith("holdfast:") and re.search(pattern, last), result.stderr[-3000:]
    assert "Traceback" not in result.stderr, result.stderr[-3000:]
    assert snapshot(results) == before, "a bad input must not write under results/"


# --- cases: each edits the config dict and/or writes a data file ----------------------------------------------------

def missing_data_file(workdir: Path, config: dict[str, Any]) -> None:
    """A new experiment whose data file does not exist."""
    config["experiment"] = FRESH
    config["data"]["path"] = "no_such_file.csv"


def sealed_data_file_deleted(workdir: Path, config: dict[str, Any]) -> None:
    """The sealed experiment's data file was deleted."""
    (workdir / "data.csv").unlink()


def sealed_data_file_edited(workdir: Path, config: dict[str, Any]) -> None:
    """One value of the sealed experiment's data file was changed (same size, so the sha256 decides)."""
    text = (workdir / "data.csv").read_text(encoding="utf-8")
    header, first, rest = text.split("\n", 2)
    cells = first.split(",")
    cells[-1] = "1" if cells[-1] == "0" else "0"  # the target of the first row, one character for one
    (workdir / "data.csv").write_text("\n".join([header, ",".join(cells), rest]), encoding="utf-8")


def missing_target_column(workdir: Path, config: dict[str, Any]) -> None:
    """data.target names a column the file does not have."""
    config["experiment"] = FRESH
    config["data"]["target"] = "diagnosis"


def target_with_missing_values(workdir: Path, config: dict[str, Any]) -> None:
    """Two rows have no target value."""
    frame = breast_cancer_frame().astype({"target": "float64"})
    frame.loc[[3, 7], "target"] = np.nan
    use_data(workdir, config, frame)


def unknown_fold_key(workdir: Path, config: dict[str, Any]) -> None:
    """A misspelt key inside folds."""
    config["folds"]["kk"] = 3


def unknown_top_level_key(workdir: Path, config: dict[str, Any]) -> None:
    """'metric' instead of 'metrics' at the top level."""
    config["metric"] = config.pop("metrics")


def unknown_family_key(workdir: Path, config: dict[str, Any]) -> None:
    """A misspelt key inside one candidate family."""
    config["candidates"]["logistic"]["grdi"] = config["candidates"]["logistic"].pop("grid")


def k_above_smallest_class(workdir: Path, config: dict[str, Any]) -> None:
    """Stratified 10-fold on data where one class has only eight rows (some of them sealed away)."""
    frame = breast_cancer_frame()
    rare = frame[frame["target"] == 0].head(8)
    use_data(workdir, config, pd.concat([frame[frame["target"] == 1], rare]))
    config["folds"]["k"] = 10


def estimator_os_system(workdir: Path, config: dict[str, Any]) -> None:
    """An estimator path that would run a shell command."""
    config["candidates"]["logistic"]["estimator"] = "os.system"


def estimator_outside_sklearn(workdir: Path, config: dict[str, Any]) -> None:
    """An estimator from a module that is not allowed."""
    config["candidates"]["tree"]["estimator"] = "numpy.linalg.Foo"


def estimator_class_missing(workdir: Path, config: dict[str, Any]) -> None:
    """A misspelt class name in an allowed module."""
    config["candidates"]["logistic"]["estimator"] = "sklearn.linear_model.LogisticRegresion"


def estimator_module_missing(workdir: Path, config: dict[str, Any]) -> None:
    """A misspelt module name under sklearn."""
    config["candidates"]["logistic"]["estimator"] = "sklearn.linear_modle.LogisticRegression"


def estimator_wrong_task(workdir: Path, config: dict[str, Any]) -> None:
    """A regressor among classification candidates."""
    config["candidates"]["logistic"]["estimator"] = "sklearn.linear_model.Ridge"
    config["candidates"]["logistic"]["grid"] = {"alpha": [0.1, 1.0]}
    config["candidates"]["logistic"]["params"] = {}


def unknown_scorer(workdir: Path, config: dict[str, Any]) -> None:
    """A misspelt scorer name."""
    config["metrics"] = ["acuracy", "roc_auc"]


def scorer_for_other_task(workdir: Path, config: dict[str, Any]) -> None:
    """A regression scorer on a classification task."""
    config["metrics"] = ["accuracy", "r2"]


def unknown_parameter(workdir: Path, config: dict[str, Any]) -> None:
    """A fixed parameter the estimator does not have."""
    config["candidates"]["logistic"]["params"] = {"max_iters": 500}


def unknown_grid_parameter(workdir: Path, config: dict[str, Any]) -> None:
    """A grid parameter the estimator does not have."""
    config["candidates"]["tree"]["grid"] = {"depth": [2, 4]}


def fraction_above_one(workdir: Path, config: dict[str, Any]) -> None:
    """test.fraction outside (0, 1), above."""
    config["test"]["fraction"] = 1.5


def fraction_zero(workdir: Path, config: dict[str, Any]) -> None:
    """test.fraction outside (0, 1), at zero."""
    config["test"]["fraction"] = 0


def k_zero(workdir: Path, config: dict[str, Any]) -> None:
    """folds.k of zero."""
    config["folds"]["k"] = 0


def k_negative(workdir: Path, config: dict[str, Any]) -> None:
    """folds.k below zero."""
    config["folds"]["k"] = -3


def experiment_with_separator(workdir: Path, config: dict[str, Any]) -> None:
    """An experiment name that would write outside results/ through a path separator."""
    config["experiment"] = "../escape"


def experiment_with_subfolder(workdir: Path, config: dict[str, Any]) -> None:
    """An experiment name with a '/' in it."""
    config["experiment"] = "team/bc"


def experiment_dotdot(workdir: Path, config: dict[str, Any]) -> None:
    """The experiment name '..' (results/.. is the work folder)."""
    config["experiment"] = ".."


def duplicate_ids(workdir: Path, config: dict[str, Any]) -> None:
    """Two rows share one id."""
    frame = breast_cancer_frame()
    frame.loc[1, "patient"] = frame.loc[0, "patient"]
    use_data(workdir, config, frame)


def missing_ids(workdir: Path, config: dict[str, Any]) -> None:
    """One row has no id."""
    frame = breast_cancer_frame()
    frame.loc[5, "patient"] = None
    use_data(workdir, config, frame)


def group_with_nulls(workdir: Path, config: dict[str, Any]) -> None:
    """Group folds on a group column with three empty cells."""
    frame = breast_cancer_frame()
    frame["clinic"] = [f"C{i % 12}" for i in range(len(frame))]
    frame.loc[[2, 40, 99], "clinic"] = None
    use_data(workdir, config, frame)
    config["data"]["group"] = "clinic"
    config["folds"]["scheme"] = "group"


def infinite_feature(workdir: Path, config: dict[str, Any]) -> None:
    """One feature cell is infinite."""
    frame = breast_cancer_frame()
    frame.loc[10, "mean_radius"] = np.inf
    use_data(workdir, config, frame)


def numbers_with_words(workdir: Path, config: dict[str, Any]) -> None:
    """A feature column of numbers in which a few cells say 'unknown' (as exported by many tools): read as text."""
    frame = breast_cancer_frame()
    frame["mean_radius"] = frame["mean_radius"].astype(str)
    frame.loc[[3, 40, 41], "mean_radius"] = "unknown"
    use_data(workdir, config, frame)


def text_column_missing(workdir: Path, config: dict[str, Any]) -> None:
    """data.text names a column the data file does not have."""
    use_data(workdir, config, breast_cancer_frame())
    config["data"]["text"] = ["mean_radios"]


def feature_spells_out_target(workdir: Path, config: dict[str, Any]) -> None:
    """A column 'diagnosis' exported beside the target that spells it out ('malignant', 'benign')."""
    frame = breast_cancer_frame()
    frame["diagnosis"] = frame["target"].map({0: "malignant", 1: "benign"})
    use_data(workdir, config, frame)


def feature_labels_rows(workdir: Path, config: dict[str, Any]) -> None:
    """An order reference in every row, left among the features (data.id names another column)."""
    frame = breast_cancer_frame()
    frame["order_ref"] = [f"ORD-{7919 * i % 100_000:05d}" for i in range(len(frame))]
    use_data(workdir, config, frame)


def time_column_not_declared(workdir: Path, config: dict[str, Any]) -> None:
    """ISO-8601 visit times in a column data.time does not name: read as a text feature."""
    frame = breast_cancer_frame()
    frame["visit_at"] = pd.date_range("2025-01-01", periods=len(frame), freq="37min", tz="UTC").strftime(
        "%Y-%m-%dT%H:%M:%SZ")
    use_data(workdir, config, frame)


def known_column_missing(workdir: Path, config: dict[str, Any]) -> None:
    """data.known_before_outcome names a column the data file does not have."""
    use_data(workdir, config, breast_cancer_frame())
    config["data"]["known_before_outcome"] = ["mean_radios"]


def known_column_is_target(workdir: Path, config: dict[str, Any]) -> None:
    """data.known_before_outcome names the target itself."""
    config["data"]["known_before_outcome"] = ["target"]


def grid_above_max_candidates(workdir: Path, config: dict[str, Any]) -> None:
    """A 30-point grid (32 candidates in all) against max_candidates 20."""
    config["candidates"]["logistic"]["grid"] = {"C": [round(0.01 * 1.3**i, 6) for i in range(30)]}
    config["max_candidates"] = 20


def group_scheme_without_group(workdir: Path, config: dict[str, Any]) -> None:
    """Group folds but no data.group."""
    config["folds"]["scheme"] = "group"


def drop_names_missing_column(workdir: Path, config: dict[str, Any]) -> None:
    """data.drop lists a column the file does not have."""
    config["experiment"] = FRESH
    config["data"]["drop"] = ["worst_radiuss"]


def semicolon_csv(workdir: Path, config: dict[str, Any]) -> None:
    """A data file saved with ';' as the delimiter."""
    breast_cancer_frame().to_csv(workdir / "bad.csv", index=False, sep=";")
    config["experiment"] = FRESH
    config["data"]["path"] = "bad.csv"


def class_only_in_test(workdir: Path, config: dict[str, Any]) -> None:
    """Every row of one class hashes into the sealed test set, so development rows have a single class."""
    frame = breast_cancer_frame()
    sealed = hash_unit(frame["patient"], config["test"]["salt"]) < config["test"]["fraction"]
    rare = frame[(frame["target"] == 0) & sealed].head(3)
    use_data(workdir, config, pd.concat([frame[frame["target"] == 1], rare]))


def invalid_parameter_value(workdir: Path, config: dict[str, Any]) -> None:
    """A parameter value of the wrong type for the estimator (in a new experiment)."""
    config["experiment"] = FRESH
    config["candidates"]["tree"]["params"]["min_samples_leaf"] = "many"


def empty_data_file(workdir: Path, config: dict[str, Any]) -> None:
    """A new experiment whose data file has zero bytes."""
    (workdir / "bad.csv").write_bytes(b"")
    config["experiment"] = FRESH
    config["data"]["path"] = "bad.csv"


def unreadable_parquet(workdir: Path, config: dict[str, Any]) -> None:
    """A '.parquet' data file that is not Parquet (a truncated or mislabelled download)."""
    (workdir / "bad.parquet").write_bytes(b"PAR1 this is not a parquet file")
    config["experiment"] = FRESH
    config["data"]["path"] = "bad.parquet"


def duplicate_column_names(workdir: Path, config: dict[str, Any]) -> None:
    """A CSV header that names one column twice."""
    frame = breast_cancer_frame()
    text = frame.to_csv(index=False).replace("mean_texture", "mean_radius", 1)
    (workdir / "bad.csv").write_text(text, encoding="utf-8")
    config["experiment"] = FRESH
    config["data"]["path"] = "bad.csv"


def target_single_class(workdir: Path, config: dict[str, Any]) -> None:
    """Every row has the same class."""
    frame = breast_cancer_frame()
    frame["target"] = 1
    use_data(workdir, config, frame)


def text_feature_without_encoder(workdir: Path, config: dict[str, Any]) -> None:
    """A text feature column while a family declares no categorical encoder."""
    frame = breast_cancer_frame()
    frame["referral"] = np.where(np.arange(len(frame)) % 3 == 0, "gp", "clinic")
    use_data(workdir, config, frame)
    config["candidates"]["tree"]["preprocess"] = {"categorical": "none"}


def data_outside_project(workdir: Path, config: dict[str, Any]) -> None:
    """A data path outside the work folder, without data.allow_outside_project."""
    config["experiment"] = FRESH
    config["data"]["path"] = str(workdir.parent / "elsewhere.csv")
    breast_cancer_frame().to_csv(workdir.parent / "elsewhere.csv", index=False)


def data_in_sealed_folder(workdir: Path, config: dict[str, Any]) -> None:
    """Another experiment's sealed test file as the data (allow_outside_project does not allow it)."""
    config["experiment"] = FRESH
    config["data"]["path"] = "results/bc/sealed/test.parquet"
    config["data"]["allow_outside_project"] = True


def yaml_alias_bomb(workdir: Path, config: dict[str, Any]) -> None:
    """Nested YAML anchors and aliases that expand to 10^9 values (parsed with the safe loader)."""
    levels = ["a: &a [x, x, x, x, x, x, x, x, x, x]"]
    levels += [f"{c}: &{c} [" + ", ".join([f"*{p}"] * 10) + "]" for p, c in zip("abcdefgh", "bcdefghi", strict=True)]
    bomb = yaml.safe_load("\n".join(levels))
    config["candidates"]["tree"]["params"]["bomb"] = bomb["i"]


def k_above_groups(workdir: Path, config: dict[str, Any]) -> None:
    """Group folds with more folds than groups."""
    frame = breast_cancer_frame()
    frame["clinic"] = [f"C{i % 4}" for i in range(len(frame))]
    use_data(workdir, config, frame)
    config["data"]["group"] = "clinic"
    config["folds"] = {"scheme": "group", "k": 6}


def holdout_fraction_too_small(workdir: Path, config: dict[str, Any]) -> None:
    """A holdout whose validation share leaves a single row."""
    config["folds"] = {"scheme": "holdout", "fraction": 0.002}


def forward_too_little_training(workdir: Path, config: dict[str, Any]) -> None:
    """Forward folds whose first window would train on fewer rows than folds.min_train."""
    frame = breast_cancer_frame()
    frame["visit_at"] = pd.date_range("2025-01-01", periods=len(frame), freq="h", tz="UTC").astype(str)
    use_data(workdir, config, frame)
    config["data"]["time"] = "visit_at"
    config["folds"] = {"scheme": "forward", "k": 5, "min_train": 200}


def tiny_test_fraction(workdir: Path, config: dict[str, Any]) -> None:
    """A test fraction so small that one row would be sealed."""
    config["experiment"] = FRESH
    config["test"] = {**config["test"], "scheme": "stratified", "fraction": 0.002}


def bundled_frame(name: str) -> pd.DataFrame:
    """A multiclass data set scikit-learn ships (load_iris: Fisher 1936, 150 rows, 3 classes; load_wine: UCI wine
    recognition data, 178 rows, 3 classes), with the breast cancer config's id column 'patient'."""
    from sklearn import datasets

    frame = getattr(datasets, f"load_{name}")(as_frame=True).frame
    frame = frame.rename(columns=lambda c: c.replace(" (cm)", "").replace(" ", "_").replace("/", "_"))
    frame.insert(0, "patient", [f"P{i:04d}" for i in range(len(frame))])
    return frame


def sealed_rows(frame: pd.DataFrame, config: dict[str, Any]) -> np.ndarray:
    """Which rows the config's hashed test partition seals (membership from the key and salt alone)."""
    return hash_unit(frame["patient"], config["test"]["salt"]) < config["test"]["fraction"]


def binary_metric_on_three_classes(workdir: Path, config: dict[str, Any]) -> None:
    """roc_auc (binary only) on the three iris species: every fit would fail after the seal."""
    use_data(workdir, config, bundled_frame("iris"))
    config["metrics"] = ["accuracy", "roc_auc"]


def default_metrics_on_three_classes(workdir: Path, config: dict[str, Any]) -> None:
    """No metrics set on the three wine cultivars: the default roc_auc cannot score them."""
    use_data(workdir, config, bundled_frame("wine"))
    del config["metrics"]


def f1_on_text_labels(workdir: Path, config: dict[str, Any]) -> None:
    """f1 scores the label 1, which a target of 'benign'/'malignant' does not have."""
    frame = breast_cancer_frame()
    frame["target"] = np.where(frame["target"] == 1, "benign", "malignant")
    use_data(workdir, config, frame)
    config["metrics"] = ["f1"]


def labels_differ_by_a_space(workdir: Path, config: dict[str, Any]) -> None:
    """Three rows say 'benign ' (trailing space) where the rest say 'benign'."""
    frame = breast_cancer_frame()
    frame["target"] = np.where(frame["target"] == 1, "benign", "malignant")
    frame.loc[frame.index[frame["target"] == "benign"][:3], "target"] = "benign "
    use_data(workdir, config, frame)
    config["metrics"] = ["accuracy"]


def labels_differ_by_case(workdir: Path, config: dict[str, Any]) -> None:
    """Two rows say 'Malignant' where the rest say 'malignant'."""
    frame = breast_cancer_frame()
    frame["target"] = np.where(frame["target"] == 1, "benign", "malignant")
    frame.loc[frame.index[frame["target"] == "malignant"][:2], "target"] = "Malignant"
    use_data(workdir, config, frame)
    config["metrics"] = ["accuracy"]


def use_parquet(workdir: Path, config: dict[str, Any], frame: pd.DataFrame) -> None:
    """Write ``frame`` as a Parquet data file of a new experiment."""
    frame.to_parquet(workdir / "bad.parquet", index=False)
    config["experiment"] = FRESH
    config["data"]["path"] = "bad.parquet"


def list_column(workdir: Path, config: dict[str, Any]) -> None:
    """A Parquet list column (tags per patient) left among the features."""
    frame = breast_cancer_frame()
    frame["tags"] = [["follow-up"] * (i % 3) for i in range(len(frame))]
    use_parquet(workdir, config, frame)


def struct_column(workdir: Path, config: dict[str, Any]) -> None:
    """A Parquet struct column (lab site and batch) left among the features."""
    frame = breast_cancer_frame()
    frame["lab"] = [{"site": "north" if i % 2 else "south", "batch": i % 5} for i in range(len(frame))]
    use_parquet(workdir, config, frame)


def infinite_target(workdir: Path, config: dict[str, Any]) -> None:
    """One target value is infinite (the seal used to end in a traceback)."""
    frame = breast_cancer_frame().astype({"target": "float64"})
    frame.loc[3, "target"] = np.inf
    use_data(workdir, config, frame)


def epoch_seconds(frame: pd.DataFrame) -> pd.DataFrame:
    """The frame with an hourly time column in Unix epoch seconds from 2025-01-01 (crafted)."""
    out = frame.copy()
    out["visit_at"] = 1_735_689_600 + 3600 * np.arange(len(out))
    return out


def time_in_epoch_seconds(workdir: Path, config: dict[str, Any]) -> None:
    """Integer epoch seconds in data.time, which pandas would read as nanoseconds after 1970."""
    use_data(workdir, config, epoch_seconds(breast_cancer_frame()))
    config["data"]["time"] = "visit_at"
    config["test"] = {**config["test"], "scheme": "time_tail"}


def time_unit_on_text_times(workdir: Path, config: dict[str, Any]) -> None:
    """data.time_unit set for a column of ISO-8601 text: it would do nothing."""
    frame = breast_cancer_frame()
    frame["visit_at"] = pd.date_range("2025-01-01", periods=len(frame), freq="h", tz="UTC").astype(str)
    use_data(workdir, config, frame)
    config["data"]["time"] = "visit_at"
    config["data"]["time_unit"] = "s"


def one_member_class(workdir: Path, config: dict[str, Any]) -> None:
    """A third class with a single development row under stratified folds."""
    frame = breast_cancer_frame()
    frame.loc[int(np.flatnonzero(~sealed_rows(frame, config))[0]), "target"] = 2
    use_data(workdir, config, frame)
    config["metrics"] = ["accuracy"]


def third_class_only_in_test(workdir: Path, config: dict[str, Any]) -> None:
    """Every row of a third class hashes into the sealed test set."""
    frame = breast_cancer_frame()
    frame.loc[np.flatnonzero(sealed_rows(frame, config))[:3], "target"] = 2
    use_data(workdir, config, frame)


def sealed_rows_of_one_class(workdir: Path, config: dict[str, Any]) -> None:
    """Only benign rows hash into the sealed test set, so its roc_auc would be undefined."""
    frame = breast_cancer_frame()
    sealed = sealed_rows(frame, config)
    use_data(workdir, config, frame[(frame["target"] == 1) | ~sealed])


def log_error_on_negative_target(workdir: Path, config: dict[str, Any]) -> None:
    """A logarithmic error on a target with negative values (the diabetes progression score minus 150)."""
    from conftest import diabetes_frame

    frame = diabetes_frame()
    frame["target"] = frame["target"] - 150
    frame.insert(0, "patient", [f"P{i:04d}" for i in range(len(frame))])
    use_data(workdir, config, frame)
    config["metrics"] = ["neg_mean_squared_log_error"]
    config["folds"] = {"scheme": "kfold", "k": 3}


def grid_of_five_times_sixty(workdir: Path, config: dict[str, Any]) -> None:
    """5 parameters x 60 values: 777,600,000 candidates that must be counted, not built."""
    values = [round(0.001 * 1.2**i, 9) for i in range(60)]
    config["candidates"]["logistic"]["grid"] = {name: values for name in ("C", "tol", "intercept_scaling",
                                                                          "l1_ratio", "verbose")}


def experiment_with_trailing_newline(workdir: Path, config: dict[str, Any]) -> None:
    """An experiment name ending in a line break (Python's '$' matches before it)."""
    config["experiment"] = "bc\n"


def blank_reopen_reason(workdir: Path, config: dict[str, Any]) -> None:
    """A second reopen reason made of spaces only."""
    config["test"]["reopen_reasons"] = ["the first opening crashed half way", " " * 12]


def repeated_reopen_reason(workdir: Path, config: dict[str, Any]) -> None:
    """The same reopen reason twice (differing only in spacing and case)."""
    config["test"]["reopen_reasons"] = ["labels were corrected in March", "Labels were corrected  in March"]


def results_symlink_outside(workdir: Path, config: dict[str, Any]) -> None:
    """results/ is a symbolic link to a folder outside the project."""
    (workdir / "results").rename(workdir.parent / "moved_results")
    (workdir / "results").symlink_to(workdir.parent / "moved_results", target_is_directory=True)


def experiment_symlink_outside(workdir: Path, config: dict[str, Any]) -> None:
    """results/<experiment> of a new experiment is a symbolic link to a folder outside the project."""
    (workdir.parent / "elsewhere").mkdir()
    (workdir / "results" / FRESH).symlink_to(workdir.parent / "elsewhere", target_is_directory=True)
    config["experiment"] = FRESH


# --- the table ---------------------------------------------------------------------------------------------------

CASES = [
    pytest.param(missing_data_file, DATA_ERROR,
                 r"data file 'no_such_file\.csv' does not exist; check data\.path", id="data-file-missing"),
    pytest.param(sealed_data_file_deleted, DATA_ERROR,
                 r"data file 'data\.csv' of sealed experiment 'bc' does not exist; restore it .*or name a new "
                 r"experiment", id="sealed-data-file-deleted"),
    pytest.param(sealed_data_file_edited, 4,
                 r"data file 'data\.csv' changed since experiment 'bc' was sealed \(sha256 now [0-9a-f]{16}…, sealed "
                 r"[0-9a-f]{16}…\); nothing was run\. The seal never re-runs", id="sealed-data-file-edited"),
    pytest.param(missing_target_column, DATA_ERROR,
                 r"column 'diagnosis' \(data\.target\) is not in 'data\.csv'; columns there are: patient, ",
                 id="target-column-missing"),
    pytest.param(target_with_missing_values, DATA_ERROR,
                 r"target column 'target' has 2 missing value\(s\) in 'bad\.csv'; drop or fill those rows",
                 id="target-missing-values"),
    pytest.param(unknown_fold_key, CONFIG_ERROR,
                 r"config key 'folds\.kk' is not known; remove it or use one of: fraction, gap, k, min_train, "
                 r"repeats, scheme, seed, window",
                 id="misspelt-fold-key"),
    pytest.param(unknown_top_level_key, CONFIG_ERROR,
                 r"config key 'metric' is not known; remove it or use one of: .*\bmetrics\b", id="misspelt-top-key"),
    pytest.param(unknown_family_key, CONFIG_ERROR,
                 r"config key 'candidates\.logistic\.grdi' is not known; remove it or use one of: .*\bgrid\b",
                 id="misspelt-family-key"),
    pytest.param(k_above_smallest_class, CONFIG_ERROR,
                 r"config key 'folds\.k' is 10 but class '?0'? of 'target' has only \d development rows; "
                 r"lower folds\.k to at most \d or use folds\.scheme: kfold", id="k-above-smallest-class"),
    pytest.param(estimator_os_system, CONFIG_ERROR,
                 r"config key 'candidates\.logistic\.estimator': 'os\.system' is not from an allowed module "
                 r"\(sklearn\); use a scikit-learn estimator or add its module prefix to allowed_modules",
                 id="estimator-os-system"),
    pytest.param(estimator_outside_sklearn, CONFIG_ERROR,
                 r"config key 'candidates\.tree\.estimator': 'numpy\.linalg\.Foo' is not from an allowed module",
                 id="estimator-numpy"),
    pytest.param(estimator_class_missing, CONFIG_ERROR,
                 r"estimator 'sklearn\.linear_model\.LogisticRegresion': 'sklearn\.linear_model' has no class "
                 r"'LogisticRegresion'; check the import path", id="estimator-class-missing"),
    pytest.param(estimator_class_missing, CONFIG_ERROR,
                 r"config key 'candidates\.logistic\.estimator'.*'LogisticRegresion'", id="estimator-error-names-key"),
    pytest.param(estimator_module_missing, CONFIG_ERROR,
                 r"estimator 'sklearn\.linear_modle\.LogisticRegression': module 'sklearn\.linear_modle' cannot be "
                 r"imported .*; check the import path", id="estimator-module-missing"),
    pytest.param(estimator_wrong_task, CONFIG_ERROR,
                 r"config key 'candidates\.logistic\.estimator': 'sklearn\.linear_model\.Ridge' is not a classifier "
                 r"but the task is classification; choose a matching estimator", id="estimator-wrong-task"),
    pytest.param(unknown_scorer, CONFIG_ERROR,
                 r"config key 'metrics\[0\]': 'acuracy' is not a scikit-learn scorer name.*; see "
                 r"sklearn\.metrics\.get_scorer_names\(\)", id="scorer-unknown"),
    pytest.param(scorer_for_other_task, CONFIG_ERROR,
                 r"config key 'metrics\[1\]': 'r2' is a regression metric but the task is classification; "
                 r"choose a metric for this task", id="scorer-wrong-task"),
    pytest.param(unknown_parameter, CONFIG_ERROR,
                 r"config key 'candidates\.logistic': 'sklearn\.linear_model\.LogisticRegression' has no parameter "
                 r"'max_iters'; known parameters: .*\bmax_iter\b", id="parameter-unknown"),
    pytest.param(unknown_grid_parameter, CONFIG_ERROR,
                 r"config key 'candidates\.tree': 'sklearn\.tree\.DecisionTreeClassifier' has no parameter 'depth'; "
                 r"known parameters: .*\bmax_depth\b", id="grid-parameter-unknown"),
    pytest.param(fraction_above_one, CONFIG_ERROR,
                 r"config key 'test\.fraction': 1\.5 is out of range; set it to a number less than 1",
                 id="fraction-above-one"),
    pytest.param(fraction_zero, CONFIG_ERROR,
                 r"config key 'test\.fraction': 0 is out of range; set it to a number greater than 0",
                 id="fraction-zero"),
    pytest.param(k_zero, CONFIG_ERROR, r"config key 'folds\.k': 0 is out of range; set it to a number at least 2",
                 id="k-zero"),
    pytest.param(k_negative, CONFIG_ERROR, r"config key 'folds\.k': -3 is out of range; set it to a number at "
                 r"least 2", id="k-negative"),
    pytest.param(experiment_with_separator, CONFIG_ERROR,
                 r"config key 'experiment': '\.\./escape' does not match .*; start with a letter, digit or '_'",
                 id="experiment-parent-path"),
    pytest.param(experiment_with_subfolder, CONFIG_ERROR,
                 r"config key 'experiment': 'team/bc' does not match .*; start with a letter, digit or '_'",
                 id="experiment-separator"),
    pytest.param(experiment_dotdot, CONFIG_ERROR, r"config key 'experiment': '\.\.' does not match ",
                 id="experiment-dotdot"),
    pytest.param(duplicate_ids, DATA_ERROR,
                 r"id column 'patient' has 1 duplicate value\(s\) \(e\.g\. 'P0000'\); make ids unique or unset "
                 r"data\.id", id="ids-duplicate"),
    pytest.param(missing_ids, DATA_ERROR,
                 r"id column 'patient' is empty in 1 row\(s\) \(first at data row 6\); fill every id or unset data\.id",
                 id="ids-missing"),
    pytest.param(group_with_nulls, DATA_ERROR,
                 r"group column 'clinic' has 3 missing value\(s\) in 'bad\.csv'; give every row a group",
                 id="group-nulls"),
    pytest.param(infinite_feature, DATA_ERROR,
                 r"feature column 'mean_radius' has 1 infinite value\(s\) in 'bad\.csv'; replace them with finite "
                 r"values or blanks", id="feature-infinite"),
    pytest.param(numbers_with_words, DATA_ERROR,
                 r"feature column 'mean_radius' holds numbers in 566 of its 569 filled cells and text in 3 "
                 r"\('unknown'\) in 'bad\.csv': read as text it would be one categorical feature with \d+ levels; "
                 r"blank those cells .*, or list the column in data\.text if it is text on purpose",
                 id="feature-numbers-with-words"),
    pytest.param(text_column_missing, DATA_ERROR,
                 r"column 'mean_radios' \(data\.text\) is not in 'bad\.csv'; remove it from data\.text",
                 id="text-column-missing"),
    pytest.param(feature_spells_out_target, DATA_ERROR,
                 r"feature column 'diagnosis' is fixed by target column 'target' in 'bad\.csv': in all 569 rows where "
                 r"it is filled, each class has one value of it \(0 -> 'malignant', 1 -> 'benign'\); every candidate "
                 r"would read the outcome off it, .*; list it in data\.drop \(possible now: nothing is sealed yet\), "
                 r"or in data\.known_before_outcome if it is truly recorded before the outcome",
                 id="feature-is-target"),
    pytest.param(feature_labels_rows, DATA_ERROR,
                 r"feature column 'order_ref' has 569 different values in its 569 filled cells \('ORD-00000', "
                 r"'ORD-07919', \.\.\.\) in 'bad\.csv': it labels rows instead of describing them, .*; name it in "
                 r"data\.id if it identifies rows, list it in data\.drop, or replace it in the data file by something "
                 r"rows share \(a prefix, a category\)$", id="feature-labels-rows"),
    pytest.param(time_column_not_declared, DATA_ERROR,
                 r"feature column 'visit_at' has 569 different values .*; name it in data\.time if it is the rows' "
                 r"time, name it in data\.id if it identifies rows", id="time-column-not-declared"),
    pytest.param(known_column_missing, DATA_ERROR,
                 r"column 'mean_radios' \(data\.known_before_outcome\) is not in 'bad\.csv'; remove it from "
                 r"data\.known_before_outcome", id="known-column-missing"),
    pytest.param(known_column_is_target, CONFIG_ERROR,
                 r"config key 'data\.known_before_outcome' lists 'target', which is data\.target, not a feature; "
                 r"remove it from data\.known_before_outcome", id="known-column-is-target"),
    pytest.param(grid_above_max_candidates, CONFIG_ERROR,
                 r"the candidate grids expand to 32 candidates, more than max_candidates \(20\); shrink the grids or "
                 r"raise max_candidates", id="grid-above-max-candidates"),
    pytest.param(group_scheme_without_group, CONFIG_ERROR,
                 r"config key 'folds\.scheme' is 'group' but 'data\.group' is not set; name the group column in "
                 r"data\.group or choose another scheme", id="group-scheme-without-group"),
    pytest.param(drop_names_missing_column, DATA_ERROR,
                 r"column 'worst_radiuss' \(data\.drop\) is not in 'data\.csv'", id="drop-column-missing"),
    pytest.param(semicolon_csv, DATA_ERROR,
                 r"data file 'bad\.csv' has a single column .*another delimiter than ',' was used: save it as "
                 r"comma-separated CSV or as Parquet", id="csv-semicolon"),
    pytest.param(class_only_in_test, DATA_ERROR,
                 r"target column 'target' has a single class \('1'\) among the development rows of 'bad\.csv'.*"
                 r"use test\.scheme: stratified", id="class-only-in-test"),
    pytest.param(invalid_parameter_value, CONFIG_ERROR,
                 r"config key 'candidates\.tree': a value is not accepted by .*'min_samples_leaf'.*fix params",
                 id="parameter-value-invalid"),
    pytest.param(empty_data_file, DATA_ERROR,
                 r"data file 'bad\.csv' is empty; point data\.path at a file with a header and rows", id="data-empty"),
    pytest.param(unreadable_parquet, DATA_ERROR,
                 r"data file 'bad\.parquet' could not be read \(ArrowInvalid: .*\); check its format",
                 id="data-unreadable"),
    pytest.param(duplicate_column_names, DATA_ERROR,
                 r"data file 'bad\.csv' repeats column name 'mean_radius'; give every column a unique name",
                 id="columns-duplicate"),
    pytest.param(target_single_class, DATA_ERROR, r"target column 'target' .*(one|single) (value|class)",
                 id="target-one-class"),
    pytest.param(text_feature_without_encoder, CONFIG_ERROR,
                 r"config key 'candidates\.tree\.preprocess\.categorical' is none but feature column 'referral' is "
                 r"not numeric; set it to onehot, or list the column in data\.drop", id="text-without-encoder"),
    pytest.param(data_outside_project, CONFIG_ERROR,
                 r"config key 'data\.path': '.*elsewhere\.csv' is outside the project folder .*; copy the file "
                 r"into the project or set data\.allow_outside_project: true", id="data-outside-project"),
    pytest.param(data_in_sealed_folder, CONFIG_ERROR,
                 r"config key 'data\.path': 'results/bc/sealed/test\.parquet' names a file in the sealed folder of "
                 r"experiment folder '.*results/bc', whose rows only that experiment's opening reads; use your own "
                 r"data file", id="data-in-sealed-folder"),
    pytest.param(yaml_alias_bomb, CONFIG_ERROR,
                 r"config expands to more than 100000 values \(nested YAML anchors and aliases\?\)",
                 id="yaml-alias-bomb"),
    pytest.param(k_above_groups, CONFIG_ERROR,
                 r"config key 'folds\.k' is 6 but group column 'clinic' has only 4 groups in the development rows",
                 id="k-above-groups"),
    pytest.param(holdout_fraction_too_small, CONFIG_ERROR,
                 r"config key 'folds\.fraction' is 0\.002: with \d+ development rows it leaves 1 validation and "
                 r"\d+ training row\(s\), fewer than 2 on a side", id="holdout-fraction-too-small"),
    pytest.param(forward_too_little_training, CONFIG_ERROR,
                 r"folds \(forward\): with \d+ development rows, k=5 windows of \d+ and a gap of 0, fold 0 would "
                 r"train on \d+ rows, fewer than folds\.min_train=200", id="forward-min-train"),
    pytest.param(tiny_test_fraction, CONFIG_ERROR,
                 r"config key 'test\.fraction' is 0\.002: with test\.scheme stratified it leaves 1 test and \d+ "
                 r"development row\(s\) of 'data\.csv', fewer than 2 on a side", id="test-fraction-one-row"),
    pytest.param(binary_metric_on_three_classes, CONFIG_ERROR,
                 r"config key 'metrics\[1\]': 'roc_auc' scores two classes but target 'target' has 3 \('0', '1', "
                 r"'2'\) \(scikit-learn: .*\); use roc_auc_ovr instead", id="metric-binary-on-three-classes"),
    pytest.param(default_metrics_on_three_classes, CONFIG_ERROR,
                 r"config key 'metrics' \(not set, so the defaults accuracy, roc_auc, neg_log_loss apply\): 'roc_auc' "
                 r"scores two classes but target 'target' has 3 .*; use roc_auc_ovr instead",
                 id="metric-default-on-three-classes"),
    pytest.param(f1_on_text_labels, CONFIG_ERROR,
                 r"config key 'metrics\[0\]': 'f1' cannot score target 'target' with classes 'benign', 'malignant' "
                 r"\(scikit-learn: pos_label=1 .*\); recode the target as 0 and 1 \(1 = the class of interest\), or "
                 r"use f1_macro", id="metric-positive-label-missing"),
    pytest.param(labels_differ_by_a_space, DATA_ERROR,
                 r"target column 'target' has classes 'benign' \(\d+ rows\) and 'benign ' \(3 rows\) in 'bad\.csv', "
                 r"which differ only in spaces or case; make them one label", id="labels-differ-by-space"),
    pytest.param(labels_differ_by_case, DATA_ERROR,
                 r"target column 'target' has classes 'Malignant' \(2 rows\) and 'malignant' \(\d+ rows\) .*differ "
                 r"only in spaces or case", id="labels-differ-by-case"),
    pytest.param(list_column, DATA_ERROR,
                 r"column 'tags' \(a feature\) of 'bad\.parquet' holds lists or structs \(nested values\), which no "
                 r"model step can use; list it in data\.drop \(possible now: nothing is sealed yet\)",
                 id="column-of-lists"),
    pytest.param(struct_column, DATA_ERROR,
                 r"column 'lab' \(a feature\) of 'bad\.parquet' holds lists or structs .*list it in data\.drop",
                 id="column-of-structs"),
    pytest.param(infinite_target, DATA_ERROR,
                 r"target column 'target' has 1 infinite value\(s\) in 'bad\.csv' \(first at data row 4\); drop or "
                 r"fix those rows before the seal", id="target-infinite"),
    pytest.param(time_in_epoch_seconds, DATA_ERROR,
                 r"time column 'visit_at' of 'bad\.csv' holds numbers \(e\.g\. 1735689600\), not timestamps; set "
                 r"data\.time_unit to s, ms, us or ns", id="time-epoch-seconds"),
    pytest.param(time_unit_on_text_times, DATA_ERROR,
                 r"config key 'data\.time_unit' is s but time column 'visit_at' of 'bad\.csv' does not hold numbers; "
                 r"remove data\.time_unit", id="time-unit-on-text"),
    pytest.param(one_member_class, CONFIG_ERROR,
                 r"folds\.scheme stratified needs at least 2 development rows per class but class '2' of 'target' has "
                 r"1; remove or merge that class's rows in the data file \(before the seal\), or use folds\.scheme: "
                 r"kfold", id="class-of-one-row"),
    pytest.param(third_class_only_in_test, DATA_ERROR,
                 r"class '2' of target column 'target' would be only in the sealed test rows of 'bad\.csv' \(3 "
                 r"row\(s\), none among the development rows\).*use test\.scheme: stratified",
                 id="class-only-in-sealed-rows"),
    pytest.param(sealed_rows_of_one_class, DATA_ERROR,
                 r"the sealed test rows of 'bad\.csv' would hold a single class \('1'\) in \d+ row\(s\), and metric "
                 r"'roc_auc' cannot be computed on them \(scikit-learn: .*\); use test\.scheme: stratified",
                 id="test-rows-one-class"),
    pytest.param(log_error_on_negative_target, CONFIG_ERROR,
                 r"config key 'metrics\[0\]': 'neg_mean_squared_log_error' cannot score target 'target' \(from -\d+ to "
                 r"\d+; scikit-learn: Mean Squared Logarithmic Error cannot be used when targets contain values less "
                 r"than or equal to -1\); choose another metric", id="metric-outside-target-range"),
    pytest.param(grid_of_five_times_sixty, CONFIG_ERROR,
                 r"the candidate grids expand to 777600002 candidates, more than max_candidates \(500\)",
                 id="grid-five-by-sixty"),
    pytest.param(experiment_with_trailing_newline, CONFIG_ERROR,
                 r"config key 'experiment': 'bc\\n' matches .* only in part \(a trailing line break\?\); remove the "
                 r"extra characters", id="experiment-trailing-newline"),
    pytest.param(blank_reopen_reason, CONFIG_ERROR,
                 r"config key 'test\.reopen_reasons\[1\]' is blank or shorter than 10 characters once spaces are "
                 r"removed", id="reopen-reason-blank"),
    pytest.param(repeated_reopen_reason, CONFIG_ERROR,
                 r"config key 'test\.reopen_reasons\[1\]' repeats reopen_reasons\[0\]; each extra opening needs its "
                 r"own written reason", id="reopen-reason-repeated"),
    pytest.param(results_symlink_outside, CONFIG_ERROR,
                 r"'results' is a symbolic link to '.*moved_results', outside the project folder .*; nothing was run",
                 id="results-symlink-outside"),
    pytest.param(experiment_symlink_outside, CONFIG_ERROR,
                 r"'results/fresh' is a symbolic link to '.*elsewhere', outside the project folder",
                 id="experiment-symlink-outside"),
]
# Through the real Snakemake as well (each costs a full start-up): the acceptance list plus
# one case per error class and per place the check happens.
REAL_RUN = {"data-file-missing", "target-column-missing", "target-missing-values", "misspelt-fold-key",
            "k-above-smallest-class", "estimator-os-system", "scorer-unknown",
            "class-only-in-test", "parameter-value-invalid", "experiment-parent-path", "sealed-data-file-deleted",
            "data-outside-project", "holdout-fraction-too-small", "forward-min-train", "k-above-groups",
            "metric-binary-on-three-classes", "time-epoch-seconds", "test-rows-one-class", "grid-five-by-sixty",
            "results-symlink-outside"}
# Through the real `holdfast check`, each in a new process: every case found by trying the workflow as a
# hostile or careless user would (each used to pass the check and fail only after the seal, or not at all).
CLI_RUN = {"metric-binary-on-three-classes", "metric-default-on-three-classes", "metric-positive-label-missing",
           "labels-differ-by-space", "labels-differ-by-case", "column-of-lists", "column-of-structs",
           "target-infinite", "time-epoch-seconds", "time-unit-on-text", "class-of-one-row",
           "class-only-in-sealed-rows", "test-rows-one-class", "metric-outside-target-range", "grid-five-by-sixty",
           "experiment-trailing-newline", "reopen-reason-blank", "reopen-reason-repeated", "results-symlink-outside",
           "experiment-symlink-outside", "feature-numbers-with-words", "feature-is-target",
           "time-column-not-declared"}

# Through the real `holdfast run`, whose full check runs in a child of the command's job worker (holdfast.worker.call,
# holdfast.cli._in_worker): config and data errors, one case per kind of check (data, estimator import, metric, a sealed
# experiment's data); the error must come back as the same line and exit code.
WORKER_RUN = {"target-column-missing", "estimator-os-system", "scorer-unknown", "sealed-data-file-deleted"}


def prepared_case(workdir: Path, edit: Edit) -> dict[str, Any]:
    """The finished experiment's config with one case's edit applied (and written to config.yaml)."""
    config = yaml.safe_load((workdir / "config.yaml").read_text(encoding="utf-8"))
    edit(workdir, config)
    write_config(workdir, config)
    return config


@pytest.mark.parametrize(("edit", "exit_code", "pattern"), CASES)
def test_bad_input_is_refused_before_any_work(bc_copy: Path, monkeypatch: pytest.MonkeyPatch, edit: Edit,
                                              exit_code: int, pattern: str) -> None:
    """Every case, through the parse-time checks the Snakefile runs (holdfast.plan.prepare), in-process."""
    from holdfast.errors import HoldfastError
    from holdfast.plan import prepare

    config = prepared_case(bc_copy, edit)
    before = snapshot(bc_copy / "results")
    monkeypatch.chdir(bc_copy)
    with pytest.raises(HoldfastError) as caught:
        prepare(config, main=True)
    line = caught.value.format_message()
    assert "\n" not in line and line.startswith("holdfast:")
    assert re.search(pattern, line), line
    assert caught.value.exit_code == exit_code, line
    assert snapshot(bc_copy / "results") == before


def _through(runner: str, workdir: Path) -> subprocess.CompletedProcess[str]:
    if runner == "snakemake":
        return run_workflow(workdir)
    return run_cli(workdir, "run", "config.yaml", "--cores", "2")


@pytest.mark.slow
@pytest.mark.parametrize(("runner", "edit", "exit_code", "pattern"),
                         [pytest.param("snakemake", *c.values, id=f"snakemake-{c.id}") for c in CASES
                          if c.id in REAL_RUN]
                         + [pytest.param("holdfast run", *c.values, id=f"holdfast-run-{c.id}") for c in CASES
                            if c.id in WORKER_RUN])
def test_bad_input_stops_the_real_workflow_with_one_line(bc_copy: Path, runner: str, edit: Edit, exit_code: int,
                                                         pattern: str) -> None:
    """A representative subset through the real Snakemake (REAL_RUN) and through `holdfast run`, whose check runs in
    its worker's child (WORKER_RUN): one stderr line, exit code, results/ untouched."""
    prepared_case(bc_copy, edit)
    results = bc_copy / "results"
    before = snapshot(results)
    assert before[0], "the finished experiment must be there to protect"

    result = _through(runner, bc_copy)

    assert_refused(result, exit_code, pattern, results, before)
    assert "worker" not in result.stderr, result.stderr[-3000:]
    assert not (bc_copy / "escape").exists() and not (bc_copy / "results" / "team").exists()


@pytest.mark.slow
@pytest.mark.parametrize(("edit", "exit_code", "pattern"), [c for c in CASES if c.id in CLI_RUN])
def test_bad_input_is_refused_by_holdfast_check(bc_copy: Path, edit: Edit, exit_code: int, pattern: str) -> None:
    """`holdfast check CONFIG` (a new process) refuses with one line and its exit code, and writes nothing.

    The 5 x 60 grid would take hours and gigabytes to expand; the timeout makes a hang a failure.
    """
    prepared_case(bc_copy, edit)
    results = bc_copy / "results"
    before = snapshot(results)

    check = subprocess.run([sys.executable, "-m", "holdfast", "check", "config.yaml"], capture_output=True,
                           text=True, cwd=bc_copy, env={"PYTHONPATH": str(REPO / "scripts"), "PATH": "/usr/bin:/bin"},
                           timeout=300)

    last = last_stderr_line(check.stderr)
    assert check.returncode == exit_code, check.stdout + check.stderr
    assert last.startswith("holdfast:") and re.search(pattern, last), check.stderr
    assert "Traceback" not in check.stderr and check.stdout == "", check.stdout + check.stderr
    assert snapshot(results) == before, "a refused check must not write under results/"


# --- a config file whose YAML would run code -------------------------------------------------------------------------

# What Snakemake 9 says when it cannot load a --configfile; it reads the file itself (yaml.FullLoader, via yte)
# before the Snakefile and any holdfast code run, and names neither the file nor the offending tag.
SNAKEMAKE_CONFIG_REFUSAL = ("Config file is not valid JSON or YAML. In case of YAML, make sure to not mix whitespace "
                            "and tab indentation.")


def tagged_config(workdir: Path, payload: Path) -> Path:
    """The finished experiment's config, its name replaced by a YAML tag that would run ``touch <payload>``."""
    text = (workdir / "config.yaml").read_text(encoding="utf-8")
    first, rest = text.split("\n", 1)
    assert first == "experiment: bc"
    path = workdir / "tagged.yaml"
    path.write_text(f'experiment: !!python/object/apply:os.system ["touch {payload}"]\n{rest}', encoding="utf-8")
    return path


@pytest.mark.slow
def test_configfile_with_code_running_yaml_tag_runs_nothing(bc_copy: Path, tmp_path: Path) -> None:
    """A --configfile with a python/object/apply tag stops the real run; the command never runs, results/ is kept."""
    payload = tmp_path / "pwned"
    tagged = tagged_config(bc_copy, payload)
    live = tmp_path / "live"  # the same text under a loader that runs tags: the payload is a working command
    yaml.load(tagged.read_text(encoding="utf-8").replace(str(payload), str(live)), Loader=yaml.UnsafeLoader)
    assert live.exists() and not payload.exists()
    results = bc_copy / "results"
    before = snapshot(results)

    result = run_workflow(bc_copy, configfile=tagged.name)

    assert result.returncode != 0, result.stderr[-3000:]
    assert not payload.exists(), "the config file's YAML tag ran a command"
    assert snapshot(results) == before, "a bad config file must not write under results/"
    assert last_stderr_line(result.stderr) == SNAKEMAKE_CONFIG_REFUSAL, result.stderr[-3000:]
    assert "Traceback" not in result.stderr, result.stderr[-3000:]
    # holdfast's own reader, which the README gives for checking a config first, names the file and the tag.
    check = subprocess.run([sys.executable, "-m", "holdfast", "check", str(tagged)], capture_output=True, text=True,
                           cwd=bc_copy, env={"PYTHONPATH": str(REPO / "scripts"), "PATH": "/usr/bin:/bin"},
                           timeout=300)
    assert check.returncode == CONFIG_ERROR, check.stdout + check.stderr
    assert check.stderr.startswith(f"holdfast: config error: config file '{tagged}' is not plain YAML")
    assert "python/object/apply:os.system" in check.stderr
    assert not payload.exists() and snapshot(results) == before


@pytest.mark.slow
@pytest.mark.xfail(strict=True, raises=AssertionError, reason=(
    "Snakemake loads --configfile before any holdfast code runs, and its error names neither the file nor the tag"))
def test_configfile_with_code_running_yaml_tag_is_named(bc_copy: Path, tmp_path: Path) -> None:
    """The real run's error names the config file that holds the tag, as holdfast's own messages name files."""
    tagged = tagged_config(bc_copy, tmp_path / "pwned")
    result = run_workflow(bc_copy, configfile=tagged.name)
    assert result.returncode != 0
    error = result.stderr[result.stderr.rfind("Error"):]  # the error block, after Snakemake's header
    assert tagged.name in error, result.stderr[-3000:]
