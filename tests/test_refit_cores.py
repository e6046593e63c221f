"""The refit may use spare cores through an estimator's own n_jobs; the model it saves must not depend on them."""

from __future__ import annotations

import subprocess
from pathlib import Path

from conftest import breast_cancer_frame, run_workflow
from holdfast import refit
from holdfast.candidates import build_pipeline
from holdfast.config import ALWAYS_ALLOWED


def forest(params: dict | None = None) -> dict:
    return {"id": "f1", "family": "forest", "estimator": "sklearn.ensemble.RandomForestClassifier",
            "params": {"n_estimators": 30, "random_state": 3, **(params or {})}, "preprocess": {}}


def test_spare_cores_split_a_forests_work_and_leave_its_model_as_one_core_makes_it() -> None:
    """scikit-learn draws every tree's seed before fitting any (RandomForestClassifier.fit; the user guide's
    "Controlling randomness" on random_state and n_jobs, from memory), so two workers grow the same trees; n_jobs
    is put back, so the saved estimator's parameters are those of a one-core fit too."""
    import numpy as np

    frame = breast_cancer_frame()
    x, y = frame.drop(columns=["patient", "target"]), frame["target"]
    fitted = []
    for workers in (1, 2):
        model = build_pipeline(forest(), x, 1, [ALWAYS_ALLOWED])
        with refit.spare_cores(model.named_steps["model"], workers, forest()["params"]):
            assert model.named_steps["model"].n_jobs == (2 if workers == 2 else None)
            model.fit(x, y)
        fitted.append(model)
    one, two = (m.named_steps["model"] for m in fitted)
    assert one.get_params() == two.get_params() and two.n_jobs is None
    for a, b in zip(one.estimators_, two.estimators_, strict=True):
        for field in ("feature", "threshold", "value", "children_left", "children_right"):
            assert np.array_equal(getattr(a.tree_, field), getattr(b.tree_, field)), field
    assert np.array_equal(fitted[0].predict_proba(x), fitted[1].predict_proba(x))


def test_spare_cores_leave_alone_what_the_candidate_sets_and_estimators_without_n_jobs() -> None:
    from sklearn.linear_model import LogisticRegression
    from sklearn.tree import DecisionTreeClassifier

    own = build_pipeline(forest({"n_jobs": 1}), breast_cancer_frame().drop(columns=["patient", "target"]), 1,
                         [ALWAYS_ALLOWED]).named_steps["model"]
    with refit.spare_cores(own, 2, {"n_jobs": 1}):
        assert own.n_jobs == 1
    tree = DecisionTreeClassifier()
    with refit.spare_cores(tree, 2, {}):
        assert "n_jobs" not in tree.get_params()
    logistic = LogisticRegression(n_jobs=4)
    with refit.spare_cores(logistic, 2, {}):  # already more than the spare cores
        assert logistic.n_jobs == 4


def _refit_threads(result: subprocess.CompletedProcess[str]) -> str:
    """The threads a dry run prints for the refit job ("1" when it prints none)."""
    lines = (result.stdout + result.stderr).splitlines()
    start = lines.index("rule refit_winner:")
    block = []
    for line in lines[start + 1:]:
        if not line.startswith("    "):
            break
        block.append(line.strip())
    return next((line.split(":", 1)[1].strip() for line in block if line.startswith("threads:")), "1")


def test_a_local_run_gives_the_refit_every_core_it_was_given(bc_workdir: Path) -> None:
    """Snakemake's own plan: with --cores 2 the refit job holds both cores, with --cores 1 one."""
    two = run_workflow(bc_workdir, "-n")  # conftest.run_workflow gives --cores 2
    assert two.returncode == 0, two.stderr[-3000:]
    one = run_workflow(bc_workdir, "-n", "--cores", "1")
    assert one.returncode == 0, one.stderr[-3000:]
    assert (_refit_threads(two), _refit_threads(one)) == ("2", "1")
