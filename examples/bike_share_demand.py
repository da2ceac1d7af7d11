"""Invented demo data: hourly demand at bike-share docking stations (seeded, not real).

The raw table carries the collinearity a real feature pipeline often grows by accident:
- felt temperature tracks air temperature (a strong but intended pair, waived in the policy);
- docks_total = docks_free + docks_in_use exactly (an exact dependency);
- station_capacity_class nearly duplicates docks_total (a near dependency, huge VIF);
- weather_kind is categorical (one GVIF group).
The corrected table drops docks_total and station_capacity_class.

Run ``python examples/bike_share_demand.py OUT_DIR`` to write both tables as Parquet.
"""

from __future__ import annotations

import sys
from pathlib import Path
from typing import Any

import numpy as np

SEED = 20261202
RAW_FILE = "station_hours_raw.parquet"
FIXED_FILE = "station_hours_fixed.parquet"
DROPPED_IN_FIX = ("docks_total", "station_capacity_class")


def station_hours(rows: int = 4_000, *, seed: int = SEED) -> dict[str, Any]:
    """Columns of the raw table as numpy arrays (and a list of weather kinds)."""
    rng = np.random.default_rng(seed)
    hour = rng.integers(0, 24, rows)
    day = rng.integers(0, 365, rows)
    season = np.cos(2 * np.pi * (day - 200) / 365)
    temp_c = 12 + 10 * season + 4 * np.sin(2 * np.pi * (hour - 9) / 24) + rng.normal(0, 2.5, rows)
    wind_kph = np.abs(rng.normal(14, 7, rows))
    humidity_pct = np.clip(rng.normal(68, 14, rows) - 0.8 * (temp_c - 12), 15, 100)
    feels_like_c = temp_c - 0.22 * wind_kph + 0.04 * (humidity_pct - 60) + rng.normal(0, 4.5, rows)
    docks_total = rng.choice([12, 15, 19, 23, 27, 31, 35], rows).astype(float)
    docks_in_use = np.floor(docks_total * rng.beta(2, 3, rows))
    docks_free = docks_total - docks_in_use
    station_capacity_class = np.round(docks_total / 4) + rng.normal(0, 0.05, rows)
    kinds = np.array(["clear", "cloudy", "rain", "snow"])
    weather = kinds[np.where(temp_c < 1, rng.choice([0, 1, 3], rows, p=[0.4, 0.3, 0.3]),
                             rng.choice([0, 1, 2], rows, p=[0.5, 0.3, 0.2]))]
    is_weekend = (day % 7) >= 5
    rentals = np.maximum(0, 3 + 0.4 * temp_c - 3.0 * (weather == "rain") + rng.normal(0, 2, rows))
    missing = rng.random(rows) < 0.01
    wind_with_gaps = np.where(missing, np.nan, wind_kph)
    return {
        "station_id": rng.integers(100, 160, rows),
        "hour_of_day": hour.astype(float),
        "temp_c": temp_c,
        "feels_like_c": feels_like_c,
        "humidity_pct": humidity_pct,
        "wind_kph": wind_with_gaps,
        "weather_kind": weather,
        "is_weekend": is_weekend,
        "docks_free": docks_free,
        "docks_in_use": docks_in_use,
        "docks_total": docks_total,
        "station_capacity_class": station_capacity_class,
        "rentals": rentals,
    }


def write_tables(out_dir: Path, rows: int = 4_000) -> tuple[Path, Path]:
    """Write the raw and corrected tables as Parquet; return their paths."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    out_dir.mkdir(parents=True, exist_ok=True)
    columns = station_hours(rows)
    raw = pa.table(columns)
    fixed = raw.drop_columns(list(DROPPED_IN_FIX))
    raw_path, fixed_path = out_dir / RAW_FILE, out_dir / FIXED_FILE
    pq.write_table(raw, raw_path)
    pq.write_table(fixed, fixed_path)
    return raw_path, fixed_path


if __name__ == "__main__":
    target = Path(sys.argv[1]) if len(sys.argv) > 1 else Path("gate-demo")
    for path in write_tables(target):
        print(path)
