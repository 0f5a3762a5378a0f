"""Robust levels of short along-track bins (helper of the heading stage).

Each segment (one line of one sensor) is cut into bins of ``bin_m`` metres
of along-track distance (the cumulative distance between consecutive
positions of the segment, from its first reading). Each bin gives one row:
its level (the median, or the mean, of the residual field of its usable
readings), the mean cosine and sine of their course, their mean position
and mean time, and how many readings it holds. This is a decimated track:
small enough to load, and the median of a bin is not moved by a spike or
by a compact anomaly that covers fewer than half of its readings.

The block function works on one dask block of whole segments, so the bins
are the same however the readings are chunked.
"""

from __future__ import annotations

import numpy as np

__all__ = ["BIN_COLUMNS", "block_bins", "group_median"]

#: Columns of the array returned by :func:`block_bins`.
BIN_COLUMNS = ("segment", "value", "cos", "sin", "easting", "northing", "time_s", "count")


def group_median(key: np.ndarray, value: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Median of ``value`` within each group of equal ``key``.

    Parameters
    ----------
    key : ndarray of int
        Group of each value.
    value : ndarray of float
        Values (finite).

    Returns
    -------
    keys, medians, counts : ndarray
        Sorted distinct keys, the median of each group (the mean of the two
        middle values for an even count) and the group sizes.
    """
    order = np.lexsort((value, key))
    k, v = key[order], value[order]
    if k.size == 0:
        return k, v.astype(np.float64), np.zeros(0, dtype=np.int64)
    first = np.flatnonzero(np.r_[True, k[1:] != k[:-1]])
    counts = np.diff(np.r_[first, k.size])
    lo = first + (counts - 1) // 2
    hi = first + counts // 2
    return k[first], 0.5 * (v[lo] + v[hi]), counts


def block_bins(
    residual: np.ndarray,
    heading_deg: np.ndarray,
    easting: np.ndarray,
    northing: np.ndarray,
    time: np.ndarray,
    flags: np.ndarray,
    starts: np.ndarray,
    segment_ids: np.ndarray,
    *,
    bin_m: float,
    min_count: int,
    exclude: int,
    statistic: str,
    t_ref_ns: int,
) -> np.ndarray:
    """Bin levels of one block of whole segments.

    Parameters
    ----------
    residual : ndarray of float
        Residual field, nT.
    heading_deg : ndarray of float
        Course over ground, degrees clockwise from grid north.
    easting, northing : ndarray of float
        Sensor position, m.
    time : ndarray of datetime64[ns]
        Reading times.
    flags : ndarray of uint32
        Quality flags; readings with any bit of ``exclude`` are left out.
    starts : ndarray of int
        Start of each segment of the block, relative to the block (first 0).
    segment_ids : ndarray of int
        Index of each of these segments in the survey's segments table.
    bin_m : float
        Bin length along track, m.
    min_count : int
        Bins with fewer usable readings are dropped.
    exclude : int
        Bit mask of the flags that make a reading unusable.
    statistic : {"median", "mean"}
        Level of a bin.
    t_ref_ns : int
        Reference time (ns since 1970) of ``time_s``.

    Returns
    -------
    ndarray of float64, shape (bins, len(BIN_COLUMNS))
        One row per bin, in storage order (see :data:`BIN_COLUMNS`); the
        ``segment`` column holds ``segment_ids`` values, ``time_s`` is
        seconds after ``t_ref_ns``.
    """
    y = np.asarray(residual, dtype=np.float64)
    n = y.size
    starts = np.asarray(starts, dtype=np.int64)
    if n == 0 or starts.size == 0:
        return np.zeros((0, len(BIN_COLUMNS)))
    if starts[0] != 0:
        raise ValueError("heading: a dask block does not start on a segment start")
    seg = np.repeat(np.arange(starts.size), np.diff(np.r_[starts, n]))
    e = np.asarray(easting, dtype=np.float64)
    north = np.asarray(northing, dtype=np.float64)
    h = np.asarray(heading_deg, dtype=np.float64)
    t = (np.asarray(time).astype("datetime64[ns]").astype(np.int64) - np.int64(t_ref_ns)) / 1e9

    step = np.zeros(n)
    step[1:] = np.hypot(np.diff(e), np.diff(north))
    step[starts] = 0.0
    step[~np.isfinite(step)] = 0.0
    # Summed segment by segment, so that the rounding (and so a reading that
    # falls on a bin edge) does not depend on what else is in the block.
    along = np.empty(n)
    for a, b in zip(starts, np.r_[starts[1:], n]):
        along[a:b] = np.cumsum(step[a:b])
    bin_no = np.floor(along / bin_m).astype(np.int64)

    ok = np.isfinite(y) & np.isfinite(h) & np.isfinite(e) & np.isfinite(north)
    ok &= (np.asarray(flags, dtype=np.uint32) & np.uint32(exclude)) == 0
    where = np.flatnonzero(ok)
    if where.size == 0:
        return np.zeros((0, len(BIN_COLUMNS)))
    width = int(bin_no[where].max()) + 1
    key = seg[where] * width + bin_no[where]
    if statistic == "median":
        keys, level, counts = group_median(key, y[where])
    else:
        keys, inverse, counts = np.unique(key, return_inverse=True, return_counts=True)
        level = np.bincount(inverse, weights=y[where]) / counts
    group = np.searchsorted(keys, key)

    def mean(values):
        return np.bincount(group, weights=values, minlength=keys.size) / counts

    rad = np.radians(h[where])
    table = np.column_stack(
        [
            np.asarray(segment_ids, dtype=np.float64)[keys // width],
            level,
            mean(np.cos(rad)),
            mean(np.sin(rad)),
            mean(e[where]),
            mean(north[where]),
            mean(t[where]),
            counts.astype(np.float64),
        ]
    )
    return table[counts >= min_count]
