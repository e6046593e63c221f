"""Seeded generator of synthetic cold-chain produce shipments (an invented scenario).

Gives holdfast a grouped, slightly messy demo table whose CSV bytes are reproducible.
"""

from __future__ import annotations

import argparse
from pathlib import Path

import numpy as np
import pandas as pd

DEFAULT_ROWS = 8000
DEFAULT_SEED = 20261202
DEFAULT_OUT = Path(__file__).resolve().parent / "shipments.csv"

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

N_ROUTES = 40
MAX_ROWS = 500_000  # keeps shipment ids at six digits
START = pd.Timestamp("2024-06-01T00:00:00Z")
SPAN_DAYS = 548  # about 18 months

PRODUCE = ["berries", "leafy_greens", "stone_fruit", "citrus", "root_veg"]
PRODUCE_SHARE = np.array([0.22, 0.24, 0.18, 0.18, 0.18])
# Per-produce arrays below follow the PRODUCE order.
# Base shelf life in days for a perfect trip.
BASE_LIFE = np.array([8.0, 11.0, 16.0, 28.0, 40.0])
# Internal load temperature (deg C) above which heat damage accumulates ...
DAMAGE_THRESHOLD_C = np.array([5.0, 6.0, 8.0, 10.0, 11.0])
# ... and below which chilling or freezing injury sets in.
CHILL_THRESHOLD_C = np.array([0.0, 0.0, 2.0, 3.0, -0.5])
# How strongly heat damage translates into spoilage, and baseline log-odds.
HEAT_SENSITIVITY = np.array([1.00, 0.90, 0.75, 0.45, 0.35])
PRODUCE_LOGIT = np.array([0.45, 0.35, 0.10, -0.50, -0.70])
# How much a precool started over 90 minutes late hurts.
PRECOOL_SENSITIVITY = np.array([1.00, 0.90, 0.55, 0.15, 0.10])
# Soft produce gets bruised and dried out in open vented crates.
FRAGILE = np.array([1.0, 1.0, 0.6, 0.0, 0.0])

PACKAGING = ["foam_box", "reefer_pallet", "gel_pack_carton", "vented_crate"]
# Packaging choice depends on produce (rows follow PRODUCE order).
PACKAGING_BY_PRODUCE = np.array(
    [
        [0.35, 0.30, 0.30, 0.05],
        [0.25, 0.35, 0.25, 0.15],
        [0.20, 0.40, 0.20, 0.20],
        [0.10, 0.35, 0.10, 0.45],
        [0.05, 0.30, 0.05, 0.60],
    ]
)
# Fraction of the ambient-to-setpoint gap that reaches the load (the reefer
# pallet is actively cooled). Gel packs hold well until they are spent after
# roughly GEL_SPENT_HOURS, then the carton warms quickly.
PACKAGING_LEAK = np.array([0.25, 0.03, 0.08, 0.50])
GEL_SPENT_HOURS = 16.0
GEL_SPENT_LEAK = 0.35
PACKAGING_LOGIT = np.array([0.00, -0.20, 0.10, 0.15])

SETPOINT_C = 2.0  # trailer setpoint shared by all mixed loads
MISSING_PEAK = 0.02
MISSING_PRECOOL = 0.01


def _route_table(rng: np.random.Generator) -> pd.DataFrame:
    """Draw per-route traits: size, climate, typical length, stops, random effects."""
    numbers = np.sort(rng.choice(np.arange(1, 90), size=N_ROUTES, replace=False))
    weight = rng.lognormal(mean=0.0, sigma=0.8, size=N_ROUTES)
    risk = rng.normal(0.0, 0.9, size=N_ROUTES)
    return pd.DataFrame(
        {
            "code": [f"RT-{n:02d}" for n in numbers],
            "weight": weight / weight.sum(),
            "climate_c": rng.normal(0.0, 3.5, size=N_ROUTES),
            "base_hours": np.exp(rng.normal(np.log(20.0), 0.55, size=N_ROUTES)),
            "stops_per_10h": rng.gamma(3.0, 0.25, size=N_ROUTES),
            "risk": risk,
            # Shelf-life effect partly mirrors spoilage risk, partly independent.
            "life": -0.08 * risk + rng.normal(0.0, 0.12, size=N_ROUTES),
        }
    )


def make_shipments(rows: int = DEFAULT_ROWS, seed: int = DEFAULT_SEED) -> pd.DataFrame:
    """Return a synthetic shipments table; identical for identical (rows, seed).

    Rows are sorted by departure time. ``departed_at`` is tz-aware UTC,
    ``precool_delay_min`` is a nullable ``Int64`` and float columns are already
    rounded to the precision written by :func:`write_csv`.
    """
    if not 1 <= rows <= MAX_ROWS:
        raise ValueError(f"rows must be between 1 and {MAX_ROWS}, got {rows}")
    rng = np.random.default_rng(seed)
    routes = _route_table(rng)

    r = rng.choice(N_ROUTES, size=rows, p=routes["weight"].to_numpy())
    minutes = np.sort(rng.integers(0, SPAN_DAYS * 24 * 12, size=rows)) * 5
    departed = START + pd.to_timedelta(minutes, unit="min")
    day_of_year = departed.day_of_year.to_numpy()
    hour = departed.hour.to_numpy() + departed.minute.to_numpy() / 60.0

    # Ambient temperature: seasonal (peak mid-July), daily cycle, route climate.
    season = 10.0 * np.sin(2 * np.pi * (day_of_year - 105) / 365.25)
    daily = 2.0 * np.sin(2 * np.pi * (hour - 9) / 24)
    climate = routes["climate_c"].to_numpy()[r]
    ambient_mean = 11.0 + season + daily + climate + rng.normal(0, 3.0, rows)

    transit = routes["base_hours"].to_numpy()[r] * rng.lognormal(0.0, 0.3, rows)
    transit = np.clip(transit, 1.5, 120.0)
    ambient_peak = ambient_mean + rng.gamma(2.0, 1.6, rows) + 0.04 * transit

    lam = 0.3 + routes["stops_per_10h"].to_numpy()[r] * transit / 10.0
    doors = rng.poisson(lam)

    p = rng.choice(len(PRODUCE), size=rows, p=PRODUCE_SHARE)
    cum = PACKAGING_BY_PRODUCE[p].cumsum(axis=1)
    k = (rng.random(rows)[:, None] > cum).sum(axis=1)
    k = np.minimum(k, len(PACKAGING) - 1)

    precool = np.round(rng.gamma(1.6, 28.0, rows)).astype(np.int64)

    # Internal load temperature: ambient leaking through the packaging, plus
    # door openings and a warm start from slow precooling (unobserved).
    effective_ambient = 0.6 * ambient_mean + 0.4 * ambient_peak
    gel_spent = 1.0 / (1.0 + np.exp(-(transit - GEL_SPENT_HOURS) / 1.5))
    leak = PACKAGING_LEAK[k] + GEL_SPENT_LEAK * (k == 2) * gel_spent
    internal = (
        SETPOINT_C
        + leak * (effective_ambient - SETPOINT_C)
        + 0.25 * doors
        + 0.010 * precool
        + rng.normal(0.0, 0.3, rows)
    )
    excess = np.maximum(internal - DAMAGE_THRESHOLD_C[p], 0.0)
    heat_dose = HEAT_SENSITIVITY[p] * excess * transit / 10.0  # degree-(10 h) units
    chill_dose = np.maximum(CHILL_THRESHOLD_C[p] - internal, 0.0) * transit / 10.0
    late_precool = np.maximum(precool - 60, 0) / 60.0

    # Spoilage (load rejected at receiving): saturating heat and chill damage,
    # interactions, a route random effect and unobserved lot quality.
    quality = rng.normal(0.0, 1.0, rows)  # unobserved, shared by both targets
    logit = (
        -4.5
        + 5.0 * np.tanh(heat_dose / 0.7)
        + 3.0 * np.tanh(chill_dose / 0.5)
        + 0.22 * doors * (ambient_mean > 18.0)
        + 1.3 * PRECOOL_SENSITIVITY[p] * (precool > 90)
        + PRODUCE_LOGIT[p]
        + PACKAGING_LOGIT[k]
        + 0.9 * FRAGILE[p] * (k == 3)
        + routes["risk"].to_numpy()[r]
        + 1.1 * quality
    )
    spoiled = (rng.random(rows) < 1.0 / (1.0 + np.exp(-logit))).astype(np.int64)

    # Remaining shelf life: produce base life shrunk by the same drivers.
    life_factor = np.exp(
        -0.30 * np.log1p(heat_dose)
        - 0.35 * np.tanh(chill_dose / 0.5)
        - 0.012 * transit
        - 0.06 * late_precool
        - 0.015 * doors
        + routes["life"].to_numpy()[r]
        - 0.15 * quality
        + rng.normal(0.0, 0.25, rows)
    )
    shelf_life = np.maximum(BASE_LIFE[p] * life_factor - 0.5, 0.0)

    # Sensor dropouts and unlogged precool times.
    peak_out = np.round(ambient_peak, 1) + 0.0
    peak_out[rng.random(rows) < MISSING_PEAK] = np.nan
    precool_out = pd.array(precool, dtype="Int64")
    precool_out[rng.random(rows) < MISSING_PRECOOL] = pd.NA

    first_id = int(rng.integers(100000, 400000))
    df = pd.DataFrame(
        {
            "shipment_id": [f"SH{first_id + i:06d}" for i in range(rows)],
            "route": routes["code"].to_numpy()[r],
            "departed_at": departed,
            "transit_hours": np.round(transit, 2) + 0.0,
            "door_open_events": doors.astype(np.int64),
            "ambient_mean_c": np.round(ambient_mean, 1) + 0.0,
            "ambient_peak_c": peak_out,
            "packaging": np.array(PACKAGING)[k],
            "produce": np.array(PRODUCE)[p],
            "precool_delay_min": precool_out,
            "spoiled": spoiled,
            "shelf_life_days": np.round(shelf_life, 1) + 0.0,
        }
    )
    return df[COLUMNS]


def _fmt(values: pd.Series, decimals: int) -> pd.Series:
    """Format floats with a fixed number of decimals; NaN becomes an empty field."""
    return values.map(lambda v: "" if pd.isna(v) else f"{float(v):.{decimals}f}")


def _fmt_int(values: pd.Series) -> pd.Series:
    """Format integers; a missing value becomes an empty field."""
    return values.map(lambda v: "" if pd.isna(v) else str(int(v)))


def write_csv(df: pd.DataFrame, path: str | Path) -> Path:
    """Write ``df`` as UTF-8 CSV with fixed formatting so bytes are reproducible."""
    departed = pd.to_datetime(df["departed_at"], utc=True)
    out = pd.DataFrame(
        {
            "shipment_id": df["shipment_id"].astype(str),
            "route": df["route"].astype(str),
            "departed_at": departed.dt.strftime("%Y-%m-%dT%H:%M:%SZ"),
            "transit_hours": _fmt(df["transit_hours"], 2),
            "door_open_events": _fmt_int(df["door_open_events"]),
            "ambient_mean_c": _fmt(df["ambient_mean_c"], 1),
            "ambient_peak_c": _fmt(df["ambient_peak_c"], 1),
            "packaging": df["packaging"].astype(str),
            "produce": df["produce"].astype(str),
            "precool_delay_min": _fmt_int(df["precool_delay_min"]),
            "spoiled": _fmt_int(df["spoiled"]),
            "shelf_life_days": _fmt(df["shelf_life_days"], 1),
        }
    )[COLUMNS]
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    out.to_csv(path, index=False, lineterminator="\n", encoding="utf-8")
    return path


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=DEFAULT_ROWS)
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED)
    parser.add_argument("--out", type=Path, default=DEFAULT_OUT)
    args = parser.parse_args(argv)
    path = write_csv(make_shipments(args.rows, args.seed), args.out)
    print(f"wrote {args.rows} rows to {path}")


if __name__ == "__main__":
    main()
