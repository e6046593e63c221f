"""The seal: split the data once into development rows and a sealed test set.

Membership of a row in the test set under the ``hashed`` scheme depends only on its
key and the salt, so it does not change when rows are added. The sealed file is
written read-only and its fingerprint goes into the manifest and the ledger.
"""

from __future__ import annotations

import os
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from . import __version__, ledger
from ._io import read_table, sha256_file, write_json, write_parquet
from .dataset import (
    KEY,
    check_columns,
    check_target_copies,
    check_target_for_task,
    hash_unit,
    infer_task,
    key_order,
    keys_digest,
    parse_times,
    row_keys,
)
from .errors import ConfigError, DataError, SealedAccessError
from .layout import DEV, LEDGER, MANIFEST, TEST
from .leakage import feature_identity, single_feature_alarms


def data_fingerprint(path: str | os.PathLike[str]) -> dict[str, Any]:
    """SHA-256, size and modification time of the data file."""
    stat = os.stat(path)
    return {"sha256": sha256_file(path), "bytes": stat.st_size, "mtime_ns": stat.st_mtime_ns}


def sealed_mask(keys: pd.Series, target: pd.Series | None, spec: dict[str, Any],
                groups: pd.Series | None = None) -> np.ndarray:
    """Boolean mask of the rows that go to the sealed test set."""
    if spec["scheme"] == "grouped":
        assert groups is not None
        values = groups.astype(str)
        unique = pd.Series(values.unique())
        chosen = set(unique[hash_unit(unique, spec["salt"]) < float(spec["fraction"])])
        return values.isin(chosen).to_numpy()
    if spec["scheme"] == "stratified_grouped":
        assert groups is not None and target is not None
        return _stratified_groups(groups.astype(str), target, spec)
    units = hash_unit(keys, spec["salt"])
    fraction = float(spec["fraction"])
    if spec["scheme"] == "hashed":
        return units < fraction
    if spec["scheme"] == "stratified":
        assert target is not None
        mask = np.zeros(len(keys), dtype=bool)
        classes = pd.factorize(target.to_numpy())[0]
        for label in range(int(classes.max()) + 1 if len(classes) else 0):
            idx = np.flatnonzero(classes == label)
            mask[_first_by_unit(idx, units[idx], keys, round(fraction * len(idx)))] = True
        return mask
    raise ConfigError(f"config key 'test.scheme': unknown scheme {spec['scheme']!r}; see config/README.md")


def _first_by_unit(idx: np.ndarray, units: np.ndarray, keys: pd.Series, take: int) -> np.ndarray:
    """The ``take`` rows of ``idx`` that come first in the order (hash unit, then key).

    The same rows as sorting them all by (unit, key) and taking the head, in linear time: rows below the
    take-th smallest unit all go, and the rows tied at that unit (almost never more than one) go in key order.
    """
    if take <= 0:
        return idx[:0]
    if take >= len(idx):
        return idx
    cut = np.partition(units, take - 1)[take - 1]
    below = idx[units < cut]
    tied = idx[units == cut]
    if len(tied) > 1:
        text = keys.to_numpy()
        tied = tied[np.argsort(np.array([str(text[i]) for i in tied], dtype=object), kind="stable")]
    return np.concatenate([below, tied[: take - len(below)]])


def _stratified_groups(groups: pd.Series, target: pd.Series, spec: dict[str, Any]) -> np.ndarray:
    """Whole groups to the test set, chosen per class so each class's test share is near the fraction.

    A group counts for its most common class (ties: the smallest label). Within a class, groups are
    taken in order of their salted hash while taking the next one brings the class's test rows
    nearer fraction × the class's rows; at least one group per class stays on each side.
    """
    fraction = float(spec["fraction"])
    table = pd.crosstab(groups.to_numpy(), target.to_numpy())
    majority = table.idxmax(axis=1)  # first maximum in sorted label order
    sizes = table.sum(axis=1)
    chosen: set[str] = set()
    for label in table.columns:
        members = pd.Series(majority.index[majority == label])
        if len(members) < 2:
            raise ConfigError(f"config key 'test.scheme' is stratified_grouped but only {len(members)} group(s) "
                              f"have class '{label}' as their most common class, so that class cannot be on both "
                              "sides; use test.scheme: grouped")
        order = members.iloc[np.lexsort((members.to_numpy(), hash_unit(members, spec["salt"])))]
        goal, taken, count = fraction * float(sizes.loc[members].sum()), 0.0, 0
        for group in order:
            size = float(sizes.loc[group])
            if count == len(members) - 1 or abs(taken + size - goal) >= abs(taken - goal):
                break
            chosen.add(group)
            taken, count = taken + size, count + 1
    return groups.isin(chosen).to_numpy()


def split_masks(frame: pd.DataFrame, keys: pd.Series, spec: dict[str, Any], task: str) -> tuple[np.ndarray, np.ndarray]:
    """(sealed test rows, rows left out of both sides) for the configured test scheme."""
    if spec["scheme"] == "time_tail":
        times = parse_times(frame[spec["time"]], spec.get("time_unit"))
        n_test = round(float(spec["fraction"]) * len(frame))
        if n_test < 1:
            return np.zeros(len(frame), dtype=bool), np.zeros(len(frame), dtype=bool)
        cut = times.sort_values(kind="stable").iloc[len(frame) - n_test]
        test = (times >= cut).to_numpy()
        gap = pd.Timedelta(hours=float(spec.get("gap_hours", 0)))
        dropped = ((times < cut) & (times >= cut - gap)).to_numpy()
        return test, dropped
    target = frame[spec["target"]] if task == "classification" else None
    groups = frame[spec["group"]] if spec.get("group") else None
    return sealed_mask(keys, target, spec, groups), np.zeros(len(frame), dtype=bool)


def time_order_at_seal(dev: pd.DataFrame, test: pd.DataFrame, spec: dict[str, Any], mode: str,
                       source: str) -> dict[str, Any] | None:
    """How many development rows are later than the earliest test row; an error where the scheme forbids it."""
    column = spec.get("time")
    if not column or test.empty:
        return None
    dev_times = parse_times(dev[column], spec.get("time_unit"))
    first_test = parse_times(test[column], spec.get("time_unit")).min()
    later = int((dev_times >= first_test).sum()) if spec["scheme"] == "time_tail" else int(
        (dev_times > first_test).sum())
    found = {"column": column, "scheme": spec["scheme"], "first_test_time": str(first_test),
             "dev_rows_after_first_test": later, "share": later / max(len(dev), 1), "mode": mode}
    if later and (spec["scheme"] == "time_tail" or mode == "error"):
        raise DataError(f"time column '{column}' of '{source}' contradicts the test split ({spec['scheme']}): "
                        f"{later} development row(s) are not earlier than the first test row ({first_test}); "
                        + ("use test.scheme: time_tail or set leakage.time_order: note"
                           if spec["scheme"] != "time_tail" else "check the time column for mixed time zones"))
    return found


def check_sides(n_test: int, n_dev: int, spec: dict[str, Any], source: str) -> None:
    """At least 2 rows on each side of the seal, or the setting is impossible."""
    if n_test < 2 or n_dev < 2:
        raise ConfigError(f"config key 'test.fraction' is {spec['fraction']}: with test.scheme {spec['scheme']} it "
                          f"leaves {n_test} test and {n_dev} development row(s) of '{source}', fewer than 2 on a "
                          "side; choose a fraction nearer 0.5 (or another salt)")


def check_development_classes(dev_target: pd.Series, source: str) -> None:
    """Classification needs at least two classes among the development rows, not only in the data."""
    if dev_target.nunique() < 2:
        raise DataError(f"target column '{dev_target.name}' has a single class ('{dev_target.iloc[0]}') among the "
                        f"development rows of '{source}' (the others all fell into the test set); use "
                        "test.scheme: stratified or another test.salt")


def check_test_partition(dev_target: pd.Series, test_target: pd.Series, metrics: list[str] | None,
                         source: str) -> None:
    """Refuse a test partition that would leave a class unlearnt or a test metric undefined (counts only, no scores).

    A class only among the sealed rows can never be predicted; a metric that cannot be computed on the sealed
    rows' labels (a single class under roc_auc, say) would make the one opening worthless.
    """
    dev_counts, test_counts = dev_target.value_counts(), test_target.value_counts()
    only = [label for label in sorted(test_counts.index, key=str) if label not in dev_counts.index]
    if only:
        raise DataError(f"class '{only[0]}' of target column '{test_target.name}' would be only in the sealed test "
                        f"rows of '{source}' ({int(test_counts[only[0]])} row(s), none among the development rows), "
                        "so no candidate could learn it and its test scores would be undefined; use test.scheme: "
                        "stratified or another test.salt, or remove that class's rows before the seal")
    if not metrics or test_target.empty:
        return
    from .scoring import labels_text, metric_problem

    classes = np.asarray(sorted(dev_counts.index))
    for name in metrics:
        problem = metric_problem(name, classes, test_target.to_numpy())
        if problem is not None:
            held = (f"a single class ('{test_counts.index[0]}')" if len(test_counts) == 1 else
                    f"classes {labels_text(sorted(test_counts.index, key=str))}")
            raise DataError(f"the sealed test rows of '{source}' would hold {held} in {len(test_target)} row(s), and "
                            f"metric '{name}' cannot be computed on them (scikit-learn: {problem}); use test.scheme: "
                            "stratified or a larger test.fraction, or remove the metric")


def check_before_seal(config: dict[str, Any], frame: pd.DataFrame, test_rows: np.ndarray, dropped: np.ndarray,
                      task: str) -> None:
    """Refuse, while it can still be fixed, metrics that cannot score the target and a test partition that would
    leave a class unlearnt or a metric undefined; plan.prepare runs it on every not-yet-sealed experiment."""
    from .config import with_task
    from .scoring import check_metrics, check_metrics_for_target, check_regression_metrics

    metrics = with_task(config, task)["metrics"]
    check_metrics(metrics, task)  # names first, so an unknown scorer is reported as such
    target = frame[config["data"]["target"]]
    if task != "classification":
        check_regression_metrics(metrics, target[~test_rows & ~dropped])
        return
    dev_target = target[~test_rows & ~dropped]
    check_metrics_for_target(metrics, dev_target, defaults=not config.get("metrics"))
    check_test_partition(dev_target, target[test_rows], metrics, config["data"]["path"])


def check_folds_before_seal(config: dict[str, Any], spec: dict[str, Any], dev: pd.DataFrame, dev_keys: pd.Series,
                            task: str) -> None:
    """Refuse before the seal what the fold step would refuse after it: when a leakage guard is set to ``error``
    and the folds could trip it (duplicates; data.group with a fold scheme that ignores groups; data.time with one
    that ignores time), draw the folds of the rows the seal would leave for development and put them through the
    fold step's own leakage report. Nothing is kept; the fold step draws and checks them again after the seal."""
    import tempfile

    from .folds import assign, leakage_report, scheme_ignores_time
    from .foldspec import GROUPED

    settings, fold_spec = config["leakage"], config["folds"]
    if not (settings.get("duplicates") == "error"
            or (settings.get("group_overlap") == "error" and spec.get("group") and fold_spec["scheme"] not in GROUPED)
            or (settings.get("time_order") == "error" and spec.get("time") and scheme_ignores_time(fold_spec))):
        return
    keyed = dev.reset_index(drop=True).assign(**{KEY: np.asarray(dev_keys)})
    table = assign(keyed, fold_spec, spec["target"], spec["group"], spec.get("time"), spec.get("time_unit"))
    with tempfile.TemporaryDirectory() as scratch:
        leakage_report(keyed, table, spec, task, settings, {}, str(Path(scratch) / "summary.parquet"), fold_spec)


def _split(frame: pd.DataFrame, keys: pd.Series, test_rows: np.ndarray,
           dev_rows: np.ndarray) -> tuple[pd.DataFrame, pd.DataFrame]:
    """(test, dev): the rows of each side with the row key in front, column by column.

    Each column of ``frame`` is dropped as soon as both sides have their copy of it, so the data is held
    about twice at the peak (frame plus the two sides), not three times (frame, a keyed copy, the sides).
    """
    sides: list[dict[Any, Any]] = [{}, {}]
    positions = [np.flatnonzero(test_rows), np.flatnonzero(dev_rows)]
    for column in [KEY, *frame.columns]:
        values = keys if column == KEY else frame.pop(column)
        plain = isinstance(values.dtype, np.dtype)
        for side, rows in zip(sides, positions, strict=True):
            side[column] = (pd.Series(np.take(values.to_numpy(), rows), name=values.name, copy=False) if plain
                            else values.take(rows).reset_index(drop=True))
        del values
    test, dev = (pd.DataFrame(side, copy=False) for side in sides)
    return test, dev


def _written(path: Path, frame: pd.DataFrame | None, mode: int | None) -> str:
    """Write ``frame`` to ``path`` (unless None: already there) and return the file's SHA-256."""
    if frame is not None:
        write_parquet(path, frame, mode=mode)
    return sha256_file(path)


def load_checked(path: str | os.PathLike[str], spec: dict[str, Any]) -> tuple[pd.DataFrame, str]:
    """Read the data file, check the declared columns and return it with the task."""
    frame = read_table(path)
    check_columns(frame, spec, str(path))
    task = spec.get("task") or infer_task(frame[spec["target"]])
    check_target_for_task(frame[spec["target"]], task, str(path))
    check_target_copies(frame, spec, task, str(path))
    return frame, task


def _interrupted_seal(out: Path, test: pd.DataFrame, data_sha256: str, sealed_spec: dict[str, Any],
                      experiment: str) -> dict[str, Any] | None:
    """Check what a killed seal left behind; return its ledger entry, if it wrote one.

    A seal killed after writing the sealed file (or its ledger line) but before the manifest
    may finish on a rerun only if it would seal exactly the same rows: the existing file's bytes
    must equal what this seal writes, and a recorded seal must name the same data and spec.
    Anything else is refused, as a second seal always is.
    """
    from ._io import write_parquet as _write

    existing = out / TEST
    events = ledger.events(ledger.read(out / LEDGER), "seal") if (out / LEDGER).exists() else []
    if not existing.exists() and not events:
        return None
    refuse = SealedAccessError(f"experiment '{experiment}' is already sealed ('{existing}' or its ledger line "
                               "exists) and this seal would differ; the seal never re-runs: name a new experiment "
                               "to draw a new test set")
    probe = out / ".sealed-check.parquet"
    _write(probe, test)
    try:
        expected = sha256_file(probe)
    finally:
        probe.unlink()
    if existing.exists() and sha256_file(existing) != expected:
        raise refuse
    if len(events) > 1:
        raise refuse
    if events:
        details = events[0]["details"]
        if (details.get("data_sha256") != data_sha256 or details.get("spec") != sealed_spec
                or details.get("files", {}).get("test.parquet") != expected):
            raise refuse
        return events[0]
    return None


def _start_signing(out: Path, signing_key: str) -> str:
    """Write signing.json beside the ledger (from now on every line is signed); return the public key."""
    from .signing import load_private_key, public_key_text

    public = public_key_text(load_private_key(signing_key))
    write_json(out / ledger.SIGNING, {"private_key": str(Path(signing_key).resolve()), "public_key": public})
    return public


def seal(data_path: str | os.PathLike[str], spec: dict[str, Any], exp_dir: str | os.PathLike[str],
         experiment: str, rule: str | None = None, leakage: dict[str, Any] | None = None,
         seen_rows_reason: str | None = None, signing_key: str | None = None) -> dict[str, Any]:
    """Seal the test partition of an experiment and return its manifest.

    Refuses to run when the experiment already has a manifest: the seal happens once per
    experiment. A seal killed before its manifest was written may finish on a rerun, but only
    when it seals byte-identical rows (see :func:`_interrupted_seal`). The writing holds a lock
    and looks for the manifest again under it, so two seals started at once (say, after a misused
    ``--unlock``) give one seal and one refusal, never two seal events.
    """
    out = Path(exp_dir)
    if (out / MANIFEST).exists():
        raise SealedAccessError(f"experiment '{experiment}' is already sealed ('{out / MANIFEST}' exists); "
                                "the seal never re-runs: name a new experiment to draw a new test set")
    frame, task = load_checked(data_path, spec)
    keys = row_keys(frame, spec.get("id"))
    with ThreadPoolExecutor(max_workers=1) as helper:
        # Sorting the keys and the feature identity release the GIL: they run beside the hash units,
        # whose SHA-256 per key holds it.
        ordered = helper.submit(key_order, keys)
        identity = helper.submit(feature_identity, frame, spec)
        mask, dropped = split_masks(frame, keys, spec, task)
        n_test, n_dev = int(mask.sum()), int((~mask & ~dropped).sum())
        check_sides(n_test, n_dev, spec, str(data_path))
        if task == "classification":
            check_development_classes(frame[spec["target"]][~mask & ~dropped], str(data_path))
            check_test_partition(frame[spec["target"]][~mask & ~dropped], frame[spec["target"]][mask], None,
                                 str(data_path))
        development = ~mask & ~dropped
        duplicates = identity.result().repeated(development, mask)
        order = ordered.result()
    from .overlap import unopened_test_rows

    unopened_notes = unopened_test_rows(frame, development, str(data_path), spec["target"], out.parent, experiment)
    guards = {"duplicates": "warn", "single_feature_threshold": 0.98, **(leakage or {})}
    n_rows, columns = len(frame), [str(c) for c in frame.columns]
    test, dev = _split(frame, keys, mask, development)
    del frame  # from here on only the two sides are kept, not a third copy of every row
    if duplicates and guards["duplicates"] == "error":
        raise DataError(f"{duplicates} sealed test row(s) of '{data_path}' repeat the features of a development row "
                        "(exact duplicates); remove them or set leakage.duplicates: warn")
    from .overlap import SEALED_ROWS, write_sealed_rows
    from .overlap import check as check_overlap

    seen_before = check_overlap(test[KEY], out.parent, experiment, seen_rows_reason,
                                rows=lambda: test.drop(columns=[KEY]))
    time_check = time_order_at_seal(dev, test, spec, guards.get("time_order", "note"), str(data_path))

    with ledger.locked(out / "seal"):  # the checks above wrote nothing; from here on, one seal at a time
        if (out / MANIFEST).exists():
            raise SealedAccessError(f"experiment '{experiment}' was sealed by another run while this one "
                                    "prepared; the seal never re-runs: name a new experiment to draw a new "
                                    "test set")
        fingerprint = data_fingerprint(data_path)
        sealed_spec = {**spec, "task": task}
        new_signing = signing_key is not None and not (out / ledger.SIGNING).exists()
        public_key = _start_signing(out, signing_key) if signing_key else None
        earlier = _interrupted_seal(out, test, fingerprint["sha256"], sealed_spec, experiment)
        new_test = not (out / TEST).exists()
        try:
            with ThreadPoolExecutor(max_workers=2) as writers:  # Parquet writing releases the GIL
                test_file = writers.submit(_written, out / TEST, test if new_test else None, 0o444)
                dev_file = writers.submit(_written, out / DEV, dev, None)
                # Work that cannot refuse the seal runs beside the writing (every refusal came before it).
                digests = {"dev_sha256": keys_digest(keys, order, development),
                           "test_sha256": keys_digest(keys, order, mask)}
                alarms = single_feature_alarms(dev, spec, task, float(guards["single_feature_threshold"]))
                rows_sha256 = write_sealed_rows(out, test, spec)
                files = {"test.parquet": test_file.result(), "dev.parquet": dev_file.result(),
                         Path(SEALED_ROWS).name: rows_sha256}
        except BaseException:  # an unexpected failure leaves what it found: no sealed file this seal wrote
            if new_test:
                (out / TEST).unlink(missing_ok=True)
                (out / SEALED_ROWS).unlink(missing_ok=True)
            (out / DEV).unlink(missing_ok=True)
            if new_signing:
                (out / ledger.SIGNING).unlink(missing_ok=True)
            raise
        manifest: dict[str, Any] = {
            "experiment": experiment,
            "data": {"path": str(data_path), "rows": n_rows, "columns": columns, **fingerprint},
            "spec": sealed_spec,
            "counts": {"dev": n_dev, "test": n_test, "left_out_in_gap": int(dropped.sum()),
                       **({"dev_groups": int(dev[spec["group"]].nunique())} if spec.get("group") else {})},
            "keys": {**digests, "from": "id column" if spec.get("id") else "row content"},
            "files": files,
            "holdfast": __version__,
            "leakage": {"duplicate_feature_rows_dev_test": duplicates, "single_feature": alarms,
                        "single_feature_threshold": float(guards["single_feature_threshold"]),
                        **({"time_order": time_check} if time_check else {})},
            **({"seen_before": seen_before} if seen_before else {}),
            **({"unopened_notes": unopened_notes} if unopened_notes else {}),
            **({"public_key": public_key} if public_key else {}),
        }
        if task == "classification":
            manifest["counts"]["classes"] = {
                "dev": {str(k): int(v) for k, v in dev[spec["target"]].value_counts().sort_index().items()},
                "test": {str(k): int(v) for k, v in test[spec["target"]].value_counts().sort_index().items()},
            }
        entry = earlier or ledger.append(out / LEDGER, "seal", {
            "experiment": experiment, "data_sha256": fingerprint["sha256"], "spec": sealed_spec,
            "counts": manifest["counts"], "keys": manifest["keys"], "files": manifest["files"],
            "leakage": manifest["leakage"], **({"seen_before": seen_before} if seen_before else {}),
            **({"unopened_notes": unopened_notes} if unopened_notes else {}),
            **({"public_key": public_key} if public_key else {}),
        }, rule=rule)
        if earlier and earlier["details"].get("files") != manifest["files"]:
            raise SealedAccessError(f"experiment '{experiment}': the interrupted seal recorded other file hashes than "
                                    "this seal gives; name a new experiment to draw a new test set")
        manifest["ledger_anchor"] = entry["hash"]
        write_json(out / MANIFEST, manifest)
        return manifest
