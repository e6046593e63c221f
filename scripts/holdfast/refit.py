"""Refit the winner on every development row and save it without pickle.

The model is stored with skops; loading trusts only types from an explicit list of
module prefixes, so a model file cannot smuggle in arbitrary code.
"""

from __future__ import annotations

import platform
from importlib.metadata import PackageNotFoundError, version
from typing import Any

import pandas as pd

from . import __version__, ledger
from ._io import read_json, sha256_file, write_atomic, write_json
from .candidates import build_pipeline
from .dataset import KEY, split_xy
from .errors import ModelFileError
from .fit import limit_threads

TRUSTED_PREFIXES = ("sklearn.", "numpy.", "scipy.sparse.", "builtins.", "collections.")
PACKAGES = ("holdfast", "scikit-learn", "numpy", "scipy", "pandas", "pyarrow", "skops", "snakemake")


def package_versions() -> dict[str, str]:
    """Versions of the packages a model and its numbers depend on."""
    out = {"python": platform.python_version()}
    for name in PACKAGES:
        try:
            out[name] = version(name)
        except PackageNotFoundError:
            out[name] = __version__ if name == "holdfast" else "not installed"
    return out


def trusted_types(path: str, prefixes: tuple[str, ...] = TRUSTED_PREFIXES) -> list[str]:
    """Types in a skops file that need trust; refuses any outside the trusted prefixes."""
    import skops.io as sio

    try:
        untrusted = sio.get_untrusted_types(file=path)
    except Exception as exc:
        raise ModelFileError(f"model file '{path}' is not a readable skops file ({exc}); refit the winner") from exc
    refused = [t for t in untrusted if not t.startswith(prefixes)]
    if refused:
        raise ModelFileError(f"model file '{path}' contains type '{refused[0]}', which is not on the trusted list "
                             f"({', '.join(prefixes)}); refusing to load it")
    return untrusted


def load_model(path: str, expected_sha256: str | None = None) -> Any:
    """Load a saved model after checking its hash and that it holds only trusted types."""
    import skops.io as sio

    if expected_sha256 is not None:
        actual = sha256_file(path)
        if actual != expected_sha256:
            raise ModelFileError(f"model file '{path}' has sha256 {actual[:16]}…, but the ledger recorded "
                                 f"{expected_sha256[:16]}…; it was changed after the refit: "
                                 "refit or start a new experiment")
    return sio.load(path, trusted=trusted_types(path))


def refit_winner(choice_path: str, dev_path: str, spec: dict[str, Any], threads: int, allowed: list[str],
                 model_path: str, card_path: str, ledger_path: str, rule: str | None = None,
                 folds_path: str | None = None, scope: str = "main") -> dict[str, Any]:
    """Fit the chosen candidate on all development rows (nested: the rows of ``folds_path``);
    write model.skops and card.json."""
    import skops.io as sio

    limit_threads(threads)
    choice = read_json(choice_path)
    candidate = choice["winner"]["spec"]
    dev = pd.read_parquet(dev_path)
    if folds_path is not None:
        dev = dev[dev[KEY].isin(set(pd.read_parquet(folds_path, columns=[KEY])[KEY]))].reset_index(drop=True)
    x, y = split_xy(dev, spec)
    model = build_pipeline(candidate, x, threads, allowed)
    model.fit(x, y)
    write_atomic(model_path, lambda tmp: sio.dump(model, tmp))
    trusted_types(model_path)
    card = {
        "candidate": candidate,
        "trained_on": {"rows": len(dev), "dev_sha256": sha256_file(dev_path), "features": list(x.columns),
                       "target": spec["target"], "key_column": KEY},
        "classes": [str(c) for c in getattr(model, "classes_", [])],
        "estimator_params": {k: repr(v) for k, v in sorted(model.named_steps["model"].get_params(deep=False).items())},
        "model_file": {"format": "skops", "sha256": sha256_file(model_path),
                       "load_with": "holdfast.refit.load_model(path, expected_sha256)"},
        "selected_by": {"rule": choice["rule"], "metric": choice["metric"], "cv_mean": choice["winner"]["mean"],
                        "cv_se": choice["winner"]["se"]},
        "versions": package_versions(),
        "caution": choice["caution"],
    }
    write_json(card_path, card)
    ledger.append(ledger_path, "refit", {
        "scope": scope, "winner": candidate["id"], "family": candidate["family"], "rows": len(dev),
        "dev_sha256": card["trained_on"]["dev_sha256"], "model_sha256": card["model_file"]["sha256"],
        "card_sha256": sha256_file(card_path), "choice_sha256": sha256_file(choice_path),
        "random_state": card["estimator_params"].get("random_state"),
    }, rule=rule)
    return card
