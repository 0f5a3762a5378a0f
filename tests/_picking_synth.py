"""Enhanced-grid synthetics for the picking and Euler tests (invented data).

The signal is a sum of closed-form point dipoles, induced along the main
field, their total-field anomaly and its exact gradient (Blakely 1995,
*Potential Theory in Gravity and Magnetic Applications*, ch. 4; the field is
checked against ``harmonica.dipole_magnetic`` in the tests). The noise is
white noise smoothed over about a cell (like a gridded survey's), added to
the residual; its derivatives are taken with harmonica 0.7's wavenumber
operators (``derivative_easting``/``derivative_northing`` with
``method="fft"``, ``derivative_upward``), the reference library, so the
noise's own gradient grids are known exactly and returned for reference.
"""

from __future__ import annotations

import logging

import dask.array as da
import numpy as np
import xarray as xr
from pyproj import CRS
from scipy import ndimage

import _dipole
from lodeline.model import StageContext, validate_grid
from lodeline.progress import make_progress

CRS_WKT = CRS.from_epsg(32631).to_wkt()
FIELD = (68.7, 2.0)  # inclination, grid declination, degrees
ORIGIN = (500_000.0, 5_700_000.0)


def dipole(e, n, u, source, moment_Am2, f_dir=FIELD):
    """Total-field anomaly (nT) of an induced point dipole and its gradient [d/de, d/dn, d/du] (nT/m)
    (closed form of Blakely 1995, ch. 4: see tests/_dipole.py)."""
    return _dipole.dipole(e, n, u, source, moment_Am2, f_dir, f_dir)


def lattice(ny, nx, spacing):
    return ORIGIN[0] + np.arange(nx) * spacing, ORIGIN[1] + np.arange(ny) * spacing


def noise_grids(ny, nx, spacing, sigma_nT, seed):
    """Smoothed white noise (nT) and its easting, northing, upward derivatives (nT/m) by harmonica's FFT operators."""
    import harmonica as hm

    rng = np.random.default_rng(seed)
    raw = ndimage.gaussian_filter(rng.normal(size=(ny, nx)), 1.0, mode="wrap")
    raw *= sigma_nT / raw.std()
    east, north = lattice(ny, nx, spacing)
    g = xr.DataArray(raw, coords={"northing": north, "easting": east}, dims=("northing", "easting"))
    de = np.asarray(hm.derivative_easting(g, method="fft"))
    dn = np.asarray(hm.derivative_northing(g, method="fft"))
    du = np.asarray(hm.derivative_upward(g))
    return raw, (de, dn, du)


def enhanced_grid(sources, ny=240, nx=240, spacing=0.25, noise_nT=0.0, seed=0, blank_border=0, hole=None,
                  chunks=None, grid_elevation_m=None, regional=True):
    """Enhanced-grid dataset (the enhancement stage's output conventions).

    Parameters
    ----------
    sources : list of (easting offset m, northing offset m, depth below sensors m, moment A m2)
        Offsets from :data:`ORIGIN`.
    noise_nT : float
        Standard deviation of the residual noise, nT.
    blank_border : int
        Cells blanked (NaN) along every edge.
    hole : (row0, row1, col0, col1) or None
        A blanked rectangle of cells.

    Returns
    -------
    (xarray.Dataset, dict)
        The grid and the noise-only grids {"residual", "derivatives", "total_gradient_amplitude"}.
    """
    east, north = lattice(ny, nx, spacing)
    e, n = np.meshgrid(east, north)
    up = 0.0 if grid_elevation_m is None else grid_elevation_m
    u = np.full_like(e, up)
    total = np.zeros_like(e)
    grad = [np.zeros_like(e) for _ in range(3)]
    for de, dn, depth, m in sources:
        t, g = dipole(e, n, u, (ORIGIN[0] + de, ORIGIN[1] + dn, up - depth), m)
        total += t
        for j in range(3):
            grad[j] += g[j]
    if regional:  # a smooth regional (nT), its gradient added exactly
        total += 0.02 * (e - ORIGIN[0]) - 0.01 * (n - ORIGIN[1])
        grad[0] += 0.02
        grad[1] -= 0.01
    noise, nder = noise_grids(ny, nx, spacing, noise_nT, seed) if noise_nT > 0 else (np.zeros_like(e), [np.zeros_like(e)] * 3)
    residual = total + noise
    der = [grad[j] + nder[j] for j in range(3)]
    tga = np.sqrt(der[0] ** 2 + der[1] ** 2 + der[2] ** 2)
    mask = np.ones_like(e, dtype=bool)
    if blank_border:
        b = blank_border
        mask[:b] = mask[-b:] = False
        mask[:, :b] = mask[:, -b:] = False
    if hole is not None:
        r0, r1, c0, c1 = hole
        mask[r0:r1, c0:c1] = False
    chunks = chunks or (ny, nx)

    def var(values, units):
        return (("northing", "easting"), da.from_array(np.where(mask, values, np.nan), chunks=chunks), {"units": units})

    ds = xr.Dataset(
        {
            "residual": var(residual, "nT"),
            "derivative_easting": var(der[0], "nT/m"),
            "derivative_northing": var(der[1], "nT/m"),
            "derivative_upward": var(der[2], "nT/m"),
            "total_gradient_amplitude": var(tga, "nT/m"),
            "tilt_angle": var(np.arctan2(-der[2], np.hypot(der[0], der[1])), "rad"),
            "reduced_to_pole": var(residual, "nT"),
        },
        coords={"northing": ("northing", north, {"units": "m"}), "easting": ("easting", east, {"units": "m"})},
        attrs={"crs_wkt": CRS_WKT, "main_field_nT": 49_924.0, "main_field_inclination_deg": FIELD[0],
               "main_field_grid_declination_deg": FIELD[1]},
    )
    if grid_elevation_m is not None:
        ds.attrs["grid_elevation_m"] = grid_elevation_m
    validate_grid(ds, where="test builder")
    ntga = np.sqrt(nder[0] ** 2 + nder[1] ** 2 + nder[2] ** 2)
    return ds, {"residual": noise, "derivatives": nder, "total_gradient_amplitude": ntga, "mask": mask}


def context(tmp_path):
    return StageContext(
        survey={"crs": "EPSG:32631", "crs_wkt": CRS_WKT, "name": "t"},
        inputs={},
        scratch=tmp_path,
        log=logging.getLogger("test"),
        progress=make_progress(False),
    )
