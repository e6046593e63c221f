"""Row keys, column roles and data checks shared by the seal, the folds and the fits."""

from __future__ import annotations

import hashlib
from typing import Any

import numpy as np
import pandas as pd

from .errors import DataError

KEY = "row_key"
MAX_CLASSES_FOR_INFERENCE = 20


_HEX = np.frombuffer(b"0123456789abcdef", dtype=np.uint8)
try:  # CPython's own SHA-256 (FIPS 180-4): about a fifth quicker than OpenSSL's on messages this short
    from _sha2 import sha256 as _sha256  # Python 3.12 on
except ImportError:
    try:
        from _sha256 import sha256 as _sha256  # Python 3.11
    except ImportError:
        _sha256 = hashlib.sha256
_SHA256_DIGEST = type(_sha256()).digest
_KEY_HASH_MULTIPLIER = np.uint64(0x9E3779B97F4A7C15)


def _strings(values: Any) -> Any:
    """The values as an Arrow string array with no nulls (text as ``str(value)``), or None when that is not so."""
    import pyarrow as pa

    series = values if isinstance(values, pd.Series) else pd.Series(values)
    if not isinstance(series.dtype, pd.StringDtype):
        if not (pd.api.types.is_integer_dtype(series.dtype) or pd.api.types.infer_dtype(series) == "string"):
            return None  # floats, mixed objects, ...: the caller renders each value as Python does
        series = series.astype(str)
    if series.isna().any():
        return None
    array = pa.array(series)
    if isinstance(array, pa.ChunkedArray):
        array = array.combine_chunks()
    return array.cast(pa.large_string()) if array.type != pa.large_string() else array


def _digests(messages: Any, chunk: int = 1 << 16) -> np.ndarray:
    """SHA-256 of each message (an Arrow string array or a list of bytes): an (n, 32) array of bytes.

    One hash call per message, iterated in C (``map``) with no Python code run per row, a chunk of
    rows at a time so that only one chunk's Python byte strings exist at once.
    """
    import pyarrow as pa

    out = np.empty((len(messages), 32), dtype=np.uint8)
    for start in range(0, len(messages), chunk):
        part = messages[start:start + chunk]
        if isinstance(part, pa.Array):
            part = part.cast(pa.large_binary()).to_pylist()
        joined = b"".join(map(_SHA256_DIGEST, map(_sha256, part)))
        out[start:start + len(part)] = np.frombuffer(joined, dtype=np.uint8).reshape(-1, 32)
    return out


def key_hashes(strings: Any) -> np.ndarray:
    """A 64-bit number per string of an Arrow string array, equal for equal strings (not cryptographic).

    For set operations on millions of row keys: comparing these numbers is many times faster than
    hashing the strings one by one, and callers confirm every match on the strings themselves.
    The string's bytes are read 8 at a time straight from the Arrow buffers.
    """
    n = len(strings)
    offsets = np.frombuffer(strings.buffers()[1], dtype=np.int64)[strings.offset:strings.offset + n + 1]
    raw = strings.buffers()[2]
    data = np.frombuffer(raw, dtype=np.uint8) if raw is not None else np.zeros(0, dtype=np.uint8)
    end = int(offsets[-1]) if n else 0
    padded = np.zeros(end + 8, dtype=np.uint8)
    padded[:end] = data[:end]
    words = np.ndarray(shape=(end + 1,), dtype="<u8", buffer=padded, strides=(1,))  # a word at every byte
    starts, lengths = offsets[:-1], np.diff(offsets)
    hashed = lengths.astype(np.uint64)
    for j in range(int(lengths.max() + 7) // 8 if n else 0):
        left = np.clip(lengths - 8 * j, 0, 8).astype(np.uint64)
        word = words[np.minimum(starts + 8 * j, end)]
        word &= np.where(left == 8, np.uint64(2**64 - 1), (np.uint64(1) << (left * np.uint64(8))) - np.uint64(1))
        hashed *= _KEY_HASH_MULTIPLIER
        hashed += word
    return hashed


def shared_keys(first: Any, second: Any) -> list[str]:
    """The distinct keys found in both collections, sorted (exact; found through :func:`key_hashes`)."""
    a = _strings(first if isinstance(first, pd.Series) else pd.Series(list(first), dtype=object))
    b = _strings(second if isinstance(second, pd.Series) else pd.Series(list(second), dtype=object))
    if a is None or b is None or not len(a) or not len(b):
        return sorted(set(map(str, first)) & set(map(str, second)))
    ha, hb = key_hashes(a), key_hashes(b)
    maybe_a = np.flatnonzero(pd.Series(ha).isin(hb).to_numpy())
    if not maybe_a.size:
        return []
    maybe_b = np.flatnonzero(pd.Series(hb).isin(ha[maybe_a]).to_numpy())
    return sorted(set(a.take(maybe_a).to_pylist()) & set(b.take(maybe_b).to_pylist()))


def _hex_prefix(digests: np.ndarray, chars: int) -> pd.Series:
    """The first ``chars`` hex digits of each digest, as a string column (``hexdigest()[:chars]``)."""
    import pyarrow as pa

    half = (chars + 1) // 2
    text = np.empty((len(digests), 2 * half), dtype=np.uint8)
    text[:, 0::2] = _HEX[digests[:, :half] >> 4]
    text[:, 1::2] = _HEX[digests[:, :half] & 15]
    text = np.ascontiguousarray(text[:, :chars])
    offsets = np.arange(0, chars * len(digests) + 1, chars, dtype=np.int64)
    array = pa.Array.from_buffers(pa.large_string(), len(digests), [None, pa.py_buffer(offsets),
                                                                    pa.py_buffer(text.tobytes())])
    return pa.chunked_array([array]).to_pandas()


def _prefixed(prefix: str, text: Any, separator: str = "") -> Any:
    """``prefix + separator + value`` for each value of an Arrow string array."""
    import pyarrow as pa
    import pyarrow.compute as pc

    return pc.binary_join_element_wise(pa.scalar(prefix, pa.large_string()), text,
                                       pa.scalar(separator, pa.large_string()))


def _pandas_text(values: Any) -> list[str]:
    """Values as the text ``astype("string")`` gives them, blanks as NUL: the text content keys are made of."""
    return pd.Series(values).astype("string").fillna("\x00").astype(str).tolist()


def _float_text(values: np.ndarray) -> Any:
    """Each float64 as ``astype("string")`` writes it (Python's shortest repr), NaN as NUL, as an Arrow string array.

    Arrow's cast writes the same shortest digits about five times faster, but its own way: '1' for 1.0, and an
    exponent from other magnitudes than Python's. So only values Python writes without an exponent (zero and
    1e-4 <= |x| < 1e16) whose Arrow text has none either are taken from Arrow ('.0' added to whole numbers); the
    rest go through pandas as before. Equal to pandas' text on 36 million values of every magnitude (random bit
    patterns included) when written; test_units checks it on others.
    """
    import pyarrow as pa
    import pyarrow.compute as pc

    with np.errstate(invalid="ignore"):
        fast = np.isfinite(values) & ((values == 0) | ((np.abs(values) >= 1e-4) & (np.abs(values) < 1e16)))
    text = pc.cast(pa.array(values[fast]), pa.large_string())
    plain = np.asarray(pc.invert(pc.match_substring(text, "e")))
    fast[np.flatnonzero(fast)[~plain]] = False
    text = text.filter(pa.array(plain))
    text = pc.if_else(pc.match_substring(text, "."), text, pc.binary_join_element_wise(
        text, pa.scalar(".0", pa.large_string()), pa.scalar("", pa.large_string())))
    rest = np.flatnonzero(~fast)
    slow = pa.array(_pandas_text(values[rest]), pa.large_string())
    order = np.empty(len(values), dtype=np.int64)
    order[fast] = np.arange(len(values) - len(rest))
    order[rest] = len(values) - len(rest) + np.arange(len(rest))
    return pa.concat_arrays([text, slow]).take(pa.array(order))


def _rendered(values: pd.Series) -> Any:
    """A column as the text ``astype("string")`` gives it, blanks as NUL, as an Arrow string array.

    Each distinct value is rendered once, by pandas as before; floats are told apart by their bits
    (so -0.0 stays '-0.0'), and object columns that hold anything but text are rendered value by value.
    """
    import pyarrow as pa

    dtype = values.dtype
    if isinstance(dtype, np.dtype) and dtype.kind == "f":
        codes, bits = pd.factorize(values.to_numpy().view(f"u{dtype.itemsize}"))
        uniques: Any = bits.view(dtype)
        if dtype == np.float64:
            text = pa.concat_arrays([_float_text(uniques), pa.array(["\x00"], pa.large_string())])
            return text.take(pa.array(np.where(codes >= 0, codes, len(uniques))))
    elif ((isinstance(dtype, np.dtype) and dtype.kind in "iubMm")
          or isinstance(dtype, pd.StringDtype | pd.CategoricalDtype | pd.DatetimeTZDtype)
          or (pd.api.types.is_object_dtype(dtype) and pd.api.types.infer_dtype(values) in ("string", "empty"))):
        codes, uniques = pd.factorize(values)
    else:
        return pa.array(_pandas_text(values), pa.large_string())
    text = [*_pandas_text(uniques), "\x00"]
    return pa.array(text, pa.large_string()).take(pa.array(np.where(codes >= 0, codes, len(text) - 1)))


# Rows rendered as text at once by content_keys (the same keys whatever the block). Sealing 10 M rows of 20
# full-precision columns peaked at 14 GiB with every row rendered at once, 4.3 GiB with blocks of a million rows
# and 3.6 GiB with blocks of 250,000 (2.9 GiB with an id column), no slower.
CONTENT_KEY_ROWS = 250_000


def content_keys(frame: pd.DataFrame) -> pd.Series:
    """Key each row by a hash of its content; identical rows get '~1', '~2', ... suffixes.

    Values are rendered as text column by column (NaN as an empty field), so the key
    does not depend on row order or on the file format the row came from.
    """
    import pyarrow as pa
    import pyarrow.compute as pc

    columns = sorted(frame.columns)
    prefix = "\x1e".join(columns) + "\x1d"
    pieces = []
    for start in range(0, max(len(frame), 1), CONTENT_KEY_ROWS):  # the rows' text only one block at a time
        block = frame.iloc[start:start + CONTENT_KEY_ROWS]
        parts = [_rendered(block[c]) for c in columns]
        joined = (pc.binary_join_element_wise(*parts, pa.scalar("\x1f", pa.large_string())) if len(parts) > 1
                  else parts[0])
        pieces.append(_hex_prefix(_digests(_prefixed(prefix, joined)), 20))
    keys = (pd.concat(pieces, ignore_index=True) if len(pieces) != 1 else pieces[0]).set_axis(frame.index)
    occurrence = keys.groupby(keys).cumcount()
    keys = keys.where(occurrence == 0, keys + "~" + occurrence.astype(str))
    return keys.astype(str)


def key_positions(index_keys: pd.Series, keys: pd.Series) -> np.ndarray:
    """Position of each of ``keys`` among ``index_keys`` (which are unique), −1 where absent; exact.

    Looks the 64-bit :func:`key_hashes` up in a table and confirms every hit on the text itself (pandas'
    lookup of ten million Arrow strings took 30 s, this well under 2).
    """
    import pyarrow.compute as pc

    a, b = _strings(index_keys), _strings(keys)
    table = pd.Index(key_hashes(a)) if a is not None and b is not None else None
    if table is None or not table.is_unique:
        return pd.Index(pd.Series(index_keys).astype(str)).get_indexer(pd.Series(keys).astype(str))
    assert a is not None and b is not None
    where = table.get_indexer(key_hashes(b))
    hit = np.flatnonzero(where >= 0)
    same = pc.equal(b.take(hit), a.take(where[hit])).to_numpy(zero_copy_only=False)
    where[hit[~same]] = -1  # another string with the same hash: the only candidate, so the key is absent
    return where


def _has_duplicates(keys: pd.Series, ids: pd.Series) -> bool:
    """True when some key occurs twice. Integer ids are compared as integers (their text is one-to-one);
    text through :func:`key_hashes`, each shared hash confirmed on the text."""
    if pd.api.types.is_integer_dtype(ids.dtype) and isinstance(ids.dtype, np.dtype):
        return bool(pd.Series(ids.to_numpy()).duplicated().any())
    strings = _strings(keys)
    if strings is None:
        return bool(keys.duplicated().any())
    hashed = pd.Series(key_hashes(strings))
    maybe = np.flatnonzero(hashed.duplicated(keep=False).to_numpy())
    return bool(maybe.size) and bool(pd.Series(strings.take(maybe).to_pylist()).duplicated().any())


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
    if _has_duplicates(keys, ids):
        dup = keys.duplicated(keep=False)
        example = keys[dup].iloc[0]
        raise DataError(f"id column '{id_column}' has {int(keys.duplicated().sum())} duplicate value(s) "
                        f"(e.g. {example!r}); make ids unique or unset data.id to key rows by content")
    return keys


def hash_unit(keys: pd.Series, salt: str) -> np.ndarray:
    """Map each key to a number in [0, 1) from SHA-256 of salt and key alone.

    The number is the digest's first 8 bytes read as a big-endian integer, divided by 2**64.
    """
    strings = _strings(keys)
    if strings is not None:
        digests = _digests(_prefixed(salt, strings, "\x1f"))
    else:
        digests = _digests([f"{salt}\x1f{key}".encode() for key in keys])
    return np.ascontiguousarray(digests[:, :8]).view(">u8")[:, 0].astype(np.float64) / 2.0**64


def key_order(keys: pd.Series) -> np.ndarray | None:
    """Positions of the keys in sorted order (code points, as Python sorts text), or None if they are not text.

    Arrow sorts strings by their UTF-8 bytes, which is the same order.
    """
    import pyarrow.compute as pc

    strings = _strings(keys)
    return None if strings is None else pc.sort_indices(strings).to_numpy()


def keys_digest(keys: Any, order: np.ndarray | None = None, rows: np.ndarray | None = None) -> str:
    """One hash for a set of row keys (order does not matter): SHA-256 of the sorted keys, each ending in a newline.

    With ``order`` (:func:`key_order` of ``keys``) and a boolean mask ``rows``: the digest of ``keys[rows]``,
    without sorting again (the sorted order of a subset is the subset of the sorted order).
    """
    import pyarrow as pa
    import pyarrow.compute as pc

    series = keys if isinstance(keys, pd.Series) else pd.Series(list(keys), dtype=object)
    strings = _strings(series)
    digest = hashlib.sha256()
    if strings is None:
        for key in sorted(map(str, series[rows] if rows is not None else series)):
            digest.update(key.encode("utf-8") + b"\n")
        return digest.hexdigest()
    if order is None:
        order = pc.sort_indices(strings).to_numpy()
    if rows is not None:
        order = order[rows[order]]
    blank, newline = pa.scalar("", pa.large_string()), pa.scalar("\n", pa.large_string())
    lines = pc.binary_join_element_wise(strings.take(order), blank, newline)
    offsets = np.frombuffer(lines.buffers()[1], dtype=np.int64)
    start, stop = int(offsets[lines.offset]), int(offsets[lines.offset + len(lines)])
    digest.update(memoryview(lines.buffers()[2])[start:stop])
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
    for key in ("text", "known_before_outcome"):
        for column in spec.get(key, []):
            if column not in frame.columns:
                raise DataError(f"column '{column}' (data.{key}) is not in '{source}'; remove it from data.{key}")
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
    declared_text = set(spec.get("text", []))
    for column in features:
        values = frame[column]
        if pd.api.types.is_numeric_dtype(values) and values.dtype != bool:
            finite = np.isfinite(values.to_numpy(dtype=float, na_value=np.nan)) | values.isna().to_numpy()
            if not finite.all():
                raise DataError(f"feature column '{column}' has {int((~finite).sum())} infinite value(s) in "
                                f"'{source}'; replace them with finite values or blanks")
        else:
            if column not in declared_text:
                check_numbers_read_as_text(values, source)
            check_row_labels(values, source)


# A text column whose filled cells are mostly numbers is a column of numbers with stray words (common practice: no
# source; a column of codes that happen to be mostly digits is the exception data.text declares).
NUMBERS_SHARE = 0.5
_SAMPLE = 1000  # cells looked at first: a column of real text is passed over after these (the seal of 10 M rows)


def check_numbers_read_as_text(values: pd.Series, source: str) -> None:
    """Refuse a feature column of numbers that a few words made text ('unknown' among hours): read as text it is one
    categorical feature with a level per distinct number, and no error would ever say so."""
    if pd.api.types.is_bool_dtype(values) or isinstance(values.dtype, pd.CategoricalDtype):
        return
    filled = values.dropna()
    if filled.empty or not all(isinstance(v, str) for v in filled.iloc[:_SAMPLE]):
        return
    head = pd.to_numeric(filled.iloc[:_SAMPLE], errors="coerce")
    if head.notna().mean() <= NUMBERS_SHARE:
        return
    numbers = pd.to_numeric(filled, errors="coerce").notna()
    words = filled[~numbers.to_numpy()]
    if words.empty or numbers.mean() <= NUMBERS_SHARE:
        return
    examples = ", ".join(repr(w) for w in pd.unique(words)[:3])
    raise DataError(f"feature column '{values.name}' holds numbers in {int(numbers.sum())} of its {len(filled)} filled "
                    f"cells and text in {len(words)} ({examples}) in '{source}': read as text it would be one "
                    f"categorical feature with {filled.nunique()} levels; blank those cells (they are then missing "
                    "values, which the candidates' imputation fills), or list the column in data.text if it is text "
                    "on purpose")


# A feature the target fixes (a copy or relabelling of it, a band of it, a column filled only for one outcome) lets
# every candidate score almost perfectly: a validated figure no new row can repeat when the column is recorded after
# the outcome (common practice: no source; the row counts below are ours, set so that a real feature cannot line up
# with the target by chance).
MIN_ROWS_FOR_COPY = 30
ROWS_PER_VALUE_FOR_COPY = 10  # below this many rows per target value, any column is constant within them by chance


def _per_target(values: pd.Series, target: pd.Series, ordered: bool) -> pd.Series | None:
    """The column's one value for each target value (sorted by target), or None once a value breaks that; with
    ``ordered`` (a numeric column against a regression target) the values must also rise or fall with the target."""
    groups = pd.DataFrame({"y": target.to_numpy(), "f": values.to_numpy()}).groupby("y", sort=True)["f"]
    if groups.nunique(dropna=False).gt(1).any():
        return None
    one = groups.first()
    if ordered and not (one.is_monotonic_increasing or one.is_monotonic_decreasing):
        return None
    return one


def _fixed_by_target(values: pd.Series, target: pd.Series, ordered: bool) -> pd.Series | None:
    """:func:`_per_target` when the target fixes the column on enough rows to rule out chance, else None.

    A break among the first :data:`_SAMPLE` rows is a break in all, which settles almost every real column before
    the whole is grouped (the seal of 10 M rows groups only the near-constant ones).
    """
    if len(values) < MIN_ROWS_FOR_COPY:
        return None
    if len(values) > _SAMPLE and _per_target(values.iloc[:_SAMPLE], target.iloc[:_SAMPLE], ordered) is None:
        return None
    one = _per_target(values, target, ordered)
    if one is None or one.nunique() < 2 or (not ordered and len(one) * ROWS_PER_VALUE_FOR_COPY > len(values)):
        return None
    return one


def _shown(value: Any) -> str:
    return repr(value.item() if isinstance(value, np.generic) else value)


def target_copy(values: pd.Series, target: pd.Series, task: str) -> str | None:
    """How the target fixes this feature column in every row (its values or its blanks), in words; None when it
    does not (or there are too few rows to tell it from chance, see :data:`MIN_ROWS_FOR_COPY`)."""
    blank = values.isna()
    if blank.any():
        blanks = _fixed_by_target(blank, target, task == "regression")
        if blanks is not None:
            where = [_shown(v) for v in blanks.index[blanks.to_numpy(dtype=bool)]]
            if task == "classification":
                return (f"in all {len(values)} rows it is blank exactly where the class is {', '.join(where[:3])}"
                        f"{' and more' if len(where) > 3 else ''}")
            edge = f"at least {where[0]}" if blanks.iloc[-1] else f"at most {where[-1]}"
            return f"in all {len(values)} rows it is blank exactly where the target is {edge}"
    filled = ~blank.to_numpy()
    ordered = task == "regression" and pd.api.types.is_numeric_dtype(values)
    one = _fixed_by_target(values[filled], target[filled], ordered)
    if one is None:
        return None
    if task == "classification":
        pairs = [f"{_shown(k)} -> {_shown(v)}" for k, v in one.items()]
        return (f"in all {int(filled.sum())} rows where it is filled, each class has one value of it "
                f"({', '.join(pairs[:3])}{', ...' if len(pairs) > 3 else ''})")
    way = "higher" if one.is_monotonic_increasing else "lower"
    return (f"in all {int(filled.sum())} rows where it is filled, the higher the target, the {way} it is, and equal "
            "targets give equal values")


def check_target_copies(frame: pd.DataFrame, spec: dict[str, Any], task: str, source: str) -> None:
    """Refuse a feature whose values, or whose blanks, the target fixes in every row (:func:`target_copy`): a copy
    of the target under another name, a band of it, or a column filled in only for one outcome."""
    target = frame[spec["target"]]
    known = set(spec.get("known_before_outcome", []))
    for column in feature_columns(frame, spec):
        how = None if column in known else target_copy(frame[column], target, task)
        if how is not None:
            raise DataError(f"feature column '{column}' is fixed by target column '{target.name}' in '{source}': "
                            f"{how}; every candidate would read the outcome off it, and its validated score would not "
                            "hold for new rows if the column is recorded after the outcome; list it in data.drop "
                            "(possible now: nothing is sealed yet), or in data.known_before_outcome if it is truly "
                            "recorded before the outcome")


# A text feature with a different value in almost every row labels rows instead of describing them: one-hot encoded
# it is a column per row (dense, rows x rows numbers, which large data cannot hold) and no new row shares a level
# (common practice: no source; the share and the row count are ours).
DISTINCT_SHARE = 0.9
MIN_ROWS_FOR_LABELS = 30


def labels_rows(values: pd.Series) -> int | None:
    """The number of different values of a column whose filled cells are almost all different (more than
    :data:`DISTINCT_SHARE` of them, from :data:`MIN_ROWS_FOR_LABELS` cells); None for any other column."""
    filled = values.dropna()
    if len(filled) < MIN_ROWS_FOR_LABELS:
        return None
    head = filled.iloc[:_SAMPLE]
    if head.nunique() <= DISTINCT_SHARE * len(head):  # a real category repeats within its first 1,000 cells
        return None
    distinct = int(filled.nunique())
    return distinct if distinct > DISTINCT_SHARE * len(filled) else None


def check_row_labels(values: pd.Series, source: str) -> None:
    """Refuse a text feature whose filled cells are almost all different (an order number, a note, a timestamp whose
    column is not data.time): the candidates would one-hot encode it into a column per row, learn nothing that
    carries to a new row, and on large data fail for memory deep inside a fit job."""
    distinct = labels_rows(values)
    if distinct is None:
        return
    filled = values.dropna()
    head = filled.iloc[:_SAMPLE]
    times = pd.to_datetime(head.astype(str), errors="coerce", utc=True, format="ISO8601").notna().mean()
    way = "name it in data.time if it is the rows' time, " if times > DISTINCT_SHARE else ""
    examples = ", ".join(repr(v) for v in filled.iloc[:2])
    raise DataError(f"feature column '{values.name}' has {distinct} different values in its {len(filled)} filled "
                    f"cells ({examples}, ...) in '{source}': it labels rows instead of describing them, and the "
                    "candidates would one-hot encode it into a column per value that no new row shares; "
                    f"{way}name it in data.id if it identifies rows, list it in data.drop, or replace it in the data "
                    "file by something rows share (a prefix, a category)")


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
