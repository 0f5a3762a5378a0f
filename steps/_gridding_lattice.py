"""Compiled kernels of the line gridder on a regular lattice of nodes, and blanking.

The method is the two-pass line gridding of
:mod:`lodeline.steps._gridding_lines` (along each track, then a cubic
Hermite across the tracks: Bessel's derivative, de Boor 1978, *A Practical
Guide to Splines*, ch. IV, or the monotone derivative of Fritsch & Carlson
1980, *Monotone piecewise cubic interpolation*, with the weights of Fritsch
& Butland 1984), which stays the reference implementation for any set of
points. Here the same numbers are computed for the nodes of a regular
lattice (one tile), compiled with numba, without sorting:

* Along pass, step by step. For every linked step between two consecutive
  readings of a run (same track, within 45 degrees of the frame's ``a``
  axis, no longer than ``max_gap_m``), the nodes whose ``a`` lies in the
  step and whose ``c`` is within ``reach_m`` of the step are enumerated
  row by row (or column by column, whichever the lines cross more
  steeply) from the two linear constraints, so no node outside the
  parallelogram is visited. Intervals are half-open within a run and closed
  at its ends, so a node is counted once per run, as the reference's
  closed interval of each run.
* Instead of keeping every (offset, value) pair of a node and sorting them,
  each node keeps the two nearest runs on each side of it (offset below
  zero, and at or above zero): exactly the four points the across pass of
  the reference takes after its sort (ties in the order the runs come, as
  its stable sort).
* Across pass: the same piecewise cubic Hermite per node.

Blanking marks the nodes within ``blank`` of a reading (Euclidean distance,
row by row over each reading's disc), the same criterion as the k-d tree
query of :func:`lodeline.steps._gridding_tiles.blank_mask`.

numba (a dependency of harmonica) compiles the kernels on first use and
caches them beside this file; they release the GIL, so dask threads run
tiles in parallel.
"""

from __future__ import annotations

import math

import numba
import numpy as np

__all__ = ["grid_lattice", "blank_lattice"]

_COS45 = math.sqrt(0.5)
_INF = np.inf


@numba.njit(cache=True, nogil=True)
def _inner_range(ip, lo1, hi1, iq, lo2, hi2):
    """Interval of x with lo1 <= x/ip <= hi1 and lo2 <= x/iq <= hi2, given the
    reciprocals ``ip``, ``iq`` of the coefficients (NaN: coefficient zero);
    empty when lo > hi."""
    a, b = -_INF, _INF
    if ip > 0:
        a, b = lo1 * ip, hi1 * ip
    elif ip < 0:
        a, b = hi1 * ip, lo1 * ip
    elif not (lo1 <= 0.0 <= hi1):
        return 1.0, 0.0
    if iq > 0:
        a, b = max(a, lo2 * iq), min(b, hi2 * iq)
    elif iq < 0:
        a, b = max(a, hi2 * iq), min(b, lo2 * iq)
    elif not (lo2 <= 0.0 <= hi2):
        return 1.0, 0.0
    return a, b


@numba.njit(cache=True, nogil=True)
def _index_range(x_lo, x_hi, x0, idx, n):
    """Lattice indices i (x0 + i / idx) inside [x_lo, x_hi] (to rounding), clipped to [0, n)."""
    if not (x_lo <= x_hi):
        return 0, -1
    # A millionth of a cell of slack covers the rounding of node coordinates;
    # the callers check every candidate exactly.
    i0 = int(math.ceil((x_lo - x0) * idx - 1e-6))
    i1 = int(math.floor((x_hi - x0) * idx + 1e-6))
    return max(i0, 0), min(i1, n - 1)


@numba.njit(cache=True, nogil=True)
def _insert(node, off, v, sl, k):
    """Keep the two nearest runs on each side of a node (see the module docstring).

    ``sl[node]`` holds the offsets x0 <= x1 < 0 <= x2 <= x3 (absent: -inf or
    +inf), then the k values of each of the four, one row per node so that
    an insertion touches one cache line.
    """
    if off < 0.0:
        if off >= sl[node, 1]:
            sl[node, 0] = sl[node, 1]
            sl[node, 1] = off
            for q in range(k):
                sl[node, 4 + q] = sl[node, 4 + k + q]
                sl[node, 4 + k + q] = v[q]
        elif off >= sl[node, 0]:
            sl[node, 0] = off
            for q in range(k):
                sl[node, 4 + q] = v[q]
    else:
        if off < sl[node, 2]:
            sl[node, 3] = sl[node, 2]
            sl[node, 2] = off
            for q in range(k):
                sl[node, 4 + 3 * k + q] = sl[node, 4 + 2 * k + q]
                sl[node, 4 + 2 * k + q] = v[q]
        elif off < sl[node, 3]:
            sl[node, 3] = off
            for q in range(k):
                sl[node, 4 + 3 * k + q] = v[q]


@numba.njit(cache=True, nogil=True)
def _along(e, n, vals, track, aligned, ux, uy, node_e, node_n, reach, max_gap, todo, sl):
    """Along pass of one frame: candidates of every linked step into the nodes' nearest-run slots."""
    m = e.size
    k = vals.shape[1]
    nx, ny = node_e.size, node_n.size
    e0 = node_e[0]
    n0 = node_n[0]
    ide = 1.0 / (node_e[1] - node_e[0]) if nx > 1 else 1.0
    idn = 1.0 / (node_n[1] - node_n[0]) if ny > 1 else 1.0
    iux = 1.0 / ux if ux != 0.0 else 0.0
    iuy = 1.0 / uy if uy != 0.0 else 0.0
    # Outer loop along the axis closer to the lines' direction: a step's
    # parallelogram is narrow along the lines, so few outer lattice lines cross it.
    rows = abs(ux) < abs(uy)
    v = np.empty(k)
    # link and sign of every step
    link = np.zeros(m, np.bool_)
    sign = np.zeros(m, np.int8)
    for s in range(m - 1):
        a0 = e[s] * ux + n[s] * uy
        a1 = e[s + 1] * ux + n[s + 1] * uy
        c0 = -e[s] * uy + n[s] * ux
        c1 = -e[s + 1] * uy + n[s + 1] * ux
        da = a1 - a0
        step = math.hypot(da, c1 - c0)
        if track[s + 1] == track[s] and aligned[s] and step <= max_gap and da != 0.0:
            link[s] = True
            sign[s] = 1 if da > 0 else -1
    for s in range(m - 1):
        if not link[s]:
            continue
        first = not (s > 0 and link[s - 1] and sign[s - 1] == sign[s])
        last = not (s + 1 < m - 1 and link[s + 1] and sign[s + 1] == sign[s])
        ak = e[s] * ux + n[s] * uy
        ak1 = e[s + 1] * ux + n[s + 1] * uy
        ck = -e[s] * uy + n[s] * ux
        ck1 = -e[s + 1] * uy + n[s + 1] * ux
        if ak < ak1:
            lo, hi, close_hi = ak, ak1, last
        else:
            lo, hi, close_hi = ak1, ak, first
        cmin = min(ck, ck1) - reach
        cmax = max(ck, ck1) + reach
        inv = 1.0 / (ak1 - ak)
        # outer range from the parallelogram's corners
        omin, omax = _INF, -_INF
        for aa in (lo, hi):
            for cc in (cmin, cmax):
                o = aa * uy + cc * ux if rows else aa * ux - cc * uy
                omin = min(omin, o)
                omax = max(omax, o)
        if rows:
            j0, j1 = _index_range(omin, omax, n0, idn, ny)
        else:
            j0, j1 = _index_range(omin, omax, e0, ide, nx)
        for jo in range(j0, j1 + 1):
            if rows:
                nn = node_n[jo]
                x_lo, x_hi = _inner_range(iux, lo - nn * uy, hi - nn * uy, -iuy, cmin - nn * ux, cmax - nn * ux)
                i0, i1 = _index_range(x_lo, x_hi, e0, ide, nx)
            else:
                ee = node_e[jo]
                x_lo, x_hi = _inner_range(iuy, lo - ee * ux, hi - ee * ux, iux, cmin + ee * uy, cmax + ee * uy)
                i0, i1 = _index_range(x_lo, x_hi, n0, idn, ny)
            for io in range(i0, i1 + 1):
                if rows:
                    ie, jn = io, jo
                else:
                    ie, jn = jo, io
                node = jn * nx + ie
                if not todo[node]:
                    continue
                E = node_e[ie]
                N = node_n[jn]
                na = E * ux + N * uy
                if na < lo or na > hi or (na == hi and not close_hi):
                    continue
                t = (na - ak) * inv
                off = (ck + t * (ck1 - ck)) - (-E * uy + N * ux)
                if abs(off) > reach:
                    continue
                for q in range(k):
                    v[q] = vals[s, q] + t * (vals[s + 1, q] - vals[s, q])
                _insert(node, off, v, sl, k)


@numba.njit(cache=True, nogil=True)
def _across(sl, k, min_sep, pchip, todo, out):
    """Across pass: cubic Hermite on the interval bracketing each node (reference formulas)."""
    nn = sl.shape[0]
    for node in range(nn):
        if not todo[node]:
            continue
        x0, x1, x2, x3 = sl[node, 0], sl[node, 1], sl[node, 2], sl[node, 3]
        h1_ok = x1 > -_INF
        h2_ok = x2 < _INF
        if h1_ok and not h2_ok:
            for q in range(k):
                out[node, q] = sl[node, 4 + k + q]
            continue
        if h2_ok and not h1_ok:
            for q in range(k):
                out[node, q] = sl[node, 4 + 2 * k + q]
            continue
        if not (h1_ok and h2_ok):
            continue
        h1 = x2 - x1
        if h1 < min_sep:
            for q in range(k):
                out[node, q] = 0.5 * (sl[node, 4 + k + q] + sl[node, 4 + 2 * k + q])
            continue
        has0 = x0 > -_INF and (x1 - x0 >= min_sep)
        has3 = x3 < _INF and (x3 - x2 >= min_sep)
        h0 = x1 - x0
        h2 = x3 - x2
        s = -x1 / h1
        h00 = 2 * s**3 - 3 * s**2 + 1
        h10 = s**3 - 2 * s**2 + s
        h01 = -2 * s**3 + 3 * s**2
        h11 = s**3 - s**2
        for q in range(k):
            v0, v1 = sl[node, 4 + q], sl[node, 4 + k + q]
            v2, v3 = sl[node, 4 + 2 * k + q], sl[node, 4 + 3 * k + q]
            d1 = (v2 - v1) / h1
            d0 = (v1 - v0) / h0 if has0 else d1
            d2 = (v3 - v2) / h2 if has3 else d1
            if has0:
                if pchip:
                    w1, w2 = 2 * h1 + h0, h1 + 2 * h0
                    g1 = (w1 + w2) / (w1 / d0 + w2 / d1) if d0 * d1 > 0 else 0.0
                else:
                    g1 = (h1 * d0 + h0 * d1) / (h0 + h1)
            else:
                g1 = d1
            if has3:
                if pchip:
                    w1, w2 = 2 * h2 + h1, h2 + 2 * h1
                    g2 = (w1 + w2) / (w1 / d1 + w2 / d2) if d1 * d2 > 0 else 0.0
                else:
                    g2 = (h2 * d1 + h1 * d2) / (h1 + h2)
            else:
                g2 = d1
            out[node, q] = h00 * v1 + h10 * h1 * g1 + h01 * v2 + h11 * h1 * g2


@numba.njit(cache=True, nogil=True)
def _grid(e, n, vals, track, node_e, node_n, theta, reach, max_gap, min_sep, pchip, where):
    nx, ny = node_e.size, node_n.size
    k = vals.shape[1]
    nn = nx * ny
    out = np.full((nn, k), np.nan)
    m = e.size
    if m < 2:
        return out
    ct, st = math.cos(theta), math.sin(theta)
    main = np.zeros(m, np.bool_)
    for s in range(m - 1):
        de_, dn_ = e[s + 1] - e[s], n[s + 1] - n[s]
        step = math.hypot(de_, dn_)
        along = abs(de_ * ct + dn_ * st) / step if step > 0 else np.nan
        main[s] = along >= _COS45
    todo = where.copy()
    sl = np.empty((nn, 4 + 4 * k))
    for f in range(2):
        frame = theta if f == 0 else theta + np.pi / 2
        aligned = main if f == 0 else ~main
        if not aligned[: m - 1].any():
            continue
        if not todo.any():
            break
        for node in range(nn):
            sl[node, 0] = -_INF
            sl[node, 1] = -_INF
            sl[node, 2] = _INF
            sl[node, 3] = _INF
        ux, uy = math.cos(frame), math.sin(frame)
        _along(e, n, vals, track, aligned, ux, uy, node_e, node_n, reach, max_gap, todo, sl)
        _across(sl, k, min_sep, pchip, todo, out)
        for node in range(nn):
            if todo[node] and not math.isnan(out[node, 0]):
                todo[node] = False
    return out


def grid_lattice(easting, northing, values, track, node_e, node_n, angle_deg, reach_m, max_gap_m, min_sep_m,
                 across="bessel", where=None) -> np.ndarray:
    """Line gridding onto a regular lattice of nodes (no blanking here).

    Parameters
    ----------
    easting, northing : ndarray of float
        Reading positions, m, in storage order (tracks contiguous).
    values : ndarray of float, shape (m, k)
        The k variables to grid at each reading.
    track : ndarray of int
        Track identifier of each reading.
    node_e, node_n : ndarray of float
        Regular node axes, m (increasing, constant step).
    angle_deg, reach_m, max_gap_m, min_sep_m, across
        As :func:`lodeline.steps._gridding_lines.grid_tile`.
    where : ndarray of bool, shape (len(node_n), len(node_e)), optional
        Nodes to grid (all when None); the others are NaN.

    Returns
    -------
    ndarray, shape (k, len(node_n), len(node_e))
        Gridded values; NaN where no run is within reach.
    """
    ge = np.ascontiguousarray(node_e, dtype=np.float64)
    gn = np.ascontiguousarray(node_n, dtype=np.float64)
    v = np.ascontiguousarray(values, dtype=np.float64)
    k = v.shape[1]
    todo = np.ones(ge.size * gn.size, dtype=np.bool_) if where is None else np.ascontiguousarray(where, dtype=np.bool_).ravel()
    out = _grid(np.ascontiguousarray(easting, dtype=np.float64), np.ascontiguousarray(northing, dtype=np.float64),
                v, np.ascontiguousarray(track, dtype=np.int64), ge, gn, float(np.deg2rad(angle_deg)), float(reach_m),
                float(max_gap_m), float(min_sep_m), across == "pchip", todo)
    return out.reshape(gn.size, ge.size, k).transpose(2, 0, 1)


@numba.njit(cache=True, nogil=True)
def _blank(e, n, node_e, node_n, blank, mask):
    nx, ny = node_e.size, node_n.size
    e0, n0 = node_e[0], node_n[0]
    ide = 1.0 / (node_e[1] - node_e[0]) if nx > 1 else 1.0
    idn = 1.0 / (node_n[1] - node_n[0]) if ny > 1 else 1.0
    b2 = blank * blank
    for r in range(e.size):
        x, y = e[r], n[r]
        j0, j1 = _index_range(y - blank, y + blank, n0, idn, ny)
        for j in range(j0, j1 + 1):
            dy = node_n[j] - y
            rest = b2 - dy * dy
            if rest < 0:
                continue
            w = math.sqrt(rest)
            i0, i1 = _index_range(x - w, x + w, e0, ide, nx)
            if i1 < i0:
                continue
            # Interior nodes are inside by construction; the two end nodes
            # (within rounding of the edge) are checked exactly.
            for i in (i0, i1):
                dx = node_e[i] - x
                if math.sqrt(dx * dx + dy * dy) <= blank:
                    mask[j, i] = True
            for i in range(i0 + 1, i1):
                mask[j, i] = True


def blank_lattice(easting, northing, node_e, node_n, blank: float) -> np.ndarray:
    """True at lattice nodes within ``blank`` m of a reading, shape (len(node_n), len(node_e))."""
    mask = np.zeros((np.size(node_n), np.size(node_e)), dtype=np.bool_)
    if np.size(easting) and mask.size:
        _blank(np.ascontiguousarray(easting, dtype=np.float64), np.ascontiguousarray(northing, dtype=np.float64),
               np.ascontiguousarray(node_e, dtype=np.float64), np.ascontiguousarray(node_n, dtype=np.float64),
               float(blank), mask)
    return mask
