"""Tiling, survey geometry and the Delaunay reference gridders of the gridding stage.

Grid nodes sit at whole multiples of the cell size (independent of the
tiling) and are cut into square tiles of ``tile_cells`` nodes a side. Each
tile is gridded on its own from the readings within the tile plus a halo at
least as wide as the reach of the method (see
:mod:`lodeline.steps._gridding_lines`), so tiles agree with gridding the
whole area at once. A per-chunk bounding box of the accepted readings,
computed once, picks the reading chunks a tile needs.

Blanking: a node farther than ``blank_distance_m`` from every accepted
reading is NaN (``scipy.spatial.cKDTree`` distances).

Reference gridders (``method = "linear"`` or ``"cubic"``): Delaunay
triangulation of all accepted readings with linear interpolation on each
triangle, or the C1 Clough-Tocher cubic (Alfeld 1984, *A trivariate
Clough-Tocher scheme for tetrahedral data*, and the ``scipy.interpolate``
implementation via ``griddata``). They need every accepted reading in
memory at once, so they are meant for checks on small surveys.
"""

from __future__ import annotations

import dask
import dask.array as da
import numpy as np
from scipy.interpolate import griddata
from scipy.spatial import cKDTree

from . import _gridding_lines as lines


def _prep(e, n, flags, line, sensor, *vals, exclude: int, keep_line):
    """Accepted readings of one chunk: (e, n, values (m, k), track)."""
    v = np.stack([np.asarray(x, dtype=np.float64) for x in vals], axis=1)
    ok = ((flags & np.uint32(exclude)) == 0) & np.isfinite(e) & np.isfinite(n) & np.all(np.isfinite(v), axis=1)
    ok &= keep_line[line]
    track = line.astype(np.int64) * 65536 + sensor.astype(np.int64)
    return e[ok], n[ok], v[ok], track[ok]


def _bbox(chunk):
    e, n = chunk[0], chunk[1]
    if e.size == 0:
        return (np.inf, -np.inf, np.inf, -np.inf, 0)
    return (float(e.min()), float(e.max()), float(n.min()), float(n.max()), int(e.size))


def prepared_chunks(readings, variables, exclude: int, keep_line: np.ndarray):
    """One delayed (e, n, values, track) per reading chunk, accepted readings only."""
    base = readings["easting"].data
    chunks = base.chunks
    def blocks(name):
        arr = readings[name].data
        if not isinstance(arr, da.Array):
            arr = da.from_array(np.asarray(arr), chunks=chunks)
        elif arr.chunks != chunks:
            arr = arr.rechunk(chunks)
        return arr.to_delayed().ravel()
    cols = [blocks(x) for x in ("easting", "northing", "flags", "line_index", "sensor_index", *variables)]
    return [
        dask.delayed(_prep, pure=True)(*parts, exclude=exclude, keep_line=keep_line)
        for parts in zip(*cols)
    ]


def chunk_boxes(chunks) -> np.ndarray:
    """(W, E, S, N, count) of each prepared chunk, computed once."""
    boxes = dask.compute(*[dask.delayed(_bbox)(c) for c in chunks])
    return np.array(boxes, dtype=np.float64).reshape(-1, 5)


def node_axes(boxes: np.ndarray, cell: float, margin: float):
    """Grid axes (cell centres at whole multiples of ``cell``) covering the readings plus ``margin``."""
    used = boxes[boxes[:, 4] > 0]
    west, east = used[:, 0].min() - margin, used[:, 1].max() + margin
    south, north = used[:, 2].min() - margin, used[:, 3].max() + margin
    i0, i1 = int(np.floor(west / cell)), int(np.ceil(east / cell))
    j0, j1 = int(np.floor(south / cell)), int(np.ceil(north / cell))
    return np.arange(i0, i1 + 1) * cell, np.arange(j0, j1 + 1) * cell


def _tile(node_e, node_n, halo, blank, grid_kw, *chunks):
    """Grid one tile from the chunks that may touch it (numpy, shape (k, ny, nx))."""
    k = grid_kw["k"]
    out = np.full((k, node_n.size, node_e.size), np.nan)
    if not chunks:
        return out
    w, e_ = node_e[0] - halo, node_e[-1] + halo
    s, n_ = node_n[0] - halo, node_n[-1] + halo
    parts = []
    for ce, cn, cv, ct in chunks:
        sel = (ce >= w) & (ce <= e_) & (cn >= s) & (cn <= n_)
        if sel.any():
            parts.append((ce[sel], cn[sel], cv[sel], ct[sel]))
    if not parts:
        return out
    e = np.concatenate([p[0] for p in parts])
    n = np.concatenate([p[1] for p in parts])
    v = np.concatenate([p[2] for p in parts])
    t = np.concatenate([p[3] for p in parts])
    kw = {key: val for key, val in grid_kw.items() if key != "k"}
    mask = blank_mask(e, n, node_e, node_n, blank)
    if mask.any():
        jj, ii = np.nonzero(mask)
        out[:, jj, ii] = lines.grid_tile(e, n, v, t, node_e[ii], node_n[jj], **kw)
    return out


def blank_mask(e, n, node_e, node_n, blank: float, where=None) -> np.ndarray:
    """True at nodes within ``blank`` m of a reading (shape (ny, nx)).

    Only the nodes where ``where`` is true (all when None) are tested; the
    others are false.
    """
    shape = (node_n.size, node_e.size)
    mask = np.zeros(shape, dtype=bool)
    if e.size == 0:
        return mask
    # Pre-screen on a coarse lattice of cells ``blank`` wide: a node can be
    # within ``blank`` of a reading only if its coarse cell or a neighbour
    # holds one (saves the tree query on empty parts of a tile).
    e0, n0 = node_e[0] - blank, node_n[0] - blank
    ci = np.floor((e - e0) / blank).astype(np.int64)
    cj = np.floor((n - n0) / blank).astype(np.int64)
    nci = int(np.floor((node_e[-1] - e0) / blank)) + 2
    ncj = int(np.floor((node_n[-1] - n0) / blank)) + 2
    inside = (ci >= -1) & (ci <= nci) & (cj >= -1) & (cj <= ncj)
    occupied = np.zeros((ncj + 3, nci + 3), dtype=bool)
    occupied[cj[inside] + 1, ci[inside] + 1] = True
    near = occupied.copy()
    for dj in (-1, 0, 1):
        for di in (-1, 0, 1):
            near[1:-1, 1:-1] |= occupied[1 + dj : ncj + 2 + dj, 1 + di : nci + 2 + di]
    node_ci = np.floor((node_e - e0) / blank).astype(np.int64) + 1
    node_cj = np.floor((node_n - n0) / blank).astype(np.int64) + 1
    candidate = near[node_cj[:, None], node_ci[None, :]]
    if where is not None:
        candidate &= where
    jj, ii = np.nonzero(candidate)
    tree = cKDTree(np.column_stack([e, n]))
    if jj.size == 0:
        return mask
    dist, _ = tree.query(np.column_stack([node_e[ii], node_n[jj]]), k=1, distance_upper_bound=blank)
    mask[jj, ii] = dist <= blank
    return mask


def grid_lines(chunks, boxes, node_e, node_n, tile_cells: int, halo: float, blank: float, grid_kw: dict):
    """Dask array (k, ny, nx) of the line gridder, one task per tile."""
    k = grid_kw["k"]
    rows = []
    for j in range(0, node_n.size, tile_cells):
        tn = node_n[j : j + tile_cells]
        row = []
        for i in range(0, node_e.size, tile_cells):
            te = node_e[i : i + tile_cells]
            hit = (
                (boxes[:, 4] > 0)
                & (boxes[:, 0] <= te[-1] + halo)
                & (boxes[:, 1] >= te[0] - halo)
                & (boxes[:, 2] <= tn[-1] + halo)
                & (boxes[:, 3] >= tn[0] - halo)
            )
            use = [chunks[c] for c in np.flatnonzero(hit)]
            if use:
                block = dask.delayed(_tile, pure=True)(te, tn, halo, blank, grid_kw, *use)
                row.append(da.from_delayed(block, shape=(k, tn.size, te.size), dtype=np.float64))
            else:
                row.append(da.full((k, tn.size, te.size), np.nan, dtype=np.float64))
        rows.append(row)
    return da.block([[r for r in row] for row in rows]).rechunk((k, tile_cells, tile_cells))


def grid_delaunay(chunks, node_e, node_n, tile_cells: int, blank: float, method: str, k: int):
    """Dask array (k, ny, nx) of scipy's Delaunay gridder on all accepted readings at once."""
    parts = dask.compute(*chunks)
    e = np.concatenate([p[0] for p in parts])
    n = np.concatenate([p[1] for p in parts])
    v = np.concatenate([p[2] for p in parts])
    out = np.full((k, node_n.size, node_e.size), np.nan)
    mask = blank_mask(e, n, node_e, node_n, blank)
    ge, gn = np.meshgrid(node_e, node_n)
    xi = np.column_stack([ge[mask], gn[mask]])
    # One triangulation for all variables.
    vals = griddata(np.column_stack([e, n]), v, xi, method=method)
    out[:, mask] = np.asarray(vals).reshape(xi.shape[0], k).T
    return da.from_array(out, chunks=(k, tile_cells, tile_cells))


def survey_geometry(readings, segments, keep_line: np.ndarray):
    """Direction of the survey lines and across-track spacing of the tracks.

    From the first and last reading of every segment (a small sample):
    the direction is the length-weighted axial mean of the survey segments'
    directions (doubling the angles makes opposite runs agree); the spacing
    is the median of the non-zero gaps between the sorted across-track
    positions of the segments' mid-points.

    Returns
    -------
    angle_deg : float
        Line direction, degrees counter-clockwise from the easting axis.
    spacing_m : float
        Median across-track spacing of the tracks, m (NaN when undefined).
    """
    start = np.asarray(segments["start"].values, dtype=np.int64)
    stop = np.asarray(segments["stop"].values, dtype=np.int64)
    line = np.asarray(segments["line_index"].values, dtype=np.int64)
    kinds = list(readings.attrs.get("line_kinds", ["survey"] * (line.max() + 1 if line.size else 0)))
    survey = np.array([kinds[i] == "survey" for i in line], dtype=bool) & keep_line[line] & (stop > start)
    if not survey.any():
        survey = (stop > start) & keep_line[line]
    idx = np.concatenate([start[survey], stop[survey] - 1])
    e_idx, n_idx = dask.compute(readings["easting"].data[idx], readings["northing"].data[idx])
    m = survey.sum()
    de, dn = e_idx[m:] - e_idx[:m], n_idx[m:] - n_idx[:m]
    length = np.hypot(de, dn)
    ang2 = 2 * np.arctan2(dn, de)
    angle = 0.5 * np.arctan2(np.nansum(length * np.sin(ang2)), np.nansum(length * np.cos(ang2)))
    mid_e, mid_n = 0.5 * (e_idx[m:] + e_idx[:m]), 0.5 * (n_idx[m:] + n_idx[:m])
    across = np.sort(-mid_e * np.sin(angle) + mid_n * np.cos(angle))
    gaps = np.diff(across)
    gaps = gaps[gaps > 0]
    if gaps.size:
        gaps = gaps[gaps > 0.25 * np.median(gaps)]  # drop near-coincident tracks
    spacing = float(np.median(gaps)) if gaps.size else float("nan")
    return float(np.rad2deg(angle)), spacing
