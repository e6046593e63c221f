"""The opening: the only code that reads the sealed test set, and only once.

Before reading, the ledger is checked under a lock: an experiment whose test set was
already opened is refused unless the config records one more written reason. The
verdict puts each test metric, with its interval, beside the winner's CV estimate.
"""

from __future__ import annotations

import shutil
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from . import ledger
from ._io import read_json, sha256_file, write_json
from .dataset import split_xy
from .errors import ModelFileError, SealedAccessError
from .layout import ARCHIVE, CHOICE, LEDGER, MANIFEST, MODEL, RANKING, TEST
from .refit import load_model
from .scoring import bootstrap_interval, clopper_pearson, model_outputs, replay, score_outputs
from .tally import CAUTION

BINOMIAL = {"accuracy"}


def refusal(experiment: str, openings: list[dict[str, Any]], allowed: int) -> str:
    """Why a further opening is refused, and the two honest ways on."""
    last = openings[-1]
    n = len(openings)
    return (f"The sealed test set of experiment '{experiment}' was already opened {n} time(s), last at "
            f"{last['time']} for model {last['details']['winner']} ({allowed} opening(s) allowed by the config). "
            "A second look makes the test estimate optimistic: anything chosen or changed after seeing a test "
            "score turns the test set into one more validation set. Honest ways on: start a new experiment "
            "(new experiment name and test.salt, so a fresh seal), or add a written reason to test.reopen_reasons; "
            f"every later output then says 'test set opened {n + 1} times'")


def opened(entries: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """The ledger's opening events."""
    return ledger.events(entries, "open_test")


def _restore(exp: Path, verdict_path: Path, last: dict[str, Any], model_sha: str) -> bool:
    """Put back the verdict of the last opening from its archive copy, if nothing it used changed."""
    archived = exp / ARCHIVE / f"{last['details']['opening']}.json"
    if verdict_path.exists() or not archived.exists():
        return False
    if sha256_file(archived) != last["details"]["verdict_sha256"] or last["details"]["model_sha256"] != model_sha:
        return False
    shutil.copyfile(archived, verdict_path)
    return True


def _inside(value: float | None, low: float, high: float) -> bool | None:
    if value is None or not (np.isfinite(low) and np.isfinite(high)):
        return None
    return bool(low <= value <= high)


def _metric_block(metric: str, value: float, model: Any, y: Any, level: float, draws: int, seed: int,
                  outputs: dict[str, np.ndarray], cv: dict[str, Any], optimism: dict[str, Any]) -> dict[str, Any]:
    if metric in BINOMIAL:
        correct = int(np.sum(outputs["predict"] == np.asarray(y)))
        low, high = clopper_pearson(correct, len(y), level)
        method = "exact binomial (Clopper-Pearson)"
    else:
        low, high = bootstrap_interval(metric, model, y, level, draws, seed)
        method = f"percentile bootstrap, {draws} resamples, seed {seed}"
    block: dict[str, Any] = {
        "test": value, "interval": [low, high], "level": level, "interval_method": method,
        "cv_mean": cv["mean"], "cv_se": cv["se"], "cv_se_corrected": cv.get("se_corrected"),
        "cv_folds": int(cv["folds"]), "cv_mean_inside_interval": _inside(cv["mean"], low, high),
    }
    if optimism.get("metric") == metric:
        for name in ("tibshirani", "bbc"):
            corrected = (optimism.get(name) or {}).get("corrected")
            block[f"cv_corrected_{name}"] = corrected
            block[f"cv_corrected_{name}_inside_interval"] = _inside(corrected, low, high)
    else:
        block["cv_corrected_note"] = "no optimism correction: the winner was not selected on this metric"
    block["agreement"], block["agreement_note"] = agreement(block)
    return block


def agreement(block: dict[str, Any]) -> tuple[str, str]:
    """Where the CV estimates sit against the test interval, and what a gap can mean, in plain words.

    The corrected estimates are compared when the metric has them, else the raw CV mean. Scores are
    greater-is-better, so a CV estimate below the interval means the test set found the refit
    winner better than CV predicted, and above it worse.
    """
    names = [n for n in ("cv_corrected_bbc", "cv_corrected_tibshirani") if block.get(n) is not None] or ["cv_mean"]
    low, high = block["interval"]
    values = [block.get(n) for n in names]
    if not all(v is not None and np.isfinite(v) for v in [*values, low, high]):
        return "not judged", "no finite CV estimate or test interval to compare"
    sides = {"below" if v < low else "above" if v > high else "inside" for v in values}
    which = " and ".join(names)
    if sides == {"inside"}:
        return "inside", f"{which} inside the test interval: CV and the test set agree within chance"
    if sides == {"below"}:
        return "test better than cv", (
            f"{which} below the test interval: the test set found the refit winner better than CV predicted. Part "
            "of such a gap is expected, because every CV fit trained on fewer development rows than the refit "
            "winner, which trained on all of them; a large gap can also mean the test rows differ from the "
            "development rows")
    if sides == {"above"}:
        return "test worse than cv", (
            f"{which} above the test interval: the test set found the refit winner worse than CV predicted, more "
            "than chance usually allows. Look for a shift between development and test rows (time, site, "
            "population), for leakage between folds (leakage.json), or for choices made outside this workflow "
            "that CV could not see")
    return "borderline", f"{which} fall on different sides of the test interval's edge: read as borderline agreement"


def open_test(exp_dir: str, experiment: str, spec: dict[str, Any], metrics: list[str], task: str,
              reopen_reasons: list[str], level: float, draws: int, seed: int, verdict_path: str,
              fingerprint: str = "", rule: str | None = None,
              fingerprint_parts: dict[str, str] | None = None) -> dict[str, Any]:
    """Open the sealed test set once, score the refit winner on it, write final/verdict.json."""
    exp = Path(exp_dir)
    ledger_path = exp / LEDGER
    target = Path(verdict_path)
    with ledger.locked(exp / "opening"):
        entries = ledger.read(ledger_path)
        before = opened(entries)
        allowed = 1 + len(reopen_reasons)
        refits = ledger.events(entries, "refit")
        if not refits:
            raise SealedAccessError(f"experiment '{experiment}' has no refit winner in the ledger; "
                                    "run the workflow up to refit_winner first")
        refit = refits[-1]
        model_path = exp / MODEL
        model_sha = sha256_file(model_path)
        if len(before) >= allowed:
            if _restore(exp, target, before[-1], model_sha):
                return read_json(target)
            raise SealedAccessError(refusal(experiment, before, allowed))
        choice = read_json(exp / CHOICE)
        if choice["winner"]["candidate"] != refit["details"]["winner"]:
            raise ModelFileError(f"choice.json names winner {choice['winner']['candidate']} but the ledger's refit is "
                                 f"{refit['details']['winner']}; re-run the tally and refit")
        # Trust exactly the types the refit recorded; a ledger older than that record has none (None),
        # and then load_model applies its static policy alone.
        model = load_model(str(model_path), refit["details"]["model_sha256"], refit["details"].get("model_types"))
        manifest = read_json(exp / MANIFEST)
        test_sha = sha256_file(exp / TEST)
        if test_sha != manifest["files"]["test.parquet"]:
            raise SealedAccessError(f"'{exp / TEST}' changed since the seal (sha256 {test_sha[:16]}…, sealed "
                                    f"{manifest['files']['test.parquet'][:16]}…); the test estimate would be "
                                    "meaningless: start a new experiment")
        test = pd.read_parquet(exp / TEST)  # the one read of the sealed rows
        x, y = split_xy(test, spec)
        outputs = model_outputs(model, x)
        played = replay(outputs, task, getattr(model, "classes_", None))
        values = score_outputs(metrics, played, y)
        ranking = pd.read_parquet(exp / RANKING)
        mine = ranking[ranking["candidate"] == choice["winner"]["candidate"]].set_index("metric")
        number = len(before) + 1
        verdict: dict[str, Any] = {
            "experiment": experiment,
            # The model file's hash is in the ledger, not here: skops files differ byte-wise between
            # processes (object ids in member names), and the verdict must be byte-identical on a rerun.
            "winner": {"candidate": choice["winner"]["candidate"], "family": choice["winner"]["family"]},
            "test_rows": len(test),
            "test_sha256": test_sha,
            "opening": number,
            "test_set_opened": f"test set opened {number} time{'s' if number > 1 else ''}",
            "compromised": number > 1,
            "metrics": {m: _metric_block(m, values[m], played, y, level, draws, seed, outputs, mine.loc[m].to_dict(),
                                         choice.get("optimism") or {})
                        for m in metrics},
            "metrics_note": ("scikit-learn scorer values: greater is better (neg_* metrics are negated errors). "
                             "test: the refit winner on the sealed test rows, with its interval. cv_mean: the "
                             "winner's raw cross-validated mean (optimistic: it was picked as the best). "
                             "cv_corrected_*: that mean with the selection optimism removed (primary metric). "
                             "agreement: where those CV estimates sit against the test interval, in plain words."),
            "caution": CAUTION,
        }
        if number > 1:
            verdict["reopen_reasons"] = reopen_reasons[: number - 1]
            verdict["warning"] = (f"the test set was opened {number} times; the test estimate is compromised "
                                  "(optimistic) because earlier looks could have influenced what was evaluated")
        archive = exp / ARCHIVE / f"{number}.json"
        write_json(archive, verdict)
        ledger.append(ledger_path, "open_test", {
            "opening": number, "winner": verdict["winner"]["candidate"], "model_sha256": model_sha,
            "test_sha256": test_sha, "rows": len(test), "verdict_sha256": sha256_file(archive),
            "reasons": reopen_reasons[: number - 1], "fingerprint": fingerprint,
            "interval_seed": seed, "interval_draws": draws, "fingerprint_parts": fingerprint_parts or {},
        }, rule=rule)
        write_json(target, verdict)
        return verdict
