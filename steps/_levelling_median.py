"""Along-line running median and equalisation of sensor levels.

Running median
    The running median of a series over a window of ``2h + 1`` samples
    (Tukey 1977) follows any monotone trend exactly and a smooth regional
    field closely, but it ignores a compact anomaly that fills less than
    half of the window, so subtracting it removes geology and slow residual
    drift while keeping compact anomalies (the moving-median regional of
    small-target work; Mauring et al. 2002 use moving medians for
    levelling). Per segment, on the accepted readings only, in storage
    order: the window of ``window_m`` metres becomes an odd number of
    readings from the segment's median reading spacing (readings are close
    to evenly spaced along a line), and :func:`scipy.ndimage.median_filter`
    is run with ``mode="nearest"``: the window is padded at each end with
    the end reading, so that a linear trend is followed up to the last
    reading (the median of the padded window of a monotone series is its
    centre value), at the price of a bias near the ends when an anomaly
    sits within half a window of the end. Those readings get the ``edge``
    flag. A segment is cut into pieces at gaps longer than half the window
    between accepted readings, each filtered on its own. Readings left out
    (flagged or without a value) get the median interpolated from their
    neighbours by reading number, so every reading has a correction and
    none biases it.

    Limits: next to a compact anomaly on a regional gradient ``g`` (nT/m)
    the readings on the anomaly displace the median by up to about
    ``g * w / 2`` for an anomaly ``w`` metres wide (the median moves by half
    the number of readings it ignores along the trend), so the flanks of
    an anomaly can be shifted by that much (0.6 nT for 6 m on 0.2 nT/m);
    its peak, in the middle of a symmetric window, is barely moved. An
    anomaly wider than about half the window is partly taken as regional.

Equalisation
    Each sensor's level difference from the array: for every line, the
    median of each sensor's accepted readings less the median of those
    medians over the sensors of the line; the sensor's level is the median
    of its differences over all lines, less the mean of the sensors'
    levels (so the array keeps its mean level). On alternating line directions a
    cross-track regional gradient enters these differences with alternating
    sign and largely cancels. (Common practice, no published source.)

References
----------
Mauring, E., Beard, L. P., Kihle, O. & Smethurst, M. A. (2002). A
    comparison of aeromagnetic levelling techniques with an introduction to
    median levelling. Geophysical Prospecting 50, 43-54. (From memory.)
Tukey, J. W. (1977). Exploratory Data Analysis. Addison-Wesley: running
    medians. (From memory.)
"""

from __future__ import annotations

import numpy as np
from scipy.ndimage import median_filter

from ._levelling_blocks import accepted_mask, along_track

__all__ = ["window_samples", "running_median", "block_median", "sensor_levels"]


def window_samples(window_m: float, spacing_m: float, available: int) -> int:
    """Odd number of readings spanning about ``window_m`` at ``spacing_m``, at most ``available``.

    Returns at least 1 (no filtering when the spacing is unknown).
    """
    if not np.isfinite(spacing_m) or spacing_m <= 0 or available < 1:
        return 1
    half = int(np.floor(0.5 * window_m / spacing_m))
    n = 2 * half + 1
    if n > available:
        n = available if available % 2 else available - 1
    return max(1, n)


def running_median(values: np.ndarray, size: int) -> np.ndarray:
    """Running median of ``size`` readings (odd), the ends padded with the end values."""
    values = np.asarray(values, dtype=np.float64)
    if size <= 1 or values.size == 0:
        return values.copy()
    return median_filter(values, size=size, mode="nearest")


def block_median(easting, northing, time, values, flags, starts, *, exclude: int, window_m: float) -> np.ndarray:
    """Running-median correction and edge mask of one block of whole segments.

    Parameters
    ----------
    easting, northing : ndarray of float
        Positions, m.
    time : ndarray of datetime64[ns]
        Reading times.
    values : ndarray of float
        The field filtered (the residual), nT.
    flags : ndarray of uint32
        Quality flags.
    starts : ndarray of int
        Segment starts relative to the block.
    exclude : int
        Bit mask of the flags that leave a reading out.
    window_m : float
        Length of the median window, m.

    Returns
    -------
    ndarray of float, shape (readings, 2)
        Column 0: the running median to subtract, nT (NaN for a segment
        without any accepted reading). Column 1: 1.0 where the reading lies
        within half a window of the end of its piece, else 0.0.
    """
    e = np.asarray(easting, dtype=np.float64)
    n = np.asarray(northing, dtype=np.float64)
    v = np.asarray(values, dtype=np.float64)
    t = np.asarray(time).astype("datetime64[ns]").astype(np.int64)
    starts = np.asarray(starts, dtype=np.int64)
    bounds = np.append(starts, e.size)
    ok = accepted_mask(e, n, t, v, flags, exclude)
    out = np.zeros((e.size, 2))
    half = 0.5 * window_m
    for k in range(starts.size):
        lo, hi = bounds[k], bounds[k + 1]
        keep = np.flatnonzero(ok[lo:hi])
        if keep.size == 0:
            out[lo:hi, 0] = np.nan
            continue
        s, piece = along_track(e[lo:hi][keep], n[lo:hi][keep], max_gap_m=half)
        med = np.empty(keep.size)
        edge = np.zeros(keep.size, dtype=bool)
        spacing = float(np.median(np.diff(s))) if keep.size > 1 else np.nan
        for p in np.unique(piece):
            sel = np.flatnonzero(piece == p)
            size = window_samples(window_m, spacing, sel.size)
            med[sel] = running_median(v[lo:hi][keep[sel]], size)
            sp = s[sel]
            edge[sel] = (sp - sp[0] < half) | (sp[-1] - sp < half)
        index = np.arange(hi - lo)
        out[lo:hi, 0] = np.interp(index, keep, med)
        # A reading left out takes the edge state of its nearest accepted neighbour.
        nearest = np.clip(np.searchsorted(keep, index), 0, keep.size - 1)
        prev = np.clip(nearest - 1, 0, keep.size - 1)
        closer = np.abs(keep[prev] - index) < np.abs(keep[nearest] - index)
        out[lo:hi, 1] = edge[np.where(closer, prev, nearest)]
    return out


def sensor_levels(
    median_nT: np.ndarray, line_index: np.ndarray, sensor_index: np.ndarray, n_sensors: int
) -> tuple[np.ndarray, np.ndarray]:
    """Level of each sensor relative to the array, from per-segment medians.

    Parameters
    ----------
    median_nT : ndarray of float
        Median of the accepted readings of each segment, nT (NaN: none).
    line_index, sensor_index : ndarray of int
        Line and sensor of each segment.
    n_sensors : int
        Number of sensors.

    Returns
    -------
    level : ndarray of float
        Per sensor, the median over lines of (segment median - median of
        the line's segment medians), less the mean of these over the
        sensors, nT; 0 where no line has that sensor together with another.
    lines : ndarray of int
        Per sensor, the number of lines the level is taken over.
    """
    median_nT = np.asarray(median_nT, dtype=np.float64)
    line_index = np.asarray(line_index, dtype=np.int64)
    sensor_index = np.asarray(sensor_index, dtype=np.int64)
    diffs: list[list[float]] = [[] for _ in range(n_sensors)]
    for line in np.unique(line_index):
        pick = np.flatnonzero((line_index == line) & np.isfinite(median_nT))
        if pick.size < 2:
            continue
        centre = np.median(median_nT[pick])
        for i in pick:
            diffs[sensor_index[i]].append(median_nT[i] - centre)
    level = np.array([np.median(x) if x else 0.0 for x in diffs])
    lines = np.array([len(x) for x in diffs], dtype=np.int64)
    if (lines > 0).any():
        # Relative to the mean level of the array, so the survey keeps its mean level.
        level[lines > 0] -= level[lines > 0].mean()
    return level, lines
