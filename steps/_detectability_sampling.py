"""Along-line sampling and line spacing checks of the detectability stage.

Stretches
    Each segment (one line of one sensor, in acquisition order) is cut
    into stretches of ``stretch_length_m`` of distance along its own track
    (the running sum of the steps between consecutive readings). Per
    stretch: readings and accepted readings, length, duration, speed
    (length over duration), median sample interval and step, median sensor
    altitude. One dask task per reading chunk (whole segments); only the
    small table comes back.

Readings per anomaly width
    ``anomaly_width_m`` is the half-maximum width along the track of the
    anomaly of the target class at its detection distance: the class target
    at its maximum burial below a sensor at the stretch's altitude, seen
    from the farthest track offset at which it is still detected (worst
    orientation), ``steps/_detectability_physics.py``. Two counts:

    ``readings_per_anomaly``
        The width over the median step of all readings: what the speed and
        sample rate give (``too_fast`` below ``min_readings_per_anomaly``,
        or faster than ``max_speed_m_s`` when given).
    ``least_readings_per_anomaly``
        The fewest accepted readings in any window of that width starting
        in the stretch (windows wholly inside the segment): gaps, dropouts
        and readings left out by their flags lower it (``too_sparse``).

Line spacing (survey lines only)
    Tie lines cross the survey lines and are left out. The centre of each
    survey line is the mean position over its sensors of each stretch's
    middle; from every such point the distance to the nearest other survey
    line on each side (perpendicular to its own direction there) is
    measured against a line through that line's centre points, accepting
    only neighbours whose closest point lies inside them (not at an end).
    ``spacing_exceeded`` where a side is farther than ``max_line_spacing_m``
    (an outer line has no neighbour on one side and is not flagged there).

These are our definitions (common practice in spirit, no published source);
the physics of the anomaly width is Blakely (1995, ch. 4).

References
----------
Blakely, R. J. (1995). Potential Theory in Gravity and Magnetic
    Applications. Cambridge University Press. [Blakely1995]_
"""

from __future__ import annotations

import math

import dask
import numpy as np
import pandas as pd

from ._blocks import as_dask

__all__ = ["stretch_table", "line_spacing", "line_table", "sampling_checks", "STRETCH_FLAGS"]

STRETCH_FLAGS = ("too_fast", "too_sparse", "spacing_exceeded")
_STRETCH_COLUMNS = [
    "line", "line_kind", "sensor", "stretch", "along_start_m", "length_m", "duration_s", "readings", "accepted",
    "speed_m_s", "sample_interval_s", "step_m", "altitude_m", "start_easting_m", "start_northing_m",
    "end_easting_m", "end_northing_m", "mid_easting_m", "mid_northing_m", "least_readings_per_anomaly",
]


def _segment_rows(e, n, t, ok, alt, stretch_m, width_of_alt):
    """Stretch rows (dicts without names) of one segment."""
    step = np.hypot(np.diff(e), np.diff(n))
    step = np.where(np.isfinite(step), step, 0.0)
    along = np.concatenate([[0.0], np.cumsum(step)])
    dt = np.diff(t)
    k = np.floor(along / stretch_m).astype(np.int64)
    nk = int(k[-1]) + 1
    end = along[-1]
    # accepted positions and the least count in a window of the stretch's width
    a = along[ok]
    rows = []
    known = np.isfinite(alt)  # the altitude of a flagged reading is still its altitude
    for s in range(nk):
        sel = np.flatnonzero(k == s)
        i0, i1 = int(sel[0]), int(sel[-1])
        length = along[i1] - along[i0]
        duration = t[i1] - t[i0]
        inner_dt = dt[i0:i1] if i1 > i0 else np.array([])
        inner_step = step[i0:i1] if i1 > i0 else np.array([])
        altitude = float(np.median(alt[sel][known[sel]])) if known[sel].any() else float("nan")
        rows.append({
            "stretch": s, "along_start_m": float(along[i0]), "length_m": float(length), "duration_s": float(duration),
            "readings": int(sel.size), "accepted": int(ok[sel].sum()),
            "speed_m_s": float(length / duration) if duration > 0 else float("nan"),
            "sample_interval_s": float(np.median(inner_dt)) if inner_dt.size else float("nan"),
            "step_m": float(np.median(inner_step)) if inner_step.size else float("nan"),
            "altitude_m": altitude,
            "start_easting_m": float(e[i0]), "start_northing_m": float(n[i0]),
            "end_easting_m": float(e[i1]), "end_northing_m": float(n[i1]),
            "mid_easting_m": float(e[(i0 + i1) // 2]), "mid_northing_m": float(n[(i0 + i1) // 2]),
        })
    widths = np.array([width_of_alt(r["altitude_m"]) for r in rows])
    least = np.full(nk, np.nan)
    # Windows (x, x + w] start just after every accepted reading, and [x, x + w]
    # at every stretch start (so a stretch wholly inside a gap has windows too);
    # the fewest readings in a window of the anomaly's width lies among these.
    first = np.array([r["along_start_m"] for r in rows])
    starts = np.concatenate([first, a])
    ks = np.minimum(np.floor(starts / stretch_m).astype(np.int64), nk - 1)
    ks[: first.size] = np.arange(nk)
    w = widths[ks]
    valid = np.isfinite(w) & (starts + w <= end)
    if valid.any():
        hi = np.searchsorted(a, starts + w, side="right")
        lo = np.concatenate([np.searchsorted(a, first, side="left"), np.arange(1, a.size + 1)])
        counts = (hi - lo).astype(float)
        for s in np.unique(ks[valid]):
            least[s] = counts[valid & (ks == s)].min()
    for r, c in zip(rows, least):
        r["least_readings_per_anomaly"] = float(c)
    return rows


def _chunk_rows(e, n, t, flags, value, alt, seg_start, seg_stop, seg_line, seg_sensor, *, exclude, stretch_m,
                alt_grid, width_grid, fallback):
    tsec = (np.asarray(t).astype("datetime64[ns]").astype(np.int64) - 0) / 1e9
    ok = ((flags & np.uint32(exclude)) == 0) & np.isfinite(value) & np.isfinite(e) & np.isfinite(n)

    def width_of_alt(h):
        return float(np.interp(h if np.isfinite(h) else fallback, alt_grid, width_grid))

    out = []
    for a, b, line, sensor in zip(seg_start, seg_stop, seg_line, seg_sensor):
        if b <= a:
            continue
        sl = slice(int(a), int(b))
        for r in _segment_rows(e[sl], n[sl], tsec[sl], ok[sl], alt[sl], stretch_m, width_of_alt):
            r["line_index"], r["sensor_index"] = int(line), int(sensor)
            out.append(r)
    return out


def stretch_table(readings, segments, exclude: int, stretch_m: float, alt_grid, width_grid,
                  value: str = "residual", fallback_altitude: float = float("nan")) -> pd.DataFrame:
    """One row per stretch of every segment (see the module docstring), without the flags.

    ``width_grid`` is the anomaly width (m) against sensor altitude
    ``alt_grid`` (m); a stretch with no known altitude uses ``fallback_altitude``.
    """
    chunks = readings["easting"].data.chunks
    bounds = np.cumsum((0,) + tuple(chunks[0]))
    start = np.asarray(segments["start"].values, dtype=np.int64)
    stop = np.asarray(segments["stop"].values, dtype=np.int64)
    line = np.asarray(segments["line_index"].values, dtype=np.int64)
    sensor = np.asarray(segments["sensor_index"].values, dtype=np.int64)

    def blocks(name):
        return as_dask(readings[name], chunks).to_delayed().ravel()

    cols = [blocks(x) for x in ("easting", "northing", "time", "flags", value, "altitude")]
    tasks = []
    for c, parts in enumerate(zip(*cols)):
        lo, hi = bounds[c], bounds[c + 1]
        mine = (start >= lo) & (start < hi)
        tasks.append(dask.delayed(_chunk_rows)(
            *parts, start[mine] - lo, stop[mine] - lo, line[mine], sensor[mine], exclude=exclude,
            stretch_m=stretch_m, alt_grid=np.asarray(alt_grid), width_grid=np.asarray(width_grid),
            fallback=float(fallback_altitude)))
    rows = [r for part in dask.compute(*tasks) for r in part]
    table = pd.DataFrame(rows)
    names = list(readings.attrs["line_names"])
    kinds = list(readings.attrs["line_kinds"])
    sensors = list(readings.attrs["sensor_names"])
    if table.empty:
        return pd.DataFrame(columns=_STRETCH_COLUMNS)
    table["line"] = [names[i] for i in table["line_index"]]
    table["line_kind"] = [kinds[i] for i in table["line_index"]]
    table["sensor"] = [sensors[i] for i in table["sensor_index"]]
    return table[_STRETCH_COLUMNS + ["line_index", "sensor_index"]]


def line_spacing(stretches: pd.DataFrame, search_m: float) -> pd.DataFrame:
    """Spacing to the neighbouring survey lines at the centre of every (survey line, stretch).

    Returns
    -------
    pandas.DataFrame
        ``line``, ``stretch``, ``centre_easting_m``, ``centre_northing_m``,
        ``spacing_left_m``, ``spacing_right_m`` (NaN: no neighbour on that
        side within ``search_m``). Left and right are seen along the line's
        direction of travel (its stretch order).
    """
    import shapely

    survey = stretches[stretches["line_kind"] == "survey"]
    cols = ["line", "stretch", "centre_easting_m", "centre_northing_m", "spacing_left_m", "spacing_right_m"]
    if survey.empty:
        return pd.DataFrame(columns=cols)
    centres = (survey.groupby(["line", "stretch"], sort=True)[["mid_easting_m", "mid_northing_m"]].mean()
               .reset_index())
    lines = {}
    for name, part in centres.groupby("line", sort=False):
        xy = part[["mid_easting_m", "mid_northing_m"]].to_numpy(float)
        if len(xy) >= 2:
            lines[name] = (part.index.to_numpy(), xy, shapely.LineString(xy))
    names = list(lines)
    tree = shapely.STRtree([lines[k][2] for k in names])
    left = np.full(len(centres), np.nan)
    right = np.full(len(centres), np.nan)
    left_end = np.zeros(len(centres), dtype=bool)
    right_end = np.zeros(len(centres), dtype=bool)
    for name, (idx, xy, geom) in lines.items():
        for j, row in enumerate(idx):
            p = shapely.Point(xy[j])
            a, b = xy[max(j - 1, 0)], xy[min(j + 1, len(xy) - 1)]
            t = b - a
            norm = math.hypot(*t)
            if norm == 0:
                continue
            t = t / norm
            for k in tree.query(p.buffer(search_m)):
                other = names[k]
                if other == name:
                    continue
                g = lines[other][2]
                at = g.project(p)
                at_end = at <= 1e-9 or at >= g.length - 1e-9
                q = np.asarray(g.interpolate(at).coords[0])
                dist = float(np.hypot(*(q - xy[j])))
                side = t[0] * (q[1] - xy[j][1]) - t[1] * (q[0] - xy[j][0])
                if side > 0 and not dist >= left[row]:
                    left[row], left_end[row] = dist, at_end
                elif side < 0 and not dist >= right[row]:
                    right[row], right_end[row] = dist, at_end
    # the nearest line on a side ends before reaching abreast: no neighbour there
    left[left_end] = np.nan
    right[right_end] = np.nan
    out = centres.rename(columns={"mid_easting_m": "centre_easting_m", "mid_northing_m": "centre_northing_m"})
    out["spacing_left_m"] = left
    out["spacing_right_m"] = right
    return out[cols]


def line_table(stretches: pd.DataFrame, spacing: pd.DataFrame) -> pd.DataFrame:
    """One row per line: medians over its stretches and sensors, fewest readings, counts of flagged stretches.

    Spacings are summarised over the stretch centres inside the area of
    interest (``spacing["in_area"]`` when present).
    """
    rows = []
    if "in_area" in spacing:
        spacing = spacing[spacing["in_area"]]
    for name, part in stretches.groupby("line", sort=False):
        sp = spacing[spacing["line"] == name]
        flags = {f: int(part[f].sum()) for f in ("too_fast", "too_sparse")}
        flags["spacing_exceeded"] = int(sp["spacing_exceeded"].sum()) if "spacing_exceeded" in sp else 0
        sides = np.concatenate([sp["spacing_left_m"].to_numpy(float), sp["spacing_right_m"].to_numpy(float)]) \
            if len(sp) else np.array([])
        sides = sides[np.isfinite(sides)]
        rows.append({
            "line": name, "line_kind": part["line_kind"].iloc[0], "sensors": int(part["sensor"].nunique()),
            "length_m": float(part.groupby("sensor")["length_m"].sum().median()),
            "speed_m_s": float(np.nanmedian(part["speed_m_s"])),
            "max_speed_m_s": float(np.nanmax(part["speed_m_s"])) if part["speed_m_s"].notna().any() else np.nan,
            "sample_interval_s": float(np.nanmedian(part["sample_interval_s"])),
            "anomaly_width_m": float(np.nanmedian(part["anomaly_width_m"])),
            "readings_per_anomaly": float(np.nanmedian(part["readings_per_anomaly"])),
            "least_readings_per_anomaly": float(np.nanmin(part["least_readings_per_anomaly"]))
            if part["least_readings_per_anomaly"].notna().any() else np.nan,
            "spacing_median_m": float(np.median(sides)) if sides.size else np.nan,
            "spacing_max_m": float(np.max(sides)) if sides.size else np.nan,
            "stretches": int(len(part)),
            "stretches_too_fast": flags["too_fast"],
            "stretches_too_sparse": flags["too_sparse"],
            "stretches_spacing_exceeded": flags["spacing_exceeded"],
            "flags": " ".join(f for f in STRETCH_FLAGS if flags[f]),
        })
    return pd.DataFrame(rows)


def sampling_checks(readings, segments, exclude: int, value: str, stretch_m: float, alt_grid, width_grid,
                    fallback_altitude: float, n_min: int, max_speed_m_s, max_line_spacing_m, inside):
    """Stretches with their flags, the line spacing and the per-line table.

    Parameters
    ----------
    alt_grid, width_grid : ndarray
        The class's anomaly width (m) against sensor altitude (m).
    n_min : int
        ``min_readings_per_anomaly``.
    max_speed_m_s, max_line_spacing_m : float or None
        The specification (None: not checked; the speed is still checked
        against the width and the sample rate).
    inside : callable
        ``inside(easting, northing)`` -> bool array: within the area of
        interest (stretches outside it are measured but not flagged).

    Returns
    -------
    (pandas.DataFrame, pandas.DataFrame, pandas.DataFrame)
        ``sampling_stretches``, ``line_spacing`` and ``sampling_lines``.
    """
    stretches = stretch_table(readings, segments, exclude, stretch_m, alt_grid, width_grid, value, fallback_altitude)
    with np.errstate(invalid="ignore", divide="ignore"):
        stretches["anomaly_width_m"] = np.interp(stretches["altitude_m"].fillna(fallback_altitude), alt_grid, width_grid)
        stretches["readings_per_anomaly"] = stretches["anomaly_width_m"] / stretches["step_m"]
        limit = stretches["anomaly_width_m"] / (n_min * stretches["sample_interval_s"])
    if max_speed_m_s is not None:
        limit = np.fmin(limit, max_speed_m_s)
    stretches["speed_limit_m_s"] = limit
    stretches["in_area"] = inside(stretches["mid_easting_m"], stretches["mid_northing_m"])
    stretches["too_fast"] = (stretches["speed_m_s"] > limit).fillna(False).astype(bool) & stretches["in_area"]
    stretches["too_sparse"] = ((stretches["least_readings_per_anomaly"] < n_min).fillna(False).astype(bool)
                               & stretches["in_area"])
    spacing = line_spacing(stretches, max(100.0, 10.0 * (max_line_spacing_m or 0.0)))
    spacing["in_area"] = inside(spacing["centre_easting_m"], spacing["centre_northing_m"])
    if max_line_spacing_m is not None:
        wide = np.fmax(spacing["spacing_left_m"].to_numpy(float), spacing["spacing_right_m"].to_numpy(float))
        spacing["spacing_exceeded"] = (np.nan_to_num(wide, nan=0.0) > max_line_spacing_m) & spacing["in_area"]
    else:
        spacing["spacing_exceeded"] = False
    stretches = stretches.merge(spacing[["line", "stretch", "spacing_left_m", "spacing_right_m", "spacing_exceeded"]],
                                on=["line", "stretch"], how="left")
    stretches["spacing_exceeded"] = stretches["spacing_exceeded"].fillna(False).astype(bool)
    stretches["flags"] = [" ".join(f for f in STRETCH_FLAGS if row[f])
                          for _, row in stretches[list(STRETCH_FLAGS)].iterrows()]
    lines = line_table(stretches, spacing)
    return stretches.drop(columns=["line_index", "sensor_index"]), spacing, lines
