"""IGRF-14 main-field vector at given points and times (helper of the main_field stage).

The International Geomagnetic Reference Field (IGRF) is a spherical-harmonic
model of the core field to degree 13, published by IAGA as Gauss
coefficients every five years from 1900 (Alken et al. 2021 describe the
13th generation and the method; the 14th generation, IGRF-14, carries the
coefficients to 2025 and a secular-variation forecast to 2030). The
coefficients are evaluated with the general-purpose library ``ppigrf``
(Laundal, pure-Python IGRF, MIT licence), which ships the IAGA coefficient
file ``IGRF14.shc`` and converts geodetic (WGS84) positions and components
to and from geocentric ones.

Time
    Between two of the coefficient file's epochs (every five years) each
    coefficient is linear in the decimal year (Alken et al. 2021), and the
    field components are linear in the coefficients, so they are linear in
    the decimal year as well. ``ppigrf`` takes one list of dates for all
    points (and interpolates in elapsed time, which differs from decimal
    years by up to about 0.6 day within a five-year interval); to give each
    point its own time this module evaluates the components at the two
    epochs that bracket it and interpolates linearly in the decimal year
    between them. That is the IAGA definition, exact to rounding, and costs
    two evaluations per point whatever the number of distinct times.

References
----------
Alken, P., et al. (2021). International Geomagnetic Reference Field: the
    thirteenth generation. Earth, Planets and Space 73, 49.
IAGA Working Group V-MOD (2024). IGRF-14 coefficients, doi
    10.5281/zenodo.14012302 (as named in the header of ``IGRF14.shc``).
Laundal, K. M. ppigrf: pure Python IGRF (software, MIT licence).
"""

from __future__ import annotations

import functools
from pathlib import Path

import numpy as np

import ppigrf
from ppigrf import ppigrf as _ppigrf_module

__all__ = [
    "MODEL_NAME",
    "coefficient_file",
    "model_epochs",
    "coverage",
    "decimal_year",
    "from_decimal_year",
    "field_components",
    "total_field",
    "total_field_product",
    "inclination_declination",
]

#: Name of the model, as written into the outputs.
MODEL_NAME = "IGRF-14"

#: Points handed to ppigrf at once (it builds several arrays of 390 columns
#: per point, so 10 000 points take about 30 MB each).
_BATCH = 10_000


@functools.lru_cache(maxsize=1)
def coefficient_file() -> Path:
    """The IGRF-14 coefficient file shipped with ppigrf.

    Raises
    ------
    RuntimeError
        When the installed ppigrf carries no IGRF-14 file (upgrade ppigrf).
    """
    path = Path(getattr(_ppigrf_module, "shc_fn_igrf14", Path(ppigrf.__file__).parent / "IGRF14.shc"))
    if not path.is_file():
        raise RuntimeError(f"ppigrf carries no IGRF-14 coefficient file ({path}): upgrade ppigrf")
    with path.open() as handle:
        first = handle.readline()
    if "14" not in first:
        raise RuntimeError(f"{path} does not look like the IGRF-14 file (header {first.strip()!r})")
    return path


@functools.lru_cache(maxsize=1)
def model_epochs() -> np.ndarray:
    """The epochs of the coefficient file, datetime64[ns] (1900-01-01 ... 2030-01-01)."""
    g, _ = _ppigrf_module.read_shc(str(coefficient_file()))
    return np.asarray(g.index.values, dtype="datetime64[ns]")


def coverage() -> tuple[np.datetime64, np.datetime64]:
    """First and last instant the model covers, datetime64[ns]."""
    epochs = model_epochs()
    return epochs[0], epochs[-1]


def decimal_year(time) -> np.ndarray:
    """Decimal year of each time: year + elapsed fraction of that year (UTC).

    Parameters
    ----------
    time : array of datetime64
        Times; NaT gives NaN.
    """
    t = np.asarray(time, dtype="datetime64[ns]")
    year = t.astype("datetime64[Y]")
    start = year.astype("datetime64[ns]").astype(np.int64)
    stop = (year + np.timedelta64(1, "Y")).astype("datetime64[ns]").astype(np.int64)
    out = year.astype(np.int64) + 1970 + (t.astype(np.int64) - start) / (stop - start)
    return np.where(np.isnat(t), np.nan, out)


def from_decimal_year(years) -> np.ndarray:
    """Inverse of :func:`decimal_year`: times (datetime64[ns], to the nearest ns) of decimal years."""
    years = np.asarray(years, dtype=np.float64)
    whole = np.floor(years).astype(np.int64)
    start = (whole - 1970).astype("datetime64[Y]").astype("datetime64[ns]").astype(np.int64)
    stop = (whole - 1969).astype("datetime64[Y]").astype("datetime64[ns]").astype(np.int64)
    return (start + np.round((years - whole) * (stop - start)).astype(np.int64)).astype("datetime64[ns]")


def _epoch_interval(years: np.ndarray) -> np.ndarray:
    """Index ``k`` of the epoch interval [epoch k, epoch k+1] holding each decimal year."""
    edges = decimal_year(model_epochs())
    k = np.searchsorted(edges, years, side="right") - 1
    return np.clip(k, 0, edges.size - 2)


def _at_epochs(lon: np.ndarray, lat: np.ndarray, height_km: np.ndarray, k: int) -> np.ndarray:
    """Components (east, north, up) at epochs k and k+1, shape (3, 2, n), nT."""
    epochs = model_epochs()
    dates = [epochs[k], epochs[k + 1]]
    out = np.empty((3, 2, lon.size))
    for lo in range(0, lon.size, _BATCH):
        hi = min(lo + _BATCH, lon.size)
        be, bn, bu = ppigrf.igrf(lon[lo:hi], lat[lo:hi], height_km[lo:hi], dates, coeff_fn=str(coefficient_file()))
        out[0, :, lo:hi] = be
        out[1, :, lo:hi] = bn
        out[2, :, lo:hi] = bu
    return out


def field_components(lon, lat, height_m, time) -> np.ndarray:
    """IGRF-14 field vector at each point at its own time.

    Parameters
    ----------
    lon, lat : array of float
        Geodetic (WGS84) longitude east and latitude, degrees.
    height_m : array of float
        Height above the WGS84 ellipsoid, metres.
    time : array of datetime64
        Time of each point (UTC), within :func:`coverage`.

    Returns
    -------
    ndarray, shape (3, n)
        East, north and up components, nT (geodetic frame).

    Raises
    ------
    ValueError
        When a time lies outside the model's years (the stage checks this
        first and raises a DataError naming the reading).
    """
    lon, lat, height_m, t = np.broadcast_arrays(
        np.asarray(lon, dtype=np.float64),
        np.asarray(lat, dtype=np.float64),
        np.asarray(height_m, dtype=np.float64),
        np.asarray(time, dtype="datetime64[ns]"),
    )
    shape = lon.shape
    lon, lat, height_m, t = (a.ravel() for a in (lon, lat, height_m, t))
    if np.any(np.isnat(t)) or np.any((t < coverage()[0]) | (t > coverage()[1])):
        raise ValueError(f"times must lie within {MODEL_NAME}'s years {coverage()[0]} to {coverage()[1]}")
    years = decimal_year(t)
    edges = decimal_year(model_epochs())
    k_all = _epoch_interval(years)
    out = np.empty((3, lon.size))
    for k in np.unique(k_all):
        sel = np.flatnonzero(k_all == k)
        both = _at_epochs(lon[sel], lat[sel], height_m[sel] / 1000.0, int(k))
        w = (years[sel] - edges[k]) / (edges[k + 1] - edges[k])
        out[:, sel] = both[:, 0, :] + w * (both[:, 1, :] - both[:, 0, :])
    return out.reshape((3,) + shape)


def total_field(lon, lat, height_m, time) -> np.ndarray:
    """IGRF-14 total field (magnitude of :func:`field_components`), nT."""
    b = field_components(lon, lat, height_m, time)
    return np.sqrt(np.sum(b * b, axis=0))


def total_field_product(lon, lat, height_m, years) -> np.ndarray:
    """IGRF-14 total field at every point for every time (a space-time lattice).

    Parameters
    ----------
    lon, lat, height_m : array of float, shape (n,)
        Geodetic longitude and latitude (degrees, WGS84) and height above
        the ellipsoid (m) of the points.
    years : array of float, shape (m,)
        Decimal years (see :func:`decimal_year`), within :func:`coverage`.

    Returns
    -------
    ndarray, shape (n, m)
        Total field, nT. Two model evaluations per point and five-year
        interval spanned, whatever ``m``.
    """
    lon, lat, height_m = (np.asarray(a, dtype=np.float64).ravel() for a in (lon, lat, height_m))
    years = np.asarray(years, dtype=np.float64).ravel()
    edges = decimal_year(model_epochs())
    if np.any(~np.isfinite(years)) or np.any((years < edges[0]) | (years > edges[-1])):
        raise ValueError(f"times must lie within {MODEL_NAME}'s years {edges[0]:g} to {edges[-1]:g}")
    k_all = _epoch_interval(years)
    out = np.empty((lon.size, years.size))
    for k in np.unique(k_all):
        cols = np.flatnonzero(k_all == k)
        both = _at_epochs(lon, lat, height_m / 1000.0, int(k))
        w = (years[cols] - edges[k]) / (edges[k + 1] - edges[k])
        b = both[:, 0, :, None] + w[None, None, :] * (both[:, 1, :, None] - both[:, 0, :, None])
        out[:, cols] = np.sqrt(np.sum(b * b, axis=0))
    return out


def inclination_declination(components: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Inclination (positive down) and declination (east of true north), degrees.

    Parameters
    ----------
    components : ndarray, shape (3, ...)
        East, north, up components, nT.
    """
    east, north, up = components
    horizontal = np.hypot(east, north)
    return np.degrees(np.arctan2(-up, horizontal)), np.degrees(np.arctan2(east, north))
