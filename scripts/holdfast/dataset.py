"""Row keys, column roles and data checks shared by the seal, the folds and the fits."""

from __future__ import annotations

import hashlib
from typing import Any

import numpy as np
import pandas as pd

from .errors import DataError

KEY = "row_key"
MAX_CLASSES_FOR_INFERENCE = 20


def content_keys(frame: pd.DataFrame) -> pd.Series:
    """Key each row by a hash of its content; identical rows get '~1', '~2', ... suffixes.

    Values are rendered as text column by column (NaN as an empty field), so the key
    does not depend on row order or on the file format the row came from.
    """
    columns = sorted(frame.columns)
    text = frame[columns].astype("string").fillna("\x00").astype(str)
    joined = text.agg("\x1f".join, axis=1) if len(columns) > 1 else text[columns[0]]
    prefix = "\x1e".join(columns) + "\x1d"
    digests = [hashlib.sha256((prefix + row).encode("utf-8")).hexdigest()[:20] for row in joined]
    keys = pd.Series(digests, index=frame.index, dtype=object)
    occurrence = keys.groupby(keys).cumcount()
    keys = keys.where(occurrence == 0, keys + "~" + occurrence.astype(str))
    return keys.astype(str)


def row_keys(frame: pd.DataFrame, id_column: str | None) -> pd.Series:
    """The stable identity of each row: the id column as text, or a content hash."""
    if id_column is None:
        return content_keys(frame)
    ids = frame[id_column]
    if ids.isna().any():
        where = int(np.flatnonzero(ids.isna().to_numpy())[0])
        raise DataError(f"id column '{id_column}' is empty in {int(ids.isna().sum())} row(s) (first at data row "
                        f"{where + 1}); fill every id or unset data.id to key rows by content")
    keys = ids.astype(str)
    dup = keys.duplicated(keep=False)
    if dup.any():
        example = keys[dup].iloc[0]
        raise DataError(f"id column '{id_column}' has {int(keys.duplicated().sum())} duplicate value(s) "
                        f"(e.g. {example!r}); make ids unique or unset data.id to key rows by content")
    return keys


def hash_unit(keys: pd.Series, salt: str) -> np.ndarray:
    """Map each key to a number in [0, 1) from SHA-256 of salt and key alone."""
    out = np.empty(len(keys), dtype=np.float64)
    for i, key in enumerate(keys):
        digest = hashlib.sha256(f"{salt}\x1f{key}".encode()).digest()
        out[i] = int.from_bytes(digest[:8], "big") / 2.0**64
    return out


def keys_digest(keys: Any) -> str:
    """One hash for a set of row keys (order does not matter)."""
    digest = hashlib.sha256()
    for key in sorted(map(str, keys)):
        digest.update(key.encode("utf-8") + b"\n")
    return digest.hexdigest()


def infer_task(target: pd.Series) -> str:
    """Classification for text, boolean or few-valued integer targets; regression otherwise."""
    values = target.dropna()
    if values.dtype == bool or not pd.api.types.is_numeric_dtype(values):
        return "classification"
    as_float = values.astype(float)
    integral = bool(np.all(np.isfinite(as_float)) and np.all(as_float == np.round(as_float)))
    if integral and values.nunique() <= MAX_CLASSES_FOR_INFERENCE:
        return "classification"
    return "regression"


def non_feature_columns(spec: dict[str, Any]) -> list[str]:
    """Columns that never enter a model: key, target, id, group, time and the drop list."""
    cols = [KEY, spec["target"]]
    cols += [spec[r] for r in ("id", "group", "time") if spec.get(r)]
    cols += list(spec.get("drop", []))
    return cols


def feature_columns(frame: pd.DataFrame, spec: dict[str, Any]) -> list[str]:
    """Feature columns of a frame, in file order."""
    skip = set(non_feature_columns(spec))
    return [c for c in frame.columns if c not in skip]


TIME_UNITS = ("s", "ms", "us", "ns")


def parse_times(values: pd.Series, unit: str | None = None) -> pd.Series:
    """The time column as UTC timestamps: text or datetimes as they are, numbers as counts of ``unit`` since 1970."""
    if unit is None:
        return pd.to_datetime(values, utc=True)
    return pd.to_datetime(values, unit=unit, utc=True)


def _nested(values: pd.Series) -> bool:
    """True for a column of lists, arrays, mappings or sets (Parquet list, map or struct columns)."""
    if values.dtype != object:
        return False
    present = values.dropna()
    return not present.empty and isinstance(present.iloc[0], list | tuple | dict | set | np.ndarray)


def check_time_column(frame: pd.DataFrame, spec: dict[str, Any], source: str) -> None:
    """data.time holds timestamps, or numbers that data.time_unit says how to read; every value parses."""
    column, unit = spec["time"], spec.get("time_unit")
    values = frame[column]
    numeric = pd.api.types.is_numeric_dtype(values) and not pd.api.types.is_bool_dtype(values)
    if numeric and unit is None:
        example = (values.dropna().iloc[:1].tolist() or ["none"])[0]
        raise DataError(f"time column '{column}' of '{source}' holds numbers (e.g. {example}), not timestamps; set "
                        "data.time_unit to s, ms, us or ns to say what they count since 1970, or use ISO-8601 times")
    if unit is not None and not numeric:
        raise DataError(f"config key 'data.time_unit' is {unit} but time column '{column}' of '{source}' does not hold "
                        "numbers; remove data.time_unit (text times are read as ISO-8601)")
    if numeric:
        finite = np.isfinite(values.to_numpy(dtype=float, na_value=np.nan))
        if not finite.all():
            raise DataError(f"time column '{column}' has {int((~finite).sum())} value(s) that are blank or infinite in "
                            f"'{source}'; give every row a time")
    try:
        parsed = pd.to_datetime(values, errors="coerce", utc=True, **({"unit": unit} if unit else {}))
    except (OverflowError, ValueError) as exc:  # numbers beyond the timestamp range for this unit
        raise DataError(f"time column '{column}' of '{source}' has numbers out of range as {unit} since 1970 "
                        f"({exc}); check data.time_unit") from exc
    if parsed.isna().any() and numeric:
        raise DataError(f"time column '{column}' has {int(parsed.isna().sum())} number(s) out of range as {unit} since "
                        f"1970 in '{source}'; check data.time_unit")
    if parsed.isna().any():
        raise DataError(f"time column '{column}' has {int(parsed.isna().sum())} value(s) that are not "
                        f"timestamps in '{source}'; use ISO-8601 times")


def check_columns(frame: pd.DataFrame, spec: dict[str, Any], source: str) -> None:
    """Every column the config names exists; no nested values; the target is complete and finite; features finite."""
    roles = [("target", spec["target"])] + [(r, spec[r]) for r in ("id", "group", "time") if spec.get(r)]
    roles += [("drop", c) for c in spec.get("drop", [])]
    for role, column in roles:
        if column not in frame.columns:
            raise DataError(f"column '{column}' (data.{role}) is not in '{source}'; "
                            f"columns there are: {', '.join(map(str, frame.columns[:12]))}"
                            f"{' ...' if len(frame.columns) > 12 else ''}")
    if KEY in frame.columns:
        raise DataError(f"'{source}' has a column named '{KEY}', which holdfast reserves; rename it")
    dropped = set(spec.get("drop", []))
    for column in frame.columns:
        if column not in dropped and _nested(frame[column]):
            role = next((f"data.{r}" for r, c in roles if c == column), "a feature")
            raise DataError(f"column '{column}' ({role}) of '{source}' holds lists or structs (nested values), which "
                            + ("no model step can use; list it in data.drop (possible now: nothing is sealed yet)"
                               if role == "a feature" else "cannot serve as that role; use a column of plain values"))
    target = frame[spec["target"]]
    if target.isna().any():
        raise DataError(f"target column '{spec['target']}' has {int(target.isna().sum())} missing value(s) in "
                        f"'{source}'; drop or fill those rows before the seal")
    if pd.api.types.is_numeric_dtype(target) and not pd.api.types.is_bool_dtype(target):
        infinite = ~np.isfinite(target.to_numpy(dtype=float))
        if infinite.any():
            raise DataError(f"target column '{spec['target']}' has {int(infinite.sum())} infinite value(s) in "
                            f"'{source}' (first at data row {int(np.flatnonzero(infinite)[0]) + 1}); drop or fix "
                            "those rows before the seal")
    if spec.get("group") and frame[spec["group"]].isna().any():
        raise DataError(f"group column '{spec['group']}' has {int(frame[spec['group']].isna().sum())} missing "
                        f"value(s) in '{source}'; give every row a group")
    if spec.get("time"):
        check_time_column(frame, spec, source)
    features = feature_columns(frame, spec)
    if not features:
        raise DataError(f"'{source}' has no feature columns left after target, id, group, time and drop; "
                        "keep at least one feature")
    for column in features:
        values = frame[column]
        if pd.api.types.is_numeric_dtype(values) and values.dtype != bool:
            finite = np.isfinite(values.to_numpy(dtype=float, na_value=np.nan)) | values.isna().to_numpy()
            if not finite.all():
                raise DataError(f"feature column '{column}' has {int((~finite).sum())} infinite value(s) in "
                                f"'{source}'; replace them with finite values or blanks")


def check_target_for_task(target: pd.Series, task: str, source: str) -> None:
    """A classification target needs two classes or more; a regression target must be numeric."""
    if task == "classification":
        if target.nunique() < 2:
            raise DataError(f"target column '{target.name}' has a single class ('{target.iloc[0]}') in '{source}'; "
                            "classification needs at least two")
        check_label_spelling(target, source)
    elif not pd.api.types.is_numeric_dtype(target):
        raise DataError(f"target column '{target.name}' is not numeric in '{source}' but task is regression; "
                        "set task: classification or fix the column")


def check_label_spelling(target: pd.Series, source: str) -> None:
    """Refuse class labels that differ only in spaces or case ('yes' and 'Yes '): almost surely one class."""
    labels = [v for v in target.unique() if isinstance(v, str)]
    seen: dict[str, str] = {}
    for label in sorted(labels):
        plain = "".join(label.split()).casefold()
        if plain in seen:
            counts = target.value_counts()
            first = seen[plain]
            raise DataError(f"target column '{target.name}' has classes {first!r} ({int(counts[first])} rows) and "
                            f"{label!r} ({int(counts[label])} rows) in '{source}', which differ only in spaces or "
                            "case; make them one label in the data file before the seal")
        seen[plain] = label


def split_xy(frame: pd.DataFrame, spec: dict[str, Any]) -> tuple[pd.DataFrame, pd.Series]:
    """Feature frame and target series of a development or test frame."""
    return frame[feature_columns(frame, spec)], frame[spec["target"]]
