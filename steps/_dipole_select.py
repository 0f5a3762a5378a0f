"""Load only the readings near a set of points, chunk by chunk.

Two passes over the segment-aligned dask chunks of the readings. First the
bounding box (easting, northing) of every chunk is computed, one small task
per chunk. Then, for the chunks whose box comes within ``radius_m`` of some
point only, a task keeps the readings within ``radius_m`` of one of those
points (k-d tree, Bentley 1975) that are not flagged with an excluded flag
and have a finite value; only those readings are brought into memory and
concatenated. Chunks far from every point are never read past the first
pass.

References
----------
Bentley, J. L. (1975). Multidimensional binary search trees used for
    associative searching. Communications of the ACM 18(9), 509-517.
    [Bentley1975]_
"""

from __future__ import annotations

import dask
import dask.array as da
import numpy as np
import xarray as xr
from scipy.spatial import cKDTree

__all__ = ["select_near"]


def _bbox(e, n):
    e, n = np.asarray(e), np.asarray(n)
    good = np.isfinite(e) & np.isfinite(n)
    if not good.any():
        return np.array([np.inf, -np.inf, np.inf, -np.inf])
    return np.array([e[good].min(), e[good].max(), n[good].min(), n[good].max()])


def _keep(e, n, u, v, flags, centres, radius, exclude, offset):
    e, n, u, v, flags = (np.asarray(x) for x in (e, n, u, v, flags))
    good = np.isfinite(e) & np.isfinite(n) & np.isfinite(u) & np.isfinite(v) & ((flags & exclude) == 0)
    idx = np.flatnonzero(good)
    if idx.size:
        dist, _ = cKDTree(centres).query(np.column_stack([e[idx], n[idx]]), distance_upper_bound=np.nextafter(radius, np.inf) * 1.000001)
        idx = idx[dist <= radius]
    return offset + idx, e[idx], n[idx], u[idx], v[idx]


def _as_chunks(var: xr.DataArray, chunks) -> da.Array:
    data = var.data
    if not isinstance(data, da.Array):
        return da.from_array(np.asarray(data), chunks=chunks)
    return data if data.chunks == chunks else data.rechunk(chunks)


def select_near(readings: xr.Dataset, variable: str, centres: np.ndarray, radius_m: float, exclude: int) -> dict:
    """Readings within ``radius_m`` (horizontal) of any of ``centres``.

    Parameters
    ----------
    readings : xarray.Dataset
        Readings along ``reading`` (dask-backed or in memory), with
        coordinates ``easting``, ``northing``, ``elevation`` (m) and the
        variables ``variable`` (nT) and ``flags``.
    variable : str
        Name of the field variable (``"residual"``).
    centres : ndarray (p, 2)
        Easting, northing of the points, m.
    radius_m : float
        Horizontal search radius, m.
    exclude : int
        Bit mask of flags whose readings are left out.

    Returns
    -------
    dict
        ``index`` (reading indices), ``easting``, ``northing``,
        ``elevation`` (m), ``value`` (nT) of the readings kept, and the
        counts ``chunks_total``, ``chunks_read``.
    """
    chunks = readings[variable].chunks or ((readings.sizes["reading"],),)
    arrays = [_as_chunks(readings[name], chunks) for name in ("easting", "northing", "elevation", variable, "flags")]
    delayed = [a.to_delayed().ravel() for a in arrays]
    n_chunks = len(chunks[0])
    empty = {
        "index": np.zeros(0, np.int64), "easting": np.zeros(0), "northing": np.zeros(0),
        "elevation": np.zeros(0), "value": np.zeros(0), "chunks_total": n_chunks, "chunks_read": 0,
    }
    centres = np.asarray(centres, float).reshape(-1, 2)
    if centres.shape[0] == 0 or n_chunks == 0:
        return empty
    boxes = np.array(dask.compute(*[dask.delayed(_bbox)(e, n) for e, n in zip(delayed[0], delayed[1])]))
    offsets = np.cumsum((0,) + tuple(chunks[0]))[:-1]
    tasks = []
    for b, (w, east, s, north) in enumerate(boxes):
        dx = np.maximum(np.maximum(w - centres[:, 0], centres[:, 0] - east), 0.0)
        dy = np.maximum(np.maximum(s - centres[:, 1], centres[:, 1] - north), 0.0)
        near = np.hypot(dx, dy) <= radius_m
        if near.any():
            tasks.append(dask.delayed(_keep)(
                *(d[b] for d in delayed), centres[near], float(radius_m), np.uint32(exclude), int(offsets[b])
            ))
    if not tasks:
        return empty
    parts = dask.compute(*tasks)
    out = {key: np.concatenate([p[i] for p in parts]) for i, key in enumerate(("index", "easting", "northing", "elevation", "value"))}
    out.update(chunks_total=n_chunks, chunks_read=len(tasks))
    return out
