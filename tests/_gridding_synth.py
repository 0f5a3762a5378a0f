"""Survey-like synthetic readings for the gridding tests (invented data).

Parallel straight tracks, alternate directions, dense samples along each
track, a field of closed-form point dipoles computed with harmonica
(``harmonica.dipole_magnetic``, the dipole field of Blakely 1995, *Potential
Theory in Gravity and Magnetic Applications*, ch. 4) projected on the
main-field direction (total-field anomaly), plus a smooth regional.
"""

from __future__ import annotations

import numpy as np
import xarray as xr
from pyproj import CRS

from lodeline.model import flag_attrs, segment_chunks, segments_dataset

CRS_WKT = CRS.from_epsg(32631).to_wkt()
INCLINATION_DEG = 68.7
DECLINATION_DEG = 2.0
ORIGIN = (493500.0, 5994700.0)
DIPOLES = (  # along m, across m, depth below sensors m, moment A m2
    (12.0, 6.3, 2.5, 1.5),
    (25.0, 11.1, 3.0, 4.0),
    (37.0, 3.6, 2.2, 0.8),
    (44.0, 15.4, 3.5, 6.0),
)


def _frame(angle_deg):
    t = np.deg2rad(angle_deg)
    return np.cos(t), np.sin(t)


def field(easting, northing, angle_deg=30.0, elevation=0.0):
    """Noise-free total-field anomaly plus regional at sensor elevation, nT."""
    import harmonica as hm

    ux, uy = _frame(angle_deg)
    inc, dec = np.deg2rad(INCLINATION_DEG), np.deg2rad(DECLINATION_DEG)
    fhat = np.array([np.cos(inc) * np.sin(dec), np.cos(inc) * np.cos(dec), -np.sin(inc)])
    pos, mom = [], []
    for along, across, depth, m in DIPOLES:
        pos.append((ORIGIN[0] + along * ux - across * uy, ORIGIN[1] + along * uy + across * ux, elevation - depth))
        mom.append(m * fhat)  # induced: moment along the main field
    pos = np.array(pos).T
    coords = (np.asarray(easting, float), np.asarray(northing, float), np.full(np.shape(easting), elevation))
    be, bn, bu = hm.dipole_magnetic(coords, tuple(pos), np.array(mom).T, field="b")
    anomaly = be * fhat[0] + bn * fhat[1] + bu * fhat[2]
    de, dn = np.asarray(easting) - ORIGIN[0], np.asarray(northing) - ORIGIN[1]
    regional = 0.05 * de - 0.03 * dn + 2e-4 * de * dn
    return anomaly + regional


def make_survey(n_tracks=20, length_m=56.0, spacing_m=1.0, step_m=0.2, angle_deg=30.0, noise_nT=0.0, seed=1,
                ties=False, chunk=None):
    """Readings (model conventions) on parallel tracks; returns (readings, segments)."""
    rng = np.random.default_rng(seed)
    ux, uy = _frame(angle_deg)
    e, n, line = [], [], []
    nalong = int(round(length_m / step_m)) + 1
    for k in range(n_tracks):
        a = np.arange(nalong) * step_m + rng.uniform(0, step_m)
        if k % 2:
            a = a[::-1]
        c = k * spacing_m + 0.05 * np.sin(a / 9.0 + k)
        e.append(ORIGIN[0] + a * ux - c * uy)
        n.append(ORIGIN[1] + a * uy + c * ux)
        line.append(np.full(a.size, k))
    kinds = ["survey"] * n_tracks
    if ties:
        for j, a0 in enumerate((length_m / 3, 2 * length_m / 3)):
            c = np.arange(-1.0, n_tracks * spacing_m, step_m)
            a = a0 + 0.05 * np.sin(c)
            e.append(ORIGIN[0] + a * ux - c * uy)
            n.append(ORIGIN[1] + a * uy + c * ux)
            line.append(np.full(c.size, n_tracks + j))
            kinds.append("tie")
    e, n, line = np.concatenate(e), np.concatenate(n), np.concatenate(line).astype(np.int32)
    m = e.size
    value = field(e, n, angle_deg) + noise_nT * rng.standard_normal(m)
    segs = segments_dataset(line, np.zeros(m, dtype=np.int16))
    t0 = np.datetime64("2026-05-14T08:00:00", "ns")
    ds = xr.Dataset(
        {
            "total_field": ("reading", value + 49900.0, {"units": "nT"}),
            "residual": ("reading", value, {"units": "nT", "long_name": "residual anomaly"}),
            "flags": ("reading", np.zeros(m, dtype=np.uint32), flag_attrs()),
        },
        coords={
            "time": ("reading", t0 + (np.arange(m) * 100_000_000).astype("timedelta64[ns]")),
            "easting": ("reading", e, {"units": "m"}),
            "northing": ("reading", n, {"units": "m"}),
            "elevation": ("reading", np.zeros(m), {"units": "m"}),
            "altitude": ("reading", np.full(m, 2.5), {"units": "m"}),
            "line_index": ("reading", line),
            "sensor_index": ("reading", np.zeros(m, dtype=np.int16)),
            "source_file": ("reading", np.zeros(m, dtype=np.int16)),
            "source_row": ("reading", np.arange(1, m + 1, dtype=np.int64)),
        },
        attrs={
            "crs": "EPSG:32631",
            "crs_wkt": CRS_WKT,
            "line_names": [f"L{i:03d}" for i in range(len(kinds))],
            "line_kinds": kinds,
            "sensor_names": ["S1"],
            "source_files": ["synthetic"],
            "main_field_nT": 49924.0,
            "main_field_inclination_deg": INCLINATION_DEG,
            "main_field_declination_deg": DECLINATION_DEG,
            "main_field_grid_declination_deg": DECLINATION_DEG,
        },
    )
    lengths = (segs["stop"] - segs["start"]).values
    return ds.chunk({"reading": segment_chunks(lengths, chunk or m)}), segs
