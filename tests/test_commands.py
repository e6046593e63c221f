"""The everyday commands through the real CLI on real runs: status, predict, init, log, list and compare.

Numbers shown are checked against the JSON files they come from (through holdfast.display, as people read
them); predictions against the model's own predict and against scikit-learn refit from the provenance record.
"""

from __future__ import annotations

import importlib
import json
import shutil
import subprocess
import sys
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
import yaml
from conftest import breast_cancer_frame, private_copy, run_cli, tree_digest, write_config
from holdfast import display, ledger
from holdfast.commands.predict import NEVER_OPENED
from holdfast.commands.starter import words
from holdfast.commands.timeline import DIRECTION
from holdfast.recorded import RECORDED

REPO = Path(__file__).resolve().parents[1]


def one_error_line(result: Any, code: int, *parts: str) -> str:
    """The command failed with ``code`` and said so in exactly one line naming each of ``parts``."""
    assert result.returncode == code, result.stdout + result.stderr
    line = result.stderr.strip()
    assert "\n" not in line, line
    assert line.startswith("holdfast: "), line
    for part in parts:
        assert part in line, line
    return line


def read(exp: Path, name: str) -> Any:
    return json.loads((exp / name).read_text(encoding="utf-8"))


def entries_of(exp: Path) -> list[dict[str, Any]]:
    return ledger.read(exp / "ledger.jsonl")


def when(stamp: str) -> str:
    return f"{stamp[:10]} {stamp[11:19]} UTC"


# ----------------------------------------------------------------------------------------------------------------
# A fresh experiment that was run and never opened: scikit-learn's diabetes data (regression) with its 'sex'
# column written as text, so predict meets a text feature, and an id column.

def diabetes_with_text() -> pd.DataFrame:
    from sklearn.datasets import load_diabetes

    frame = load_diabetes(as_frame=True, scaled=False).frame
    frame["sex"] = frame["sex"].map({1.0: "one", 2.0: "two"})
    frame.insert(0, "visit_id", [f"V{i:03d}" for i in range(len(frame))])
    return frame


def diabetes_config() -> dict[str, Any]:
    return {
        "experiment": "diab",
        "data": {"path": "diab.csv", "target": "target", "id": "visit_id", "unit": "points"},
        "test": {"fraction": 0.25, "scheme": "hashed", "salt": "d1"},
        "folds": {"scheme": "kfold", "k": 3, "seed": 2},
        "candidates": {
            "ridge": {"estimator": "sklearn.linear_model.Ridge", "preprocess": {"scale": "standard"},
                      "grid": {"alpha": [1.0, 10.0]}},
            "tree": {"estimator": "sklearn.tree.DecisionTreeRegressor", "params": {"random_state": 0},
                     "grid": {"max_depth": [2, 3]}},
        },
    }


@pytest.fixture(scope="module")
def fresh(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A regression experiment run with `holdfast run` and never opened (copy it before changing it)."""
    work = tmp_path_factory.mktemp("fresh")
    diabetes_with_text().to_csv(work / "diab.csv", index=False)
    write_config(work, diabetes_config())
    result = run_cli(work, "run", "config.yaml", "--cores", "2")
    assert result.returncode == 0, result.stdout[-3000:] + result.stderr[-3000:]
    return work


@pytest.fixture
def fresh_copy(fresh: Path, tmp_path: Path) -> Path:
    return private_copy(fresh, tmp_path / "fresh-work")


# ----------------------------------------------------------------------------------------------------------------
# holdfast --help

def test_help_lists_every_command_with_one_line() -> None:
    result = run_cli(REPO, "--help")
    assert result.returncode == 0
    listed = {}
    for line in result.stdout.splitlines():
        parts = line.split(maxsplit=1)
        if line.startswith("    ") and not line.startswith("      ") and len(parts) == 2:
            listed[parts[0]] = parts[1]
    for command in ("run", "open", "audit", "check", "status", "predict", "init", "log", "list", "compare"):
        assert command in listed, result.stdout
    version = run_cli(REPO, "--version")
    assert version.returncode == 0 and version.stdout.startswith("holdfast ")


# ----------------------------------------------------------------------------------------------------------------
# holdfast status

def status_fields(stdout: str) -> dict[str, list[str]]:
    """The status lines by label (continuation lines go to the label above)."""
    out: dict[str, list[str]] = {}
    label = ""
    for line in stdout.splitlines()[1:]:
        head, _, rest = line.strip().partition(": ")
        if line.startswith("  ") and not line.startswith("   ") and head and rest:
            label = head
            out[label] = [rest.strip()]
        else:
            out[label].append(line.strip())
    return out


@pytest.mark.slow
def test_status_of_an_opened_experiment_shows_the_files_numbers_and_writes_nothing(bc_finished: Path) -> None:
    exp = bc_finished / "results" / "bc"
    before = tree_digest(exp)
    result = run_cli(bc_finished, "status", "results/bc")
    assert result.returncode == 0, result.stderr
    assert tree_digest(exp) == before, "status wrote into the experiment"
    fields = status_fields(result.stdout)
    choice, verdict = read(exp, "choice.json"), read(exp, "final/verdict.json")
    metric = choice["metric"]
    # 2 families x 3 stratified folds in the config (conftest.small_classification_config)
    assert fields["fit jobs"][0].startswith("6 of 6 done (2 family(ies) x 3 fold(s)")
    assert fields["rounds"] == [f"{choice['rounds']['count']} selection round(s), "
                                f"{choice['rounds']['candidates_tried']} candidate(s) tried in all"]
    winner = choice["winner"]
    assert fields["winner"][0] == (
        f"{winner['family']} {winner['candidate']} by best mean: CV {display.named(metric, winner['mean'])} "
        f"(corrected for selection: BBC-CV {display.number(metric, choice['optimism']['bbc']['corrected'])}, "
        f"Tibshirani–Tibshirani {display.number(metric, choice['optimism']['tibshirani']['corrected'])})")
    opened = ledger.events(entries_of(exp), "open_test")[-1]
    block = verdict["metrics"][metric]
    assert fields["test set"] == [
        "opened 1 time(s)",
        f"opening 1 at {when(opened['time'])}, model {winner['family']} {winner['candidate']} (model file sha256 "
        f"{opened['details']['model_sha256'][:8]})",
        f"test {display.named(metric, block['test'])}, 95% interval "
        f"{display.interval(metric, *block['interval'])} on {verdict['test_rows']} sealed rows"]
    assert fields["audit"][0].startswith(f"PASS (made now; {len(entries_of(exp))} ledger entries)")
    assert fields["test split"] == ["hashed 25%: 134 test / 435 development rows"]
    assert fields["folds"] == ["stratified, 3 folds x 1 repeat(s)"]


@pytest.mark.slow
def test_status_of_a_sealed_regression_shows_errors_positive_in_the_unit(fresh: Path) -> None:
    result = run_cli(fresh, "status", "results/diab")
    assert result.returncode == 0, result.stderr
    fields = status_fields(result.stdout)
    choice = read(fresh / "results" / "diab", "choice.json")
    mae = -choice["winner"]["mean"]
    assert mae > 0
    assert f"CV MAE {mae:.4f} points" in fields["winner"][0]
    assert fields["test set"] == ["sealed, not opened (holdfast open results/diab is the one look)"]
    assert fields["fit jobs"][0].startswith("6 of 6 done")


@pytest.mark.slow
def test_status_counts_planned_jobs_of_a_changed_config_and_a_failing_audit(fresh_copy: Path) -> None:
    config = diabetes_config()
    config["candidates"]["knn"] = {"estimator": "sklearn.neighbors.KNeighborsRegressor",
                                   "grid": {"n_neighbors": [5, 15]}}
    write_config(fresh_copy, config)
    dry = run_cli(fresh_copy, "run", "config.yaml", "-n")  # stores the checked config, runs nothing
    assert dry.returncode == 0, dry.stdout + dry.stderr
    fields = status_fields(run_cli(fresh_copy, "status", "results/diab").stdout)
    assert fields["fit jobs"][0].startswith("6 of 9 done (3 family(ies) x 3 fold(s)")
    # A changed choice.json: the audit fails, and no number of the edited file is shown.
    exp = fresh_copy / "results" / "diab"
    choice = read(exp, "choice.json")
    choice["winner"]["mean"] = -1.25
    (exp / "choice.json").write_text(json.dumps(choice), encoding="utf-8")
    result = run_cli(fresh_copy, "status", "results/diab")
    assert result.returncode == 0
    fields = status_fields(result.stdout)
    assert fields["audit"][0].startswith("FAIL (choice-changed")
    assert fields["winner"] == ["not shown: the audit fails: a failing record vouches for no number"]
    assert "1.25" not in result.stdout


def test_status_of_an_unknown_folder_is_one_line(tmp_path: Path) -> None:
    one_error_line(run_cli(tmp_path, "status", "results/nope"), 2, "'results/nope' does not exist")
    (tmp_path / "plain").mkdir()
    one_error_line(run_cli(tmp_path, "status", "plain"), 2, "'plain' is not an experiment folder")


# ----------------------------------------------------------------------------------------------------------------
# holdfast log

def test_every_recorded_hash_has_a_direction_in_the_timeline() -> None:
    missing = [(row.event, row.key) for row in RECORDED if (row.event, row.key) not in DIRECTION]
    assert not missing, f"add these to holdfast.commands.timeline.DIRECTION: {missing}"


@pytest.mark.slow
def test_log_is_one_line_per_entry_naming_files_read_and_written(bc_finished: Path) -> None:
    exp = bc_finished / "results" / "bc"
    entries = entries_of(exp)
    result = run_cli(bc_finished, "log", "results/bc")
    assert result.returncode == 0, result.stderr
    lines = result.stdout.splitlines()
    assert lines[0].startswith(f"ledger of 'results/bc': {len(entries)} entries, chain intact")
    body = lines[1:]
    assert len(body) == len(entries)
    for entry, line in zip(entries, body, strict=True):
        assert line.split()[0] == str(entry["seq"])
        assert when(entry["time"]) in line and f" {entry['event']} " in line
        d = entry["details"]
        if entry["event"] == "fit":
            f = f"r{d['repeat']}f{d['fold']}.parquet"
            best = d["best"]
            assert f"best on this fold {display.named(best['metric'], best['score'])} ({best['candidate']})" in line
            assert f"read folds.parquet ({d['folds_sha256'][:8]})" in line
            assert (f"wrote fits/{d['family']}/{f} ({d['fits_sha256'][:8]}), oof/{d['family']}/{f} "
                    f"({d['oof_sha256'][:8]})") in line
        if entry["event"] == "refit":
            assert f"read choice.json ({d['choice_sha256'][:8]}), dev.parquet ({d['dev_sha256'][:8]})" in line
            assert f"wrote model/model.skops ({d['model_sha256'][:8]}), model/provenance.json" in line
        if entry["event"] == "seal":
            assert f"read data.csv ({d['data_sha256'][:8]})" in line
            assert f"wrote sealed/test.parquet ({d['files']['test.parquet'][:8]})" in line
        if entry["event"] == "open_test":
            assert f"wrote final/verdict.json + final/openings/1.json ({d['verdict_sha256'][:8]})" in line
    every = run_cli(bc_finished, "log", "results/bc", "--all")
    assert every.returncode == 0
    for entry in entries:
        assert f'hash: "{entry["hash"]}"' in every.stdout
        assert f'prev: "{entry["prev"]}"' in every.stdout


def test_a_fit_line_written_before_best_scores_were_recorded_is_not_called_failed() -> None:
    from holdfast.commands.timeline import line
    from holdfast.progress import Tracker

    entry = {"seq": 3, "time": "2026-01-02T03:04:05.000001Z", "event": "fit",
             "details": {"scope": "main", "family": "tree", "repeat": 0, "fold": 1, "candidates": 2, "failed": 0,
                         "folds_sha256": "a" * 64, "fits_sha256": "b" * 64, "oof_sha256": "c" * 64}}
    assert line(entry, Tracker()) == (
        "   3  2026-01-02 03:04:05 UTC  fit              fit tree r0f1: 2 candidate(s), 0 failed | read "
        "folds.parquet (aaaaaaaa) | wrote fits/tree/r0f1.parquet (bbbbbbbb), oof/tree/r0f1.parquet (cccccccc)")


@pytest.mark.slow
def test_log_of_an_edited_ledger_says_so_and_exits_1(bc_copy: Path) -> None:
    path = bc_copy / "results" / "bc" / "ledger.jsonl"
    lines = path.read_text(encoding="utf-8").splitlines()
    entry = json.loads(lines[3])
    entry["details"]["n_train"] = 1
    lines[3] = json.dumps(entry, sort_keys=True, separators=(",", ":"))
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    result = run_cli(bc_copy, "log", "results/bc")
    assert result.returncode == 1
    assert "chain BROKEN (1 problem(s))" in result.stdout.splitlines()[0]
    assert "[edited-line] ledger line 4 (seq 3" in result.stdout


def test_log_of_an_unknown_folder_is_one_line(tmp_path: Path) -> None:
    one_error_line(run_cli(tmp_path, "log", "results/x"), 2, "'results/x' does not exist")


# ----------------------------------------------------------------------------------------------------------------
# holdfast predict

def reference_pipeline(spec: dict[str, Any], x: pd.DataFrame) -> Any:
    """The candidate rebuilt from its spec with scikit-learn's own classes, as config/README.md describes the
    preprocessing: numbers imputed (and scaled), text imputed with the most frequent value and one-hot encoded.

    Outside reference: scikit-learn's Pipeline, ColumnTransformer, SimpleImputer, StandardScaler, OneHotEncoder
    and the estimator itself (Pedregosa et al., "Scikit-learn: Machine Learning in Python", JMLR 12, 2011;
    user guide section "Pipelines and composite estimators").
    """
    from sklearn.compose import ColumnTransformer
    from sklearn.impute import SimpleImputer
    from sklearn.pipeline import Pipeline
    from sklearn.preprocessing import OneHotEncoder, StandardScaler

    numeric = [c for c in x.columns if pd.api.types.is_numeric_dtype(x[c])]
    text = [c for c in x.columns if c not in numeric]
    prep = spec["preprocess"]
    steps = [("impute", SimpleImputer(strategy=prep["impute"]))] if prep["impute"] != "none" else []
    if prep["scale"] == "standard":
        steps.append(("scale", StandardScaler()))
    parts = [("numbers", Pipeline(steps), numeric)]
    if text:
        parts.append(("text", Pipeline([("impute", SimpleImputer(strategy="most_frequent")),
                                        ("onehot", OneHotEncoder(handle_unknown="ignore", sparse_output=False))]),
                      text))
    module, name = spec["estimator"].rsplit(".", 1)
    estimator = getattr(importlib.import_module(module), name)(**spec["params"])
    return Pipeline([("prepare", ColumnTransformer(parts)), ("model", estimator)])


def trusted_model(exp: Path) -> Any:
    """The model through holdfast's trusted loader, with the sha256 and types the ledger's refit line recorded."""
    from holdfast.refit import load_model

    refit = ledger.events(entries_of(exp), "refit")[-1]["details"]
    return load_model(str(exp / "model" / "model.skops"), refit["model_sha256"], refit["model_types"])


def new_rows(exp: Path, n: int, extra: bool = True) -> pd.DataFrame:
    """New rows for the model: development rows without their target, features moved a little, columns shuffled."""
    provenance = read(exp, "model/provenance.json")
    dev = pd.read_parquet(exp / "dev.parquet").drop(columns=["row_key", provenance["trained_on"]["target"]])
    rows = dev.head(n).copy()
    for column in rows.columns:
        if pd.api.types.is_float_dtype(rows[column]):
            rows[column] = rows[column] * 1.03
    if extra:
        rows["comment"] = "unused"
    return rows[list(reversed(rows.columns))]


def test_predict_reads_true_false_columns_with_blanks_and_names_other_values(tmp_path: Path) -> None:
    from holdfast.commands.predict import NUMBERS, TEXT, TRUTH, check_columns
    from holdfast.errors import DataError

    (tmp_path / "n.csv").write_text("flag,size,kind\nTrue,1,x\n,2,y\nFalse,3,\n", encoding="utf-8")
    frame = pd.read_csv(tmp_path / "n.csv", dtype={"kind": str})
    x = check_columns(frame, {"flag": TRUTH, "size": NUMBERS, "kind": TEXT}, tmp_path / "n.csv")
    assert x["flag"].tolist()[0::2] == [1.0, 0.0] and np.isnan(x["flag"].iloc[1])
    frame["flag"] = ["yes", "no", "no"]
    with pytest.raises(DataError, match=r"column 'flag' of .* holds other values \(e.g. 'yes' in data row 1\)"):
        check_columns(frame, {"flag": TRUTH}, tmp_path / "n.csv")


@pytest.mark.slow
def test_predict_with_an_opened_classifier_matches_its_model_and_scikit_learn(bc_finished: Path,
                                                                              tmp_path: Path) -> None:
    exp = bc_finished / "results" / "bc"
    before = tree_digest(exp)
    rows = new_rows(exp, 40)
    rows.to_csv(tmp_path / "new.csv", index=False)
    out = tmp_path / "predictions.csv"
    result = run_cli(bc_finished, "predict", "results/bc", str(tmp_path / "new.csv"), "-o", str(out))
    assert result.returncode == 0, result.stderr
    assert tree_digest(exp) == before
    written = pd.read_csv(out)
    model = trusted_model(exp)
    provenance = read(exp, "model/provenance.json")
    features = provenance["trained_on"]["features"]
    assert list(written.columns) == ["patient", "prediction", *(f"proba_{c}" for c in model.classes_)]
    assert written["patient"].tolist() == rows["patient"].tolist()
    x = pd.read_csv(tmp_path / "new.csv")[features]
    np.testing.assert_array_equal(written["prediction"], model.predict(x))
    np.testing.assert_allclose(written[[f"proba_{c}" for c in model.classes_]], model.predict_proba(x), rtol=1e-12)
    # Outside reference: the winner's spec refit with scikit-learn on the development rows (see reference_pipeline).
    dev = pd.read_parquet(exp / "dev.parquet")
    reference = reference_pipeline(provenance["candidate"], dev[features]).fit(dev[features], dev["target"])
    np.testing.assert_array_equal(written["prediction"], reference.predict(x))
    np.testing.assert_allclose(written[[f"proba_{c}" for c in model.classes_]], reference.predict_proba(x),
                               rtol=1e-9, atol=1e-12)
    verdict, metric = read(exp, "final/verdict.json"), provenance["selected_by"]["metric"]
    block = verdict["metrics"][metric]
    opened = ledger.events(entries_of(exp), "open_test")[-1]
    assert result.stdout.splitlines() == [
        f"holdfast: wrote 40 prediction(s) of model {provenance['candidate']['family']} "
        f"{provenance['candidate']['id']} (refit on 435 development rows) to {out}: id column 'patient', "
        f"prediction, proba_0, proba_1",
        "holdfast: note: ignored column(s) the model does not use: 'comment'",
        f"holdfast: the test set was opened for this model at {when(opened['time'])}: test "
        f"{display.named(metric, block['test'])}, 95% interval {display.interval(metric, *block['interval'])} on "
        f"{verdict['test_rows']} sealed rows, an estimate for rows like the development data"]


@pytest.mark.slow
def test_predict_with_a_never_opened_regression_says_no_honest_estimate_exists(fresh: Path, tmp_path: Path) -> None:
    exp = fresh / "results" / "diab"
    rows = new_rows(exp, 30, extra=False)
    rows.to_csv(tmp_path / "new.csv", index=False)
    result = run_cli(fresh, "predict", "results/diab", str(tmp_path / "new.csv"), "-o", str(tmp_path / "p.parquet"))
    assert result.returncode == 0, result.stderr
    assert f"holdfast: {NEVER_OPENED}" in result.stdout.splitlines()
    written = pd.read_parquet(tmp_path / "p.parquet")
    assert list(written.columns) == ["visit_id", "prediction"]
    provenance = read(exp, "model/provenance.json")
    features = provenance["trained_on"]["features"]
    x = pd.read_csv(tmp_path / "new.csv")[features]
    assert x["sex"].dtype != np.float64  # the text feature reached the model as text
    np.testing.assert_allclose(written["prediction"], trusted_model(exp).predict(x), rtol=1e-12)
    dev = pd.read_parquet(exp / "dev.parquet")
    reference = reference_pipeline(provenance["candidate"], dev[features]).fit(dev[features], dev["target"])
    np.testing.assert_allclose(written["prediction"], reference.predict(x), rtol=1e-9)


def test_predict_names_the_file_when_the_model_cannot_take_a_value() -> None:
    """A real scikit-learn pipeline with nothing to impute blanks: its own ValueError becomes one named DataError."""
    from holdfast.commands.predict import model_outputs
    from holdfast.errors import DataError
    from sklearn.linear_model import LogisticRegression

    x = pd.DataFrame({"a": [0.0, 1.0, 2.0, 3.0]})
    model = LogisticRegression().fit(x, [0, 0, 1, 1])
    with pytest.raises(DataError, match=r"cannot predict the rows of 'new\.csv' \(scikit-learn: Input X contains NaN"):
        model_outputs(model, pd.DataFrame({"a": [1.0, np.nan]}), True, Path("new.csv"))
    prediction, proba = model_outputs(model, x, True, Path("new.csv"))
    np.testing.assert_array_equal(prediction, model.predict(x))
    np.testing.assert_array_equal(proba, model.predict_proba(x))
    assert model_outputs(model, x, False, Path("new.csv"))[1] is None


@pytest.mark.slow
def test_predict_refuses_bad_new_files_in_one_line_and_writes_nothing(fresh: Path, tmp_path: Path) -> None:
    exp = fresh / "results" / "diab"
    rows = new_rows(exp, 10, extra=False)
    out = tmp_path / "p.csv"

    def predict(frame: pd.DataFrame, name: str) -> Any:
        path = tmp_path / name
        frame.to_parquet(path, index=False) if name.endswith(".parquet") else frame.to_csv(path, index=False)
        return run_cli(fresh, "predict", "results/diab", str(path), "-o", str(out))

    one_error_line(predict(rows.drop(columns=["bmi"]), "a.csv"), 3, "lacks feature column(s) 'bmi'")
    bad = rows.astype({"bp": object})
    bad.loc[bad.index[2], "bp"] = "high"
    one_error_line(predict(bad, "b.csv"), 3, "column 'bp'", "holds text (e.g. 'high' in data row 3)",
                   "trained on numbers")
    one_error_line(predict(rows.assign(sex=rows["sex"].map({"one": 1, "two": 2})), "c.parquet"), 3,
                   "column 'sex'", "trained on text")
    one_error_line(predict(rows.assign(bmi=rows["bmi"] > 30), "d.parquet"), 3, "column 'bmi'",
                   "holds true/false values but the model was trained on numbers")
    infinite = rows.copy()
    infinite.loc[infinite.index[3], "bmi"] = np.inf  # written as 'inf', which pandas reads back as infinity
    one_error_line(predict(infinite, "f.csv"), 3, "column 'bmi'", "has 1 infinite value(s) (first in data row 4)",
                   "trained on finite numbers")
    one_error_line(run_cli(fresh, "predict", "results/diab", str(tmp_path / "none.csv"), "-o", str(out)), 3,
                   "'", "none.csv' does not exist")
    assert not out.exists()
    out.write_text("keep me", encoding="utf-8")
    one_error_line(predict(rows, "e.csv"), 2, f"output '{out}' exists")
    assert out.read_text(encoding="utf-8") == "keep me"
    one_error_line(run_cli(fresh, "predict", "results/other", str(tmp_path / "e.csv"), "-o", str(tmp_path / "q.csv")),
                   2, "'results/other' does not exist")


@pytest.mark.slow
def test_predict_refuses_sealed_test_rows_before_the_opening(fresh_copy: Path, bc_finished: Path,
                                                             tmp_path: Path) -> None:
    """The experiment's own data file holds its sealed rows: their predictions beside the outcomes in that file would
    be a look at the test set that no ledger line records, so predict refuses them until the opening."""
    exp = fresh_copy / "results" / "diab"
    sealed = read(exp, "sealed/manifest.json")["counts"]["test"]
    before = tree_digest(exp)
    out = tmp_path / "p.csv"
    whole = run_cli(fresh_copy, "predict", "results/diab", "diab.csv", "-o", str(out))
    rows = len(pd.read_csv(fresh_copy / "diab.csv"))
    one_error_line(whole, 4, f"{sealed} of the {rows} rows of 'diab.csv' are sealed test rows",
                   f"(matched {sealed} by equal values in every feature, {sealed} by id column 'visit_id')",
                   "open the test set first")
    # An edited id does not make a sealed row new: its feature values still match.
    edited = pd.read_csv(fresh_copy / "diab.csv").assign(visit_id=lambda f: f["visit_id"].astype(str) + "-x")
    edited.to_csv(tmp_path / "edited.csv", index=False)
    one_error_line(run_cli(fresh_copy, "predict", "results/diab", str(tmp_path / "edited.csv"), "-o", str(out)), 4,
                   f"{sealed} of the {rows} rows", f"(matched {sealed} by equal values in every feature, 0 by id")
    data = pd.read_csv(fresh_copy / "diab.csv").drop(columns=["visit_id", "target"]).sample(frac=1.0, random_state=0)
    data.to_csv(tmp_path / "no-id.csv", index=False)
    one_error_line(run_cli(fresh_copy, "predict", "results/diab", str(tmp_path / "no-id.csv"), "-o", str(out)), 4,
                   f"{sealed} of the {len(data)} rows", f"(matched {sealed} by equal values in every feature)")
    (tmp_path / "link.parquet").symlink_to(exp / "sealed" / "test.parquet")
    for sealed_file in ("results/diab/sealed/test.parquet", str(tmp_path / "link.parquet")):
        one_error_line(run_cli(fresh_copy, "predict", "results/diab", sealed_file, "-o", str(out)), 4,
                       f"is in the sealed folder of experiment folder '{exp.resolve()}', whose rows only "
                       "that experiment's opening reads")
    one_error_line(run_cli(fresh_copy, "init", str(tmp_path / "link.parquet"), "--target", "target", "-o",
                           str(tmp_path / "starter.yaml")), 4, "is in the sealed folder of experiment folder")
    assert not (tmp_path / "starter.yaml").exists()
    assert not out.exists() and tree_digest(exp) == before
    # Development rows pass; without the data file the check cannot be made, and the output says so.
    new_rows(exp, 5, extra=False).to_csv(tmp_path / "dev.csv", index=False)
    (fresh_copy / "diab.csv").rename(fresh_copy / "moved.csv")
    moved = run_cli(fresh_copy, "predict", "results/diab", str(tmp_path / "dev.csv"), "-o", str(out))
    assert moved.returncode == 0, moved.stderr
    assert ("holdfast: note: could not check that these rows hold none of the sealed test rows: its data file "
            "'diab.csv' is not there; keep the sealed rows out of files you predict until the test set is opened"
            in moved.stdout.splitlines())
    # The whole file under its new name holds every column the seal kept: its rows are matched by the seal's row
    # hashes, so moving the data file does not let its sealed rows through.
    whole_out = tmp_path / "whole.csv"
    one_error_line(run_cli(fresh_copy, "predict", "results/diab", "moved.csv", "-o", str(whole_out)), 4,
                   f"{sealed} of the {rows} rows of 'moved.csv' are sealed test rows",
                   f"matched {sealed} by equal values in every column of the data file, found with the seal's row "
                   "hashes since its data file 'diab.csv' is not there")
    assert not whole_out.exists()
    # After the opening the sealed rows were looked at once, on the record: predicting them is no new look.
    opened = run_cli(bc_finished, "predict", "results/bc", "data.csv", "-o", str(tmp_path / "bc.csv"))
    assert opened.returncode == 0, opened.stderr
    assert len(pd.read_csv(tmp_path / "bc.csv")) == len(pd.read_csv(bc_finished / "data.csv"))


@pytest.mark.slow
def test_a_second_split_of_the_same_file_may_not_fit_on_unopened_test_rows(fresh_copy: Path) -> None:
    """Experiment diab is sealed and never opened. A second experiment on diab.csv with another test.salt would fit
    on diab's sealed rows, and diab's opening would then score rows already used to choose: refused, nothing
    written. With diab's own test settings both seal the same rows, which is allowed."""
    config = {**diabetes_config(), "experiment": "diab2"}
    config["test"] = {**config["test"], "salt": "another"}
    write_config(fresh_copy, config, "second.yaml")
    before = tree_digest(fresh_copy / "results")
    for command in (["check", "second.yaml"], ["run", "second.yaml", "--cores", "2"]):
        line = one_error_line(run_cli(fresh_copy, *command), 4, "development rows of experiment 'diab2' are sealed "
                              "test rows of experiment 'diab', which sealed the same data file and has not been "
                              "opened", "Nothing was sealed", "(data.id 'visit_id', test.scheme 'hashed', "
                              "test.fraction 0.25, test.salt 'd1')")
        shared = int(line.split("holdfast: sealed test set: ")[1].split(" of the ")[0])
        assert shared > 0
    assert tree_digest(fresh_copy / "results") == before and not (fresh_copy / "results" / "diab2").exists()
    # Another target of the same file is another question (as the demo's regression twin): left alone.
    twin = {**config, "experiment": "diab-bp", "data": {**config["data"], "target": "bp", "drop": ["target"]}}
    write_config(fresh_copy, twin, "twin.yaml")
    other_target = run_cli(fresh_copy, "check", "twin.yaml")
    assert other_target.returncode == 0, other_target.stderr
    # With diab's test settings both seal the same rows; holdfast init beside it writes them itself (it would
    # otherwise draw a salt of its own).
    diab_settings_pass_and_init_keeps_them(fresh_copy, config, "second.yaml", "diab.csv")
    assert run_cli(fresh_copy, "check", "starter.yaml").returncode == 0


def diab_settings_pass_and_init_keeps_them(workdir: Path, config: dict[str, Any], name: str, data: str) -> None:
    """``config`` with diab's test salt passes the check; ``holdfast init`` on ``data`` writes diab's id and test
    settings (hashed, 0.25, 'd1') to starter.yaml and says whose they are."""
    config["test"]["salt"] = "d1"
    write_config(workdir, config, name)
    same = run_cli(workdir, "check", name)
    assert same.returncode == 0, same.stderr
    started = run_cli(workdir, "init", data, "--target", "target", "-o", "starter.yaml")
    assert started.returncode == 0, started.stdout + started.stderr
    text = (workdir / "starter.yaml").read_text(encoding="utf-8")
    written = yaml.safe_load(text)
    assert written["data"]["id"] == "visit_id"
    assert {k: written["test"][k] for k in ("scheme", "fraction", "salt")} == {"scheme": "hashed", "fraction": 0.25,
                                                                             "salt": "d1"}
    assert "as experiment 'diab' (not opened; it sealed rows of this data)" in text


@pytest.mark.slow
def test_a_grown_or_edited_copy_of_the_data_may_not_fit_on_unopened_test_rows(fresh_copy: Path) -> None:
    """diab (sealed, never opened) sealed rows of diab.csv. A copy of that file with rows shuffled, 20 new rows, a
    column added and whole-number ages written as integers is another file, but its rows are still diab's sealed
    rows: a split with another salt may not fit on them. diab's own settings (hashed by visit_id) seal them here
    too, and holdfast init keeps them. With diab's row-hash file gone the check cannot be made: refused."""
    from holdfast.dataset import row_keys
    from holdfast.seal import split_masks

    original = pd.read_csv(fresh_copy / "diab.csv")
    new = original.sample(20, random_state=3).assign(visit_id=[f"N{i:02d}" for i in range(20)])
    new["bmi"] += 0.25  # new visits: no value row equal to a sealed one
    grown = pd.concat([original, new]).sample(frac=1, random_state=4).assign(clinic="north")
    grown["age"] = grown["age"].round().astype(int)
    assert (original["age"] % 1 == 0).all()  # written as integers, the same values read with another dtype
    grown.to_csv(fresh_copy / "grown.csv", index=False)
    config = {**diabetes_config(), "experiment": "diab-grown"}
    config["data"] = {**config["data"], "path": "grown.csv"}
    config["test"] = {**config["test"], "salt": "another"}
    write_config(fresh_copy, config, "grown.yaml")
    # Expected count, by ids (independent of the row hashes): diab's sealed visit ids among the new development rows.
    sealed_ids = set(pd.read_parquet(fresh_copy / "results" / "diab" / "sealed" / "test.parquet")["visit_id"])
    frame = pd.read_csv(fresh_copy / "grown.csv")
    test_rows, dropped = split_masks(frame, row_keys(frame, "visit_id"), {**config["test"], "task": "regression"},
                                     "regression")
    expected = int(frame.loc[~test_rows & ~dropped, "visit_id"].isin(sealed_ids).sum())
    assert expected > 0
    before = tree_digest(fresh_copy / "results")
    line = one_error_line(run_cli(fresh_copy, "check", "grown.yaml"), 4,
                          f"{expected} of the {int((~test_rows & ~dropped).sum())} development rows of experiment "
                          "'diab-grown' are sealed test rows of experiment 'diab', which sealed rows with the same "
                          "values in every column from 'diab.csv' and has not been opened",
                          "(data.id 'visit_id', test.scheme 'hashed', test.fraction 0.25, test.salt 'd1') so that "
                          "the rows it sealed are sealed here too")
    assert "Nothing was sealed" in line
    assert tree_digest(fresh_copy / "results") == before and not (fresh_copy / "results" / "diab-grown").exists()
    diab_settings_pass_and_init_keeps_them(fresh_copy, config, "grown.yaml", "grown.csv")
    rows_file = fresh_copy / "results" / "diab" / "sealed" / "test_rows.parquet"
    rows_file.unlink()
    config["test"]["salt"] = "another"
    write_config(fresh_copy, config, "grown.yaml")
    one_error_line(run_cli(fresh_copy, "check", "grown.yaml"), 4, "'results/diab/sealed/test_rows.parquet' is missing",
                   "Restore it from a backup, or remove the folder 'results/diab'")


@pytest.mark.slow
def test_a_copy_without_a_column_is_compared_over_features_and_target_or_named(fresh_copy: Path) -> None:
    """A copy of diab.csv without its id column (rows keyed by content, shuffled, another salt) cannot be compared
    over every column diab sealed; its seal also kept hashes over the features and the target, so the copy is
    still refused, with the count diab's sealed visit ids give. A copy without a feature cannot be compared at all:
    it passes, and the check says which experiment it could not compare and why (not silence). A copy with the ids
    renumbered passes with the count of rows equal in features and target; one with diab's settings, no note."""
    from holdfast.dataset import row_keys
    from holdfast.seal import split_masks

    original = pd.read_csv(fresh_copy / "diab.csv").sample(frac=1, random_state=5).reset_index(drop=True)
    ids = original["visit_id"]
    no_id = original.drop(columns=["visit_id"])
    no_id.to_csv(fresh_copy / "no_id.csv", index=False)
    config = {**diabetes_config(), "experiment": "diab-no-id"}
    config["data"] = {k: v for k, v in config["data"].items() if k != "id"} | {"path": "no_id.csv"}
    config["test"] = {**config["test"], "salt": "another"}
    write_config(fresh_copy, config, "no_id.yaml")
    # Expected count by ids kept aside (independent of the row hashes): diab's sealed visits among the development
    # rows the copy's own split gives.
    sealed_ids = set(pd.read_parquet(fresh_copy / "results" / "diab" / "sealed" / "test.parquet")["visit_id"])
    frame = pd.read_csv(fresh_copy / "no_id.csv")
    test_rows, dropped = split_masks(frame, row_keys(frame, None), {**config["test"], "task": "regression"},
                                     "regression")
    development = ~test_rows & ~dropped
    expected = int(ids[development].isin(sealed_ids).sum())
    assert expected > 0
    before = tree_digest(fresh_copy / "results")
    one_error_line(run_cli(fresh_copy, "check", "no_id.yaml"), 4,
                   f"{expected} of the {int(development.sum())} development rows of experiment 'diab-no-id' are "
                   "sealed test rows of experiment 'diab', which sealed rows with the same values in every feature "
                   "and the target from 'diab.csv' (this file lacks 'visit_id', so only the features and target "
                   "were compared) and has not been opened", "Nothing was sealed")
    assert tree_digest(fresh_copy / "results") == before
    # Without the feature bmi no hash of diab's applies: the check passes and names diab and the missing column.
    original.drop(columns=["bmi"]).to_csv(fresh_copy / "no_bmi.csv", index=False)
    config["data"] = {**config["data"], "path": "no_bmi.csv", "id": "visit_id"}
    write_config(fresh_copy, config, "no_bmi.yaml")
    passed = run_cli(fresh_copy, "check", "no_bmi.yaml")
    assert passed.returncode == 0, passed.stderr
    notes = [line for line in passed.stdout.splitlines() if line.startswith("note: ")]
    assert notes == ["note: experiment 'diab' (same target, sealed, not opened): could not be compared with these "
                     "development rows: this data file lacks 'bmi' of the columns it sealed (a feature among them); "
                     "if this data file is a copy of its data, fitting here may use rows its opening will score"], \
        passed.stdout
    # Ids renumbered: no row equals a sealed one in every column, but the copy's development rows equal diab's
    # sealed rows in every feature and the target: passed, with that count in a note.
    renumbered = original.assign(visit_id=[f"R{i:04d}" for i in range(len(original))])
    renumbered.to_csv(fresh_copy / "renumbered.csv", index=False)
    config["data"]["path"] = "renumbered.csv"
    write_config(fresh_copy, config, "renumbered.yaml")
    frame = pd.read_csv(fresh_copy / "renumbered.csv")
    test_rows, dropped = split_masks(frame, row_keys(frame, "visit_id"), {**config["test"], "task": "regression"},
                                     "regression")
    development = ~test_rows & ~dropped
    expected = int(ids[development].isin(sealed_ids).sum())
    assert expected > 0
    noted = run_cli(fresh_copy, "check", "renumbered.yaml")
    assert noted.returncode == 0, noted.stderr
    assert [line for line in noted.stdout.splitlines() if line.startswith("note: ")] == [
        f"note: experiment 'diab' (same target, sealed, not opened): {expected} of these {int(development.sum())} "
        "development rows equal one of its sealed rows in every feature and the target, though not in every column "
        "it sealed; if they are the same records (ids renumbered, another column edited), fitting here uses rows "
        "its opening will score"], noted.stdout
    # A shuffled copy with diab's own test settings seals diab's sealed rows here too: nothing to note.
    original.to_csv(fresh_copy / "shuffled.csv", index=False)
    config["data"]["path"], config["test"]["salt"] = "shuffled.csv", "d1"
    write_config(fresh_copy, config, "shuffled.yaml")
    quiet = run_cli(fresh_copy, "check", "shuffled.yaml")
    assert quiet.returncode == 0 and "note:" not in quiet.stdout, quiet.stdout + quiet.stderr


HOLD_SHARED = """
import sys
from holdfast import ledger
with ledger.locked(sys.argv[1], shared=True):
    print("holding", flush=True)
    sys.stdin.readline()
"""


@pytest.mark.slow
def test_a_second_run_while_one_is_under_way_starts_nothing(fresh_copy: Path) -> None:
    """While a run holds the experiment's steps lock (shared: its command and its steps), a second 'holdfast run'
    of it says so in one line and starts nothing: no Snakemake log, the config copy the first reads unchanged, no
    progress lines of the other run. A dry run too (it would write the config copy as well)."""
    exp = fresh_copy / "results" / "diab"
    config = {**diabetes_config(), "candidates": {"ridge": diabetes_config()["candidates"]["ridge"]}}
    write_config(fresh_copy, config, "edited.yaml")
    copy_before = (exp / "config.json").read_bytes()
    logs_before = sorted(p.name for p in (exp / "logs").iterdir())
    holder = subprocess.Popen([sys.executable, "-c", HOLD_SHARED, str(exp / "steps")], stdin=subprocess.PIPE,
                              stdout=subprocess.PIPE, text=True, env={"PYTHONPATH": str(REPO / "scripts")})
    try:
        assert holder.stdout is not None and holder.stdout.readline().strip() == "holding"
        refused = run_cli(fresh_copy, "run", "edited.yaml", "--cores", "1")
        dry = run_cli(fresh_copy, "run", "edited.yaml", "-n")
    finally:
        holder.communicate("done\n", timeout=30)
    for result in (refused, dry):
        assert result.returncode == 1 and result.stdout == "", result.stdout + result.stderr
    assert dry.stderr == refused.stderr
    assert refused.stderr.splitlines() == [
        "holdfast: busy: another run of experiment 'results/diab' is under way ('holdfast run', or a step of a "
        "Snakemake started by hand), so this run starts nothing (it would replace the config that run reads, and "
        "meet its Snakemake's lock); run again once it has ended ('holdfast status results/diab' shows what it did)"]
    assert (exp / "config.json").read_bytes() == copy_before
    assert sorted(p.name for p in (exp / "logs").iterdir()) == logs_before


@pytest.mark.slow
def test_predict_keys_rows_by_content_without_the_id_and_refuses_a_changed_model(bc_copy: Path,
                                                                                tmp_path: Path) -> None:
    from holdfast.dataset import content_keys

    exp = bc_copy / "results" / "bc"
    rows = new_rows(exp, 5, extra=False).drop(columns=["patient"])
    rows.to_csv(tmp_path / "new.csv", index=False)
    result = run_cli(bc_copy, "predict", "results/bc", str(tmp_path / "new.csv"), "-o", str(tmp_path / "p.csv"))
    assert result.returncode == 0, result.stderr
    written = pd.read_csv(tmp_path / "p.csv")
    assert written["row_key"].tolist() == content_keys(pd.read_csv(tmp_path / "new.csv")).tolist()
    assert "'row_key' made from each row's content (the id column 'patient' is not in the file)" in result.stdout
    model = exp / "model" / "model.skops"
    model.write_bytes(model.read_bytes() + b"\0")
    one_error_line(run_cli(bc_copy, "predict", "results/bc", str(tmp_path / "new.csv"), "-o",
                           str(tmp_path / "q.csv")), 7, f"model file '{model.relative_to(bc_copy)}' has sha256")
    assert not (tmp_path / "q.csv").exists()


# ----------------------------------------------------------------------------------------------------------------
# holdfast init

def config_lines(text: str) -> list[str]:
    """The lines that set a value (not comments, not blank, not a mapping's own header)."""
    return [line for line in text.splitlines() if line.strip() and not line.lstrip().startswith("#")
            and not line.rstrip().endswith(":") and not line.startswith("    ")]


@pytest.mark.parametrize(("name", "parts"), [("shipment_id", ["shipment", "id"]), ("ShipmentID", ["shipment", "id"]),
                                             ("route", ["route"]), ("patientGroup", ["patient", "group"])])
def test_words_of_column_names(name: str, parts: list[str]) -> None:
    assert words(name) == parts


@pytest.mark.slow
def test_init_on_the_demo_data_suggests_its_roles_and_passes_the_check(tmp_path: Path) -> None:
    shutil.copy(REPO / "data_demo" / "shipments.csv", tmp_path / "shipments.csv")
    result = run_cli(tmp_path, "init", "shipments.csv", "--target", "spoiled", "-o", "my.yaml")
    assert result.returncode == 0, result.stderr
    text = (tmp_path / "my.yaml").read_text(encoding="utf-8")
    config = yaml.safe_load(text)
    assert config["data"] == {"path": "shipments.csv", "target": "spoiled", "id": "shipment_id", "group": "route",
                              "time": "departed_at", "drop": []}
    assert config["task"] == "classification"
    assert config["folds"] == {"scheme": "stratified_group", "k": 5, "repeats": 1, "seed": 0}
    assert config["test"]["scheme"] in ("stratified_grouped", "grouped")
    assert config["metrics"][0] == "roc_auc"
    assert set(config["candidates"]) == {"logistic", "forest", "boosting"}
    uncommented = [line for line in config_lines(text) if " # " not in line]
    assert not uncommented, uncommented
    check = run_cli(tmp_path, "check", "my.yaml")
    assert check.returncode == 0, check.stderr
    assert check.stdout.startswith("config OK: experiment 'shipments' (not sealed yet), task classification, "
                                   "7 candidates in 3 families, 5 folds")


@pytest.mark.slow
def test_init_on_breast_cancer_and_diabetes(tmp_path: Path) -> None:
    breast_cancer_frame().to_csv(tmp_path / "bc.csv", index=False)
    result = run_cli(tmp_path, "init", "bc.csv", "--target", "target")
    assert result.returncode == 0, result.stderr
    config = yaml.safe_load((tmp_path / "bc.yaml").read_text(encoding="utf-8"))
    # 'patient' (P0000, P0001, ...) is unique text but not named like an id: not a feature, not the key
    assert config["data"] == {"path": "bc.csv", "target": "target", "id": None, "group": None, "time": None,
                              "drop": ["patient"]}
    assert (config["test"]["scheme"], config["folds"]["scheme"]) == ("stratified", "stratified")
    diabetes_with_text().to_csv(tmp_path / "diab.csv", index=False)
    result = run_cli(tmp_path, "init", "diab.csv", "--target", "target", "-o", "d.yaml")
    assert result.returncode == 0, result.stderr
    config = yaml.safe_load((tmp_path / "d.yaml").read_text(encoding="utf-8"))
    assert config["task"] == "regression" and config["data"]["id"] == "visit_id"
    assert (config["test"]["scheme"], config["folds"]["scheme"]) == ("hashed", "kfold")
    assert config["metrics"] == ["neg_mean_absolute_error", "r2"]
    for name in ("bc.yaml", "d.yaml"):
        check = run_cli(tmp_path, "check", name)
        assert check.returncode == 0, check.stderr


def test_init_leaves_out_what_the_check_before_the_seal_would_refuse(tmp_path: Path,
                                                                      monkeypatch: pytest.MonkeyPatch) -> None:
    """A copy of the target and a note different in almost every row (crafted, beside scikit-learn's breast cancer
    data): the starter config lists both in data.drop with the reason, so it passes the check it is written after."""
    from holdfast.commands.starter import starter

    frame = breast_cancer_frame()
    frame["diagnosis"] = frame["target"].map({0: "malignant", 1: "benign"})
    frame["note"] = [f"seen by {i % 541}" for i in range(len(frame))]  # 541 of 569 different: 95 %
    frame.to_csv(tmp_path / "bc.csv", index=False)
    monkeypatch.chdir(tmp_path)
    text, said = starter(Path("bc.csv"), "target", Path("bc.yaml"))
    assert yaml.safe_load(text)["data"]["drop"] == ["patient", "diagnosis", "note"]
    drops = {line.split("#")[0].strip(): line.split("#", 1)[1].strip() for line in text.splitlines()
             if line.strip().startswith("- ") and "#" in line}
    assert drops["- note"].startswith("a different text value in almost every row")
    assert drops["- diagnosis"] == ("the target fixes it (in all 569 rows where it is filled, each class has one "
                                    "value of it (0 -> 'malignant', 1 -> 'benign')): a copy of the outcome; if it is "
                                    "recorded before the outcome, move it to data.known_before_outcome")
    assert "not features: patient, diagnosis, note" in said[0]


def test_init_bad_inputs_are_one_line_and_replace_nothing(tmp_path: Path) -> None:
    one_error_line(run_cli(tmp_path, "init", "none.csv", "--target", "y"), 3, "data file 'none.csv' does not exist")
    (tmp_path / "semi.csv").write_text("a;b\n1;2\n", encoding="utf-8")
    one_error_line(run_cli(tmp_path, "init", "semi.csv", "--target", "a"), 3, "'semi.csv' has a single column")
    (tmp_path / "empty.csv").write_text("", encoding="utf-8")
    one_error_line(run_cli(tmp_path, "init", "empty.csv", "--target", "a"), 3, "'empty.csv' is empty")
    (tmp_path / "data.xlsx").write_bytes(b"PK\x03\x04")
    one_error_line(run_cli(tmp_path, "init", "data.xlsx", "--target", "a"), 3, "has suffix '.xlsx'")
    (tmp_path / "ok.csv").write_text("x,y\n1,0\n2,1\n", encoding="utf-8")
    one_error_line(run_cli(tmp_path, "init", "ok.csv", "--target", "label"), 3, "column 'label' (--target)")
    (tmp_path / "mine.yaml").write_text("keep: me\n", encoding="utf-8")
    one_error_line(run_cli(tmp_path, "init", "ok.csv", "--target", "y", "-o", "mine.yaml"), 2,
                   "'mine.yaml' exists; holdfast init never replaces a file")
    assert (tmp_path / "mine.yaml").read_text(encoding="utf-8") == "keep: me\n"
    one_error_line(run_cli(tmp_path, "init", "ok.csv", "--target", "y", "-o", "no/such/dir.yaml"), 2,
                   "folder 'no/such' of 'no/such/dir.yaml' does not exist")


def test_init_beside_an_opened_experiment_on_the_same_rows_gives_the_reason_that_stops_every_scheme(
        bc_copy: Path) -> None:
    """Every scheme pair fails on rows whose test set 'bc' opened: the line gives that reason (the last pair's), not
    the first pair's, which was only that whole groups could not keep the classes."""
    one_error_line(run_cli(bc_copy, "init", "data.csv", "--target", "target", "-o", "again.yaml"), 4,
                   "no starter config for 'data.csv' passes the check (",
                   "pairs of test and fold schemes tried); the last, test.scheme stratified with folds.scheme "
                   "stratified: ", "were in a test set already opened by 'bc")
    assert not (bc_copy / "again.yaml").exists()


def test_init_refuses_data_no_config_can_use(tmp_path: Path) -> None:
    """Two rows cannot be sealed and folded: init says why and writes nothing."""
    (tmp_path / "tiny.csv").write_text("x,y\n1,0\n2,1\n", encoding="utf-8")
    line = one_error_line(run_cli(tmp_path, "init", "tiny.csv", "--target", "y"), 2,
                          "no starter config for 'tiny.csv' passes the check")
    assert "test.fraction" in line or "fold" in line
    assert not (tmp_path / "tiny.yaml").exists()


# ----------------------------------------------------------------------------------------------------------------
# holdfast list and holdfast compare

def table_rows(stdout: str) -> list[list[str]]:
    """Cells of a fixed-width table: column starts come from the rule line under the header."""
    lines = stdout.splitlines()
    rule = lines[1]
    starts = [i for i, ch in enumerate(rule) if ch == "-" and (i == 0 or rule[i - 1] == " ")]
    bounds = [*starts[1:], None]
    return [[line[a:b].strip() for a, b in zip(starts, bounds, strict=True)] for line in lines
            if line and not line.startswith("note: ")]


def expected_cells(exp: Path) -> dict[str, str]:
    choice = read(exp, "choice.json")
    metric, unit = choice["metric"], read(exp, "config.json")["data"].get("unit")
    opt = choice["optimism"]
    test = "not opened"
    if (exp / "final" / "verdict.json").exists():
        block = read(exp, "final/verdict.json")["metrics"][metric]
        test = f"{display.number(metric, block['test'], unit)} {display.interval(metric, *block['interval'], unit)}"
    manifest = read(exp, "sealed/manifest.json")
    return {"data": f"{manifest['data']['path']} {manifest['data']['sha256'][:8]}",
            "winner": f"{choice['winner']['family']} {choice['winner']['candidate']}",
            "metric": display.label(metric), "CV": display.number(metric, choice["winner"]["mean"], unit),
            "corrected (BBC-CV)": display.number(metric, opt["bbc"]["corrected"], unit),
            "corrected (Tibshirani–Tibshirani)": display.number(metric, opt["tibshirani"]["corrected"], unit),
            "test [interval]": test, "rounds": str(choice["rounds"]["count"]),
            "tried": str(choice["rounds"]["candidates_tried"]), "audit": "PASS"}


@pytest.mark.slow
def test_list_and_compare_show_the_files_numbers(bc_finished: Path, fresh: Path, tmp_path: Path) -> None:
    results = tmp_path / "results"
    results.mkdir()
    shutil.copytree(bc_finished / "results" / "bc", results / "bc")
    shutil.copytree(fresh / "results" / "diab", results / "diab")
    (results / ".holdfast").mkdir()  # the registry folder is not an experiment
    result = run_cli(tmp_path, "list")
    assert result.returncode == 0, result.stderr
    rows = table_rows(result.stdout)
    header = rows[0]
    assert [r[0] for r in rows[2:]] == ["bc", "diab"]
    for name, cells in zip(("bc", "diab"), rows[2:], strict=True):
        shown = dict(zip(header, cells, strict=True))
        for key, value in expected_cells(results / name).items():
            assert shown[key] == value, (name, key)
    bc = dict(zip(header, rows[2], strict=True))
    assert (bc["test split"], bc["folds"]) == ("hashed 25%", "stratified 3x1")
    assert dict(zip(header, rows[3], strict=True))["CV"].endswith(" points")  # MAE in the target's unit
    notes = [line for line in result.stdout.splitlines() if line.startswith("note: ")]
    assert "note: the experiments were sealed from different data files: their estimates describe different data" \
        in notes
    assert any("different primary metrics (MAE, accuracy)" in n for n in notes)

    compared = run_cli(tmp_path, "compare", "results/bc", "results/diab")
    assert compared.returncode == 0, compared.stderr
    rows = table_rows(compared.stdout)
    assert rows[0] == ["", "bc", "diab"]
    by_field = {r[0]: r[1:] for r in rows[2:]}
    assert by_field["folder"] == ["results/bc", "results/diab"]
    for i, name in enumerate(("bc", "diab")):
        for key, value in expected_cells(results / name).items():
            assert by_field[key][i] == value, (name, key)
    twice = run_cli(tmp_path, "compare", "results/bc", "results/diab", "results/./bc/")
    assert not twice.stdout
    one_error_line(twice, 2, "'results/./bc/' and 'results/bc' are the same experiment folder")


@pytest.mark.slow
def test_list_withholds_numbers_of_a_failing_experiment(fresh_copy: Path) -> None:
    exp = fresh_copy / "results" / "diab"
    (exp / "ranking.parquet").write_bytes((exp / "ranking.parquet").read_bytes() + b"\0")
    rows = table_rows(run_cli(fresh_copy, "list").stdout)
    shown = dict(zip(rows[0], rows[2], strict=True))
    assert shown["audit"].startswith("FAIL (ranking-changed")
    assert shown["CV"] == shown["winner"] == "withheld"


def test_list_and_compare_bad_inputs(tmp_path: Path) -> None:
    one_error_line(run_cli(tmp_path, "list"), 2, "results folder 'results' does not exist")
    (tmp_path / "results").mkdir()
    empty = run_cli(tmp_path, "list")
    assert empty.returncode == 0 and empty.stdout.strip() == "no experiments under 'results'"
    one_error_line(run_cli(tmp_path, "compare", "results/a", "results/b"), 2, "'results/a' does not exist")


def test_a_reader_that_stops_early_ends_the_command_quietly(bc_finished: Path) -> None:
    """`holdfast audit X | head -1`: the pipe closes before the audit writes; no traceback, the shell's SIGPIPE code."""
    import os
    import signal
    import subprocess
    import sys

    env = {**os.environ, "PYTHONPATH": str(Path(__file__).resolve().parents[1] / "scripts")}
    read, write = os.pipe()
    os.close(read)  # the reader is gone before the command prints anything
    try:
        result = subprocess.run([sys.executable, "-m", "holdfast", "audit", "results/bc"], cwd=bc_finished,
                                stdout=write, stderr=subprocess.PIPE, stdin=subprocess.DEVNULL, text=True,
                                timeout=300, env=env)
    finally:
        os.close(write)
    assert result.returncode == 128 + signal.SIGPIPE, result.stderr
    assert "Traceback" not in result.stderr and "BrokenPipe" not in result.stderr, result.stderr
