"""Invented survey for the detectability tests: straight tracks along easting, a grid, the picker's metadata.

Tracks (one sensor each) run from easting 0 to 100 m at 0.2 m steps, 0.1 s
apart (2 m/s), 2.5 m above the seabed: ten survey lines at northing 0, 1, 2,
3, 4 and 16, 17, 18, 19, 20 m, so a 12 m strip between 4 and 16 m holds no
reading. Line L2 (northing 2) has dropouts from easting 50 to 60 m; line L7
(northing 18) is driven at 1 m steps (10 m/s) from easting 40 to 60 m. The
grid (0.25 m cells) is filled inside easting -2..102 m and northing -2..22 m
and blank outside.
"""

from __future__ import annotations

import logging

import numpy as np
import pandas as pd
import xarray as xr
from pyproj import CRS

from lodeline.model import StageContext, flag_attrs, flag_mask, segment_chunks, segments_dataset

CRS_WKT = CRS.from_epsg(32631).to_wkt()
TRACKS_Y = (0.0, 1.0, 2.0, 3.0, 4.0, 16.0, 17.0, 18.0, 19.0, 20.0)
ALTITUDE_M = 2.5
INCLINATION_DEG = 90.0
MAIN_FIELD_NT = 50000.0
THRESHOLD_NT_PER_M = 0.5
EDGE_MARGIN_M = 1.0
E0 = 500000.0
N0 = 6000000.0


def _track(k: int, y: float) -> tuple[np.ndarray, np.ndarray]:
    if k == 7:  # driven fast from 40 to 60 m
        x = np.concatenate([np.arange(0.0, 40.0, 0.2), np.arange(40.0, 60.0, 1.0), np.arange(60.0, 100.0 + 1e-9, 0.2)])
    else:
        x = np.arange(0.0, 100.0 + 1e-9, 0.2)
    return x, np.full(x.size, y)


def readings():
    """Readings and segments datasets (model conventions, chunked on segment boundaries)."""
    xs, ys, lines = [], [], []
    for k, y in enumerate(TRACKS_Y):
        x, yy = _track(k, y)
        xs.append(x)
        ys.append(yy)
        lines.append(np.full(x.size, k, dtype=np.int32))
    x = np.concatenate(xs)
    y = np.concatenate(ys)
    line = np.concatenate(lines)
    n = x.size
    time = np.datetime64("2026-05-14T08:00:00", "ns") + (np.arange(n) * 100_000_000).astype("timedelta64[ns]")
    flags = np.zeros(n, dtype=np.uint32)
    flags[(line == 2) & (x >= 50.0) & (x < 60.0)] = flag_mask("dropout")
    residual = np.where(flags == 0, 0.0, np.nan)
    segs = segments_dataset(line, np.zeros(n, dtype=np.int16))
    ds = xr.Dataset(
        {
            "total_field": ("reading", np.full(n, 50000.0), {"units": "nT"}),
            "residual": ("reading", residual, {"units": "nT"}),
            "flags": ("reading", flags, flag_attrs()),
        },
        coords={
            "time": ("reading", time),
            "easting": ("reading", E0 + x, {"units": "m"}),
            "northing": ("reading", N0 + y, {"units": "m"}),
            "elevation": ("reading", np.full(n, -10.0), {"units": "m"}),
            "altitude": ("reading", np.full(n, ALTITUDE_M), {"units": "m"}),
            "line_index": ("reading", line),
            "sensor_index": ("reading", np.zeros(n, dtype=np.int16)),
            "source_file": ("reading", np.zeros(n, dtype=np.int16)),
            "source_row": ("reading", np.arange(1, n + 1, dtype=np.int64)),
        },
        attrs={"crs": "EPSG:32631", "crs_wkt": CRS_WKT, "line_names": [f"L{k}" for k in range(len(TRACKS_Y))],
               "line_kinds": ["survey"] * len(TRACKS_Y), "sensor_names": ["S1"], "source_files": ["synthetic"]},
    )
    lengths = (segs["stop"] - segs["start"]).values
    return ds.chunk({"reading": segment_chunks(lengths, 1200)}), segs


def grid(cell: float = 0.25, chunk: int = 128, blank_m: float | None = None) -> xr.Dataset:
    """A grid filled inside easting -2..102 m, northing -2..22 m (relative), blank outside.

    With ``blank_m``, cells farther than that across from every track are blank too (as the gridding stage blanks).
    """
    e = E0 + np.arange(-5.0, 105.0 + 1e-9, cell)
    n = N0 + np.arange(-5.0, 25.0 + 1e-9, cell)
    inside = ((n[:, None] >= N0 - 2) & (n[:, None] <= N0 + 22) & (e[None, :] >= E0 - 2) & (e[None, :] <= E0 + 102))
    if blank_m is not None:
        across = np.min(np.abs((n - N0)[:, None] - np.array(TRACKS_Y)[None, :]), axis=1)
        inside &= (across <= blank_m)[:, None]
    values = np.where(inside, 0.0, np.nan)
    ds = xr.Dataset(
        {"residual": (("northing", "easting"), values, {"units": "nT", "exclude_flags": "spike dropout"})},
        coords={"easting": ("easting", e, {"units": "m"}), "northing": ("northing", n, {"units": "m"})},
        attrs={"crs_wkt": CRS_WKT, "main_field_inclination_deg": INCLINATION_DEG, "main_field_nT": MAIN_FIELD_NT,
               "main_field_grid_declination_deg": 0.0},
    )
    return ds.chunk({"northing": chunk, "easting": chunk})


def picking_metadata(pick_on: str = "total_gradient_amplitude", threshold: float = THRESHOLD_NT_PER_M) -> pd.DataFrame:
    meta = {"pick_on": pick_on, "threshold": threshold, "edge_margin_m": EDGE_MARGIN_M, "noise_level": threshold / 5}
    return pd.DataFrame({"key": list(meta), "value": [str(v) for v in meta.values()]})


DETECTOR_PARAMS = {"detector_depths_m": [1.0, 1.5], "detector_window_factor": 1.5, "detector_min_window_m": 1.5,
                   "detector_background_order": 2, "detector_min_fill": 0.5}


def data(pick_on: str = "total_gradient_amplitude", blank_m: float | None = None) -> dict:
    r, s = readings()
    meta = picking_metadata(pick_on, 5.0 if pick_on == "dipole_detector" else THRESHOLD_NT_PER_M)
    if pick_on == "dipole_detector":
        meta.loc[len(meta)] = ["detector_scales_nT2", "0.004;0.006"]
    return {"levelling": {"readings": r, "segments": s}, "gridding": {"grid": grid(blank_m=blank_m)},
            "picking": {"picking_metadata": meta}}


def detector_records() -> dict:
    """What the runner hands over: the picking stage's manifest record with its parameters."""
    return {"picking": {"components": {"params": dict(DETECTOR_PARAMS, pick_on="dipole_detector")}}}


def context(tmp_path, records=None) -> StageContext:
    return StageContext(survey={"crs": "EPSG:32631", "crs_wkt": CRS_WKT, "name": "synthetic"}, inputs={},
                        scratch=tmp_path, log=logging.getLogger("test"), progress=lambda *a, **k: None,
                        records=records or {})


def area_wkt(x0=5.0, x1=95.0, y0=0.0, y1=20.0) -> str:
    return (f"POLYGON (({E0 + x0} {N0 + y0}, {E0 + x1} {N0 + y0}, {E0 + x1} {N0 + y1}, {E0 + x0} {N0 + y1}, "
            f"{E0 + x0} {N0 + y0}))")
