"""The opening: the only code that reads the sealed test set, and only once.

Before reading, every record of earlier openings is counted under a lock (``holdfast.openings``): an
experiment whose test set was already opened is refused unless the config records one more written
reason. The opening is recorded in four places before the first sealed row is read (write-ahead), so a
crash or a kill after the read still counts. Once the rows are read, the step always ends with a
verdict: a metric that cannot be computed on these rows is "undefined, because ...", never a crash.
The verdict puts each test metric, with its interval, beside the winner's CV estimate.
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import shutil
import warnings
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from . import ledger, openings
from ._io import read_json, sha256_file, write_json, write_parquet
from .dataset import split_xy
from .errors import ModelFileError, SealedAccessError
from .fit import limit_threads
from .layout import CHOICE, LEDGER, MANIFEST, MODEL, OPENING_LOCK, RANKING, TEST
from .refit import load_model
from .scoring import bootstrap_interval, clopper_pearson, model_outputs, replay
from .tally import CAUTION

BINOMIAL = {"accuracy"}


def refusal(experiment: str, count: int, last: dict[str, Any] | None, allowed: int) -> str:
    """Why a further opening is refused, and the two honest ways on."""
    when = f", last at {last['time']} for model {last['winner']}" if last else ""
    return (f"The sealed test set of experiment '{experiment}' was already opened {count} time(s){when} "
            f"({allowed} opening(s) allowed by the config). "
            "A second look makes the test estimate optimistic: anything chosen or changed after seeing a test "
            "score turns the test set into one more validation set. Honest ways on: start a new experiment "
            "(new experiment name and test.salt, so a fresh seal), or add a written reason to test.reopen_reasons; "
            f"every later output then says 'test set opened {count + 1} times'")


def last_opening(exp: Path, entries: list[dict[str, Any]]) -> dict[str, Any] | None:
    """Time and model of the latest opening, from the ledger or else from the latest write-ahead marker."""
    finished = opened(entries)
    if finished:
        return {"time": finished[-1]["time"], "winner": finished[-1]["details"].get("winner")}
    numbers = openings.records(exp).markers
    if numbers:
        try:
            marker = read_json(openings.marker_path(exp, numbers[-1]))
            return {"time": marker.get("started"), "winner": marker.get("winner")}
        except (OSError, ValueError):
            return None
    return None


def opened(entries: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """The ledger's finished-opening events."""
    return ledger.events(entries, "open_test")


def _restore(exp: Path, verdict_path: Path, last: dict[str, Any], model_sha: str) -> bool:
    """Put back the verdict of the last opening from its archive copy, if nothing it used changed."""
    archived = openings.archive_path(exp, int(last["details"]["opening"]))
    if verdict_path.exists() or not archived.exists():
        return False
    if sha256_file(archived) != last["details"]["verdict_sha256"] or last["details"]["model_sha256"] != model_sha:
        return False
    shutil.copyfile(archived, verdict_path)
    return True


def _inside(value: float | None, low: float | None, high: float | None) -> bool | None:
    if value is None or low is None or high is None or not (np.isfinite(low) and np.isfinite(high)):
        return None
    return bool(low <= value <= high)


def _metric_block(metric: str, value: float | None, undefined: str, model: Any, y: Any, level: float, draws: int,
                  seed: int, outputs: dict[str, np.ndarray], cv: dict[str, Any],
                  optimism: dict[str, Any]) -> dict[str, Any]:
    low: float | None
    high: float | None
    if value is None:
        low = high = None
        method = "none: the metric is undefined on the test rows"
    elif metric in BINOMIAL:
        correct = int(np.sum(outputs["predict"] == np.asarray(y)))
        low, high = clopper_pearson(correct, len(y), level)
        method = "exact binomial (Clopper-Pearson)"
    else:
        low, high = bootstrap_interval(metric, model, y, level, draws, seed)
        method = f"percentile bootstrap, {draws} resamples, seed {seed}"
        if not (np.isfinite(low) and np.isfinite(high)):
            low = high = None
            method += ": too many resamples had an undefined score, so no interval"
    block: dict[str, Any] = {
        "test": value, "interval": [low, high], "level": level, "interval_method": method,
        "cv_mean": _finite(cv.get("mean")), "cv_se": _finite(cv.get("se")),
        "cv_se_corrected": _finite(cv.get("se_corrected")), "cv_folds": int(cv.get("folds", 0)),
        "cv_mean_inside_interval": _inside(_finite(cv.get("mean")), low, high),
    }
    if undefined:
        block["undefined"] = undefined
    if optimism.get("metric") == metric:
        for name in ("tibshirani", "bbc"):
            corrected = (optimism.get(name) or {}).get("corrected")
            block[f"cv_corrected_{name}"] = corrected
            block[f"cv_corrected_{name}_inside_interval"] = _inside(corrected, low, high)
    else:
        block["cv_corrected_note"] = "no optimism correction: the winner was not selected on this metric"
    block["agreement"], block["agreement_note"] = agreement(block)
    return block


def _finite(value: Any) -> float | None:
    """A JSON-safe number: None for a missing or non-finite value."""
    try:
        number = float(value)
    except (TypeError, ValueError):
        return None
    return number if np.isfinite(number) else None


def score_or_undefined(metrics: list[str], played: Any, y: Any) -> dict[str, tuple[float | None, str]]:
    """Each metric's test value, or None with the reason it is undefined on these rows (never raises)."""
    from sklearn.metrics import get_scorer

    positions = np.arange(len(y)).reshape(-1, 1)
    target = np.asarray(y)
    out: dict[str, tuple[float | None, str]] = {}
    for name in metrics:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            try:
                value = float(get_scorer(name)(played, positions, target))
            except Exception as exc:  # any scorer failure on these rows means "undefined", with its reason
                first = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
                out[name] = (None, f"undefined, because scikit-learn's scorer refused these rows: {first}")
                continue
        if not np.isfinite(value):
            said = "; ".join(sorted({str(w.message).splitlines()[0] for w in caught}))[:300]
            out[name] = (None, f"undefined, because the score is {value} on these rows" + (f" ({said})" if said
                                                                                            else ""))
        else:
            out[name] = (value, "")
    return out


def agreement(block: dict[str, Any]) -> tuple[str, str]:
    """Where the CV estimates sit against the test interval, and what a gap can mean, in plain words.

    The corrected estimates are compared when the metric has them, else the raw CV mean. Scores are
    greater-is-better, so a CV estimate below the interval means the test set found the refit
    winner better than CV predicted, and above it worse.
    """
    names = [n for n in ("cv_corrected_bbc", "cv_corrected_tibshirani") if block.get(n) is not None] or ["cv_mean"]
    low, high = block["interval"]
    values = [block.get(n) for n in names]
    if block.get("undefined"):
        return "not judged", f"the test score is {block['undefined']}"
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


def _now() -> str:
    return _dt.datetime.now(_dt.UTC).isoformat(timespec="microseconds").replace("+00:00", "Z")


def _check_request(request_path: str | None, number: int, model_sha: str, choice_sha: str, experiment: str) -> str:
    """The request ``holdfast open`` wrote: it must be for this opening, this model and this choice."""
    if request_path is None:
        return ""
    try:
        request = read_json(request_path)
    except (OSError, ValueError) as exc:
        raise SealedAccessError(f"opening request '{request_path}' cannot be read ({exc}); open the test set with "
                                f"'holdfast open' on the experiment folder") from exc
    wanted = {"opening": number, "model_sha256": model_sha, "choice_sha256": choice_sha, "experiment": experiment}
    for key, value in wanted.items():
        if request.get(key) != value:
            raise SealedAccessError(f"opening request '{request_path}' was made for {key} {request.get(key)!r}, but "
                                    f"this opening would be {value!r}; nothing was read. Run 'holdfast open' again "
                                    "to see what would be opened and confirm it")
    return sha256_file(request_path)


def _register_test_keys(exp: Path, test_sha: str) -> str:
    """Copy the sealed row keys (only that column) beside the results folder's registry; return the file name."""
    name = f"{test_sha[:24]}.parquet"
    target = openings.registry_path(exp).parent / "test_keys" / name
    if not target.exists():
        keys = pd.read_parquet(exp / TEST, columns=["row_key"])
        write_parquet(target, keys)
    return f"test_keys/{name}"


def _evaluate(model: Any, test: pd.DataFrame, spec: dict[str, Any], metrics: list[str], task: str, level: float,
              draws: int, seed: int, mine: pd.DataFrame, optimism: dict[str, Any]) -> dict[str, Any]:
    """Every metric's block; undefined metrics and a model that cannot predict give reasons, not exceptions."""
    x, y = split_xy(test, spec)
    try:
        outputs = model_outputs(model, x)
    except Exception as exc:  # the rows were read: the verdict must still be written
        first = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        reason = f"undefined, because the refit winner could not predict the sealed test rows ({first})"
        return {m: _metric_block(m, None, reason, None, y, level, draws, seed, {}, _cv(mine, m), optimism)
                for m in metrics}
    played = replay(outputs, task, getattr(model, "classes_", None))
    values = score_or_undefined(metrics, played, y)
    return {m: _metric_block(m, values[m][0], values[m][1], played, y, level, draws, seed, outputs, _cv(mine, m),
                             optimism) for m in metrics}


def _cv(mine: pd.DataFrame, metric: str) -> dict[str, Any]:
    return mine.loc[metric].to_dict() if metric in mine.index else {}


def open_test(exp_dir: str, experiment: str, spec: dict[str, Any], metrics: list[str], task: str,
              reopen_reasons: list[str], level: float, draws: int, seed: int, verdict_path: str,
              fingerprint: str = "", rule: str | None = None,
              fingerprint_parts: dict[str, str] | None = None, request_path: str | None = None,
              threads: int = 1) -> dict[str, Any]:
    """Open the sealed test set once, score the refit winner on it, write final/verdict.json.

    ``request_path`` is the confirmation ``holdfast open`` wrote; when given, it must name this opening,
    model and choice, so a stale or copied request cannot open anything else. ``threads`` bounds the
    numeric libraries (the rule declares none, so Snakemake gives the job one).
    """
    limit_threads(threads)
    exp = Path(exp_dir)
    ledger_path = exp / LEDGER
    target = Path(verdict_path)
    with ledger.locked(exp / OPENING_LOCK):
        entries = ledger.read(ledger_path)
        before = openings.records(exp).count
        allowed = 1 + len(reopen_reasons)
        refits = ledger.events(entries, "refit")
        if not refits:
            raise SealedAccessError(f"experiment '{experiment}' has no refit winner in the ledger; "
                                    "run the workflow up to refit_winner first")
        refit = refits[-1]
        model_path = exp / MODEL
        model_bytes = model_path.read_bytes()  # read once: hashed here, checked and loaded by load_model
        model_sha = hashlib.sha256(model_bytes).hexdigest()
        if before >= allowed:
            finished = opened(entries)
            if finished and len(finished) == before and _restore(exp, target, finished[-1], model_sha):
                return read_json(target)
            raise SealedAccessError(refusal(experiment, before, last_opening(exp, entries), allowed))
        choice = read_json(exp / CHOICE)
        if choice["winner"]["candidate"] != refit["details"]["winner"]:
            raise ModelFileError(f"choice.json names winner {choice['winner']['candidate']} but the ledger's refit is "
                                 f"{refit['details']['winner']}; re-run the tally and refit")
        number = before + 1
        request_sha = _check_request(request_path, number, model_sha, sha256_file(exp / CHOICE), experiment)
        # Trust exactly the types the refit recorded; a ledger older than that record has none (None),
        # and then load_model applies its static policy alone.
        model = load_model(str(model_path), refit["details"]["model_sha256"], refit["details"].get("model_types"),
                           data=model_bytes)
        del model_bytes
        manifest = read_json(exp / MANIFEST)
        test_sha = sha256_file(exp / TEST)
        if test_sha != manifest["files"]["test.parquet"]:
            raise SealedAccessError(f"'{exp / TEST}' changed since the seal (sha256 {test_sha[:16]}…, sealed "
                                    f"{manifest['files']['test.parquet'][:16]}…); the test estimate would be "
                                    "meaningless: start a new experiment")
        keys_file = _register_test_keys(exp, test_sha)
        started = {"experiment": experiment, "started": _now(), "winner": choice["winner"]["candidate"],
                   "model_sha256": model_sha, "test_sha256": test_sha, "fingerprint": fingerprint,
                   "fingerprint_parts": fingerprint_parts or {}, "request_sha256": request_sha}
        openings.write_ahead(exp, number, started, keys_file, rule=rule)
        test = pd.read_parquet(exp / TEST)  # the one read of the sealed rows: every record above already counts it
        from .overlap import register_rows

        register_rows(openings.registry_path(exp).parent / keys_file, test)
        ranking = pd.read_parquet(exp / RANKING)
        mine = ranking[ranking["candidate"] == choice["winner"]["candidate"]].set_index("metric")
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
            "metrics": _evaluate(model, test, spec, metrics, task, level, draws, seed, mine,
                                 choice.get("optimism") or {}),
            "metrics_note": ("scikit-learn scorer values: greater is better (neg_* metrics are negated errors). "
                             "test: the refit winner on the sealed test rows, with its interval. cv_mean: the "
                             "winner's raw cross-validated mean (optimistic: it was picked as the best). "
                             "cv_corrected_*: that mean with the selection optimism removed (primary metric). "
                             "agreement: where those CV estimates sit against the test interval, in plain words."),
            "caution": CAUTION,
        }
        if choice.get("rounds"):
            verdict["selection"] = {"rounds": choice["rounds"]["count"],
                                    "candidates_tried": choice["rounds"]["candidates_tried"],
                                    "text": choice["rounds"]["text"]}
        if manifest.get("seen_before"):
            verdict["test_rows_seen_before"] = manifest["seen_before"]
        if number > 1:
            verdict["reopen_reasons"] = reopen_reasons[: number - 1]
            verdict["warning"] = (f"the test set was opened {number} times; the test estimate is compromised "
                                  "(optimistic) because earlier looks could have influenced what was evaluated")
        archive = openings.archive_path(exp, number)
        write_json(archive, verdict)
        ledger.append(ledger_path, "open_test", {
            "opening": number, "winner": verdict["winner"]["candidate"], "model_sha256": model_sha,
            "test_sha256": test_sha, "rows": len(test), "verdict_sha256": sha256_file(archive),
            "reasons": reopen_reasons[: number - 1], "fingerprint": fingerprint,
            "interval_seed": seed, "interval_draws": draws, "fingerprint_parts": fingerprint_parts or {},
            "marker_sha256": sha256_file(openings.marker_path(exp, number)),
        }, rule=rule)
        write_json(target, verdict)
        # The records of what was opened lose write permission (a guard against careless edits; root can still
        # write). Snakemake's outputs keep theirs: it treats a read-only output as protected and would refuse
        # the honest re-opening with a written reason.
        for path in (archive, openings.marker_path(exp, number)):
            path.chmod(path.stat().st_mode & ~0o222)
        return verdict
