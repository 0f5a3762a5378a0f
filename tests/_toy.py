"""Small in-memory stages for testing the runner without survey files."""

from __future__ import annotations

import numpy as np
import xarray as xr

from lodeline.model import Stage, StageResult, flag_attrs, segment_chunks, segments_dataset
from lodeline.params import Param


def make_readings(n_lines: int = 3, n_per_line: int = 500, offset: float = 0.0, crs_wkt: str = "WKT") -> tuple[xr.Dataset, xr.Dataset]:
    """A valid readings dataset (model conventions) of straight parallel lines."""
    n = n_lines * n_per_line
    line = np.repeat(np.arange(n_lines, dtype=np.int32), n_per_line)
    along = np.tile(np.arange(n_per_line, dtype=float) * 0.2, n_lines)
    t0 = np.datetime64("2026-05-14T08:00:00", "ns")
    time = t0 + (np.arange(n) * 100_000_000).astype("timedelta64[ns]")
    field = 50000.0 + offset + np.sin(along / 7.0)
    segs = segments_dataset(line, np.zeros(n, dtype=np.int16))
    ds = xr.Dataset(
        {
            "total_field": ("reading", field, {"units": "nT"}),
            "flags": ("reading", np.zeros(n, dtype=np.uint32), flag_attrs()),
        },
        coords={
            "time": ("reading", time),
            "easting": ("reading", along, {"units": "m"}),
            "northing": ("reading", line * 4.0, {"units": "m"}),
            "elevation": ("reading", np.full(n, -10.0), {"units": "m"}),
            "altitude": ("reading", np.full(n, 2.5), {"units": "m"}),
            "line_index": ("reading", line),
            "sensor_index": ("reading", np.zeros(n, dtype=np.int16)),
            "source_file": ("reading", np.zeros(n, dtype=np.int16)),
            "source_row": ("reading", np.arange(1, n + 1, dtype=np.int64)),
        },
        attrs={
            "crs": "EPSG:32631",
            "crs_wkt": crs_wkt,
            "line_names": [f"L{i:03d}" for i in range(n_lines)],
            "line_kinds": ["survey"] * n_lines,
            "sensor_names": ["S1"],
            "source_files": ["toy"],
        },
    )
    lengths = (segs["stop"] - segs["start"]).values
    return ds.chunk({"reading": segment_chunks(lengths, n_per_line)}), segs
