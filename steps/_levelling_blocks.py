"""Block plumbing and along-track work of the levelling stage.

Readings are dask arrays whose chunks fall on segment boundaries (one line
of one sensor). The functions here work on one such block at a time:

* :func:`block_tracks` measures each segment (time span, accepted
  readings, median spacing, median level) and decimates its track to a
  polyline of about one vertex per ``step_m`` metres, for the crossover
  search;
* :func:`block_values_at` evaluates a field at given along-track positions
  of given segments (a local straight-line fit in along-track distance);
* :func:`block_polynomial` evaluates per-segment polynomials in time.

Along-track distance ``s`` of a segment is the cumulative straight-line
distance between its *accepted* readings (finite position, time and field,
and no excluded flag), in storage (time) order; a step longer than
``max_gap_m`` splits the track into pieces, and nothing is interpolated
across such a gap.
"""

from __future__ import annotations

import dask
import dask.array as da
import numpy as np
import xarray as xr

from ._blocks import block_of_segment, segment_ids

__all__ = [
    "block_bounds",
    "per_block",
    "accepted_mask",
    "along_track",
    "block_tracks",
    "block_values_at",
    "block_polynomial",
    "compute_tracks",
    "values_at",
    "map_segment_blocks",
    "normalised_time",
    "TRACK_FIELDS",
]

#: Per-segment figures returned by :func:`block_tracks`, in this order.
TRACK_FIELDS = ("t_first_s", "t_last_s", "accepted", "spacing_m", "median_nT", "length_m")


# --------------------------------------------------------------------------
# Dask plumbing
# --------------------------------------------------------------------------


def block_bounds(chunks: tuple) -> np.ndarray:
    """Reading index of the start of each block, and the end (length blocks + 1)."""
    return np.cumsum((0,) + tuple(int(c) for c in chunks[0]))


def per_block(segments: xr.Dataset, chunks: tuple) -> list[np.ndarray]:
    """Global segment numbers held by each block."""
    block = block_of_segment(segments, chunks)
    return [np.flatnonzero(block == b) for b in range(len(chunks[0]))]


def accepted_mask(easting, northing, time_ns, values, flags, exclude: int) -> np.ndarray:
    """Readings usable for levelling: finite position, time and value, no excluded flag."""
    ok = np.isfinite(easting) & np.isfinite(northing) & np.isfinite(values)
    ok &= time_ns != np.iinfo(np.int64).min  # NaT
    ok &= (np.asarray(flags, dtype=np.uint32) & np.uint32(exclude)) == 0
    return ok


def along_track(easting: np.ndarray, northing: np.ndarray, max_gap_m: float) -> tuple[np.ndarray, np.ndarray]:
    """Along-track distance and piece number of consecutive readings.

    Parameters
    ----------
    easting, northing : ndarray of float
        Positions of the accepted readings of one segment, m, in order.
    max_gap_m : float
        A step longer than this starts a new piece, m.

    Returns
    -------
    s : ndarray of float
        Cumulative distance from the first reading, m.
    piece : ndarray of int
        Piece number of each reading (0, 1, ...).
    """
    if easting.size == 0:
        return np.zeros(0), np.zeros(0, dtype=np.int64)
    step = np.hypot(np.diff(easting), np.diff(northing))
    s = np.concatenate([[0.0], np.cumsum(step)])
    piece = np.concatenate([[0], np.cumsum(step > max_gap_m)]).astype(np.int64)
    return s, piece


def _time_ns(time) -> np.ndarray:
    return np.asarray(time).astype("datetime64[ns]").astype(np.int64)


# --------------------------------------------------------------------------
# Pass 1: segment figures and decimated tracks
# --------------------------------------------------------------------------


def block_tracks(
    easting, northing, time, values, flags, starts, *, t_ref_ns: int, exclude: int, step_m: float, max_gap_m: float
) -> dict:
    """Segment figures and decimated tracks of one block of whole segments.

    Parameters
    ----------
    easting, northing : ndarray of float
        Positions, m.
    time : ndarray of datetime64[ns]
        Reading times.
    values : ndarray of float
        The field levelled (the residual), nT.
    flags : ndarray of uint32
        Quality flags.
    starts : ndarray of int
        Start of each segment of the block, relative to the block.
    t_ref_ns : int
        Reference time (ns since the epoch); times are returned in seconds
        from it.
    exclude : int
        Bit mask of the flags that leave a reading out.
    step_m : float
        Wanted vertex spacing of the decimated track, m.
    max_gap_m : float
        Largest step between accepted readings bridged by the track, m.

    Returns
    -------
    dict
        ``"figures"``: array (segments, len(TRACK_FIELDS)) with first and
        last reading time (s from ``t_ref_ns``, all readings with a time),
        number of accepted readings, median step between them (m), their
        median value (nT) and the track length (m), NaN where not defined.
        ``"vertices"``: array (vertices, 5) of segment number within the
        block, piece, easting, northing and along-track distance (m).
    """
    e = np.asarray(easting, dtype=np.float64)
    n = np.asarray(northing, dtype=np.float64)
    v = np.asarray(values, dtype=np.float64)
    t = _time_ns(time)
    starts = np.asarray(starts, dtype=np.int64)
    bounds = np.append(starts, e.size)
    ok = accepted_mask(e, n, t, v, flags, exclude)
    figures = np.full((starts.size, len(TRACK_FIELDS)), np.nan)
    vertices = []
    nat = np.iinfo(np.int64).min
    for k in range(starts.size):
        lo, hi = bounds[k], bounds[k + 1]
        tk = t[lo:hi]
        tk = tk[tk != nat]
        if tk.size:
            figures[k, 0] = (tk.min() - t_ref_ns) / 1e9
            figures[k, 1] = (tk.max() - t_ref_ns) / 1e9
        keep = np.flatnonzero(ok[lo:hi]) + lo
        figures[k, 2] = keep.size
        if keep.size == 0:
            continue
        s, piece = along_track(e[keep], n[keep], max_gap_m)
        if keep.size > 1:
            figures[k, 3] = float(np.median(np.diff(s)))
        figures[k, 4] = float(np.median(v[keep]))
        figures[k, 5] = float(s[-1])
        cell = np.floor(s / step_m)
        first = np.ones(keep.size, dtype=bool)
        first[1:] = (cell[1:] != cell[:-1]) | (piece[1:] != piece[:-1])
        last = np.ones(keep.size, dtype=bool)
        last[:-1] = piece[1:] != piece[:-1]
        pick = np.flatnonzero(first | last)
        vertices.append(
            np.column_stack([np.full(pick.size, k, dtype=float), piece[pick], e[keep][pick], n[keep][pick], s[pick]])
        )
    verts = np.concatenate(vertices) if vertices else np.zeros((0, 5))
    return {"figures": figures, "vertices": verts}


def compute_tracks(arrays: dict, segments: xr.Dataset, chunks: tuple, **kwargs) -> tuple[np.ndarray, np.ndarray]:
    """Run :func:`block_tracks` on every block (dask, block by block).

    Parameters
    ----------
    arrays : dict
        Dask arrays ``easting``, ``northing``, ``time``, ``values``, ``flags``
        with the chunks ``chunks``.
    segments : xarray.Dataset
        The segments table.
    **kwargs
        Passed to :func:`block_tracks`.

    Returns
    -------
    figures : ndarray
        (segments, len(TRACK_FIELDS)) in global segment order.
    vertices : ndarray
        (vertices, 5) with the *global* segment number in column 0.
    """
    bounds = block_bounds(chunks)
    held = per_block(segments, chunks)
    starts = np.asarray(segments["start"].values, dtype=np.int64)
    names = ("easting", "northing", "time", "values", "flags")
    blocks = {name: arrays[name].to_delayed().ravel() for name in names}
    tasks = []
    for b, segs in enumerate(held):
        rel = starts[segs] - bounds[b]
        tasks.append(dask.delayed(block_tracks)(*(blocks[name][b] for name in names), rel, **kwargs))
    results = dask.compute(*tasks)
    figures = np.full((starts.size, len(TRACK_FIELDS)), np.nan)
    verts = []
    for segs, res in zip(held, results):
        if segs.size:
            figures[segs] = res["figures"]
        vv = res["vertices"]
        if vv.size:
            vv = vv.copy()
            vv[:, 0] = segs[vv[:, 0].astype(np.int64)]
            verts.append(vv)
    return figures, (np.concatenate(verts) if verts else np.zeros((0, 5)))


# --------------------------------------------------------------------------
# Pass 2: values at along-track positions
# --------------------------------------------------------------------------


def block_values_at(
    easting,
    northing,
    time,
    values,
    flags,
    starts,
    request_seg,
    request_s,
    *,
    t_ref_ns: int,
    exclude: int,
    window_m: float,
    max_gap_m: float,
) -> np.ndarray:
    """A field at given along-track positions of the segments of one block.

    The value at ``s`` is that of the straight line fitted by least squares
    to the accepted readings within ``window_m / 2`` of ``s`` along the
    track, when at least three of them lie there with some on each side;
    otherwise the linear interpolation between the two accepted readings
    that bracket ``s``. The position is invalid (NaN) when no reading lies on
    one side, or when the bracketing readings are more than ``max_gap_m``
    apart.

    Parameters
    ----------
    easting, northing, time, values, flags, starts
        As for :func:`block_tracks`.
    request_seg : ndarray of int
        Segment number within the block of each requested position.
    request_s : ndarray of float
        Along-track distance of each requested position, m (as measured by
        :func:`block_tracks` with the same ``exclude`` and ``max_gap_m``).
    t_ref_ns, exclude, max_gap_m
        As for :func:`block_tracks`.
    window_m : float
        Length of the local fit, m (0: interpolation between neighbours).

    Returns
    -------
    ndarray of float, shape (requests, 4)
        Value (nT), time (s from ``t_ref_ns``, interpolated), along-track
        gradient (nT/m) and number of readings used.
    """
    e = np.asarray(easting, dtype=np.float64)
    n = np.asarray(northing, dtype=np.float64)
    v = np.asarray(values, dtype=np.float64)
    t = _time_ns(time)
    starts = np.asarray(starts, dtype=np.int64)
    bounds = np.append(starts, e.size)
    request_seg = np.asarray(request_seg, dtype=np.int64)
    request_s = np.asarray(request_s, dtype=np.float64)
    out = np.full((request_seg.size, 4), np.nan)
    ok = accepted_mask(e, n, t, v, flags, exclude)
    half = 0.5 * window_m
    for k in np.unique(request_seg):
        lo, hi = bounds[k], bounds[k + 1]
        keep = np.flatnonzero(ok[lo:hi]) + lo
        if keep.size < 2:
            continue
        s, piece = along_track(e[keep], n[keep], max_gap_m)
        vk = v[keep]
        tk = (t[keep] - t_ref_ns) / 1e9
        for r in np.flatnonzero(request_seg == k):
            sx = request_s[r]
            j = min(int(np.searchsorted(s, sx, side="right")) - 1, s.size - 2)
            if j < 0 or sx > s[-1] or piece[j] != piece[j + 1]:
                continue
            gap = s[j + 1] - s[j]
            if gap <= 0:
                continue
            w = (sx - s[j]) / gap
            out[r, 1] = tk[j] + w * (tk[j + 1] - tk[j])
            # The fit window, kept inside the piece of the bracketing readings.
            p_lo = int(np.searchsorted(piece, piece[j], side="left"))
            p_hi = int(np.searchsorted(piece, piece[j], side="right"))
            a = max(int(np.searchsorted(s, sx - half, side="left")), p_lo)
            b = min(int(np.searchsorted(s, sx + half, side="right")), p_hi)
            if b - a >= 3 and a <= j and b > j + 1:
                x = s[a:b] - sx
                y = vk[a:b]
                xm = x.mean()
                sxx = np.sum((x - xm) ** 2)
                slope = np.sum((x - xm) * (y - y.mean())) / sxx
                out[r, 0] = y.mean() - slope * xm
                out[r, 2] = slope
                out[r, 3] = b - a
            else:
                out[r, 0] = vk[j] + w * (vk[j + 1] - vk[j])
                out[r, 2] = (vk[j + 1] - vk[j]) / gap
                out[r, 3] = 2
    return out


def values_at(
    arrays: dict, segments: xr.Dataset, chunks: tuple, seg: np.ndarray, s: np.ndarray, **kwargs
) -> np.ndarray:
    """Run :func:`block_values_at` over the blocks holding the requested segments.

    Parameters
    ----------
    arrays, segments, chunks
        As for :func:`compute_tracks`.
    seg : ndarray of int
        Global segment number of each requested position.
    s : ndarray of float
        Along-track distance of each requested position, m.
    **kwargs
        Passed to :func:`block_values_at`.

    Returns
    -------
    ndarray, shape (requests, 4)
        As :func:`block_values_at`, in the order of the requests.
    """
    seg = np.asarray(seg, dtype=np.int64)
    s = np.asarray(s, dtype=np.float64)
    out = np.full((seg.size, 4), np.nan)
    if seg.size == 0:
        return out
    bounds = block_bounds(chunks)
    held = per_block(segments, chunks)
    starts = np.asarray(segments["start"].values, dtype=np.int64)
    names = ("easting", "northing", "time", "values", "flags")
    blocks = {name: arrays[name].to_delayed().ravel() for name in names}
    block_of = np.empty(starts.size, dtype=np.int64)
    local_of = np.empty(starts.size, dtype=np.int64)
    for b, segs in enumerate(held):
        block_of[segs] = b
        local_of[segs] = np.arange(segs.size)
    tasks, where = [], []
    for b in np.unique(block_of[seg]):
        pick = np.flatnonzero(block_of[seg] == b)
        rel = starts[held[b]] - bounds[b]
        tasks.append(
            dask.delayed(block_values_at)(
                *(blocks[name][b] for name in names), rel, local_of[seg[pick]], s[pick], **kwargs
            )
        )
        where.append(pick)
    for pick, res in zip(where, dask.compute(*tasks)):
        out[pick] = res
    return out


# --------------------------------------------------------------------------
# Per-segment polynomials in time
# --------------------------------------------------------------------------


def block_polynomial(time, starts, coefficients, t_first_s, t_last_s, *, t_ref_ns: int) -> np.ndarray:
    """Evaluate one polynomial in normalised time per segment of a block.

    Parameters
    ----------
    time : ndarray of datetime64[ns]
        Reading times of the block.
    starts : ndarray of int
        Segment starts relative to the block.
    coefficients : ndarray of float, shape (segments, order + 1)
        Coefficients of ``tau**0, tau**1, ...`` per segment, nT, where
        ``tau = 2 (t - t_first) / (t_last - t_first) - 1`` runs from -1 to 1
        over the segment (0 when the segment has one time only).
    t_first_s, t_last_s : ndarray of float
        Time span of each segment, s from ``t_ref_ns``.
    t_ref_ns : int
        Reference time, ns since the epoch.

    Returns
    -------
    ndarray of float
        The polynomial of its segment at every reading, nT (NaN where the
        time is missing).
    """
    t = _time_ns(time)
    starts = np.asarray(starts, dtype=np.int64)
    seg = segment_ids(starts, t.size, stage="levelling")
    coefficients = np.asarray(coefficients, dtype=np.float64).reshape(starts.size, -1)
    ts = (t - t_ref_ns) / 1e9
    ts[t == np.iinfo(np.int64).min] = np.nan
    tau = normalised_time(ts, np.asarray(t_first_s)[seg], np.asarray(t_last_s)[seg])
    out = np.zeros(t.size)
    power = np.ones(t.size)
    for j in range(coefficients.shape[1]):
        out += coefficients[seg, j] * power
        power = power * tau
    return out


def normalised_time(t_s, t_first_s, t_last_s) -> np.ndarray:
    """``2 (t - t_first) / (t_last - t_first) - 1``, 0 where the span is zero or unknown."""
    t_s = np.asarray(t_s, dtype=np.float64)
    span = np.asarray(t_last_s, dtype=np.float64) - np.asarray(t_first_s, dtype=np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        tau = np.where(span > 0, 2.0 * (t_s - t_first_s) / span - 1.0, 0.0)
    return np.where(np.isfinite(t_s), tau, np.nan)


def map_segment_blocks(
    func,
    arrays: list,
    segments: xr.Dataset,
    chunks: tuple,
    per_segment: list,
    *,
    dtype,
    extra_shape: tuple = (),
    **kwargs,
) -> da.Array:
    """Apply ``func`` block by block, with the per-segment values of the block's segments.

    ``func(*blocks, starts, *segment_values, **kwargs)`` gets the numpy block
    of each array of ``arrays``, the segment starts relative to the block and
    the rows of each array of ``per_segment`` that belong to the block's
    segments, and returns an array of the block's length (times
    ``extra_shape``).

    Returns
    -------
    dask.array.Array
        Along ``reading`` with the chunks ``chunks`` (and ``extra_shape``).
    """
    bounds = block_bounds(chunks)
    held = per_block(segments, chunks)
    starts = np.asarray(segments["start"].values, dtype=np.int64)
    blocks = [a.to_delayed().ravel() for a in arrays]
    parts = []
    for b, segs in enumerate(held):
        task = dask.delayed(func)(
            *(blk[b] for blk in blocks),
            starts[segs] - bounds[b],
            *(np.asarray(v)[segs] for v in per_segment),
            **kwargs,
        )
        parts.append(da.from_delayed(task, shape=(int(chunks[0][b]),) + tuple(extra_shape), dtype=dtype))
    if not parts:
        return da.zeros((0,) + tuple(extra_shape), dtype=dtype)
    return da.concatenate(parts, axis=0)
