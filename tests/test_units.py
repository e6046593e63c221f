"""Package functions without Snakemake: keys, the seal split, candidates, a fit job, the model file."""

from __future__ import annotations

import hashlib
import json
import os
import time
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from conftest import breast_cancer_frame
from holdfast import ledger
from holdfast.candidates import build_pipeline, candidate_id, expand_family
from holdfast.dataset import content_keys, hash_unit, infer_task
from holdfast.errors import ConfigError, FitError
from holdfast.fit import fit_family
from holdfast.seal import sealed_mask
from hypothesis import given, settings
from hypothesis import strategies as st
from threadpoolctl import threadpool_limits


def test_candidate_ids_are_stable_and_canonical() -> None:
    # The id is the first 10 hex digits of SHA-256 over the spec as JSON with sorted keys and no spaces;
    # the literal pins it: if it changes, every stored experiment's ids change with it.
    spec = ("sklearn.linear_model.Ridge", {"scale": "standard"}, {"alpha": 1.0})
    text = json.dumps({"estimator": spec[0], "preprocess": spec[1], "params": spec[2]}, sort_keys=True,
                      separators=(",", ":"))
    assert candidate_id(*spec) == hashlib.sha256(text.encode()).hexdigest()[:10] == "e72940042c"
    assert candidate_id(spec[0], spec[1], {"alpha": 2.0}) != candidate_id(*spec)


def test_grid_expansion_merges_fixed_params_with_every_point() -> None:
    family = {"estimator": "sklearn.svm.SVC", "preprocess": {}, "params": {"kernel": "rbf"},
              "grid": {"C": [1, 10], "gamma": [0.1, 1.0, 10.0]}}
    candidates = expand_family("svm", family)
    assert len(candidates) == 6
    assert {json.dumps(c["params"], sort_keys=True) for c in candidates} == {
        json.dumps({"C": c, "gamma": g, "kernel": "rbf"}, sort_keys=True) for c in (1, 10) for g in (0.1, 1.0, 10.0)}
    assert len({c["id"] for c in candidates}) == 6


def test_content_keys_ignore_row_order_and_number_duplicates() -> None:
    frame = pd.DataFrame({"a": [1.5, 2.0, 1.5], "b": ["x", None, "x"]})
    keys = content_keys(frame)
    assert keys.iloc[2] == keys.iloc[0] + "~1"
    assert content_keys(frame.iloc[[1, 0]].reset_index(drop=True)).tolist() == [keys.iloc[1], keys.iloc[0]]


def test_float_text_is_the_text_pandas_writes() -> None:
    """Content keys render floats through Arrow's cast where it writes what pandas' ``astype("string")`` (Python's
    repr) writes: the reference here is pandas itself, on every magnitude, random bit patterns, and the edges of
    the ranges where Python and Arrow switch to an exponent."""
    from holdfast.dataset import _float_text

    # Reference: pandas' own Series.astype("string") (pandas documentation, "Working with text data"), which writes
    # each float as Python's repr: the shortest string that reads back to the same double (Python 3.1 "What's New",
    # float repr; David M. Gay, "Correctly rounded binary-decimal and decimal-binary conversions", 1990), with an
    # exponent below 1e-4 and from 1e16 (Python documentation, "Floating-Point Arithmetic", from memory for the
    # exact thresholds; the edge values below check them).
    rng = np.random.default_rng(11)
    values = np.concatenate([
        rng.integers(0, 2**64, 50_000, dtype=np.uint64).view(np.float64),
        rng.normal(size=50_000) * 10.0 ** rng.integers(-8, 20, 50_000),
        np.round(rng.normal(size=50_000) * 10.0 ** rng.integers(-5, 17, 50_000), 2),
        [0.0, -0.0, 1.0, 0.1, 0.1 + 0.2, 1e-4, np.nextafter(1e-4, 0), 1e16, np.nextafter(1e16, 0), 1e9, 1e10,
         12345678901.0, 5e-324, np.nan, np.inf, -np.inf, 2.0**53, 1e15 + 0.5],
    ])
    expected = pd.Series(values).astype("string").fillna("\x00").astype(str).tolist()
    assert _float_text(values).to_pylist() == expected


def test_content_keys_are_the_keys_holdfast_always_wrote() -> None:
    """Row keys by content must not change between versions (sealed splits and fold tables name them): these were
    written by holdfast at 63feb8d, before floats were rendered through Arrow."""
    frame = pd.DataFrame({"a": [0.1, -0.0, 1e16, 3e-5, np.nan, 12345678901.5, 2.0, 2.0],
                          "b": ["x", "y", None, "z", "x", "y", "x", "x"], "c": [1, 2, 3, 4, 5, 6, 1, 1]})
    assert content_keys(frame).tolist() == [
        "14819154bbd875b64bd2", "e0f0134c5725702004c7", "5688ceebe7f2e586ad8d", "a1b9b3ac6d3d40eba022",
        "b6a326c167daac1d1d78", "14a63ead76bc0517d1a8", "56b66048aae191f565e0", "56b66048aae191f565e0~1"]


def test_content_keys_rendered_in_blocks_are_the_keys_of_the_whole(monkeypatch: pytest.MonkeyPatch) -> None:
    """Rows are rendered a block at a time (memory); identical rows in different blocks are still numbered in row
    order, so the keys equal those of one block."""
    from holdfast import dataset

    rng = np.random.default_rng(5)
    frame = pd.DataFrame({"a": rng.integers(0, 3, 40), "b": rng.choice(["x", "y"], 40), "c": rng.normal(size=40)})
    frame.loc[30:, "c"] = 0.5  # duplicates across blocks
    whole = content_keys(frame)
    monkeypatch.setattr(dataset, "CONTENT_KEY_ROWS", 7)
    assert content_keys(frame).tolist() == whole.tolist()
    assert whole.str.contains("~").sum() > 0


def test_hashed_membership_depends_only_on_key_and_salt() -> None:
    keys = pd.Series([f"id{i}" for i in range(2000)])
    spec = {"fraction": 0.2, "scheme": "hashed", "salt": "s"}
    mask = sealed_mask(keys, None, spec)
    assert 0.17 < mask.mean() < 0.23
    grown = pd.concat([keys, pd.Series([f"new{i}" for i in range(500)])], ignore_index=True)
    assert np.array_equal(sealed_mask(grown, None, spec)[:2000], mask)  # old rows keep their side
    assert not np.array_equal(sealed_mask(keys, None, {**spec, "salt": "t"}), mask)
    assert hash_unit(pd.Series(["id0"]), "s")[0] == hash_unit(pd.Series(["id0"]), "s")[0]


def test_grouped_test_partition_keeps_every_group_on_one_side() -> None:
    groups = pd.Series([f"route{i % 37}" for i in range(3000)])
    keys = pd.Series([f"id{i}" for i in range(3000)])
    mask = sealed_mask(keys, None, {"fraction": 0.25, "scheme": "grouped", "salt": "s"}, groups)
    sealed_groups, dev_groups = set(groups[mask]), set(groups[~mask])
    assert sealed_groups and dev_groups and not sealed_groups & dev_groups
    # a group's side depends only on its own name and the salt
    alone = sealed_mask(keys[:1], None, {"fraction": 0.25, "scheme": "grouped", "salt": "s"}, groups[:1])
    assert bool(alone[0]) == bool(mask[0])


@settings(max_examples=60, deadline=None)
@given(old=st.lists(st.text(min_size=1, max_size=12), min_size=1, max_size=80, unique=True),
       new=st.lists(st.text(min_size=1, max_size=12), max_size=40, unique=True),
       fraction=st.floats(min_value=0.05, max_value=0.95), salt=st.text(min_size=1, max_size=8))
def test_hashed_partitions_keep_old_rows_on_their_side_when_data_grows(old: list[str], new: list[str],
                                                                         fraction: float, salt: str) -> None:
    # Property: appending rows (same salt) never moves an old test row to dev or an old dev row to test.
    grown = old + [k for k in new if k not in set(old)]
    for scheme in ("hashed", "grouped"):
        spec = {"fraction": fraction, "scheme": scheme, "salt": salt}
        before = sealed_mask(pd.Series(old), None, spec, pd.Series(old))
        after = sealed_mask(pd.Series(grown), None, spec, pd.Series(grown))
        assert np.array_equal(after[: len(old)], before)


def test_stratified_test_partition_keeps_class_shares() -> None:
    keys = pd.Series([f"id{i}" for i in range(1000)])
    target = pd.Series([1] * 100 + [0] * 900)
    mask = sealed_mask(keys, target, {"fraction": 0.2, "scheme": "stratified", "salt": "s"})
    assert mask.sum() == 200 and target[mask].sum() == 20


@pytest.mark.parametrize(("values", "task"), [
    ([0, 1, 1, 0], "classification"), (["a", "b", "a", "a"], "classification"), ([True, False, True], "classification"),
    ([0.5, 1.25, 3.0, 2.0], "regression"), (list(range(100)), "regression"),
])
def test_task_inference(values: list[object], task: str) -> None:
    assert infer_task(pd.Series(values)) == task


def test_preprocessing_is_fitted_on_training_rows_only() -> None:
    frame = breast_cancer_frame()
    x = frame.drop(columns=["patient", "target"])
    train = x.iloc[:300]
    candidate = {"id": "c", "family": "f", "estimator": "sklearn.linear_model.LogisticRegression",
                 "preprocess": {"impute": "median", "scale": "standard"}, "params": {"max_iter": 500}}
    model = build_pipeline(candidate, x, 1, ["sklearn"]).fit(train, frame["target"].iloc[:300])
    scaler = model.named_steps["prepare"].named_transformers_["numeric"].named_steps["scale"]
    assert np.allclose(scaler.mean_, train.mean().to_numpy())
    assert not np.allclose(scaler.mean_, x.mean().to_numpy())


def _labelled_frames() -> dict[str, tuple[pd.DataFrame, pd.Series]]:
    """scikit-learn's bundled breast cancer (two classes) and wine (three, as text labels) data, with a text column."""
    from sklearn.datasets import load_wine

    cancer = breast_cancer_frame()
    x2 = cancer.drop(columns=["patient", "target"]).assign(site=np.where(cancer.index % 3 == 0, "north", "south"))
    wine = load_wine(as_frame=True)
    x3 = wine.data.assign(site=np.where(wine.data.index % 2 == 0, "east", "west"))
    return {"two": (x2, cancer["target"]), "three": (x3, wine.target.map({0: "a", 1: "b", 2: "c"}))}


DERIVED = {  # estimator -> what scoring.model_outputs takes from another response instead of calling it
    "sklearn.linear_model.LogisticRegression": {"predict": "decision_function"},
    "sklearn.linear_model.SGDClassifier": {"predict": "decision_function"},
    "sklearn.svm.LinearSVC": {"predict": "decision_function"},
    "sklearn.ensemble.HistGradientBoostingClassifier": {"predict": "decision_function",
                                                        "predict_proba": "decision_function"},
    "sklearn.ensemble.RandomForestClassifier": {"predict": "predict_proba"},
    "sklearn.ensemble.ExtraTreesClassifier": {"predict": "predict_proba"},
    "sklearn.linear_model.RidgeClassifier": {},  # overrides predict (multilabel): not derived
    "sklearn.tree.DecisionTreeClassifier": {},  # normalises probabilities after predict's argmax: not derived
    "sklearn.neighbors.KNeighborsClassifier": {},
}


@pytest.mark.parametrize("estimator", sorted(DERIVED))
@pytest.mark.parametrize("labels", ["two", "three"])
def test_model_outputs_are_exactly_the_pipelines_own_responses(estimator: str, labels: str) -> None:
    # Reference: scikit-learn's Pipeline.predict / predict_proba / decision_function called one by one (what
    # model_outputs did before it transformed once and derived predict); the arrays must be equal bit for bit.
    from holdfast.scoring import RESPONSES, _derivations, model_outputs

    x, y = _labelled_frames()[labels]
    params = {"max_iter": 2000} if "Logistic" in estimator or "LinearSVC" in estimator else {}
    params |= {"n_estimators": 30} if "Forest" in estimator or "Trees" in estimator else {}
    params |= {"max_iter": 30} if "HistGradient" in estimator else {}
    candidate = {"id": "c", "family": "f", "estimator": estimator, "params": params,
                 "preprocess": {"impute": "median", "scale": "standard", "categorical": "onehot"}}
    train = np.arange(len(x)) % 4 != 0
    with threadpool_limits(1):  # OpenMP on a shared machine: one thread is faster than waiting for cores
        model = build_pipeline(candidate, x, 1, ["sklearn"]).fit(x[train], y[train])
    for rows in (x[~train], x[train]):
        got = model_outputs(model, rows)
        expected = {name: np.asarray(getattr(model, name)(rows)) for name in RESPONSES if hasattr(model, name)}
        assert list(got) == list(expected)
        for name, value in expected.items():
            assert got[name].dtype == value.dtype and np.array_equal(got[name], value), (estimator, name)
    taken = {name: source for name, (source, _) in _derivations(model.named_steps["model"]).items()}
    assert taken == DERIVED[estimator]  # the shortcuts are still taken where they were checked


def test_a_subclass_that_overrides_the_source_response_is_called_not_derived() -> None:
    # HistGradientBoostingClassifier.predict and predict_proba read its raw predictions, not decision_function:
    # a subclass that changes decision_function must not have its labels or probabilities derived from it.
    from holdfast.scoring import _derivations, model_outputs
    from sklearn.ensemble import HistGradientBoostingClassifier

    class Shifted(HistGradientBoostingClassifier):
        def decision_function(self, X: Any) -> np.ndarray:  # noqa: N803 - scikit-learn's argument name
            return super().decision_function(X) + 5.0

    x, y = _labelled_frames()["two"]
    x = x.drop(columns=["site"])
    with threadpool_limits(1):
        model = Shifted(max_iter=10).fit(x, y)
    assert _derivations(model) == {}
    got = model_outputs(model, x)
    assert np.array_equal(got["predict"], model.predict(x)) and np.array_equal(got["predict_proba"],
                                                                               model.predict_proba(x))


def test_model_outputs_of_regressors_and_of_no_rows() -> None:
    from holdfast.scoring import model_outputs
    from sklearn.datasets import load_diabetes

    data = load_diabetes(as_frame=True)
    for estimator in ("sklearn.linear_model.Ridge", "sklearn.ensemble.RandomForestRegressor"):
        candidate = {"id": "c", "family": "f", "estimator": estimator, "params": {}, "preprocess": {}}
        model = build_pipeline(candidate, data.data, 1, ["sklearn"]).fit(data.data, data.target)
        assert list(model_outputs(model, data.data)) == ["predict"]
        assert np.array_equal(model_outputs(model, data.data)["predict"], model.predict(data.data))
    x, y = _labelled_frames()["two"]
    candidate = {"id": "c", "family": "f", "estimator": "sklearn.ensemble.RandomForestClassifier",
                 "params": {"n_estimators": 5}, "preprocess": {}}
    model = build_pipeline(candidate, x, 1, ["sklearn"]).fit(x, y)
    for call in (model.predict, lambda rows: model_outputs(model, rows)):  # no rows: the same refusal as before
        with pytest.raises(ValueError, match=r"Found array with 0 sample\(s\)"):
            call(x.iloc[:0])


def test_text_columns_without_an_encoder_are_refused() -> None:
    x = pd.DataFrame({"n": [1.0, 2.0], "colour": ["red", "blue"]})
    candidate = {"id": "c", "family": "f", "estimator": "sklearn.linear_model.Ridge",
                 "preprocess": {"categorical": "none"}, "params": {}}
    with pytest.raises(Exception, match=r"feature column 'colour' is not numeric .* preprocess.categorical"):
        build_pipeline(candidate, x, 1, ["sklearn"])


def _fold_inputs(tmp_path: Path) -> tuple[str, str, dict[str, object]]:
    frame = breast_cancer_frame().rename(columns={"patient": "row_key"})
    frame.to_parquet(tmp_path / "dev.parquet", index=False)
    folds = pd.DataFrame({"row_key": frame["row_key"], "repeat": 0, "fold": np.arange(len(frame)) % 3})
    folds.to_parquet(tmp_path / "folds.parquet", index=False)
    spec = {"target": "target", "id": None, "group": None, "time": None, "drop": []}
    return str(tmp_path / "dev.parquet"), str(tmp_path / "folds.parquet"), spec


def _family(name: str, params_list: list[dict[str, object]]) -> dict[str, object]:
    cands = [{"id": f"c{i}", "family": name, "estimator": "sklearn.linear_model.LogisticRegression",
              "preprocess": {"impute": "median", "scale": "standard"}, "params": p} for i, p in enumerate(params_list)]
    return {"family": name, "candidates": cands}


def test_fold_rows_follow_the_fold_table_by_key_whatever_the_row_order() -> None:
    from holdfast.fit import fold_rows

    dev = pd.DataFrame({"row_key": ["k1", "k2", "k3", "k4", "k5", "k6"]})
    # shuffled, two repeats, k6 listed in no repeat (a nested outer test row); k4 validated nowhere in repeat 1
    folds = pd.DataFrame({"row_key": ["k3", "k1", "k5", "k2", "k4", "k1", "k2", "k3", "k4", "k5"],
                          "repeat": [0, 0, 0, 0, 0, 1, 1, 1, 1, 1],
                          "fold": pd.array([1, 0, 1, 0, 2, 1, 0, 0, None, 1], dtype="UInt8"),
                          "train_from": [0] * 10})
    training, validation = fold_rows(dev, folds, 0, 1)
    assert validation.tolist() == [False, False, True, False, True, False]
    assert training.tolist() == [True, True, False, True, False, False]
    training, validation = fold_rows(dev, folds, 1, 1)
    assert validation.tolist() == [True, False, False, False, True, False]
    assert training.tolist() == [False, True, True, True, False, False]


def test_limit_threads_bounds_openmp_and_blas_in_a_child_forked_after_the_imports() -> None:
    # As the pre-warmed worker (holdfast.worker) does: the numeric libraries are loaded, then each job is a fork.
    # threadpoolctl's view of the child (threadpoolctl.threadpool_info) must show every pool at the job's threads.
    import sklearn.ensemble  # noqa: F401  (loads scikit-learn's OpenMP runtime, as the worker's PRELOAD does)
    from threadpoolctl import threadpool_info

    read, write = os.pipe()
    pid = os.fork()
    if pid == 0:  # the child: what a job does first
        code = 1
        try:
            from holdfast.fit import limit_threads

            limit_threads(1)
            seen = sorted({(pool["user_api"], pool["num_threads"]) for pool in threadpool_info()})
            os.write(write, json.dumps(seen).encode())
            code = 0
        finally:
            os._exit(code)
    os.close(write)
    with os.fdopen(read) as answer:
        seen = [tuple(pair) for pair in json.loads(answer.read() or "[]")]
    assert os.waitpid(pid, 0)[1] == 0
    assert ("openmp", 1) in seen and ("blas", 1) in seen and all(n == 1 for _, n in seen), seen


def test_the_opening_bounds_numeric_threads_before_it_reads_anything(tmp_path: Path,
                                                                     monkeypatch: pytest.MonkeyPatch) -> None:
    from holdfast.errors import SealedAccessError
    from holdfast.opening import open_test
    from threadpoolctl import threadpool_info, threadpool_limits

    for var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
        monkeypatch.setenv(var, "2")  # restored after the test, as the limits below are
    ledger.append(tmp_path / "ledger.jsonl", "seal", {})
    with threadpool_limits(2):
        with pytest.raises(SealedAccessError, match="no refit winner"):
            open_test(str(tmp_path), "x", {}, ["accuracy"], "classification", [], 0.95, 10, 0,
                      str(tmp_path / "final/verdict.json"), threads=1)
        assert {pool["num_threads"] for pool in threadpool_info()} == {1}
    assert os.environ["OMP_NUM_THREADS"] == "1"


def test_a_failing_candidate_is_recorded_and_the_family_goes_on(tmp_path: Path) -> None:
    dev, folds, spec = _fold_inputs(tmp_path)
    family = _family("lr", [{"max_iter": 300}, {"C": -1.0}])  # C must be positive: this one fails
    with pytest.warns(UserWarning, match=r"family 'lr' r0f1: 1 candidate\(s\) failed"):
        fits = fit_family(dev, folds, family, spec, 0, 1, ["accuracy"], "classification", 1, ["sklearn"],
                          str(tmp_path / "fits.parquet"), str(tmp_path / "oof.parquet"),
                          str(tmp_path / "ledger.jsonl"))
    assert fits["status"].tolist() == ["ok", "failed"]
    assert "C" in fits["error"].iloc[1] and np.isnan(fits["val_accuracy"].iloc[1])
    assert set(pd.read_parquet(tmp_path / "oof.parquet")["candidate"]) == {"c0"}
    entry = ledger.read(tmp_path / "ledger.jsonl")[-1]
    assert entry["event"] == "fit" and entry["details"]["failed"] == 1


def test_a_family_where_every_candidate_fails_is_an_error(tmp_path: Path) -> None:
    dev, folds, spec = _fold_inputs(tmp_path)
    family = _family("lr", [{"C": -1.0}, {"C": -2.0}])
    with pytest.raises(FitError, match=r"family 'lr' failed on repeat 0, fold 0: 1x .*'C' parameter"):
        fit_family(dev, folds, family, spec, 0, 0, ["accuracy"], "classification", 1, ["sklearn"],
                   str(tmp_path / "fits.parquet"), str(tmp_path / "oof.parquet"), str(tmp_path / "ledger.jsonl"))
    assert not (tmp_path / "fits.parquet").exists()


def test_estimators_outside_the_allowed_modules_are_refused() -> None:
    from holdfast.candidates import import_estimator

    with pytest.raises(ConfigError, match=r"'os.path.join' is not from an allowed module"):
        import_estimator("os.path.join", ["sklearn"])
    with pytest.raises(ConfigError, match=r"has no class 'Nope'"):
        import_estimator("sklearn.linear_model.Nope", ["sklearn"])


def test_time_tail_seals_the_latest_rows_after_a_gap(tmp_path: Path) -> None:
    from holdfast.seal import seal

    frame = breast_cancer_frame()
    rng = np.random.default_rng(1)
    start = pd.Timestamp("2025-01-01T00:00:00Z")
    frame["taken_at"] = [start + pd.Timedelta(hours=float(h)) for h in rng.uniform(0, 24 * 365, len(frame))]
    frame.to_csv(tmp_path / "data.csv", index=False)
    spec = {"target": "target", "id": "patient", "group": None, "time": "taken_at", "drop": [],
            "task": "classification", "fraction": 0.2, "scheme": "time_tail", "salt": "s", "gap_hours": 240}
    manifest = seal(tmp_path / "data.csv", spec, tmp_path / "exp", "exp")
    dev = pd.read_parquet(tmp_path / "exp/dev.parquet")
    test = pd.read_parquet(tmp_path / "exp/sealed/test.parquet")
    first_test = pd.to_datetime(test["taken_at"], utc=True).min()
    last_dev = pd.to_datetime(dev["taken_at"], utc=True).max()
    assert first_test - last_dev >= pd.Timedelta(hours=240)
    assert len(test) == round(0.2 * len(frame))
    assert manifest["counts"]["left_out_in_gap"] == len(frame) - len(dev) - len(test) > 0


def test_stratified_grouped_test_partition_keeps_groups_whole_and_class_shares_near() -> None:
    # Breast cancer data (scikit-learn's bundled set) with 60 invented groups of unequal size.
    frame = breast_cancer_frame()
    rng = np.random.default_rng(4)
    groups = pd.Series([f"clinic{i}" for i in rng.integers(0, 60, len(frame))])
    target = frame["target"]
    spec = {"fraction": 0.25, "scheme": "stratified_grouped", "salt": "s"}
    mask = sealed_mask(frame["patient"], target, spec, groups)
    assert not set(groups[mask]) & set(groups[~mask])  # no group on both sides
    for label in (0, 1):  # each class's test share within one typical group size of the fraction
        share = mask[target.to_numpy() == label].mean()
        assert abs(share - 0.25) < 0.06, (label, share)
    assert np.array_equal(mask, sealed_mask(frame["patient"], target, spec, groups))  # same salt, same rows
    other = sealed_mask(frame["patient"], target, {**spec, "salt": "t"}, groups)
    assert not np.array_equal(mask, other)
    with pytest.raises(ConfigError, match=r"only 1 group\(s\) have class '1' as their most common class"):
        lonely = pd.Series(np.where(target == 1, "all-positives", groups))
        sealed_mask(frame["patient"], target, spec, lonely)


def test_a_write_removes_the_temporary_file_a_killed_writer_left(tmp_path: Path) -> None:
    from holdfast._io import write_json

    target = tmp_path / "choice.json"
    stale = tmp_path / ".choice.json.k3x9q_.tmp"  # the name tempfile.mkstemp gives in write_atomic
    other = tmp_path / ".ranking.parquet.a1b2c3.tmp"  # another output's leftover is not ours to remove
    stale.write_text("half a file")
    other.write_text("half a file")
    write_json(target, {"winner": "a"})
    assert json.loads(target.read_text()) == {"winner": "a"}
    assert not stale.exists() and other.exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == [".ranking.parquet.a1b2c3.tmp", "choice.json"]


@pytest.mark.parametrize(("values", "expected"), [
    ({"cv_corrected_bbc": 0.85, "cv_corrected_tibshirani": 0.86}, "inside"),
    ({"cv_corrected_bbc": 0.70, "cv_corrected_tibshirani": 0.71}, "test better than cv"),
    ({"cv_corrected_bbc": 0.95, "cv_corrected_tibshirani": 0.96}, "test worse than cv"),
    ({"cv_corrected_bbc": 0.79, "cv_corrected_tibshirani": 0.81}, "borderline"),
    ({"cv_mean": 0.95}, "test worse than cv"),  # no corrected estimate: the raw mean is compared
    ({"cv_mean": 0.85, "cv_corrected_bbc": None}, "inside"),
    ({"cv_mean": float("nan")}, "not judged"),
])
def test_agreement_of_cv_estimates_with_the_test_interval(values: dict[str, float | None], expected: str) -> None:
    from holdfast.opening import agreement

    # scores are greater-is-better: below the interval means the test found the model better than CV did
    verdict, note = agreement({"interval": [0.80, 0.90], "cv_mean": 0.99, **values})
    assert verdict == expected
    assert note
    named = [n for n in ("cv_corrected_bbc", "cv_corrected_tibshirani") if values.get(n) is not None]
    if expected != "not judged":
        assert all(n in note for n in named or ["cv_mean"])


def _seal_in_child(data: str, exp: str, queue: Any) -> None:
    from holdfast.errors import SealedAccessError
    from holdfast.seal import seal

    spec = {"target": "target", "id": "patient", "group": None, "time": None, "drop": [], "task": "classification",
            "fraction": 0.25, "scheme": "hashed", "salt": "s"}
    try:
        seal(data, spec, exp, "race")
        queue.put("sealed")
    except SealedAccessError:
        queue.put("refused")


def test_two_concurrent_seals_give_exactly_one(tmp_path: Path) -> None:
    import multiprocessing

    data, exp = tmp_path / "data.csv", tmp_path / "exp"
    breast_cancer_frame().to_csv(data, index=False)
    ctx = multiprocessing.get_context("fork")
    queue = ctx.Queue()
    procs = [ctx.Process(target=_seal_in_child, args=(str(data), str(exp), queue)) for _ in range(2)]
    # Hold the seal's lock while both start, so both reach it before either can finish: without the
    # lock they would both pass the "already sealed?" check and append two seal events.
    with ledger.locked(exp / "seal"):
        for proc in procs:
            proc.start()
        time.sleep(2.0)
    for proc in procs:
        proc.join(timeout=300)
    assert sorted(queue.get(timeout=5) for _ in procs) == ["refused", "sealed"]
    assert len(ledger.events(ledger.read(exp / "ledger.jsonl"), "seal")) == 1


def test_plot_labels_show_only_the_parameters_that_vary_within_a_family() -> None:
    from holdfast.tally import candidate_labels

    candidates = {
        "a1": {"family": "forest", "params": {"n_estimators": 100, "min_samples_leaf": 1}},
        "a2": {"family": "forest", "params": {"n_estimators": 100, "min_samples_leaf": 5}},
        "b1": {"family": "logistic", "params": {"C": 1.0, "max_iter": 1000}},
        "c1": {"family": "tree", "params": {"max_depth": "None"}},
        "c2": {"family": "tree", "params": {}},
    }
    labels = candidate_labels(candidates, ["a1", "a2", "b1", "c1", "c2"])
    assert labels == {"a1": "forest · min_samples_leaf=1 · a1", "a2": "forest · min_samples_leaf=5 · a2",
                      "b1": "logistic · b1", "c1": "tree · max_depth=None · c1", "c2": "tree · max_depth=default · c2"}


def test_hash_unit_is_sha256_of_salt_and_key_as_documented() -> None:
    # The definition in dataset.hash_unit: SHA-256 (NIST FIPS 180-4, Secure Hash Standard, 2015, section 6.2)
    # of UTF-8 "salt" + U+001F + "key", first 8 bytes as a big-endian integer over 2**64. hashlib (OpenSSL)
    # is the reference; holdfast hashes with CPython's own SHA-256 where it is present, for speed.
    keys = pd.Series(["id0", "", "ünïcödé-κλειδί", "🙂" * 40, "x" * 300, "tab\tnew\nline", *map(str, range(200))])
    expected = np.array([int.from_bytes(hashlib.sha256(f"pepper\x1f{k}".encode()).digest()[:8], "big") / 2.0**64
                         for k in keys])
    assert np.array_equal(hash_unit(keys, "pepper"), expected)
    numbers = pd.Series([7, -3, 10**15])  # integer ids hash as their decimal text
    assert np.array_equal(hash_unit(numbers, "s"), hash_unit(numbers.astype(str), "s"))


def test_large_parquet_files_read_column_by_column_give_the_frame_pandas_gives(tmp_path: Path,
                                                                             monkeypatch: pytest.MonkeyPatch) -> None:
    from holdfast import _io

    rng = np.random.default_rng(5)
    frame = pd.DataFrame({"row_key": [f"k{i}" for i in range(5000)], "y": rng.integers(0, 2, 5000).astype("int8"),
                          **{f"x{j}": rng.standard_normal(5000) for j in range(7)},
                          "cat": pd.Categorical(rng.choice(["a", "b", None], 5000)),
                          "when": pd.date_range("2026-01-01", periods=5000, freq="h", tz="UTC")})
    frame.loc[::97, "x3"] = np.nan
    frame.to_parquet(tmp_path / "f.parquet", index=False, row_group_size=700)
    monkeypatch.setattr(_io, "COLUMN_BY_COLUMN_ROWS", 1000)  # the threaded column-by-column path
    pd.testing.assert_frame_equal(_io.read_parquet(tmp_path / "f.parquet"), pd.read_parquet(tmp_path / "f.parquet"))
    pd.testing.assert_frame_equal(_io.read_parquet(tmp_path / "f.parquet", columns=["x2", "row_key"]),
                                  pd.read_parquet(tmp_path / "f.parquet", columns=["x2", "row_key"]))


def test_a_seal_that_fails_while_writing_leaves_no_sealed_file(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    from holdfast import seal as sealing

    data, exp = tmp_path / "data.csv", tmp_path / "exp"
    breast_cancer_frame().to_csv(data, index=False)
    spec = {"target": "target", "id": "patient", "group": None, "time": None, "drop": [], "task": "classification",
            "fraction": 0.25, "scheme": "hashed", "salt": "s"}
    real = sealing.single_feature_alarms

    def failing(*args: Any, **kwargs: Any) -> Any:  # runs beside the writing of the two sides
        raise MemoryError("injected")

    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
    from cryptography.hazmat.primitives.serialization import Encoding, NoEncryption, PrivateFormat

    key = tmp_path / "keys" / "key.pem"
    key.parent.mkdir()
    key.write_bytes(Ed25519PrivateKey.generate().private_bytes(Encoding.PEM, PrivateFormat.PKCS8, NoEncryption()))
    monkeypatch.setattr(sealing, "single_feature_alarms", failing)
    for signing_key in (None, str(key)):
        with pytest.raises(MemoryError):
            sealing.seal(data, spec, exp, "fail", signing_key=signing_key)
        left = sorted(p.name for p in exp.rglob("*") if p.is_file())
        assert not {"test.parquet", "test_rows.parquet", "dev.parquet", "manifest.json", "ledger.jsonl",
                    ledger.SIGNING} & set(left), left
    monkeypatch.setattr(sealing, "single_feature_alarms", real)
    manifest = sealing.seal(data, spec, exp, "fail", signing_key=str(key))  # and the seal can still be made
    assert manifest["counts"]["test"] > 0 and (exp / "sealed" / "test.parquet").exists() and manifest["public_key"]


def test_code_hash_import_scan_finds_what_pythons_own_parser_finds_in_every_module() -> None:
    """The stage code hashes follow each module's relative imports by a line scan; on every module of the package
    it must find exactly the modules the standard library's ``ast`` finds (Python Language Reference, 7.11 "The
    import statement": ``from . import x`` and ``from .x import y`` with level 1)."""
    import ast

    from holdfast import plan

    modules = sorted(p.stem for p in plan.PACKAGE.glob("*.py"))
    assert len(modules) > 30
    for module in modules:
        tree = ast.parse((plan.PACKAGE / f"{module}.py").read_text(encoding="utf-8"))
        expected = set()
        for node in ast.walk(tree):
            if isinstance(node, ast.ImportFrom) and node.level == 1:
                expected.update([node.module.split(".")[0]] if node.module else [a.name for a in node.names])
        expected = {m for m in expected if (plan.PACKAGE / f"{m}.py").exists()}
        assert plan._relative_imports(module) == expected, module
    # The forms the scan must read, in a module of its own: parentheses over lines, comments, aliases, indentation.
    text = ("from . import (ledger,  # the chain\n    layout as lay,\n)\ndef f():\n    from .seal import x\n"
            "from .folds.sub import y\nx = 'from .report import z'\n")
    found = {m.group(1) or m.group(2) for m in plan._RELATIVE_IMPORT.finditer(text)}
    assert found == {"(ledger,  # the chain\n    layout as lay,\n)", "seal", "folds"}  # not the one in a string
    # A string line that reads exactly like an import is taken as one: the hash then covers more code, never less.
    assert [m.group(1) for m in plan._RELATIVE_IMPORT.finditer('"""\n    from .audit import q\n"""')] == ["audit"]


def test_jobs_per_fold_deals_candidates_in_turn_and_never_makes_an_empty_job() -> None:
    """candidates.fit_groups: the i-th candidate goes to part i mod N (neighbours of a grid apart), at most one part
    per candidate, names <family>.<i> from 1; a family left at one job per fold keeps its own name."""
    from holdfast.candidates import fit_groups
    from holdfast.layout import group_family

    families = {"forest": [{"id": f"f{i}"} for i in range(5)], "logistic": [{"id": "l0"}, {"id": "l1"}],
                "knn": [{"id": "k0"}]}
    config = {"candidates": {"forest": {"jobs_per_fold": 2}, "logistic": {}, "knn": {"jobs_per_fold": 4}}}
    groups = fit_groups(config, families)
    assert {name: [c["id"] for c in cands] for name, cands in groups.items()} == {
        "forest.1": ["f0", "f2", "f4"], "forest.2": ["f1", "f3"], "logistic": ["l0", "l1"], "knn": ["k0"]}
    config["candidates"]["logistic"]["jobs_per_fold"] = 9
    assert [c["id"] for n, cands in fit_groups(config, families).items() if n.startswith("logistic")
            for c in cands] == ["l0", "l1"]
    assert sorted(fit_groups(config, families)) == ["forest.1", "forest.2", "knn", "logistic.1", "logistic.2"]
    assert {group_family(n) for n in fit_groups(config, families)} == set(families)


def test_row_hashes_agree_across_the_ways_a_copy_of_the_data_is_read(tmp_path: Path) -> None:
    """A copy of the data keeps its rows' hashes when its rows are shuffled, its columns reordered, a text column
    read as categories or Arrow strings, whole numbers read as floats or nullable integers, or the target as
    booleans; one value edited makes another row. A seal's hash file written before the columns were kept inside it
    (504be47..7c5e505) is read with the manifest's columns."""
    from holdfast.overlap import SEALED_ROWS, _sealed_hashes, row_hashes

    frame = breast_cancer_frame().head(60)[["patient", "mean_radius", "target"]].assign(
        ward=lambda f: np.where(f.index % 2 == 0, "north", "south"), visits=lambda f: f.index % 5)
    copy = frame.sample(frac=1.0, random_state=1)[["target", "visits", "ward", "mean_radius", "patient"]]
    copy = copy.astype({"ward": "category", "patient": "string", "visits": "float64"})
    copy["target"] = copy["target"].astype(bool)
    copy = copy.astype({"visits": "Int64"})
    ours = pd.Series(row_hashes(frame), index=frame.index)
    assert (pd.Series(row_hashes(copy), index=copy.index).loc[frame.index] == ours).all()
    edited = copy.copy()
    edited.loc[edited.index[0], "mean_radius"] += 0.001
    assert (pd.Series(row_hashes(edited), index=edited.index) != ours.loc[edited.index]).sum() == 1
    old_file = tmp_path / SEALED_ROWS
    old_file.parent.mkdir(parents=True)
    pd.DataFrame({"row_hash": np.sort(ours.to_numpy())}).to_parquet(old_file, index=False)  # no columns inside
    hashes, columns = _sealed_hashes(old_file, {"data": {"columns": list(frame.columns)}})
    assert columns == tuple(frame.columns) and np.array_equal(hashes, np.sort(ours.to_numpy()))
