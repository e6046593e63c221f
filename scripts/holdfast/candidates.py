"""Candidates: expand each family's grid into fully specified pipelines with stable ids.

Expansion and ids need no scikit-learn import (the Snakefile calls them at parse time);
:func:`build_pipeline` and :func:`check_estimators` import the estimator classes.
"""

from __future__ import annotations

import importlib
import itertools
import math
from typing import Any

from ._io import canonical_json, sha256_text
from .errors import ConfigError, DataError

ID_LENGTH = 10


def candidate_id(estimator: str, preprocess: dict[str, Any], params: dict[str, Any]) -> str:
    """A short hash of the canonical spec: the same candidate has the same id everywhere."""
    spec = {"estimator": estimator, "preprocess": preprocess, "params": params}
    return sha256_text(canonical_json(spec))[:ID_LENGTH]


def expand_family(name: str, spec: dict[str, Any]) -> list[dict[str, Any]]:
    """Every candidate of one family: fixed params merged with each grid point."""
    grid = spec.get("grid", {})
    names = sorted(grid)
    out = []
    for values in itertools.product(*(grid[n] for n in names)):
        params = {**spec.get("params", {}), **dict(zip(names, values, strict=True))}
        try:
            canonical_json(params)
        except (TypeError, ValueError) as exc:
            raise ConfigError(f"config key 'candidates.{name}': parameter values must be plain numbers, strings, "
                              f"booleans, null or lists ({exc}); simplify them") from exc
        cid = candidate_id(spec["estimator"], spec.get("preprocess", {}), params)
        out.append({"id": cid, "family": name, "estimator": spec["estimator"],
                    "preprocess": spec.get("preprocess", {}), "params": params})
    return out


def expand(config: dict[str, Any]) -> dict[str, list[dict[str, Any]]]:
    """All families' candidates; refuses more than ``max_candidates`` in total and id clashes.

    The total is counted (a product of grid lengths) before anything is expanded, so a huge grid is
    refused at once instead of filling memory.
    """
    total = sum(math.prod(len(values) for values in spec.get("grid", {}).values())
                for spec in config["candidates"].values())
    if total > int(config["max_candidates"]):
        raise ConfigError(f"the candidate grids expand to {total} candidates, more than max_candidates "
                          f"({config['max_candidates']}); shrink the grids or raise max_candidates")
    families = {name: expand_family(name, spec) for name, spec in config["candidates"].items()}
    seen: dict[str, str] = {}
    for name, cands in families.items():
        for cand in cands:
            if cand["id"] in seen:
                raise ConfigError(f"config key 'candidates.{name}' repeats a candidate of family '{seen[cand['id']]}' "
                                  f"(id {cand['id']}); remove the duplicate")
            seen[cand["id"]] = name
    return families


def fit_groups(config: dict[str, Any], families: dict[str, list[dict[str, Any]]]) -> dict[str, list[dict[str, Any]]]:
    """The candidates of each fit job, by the job's family part: ``<family>`` when the family has one job per fold,
    else ``<family>.1`` .. ``<family>.N`` for ``candidates.<family>.jobs_per_fold`` = N (at most one per candidate).

    Candidates are dealt in turn (the i-th to part i mod N), so neighbours of a grid, which often differ most in
    cost (max_features 0.5 against sqrt), land in different jobs. Family names cannot hold a dot, so a part's name
    never collides with a family's.
    """
    groups: dict[str, list[dict[str, Any]]] = {}
    for name, cands in families.items():
        parts = min(int(config["candidates"][name].get("jobs_per_fold", 1)), len(cands))
        if parts <= 1:
            groups[name] = cands
            continue
        for i in range(parts):
            groups[f"{name}.{i + 1}"] = cands[i::parts]
    return groups


def family_payload(name: str, candidates: list[dict[str, Any]]) -> str:
    """Canonical JSON of one family: passed to its fit jobs as a param so edits re-run them."""
    return canonical_json({"family": name, "candidates": candidates})


def import_estimator(path: str, allowed: list[str], where: str | None = None) -> type:
    """Import an estimator class by dotted path, only from allowed module prefixes."""
    key = f"config key '{where}': " if where else ""
    module_name, _, class_name = path.rpartition(".")
    if not any(module_name == p or module_name.startswith(p + ".") for p in allowed):
        raise ConfigError(f"{key}estimator '{path}' is not from an allowed module ({', '.join(allowed)}); "
                          "add its module prefix to allowed_modules if you trust it")
    try:
        module = importlib.import_module(module_name)
    except ImportError as exc:
        raise ConfigError(f"{key}estimator '{path}': module '{module_name}' cannot be imported ({exc}); "
                          "check the import path") from exc
    cls = getattr(module, class_name, None)
    if not isinstance(cls, type):
        raise ConfigError(f"{key}estimator '{path}': '{module_name}' has no class '{class_name}'; "
                          "check the import path")
    return cls


def check_estimators(config: dict[str, Any], families: dict[str, list[dict[str, Any]]], task: str,
                     allowed: list[str]) -> None:
    """Each estimator imports, fits the task, and accepts every parameter named for it."""
    from sklearn.base import is_classifier, is_regressor

    for name, spec in config["candidates"].items():
        where = f"candidates.{name}.estimator"
        cls = import_estimator(spec["estimator"], allowed, where)
        if not hasattr(cls, "fit") or not hasattr(cls, "get_params"):
            raise ConfigError(f"config key '{where}': '{spec['estimator']}' is not a scikit-learn estimator; "
                              "use a class with fit and get_params")
        try:
            instance = cls()
        except TypeError as exc:
            raise ConfigError(f"config key '{where}': '{spec['estimator']}' cannot be built without arguments "
                              f"({exc}); use a scikit-learn compatible estimator") from exc
        from .refit import estimator_refusal

        refusal = estimator_refusal(f"{cls.__module__}.{cls.__name__}")
        if refusal:  # found now, not after every fit job ran: refit could not save a file holdfast loads
            raise ConfigError(f"config key '{where}': '{spec['estimator']}' is {refusal}, so its refit model could "
                              "not be stored as a model file holdfast trusts; choose another estimator")
        wanted = is_classifier if task == "classification" else is_regressor
        if not wanted(instance):
            kind = "classifier" if task == "classification" else "regressor"
            raise ConfigError(f"config key '{where}': '{spec['estimator']}' is not a {kind} but the task is {task}; "
                              "choose a matching estimator")
        known = set(instance.get_params(deep=False))
        for cand in families[name]:
            for param in cand["params"]:
                if param not in known:
                    raise ConfigError(f"config key 'candidates.{name}': '{spec['estimator']}' has no parameter "
                                      f"'{param}'; known parameters: {', '.join(sorted(known))}")
            _check_values(name, spec["estimator"], cls, cand["params"])


def _check_values(family: str, path: str, cls: type, params: dict[str, Any]) -> None:
    """Let scikit-learn's own parameter validation judge the values, before any data is touched."""
    try:
        estimator = cls(**params)
        validate = getattr(estimator, "_validate_params", None)  # scikit-learn's declared constraints
        if callable(validate):
            validate()
    except (TypeError, ValueError) as exc:
        first = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise ConfigError(f"config key 'candidates.{family}': a value is not accepted by '{path}' ({first}); "
                          "fix params or grid") from exc


def build_pipeline(candidate: dict[str, Any], features: Any, threads: int, allowed: list[str]) -> Any:
    """The candidate as one unfitted scikit-learn Pipeline: preprocessing, then the estimator.

    Column roles come from the feature frame's dtypes: numbers are imputed and scaled,
    text and categories are imputed and one-hot encoded. Everything is fitted inside
    the training rows it is given, never on validation or test rows.
    """
    import pandas as pd
    from sklearn.compose import ColumnTransformer
    from sklearn.impute import SimpleImputer
    from sklearn.pipeline import Pipeline
    from sklearn.preprocessing import MinMaxScaler, OneHotEncoder, StandardScaler

    prep = candidate["preprocess"]
    numeric = [c for c in features.columns if pd.api.types.is_numeric_dtype(features[c])
               or pd.api.types.is_bool_dtype(features[c])]
    categorical = [c for c in features.columns if c not in numeric]
    if categorical and prep.get("categorical", "onehot") == "none":
        raise DataError(f"feature column '{categorical[0]}' is not numeric and family '{candidate['family']}' declares "
                        "no encoder (preprocess.categorical: none); set preprocess.categorical: onehot or drop it")
    numeric_steps: list[tuple[str, Any]] = []
    if prep.get("impute", "median") != "none":
        numeric_steps.append(("impute", SimpleImputer(strategy=prep.get("impute", "median"))))
    scaler = {"standard": StandardScaler, "minmax": MinMaxScaler}.get(prep.get("scale", "none"))
    if scaler is not None:
        numeric_steps.append(("scale", scaler()))
    transformers: list[tuple[str, Any, list[str]]] = []
    if numeric:
        transformers.append(("numeric", Pipeline(numeric_steps) if numeric_steps else "passthrough", numeric))
    if categorical:
        transformers.append(("categorical", Pipeline([
            ("impute", SimpleImputer(strategy="most_frequent")),
            ("onehot", OneHotEncoder(handle_unknown="ignore", sparse_output=False)),
        ]), categorical))
    cls = import_estimator(candidate["estimator"], allowed)
    estimator = cls(**candidate["params"])
    defaults = estimator.get_params(deep=False)
    fixed: dict[str, Any] = {}
    if "random_state" in defaults and defaults["random_state"] is None:
        fixed["random_state"] = 0  # determinism: an unseeded estimator would differ between runs
    if "n_jobs" in defaults and "n_jobs" not in candidate["params"] and threads > 1:
        fixed["n_jobs"] = threads
    if fixed:
        estimator.set_params(**fixed)
    return Pipeline([("prepare", ColumnTransformer(transformers, remainder="drop", verbose_feature_names_out=False)),
                     ("model", estimator)])
