"""Invented synthetic surveys for the levelling tests.

Parallel survey lines of several sensors, flown in alternating directions,
and tie lines across them flown afterwards; a smooth invented field, known
per-segment offsets and linear drifts, white Gaussian noise and,
optionally, point dipoles (closed form, Blakely 1995).
"""

from __future__ import annotations

import numpy as np
import xarray as xr

from lodeline.model import flag_attrs, segment_chunks, segments_dataset

T0 = np.datetime64("2026-03-02T09:00:00", "ns")
MU0_4PI = 1e-7  # mu0 / (4 pi), T m / A


def dipole_anomaly(e, n, u, source, moment_Am2, inclination_deg, declination_deg):
    """Total-field anomaly of a point dipole, nT (Blakely 1995, ch. 4: dipole field).

    B = (mu0 / 4 pi) (3 (m . r_hat) r_hat - m) / r**3, projected on the unit
    vector of the main field (the total-field anomaly of a small anomaly).
    The moment is induced (along the main field).
    """
    inc, dec = np.radians(inclination_deg), np.radians(declination_deg)
    f_hat = np.array([np.cos(inc) * np.sin(dec), np.cos(inc) * np.cos(dec), -np.sin(inc)])
    m = moment_Am2 * f_hat
    e, n, u = np.broadcast_arrays(np.asarray(e, dtype=float), np.asarray(n, dtype=float), np.asarray(u, dtype=float))
    r = np.stack([e - source[0], n - source[1], u - source[2]], axis=-1)
    dist = np.linalg.norm(r, axis=-1)
    r_hat = r / dist[..., None]
    b = MU0_4PI * (3 * (r_hat @ m)[..., None] * r_hat - m) / dist[..., None] ** 3
    return (b @ f_hat) * 1e9


def regional(e, n):
    """An invented smooth regional field, nT."""
    return 6.0 * np.sin(2 * np.pi * e / 310.0 + 0.4) + 4.0 * np.cos(2 * np.pi * n / 170.0 - 0.2) + 0.015 * e


def synthetic_survey(
    *,
    n_lines: int = 6,
    sensors=(-1.0, 0.0, 1.0),
    line_spacing_m: float = 3.0,
    line_length_m: float = 200.0,
    ties_at_m=(25.0, 100.0, 175.0),
    tie_margin_m: float = 10.0,
    speed_m_s: float = 2.0,
    dt_s: float = 0.1,
    turn_s: float = 60.0,
    azimuth_deg: float = 70.0,
    noise_nT: float = 0.05,
    offset_range_nT: float = 3.0,
    drift_range_nT_per_h: float = 20.0,
    tie_offset_range_nT: float = 2.0,
    wander_m: float = 0.3,
    dipoles=(),
    field=regional,
    seed: int = 1,
    chunk_target: int | None = None,
    with_ties: bool = True,
):
    """Build a readings dataset following :mod:`lodeline.model`, with ``residual``.

    Coordinates: survey lines run along ``azimuth_deg`` (grid azimuth) at
    across-line positions ``v = k * line_spacing_m``; ties run across them at
    along-line positions ``ties_at_m``. Sensors sit at across-track offsets
    ``sensors`` (positive to starboard). Positions are the sensors' own.

    Returns
    -------
    readings, segments : xarray.Dataset
    truth : dict
        ``offset`` and ``drift_nT_per_s`` per segment (survey segments: the
        level at the segment's mid time and the slope; tie segments: a
        constant), ``is_tie`` per segment, ``noise_nT``, ``field`` (the
        noise-free levelled field at every reading) and ``mid_s``.
    """
    rng = np.random.default_rng(seed)
    az = np.radians(azimuth_deg)
    along = np.array([np.sin(az), np.cos(az)])
    across = np.array([np.cos(az), -np.sin(az)])  # starboard of the along direction
    step = speed_m_s * dt_s
    segs_e, segs_n, segs_t, line_of, sensor_of, kinds, names = [], [], [], [], [], [], []
    t = 0.0

    def add_line(start_uv, direction_uv, length, name, kind):
        nonlocal t
        k = int(round(length / step)) + 1
        d = np.arange(k) * step
        heading = direction_uv[0] * along + direction_uv[1] * across
        starboard = np.array([heading[1], -heading[0]])
        base = (start_uv[0] * along + start_uv[1] * across)[None, :] + d[:, None] * heading[None, :]
        base = base + (wander_m * np.sin(2 * np.pi * d / 57.0 + rng.uniform(0, 6.3)))[:, None] * starboard[None, :]
        times = t + np.arange(k) * dt_s
        names.append(name)
        kinds.append(kind)
        li = len(names) - 1
        for s_i, off in enumerate(sensors):
            pos = base + off * starboard[None, :]
            segs_e.append(pos[:, 0])
            segs_n.append(pos[:, 1])
            segs_t.append(times)
            line_of.append(li)
            sensor_of.append(s_i)
        t = times[-1] + turn_s

    for i in range(n_lines):
        v = i * line_spacing_m
        if i % 2 == 0:
            add_line((0.0, v), (1.0, 0.0), line_length_m, f"L{i + 1:03d}", "survey")
        else:
            add_line((line_length_m, v), (-1.0, 0.0), line_length_m, f"L{i + 1:03d}", "survey")
    if with_ties:
        v0 = -tie_margin_m
        v1 = (n_lines - 1) * line_spacing_m + tie_margin_m
        for j, u in enumerate(ties_at_m):
            if j % 2 == 0:
                add_line((u, v0), (0.0, 1.0), v1 - v0, f"T{j + 1:02d}", "tie")
            else:
                add_line((u, v1), (0.0, -1.0), v1 - v0, f"T{j + 1:02d}", "tie")

    nseg = len(segs_e)
    is_tie = np.array([kinds[line_of[k]] == "tie" for k in range(nseg)])
    offset = np.where(
        is_tie,
        rng.uniform(-tie_offset_range_nT, tie_offset_range_nT, nseg),
        rng.uniform(-offset_range_nT, offset_range_nT, nseg),
    )
    drift = np.where(is_tie, 0.0, rng.uniform(-drift_range_nT_per_h, drift_range_nT_per_h, nseg) / 3600.0)
    mid_s = np.array([0.5 * (x[0] + x[-1]) for x in segs_t])

    e = np.concatenate(segs_e)
    n = np.concatenate(segs_n)
    ts = np.concatenate(segs_t)
    lengths = [x.size for x in segs_e]
    seg_of = np.repeat(np.arange(nseg), lengths)
    u = np.zeros_like(e)
    clean = field(e, n)
    for src, moment in dipoles:
        clean = clean + dipole_anomaly(e, n, u, src, moment, 70.0, 2.0)
    level = offset[seg_of] + drift[seg_of] * (ts - mid_s[seg_of])
    residual = clean + level + rng.normal(0.0, noise_nT, e.size)

    ds, segments = make_dataset(e, n, ts, np.asarray(line_of)[seg_of], np.asarray(sensor_of)[seg_of], residual,
                                names, kinds, len(sensors), chunk_target)
    truth = {
        "offset": offset,
        "drift_nT_per_s": drift,
        "is_tie": is_tie,
        "noise_nT": noise_nT,
        "field": clean,
        "mid_s": mid_s,
    }
    return ds, segments, truth


def make_dataset(e, n, t_s, line_index, sensor_index, residual, names, kinds, n_sensors, chunk_target=None):
    """Readings (model conventions, with ``residual``) and segments from flat arrays.

    ``e``, ``n`` are local metres (offset to a UTM-like origin), ``t_s``
    seconds from :data:`T0`; readings must already be in storage order.
    """
    e = np.asarray(e, dtype=np.float64)
    count = e.size
    line_index = np.asarray(line_index).astype(np.int32)
    sensor_index = np.asarray(sensor_index).astype(np.int16)
    segments = segments_dataset(line_index, sensor_index)
    time = T0 + np.round(np.asarray(t_s) * 1e9).astype("timedelta64[ns]")
    residual = np.asarray(residual, dtype=np.float64)
    ds = xr.Dataset(
        {
            "total_field": ("reading", 50_000.0 + residual, {"units": "nT"}),
            "residual": ("reading", residual, {"units": "nT"}),
            "flags": ("reading", np.zeros(count, dtype=np.uint32), flag_attrs()),
        },
        coords={
            "time": ("reading", time),
            "easting": ("reading", 500_000.0 + e, {"units": "m"}),
            "northing": ("reading", 6_000_000.0 + np.asarray(n, dtype=np.float64), {"units": "m"}),
            "elevation": ("reading", np.full(count, -10.0), {"units": "m"}),
            "altitude": ("reading", np.full(count, 2.5), {"units": "m"}),
            "line_index": ("reading", line_index),
            "sensor_index": ("reading", sensor_index),
            "source_file": ("reading", np.zeros(count, dtype=np.int16)),
            "source_row": ("reading", np.arange(1, count + 1, dtype=np.int64)),
        },
        attrs={
            "crs": "EPSG:32631",
            "crs_wkt": "EPSG:32631",
            "line_names": list(names),
            "line_kinds": list(kinds),
            "sensor_names": [f"S{k + 1}" for k in range(n_sensors)],
            "source_files": ["synthetic"],
        },
    )
    seg_len = (segments["stop"] - segments["start"]).values
    return ds.chunk({"reading": segment_chunks(seg_len, chunk_target or max(count, 1))}), segments


def straight_tracks(tracks, step_m=0.2, dt_s=0.1, field=None, chunk_target=None):
    """One-sensor readings along straight tracks.

    Parameters
    ----------
    tracks : list of (name, kind, (x0, y0), (x1, y1))
        Line name, "survey" or "tie", start and end (local m).
    field : callable, optional
        ``field(e, n)`` in local metres, nT (default 0).
    """
    es, ns, ts, li = [], [], [], []
    t = 0.0
    for k, (_, _, p0, p1) in enumerate(tracks):
        length = float(np.hypot(p1[0] - p0[0], p1[1] - p0[1]))
        m = int(round(length / step_m)) + 1
        f = np.linspace(0.0, 1.0, m)
        es.append(p0[0] + f * (p1[0] - p0[0]))
        ns.append(p0[1] + f * (p1[1] - p0[1]))
        ts.append(t + np.arange(m) * dt_s)
        li.append(np.full(m, k))
        t = ts[-1][-1] + 30.0
    e, n = np.concatenate(es), np.concatenate(ns)
    values = field(e, n) if field is not None else np.zeros(e.size)
    names = [x[0] for x in tracks]
    kinds = [x[1] for x in tracks]
    sensor = np.zeros(e.size, dtype=int)
    return make_dataset(e, n, np.concatenate(ts), np.concatenate(li), sensor, values, names, kinds, 1, chunk_target)
