"""The synthetic demo data: reproducible to the byte, seeded, and shaped as documented."""

from __future__ import annotations

import hashlib
import importlib.util
import subprocess
import sys
from pathlib import Path
from types import ModuleType

import numpy as np
import pandas as pd
import pytest

DATA_DIR = Path(__file__).resolve().parents[1] / "data_demo"
SCRIPT = DATA_DIR / "make_shipments.py"
COMMITTED = DATA_DIR / "shipments.csv"

COLUMNS = [
    "shipment_id",
    "route",
    "departed_at",
    "transit_hours",
    "door_open_events",
    "ambient_mean_c",
    "ambient_peak_c",
    "packaging",
    "produce",
    "precool_delay_min",
    "spoiled",
    "shelf_life_days",
]
PACKAGING = {"foam_box", "reefer_pallet", "gel_pack_carton", "vented_crate"}
PRODUCE = {"berries", "leafy_greens", "stone_fruit", "citrus", "root_veg"}


@pytest.fixture(scope="module")
def gen() -> ModuleType:
    """The generator script, imported by path (it is not part of the package)."""
    spec = importlib.util.spec_from_file_location("make_shipments", SCRIPT)
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


@pytest.fixture(scope="module")
def default_frame(gen: ModuleType) -> pd.DataFrame:
    return gen.make_shipments()


@pytest.fixture(scope="module")
def committed() -> pd.DataFrame:
    return pd.read_csv(COMMITTED)


def sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


# (a) byte-identical regeneration


def test_regenerating_with_defaults_gives_the_committed_bytes(
    gen: ModuleType, default_frame: pd.DataFrame, tmp_path: Path
) -> None:
    out = gen.write_csv(default_frame, tmp_path / "shipments.csv")
    assert sha256(out) == sha256(COMMITTED)


def test_command_line_writes_the_same_bytes(tmp_path: Path) -> None:
    out = tmp_path / "cli.csv"
    result = subprocess.run(
        [sys.executable, str(SCRIPT), "--out", str(out)],
        capture_output=True,
        text=True,
        cwd=tmp_path,
        timeout=300,
        check=False,
    )
    assert result.returncode == 0, result.stderr
    assert sha256(out) == sha256(COMMITTED)


def test_file_format_is_plain_utf8_with_unix_newlines() -> None:
    raw = COMMITTED.read_bytes()
    assert b"\r" not in raw
    assert raw.endswith(b"\n")
    text = raw.decode("utf-8")
    assert text.splitlines()[0] == ",".join(COLUMNS)
    assert len(raw) < 1_000_000


# (b) seeding


def test_same_seed_gives_the_same_frame(gen: ModuleType) -> None:
    pd.testing.assert_frame_equal(gen.make_shipments(600, seed=42), gen.make_shipments(600, seed=42))


def test_different_seed_gives_a_different_frame(gen: ModuleType) -> None:
    a, b = gen.make_shipments(600, seed=42), gen.make_shipments(600, seed=43)
    assert not a.equals(b)
    assert not np.allclose(a["transit_hours"].to_numpy(), b["transit_hours"].to_numpy())


def test_rows_out_of_range_are_refused(gen: ModuleType) -> None:
    with pytest.raises(ValueError, match="rows"):
        gen.make_shipments(0)


# (c) schema


def test_frame_columns_and_dtypes(default_frame: pd.DataFrame) -> None:
    df = default_frame
    assert list(df.columns) == COLUMNS
    assert len(df) == 8000
    assert isinstance(df["departed_at"].dtype, pd.DatetimeTZDtype)
    assert str(df["departed_at"].dt.tz) == "UTC"
    for column in ("transit_hours", "ambient_mean_c", "ambient_peak_c", "shelf_life_days"):
        assert pd.api.types.is_float_dtype(df[column]), column
    for column in ("door_open_events", "precool_delay_min", "spoiled"):
        assert pd.api.types.is_integer_dtype(df[column]), column
    for column in ("shipment_id", "route", "packaging", "produce"):
        assert pd.api.types.is_string_dtype(df[column]) or df[column].dtype == object, column


def test_frame_reads_back_from_the_csv_unchanged(default_frame: pd.DataFrame, committed: pd.DataFrame) -> None:
    """Values are rounded before writing, so the CSV loses nothing the frame holds."""
    for column in COLUMNS:
        expected = default_frame[column]
        if column == "departed_at":
            got = pd.to_datetime(committed[column], utc=True)
            assert (got.to_numpy() == expected.to_numpy()).all()
        elif column in ("shipment_id", "route", "packaging", "produce"):
            assert committed[column].astype(str).tolist() == expected.astype(str).tolist()
        else:
            np.testing.assert_array_equal(
                committed[column].to_numpy(dtype=float, na_value=np.nan),
                expected.to_numpy(dtype=float, na_value=np.nan),
            )


def test_ids_routes_and_categories(committed: pd.DataFrame) -> None:
    df = committed
    assert df["shipment_id"].is_unique
    assert df["shipment_id"].str.fullmatch(r"SH\d{6}").all()
    assert df["route"].str.fullmatch(r"RT-\d{2}").all()
    sizes = df["route"].value_counts()
    assert 35 <= len(sizes) <= 45
    assert sizes.max() >= 4 * sizes.min()  # unequal group sizes
    assert set(df["packaging"]) == PACKAGING
    assert set(df["produce"]) == PRODUCE


def test_timestamps_are_iso_utc_over_about_eighteen_months(committed: pd.DataFrame) -> None:
    stamps = committed["departed_at"]
    assert stamps.str.fullmatch(r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\dZ").all()
    times = pd.to_datetime(stamps, utc=True)
    assert times.is_monotonic_increasing
    span_days = (times.max() - times.min()).days
    assert 500 <= span_days <= 580


def test_summer_is_warmer_than_winter(committed: pd.DataFrame) -> None:
    month = pd.to_datetime(committed["departed_at"], utc=True).dt.month
    by_month = committed.groupby(month)["ambient_mean_c"].mean()
    assert by_month[[6, 7, 8]].mean() > by_month[[12, 1, 2]].mean() + 10


def test_value_ranges(committed: pd.DataFrame) -> None:
    df = committed
    assert (df["transit_hours"] > 0).all()
    assert (df["door_open_events"] >= 0).all()
    assert (df["precool_delay_min"].dropna() >= 0).all()
    peak = df["ambient_peak_c"]
    assert (peak.dropna() >= df.loc[peak.notna(), "ambient_mean_c"]).all()
    assert set(df["spoiled"].unique()) == {0, 1}
    assert (df["shelf_life_days"] >= 0).all()
    assert df["shelf_life_days"].notna().all() and df["spoiled"].notna().all()


def test_missing_fractions(committed: pd.DataFrame) -> None:
    missing = committed.isna().mean()
    assert 0.012 <= missing["ambient_peak_c"] <= 0.03
    assert 0.004 <= missing["precool_delay_min"] <= 0.018
    others = [c for c in COLUMNS if c not in ("ambient_peak_c", "precool_delay_min")]
    assert missing[others].sum() == 0


def test_spoiled_rate_in_range(committed: pd.DataFrame) -> None:
    assert 0.15 <= committed["spoiled"].mean() <= 0.25


def test_no_single_column_gives_the_target_away(committed: pd.DataFrame) -> None:
    """Rank AUC of each numeric column alone, and of each category's mean rate, stays far from 1."""
    y = committed["spoiled"].to_numpy()

    def auc(score: np.ndarray) -> float:
        ranks = pd.Series(score).rank().to_numpy()
        pos = y == 1
        value = (ranks[pos].sum() - pos.sum() * (pos.sum() + 1) / 2) / (pos.sum() * (~pos).sum())
        return max(value, 1 - value)

    numeric = ["transit_hours", "door_open_events", "ambient_mean_c", "ambient_peak_c", "precool_delay_min"]
    for column in numeric:
        values = committed[column]
        assert auc(values.fillna(values.median()).to_numpy()) < 0.8, column
    for column in ("packaging", "produce", "route"):
        assert auc(committed.groupby(column)["spoiled"].transform("mean").to_numpy()) < 0.8, column
