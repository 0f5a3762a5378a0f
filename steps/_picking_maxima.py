"""Tile-by-tile local maxima of a grid and a robust noise level measured from the grid.

Local maxima
    A cell is a candidate when it is finite, above the threshold, at least
    ``edge_margin_m`` from every blank (NaN) cell and from the grid edge, and
    not smaller than any finite cell within ``min_separation_m`` (a disc).
    Each tile is worked with a halo of its neighbours at least as wide as
    the larger of the two distances (``dask.array.overlap`` padding the
    survey edge with NaN), so a tile sees everything a cell's test needs and
    the tiles' answers join without seams. Only the small list of
    candidates of each tile is brought back. Plateaus may give several cells
    of the same value; :func:`merge_by_separation` keeps the highest (the
    first in grid order among equals) of any candidates closer than the
    minimum separation (a greedy non-maximum suppression, common practice,
    no published source).

Noise level
    The median absolute deviation scaled by 1.4826, an estimator of the
    standard deviation of Gaussian noise that ignores up to half the cells
    being signal (Rousseeuw & Croux 1993, Alternatives to the median
    absolute deviation), taken over a regular subsample of at most
    ``max_cells`` cells (strided slicing of the dask grid, so memory stays
    bounded on any survey size).

    * For the total gradient amplitude, the robust standard deviations of
      the three derivative grids (easting, northing, upward) are combined as
      ``sqrt(s_e**2 + s_n**2 + s_u**2)``: the root mean square of the total
      gradient amplitude of the noise alone (the amplitude is the norm of
      those three components; Roest, Verhoef & Pilkington 1992).
    * For the absolute residual, the residual is high-passed by subtracting
      its mean over a square box of ``n`` cells; for white noise that
      leaves a variance ``s**2 (1 - 1/n)``, which is divided out.
"""

from __future__ import annotations

import math

import dask
import dask.array as da
import numpy as np
from scipy import ndimage
from scipy.spatial import cKDTree

__all__ = ["robust_sigma", "subsample", "gradient_noise", "residual_noise", "tile_maxima", "merge_by_separation"]

MAD_TO_SIGMA = 1.4826  # 1 / Phi^-1(3/4), Rousseeuw & Croux 1993


def robust_sigma(values: np.ndarray) -> float:
    """1.4826 x median absolute deviation of the finite values (NaN when none)."""
    v = np.asarray(values, dtype=float).ravel()
    v = v[np.isfinite(v)]
    if v.size == 0:
        return float("nan")
    return float(MAD_TO_SIGMA * np.median(np.abs(v - np.median(v))))


def subsample(array, max_cells: int) -> np.ndarray:
    """A regular strided subsample of a 2-D (dask or numpy) array with at most about ``max_cells`` cells."""
    ny, nx = array.shape
    step = max(1, int(math.ceil(math.sqrt(ny * nx / max(1, max_cells)))))
    part = array[::step, ::step]
    return np.asarray(part.compute() if isinstance(part, da.Array) else part, dtype=float)


def gradient_noise(derivatives, max_cells: int) -> tuple[float, list[float]]:
    """Robust noise of the total gradient amplitude from its three derivative grids, nT/m.

    Returns the combined level and the three component levels.
    """
    parts = [robust_sigma(subsample(d, max_cells)) for d in derivatives]
    return float(math.sqrt(sum(p * p for p in parts))), parts


def residual_noise(residual, box_cells: int, max_cells: int) -> float:
    """Robust noise of the residual after a box high-pass of ``box_cells`` a side, nT.

    The box mean is taken tile by tile with a halo (``map_overlap``), NaN
    cells left out of the mean.
    """
    half = box_cells // 2
    size = 2 * half + 1

    def highpass(block):
        ok = np.isfinite(block)
        filled = np.where(ok, block, 0.0)
        total = ndimage.uniform_filter(filled, size=size, mode="constant")
        count = ndimage.uniform_filter(ok.astype(float), size=size, mode="constant")
        with np.errstate(invalid="ignore", divide="ignore"):
            mean = total / count
        full = count > 1.0 - 1e-9  # only cells whose whole box is finite
        return np.where(ok & full, block - mean, np.nan)

    arr = residual if isinstance(residual, da.Array) else da.from_array(np.asarray(residual, dtype=float))
    depth = {a: (half if len(arr.chunks[a]) > 1 else 0) for a in (0, 1)}
    hp = arr.map_overlap(highpass, depth=depth, boundary=np.nan, dtype=float) if any(depth.values()) else arr.map_blocks(highpass, dtype=float)
    n = size * size
    return robust_sigma(subsample(hp, max_cells)) / math.sqrt(1.0 - 1.0 / n)


def _disc(radius_cells: tuple[float, float]) -> np.ndarray:
    ry, rx = radius_cells
    iy, ix = int(math.floor(ry)), int(math.floor(rx))
    y, x = np.mgrid[-iy : iy + 1, -ix : ix + 1]
    return (y / max(ry, 1e-12)) ** 2 + (x / max(rx, 1e-12)) ** 2 <= 1.0 + 1e-9


def _tile_candidates(values, threshold, footprint, margin_m, spacing, origin, halo, shape, *extras):
    """Candidates of one haloed tile: array (k, 3 + len(extras)) of global row, column, value, peak |extra|..."""
    ok = np.isfinite(values)
    filled = np.where(ok, values, -np.inf)
    local_max = ndimage.maximum_filter(filled, footprint=footprint, mode="constant", cval=-np.inf)
    # distance (m) to the nearest blank or off-grid cell (the halo pads the edge with NaN)
    dist = ndimage.distance_transform_edt(ok, sampling=spacing) if margin_m else np.full(values.shape, np.inf)
    keep = ok & (values >= local_max) & (values > threshold) & (dist >= margin_m)
    # only the tile's own cells (not the halo) report
    own = np.zeros_like(keep)
    own[halo[0] : values.shape[0] - halo[0], halo[1] : values.shape[1] - halo[1]] = True
    rows, cols = np.nonzero(keep & own)
    grow = rows - halo[0] + origin[0]
    gcol = cols - halo[1] + origin[1]
    columns = [grow, gcol, values[rows, cols]]
    for extra in extras:
        peak = ndimage.maximum_filter(np.where(np.isfinite(extra), np.abs(extra), -np.inf), footprint=footprint, mode="constant", cval=-np.inf)
        columns.append(peak[rows, cols])
    return np.column_stack(columns).reshape(-1, 3 + len(extras)).astype(float)


def tile_maxima(values, extras, threshold: float, spacing: tuple[float, float], min_separation_m: float, edge_margin_m: float):
    """Local maxima of a 2-D grid, tile by tile.

    Parameters
    ----------
    values : dask.array.Array (ny, nx)
        The grid searched (nT/m or nT), NaN where blank.
    extras : list of dask.array.Array (ny, nx)
        Grids (the residual, the total gradient amplitude...) whose largest
        magnitude within ``min_separation_m`` of each candidate is reported.
    threshold : float
        Candidates must exceed this (units of ``values``).
    spacing : (float, float)
        Cell sizes along (northing, easting), m, positive.
    min_separation_m, edge_margin_m : float
        Radius of the maximum test and least distance to a blank or the edge, m.

    Returns
    -------
    numpy.ndarray (k, 3 + len(extras))
        Row, column, value and the peak magnitude of each extra grid, per candidate.
    """
    dy, dx = spacing
    radius = (max(min_separation_m / dy, 0.0), max(min_separation_m / dx, 0.0))
    footprint = _disc(radius)
    halo = tuple(int(math.ceil(max(r, edge_margin_m / s))) + 1 for r, s in zip(radius, (dy, dx)))
    values = values if isinstance(values, da.Array) else da.from_array(np.asarray(values, dtype=float))
    # a dask overlap needs every tile at least as large as its halo
    chunks = tuple(c if len(c) == 1 or all(n >= h for n in c) else _merge_small(c, h) for c, h in zip(values.chunks, halo))
    arrays = [values] + [e if isinstance(e, da.Array) else da.from_array(np.asarray(e, dtype=float)) for e in extras]
    padded = [da.overlap.overlap(a.rechunk(chunks), depth={0: halo[0], 1: halo[1]}, boundary=np.nan) for a in arrays]
    starts = [np.cumsum((0,) + tuple(c[:-1])) for c in chunks]
    blocks = [p.to_delayed() for p in padded]
    tasks = []
    for i, j in np.ndindex(padded[0].numblocks):
        tasks.append(
            dask.delayed(_tile_candidates)(
                blocks[0][i, j], threshold, footprint, edge_margin_m, (dy, dx), (starts[0][i], starts[1][j]), halo,
                values.shape, *[b[i, j] for b in blocks[1:]]
            )
        )
    parts = dask.compute(*tasks)
    return np.concatenate(parts, axis=0) if parts else np.zeros((0, 3 + len(extras)))


def _merge_small(chunks: tuple[int, ...], minimum: int) -> tuple[int, ...]:
    out: list[int] = []
    for c in chunks:
        if out and out[-1] < minimum:
            out[-1] += c
        else:
            out.append(c)
    if len(out) > 1 and out[-1] < minimum:
        out[-2] += out.pop()
    return tuple(out)


def merge_by_separation(xy: np.ndarray, value: np.ndarray, min_separation_m: float) -> np.ndarray:
    """Indices kept by greedy suppression: highest first, dropping any closer than ``min_separation_m``."""
    n = len(value)
    if n == 0:
        return np.zeros(0, dtype=int)
    order = np.lexsort((np.arange(n), -np.asarray(value)))
    tree = cKDTree(xy)
    alive = np.ones(n, dtype=bool)
    kept = []
    for k in order:
        if not alive[k]:
            continue
        kept.append(k)
        for other in tree.query_ball_point(xy[k], r=min_separation_m * (1 - 1e-9)):
            alive[other] = False
    return np.sort(np.array(kept, dtype=int))
