"""The script holdfast replaces: the baseline that bench/head_to_head.py and bench/fixed_cost.py time.

What a practitioner writes instead of holdfast: for each family ``GridSearchCV(pipeline, grid,
cv=PredefinedSplit(...), n_jobs=N, refit=False)`` over holdfast's stored folds, the best CV mean
on the primary metric wins, the winner is refit on all development rows and scored once on the
sealed test rows. It reads holdfast's dev.parquet, folds.parquet and sealed/test.parquet of the
same repetition (so both sides use identical rows and folds) and builds every pipeline with
``holdfast.candidates.build_pipeline`` (so both sides fit identical candidates). The benchmark
hands it the expanded candidates as JSON, so it pays no config parsing of its own.

Run by the benchmarks as:  python gridsearch_baseline.py EXPERIMENT_DIR PLAN_JSON RESULT_JSON N_JOBS
"""

import time

START = time.perf_counter()

import json  # noqa: E402 - the imports are part of what this script's cold start costs
import sys  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
from holdfast.candidates import build_pipeline  # noqa: E402
from sklearn.metrics import get_scorer  # noqa: E402
from sklearn.model_selection import GridSearchCV, PredefinedSplit  # noqa: E402


def main(exp: Path, plan: dict, n_jobs: int) -> dict:
    """Search every family, refit the winner, score it once on the test rows; return numbers and timings."""
    imports = time.perf_counter() - START
    dev = pd.read_parquet(exp / "dev.parquet")
    folds = pd.read_parquet(exp / "folds.parquet").set_index("row_key")["fold"]
    test_fold = dev["row_key"].map(folds).astype("Int64").fillna(-1).to_numpy(dtype=int)
    x, y = dev[plan["features"]], dev[plan["target"]]
    cv, metrics = PredefinedSplit(test_fold), plan["metrics"]
    means, fit_sum, t0 = {}, 0.0, time.perf_counter()
    for family in plan["families"]:
        pipeline = build_pipeline(family["candidates"][0], x, 1, plan["allowed"])
        grid = {f"model__{k}": v for k, v in family["grid"].items()}
        result = GridSearchCV(pipeline, grid, scoring=metrics, cv=cv, n_jobs=n_jobs, refit=False).fit(x, y).cv_results_
        fit_sum += float(np.sum(result["mean_fit_time"]) * cv.get_n_splits())
        for i, point in enumerate(result["params"]):
            chosen = {k.removeprefix("model__"): v for k, v in point.items()}
            [cand] = [c for c in family["candidates"] if all(c["params"][k] == v for k, v in chosen.items())]
            means[cand["id"]] = {m: float(result[f"mean_test_{m}"][i]) for m in metrics}
    search = time.perf_counter() - t0
    winner = min(means, key=lambda c: (-means[c][metrics[0]], c))  # best mean; ties to the smaller id
    [spec] = [c for f in plan["families"] for c in f["candidates"] if c["id"] == winner]
    t0 = time.perf_counter()
    model = build_pipeline(spec, x, 1, plan["allowed"]).fit(x, y)
    refit = time.perf_counter() - t0
    test = pd.read_parquet(exp / "sealed" / "test.parquet")
    scores = {m: float(get_scorer(m)(model, test[plan["features"]], test[plan["target"]])) for m in metrics}
    return {"imports_s": imports, "search_s": search, "refit_s": refit, "cv_fit_sum_s": fit_sum,
            "in_script_s": time.perf_counter() - START, "cv_means": means, "winner": winner, "test": scores}


if __name__ == "__main__":
    exp_dir, plan_path, out_path, jobs = sys.argv[1:5]
    result = main(Path(exp_dir), json.loads(Path(plan_path).read_text()), int(jobs))
    Path(out_path).write_text(json.dumps(result))
