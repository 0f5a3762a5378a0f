"""Two-pass line gridding of one tile: along each track, then across tracks.

Survey readings lie on tracks (one line of one sensor) sampled densely
along and sparsely across. For one tile of grid nodes this module

1. rotates positions into a frame whose first axis ``a`` runs along the
   survey lines (the survey's dominant direction, given) and whose second
   axis ``c`` runs across them;
2. cuts the readings into *runs*: consecutive readings of one track whose
   steps all point within 45 degrees of the frame's ``a`` axis (either way),
   keep one sign of ``a`` and are no longer than ``max_gap_m``. Every run is
   a function ``c(a)`` and ``value(a)``;
3. for every run and every node whose ``a`` lies inside the run and whose
   ``c`` is within ``reach_m`` of it, interpolates linearly in ``a`` the
   run's across position and value at the node's ``a`` (along-track linear
   interpolation; samples are 0.2 m apart on the demo, well under the
   width of any anomaly);
4. across the tracks, interpolates the values of the two nearest runs on
   each side of the node, as a function of their across-track offset, with
   a piecewise cubic Hermite on the interval bracketing the node. The
   derivatives at the two inner points are, with ``across = "bessel"``, the
   slope of the parabola through three neighbouring points (Bessel's
   derivative, de Boor 1978, *A Practical Guide to Splines*, ch. IV), and
   with ``across = "pchip"`` the weighted harmonic mean of the adjacent
   slopes, zero at a local extremum, which never overshoots the data
   (Fritsch & Carlson 1980, *Monotone piecewise cubic interpolation*, SIAM
   J. Numer. Anal. 17; the weights of Fritsch & Butland 1984, as in
   ``scipy.interpolate.PchipInterpolator``). With one point on a side only
   the derivative there is the slope of the bracketing interval; with no
   point on one side the nearest run's value is taken (the blanking limits
   how far).

Runs whose steps cross the survey lines (tie lines) are gridded by the same
two passes in the frame turned by 90 degrees, and fill only the nodes that
the survey lines left empty.

Each node's value depends only on readings within ``reach_m + max_gap_m`` of
it, so gridding tiles with a halo at least that wide gives the same numbers
as gridding the whole area at once. The scheme itself (interpolate along
lines, then across) is common practice for line data, no published source;
the interpolants are the published ones above.
"""

from __future__ import annotations

import numpy as np

COS45 = np.sqrt(0.5)


def runs(a: np.ndarray, c: np.ndarray, track: np.ndarray, aligned: np.ndarray, max_gap_m: float):
    """Runs of the readings (see the module docstring), as reading index ranges.

    Parameters
    ----------
    a, c : ndarray of float
        Along and across coordinates in the frame, m, in storage order.
    track : ndarray of int
        Track (segment) identifier of each reading.
    aligned : ndarray of bool
        For each step between consecutive readings, whether it points within
        45 degrees of the frame's ``a`` axis (length ``len(a) - 1``).
    max_gap_m : float
        Longest step kept inside a run, m.

    Returns
    -------
    starts, stops : ndarray of int
        First reading and one past the last of each run (two runs meeting
        at a turn share the reading there).
    """
    if a.size < 2:
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    da = np.diff(a)
    step = np.hypot(da, np.diff(c))
    link = (track[1:] == track[:-1]) & aligned & (step <= max_gap_m) & (da != 0)
    sign = np.sign(da)
    first = link.copy()
    first[1:] &= ~(link[:-1] & (sign[1:] == sign[:-1]))
    last = link.copy()
    last[:-1] &= ~(link[1:] & (sign[1:] == sign[:-1]))
    starts = np.flatnonzero(first)
    stops = np.flatnonzero(last) + 2
    return starts, stops


def _along_pass(a, c, values, starts, stops, node_a, node_c, reach_m):
    """Step 3: (node, offset, values) of every run near every node."""
    order_c = np.argsort(node_c, kind="stable")
    sorted_c = node_c[order_c]
    nodes_out, off_out, val_out = [], [], []
    for s, e in zip(starts, stops):
        ta, tc, tv = a[s:e], c[s:e], values[s:e]
        if ta[-1] < ta[0]:
            ta, tc, tv = ta[::-1], tc[::-1], tv[::-1]
        lo = np.searchsorted(sorted_c, tc.min() - reach_m, side="left")
        hi = np.searchsorted(sorted_c, tc.max() + reach_m, side="right")
        if hi <= lo:
            continue
        cand = order_c[lo:hi]
        na = node_a[cand]
        inside = (na >= ta[0]) & (na <= ta[-1])
        if not inside.any():
            continue
        cand, na = cand[inside], na[inside]
        off = np.interp(na, ta, tc) - node_c[cand]
        near = np.abs(off) <= reach_m
        if not near.any():
            continue
        cand, na, off = cand[near], na[near], off[near]
        vals = np.empty((cand.size, tv.shape[1]))
        for k in range(tv.shape[1]):
            vals[:, k] = np.interp(na, ta, tv[:, k])
        nodes_out.append(cand)
        off_out.append(off)
        val_out.append(vals)
    if not nodes_out:
        return np.zeros(0, np.int64), np.zeros(0), np.zeros((0, values.shape[1]))
    return np.concatenate(nodes_out), np.concatenate(off_out), np.concatenate(val_out)


def _across_pass(node, off, vals, n_nodes, reach_m, min_sep_m, across):
    """Step 4: cubic Hermite across the runs bracketing each node (NaN where none)."""
    k = vals.shape[1]
    out = np.full((n_nodes, k), np.nan)
    if node.size == 0:
        return out
    width = 4.0 * reach_m + 1.0
    key = node.astype(np.float64) * width + off
    order = np.argsort(key, kind="stable")
    key, node, off, vals = key[order], node[order], off[order], vals[order]
    gs = np.flatnonzero(np.concatenate([[True], node[1:] != node[:-1]]))
    present = node[gs]
    ge = np.concatenate([gs[1:], [node.size]])
    p = np.searchsorted(key, present.astype(np.float64) * width, side="left")
    i0, i1, i2, i3 = p - 2, p - 1, p, p + 1
    h1_ok = i1 >= gs
    h2_ok = i2 < ge
    c = lambda i: np.clip(i, 0, node.size - 1)  # noqa: E731
    x0, x1, x2, x3 = off[c(i0)], off[c(i1)], off[c(i2)], off[c(i3)]
    v0, v1, v2, v3 = vals[c(i0)], vals[c(i1)], vals[c(i2)], vals[c(i3)]
    both = h1_ok & h2_ok
    h1 = x2 - x1
    has0 = (i0 >= gs) & (x1 - x0 >= min_sep_m)
    has3 = (i3 < ge) & (x3 - x2 >= min_sep_m)
    result = np.full((present.size, k), np.nan)
    # One side only: the nearest run's value.
    only_left = h1_ok & ~h2_ok
    only_right = h2_ok & ~h1_ok
    result[only_left] = v1[only_left]
    result[only_right] = v2[only_right]
    # Two runs almost on top of each other: their mean.
    close = both & (h1 < min_sep_m)
    result[close] = 0.5 * (v1[close] + v2[close])
    cub = both & ~close
    if cub.any():
        h0 = (x1 - x0)[cub, None]
        h2 = (x3 - x2)[cub, None]
        hh = h1[cub, None]
        a0, a3 = has0[cub, None], has3[cub, None]
        d1_ = (v2[cub] - v1[cub]) / hh
        with np.errstate(divide="ignore", invalid="ignore"):
            d0_ = np.where(a0, (v1[cub] - v0[cub]) / np.where(a0, h0, 1.0), d1_)
            d2_ = np.where(a3, (v3[cub] - v2[cub]) / np.where(a3, h2, 1.0), d1_)
            if across == "pchip":
                w1, w2 = 2 * hh + h0, hh + 2 * h0
                g1 = np.where(d0_ * d1_ > 0, (w1 + w2) / (w1 / d0_ + w2 / d1_), 0.0)
                w1, w2 = 2 * h2 + hh, h2 + 2 * hh
                g2 = np.where(d1_ * d2_ > 0, (w1 + w2) / (w1 / d1_ + w2 / d2_), 0.0)
            else:
                g1 = (hh * d0_ + h0 * d1_) / (h0 + hh)
                g2 = (h2 * d1_ + hh * d2_) / (hh + h2)
        g1 = np.where(a0, g1, d1_)
        g2 = np.where(a3, g2, d1_)
        s = (-x1[cub] / h1[cub])[:, None]
        h00 = 2 * s**3 - 3 * s**2 + 1
        h10 = s**3 - 2 * s**2 + s
        h01 = -2 * s**3 + 3 * s**2
        h11 = s**3 - s**2
        result[cub] = h00 * v1[cub] + h10 * hh * g1 + h01 * v2[cub] + h11 * hh * g2
    out[present] = result
    return out


def grid_tile(
    easting: np.ndarray,
    northing: np.ndarray,
    values: np.ndarray,
    track: np.ndarray,
    node_e: np.ndarray,
    node_n: np.ndarray,
    angle_deg: float,
    reach_m: float,
    max_gap_m: float,
    min_sep_m: float,
    across: str = "bessel",
) -> np.ndarray:
    """Grid readings onto the nodes of one tile (no blanking here).

    Parameters
    ----------
    easting, northing : ndarray of float
        Reading positions, m, in storage order (tracks contiguous).
    values : ndarray of float, shape (m, k)
        The k variables to grid at each reading.
    track : ndarray of int
        Track identifier of each reading.
    node_e, node_n : ndarray of float
        Coordinates of the nodes to grid (any set of points), m.
    angle_deg : float
        Direction of the survey lines, degrees counter-clockwise from the
        easting axis.
    reach_m : float
        Largest across-track distance from a node to a run used for it, m.
    max_gap_m : float
        Longest step between readings interpolated across along a run, m.
    min_sep_m : float
        Runs closer than this across track are averaged, not differenced, m.
    across : {"bessel", "pchip"}
        Derivative rule of the across-track cubic Hermite.

    Returns
    -------
    ndarray, shape (k, len(node_e))
        Gridded values; NaN where no run is within reach.
    """
    k = values.shape[1]
    ge, gn = np.asarray(node_e, dtype=np.float64), np.asarray(node_n, dtype=np.float64)
    out = np.full((ge.size, k), np.nan)
    if easting.size >= 2:
        theta = np.deg2rad(angle_deg)
        de, dn = np.diff(easting), np.diff(northing)
        step = np.hypot(de, dn)
        with np.errstate(invalid="ignore", divide="ignore"):
            along = np.abs(de * np.cos(theta) + dn * np.sin(theta)) / step
        main = along >= COS45
        for frame, aligned in ((theta, main), (theta + np.pi / 2, ~main)):
            if not aligned.any():
                continue
            ux, uy = np.cos(frame), np.sin(frame)
            a = easting * ux + northing * uy
            c = -easting * uy + northing * ux
            starts, stops = runs(a, c, track, aligned, max_gap_m)
            todo = np.flatnonzero(np.isnan(out[:, 0]))
            if todo.size == 0:
                break
            na = ge[todo] * ux + gn[todo] * uy
            nc = -ge[todo] * uy + gn[todo] * ux
            node, off, vals = _along_pass(a, c, values, starts, stops, na, nc, reach_m)
            out[todo] = _across_pass(node, off, vals, todo.size, reach_m, min_sep_m, across)
    return out.T
