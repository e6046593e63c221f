"""Refit the winner on every development row and save it without pickle.

The model is stored with skops. A model file is data, never code: before skops builds
anything, every object the file names is checked against a fixed policy of exact type
names (:func:`trusted_types`), and the opening loads only the exact list recorded at the
refit. Functions, methods and other callables are refused whatever their name.
"""

from __future__ import annotations

import contextlib
import hashlib
import io
import json
import platform
import sys
import zipfile
from collections.abc import Iterator
from functools import cache
from importlib.metadata import PackageNotFoundError, version
from typing import Any

import pandas as pd

from . import __version__, ledger
from ._io import read_json, sha256_file, write_atomic, write_json
from .candidates import build_pipeline
from .dataset import KEY, split_xy
from .errors import ModelFileError
from .fit import limit_threads

PACKAGES = ("holdfast-selection", "scikit-learn", "numpy", "scipy", "pandas", "pyarrow", "skops", "snakemake")

# What a model file may hold.
#
# skops writes a JSON tree (schema.json inside a zip) in which every object is a node naming its
# type ("<module>.<class>") and the node kind that rebuilds it (its "loader"). A name is trusted
# only together with the loaders allowed to rebuild it, because one name means different things
# to different loaders: 'builtins.str' as a dict's key type is harmless, but the same kind of
# node named 'builtins.exec' hands back exec itself, which the dict rebuild then calls; a
# LossNode calls whatever type it names with stored arguments. The tables are exact names, never
# prefixes, and they were read off real files (scikit-learn 1.9, numpy 2.4, skops 0.16) of the
# pipelines candidates.build_pipeline makes, for every scikit-learn classifier and regressor.

# Plain values: builtin scalars and numpy's scalar types (numpy 1 spells the boolean 'bool_').
VALUE_CLASSES = frozenset({"builtins.str", "builtins.int", "builtins.float", "builtins.bool"})
NUMPY_SCALARS = frozenset(f"numpy.{name}" for name in (
    "bool", "bool_", "int8", "int16", "int32", "int64", "longlong", "uint8", "uint16", "uint32", "uint64",
    "ulonglong", "float16", "float32", "float64", "longdouble", "complex64", "complex128", "clongdouble",
    "str_", "bytes_", "object_"))
# The preprocessing holdfast builds (candidates.build_pipeline). FunctionTransformer is the form
# ColumnTransformer gives 'passthrough' when fitted; it is admitted only holding no function
# (see _passthrough_only).
PIPELINE_TYPES = frozenset({
    "sklearn.pipeline.Pipeline",
    "sklearn.compose._column_transformer.ColumnTransformer",
    "sklearn.impute._base.SimpleImputer",
    "sklearn.preprocessing._data.StandardScaler",
    "sklearn.preprocessing._data.MinMaxScaler",
    "sklearn.preprocessing._encoders.OneHotEncoder",
    "sklearn.preprocessing._function_transformer.FunctionTransformer",
})
FUNCTION_TRANSFORMER = "sklearn.preprocessing._function_transformer.FunctionTransformer"
# Data-only objects fitted estimators keep inside them: arrays, numbers and strings, no callables.
INTERNAL_TYPES = frozenset({
    "sklearn.preprocessing._label.LabelBinarizer",  # MLP, ridge classifiers: the class coding
    "sklearn.preprocessing._label.LabelEncoder",  # histogram boosting classifiers
    "sklearn.ensemble._hist_gradient_boosting.binning._BinMapper",  # bin edges
    "sklearn.ensemble._hist_gradient_boosting.predictor.TreePredictor",  # node arrays
    *(f"sklearn._loss.loss.{name}" for name in (
        "HalfSquaredError", "AbsoluteError", "PinballLoss", "HuberLoss", "HalfPoissonLoss", "HalfGammaLoss",
        "HalfTweedieLoss", "HalfTweedieLossIdentity", "HalfBinomialLoss", "ExponentialLoss",
        "HalfMultinomialLoss")),
    *(f"sklearn._loss.link.{name}" for name in (
        "IdentityLink", "LogLink", "LogitLink", "HalfLogitLink", "MultinomialLogit", "Interval")),
    "sklearn.neighbors._kd_tree.KDTree",
    "sklearn.neighbors._ball_tree.BallTree",
    # Named distance metrics; never PyFuncDistance, which wraps a Python function.
    *(f"sklearn.metrics._dist_metrics.{name}Distance{bits}" for bits in (32, 64) for name in (
        "Euclidean", "SEuclidean", "Manhattan", "Chebyshev", "Minkowski", "Mahalanobis", "Hamming", "Canberra",
        "BrayCurtis", "Jaccard", "Matching", "Dice", "Kulsinski", "RogersTanimoto", "RussellRao",
        "SokalMichener", "SokalSneath", "Haversine")),
    "sklearn.neural_network._stochastic_optimizers.AdamOptimizer",
    "sklearn.neural_network._stochastic_optimizers.SGDOptimizer",
    # Gaussian-process kernels hold hyperparameters; never PairwiseKernel, whose metric may be a function.
    *(f"sklearn.gaussian_process.kernels.{name}" for name in (
        "ConstantKernel", "RBF", "Matern", "RationalQuadratic", "ExpSineSquared", "DotProduct", "WhiteKernel",
        "Sum", "Product", "Exponentiation")),
    "sklearn.gaussian_process._gpc._BinaryGaussianProcessClassifierLaplace",
    "sklearn.calibration._CalibratedClassifier",
    "sklearn.calibration._SigmoidCalibration",
})
# Compiled losses, rebuilt by skops' LossNode, which calls the named type.
LOSS_TYPES = frozenset({
    *(f"sklearn._loss._loss.Cy{name}" for name in (
        "HalfSquaredError", "AbsoluteError", "PinballLoss", "HuberLoss", "HalfPoissonLoss", "HalfGammaLoss",
        "HalfTweedieLoss", "HalfTweedieLossIdentity", "HalfBinomialLoss", "ExponentialLoss",
        "HalfMultinomialLoss")),
    *(f"sklearn.linear_model._sgd_fast.{name}" for name in (
        "Hinge", "SquaredHinge", "ModifiedHuber", "EpsilonInsensitive", "SquaredEpsilonInsensitive",
        "Huber", "Log", "SquaredLoss")),
})
BIT_GENERATORS = frozenset({"MT19937", "PCG64", "PCG64DXSM", "Philox", "SFC64"})
# scikit-learn regressors and classifiers whose purpose is to call a function they hold.
CALLABLE_HOLDERS = frozenset({"sklearn.compose._target.TransformedTargetRegressor"})
# Loader -> the exact names it may rebuild. ObjectNode (instances) is decided by _instance_refusal.
LOADER_NAMES: dict[str, frozenset[str]] = {
    "JsonNode": VALUE_CLASSES | {"builtins.NoneType"},  # rebuilt by json.loads alone
    "DictNode": frozenset({"builtins.dict"}),
    "ListNode": frozenset({"builtins.list"}),
    "TupleNode": frozenset({"builtins.tuple"}),
    "SliceNode": frozenset({"builtins.slice"}),
    "TypeNode": VALUE_CLASSES | NUMPY_SCALARS,  # a class handed back as a value: dtypes, dict key types
    "NdArrayNode": NUMPY_SCALARS | {"numpy.ndarray"},
    "DTypeNode": frozenset({"numpy.dtype"}),
    "RandomStateNode": frozenset({"numpy.random.mtrand.RandomState"}),
    "RandomGeneratorNode": frozenset({"numpy.random._generator.Generator"}),
    "TreeNode": frozenset({"sklearn.tree._tree.Tree"}),
    "LossNode": LOSS_TYPES,
}
# Loaders that rebuild a callable or call a named type with stored arguments: refused by kind.
CALLABLE_LOADERS = {
    "FunctionNode": "a function", "MethodNode": "a bound method", "PartialNode": "a functools.partial",
    "OperatorFuncNode": "an operator callable", "DefaultDictNode": "a defaultdict, whose factory is called",
    "ConstructorFromReduceNode": "an object rebuilt by calling its type",
}
REFERENCE_LOADERS = ("CachedNode",)  # a second mention of a node already read; it names nothing new


# Module names scikit-learn's estimator registry (sklearn.utils.all_estimators) never walks into.
REGISTRY_SKIPS = frozenset({"tests", "externals", "setup", "conftest", "experimental", "estimator_checks"})


@cache
def _registered_estimator(name: str) -> bool:
    """True when ``name`` ("<module>.<class>") is one of scikit-learn's own classifiers or regressors.

    The same answer as looking the name up in ``sklearn.utils.all_estimators(["classifier", "regressor"])`` (tests
    compare the two on every class scikit-learn's modules hold and on planted ones), without that registry's walk,
    which imports every scikit-learn module (about 0.4 s on the first run's check). The registry lists a class when
    a public module (no part starting with '_' or one it skips) holds it under a public name, it derives from
    BaseEstimator and is not abstract. Here only the public modules on the name's own path are imported (each one
    the registry imports too; none under a part it skips) and searched for the class.
    """
    import importlib
    import inspect

    from sklearn.base import BaseEstimator, ClassifierMixin, RegressorMixin

    module, _, cls_name = name.rpartition(".")
    parts = module.split(".")
    if parts[0] != "sklearn" or len(parts) < 2 or not cls_name:
        return False
    public = []
    for depth in range(2, len(parts) + 1):
        if parts[depth - 1].startswith("_") or parts[depth - 1] in REGISTRY_SKIPS:
            break
        try:
            public.append(importlib.import_module(".".join(parts[:depth])))
        except ImportError:
            break
    cls = getattr(sys.modules.get(module), cls_name, None)  # imported by one of them if any of them holds it
    if not (inspect.isclass(cls) and cls.__module__ == module and cls.__name__ == cls_name):
        return False
    held = any(found is cls and not member.startswith("_")
               for holder in public for member, found in inspect.getmembers(holder, inspect.isclass))
    return (held and issubclass(cls, BaseEstimator) and cls is not BaseEstimator
            and not getattr(cls, "__abstractmethods__", None) and issubclass(cls, (ClassifierMixin, RegressorMixin)))


def _instance_refusal(name: str) -> str | None:
    """Why an instance of ``name`` may not be rebuilt, or None when the policy admits it."""
    if name in PIPELINE_TYPES or name in INTERNAL_TYPES:
        return None
    if name in CALLABLE_HOLDERS:
        return "an estimator whose purpose is to call a function it holds"
    if not name.startswith("sklearn."):  # decided before the registry imports any scikit-learn module
        return "not a type of a scikit-learn pipeline"
    if _registered_estimator(name):
        return None
    return "not a scikit-learn classifier, regressor or a data-only part of one"


def estimator_refusal(name: str) -> str | None:
    """Why refit could not store an estimator of this exact type name in a trusted file (None: it can)."""
    return _instance_refusal(name)


def _refusal(node: dict[str, Any], name: str) -> str | None:
    """Why one node of a model file may not be rebuilt, or None when the static policy admits it."""
    loader = node["__loader__"]
    if loader in CALLABLE_LOADERS:
        return f"{CALLABLE_LOADERS[loader]}, which can run code"
    if loader == "ObjectNode":
        reason = _instance_refusal(name)
        if reason is None and name == FUNCTION_TRANSFORMER and not _passthrough_only(node):
            return "a FunctionTransformer holding a function"
        return reason
    if loader not in LOADER_NAMES:
        return f"rebuilt by skops' {loader}, which holdfast never writes"
    if name not in LOADER_NAMES[loader]:
        if loader == "TypeNode":
            return "a reference to a function or class, which skops hands back to be called"
        return f"not a type holdfast writes as skops {loader}"
    return None


NOT_JSON = object()


def _json_value(node: Any) -> Any:
    """The value of a JsonNode (skops rebuilds it with json.loads alone), or NOT_JSON for anything else."""
    if isinstance(node, dict) and node.get("__loader__") == "JsonNode" and isinstance(node.get("content"), str):
        try:
            return json.loads(node["content"])
        except ValueError:
            pass
    return NOT_JSON


def _passthrough_only(node: dict[str, Any]) -> bool:
    """A FunctionTransformer as ColumnTransformer stores 'passthrough': no function, no arguments."""
    attrs = node.get("content")
    if not isinstance(attrs, dict) or attrs.get("__loader__") != "DictNode" or not isinstance(attrs.get("content"),
                                                                                                dict):
        return False
    fields = attrs["content"]
    empty = all(_json_value(fields.get(key)) is None for key in ("func", "inverse_func", "kw_args", "inv_kw_args"))
    names_out = _json_value(fields.get("feature_names_out"))
    return empty and (names_out is None or isinstance(names_out, str))


def _bit_generator(node: dict[str, Any]) -> str | None:
    """The bit generator a numpy Generator node will call, by the name numpy stores in its state."""
    try:
        name = _json_value(node["content"]["bit_generator"]["content"]["bit_generator"])
    except (KeyError, TypeError):
        return None
    return name if isinstance(name, str) else None


def _nodes(data: bytes) -> list[dict[str, Any]]:
    """Every node of a skops file's schema, in file order, read as JSON only (nothing is imported)."""
    with zipfile.ZipFile(io.BytesIO(data)) as archive:
        schema = json.loads(archive.read("schema.json"))
    found, todo = [], [schema]
    while todo:
        item = todo.pop()
        if isinstance(item, dict):
            if "__loader__" in item:
                found.append(item)
            todo.extend(reversed(list(item.values())))
        elif isinstance(item, list):
            todo.extend(reversed(item))
    return found


def _problems(data: bytes, trusted: list[str] | None) -> tuple[list[str], list[tuple[str, str]]]:
    """The exact type names a skops file holds, and each (name, reason) the policy or ``trusted`` refuses."""
    nodes = _nodes(data)
    names: list[str] = []
    refused: list[tuple[str, str]] = []
    seen_ids: dict[Any, tuple[Any, ...]] = {}
    for node in nodes:
        loader, module, cls = node.get("__loader__"), node.get("__module__"), node.get("__class__")
        # skops imports the module and takes the class by getattr: both must be plain names, so one
        # "<module>.<class>" string can be split only one way.
        if not (isinstance(loader, str) and isinstance(module, str) and isinstance(cls, str) and cls.isidentifier()
                and all(part.isidentifier() for part in module.split("."))):
            refused.append((f"{module}.{cls}", "a node without a plain type name"))
            continue
        name = f"{module}.{cls}"
        if loader in REFERENCE_LOADERS:
            continue
        # skops rebuilds every later node carrying an object id from the first node with that id,
        # so two different nodes sharing an id would let one stand in for the other unseen.
        if "__id__" in node:
            shape = (loader, name, node.get("content") if loader == "JsonNode" else None)
            if seen_ids.setdefault(node["__id__"], shape) != shape:
                refused.append((name, "an object id shared with a different object"))
        reason = _refusal(node, name)
        if reason is not None:
            refused.append((name, reason))
        names.append(name)
        if loader == "RandomGeneratorNode":  # numpy calls the bit generator its state names
            bits = f"numpy.random.{_bit_generator(node)}"
            if bits.rpartition(".")[2] not in BIT_GENERATORS:
                refused.append((bits, "not one of numpy's bit generators"))
            names.append(bits)
    exact = sorted(set(names))
    if trusted is not None:
        allowed = set(trusted)
        refused += [(n, "not among the types recorded for this model at the refit") for n in exact if n not in allowed]
    return exact, refused


def _describe(refused: list[tuple[str, str]]) -> str:
    """'type X (why)' for the first few refused types, without repeats."""
    unique = list(dict.fromkeys(refused))
    shown = ", ".join(f"type '{name}' ({why})" for name, why in unique[:3])
    return shown + (f" and {len(unique) - 3} more" if len(unique) > 3 else "")


def _checked_types(data: bytes, path: str, trusted: list[str] | None) -> list[str]:
    """The exact type names of a model file's bytes; ModelFileError naming the file if any is refused."""
    try:
        names, refused = _problems(data, trusted)
    except (zipfile.BadZipFile, KeyError, ValueError, RecursionError) as exc:
        raise ModelFileError(f"model file '{path}' is not a readable skops file ({type(exc).__name__}: {exc}); "
                             "refit the winner") from exc
    if refused:
        raise ModelFileError(f"model file '{path}' holds {_describe(refused)}; refusing to load it: refit the "
                             "winner rather than load a model file from elsewhere")
    return names


def package_versions() -> dict[str, str]:
    """Versions of the packages a model and its numbers depend on."""
    out = {"python": platform.python_version()}
    for name in PACKAGES:
        try:
            out[name] = version(name)
        except PackageNotFoundError:
            out[name] = __version__ if name == "holdfast-selection" else "not installed"
    return out


def trusted_types(path: str, trusted: list[str] | None = None) -> list[str]:
    """The exact type names a skops model file holds, refusing any the static policy (or ``trusted``) does not admit."""
    with open(path, "rb") as handle:
        return _checked_types(handle.read(), path, trusted)


def load_model(path: str, expected_sha256: str | None = None, trusted: list[str] | None = None,
               data: bytes | None = None) -> Any:
    """Load a saved model after checking its hash and every type it names, trusting only ``trusted``.

    ``trusted`` is normally the list the ledger's refit event recorded; it can only narrow the static
    policy, never widen it. None (ledgers written before the list was recorded) applies the policy alone.
    The file is read once, so the bytes checked are the bytes loaded; ``data`` is that read when the
    caller has already made it (the opening hashes the same bytes for its records).
    """
    import skops.io as sio

    if data is None:
        with open(path, "rb") as handle:
            data = handle.read()
    if expected_sha256 is not None:
        actual = hashlib.sha256(data).hexdigest()
        if actual != expected_sha256:
            raise ModelFileError(f"model file '{path}' has sha256 {actual[:16]}…, but the ledger recorded "
                                 f"{expected_sha256[:16]}…; it was changed after the refit: "
                                 "refit or start a new experiment")
    names = _checked_types(data, path, trusted)
    try:
        # skops' own audit as a second reader: a type it reports that the check above missed is refused.
        missed = sorted(set(sio.get_untrusted_types(data=data)) - set(names))
        if not missed:
            model = sio.loads(data, trusted=names)
    except Exception as exc:  # skops raises many kinds on a malformed file; each means "cannot load"
        raise ModelFileError(f"model file '{path}' cannot be loaded by skops ({type(exc).__name__}: {exc}); "
                             "refit the winner") from exc
    if missed:
        raise ModelFileError(f"model file '{path}' holds type '{missed[0]}', which holdfast's check of the file did "
                             "not see; refusing to load it: refit the winner")
    kind = f"{type(model).__module__}.{type(model).__name__}"
    if kind != "sklearn.pipeline.Pipeline":
        raise ModelFileError(f"model file '{path}' holds a '{kind}', not the scikit-learn Pipeline refit writes; "
                             "refit the winner")
    return model


def _write_bytes(path: str, data: bytes) -> None:
    """Write bytes to a path (the writer write_atomic calls)."""
    with open(path, "wb") as handle:
        handle.write(data)


@contextlib.contextmanager
def spare_cores(estimator: Any, workers: int, params: dict[str, Any]) -> Iterator[None]:
    """While fitting, let an estimator with ``n_jobs`` (forests, bagging, neighbours) use ``workers`` cores; put its
    ``n_jobs`` back afterwards, so the saved model's bytes do not depend on the cores the job had.

    scikit-learn's ``n_jobs`` divides the work (a forest draws every tree's seed before fitting any), so the fitted
    model is the same (common practice in scikit-learn's design; checked for forests in tests/test_refit_cores.py).
    An ``n_jobs`` the candidate sets itself is left alone.
    """
    current = estimator.get_params(deep=False).get("n_jobs", "absent")
    if current == "absent" or "n_jobs" in params or workers <= max(1, int(current or 1)):
        yield
        return
    estimator.set_params(n_jobs=workers)
    try:
        yield
    finally:
        estimator.set_params(n_jobs=current)


def refit_winner(choice_path: str, dev_path: str, spec: dict[str, Any], threads: int, allowed: list[str],
                 model_path: str, provenance_path: str, ledger_path: str, rule: str | None = None,
                 folds_path: str | None = None, scope: str = "main", workers: int | None = None) -> dict[str, Any]:
    """Fit the chosen candidate on all development rows (nested: the rows of ``folds_path``);
    write model.skops and provenance.json (where the model came from: spec, data, files, versions).

    Numeric libraries are limited to ``threads`` (the families' declared threads). ``workers`` (the cores the job
    was given, more in a local run) reach the fit only through the estimator's own ``n_jobs`` (see
    :func:`spare_cores`), so the model file and its numbers are those of a fit with ``threads``.
    """
    import skops.io as sio

    limit_threads(threads)
    choice = read_json(choice_path)
    candidate = choice["winner"]["spec"]
    dev = pd.read_parquet(dev_path)
    if folds_path is not None:
        dev = dev[dev[KEY].isin(set(pd.read_parquet(folds_path, columns=[KEY])[KEY]))].reset_index(drop=True)
    x, y = split_xy(dev, spec)
    model = build_pipeline(candidate, x, threads, allowed)
    with spare_cores(model.named_steps["model"], workers or threads, candidate["params"]):
        model.fit(x, y)
    data = sio.dumps(model)
    types, refused = _problems(data, None)
    if refused:  # checked before writing: a model holdfast would refuse to load is never saved
        raise ModelFileError(f"the winner {candidate['id']} of family '{candidate['family']}' "
                             f"({candidate['estimator']}) cannot be saved as a model file holdfast will load: it "
                             f"would hold {_describe(refused)}; choose another estimator for that family")
    write_atomic(model_path, lambda tmp: _write_bytes(tmp, data))
    model_sha = hashlib.sha256(data).hexdigest()  # the bytes just written: no second read of a large file
    card = {
        "candidate": candidate,
        "trained_on": {"rows": len(dev), "dev_sha256": sha256_file(dev_path), "features": list(x.columns),
                       "target": spec["target"], "key_column": KEY},
        "classes": [str(c) for c in getattr(model, "classes_", [])],
        "estimator_params": {k: repr(v) for k, v in sorted(model.named_steps["model"].get_params(deep=False).items())},
        "model_file": {"format": "skops", "sha256": model_sha, "types": types,
                       "load_with": "holdfast.refit.load_model(path, expected_sha256, types)"},
        "selected_by": {"rule": choice["rule"], "metric": choice["metric"], "cv_mean": choice["winner"]["mean"],
                        "cv_se": choice["winner"]["se"]},
        "versions": package_versions(),
        "caution": choice["caution"],
    }
    write_json(provenance_path, card)
    ledger.append(ledger_path, "refit", {
        "scope": scope, "winner": candidate["id"], "family": candidate["family"], "rows": len(dev),
        "dev_sha256": card["trained_on"]["dev_sha256"], "model_sha256": card["model_file"]["sha256"],
        "model_types": types,
        "provenance_sha256": sha256_file(provenance_path), "choice_sha256": sha256_file(choice_path),
        "random_state": card["estimator_params"].get("random_state"),
    }, rule=rule)
    return card
