"""Tiling, survey geometry and the Delaunay reference gridders of the gridding stage.

Grid nodes sit at whole multiples of the cell size (independent of the
tiling) and are cut into square tiles of ``tile_cells`` nodes a side. Each
tile is gridded on its own from the readings within the tile plus a halo at
least as wide as the reach of the method (see
:mod:`lodeline.steps._gridding_lines`), so tiles agree with gridding the
whole area at once. A per-chunk bounding box of the accepted readings,
computed once, picks the reading chunks a tile needs.

Blanking: a node farther than ``blank_distance_m`` from every accepted
reading is NaN (Euclidean distances, compiled in
:mod:`lodeline.steps._gridding_lattice`).

Finding a tile's readings: each prepared chunk is sorted once by the
square *block* (``block_m`` a side, in absolute survey coordinates) each
reading falls in, with the unique blocks and where each starts; a tile
depends only on the chunks holding a block within its halo, and takes from
each the few contiguous runs of blocks that cover it, then puts them back in
storage order (the line gridder follows the tracks). Tiles that no reading
reaches are NaN without a task.

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

from ._blocks import as_dask
from . import _gridding_lattice as lattice

#: Offset that keeps block indices positive in the block key.
_KEY_OFFSET = 1 << 30
_KEY_SHIFT = 1 << 31


def _block_keys(e, n, block_m: float) -> np.ndarray:
    bi = np.floor(e / block_m).astype(np.int64) + _KEY_OFFSET
    bj = np.floor(n / block_m).astype(np.int64) + _KEY_OFFSET
    return bi * _KEY_SHIFT + bj


def _prep(e, n, flags, line, sensor, *vals, exclude: int, keep_line, block_m=None):
    """Accepted readings of one chunk: (e, n, values (m, k), track), plus, when
    ``block_m`` is given, their position in the chunk, the unique block keys
    and where each block starts, all sorted by block (storage order within one)."""
    v = np.stack([np.asarray(x, dtype=np.float64) for x in vals], axis=1)
    ok = ((flags & np.uint32(exclude)) == 0) & np.isfinite(e) & np.isfinite(n) & np.all(np.isfinite(v), axis=1)
    ok &= keep_line[line]
    track = line.astype(np.int64) * 65536 + sensor.astype(np.int64)
    e, n, v, track = e[ok], n[ok], v[ok], track[ok]
    if block_m is None:
        return e, n, v, track
    key = _block_keys(e, n, block_m)
    order = np.argsort(key, kind="stable")
    key = key[order]
    starts = np.flatnonzero(np.concatenate([[True], key[1:] != key[:-1]])) if key.size else np.zeros(0, np.int64)
    return e[order], n[order], v[order], track[order], order, key[starts], starts


def _bbox(chunk):
    e, n = chunk[0], chunk[1]
    if e.size == 0:
        return (np.inf, -np.inf, np.inf, -np.inf, 0)
    return (float(e.min()), float(e.max()), float(n.min()), float(n.max()), int(e.size))


def prepared_chunks(readings, variables, exclude: int, keep_line: np.ndarray, block_m: float | None = None):
    """One delayed prepared chunk per reading chunk, accepted readings only (see :func:`_prep`)."""
    base = readings["easting"].data
    chunks = base.chunks
    def blocks(name):
        return as_dask(readings[name], chunks).to_delayed().ravel()
    cols = [blocks(x) for x in ("easting", "northing", "flags", "line_index", "sensor_index", *variables)]
    return [
        dask.delayed(_prep, pure=True)(*parts, exclude=exclude, keep_line=keep_line, block_m=block_m)
        for parts in zip(*cols)
    ]


def _index(chunk):
    return _bbox(chunk), chunk[5]


def chunk_index(chunks):
    """(W, E, S, N, count) of each prepared chunk and its unique block keys, computed once."""
    found = dask.compute(*[dask.delayed(_index)(c) for c in chunks])
    boxes = np.array([f[0] for f in found], dtype=np.float64).reshape(-1, 5)
    return boxes, [f[1] for f in found]


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


def _tile_keys(te, tn, halo, block_m):
    """Block index ranges (bi0, bi1, bj0, bj1) covering a tile and its halo."""
    bi0, bi1 = (int(np.floor(x / block_m)) for x in (te[0] - halo, te[-1] + halo))
    bj0, bj1 = (int(np.floor(x / block_m)) for x in (tn[0] - halo, tn[-1] + halo))
    return bi0, bi1, bj0, bj1


def _gather(chunks, te, tn, halo, block_m):
    """Readings of the chunks within the tile plus halo, in storage order."""
    bi0, bi1, bj0, bj1 = _tile_keys(te, tn, halo, block_m)
    w, e_ = te[0] - halo, te[-1] + halo
    s, n_ = tn[0] - halo, tn[-1] + halo
    parts = []
    for number, (ce, cn, cv, ct, pos, keys, starts) in enumerate(chunks):
        stops = np.append(starts[1:], ce.size)
        for bi in range(bi0, bi1 + 1):
            k0 = (bi + _KEY_OFFSET) * _KEY_SHIFT + bj0 + _KEY_OFFSET
            k1 = (bi + _KEY_OFFSET) * _KEY_SHIFT + bj1 + _KEY_OFFSET
            b0, b1 = np.searchsorted(keys, [k0, k1 + 1])
            if b1 <= b0:
                continue
            lo, hi = starts[b0], stops[b1 - 1]
            sel = slice(lo, hi)
            inside = (ce[sel] >= w) & (ce[sel] <= e_) & (cn[sel] >= s) & (cn[sel] <= n_)
            if inside.any():
                parts.append((ce[sel][inside], cn[sel][inside], cv[sel][inside], ct[sel][inside],
                              pos[sel][inside] + (number << 40)))
    if not parts:
        return None
    e = np.concatenate([p[0] for p in parts])
    n = np.concatenate([p[1] for p in parts])
    v = np.concatenate([p[2] for p in parts])
    t = np.concatenate([p[3] for p in parts])
    order = np.argsort(np.concatenate([p[4] for p in parts]))
    return e[order], n[order], v[order], t[order]


def _tile(node_e, node_n, halo, blank, block_m, grid_kw, *chunks):
    """Grid one tile from the chunks that may touch it (numpy, shape (k, ny, nx))."""
    k = grid_kw["k"]
    found = _gather(chunks, node_e, node_n, halo, block_m) if chunks else None
    if found is None:
        return np.full((k, node_n.size, node_e.size), np.nan)
    e, n, v, t = found
    kw = {key: val for key, val in grid_kw.items() if key != "k"}
    mask = lattice.blank_lattice(e, n, node_e, node_n, blank)
    if not mask.any():
        return np.full((k, node_n.size, node_e.size), np.nan)
    return lattice.grid_lattice(e, n, v, t, node_e, node_n, where=mask, **kw)


def blank_mask(e, n, node_e, node_n, blank: float, where=None) -> np.ndarray:
    """True at nodes within ``blank`` m of a reading (shape (ny, nx)).

    Only the nodes where ``where`` is true (all when None) can be true.
    """
    mask = lattice.blank_lattice(e, n, node_e, node_n, blank)
    if where is not None:
        mask &= where
    return mask


def grid_lines(chunks, boxes, keys, node_e, node_n, tile_cells: int, halo: float, blank: float, block_m: float,
               grid_kw: dict):
    """Dask array (k, ny, nx) of the line gridder, one task per tile that readings reach,
    and the (row slice, column slice) of those tiles."""
    k = grid_kw["k"]
    rows, reached = [], []
    held = [np.asarray(x) for x in keys]
    for j in range(0, node_n.size, tile_cells):
        tn = node_n[j : j + tile_cells]
        row = []
        for i in range(0, node_e.size, tile_cells):
            te = node_e[i : i + tile_cells]
            bi0, bi1, bj0, bj1 = _tile_keys(te, tn, halo, block_m)
            hit = (
                (boxes[:, 4] > 0)
                & (boxes[:, 0] <= te[-1] + halo)
                & (boxes[:, 1] >= te[0] - halo)
                & (boxes[:, 2] <= tn[-1] + halo)
                & (boxes[:, 3] >= tn[0] - halo)
            )
            use = []
            for c in np.flatnonzero(hit):
                bi = held[c] // _KEY_SHIFT - _KEY_OFFSET
                bj = held[c] % _KEY_SHIFT - _KEY_OFFSET
                if np.any((bi >= bi0) & (bi <= bi1) & (bj >= bj0) & (bj <= bj1)):
                    use.append(chunks[c])
            if use:
                block = dask.delayed(_tile, pure=True)(te, tn, halo, blank, block_m, grid_kw, *use)
                row.append(da.from_delayed(block, shape=(k, tn.size, te.size), dtype=np.float64))
                reached.append((slice(j, j + tn.size), slice(i, i + te.size)))
            else:
                row.append(da.full((k, tn.size, te.size), np.nan, dtype=np.float64, chunks=(k, tn.size, te.size)))
        rows.append(row)
    return da.block([[r for r in row] for row in rows]).rechunk((k, tile_cells, tile_cells)), reached


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


def store_grid(grid, folder, tiles=None):
    """Compute the grid's variables once into zarr stores under ``folder`` and
    return the grid reading from them. The stores' fill value is NaN; with
    ``tiles`` (row and column slices) only those parts are computed and
    written, else all, blank chunks left unwritten."""
    import zarr

    out = grid.copy()
    sources, targets, regions, stores = [], [], [], {}
    for name, var in grid.data_vars.items():
        arr = var.data
        chunks = tuple(c[0] for c in arr.chunks) if isinstance(arr, da.Array) else arr.shape
        z = zarr.create_array(store=str(folder / f"{name}.zarr"), shape=arr.shape, chunks=chunks, dtype="f8",
                              fill_value=np.nan, overwrite=True)
        stores[name] = z
        parts = [tuple(slice(0, n) for n in arr.shape)] if tiles is None else list(tiles)
        for region in parts:
            sources.append(arr[region])
            targets.append(z)
            regions.append(region)
    if sources:
        da.store(sources, targets, regions=regions, lock=False)
    for name, var in grid.data_vars.items():
        out[name] = (var.dims, da.from_zarr(stores[name]), var.attrs)
    return out
