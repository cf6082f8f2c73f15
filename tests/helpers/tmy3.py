"""Convert the hourly weather file shipped with pvlib to the canonical observation CSV.

Source: ``pvlib/data/723170TYA.CSV``, a typical-meteorological-year file of real
hourly observations at a piedmont airport (36.1° N, 79.95° W, 273 m), stamped
hour-ending in local standard time (UTC-5).  Months are spliced from different
years; the timestamps are kept exactly as the file gives them.
"""

from __future__ import annotations

import functools
import os
from pathlib import Path

import pandas as pd

LATITUDE = 36.1
LONGITUDE = -79.95
ELEVATION_M = 273.0
TZ = "Etc/GMT+5"  # fixed UTC-5, the file's local standard time


def tmy3_path() -> str:
    import pvlib

    return os.path.join(os.path.dirname(pvlib.__file__), "data", "723170TYA.CSV")


@functools.lru_cache(maxsize=1)
def tmy3_frame() -> pd.DataFrame:
    """The file as a frame with canonical column names, indexed by aware time.

    Columns: ``air_temp_c``, ``dew_point_c``, ``rel_humidity_pct``,
    ``wind_speed_ms``, ``cloud_cover_pct`` (opaque cloud, tenths x 10),
    ``pressure_kpa``.
    """
    import pvlib

    raw, _meta = pvlib.iotools.read_tmy3(tmy3_path(), map_variables=True)
    out = pd.DataFrame(index=raw.index)
    out.index.name = "time"
    out["air_temp_c"] = raw["temp_air"].astype(float)
    out["dew_point_c"] = raw["temp_dew"].astype(float)
    out["rel_humidity_pct"] = raw["relative_humidity"].astype(float)
    out["wind_speed_ms"] = raw["wind_speed"].astype(float)
    out["cloud_cover_pct"] = raw["OpqCld (tenths)"].astype(float) * 10.0
    out["pressure_kpa"] = raw["pressure"].astype(float) / 10.0  # file gives mbar
    return out


def write_canonical_csv(path: str | Path, *, humidity: str = "dew_point") -> Path:
    """Write the file as a canonical observation CSV.

    Parameters
    ----------
    path : path-like
        Where to write.
    humidity : {"dew_point", "rel_humidity"}
        Which moisture column to write.
    """
    df = tmy3_frame().copy()
    cols = ["air_temp_c", "dew_point_c" if humidity == "dew_point" else "rel_humidity_pct",
            "wind_speed_ms", "cloud_cover_pct"]
    out = df[cols].copy()
    out.insert(0, "time", [t.isoformat() for t in df.index])
    path = Path(path)
    out.to_csv(path, index=False)
    return path
