"""Matched subspace detector of point dipoles on the gridded residual.

For every cell the residual within a disc of radius ``R`` around it is fitted
by least squares with the total-field anomaly of a point dipole of any
moment (three unknown components: east, north, up) at depth ``h`` below the
grid's sensor plane directly under the cell, plus a plane background
(constant and two slopes). The detection statistic is the part of the
residual's energy that the dipole explains beyond the background alone::

    T = c_B' G_B^-1 c_B  -  c_A' G_A^-1 c_A

where ``B`` holds the six basis grids (three dipole components, three
background terms), ``A`` the background alone, ``c = B' y`` their
correlations with the data and ``G = B' B`` their Gram matrix over the
cells of the window that are not blank. This is the generalised likelihood
ratio test of a signal in a known subspace against a background subspace
(Scharf & Friedlander 1994, Matched subspace detectors): under white
Gaussian noise of variance ``s^2`` alone, ``T / s^2`` follows a chi-squared
law with three degrees of freedom whatever the dipole's direction, so
induced and remanent items are found alike. The dipole anomaly is the closed
form of Blakely (1995, Potential Theory in Gravity and Magnetic
Applications, ch. 4) in ``_dipole_model.design``.

Correlations and Gram matrices are computed for all cells at once as
cross-correlations with the basis grids (the 6 data correlations and the 21
distinct products of basis grids with the mask of valid cells) by fast
Fourier transforms of each haloed tile, so blanks and survey edges are
handled exactly: no cell is filled in. Cells whose window is less than
``min_fill`` full are left blank.

Gridded cells are not independent (the gridder interpolates), so the noise
scale is measured, not assumed: ``T`` divided by its median over the
survey's cells (most cells hold no item) and multiplied by the median of the
chi-squared law with three degrees of freedom, 2.366 (computed with
``scipy.stats.chi2``). The detection value is ``sqrt`` of that, a
signal-to-noise ratio of the whole anomaly; several depths are tried and the
largest value kept with its depth.
"""

from __future__ import annotations

import math

import dask.array as da
import numpy as np
from scipy import fft as sfft
from scipy import stats

from ._dipole_model import design

__all__ = ["basis", "tile_statistic", "statistic_grid", "normalise", "CHI2_3_MEDIAN"]

CHI2_3_MEDIAN = float(stats.chi2(3).median())
N_DIPOLE = 3


def basis(depth_m: float, radius_m: float, spacing: tuple[float, float], f_hat: np.ndarray, order: int = 2) -> np.ndarray:
    """Basis grids on the window: array (3 + nb, 2k+1, 2l+1), rows then columns from south-west.

    The three dipole grids are nT per A m^2 (unit moment east, north, up at
    ``depth_m`` below the centre cell); the ``nb`` background grids are the
    monomials of the east and north offsets over ``radius_m`` up to degree
    ``order`` (1, x, y for a plane; and x^2, xy, y^2 for order 2). Outside
    the disc all are 0.
    """
    dy, dx = spacing
    ky, kx = int(math.ceil(radius_m / dy)), int(math.ceil(radius_m / dx))
    y, x = np.mgrid[-ky : ky + 1, -kx : kx + 1].astype(float)
    y *= dy
    x *= dx
    inside = x * x + y * y <= radius_m * radius_m * (1 + 1e-9)
    obs = np.column_stack([x.ravel(), y.ravel(), np.zeros(x.size)])
    dip = design(obs, np.array([[0.0, 0.0, -depth_m]]), f_hat).T.reshape(3, *x.shape)
    u, v = x / radius_m, y / radius_m
    back = [u**i * v**j for d in range(order + 1) for i in range(d, -1, -1) for j in [d - i]]
    out = np.concatenate([dip, np.stack(back)])
    return out * inside[None]


class _Plan:
    """Fourier transforms of the flipped basis grids and their products, for one padded shape."""

    def __init__(self, grids: np.ndarray, shape: tuple[int, int]):
        self.k = (grids.shape[1] // 2, grids.shape[2] // 2)
        self.shape = tuple(sfft.next_fast_len(s + g - 1, real=True) for s, g in zip(shape, grids.shape[1:]))
        flipped = grids[:, ::-1, ::-1]
        n = len(grids)
        self.pairs = [(i, j) for i in range(n) for j in range(i, n)]
        self.f_single = sfft.rfft2(flipped, s=self.shape, axes=(1, 2))
        prods = np.stack([flipped[i] * flipped[j] for i, j in self.pairs])
        self.f_pairs = sfft.rfft2(prods, s=self.shape, axes=(1, 2))

    def correlate(self, f_in: np.ndarray, f_kernels: np.ndarray, out_shape) -> np.ndarray:
        full = sfft.irfft2(f_in[None] * f_kernels, s=self.shape, axes=(1, 2))
        ky, kx = self.k
        return full[:, ky : ky + out_shape[0], kx : kx + out_shape[1]]


def tile_statistic(block: np.ndarray, grids: np.ndarray, min_fill: float, plans: dict | None = None) -> np.ndarray:
    """Detection statistic ``T`` (nT^2) of one tile (with its halo), NaN where blank or too empty."""
    ok = np.isfinite(block)
    out = np.full(block.shape, np.nan)
    if not ok.any():
        return out
    key = block.shape
    plans = {} if plans is None else plans
    if key not in plans:
        plans[key] = _Plan(grids, block.shape)
    plan = plans[key]
    mask = ok.astype(float)
    y = np.where(ok, block, 0.0)
    # remove the tile's median so the constant term carries little (better conditioning)
    y = np.where(ok, y - np.median(block[ok]), 0.0)
    f_mask = sfft.rfft2(mask, s=plan.shape)
    f_y = sfft.rfft2(y, s=plan.shape)
    c = plan.correlate(f_y, plan.f_single, block.shape)  # (6, ny, nx)
    g_flat = plan.correlate(f_mask, plan.f_pairs, block.shape)  # (21, ny, nx)
    n = grids.shape[0]
    full_weight = float((grids[N_DIPOLE] ** 2).sum())  # cells in the disc
    fill = g_flat[plan.pairs.index((N_DIPOLE, N_DIPOLE))] / full_weight
    use = ok & (fill >= min_fill)
    if not use.any():
        return out
    idx = np.nonzero(use)
    gram = np.empty((len(idx[0]), n, n))
    for p, (i, j) in enumerate(plan.pairs):
        v = g_flat[p][idx]
        gram[:, i, j] = v
        gram[:, j, i] = v
    cv = c[:, idx[0], idx[1]].T  # (m, 6)
    bg = slice(N_DIPOLE, n)
    try:
        full = np.einsum("mi,mi->m", cv, np.linalg.solve(gram, cv[..., None])[..., 0])
        back = np.einsum("mi,mi->m", cv[:, bg], np.linalg.solve(gram[:, bg, bg], cv[:, bg, None])[..., 0])
    except np.linalg.LinAlgError:
        full = np.full(len(cv), np.nan)
        back = np.zeros(len(cv))
        for m in range(len(cv)):
            try:
                full[m] = cv[m] @ np.linalg.solve(gram[m], cv[m])
                back[m] = cv[m, bg] @ np.linalg.solve(gram[m][bg, bg], cv[m, bg])
            except np.linalg.LinAlgError:
                pass
    out[idx] = np.maximum(full - back, 0.0)
    return out


def statistic_grid(residual: da.Array, depth_m: float, radius_m: float, spacing, f_hat, min_fill: float, order: int = 2) -> da.Array:
    """Lazy grid of ``T`` for one depth, tile by tile with a halo of the window radius."""
    grids = basis(depth_m, radius_m, spacing, f_hat, order)
    halo = (grids.shape[1] // 2 + 1, grids.shape[2] // 2 + 1)
    chunks = tuple(c if len(c) == 1 or min(c) >= h else _even(c, h) for c, h in zip(residual.chunks, halo))
    arr = residual.rechunk(chunks)
    depth = {a: (halo[a] if len(arr.chunks[a]) > 1 else 0) for a in (0, 1)}
    plans: dict = {}

    def work(block):
        return tile_statistic(block, grids, min_fill, plans)

    if any(depth.values()):
        return arr.map_overlap(work, depth=depth, boundary=np.nan, dtype=float, trim=True)
    return arr.map_blocks(work, dtype=float)


def _even(chunks, minimum):
    total = sum(chunks)
    n = max(1, total // max(minimum, max(chunks)))
    size = int(math.ceil(total / n))
    out = [size] * (total // size) + ([total % size] if total % size else [])
    if len(out) > 1 and out[-1] < minimum:
        out[-2] += out.pop()
    return tuple(out)


def normalise(stat: da.Array, max_cells: int) -> tuple[da.Array, float]:
    """Detection value ``sqrt(T chi2_3_median / median(T))`` and the noise scale ``median(T) / chi2_3_median`` (nT^2)."""
    from ._picking_maxima import subsample

    sample = subsample(stat, max_cells)
    sample = sample[np.isfinite(sample)]
    if sample.size == 0:
        return stat, float("nan")
    scale = float(np.median(sample)) / CHI2_3_MEDIAN
    if not scale > 0:
        return stat, float("nan")
    return da.sqrt(stat / scale), scale
