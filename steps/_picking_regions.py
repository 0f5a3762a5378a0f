"""Connected regions of above-threshold cells, labelled tile by tile and joined across tile borders.

Each tile is labelled on its own (8-connectivity, ``scipy.ndimage.label``);
the labels of cells that touch across a tile border (the row or column on
each side of the border, offsets -1, 0, +1) are joined as the connected
components of a small graph of label pairs. Each tile returns only its
border labels, the labels at the picks it holds and, per label, the cell
count and the first and second moments of the cell positions, so memory
stays bounded by a tile. The moments give each region's centre and the
covariance of its cells' positions (principal component analysis; Jolliffe
2002, Principal Component Analysis), from which ``length_m`` and
``width_m`` are the sides of the rectangle with the same covariance
(``sqrt(12 * eigenvalue)``, exact for a uniform rectangle), and
``area_m2`` is the cell count times the cell area. Plain bookkeeping
otherwise, no published source.
"""

from __future__ import annotations

import dask
import dask.array as da
import numpy as np
from scipy import ndimage
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components

__all__ = ["regions"]

EIGHT = np.ones((3, 3), dtype=bool)


def _block(values, threshold, pick_rows, pick_cols, row0, col0, north, east):
    mask = np.isfinite(values) & (values > threshold)
    labels, k = ndimage.label(mask, structure=EIGHT)
    idx = np.arange(1, k + 1)
    if k:
        e = np.broadcast_to(east[np.newaxis, :], values.shape)
        n = np.broadcast_to(north[:, np.newaxis], values.shape)
        e0, n0 = east[0], north[0]  # moments about the tile corner keep the sums well conditioned
        de, dn = e - e0, n - n0
        sums = [ndimage.sum_labels(np.ones_like(values), labels, idx)]
        for q in (de, dn, de * de, de * dn, dn * dn):
            sums.append(ndimage.sum_labels(q, labels, idx))
        mom = np.column_stack(sums)
        # back from the tile corner to the caller's origin
        cnt, se, sn, see, sen, snn = mom.T
        mom = np.column_stack([cnt, se + cnt * e0, sn + cnt * n0,
                               see + 2 * e0 * se + cnt * e0 * e0,
                               sen + e0 * sn + n0 * se + cnt * e0 * n0,
                               snn + 2 * n0 * sn + cnt * n0 * n0])
    else:
        mom = np.zeros((0, 6))
    inside = (pick_rows >= row0) & (pick_rows < row0 + values.shape[0]) & (pick_cols >= col0) & (pick_cols < col0 + values.shape[1])
    at_picks = np.zeros(len(pick_rows), dtype=np.int64)
    at_picks[inside] = labels[pick_rows[inside] - row0, pick_cols[inside] - col0]
    edges = (labels[0], labels[-1], labels[:, 0], labels[:, -1])
    return k, mom, at_picks, edges


def regions(values, threshold: float, north: np.ndarray, east: np.ndarray, pick_rows: np.ndarray, pick_cols: np.ndarray):
    """Label the cells above ``threshold`` and describe each region.

    Parameters
    ----------
    values : dask.array.Array (ny, nx)
        The grid searched, NaN where blank.
    threshold : float
        Cells above it belong to a region.
    north, east : numpy.ndarray
        Cell-centre coordinates, m (centred by the caller for conditioning).
    pick_rows, pick_cols : numpy.ndarray of int
        Cells of the picks.

    Returns
    -------
    (numpy.ndarray, dict)
        Region id of each pick (-1 when its cell is not in a region, which
        cannot happen for a pick above the threshold) and, per region id,
        ``{"cells", "centre", "length_m", "width_m", "azimuth_deg", "area_m2"}``.
    """
    values = values if isinstance(values, da.Array) else da.from_array(np.asarray(values, dtype=float))
    starts = [np.cumsum((0,) + tuple(c[:-1])) for c in values.chunks]
    blocks = values.to_delayed()
    keys = list(np.ndindex(values.numblocks))
    tasks = []
    for i, j in keys:
        r0, c0 = starts[0][i], starts[1][j]
        rn, cn = values.chunks[0][i], values.chunks[1][j]
        tasks.append(dask.delayed(_block)(blocks[i, j], threshold, pick_rows, pick_cols, r0, c0, north[r0 : r0 + rn], east[c0 : c0 + cn]))
    out = dict(zip(keys, dask.compute(*tasks)))
    offset, total = {}, 0
    for key in keys:
        offset[key] = total
        total += out[key][0]

    def glob(key, lab):
        return np.where(lab > 0, lab + offset[key], 0)

    pairs = []
    nbi, nbj = values.numblocks
    for i in range(nbi - 1):  # horizontal borders: last row of block row i against first row of block row i + 1
        above = np.concatenate([glob((i, j), out[(i, j)][3][1]) for j in range(nbj)])
        below = np.concatenate([glob((i + 1, j), out[(i + 1, j)][3][0]) for j in range(nbj)])
        pairs.append(_touching(above, below))
    for j in range(nbj - 1):  # vertical borders
        left = np.concatenate([glob((i, j), out[(i, j)][3][3]) for i in range(nbi)])
        right = np.concatenate([glob((i, j + 1), out[(i, j + 1)][3][2]) for i in range(nbi)])
        pairs.append(_touching(left, right))
    pairs = np.concatenate(pairs, axis=0) if pairs else np.zeros((0, 2), dtype=np.int64)
    n_nodes = total + 1
    graph = coo_matrix((np.ones(len(pairs)), (pairs[:, 0], pairs[:, 1])), shape=(n_nodes, n_nodes)) if len(pairs) else coo_matrix((n_nodes, n_nodes))
    _, comp = connected_components(graph, directed=False)
    moments = np.zeros((n_nodes, 6))
    pick_region = np.full(len(pick_rows), -1, dtype=np.int64)
    for key in keys:
        k, mom, at_picks, _ = out[key]
        if k:
            moments[offset[key] + 1 : offset[key] + 1 + k] = mom
        hit = at_picks > 0
        pick_region[hit] = comp[at_picks[hit] + offset[key]]
    sums = np.zeros((comp.max() + 1, 6))
    np.add.at(sums, comp, moments)
    cell_area = abs(float(np.diff(north[:2])[0]) * float(np.diff(east[:2])[0])) if len(north) > 1 and len(east) > 1 else 0.0
    info = {}
    for rid in np.unique(pick_region[pick_region >= 0]):
        cnt, se, sn, see, sen, snn = sums[rid]
        ce, cn = se / cnt, sn / cnt
        cov = np.array([[see / cnt - ce * ce, sen / cnt - ce * cn], [sen / cnt - ce * cn, snn / cnt - cn * cn]])
        w, v = np.linalg.eigh(cov)
        w = np.clip(w, 0.0, None)
        major = v[:, 1]
        info[int(rid)] = {
            "cells": int(cnt),
            "centre": (ce, cn),
            "length_m": float(np.sqrt(12.0 * w[1])),
            "width_m": float(np.sqrt(12.0 * w[0])),
            "azimuth_deg": float(np.degrees(np.arctan2(major[0], major[1])) % 180.0),
            "area_m2": float(cnt * cell_area),
        }
    return pick_region, info


def _touching(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Label pairs of cells of two adjacent lines that touch under 8-connectivity."""
    out = []
    for shift in (-1, 0, 1):
        if shift < 0:
            x, y = a[:shift], b[-shift:]
        elif shift > 0:
            x, y = a[shift:], b[:-shift]
        else:
            x, y = a, b
        ok = (x > 0) & (y > 0)
        out.append(np.column_stack([x[ok], y[ok]]))
    return np.concatenate(out, axis=0).astype(np.int64)
