"""File helpers shared by every step: atomic writes, fingerprints, table reading."""

from __future__ import annotations

import glob
import hashlib
import json
import os
import tempfile
from collections.abc import Callable
from pathlib import Path
from typing import Any

from .errors import DataError

CHUNK = 1 << 20


def sha256_file(path: str | os.PathLike[str]) -> str:
    """Hex SHA-256 of a file's bytes."""
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(CHUNK), b""):
            digest.update(block)
    return digest.hexdigest()


def sha256_text(text: str) -> str:
    """Hex SHA-256 of a string's UTF-8 bytes."""
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def canonical_json(value: Any) -> str:
    """JSON with sorted keys and no spaces: the form we hash."""
    return json.dumps(value, sort_keys=True, separators=(",", ":"), ensure_ascii=False, allow_nan=False)


def write_atomic(path: str | os.PathLike[str], writer: Callable[[str], None], mode: int | None = None) -> None:
    """Write through ``writer(tmp_path)`` to a temporary name, fsync, then rename into place.

    A reader never sees a half-written file, and a crash leaves the old file (or none). A process
    killed mid-write leaves its temporary file behind; the next write of the same output removes
    it (only the job that owns an output writes it, so such a file is never a live one).
    """
    target = Path(path)
    target.parent.mkdir(parents=True, exist_ok=True)
    for stale in target.parent.glob(f".{glob.escape(target.name)}.*.tmp"):
        stale.unlink(missing_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent)
    os.close(fd)
    try:
        writer(tmp)
        with open(tmp, "rb") as handle:
            os.fsync(handle.fileno())
        if mode is not None:
            os.chmod(tmp, mode)
        os.replace(tmp, target)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def write_json(path: str | os.PathLike[str], value: Any) -> None:
    """Write pretty, key-sorted JSON atomically (stable bytes for equal content)."""
    text = json.dumps(value, indent=2, sort_keys=True, ensure_ascii=False, allow_nan=False) + "\n"

    def _write(tmp: str) -> None:
        with open(tmp, "w", encoding="utf-8") as handle:
            handle.write(text)

    write_atomic(path, _write)


def read_json(path: str | os.PathLike[str]) -> Any:
    """Read a JSON file written by holdfast."""
    with open(path, encoding="utf-8") as handle:
        return json.load(handle)


def write_parquet(path: str | os.PathLike[str], frame: Any, mode: int | None = None) -> None:
    """Write a DataFrame to Parquet atomically, without the pandas index."""

    def _write(tmp: str) -> None:
        frame.to_parquet(tmp, index=False, engine="pyarrow")

    write_atomic(path, _write, mode=mode)


COLUMN_BY_COLUMN_ROWS = 1_000_000
"""From this many rows on, :func:`read_parquet` reads a file one column at a time."""

READ_THREADS = 2
"""Columns read at once by :func:`read_parquet` from COLUMN_BY_COLUMN_ROWS rows on: 10 M rows x 20 columns read
in 3.1 s instead of 6.1 s on a 2-core machine, and the peak stays near one copy of the data (bench/RESULTS.md)."""


def read_parquet(path: str | os.PathLike[str], columns: list[str] | None = None) -> Any:
    """A Parquet file as a DataFrame: the frame ``pandas.read_parquet`` gives, at a fraction of its peak memory.

    Each Arrow column is freed as soon as it is converted, into memory handed back to the operating system,
    and from COLUMN_BY_COLUMN_ROWS rows on the file is read one column at a time, so reading holds the
    data about once rather than about twice.
    """
    from concurrent.futures import ThreadPoolExecutor

    import pandas as pd
    import pyarrow as pa
    import pyarrow.parquet as pq

    convert = {"self_destruct": True, "split_blocks": True}
    previous = pa.default_memory_pool()
    pa.set_memory_pool(pa.system_memory_pool())  # Arrow's default pool would keep every freed column
    try:
        source = pq.ParquetFile(path)
        stored = source.schema_arrow.pandas_metadata or {}
        index = [i for i in stored.get("index_columns", []) if not isinstance(i, dict)]  # kept as columns
        wanted = columns if columns is not None else [n for n in source.schema_arrow.names if n not in index]
        if source.metadata.num_rows < COLUMN_BY_COLUMN_ROWS or len(wanted) < 2:
            return pd.read_parquet(path, columns=columns, to_pandas_kwargs=convert)
        parts: dict[Any, Any] = {}
        part = None
        with ThreadPoolExecutor(max_workers=READ_THREADS) as readers:  # decoding releases the GIL
            for part in readers.map(lambda name: pd.read_parquet(path, columns=[name], to_pandas_kwargs=convert),
                                    wanted):
                parts.update(part.items())
        frame = pd.DataFrame(parts, copy=False)
        assert part is not None
        frame.columns.name, frame.attrs = part.columns.name, part.attrs
        return frame
    finally:
        pa.set_memory_pool(previous)


def _check_csv_header(source: Path) -> None:
    import csv

    with open(source, newline="", encoding="utf-8") as handle:
        header = next(csv.reader(handle), [])
    seen: set[str] = set()
    for name in header:
        if name in seen:
            raise DataError(f"data file '{source}' repeats column name '{name}'; give every column a unique name")
        seen.add(name)
    if len(header) == 1 and any(sep in header[0] for sep in (";", "\t", "|")):
        raise DataError(f"data file '{source}' has a single column '{header[0][:40]}'; it looks like another "
                        "delimiter than ',' was used: save it as comma-separated CSV or as Parquet")


def read_table(path: str | os.PathLike[str]) -> Any:
    """Read the experiment's data file (CSV or Parquet) into a DataFrame.

    Raises DataError naming the file when it is missing, empty or unreadable.
    """
    import pandas as pd

    source = Path(path)
    if not source.is_file():
        raise DataError(f"data file '{source}' does not exist; check data.path in the config")
    if source.stat().st_size == 0:
        raise DataError(f"data file '{source}' is empty; point data.path at a file with a header and rows")
    suffix = source.suffix.lower()
    try:
        if suffix in (".parquet", ".pq"):
            frame = read_parquet(source)
        elif suffix in (".csv", ".txt"):
            _check_csv_header(source)
            frame = pd.read_csv(source)
        else:
            raise DataError(f"data file '{source}' has suffix '{suffix}'; use a .csv or .parquet file")
    except DataError:
        raise
    except Exception as exc:  # pandas/pyarrow raise many types for unreadable files
        reason = f"{type(exc).__name__}: {str(exc).splitlines()[0] if str(exc) else ''}"
        raise DataError(f"data file '{source}' could not be read ({reason}); check its format") from exc
    if len(frame) == 0:
        raise DataError(f"data file '{source}' has a header but no rows; add data")
    return frame
