"""Sensor positions from the recorded GNSS antenna track of one segment.

Plain numpy geometry used by the positions stage (``steps/positions.py``)
and by its time-lag estimate (``steps/_positions_lag.py``). One segment is one
line of one sensor, in time order; the antenna track is the sequence of
recorded antenna positions of that segment.

Method
------
1. *Track smoothing.* The antenna positions are smoothed by a local
   quadratic least-squares fit in along-track distance (the fit of
   Savitzky & Golay 1964, on uneven spacing as in the local polynomial
   regression of Cleveland 1979, with uniform weights). The window holds the
   readings within ``window_m / 2`` of each reading along the raw track, and
   at least two readings on each side where there are any. The fitted value
   is the smoothed position and the fitted first derivative gives the course
   (the unit tangent). A quadratic follows a circular arc of radius ``R``
   over a window ``W`` with an error of order ``W**4 / R**3``, so it does not
   cut corners as a running mean does (inward by ``W**2 / (24 R)``).
2. *Along-track distance* ``s`` is the cumulative length of the smoothed
   track; speed is the distance over time across the same window.
3. *Time lag.* A reading stamped ``T`` was measured at ``T - lag``: the
   antenna then was at the along-track distance ``s_a = s(T - lag)``
   (linear interpolation in time; beyond the ends of the track, straight on
   at the end speed). Time stamps are never changed.
4. *Layback.* A towed sensor follows the antenna's path: it is at the point
   of the smoothed track at ``s_a - layback``, where the antenna was when it
   had travelled ``layback`` metres less. Where that point lies before the
   start of the track (the first ``layback`` metres of a line) or beyond its
   end, the track is extrapolated straight along its first (last) course;
   the distance extrapolated is returned so that the stage can report it.
5. *Offsets.* The along (positive forward) and across (positive to
   starboard) offsets rotate with the course ``h`` (degrees clockwise from
   grid north) at that point: forward is ``(sin h, cos h)`` and starboard
   ``(cos h, -sin h)`` in (easting, northing).

References
----------
Cleveland, W. S. (1979). Robust locally weighted regression and smoothing
    scatterplots. Journal of the American Statistical Association 74(368),
    829-836.
Savitzky, A. & Golay, M. J. E. (1964). Smoothing and differentiation of
    data by simplified least squares procedures. Analytical Chemistry 36(8),
    1627-1639.
"""

from __future__ import annotations

import numpy as np

__all__ = [
    "OUT_COLUMNS",
    "seconds",
    "track_points",
    "smooth_track",
    "segment_positions",
    "block_positions",
]

#: Columns of the array returned by :func:`block_positions`.
OUT_COLUMNS = ("easting", "northing", "heading", "elevation", "extrapolated_m")

#: Fewest readings on each side of a reading in its smoothing window.
_MIN_SIDE = 2

#: Most readings on each side of a reading in its smoothing window (a
#: vessel at rest piles up readings within the window length).
_MAX_SIDE = 200

#: Readings per slice of the local fit.
_SLICE = 1 << 14


def seconds(time) -> np.ndarray:
    """Seconds since the first time of ``time`` (datetime64), float64.

    Returns an empty array for empty input. Differences of nanosecond
    integers are exact, so the float seconds keep microsecond precision for
    segments of days.
    """
    ns = np.asarray(time).astype("datetime64[ns]").astype(np.int64)
    if ns.size == 0:
        return np.zeros(0)
    return (ns - ns[0]) / 1e9


def track_points(t: np.ndarray, e: np.ndarray, n: np.ndarray) -> np.ndarray:
    """Indices of the readings that make the antenna track.

    Readings with finite time and position whose time is later than that of
    every earlier track reading (duplicate or backwards time stamps are left
    out of the track; their positions are still interpolated at their time).

    Parameters
    ----------
    t : ndarray of float
        Time, s.
    e, n : ndarray of float
        Antenna easting and northing, m.
    """
    ok = np.isfinite(t) & np.isfinite(e) & np.isfinite(n)
    idx = np.flatnonzero(ok)
    if idx.size == 0:
        return idx
    tt = t[idx]
    previous_max = np.maximum.accumulate(np.concatenate([[-np.inf], tt[:-1]]))
    return idx[tt > previous_max]


def _windows(s: np.ndarray, half_m: float) -> tuple[np.ndarray, np.ndarray]:
    """First and after-last index of the smoothing window of every point."""
    m = s.size
    i = np.arange(m)
    lo = np.searchsorted(s, s - half_m, side="left")
    hi = np.searchsorted(s, s + half_m, side="right")
    lo = np.clip(np.minimum(lo, i - _MIN_SIDE), np.maximum(i - _MAX_SIDE, 0), m)
    hi = np.clip(np.maximum(hi, i + _MIN_SIDE + 1), 0, np.minimum(i + _MAX_SIDE + 1, m))
    return lo, hi


def smooth_track(e: np.ndarray, n: np.ndarray, t: np.ndarray, window_m: float) -> dict:
    """Smooth an antenna track and take its course, distance and speed.

    Parameters
    ----------
    e, n : ndarray of float
        Antenna easting and northing of the track points, m (finite, in time
        order, relative to any origin).
    t : ndarray of float
        Their times, s, strictly increasing.
    window_m : float
        Length of the smoothing window along the track, m (0 keeps the
        smallest window of two readings on each side; at most
        ``_MAX_SIDE`` readings on each side are used, for a vessel at rest).

    Returns
    -------
    dict
        ``e``, ``n``: smoothed positions, m; ``te``, ``tn``: unit tangent
        (course) components; ``s``: along-track distance of the smoothed
        track from its first point, m; ``speed``: along-track speed, m/s.
    """
    step = np.hypot(np.diff(e), np.diff(n))
    rough = np.concatenate([[0.0], np.cumsum(step)])
    lo, hi = _windows(rough, 0.5 * window_m)
    pos_e, pos_n, tan_e, tan_n = _local_quadratic(rough, np.asarray(e, float), np.asarray(n, float), lo, hi)
    norm = np.hypot(tan_e, tan_n)
    good = np.isfinite(norm) & (norm > 0)
    safe = np.where(good, norm, 1.0)
    tan_e = _fill_nearest(np.where(good, tan_e / safe, np.nan), good)
    tan_n = _fill_nearest(np.where(good, tan_n / safe, np.nan), good)
    s = np.concatenate([[0.0], np.cumsum(np.hypot(np.diff(pos_e), np.diff(pos_n)))])
    last = np.maximum(hi - 1, lo)
    dt = t[last] - t[lo]
    with np.errstate(invalid="ignore", divide="ignore"):
        speed = np.where(dt > 0, (s[last] - s[lo]) / np.where(dt > 0, dt, 1.0), np.nan)
    return {"e": pos_e, "n": pos_n, "te": tan_e, "tn": tan_n, "s": s, "speed": speed}


def _local_quadratic(s, e, n, lo, hi):
    """Local quadratic least-squares fit of (e, n) against s in each window.

    The window of point ``i`` is ``lo[i] <= j < hi[i]``; distances are taken
    from ``s[i]`` and scaled by the largest of them, so the normal equations
    are well conditioned. The sums are accumulated one offset ``j - i`` at
    a time (no gathered matrix). Where the quadratic is singular (fewer than
    three distinct distances) a straight line is fitted, and where that is
    singular too, the window mean is kept with no tangent (NaN).

    Returns
    -------
    tuple of ndarray
        Fitted easting and northing at ``s[i]``, and the fitted first
        derivatives de/ds and dn/ds.
    """
    m = s.size
    i = np.arange(m)
    scale = np.maximum(s[np.maximum(hi - 1, i)] - s, s - s[lo])
    scale = np.where(scale > 0, scale, 1.0)
    mom = np.zeros((5, m))
    rhs = np.zeros((2, 3, m))
    # Rows in slices, so that a slice with wide windows (a vessel at rest)
    # does not widen the loop over offsets for the whole segment.
    for a in range(0, m, _SLICE):
        r = slice(a, min(a + _SLICE, m))
        ir, lr, hr, sr, scr = i[r], lo[r], hi[r], s[r], scale[r]
        for off in range(int((lr - ir).min()), int((hr - ir).max())):
            j = ir + off
            inside = (j >= lr) & (j < hr)
            jj = np.clip(j, 0, m - 1)
            x = np.where(inside, (s[jj] - sr) / scr, 0.0)
            x2 = x * x
            mom[0, r] += inside
            mom[1, r] += x
            mom[2, r] += x2
            mom[3, r] += x2 * x
            mom[4, r] += x2 * x2
            for c, y in enumerate((e, n)):
                dy = np.where(inside, y[jj] - y[r], 0.0)
                rhs[c, 0, r] += dy
                rhs[c, 1, r] += dy * x
                rhs[c, 2, r] += dy * x2
    m0, m1, m2, m3, m4 = mom
    # Quadratic: solve [[m0 m1 m2] [m1 m2 m3] [m2 m3 m4]] c = r by cofactors.
    a00 = m2 * m4 - m3 * m3
    a01 = m2 * m3 - m1 * m4
    a02 = m1 * m3 - m2 * m2
    a11 = m0 * m4 - m2 * m2
    a12 = m1 * m2 - m0 * m3
    det = m0 * a00 + m1 * a01 + m2 * a02
    quad = np.abs(det) > 1e-9 * np.maximum(m0, 1.0) ** 3
    # Straight line: [[m0 m1] [m1 m2]].
    det_l = m0 * m2 - m1 * m1
    line = ~quad & (np.abs(det_l) > 1e-9 * np.maximum(m0, 1.0) ** 2)
    out = []
    with np.errstate(invalid="ignore", divide="ignore"):
        for c, y in enumerate((e, n)):
            r0, r1, r2 = rhs[c]
            value = np.where(m0 > 0, r0 / np.maximum(m0, 1.0), 0.0)
            slope = np.full(m, np.nan)
            qv = (a00 * r0 + a01 * r1 + a02 * r2) / det
            qs = (a01 * r0 + a11 * r1 + a12 * r2) / det
            lv = (m2 * r0 - m1 * r1) / det_l
            ls = (m0 * r1 - m1 * r0) / det_l
            value = np.where(quad, qv, np.where(line, lv, value))
            slope = np.where(quad, qs, np.where(line, ls, slope))
            out.append((y + value, slope / scale))
    (pe, se), (pn, sn) = out
    return pe, pn, se, sn


def _fill_nearest(values: np.ndarray, good: np.ndarray) -> np.ndarray:
    """Replace values where ``good`` is false by the nearest good value (by index)."""
    if good.all() or not good.any():
        return values
    idx = np.flatnonzero(good)
    where = np.arange(values.size)
    pos = np.searchsorted(idx, where)
    left = idx[np.clip(pos - 1, 0, idx.size - 1)]
    right = idx[np.clip(pos, 0, idx.size - 1)]
    nearest = np.where(np.abs(where - left) <= np.abs(right - where), left, right)
    return values[nearest]


def _along(tau: np.ndarray, tt: np.ndarray, track: dict) -> np.ndarray:
    """Along-track distance of the antenna at times ``tau`` (straight on beyond the ends)."""
    s, speed = track["s"], track["speed"]
    sa = np.interp(tau, tt, s)
    v0 = speed[0] if np.isfinite(speed[0]) else 0.0
    v1 = speed[-1] if np.isfinite(speed[-1]) else 0.0
    before, after = tau < tt[0], tau > tt[-1]
    sa[before] = s[0] + v0 * (tau[before] - tt[0])
    sa[after] = s[-1] + v1 * (tau[after] - tt[-1])
    return sa


def _point_at(sq: np.ndarray, track: dict):
    """Point and unit course of the smoothed track at along-track distances ``sq``."""
    s = track["s"]
    pe = np.interp(sq, s, track["e"])
    pn = np.interp(sq, s, track["n"])
    ue = np.interp(sq, s, track["te"])
    un = np.interp(sq, s, track["tn"])
    for end, mask in ((0, sq < s[0]), (-1, sq > s[-1])):
        d = sq[mask] - s[end]
        pe[mask] = track["e"][end] + d * track["te"][end]
        pn[mask] = track["n"][end] + d * track["tn"][end]
        ue[mask] = track["te"][end]
        un[mask] = track["tn"][end]
    norm = np.hypot(ue, un)
    with np.errstate(invalid="ignore", divide="ignore"):
        ue, un = ue / norm, un / norm
    return pe, pn, ue, un


def segment_positions(
    t: np.ndarray,
    e: np.ndarray,
    n: np.ndarray,
    *,
    across_m: float = 0.0,
    along_m: float = 0.0,
    layback_m: float = 0.0,
    lag_s: float = 0.0,
    window_m: float = 10.0,
) -> dict:
    """Sensor positions of one segment from its antenna positions.

    Parameters
    ----------
    t : ndarray of float
        Time stamps, s (any origin), in acquisition order.
    e, n : ndarray of float
        Recorded antenna easting and northing, m; NaN where unknown.
    across_m, along_m : float
        Sensor offset from the towed point, m, positive to starboard and
        forward.
    layback_m : float
        Distance of the towed point behind the antenna along its track, m.
    lag_s : float
        Time lag, s: the reading stamped ``T`` was measured at ``T - lag_s``.
    window_m : float
        Smoothing window of the antenna track, m.

    Returns
    -------
    dict
        ``e``, ``n``: sensor easting and northing, m (NaN where the reading's
        own antenna position is NaN; the antenna position unchanged when the
        segment has no course: fewer than two track points, or no movement);
        ``ue``, ``un``: unit course at the sensor; ``heading``: course,
        degrees clockwise from grid north in [0, 360); ``s``: along-track
        distance of the sensor's towed point from the start of the smoothed
        track, m; ``speed``: along-track speed at the time of measurement,
        m/s; ``extrapolated_m``: distance by which the towed point lies
        beyond the ends of the track (0 inside), m.
    """
    t = np.asarray(t, dtype=float)
    e = np.asarray(e, dtype=float)
    n = np.asarray(n, dtype=float)
    size = t.size
    nan = np.full(size, np.nan)
    k = track_points(t, e, n)
    # Without a course (fewer than two track points, or a vessel that never
    # moved) the antenna position is kept as it is.
    keep = {"e": e.copy(), "n": n.copy(), "ue": nan.copy(), "un": nan.copy(), "heading": nan.copy(),
            "s": nan.copy(), "speed": nan.copy(), "extrapolated_m": np.zeros(size)}
    if k.size < 2:
        return keep
    e0, n0 = e[k[0]], n[k[0]]
    tt = t[k]
    track = smooth_track(e[k] - e0, n[k] - n0, tt, window_m)
    if not np.isfinite(track["te"]).any():
        return keep
    tau = t - lag_s
    sq = _along(tau, tt, track) - layback_m
    pe, pn, ue, un = _point_at(sq, track)
    east = e0 + pe + along_m * ue + across_m * un
    north = n0 + pn + along_m * un - across_m * ue
    own = np.isfinite(e) & np.isfinite(n)
    east[~own] = np.nan
    north[~own] = np.nan
    heading = np.mod(np.degrees(np.arctan2(ue, un)), 360.0)
    s = track["s"]
    extrapolated = np.maximum(s[0] - sq, 0.0) + np.maximum(sq - s[-1], 0.0)
    speed = np.interp(tau, tt, np.where(np.isfinite(track["speed"]), track["speed"], 0.0))
    return {"e": east, "n": north, "ue": ue, "un": un, "heading": heading, "s": sq,
            "speed": speed, "extrapolated_m": extrapolated}


def block_positions(
    time: np.ndarray,
    easting: np.ndarray,
    northing: np.ndarray,
    elevation: np.ndarray,
    starts: np.ndarray,
    across: np.ndarray,
    along: np.ndarray,
    up: np.ndarray,
    layback: np.ndarray,
    lag: np.ndarray,
    *,
    window_m: float,
) -> np.ndarray:
    """Sensor positions of one dask block of whole segments.

    Parameters
    ----------
    time : ndarray of datetime64[ns]
        Reading time stamps.
    easting, northing : ndarray of float
        Recorded antenna position, m.
    elevation : ndarray of float
        Sensor elevation, m, positive up.
    starts : ndarray of int
        Start of each segment of the block, relative to the block (first 0).
    across, along, up, layback, lag : ndarray of float
        Per segment of the block: offsets (m), layback (m), time lag (s).
    window_m : float
        Smoothing window of the antenna track, m.

    Returns
    -------
    ndarray of float64, shape (readings, 5)
        Columns :data:`OUT_COLUMNS`: sensor easting and northing (m), course
        (degrees), elevation plus the vertical offset (m), and the distance
        extrapolated beyond the track ends (m).
    """
    size = np.asarray(easting).size
    out = np.full((size, len(OUT_COLUMNS)), np.nan)
    starts = np.asarray(starts, dtype=np.int64)
    if size == 0:
        return out
    if starts.size == 0 or starts[0] != 0:
        raise ValueError("positions: a dask block does not start on a segment start")
    stops = np.append(starts[1:], size)
    ns = np.asarray(time).astype("datetime64[ns]").astype(np.int64)
    e = np.asarray(easting, dtype=float)
    n = np.asarray(northing, dtype=float)
    z = np.asarray(elevation, dtype=float)
    for i, (a, b) in enumerate(zip(starts, stops)):
        t = (ns[a:b] - ns[a]) / 1e9
        p = segment_positions(
            t, e[a:b], n[a:b], across_m=float(across[i]), along_m=float(along[i]),
            layback_m=float(layback[i]), lag_s=float(lag[i]), window_m=window_m,
        )
        out[a:b, 0] = p["e"]
        out[a:b, 1] = p["n"]
        out[a:b, 2] = p["heading"]
        out[a:b, 3] = z[a:b] + float(up[i])
        out[a:b, 4] = p["extrapolated_m"]
    return out
