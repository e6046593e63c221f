"""The opening never crashes on rows it has read: an undefined metric is 'undefined, because ...'.

Checked with real scikit-learn scorers on scikit-learn's bundled breast cancer data (Wolberg, Street &
Mangasarian, UCI, 1995, via sklearn.datasets.load_breast_cancer).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from holdfast.opening import _evaluate, agreement, score_or_undefined
from holdfast.scoring import model_outputs, replay
from sklearn.datasets import load_breast_cancer
from sklearn.linear_model import LogisticRegression

SPEC = {"target": "target", "id": None, "group": None, "time": None, "drop": []}


def fitted() -> tuple[LogisticRegression, pd.DataFrame]:
    data = load_breast_cancer(as_frame=True).frame
    model = LogisticRegression(max_iter=5000).fit(data.drop(columns="target"), data["target"])
    return model, data


def test_roc_auc_on_one_class_is_undefined_with_the_reason_and_accuracy_is_not() -> None:
    model, data = fitted()
    one_class = data[data["target"] == 1].head(30)
    played = replay(model_outputs(model, one_class.drop(columns="target")), "classification", model.classes_)
    values = score_or_undefined(["roc_auc", "accuracy"], played, one_class["target"])
    value, reason = values["roc_auc"]
    assert value is None and reason.startswith("undefined, because")
    assert "class" in reason  # scikit-learn's own words: only one class present
    # scikit-learn's accuracy_score as the reference for the metric that stays defined.
    from sklearn.metrics import accuracy_score

    expected = accuracy_score(one_class["target"], model.predict(one_class.drop(columns="target")))
    assert values["accuracy"] == (expected, "")


def test_a_model_that_cannot_predict_gives_a_verdict_block_not_a_crash() -> None:
    model, data = fitted()
    test = data.head(40).copy()
    test.loc[test.index[0], "mean radius"] = np.inf  # scikit-learn refuses infinite inputs
    ranking = pd.DataFrame({"metric": ["roc_auc"], "mean": [0.99], "se": [0.01], "se_corrected": [0.02],
                            "folds": [5]}).set_index("metric")
    blocks = _evaluate(model, test, SPEC, ["roc_auc"], "classification", 0.95, 50, 0, ranking, {})
    block = blocks["roc_auc"]
    assert block["test"] is None and block["interval"] == [None, None]
    assert block["undefined"].startswith("undefined, because the refit winner could not predict")
    assert block["agreement"] == "not judged"
    assert block["cv_mean"] == 0.99


def test_agreement_names_an_undefined_test_score() -> None:
    state, note = agreement({"undefined": "undefined, because x", "interval": [None, None], "cv_mean": 0.9})
    assert state == "not judged" and "undefined, because x" in note
