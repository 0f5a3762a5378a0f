"""Least moment found by the picking stage's matched subspace dipole detector, per cell.

The picking stage (``pick_on = "dipole_detector"``, ``steps/_picking_detector.py``)
fits, in a disc window around every cell, a point dipole of any moment at a
trial depth ``h`` plus a polynomial background to the gridded residual, and
takes the energy the dipole explains beyond the background,
``T = c_B' G_B^-1 c_B - c_A' G_A^-1 c_A`` (Scharf & Friedlander 1994,
Matched subspace detectors), divided by a noise scale measured per depth
(nT^2); the detection value is ``sqrt(T / scale)``, maximised over the
trial depths, and a pick needs it above the threshold.

For a target straight under a cell at depth ``z`` below the sensors, with
moment ``m``, the data in the window are ``y = sum_c m_c u_c`` (``u_c`` the
anomaly of a unit moment along axis ``c``, Blakely 1995, ch. 4), so the
correlations are ``c = M m`` with ``M_kc = sum over filled cells of b_k u_c``
and the statistic is the quadratic form ``T = m' Q m``,
``Q = M' G_B^-1 M - M_A' G_A^-1 M_A``. Both ``M`` and ``G`` are
correlations of the filled-cell mask with fixed kernels (``b_k u_c`` and
``b_i b_j``), computed for all cells of a tile at once by fast Fourier
transforms, so blanks and edges inside the window count exactly as they do
for the detector. Then

* worst orientation: the smallest eigenvalue of ``Q`` (no moment direction
  gives less energy);
* typical orientation: ``f' Q f`` (a moment along the main field);

and the least detectable moment is ``t sqrt(scale / q)`` at the best trial
depth. The noise is the detector's own measured scale, so the map agrees
with the picker's threshold. The value at the target's own cell is used (the
detector's maximum near a target is at least that: a conservative choice).

Resolution: the mask is averaged over blocks of ``stride`` x ``stride``
cells and the sums taken on that coarser lattice (times ``stride^2``), then
spread back to the cells. The coarse discs hold slightly more area than the
fine ones (about 1 % more energy at a 0.5 m lattice); the result is scaled
by the ratio of the fine to the coarse answer for a wholly filled window,
which removes that bias. Near a blank edge, where the answer changes fast
with position, the lattice places it up to a cell off; the tests check that
it is then never below the least full-resolution value within one cell.
:func:`least_moments` takes one depth ``z`` for a tile; the stage calls it
at the survey's mean sensor altitude plus the burial (the same for every
tile, so tiles join without seams) and scales each cell to its own altitude
by the ratio of :func:`full_window_moments` at the two depths.

References
----------
Blakely, R. J. (1995). Potential Theory in Gravity and Magnetic
    Applications. Cambridge University Press. [Blakely1995]_
Scharf, L. L. & Friedlander, B. (1994). Matched subspace detectors. IEEE
    Transactions on Signal Processing 42(8), 2146-2157. [Scharf1994]_
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass

import dask
import dask.array as da
import numpy as np
from scipy import fft as sfft

from ._dipole_model import design, field_unit_vector
from ._picking_detector import N_DIPOLE, basis

__all__ = ["DetectorSettings", "detector_settings", "least_moments", "least_moments_depths", "halo_cells", "full_window_moments", "detection_depth",
           "moments_grid"]


@dataclass(frozen=True)
class DetectorSettings:
    """The picker's detector, as configured and measured.

    Attributes
    ----------
    depths_m, radii_m, scales_nT2 : tuple of float
        Trial depths below the sensors, window radii and measured noise scales.
    order : int
        Degree of the polynomial background.
    min_fill : float
        Least filled fraction of a window.
    threshold : float
        Detection value a pick must exceed (dimensionless).
    f_hat : ndarray
        Main-field unit vector (east, north, up) in grid axes.
    """

    depths_m: tuple
    radii_m: tuple
    scales_nT2: tuple
    order: int
    min_fill: float
    threshold: float
    f_hat: np.ndarray


def _scales(meta: dict, depths) -> tuple:
    if "detector_scales_nT2" in meta:
        vals = [float(v) for v in str(meta["detector_scales_nT2"]).split(";") if v.strip()]
    else:  # the picking stage writes them inside its noise_method text
        text = str(meta.get("noise_method", ""))
        found = dict((float(a), float(b)) for a, b in re.findall(r"([0-9.]+) m: ([0-9.eE+-]+)", text))
        vals = [found.get(float(d), float("nan")) for d in depths]
    return tuple(vals)


def detector_settings(picking_params: dict, meta: dict, inclination_deg: float, grid_declination_deg: float
                      ) -> DetectorSettings:
    """Settings of the picker's detector from its parameters and its metadata table (key -> value).

    Raises
    ------
    ValueError
        When a depth has no measured noise scale (message names what to rerun).
    """
    depths = tuple(float(d) for d in picking_params["detector_depths_m"])
    radii = tuple(max(float(picking_params["detector_min_window_m"]), float(picking_params["detector_window_factor"]) * d)
                  for d in depths)
    scales = _scales(meta, depths)
    if len(scales) != len(depths) or not all(math.isfinite(s) and s > 0 for s in scales):
        raise ValueError("the picking metadata gives no positive noise scale for every detector depth; rerun picking")
    return DetectorSettings(depths, radii, scales, int(picking_params["detector_background_order"]),
                            float(picking_params["detector_min_fill"]), float(meta["threshold"]),
                            field_unit_vector(inclination_deg, grid_declination_deg))


def halo_cells(settings: DetectorSettings, spacing: tuple, stride: int) -> tuple[int, int]:
    """Halo (rows, columns) of full cells that a tile needs, a multiple of ``stride``."""
    out = []
    for sp in spacing:
        need = int(math.ceil(max(settings.radii_m) / sp)) + stride
        out.append(stride * int(math.ceil(need / stride)))
    return tuple(out)


def _kernels(settings, k, z, spacing):
    b = _basis(settings, k, spacing)
    n = b.shape[0]
    pairs = [(i, j) for i in range(n) for j in range(i, n)]
    double = np.stack([b[i] * b[j] for i, j in pairs])
    return b, _single(settings, b, z, spacing), double, pairs


def _basis(settings, k, spacing):
    return basis(settings.depths_m[k], settings.radii_m[k], spacing, settings.f_hat, settings.order)


def _single(settings, b, z, spacing):
    """Kernels ``b_k u_c``: the basis grids times the anomaly of a unit moment ``z`` below the centre."""
    ky, kx = b.shape[1] // 2, b.shape[2] // 2
    y, x = np.mgrid[-ky : ky + 1, -kx : kx + 1].astype(float)
    obs = np.column_stack([x.ravel() * spacing[1], y.ravel() * spacing[0], np.zeros(x.size)])
    u = design(obs, np.array([[0.0, 0.0, -z]]), settings.f_hat).T.reshape(3, *x.shape)
    return np.stack([b[i] * u[c] for i in range(b.shape[0]) for c in range(3)])


def _correlate(mask, kernels, f_mask=None):
    """Correlations of ``mask`` with each kernel, for the cells of ``mask`` (same shape).

    ``f_mask`` is the mask's transform at the padded shape, when the caller
    correlates the same mask with several kernel sets.
    """
    ky, kx = kernels.shape[1] // 2, kernels.shape[2] // 2
    shape = _fft_shape(mask.shape, kernels.shape[1:])
    if f_mask is None:
        f_mask = sfft.rfft2(mask, s=shape)
    f_k = sfft.rfft2(kernels[:, ::-1, ::-1], s=shape, axes=(1, 2))
    full = sfft.irfft2(f_mask[None] * f_k, s=shape, axes=(1, 2))
    return full[:, ky : ky + mask.shape[0], kx : kx + mask.shape[1]]


def _fft_shape(mask_shape, kernel_shape):
    return tuple(sfft.next_fast_len(s + g - 1, real=True) for s, g in zip(mask_shape, kernel_shape))


def least_moments(filled: np.ndarray, z_m: float, settings: DetectorSettings, spacing: tuple, stride: int,
                  halo: tuple) -> np.ndarray:
    """Least detectable moments (2, ny, nx) of a tile's own cells: worst and typical orientation, A m^2.

    Parameters
    ----------
    filled : ndarray of bool (ny + 2 halo_y, nx + 2 halo_x)
        Filled (non-blank) cells of the tile and its halo (off-grid cells false).
    z_m : float
        Depth of the target below the sensors, m.
    spacing : (float, float)
        Cell sizes (northing, easting), m.
    stride : int
        Block size of the coarser lattice.
    halo : (int, int)
        Halo cells on each side, multiples of ``stride``.

    Returns
    -------
    ndarray
        NaN where the cell is blank or no trial depth's window is filled enough.
    """
    return least_moments_depths(filled, (z_m,), settings, spacing, stride, halo)[0]


def least_moments_depths(filled: np.ndarray, depths_m, settings: DetectorSettings, spacing: tuple, stride: int,
                         halo: tuple) -> list:
    """:func:`least_moments` for several target depths at once, one (2, ny, nx) array per depth.

    The mask's transform, its correlations with the products of the basis
    grids (``G``, which do not depend on the target's depth) and the
    factorisations that use them are computed once for all depths.
    """
    hy, hx = halo
    ny, nx = filled.shape[0] - 2 * hy, filled.shape[1] - 2 * hx
    depths_m = [float(z) for z in depths_m]
    outs = [np.full((2, ny, nx), np.nan) for _ in depths_m]
    own = filled[hy : hy + ny, hx : hx + nx]
    valid = [math.isfinite(z) and z > 0 for z in depths_m]
    if not own.any() or not any(valid):
        return outs
    sy, sx = -(-filled.shape[0] // stride) * stride, -(-filled.shape[1] // stride) * stride
    padded = np.zeros((sy, sx))
    padded[: filled.shape[0], : filled.shape[1]] = filled
    coarse = padded.reshape(sy // stride, stride, sx // stride, stride).mean(axis=(1, 3))
    cspacing = (spacing[0] * stride, spacing[1] * stride)
    # the coarse cells holding the tile's own cells
    c0y, c0x = hy // stride, hx // stride
    cny, cnx = -(-ny // stride), -(-nx // stride)
    zs = [z for z, ok in zip(depths_m, valid) if ok]
    best = np.full((len(zs), 2, cny, cnx), np.inf)
    f = settings.f_hat
    for k in range(len(settings.depths_m)):
        b = _basis(settings, k, cspacing)
        n = b.shape[0]
        pairs = [(i, j) for i in range(n) for j in range(i, n)]
        double = np.stack([b[i] * b[j] for i, j in pairs])
        f_mask = sfft.rfft2(coarse, s=_fft_shape(coarse.shape, b.shape[1:]))
        full_weight = float((b[N_DIPOLE] ** 2).sum())
        g_flat = _correlate(coarse, double, f_mask)[:, c0y : c0y + cny, c0x : c0x + cnx]
        fill = g_flat[pairs.index((N_DIPOLE, N_DIPOLE))] / full_weight
        use = fill >= settings.min_fill
        if not use.any():
            continue
        idx = np.nonzero(use)
        gram = np.empty((idx[0].size, n, n))
        for p, (i, j) in enumerate(pairs):
            gram[:, i, j] = g_flat[p][idx]
            gram[:, j, i] = g_flat[p][idx]
        del g_flat
        # the correlations with b_k u_c for every depth, solved against G and its background block at once
        mm = np.concatenate([_correlate(coarse, _single(settings, b, z, cspacing), f_mask)[:, c0y : c0y + cny,
                                                                                          c0x : c0x + cnx]
                             [:, idx[0], idx[1]].T.reshape(-1, n, 3) for z in zs], axis=2)  # (cells, n, 3 depths)
        bg = slice(N_DIPOLE, n)
        try:
            q_all = np.einsum("mki,mkj->mij", mm, np.linalg.solve(gram, mm))
            q_all -= np.einsum("mki,mkj->mij", mm[:, bg], np.linalg.solve(gram[:, bg, bg], mm[:, bg]))
        except np.linalg.LinAlgError:
            continue
        for d in range(len(zs)):
            q = q_all[:, 3 * d : 3 * d + 3, 3 * d : 3 * d + 3]
            q = 0.5 * (q + np.transpose(q, (0, 2, 1))) * stride * stride
            worst = np.linalg.eigvalsh(q)[:, 0]
            typical = np.einsum("i,mij,j->m", f, q, f)
            with np.errstate(invalid="ignore", divide="ignore"):
                for o, val in enumerate((worst, typical)):
                    moment = settings.threshold * np.sqrt(settings.scales_nT2[k] / np.where(val > 0, val, np.nan))
                    moment = np.where(np.isfinite(moment), moment, np.inf)
                    best[d, o][idx] = np.minimum(best[d, o][idx], moment)
    best[~np.isfinite(best)] = np.nan
    found = iter(range(len(zs)))
    for out, z, ok in zip(outs, depths_m, valid):
        if not ok:
            continue
        one = best[next(found)]
        if stride > 1:
            # the coarse lattice's discs hold a little more area than the cells' own:
            # scale by the wholly-filled-window ratio of the fine to the coarse sums
            exact = full_window_moments(settings, z, spacing)
            rough = full_window_moments(settings, z, cspacing)
            for o in range(2):
                if math.isfinite(exact[o]) and math.isfinite(rough[o]) and rough[o] > 0:
                    one[o] *= exact[o] / (rough[o] / stride)
        fine = np.repeat(np.repeat(one, stride, axis=1), stride, axis=2)[:, :ny, :nx]
        out[:] = np.where(own[None], fine, np.nan)
    return outs


def full_window_moments(settings: DetectorSettings, z_m: float, spacing: tuple) -> tuple[float, float]:
    """Least detectable moments (worst, typical; A m^2) of a target ``z_m`` below a wholly filled window.

    The same statistic as :func:`least_moments` with every cell of every
    trial window filled (direct sums over the disc, no transforms).
    """
    best = [math.inf, math.inf]
    f = settings.f_hat
    for k in range(len(settings.depths_m)):
        b, single, double, pairs = _kernels(settings, k, z_m, spacing)
        n = b.shape[0]
        gram = np.empty((n, n))
        for p, (i, j) in enumerate(pairs):
            gram[i, j] = gram[j, i] = double[p].sum()
        mm = single.sum(axis=(1, 2)).reshape(n, 3)
        bg = slice(N_DIPOLE, n)
        q = mm.T @ np.linalg.solve(gram, mm) - mm[bg].T @ np.linalg.solve(gram[bg, bg], mm[bg])
        q = 0.5 * (q + q.T)
        for o, val in enumerate((np.linalg.eigvalsh(q)[0], f @ q @ f)):
            if val > 0:
                best[o] = min(best[o], settings.threshold * math.sqrt(settings.scales_nT2[k] / val))
    return best[0], best[1]


def detection_depth(settings: DetectorSettings, moment_Am2: float, spacing: tuple, orientation: str = "worst") -> float:
    """Largest depth below a wholly filled window at which ``moment_Am2`` is detected, m (NaN if not at 0.1 m).

    Found by bisection on the depth (the least moment grows with depth).
    """
    o = 0 if orientation == "worst" else 1

    def ok(z):
        return full_window_moments(settings, z, spacing)[o] <= moment_Am2

    lo, hi = 0.1, 0.2
    if not ok(lo):
        return float("nan")
    while ok(hi):
        lo, hi = hi, hi * 2.0
        if hi > 200.0:
            return hi
    for _ in range(40):
        mid = 0.5 * (lo + hi)
        lo, hi = (mid, hi) if ok(mid) else (lo, mid)
        if hi - lo < 1e-3:
            break
    return lo


def _tile(filled, near, *, settings, spacing, stride, halo, burials, z_ref, z_grid, full):
    """Detector least moments (2 per burial, stacked) of one tile.

    The window sums are taken once per burial at the survey's reference depth
    ``z_ref[b]`` (the same for every tile, so tiles join without seams); each
    cell is then scaled to its own depth (its sensor altitude plus the
    burial) by the ratio of the wholly-filled-window answers ``full`` (worst,
    typical) tabulated on ``z_grid``.
    """
    h = near[1]
    out, unique = [], list(dict.fromkeys(burials))
    done = dict(zip(unique, least_moments_depths(filled, [z_ref[b] for b in unique], settings, spacing, stride, halo)))
    for b in burials:
        base = done[b]
        z = h + b
        for o in range(2):
            ratio = np.exp(np.interp(np.log(np.clip(z, z_grid[0], z_grid[-1])), np.log(z_grid), np.log(full[o]))
                           - np.interp(np.log(z_ref[b]), np.log(z_grid), np.log(full[o])))
            out.append(np.where(np.isfinite(h), base[o] * ratio, np.nan))
    return np.stack(out).astype(np.float64)


def moments_grid(filled, near, settings: DetectorSettings, spacing: tuple, burials, altitude: float, alt_range: tuple,
                 lattice_m: float = 0.5):
    """Dask array (2 len(burials), ny, nx) of the detector's least moments (A m^2), one task per tile with a halo.

    Parameters
    ----------
    filled : dask.array.Array of bool (ny, nx)
        Filled cells of the grid.
    near : dask.array.Array (2, ny, nx)
        Horizontal distance to and sensor altitude of the nearest reading, m.
    burials : tuple of float
        Burial depths below the seabed, m: two layers (worst, typical) each.
    altitude : float
        The survey's mean sensor altitude, m (the reference depth is it plus the burial).
    alt_range : (float, float)
        Least and largest sensor altitudes, m.
    lattice_m : float
        Cell of the coarser lattice of the sums, m.

    Returns
    -------
    (dask.array.Array, int)
        The layers and the stride used.
    """
    cell = min(spacing)
    stride = max(1, int(round(lattice_m / cell)))
    halo = halo_cells(settings, spacing, stride)
    z_ref = {b: altitude + b for b in burials}
    lo, hi = alt_range
    z_lo = max(0.2, lo + min(burials))
    z_grid = np.geomspace(z_lo, max(z_lo * 1.01, hi + max(burials)), 24)
    full = np.array([full_window_moments(settings, z, spacing) for z in z_grid]).T
    padded = da.overlap.overlap(filled, depth={0: halo[0], 1: halo[1]}, boundary=False)
    fb, nb = padded.to_delayed(), near.to_delayed()
    layers = 2 * len(burials)
    rows = []
    for i, ny in enumerate(filled.chunks[0]):
        row = []
        for j, nx in enumerate(filled.chunks[1]):
            task = dask.delayed(_tile, pure=True)(
                fb[i, j], nb[0, i, j], settings=settings, spacing=spacing, stride=stride, halo=halo, burials=burials,
                z_ref=z_ref, z_grid=z_grid, full=full)
            row.append(da.from_delayed(task, shape=(layers, ny, nx), dtype=np.float64))
        rows.append(row)
    return da.block(rows), stride
