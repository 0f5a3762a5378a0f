"""Space-time lattice of the main field and its interpolation (helper of the main_field stage).

Evaluating the spherical-harmonic model costs about 50 microseconds a point
(``ppigrf``, degree 13, two epochs), which is over an hour for 10^8
readings. The main field is very smooth over a survey area, so it is
evaluated once on a coarse regular lattice of easting, northing, elevation
(survey CRS, metres) and time, and each reading gets the
quadrilinear interpolation of the lattice values (linear along each of the
four axes; Press et al. 2007, section 3.6, from memory). The interpolation
is a small compiled loop (numba, a dependency of harmonica): readings come
in time and space order, so each reading's lattice cell is looked for first
where the previous reading's was; it gives the numbers of
:class:`scipy.interpolate.RegularGridInterpolator` (``method="linear"``,
NaN outside the lattice), which the tests use as the reference.

Error
    For linear interpolation between nodes ``h`` apart the error is at most
    ``h**2 / 8 * max|f''|`` (Hildebrand 1974, from memory). The main field
    varies on the scale of the Earth's radius ``r``: along the vertical a
    dipole field falls as ``r**-3``, so ``d2F/dz2 ~ 12 F / r**2``, about
    1.5e-8 nT/m^2 at 50 000 nT, and a 100 m vertical spacing errs by about
    2e-5 nT; horizontally the curvature is of order ``F / r**2``, about
    1e-9 nT/m^2, so 1000 m nodes err by about 1e-4 nT (measured: 0.7e-4 nT
    at 54 N and 1.4e-4 nT at 70 N; the error grows as the square of the
    spacing, reaching 0.01 nT near 10 km). In time the components are
    linear in the decimal year within each five-year epoch, and the
    curvature of their magnitude is ``|dB/dt|**2 / F`` or less, about
    0.2 nT/year^2 for a secular variation of 100 nT/year, so one-day
    nodes err by under 1e-6 nT. The stage measures the error at mid-cell
    check points (where linear interpolation errs most) against a direct
    evaluation rather than relying on these estimates.

Lattice nodes
    Multiples of the spacing, from the multiple at or below the smallest
    coordinate of the readings to the one at or above the largest (at
    least two nodes per axis), so the lattice depends only on the extent
    of the survey, never on how the readings are chunked. In time the nodes
    are multiples of the step from 1970-01-01T00:00Z, plus every 1 January
    in the span (the epochs of the model and the breaks of the decimal
    year fall there). Between two nodes the decimal year is then linear in
    elapsed time, so interpolating in seconds is interpolating in decimal
    years.

References
----------
Hildebrand, F. B. (1974). Introduction to Numerical Analysis, 2nd ed.
    McGraw-Hill (error of polynomial interpolation). (From memory.)
Press, W. H., Teukolsky, S. A., Vetterling, W. T. & Flannery, B. P. (2007).
    Numerical Recipes, 3rd ed., section 3.6, Interpolation on a grid in
    multidimensions. Cambridge University Press. (From memory.)
"""

from __future__ import annotations

from dataclasses import dataclass

import math

import numba
import numpy as np
import pyproj

from . import _main_field_igrf as igrf

__all__ = [
    "Lattice",
    "node_axis",
    "time_axis",
    "lattice_axes",
    "build_lattice",
    "interpolate",
    "mid_cell_points",
    "direct_total_field",
]

_NAT = np.iinfo(np.int64).min



@dataclass(frozen=True)
class Lattice:
    """Main-field total intensity on a regular space-time lattice.

    Attributes
    ----------
    easting, northing, elevation : ndarray of float
        Node coordinates, metres, survey CRS (elevation positive up,
        relative to the vertical datum of the readings).
    time : ndarray of datetime64[ns]
        Node times (UTC).
    values : ndarray, shape (easting, northing, elevation, time)
        Total field at the nodes, nT.
    """

    easting: np.ndarray
    northing: np.ndarray
    elevation: np.ndarray
    time: np.ndarray
    values: np.ndarray

    @property
    def seconds(self) -> np.ndarray:
        """Node times in seconds after the first node."""
        return (self.time.astype(np.int64) - self.time[0].astype(np.int64)) / 1e9

    @property
    def axes(self) -> tuple[np.ndarray, ...]:
        """The four node axes (m, m, m, s after the first node), in the order of ``values``."""
        return (self.easting, self.northing, self.elevation, self.seconds)

    @property
    def shape(self) -> tuple[int, ...]:
        """Nodes along each axis."""
        return tuple(int(a.size) for a in self.axes)


def node_axis(low: float, high: float, spacing: float) -> np.ndarray:
    """Multiples of ``spacing`` covering ``[low, high]``, at least two.

    Parameters
    ----------
    low, high : float
        Smallest and largest coordinate to cover (finite, ``low <= high``).
    spacing : float
        Node spacing (> 0), same units.
    """
    first = np.floor(low / spacing)
    last = max(np.ceil(high / spacing), first + 1.0)
    return np.arange(first, last + 0.5) * spacing


def time_axis(first: np.datetime64, last: np.datetime64, step_ns: int) -> np.ndarray:
    """Node times covering ``[first, last]``, datetime64[ns].

    Multiples of ``step_ns`` from 1970-01-01T00:00Z at or outside the span
    (at least two), plus every 1 January inside it; clipped to the years
    the model covers.

    Parameters
    ----------
    first, last : numpy.datetime64
        Earliest and latest reading time.
    step_ns : int
        Node step, nanoseconds.
    """
    lo = np.int64(first.astype("datetime64[ns]").astype(np.int64))
    hi = np.int64(last.astype("datetime64[ns]").astype(np.int64))
    start = np.floor_divide(lo, step_ns)
    stop = max(-np.floor_divide(-hi, step_ns), start + 1)
    nodes = (np.arange(start, stop + 1, dtype=np.int64) * np.int64(step_ns)).astype("datetime64[ns]")
    years = np.arange(nodes[0].astype("datetime64[Y]"), nodes[-1].astype("datetime64[Y]") + np.timedelta64(1, "Y"))
    january = years.astype("datetime64[ns]")
    january = january[(january > nodes[0]) & (january < nodes[-1])]
    first_model, last_model = igrf.coverage()
    all_nodes = np.unique(np.concatenate([nodes, january]))
    all_nodes = np.unique(np.clip(all_nodes, first_model, last_model))
    if all_nodes.size < 2:  # a single instant at the very end of the model
        all_nodes = np.array([last_model - np.timedelta64(step_ns, "ns"), last_model])
    return all_nodes


def _to_lonlat(crs_wkt: str) -> pyproj.Transformer:
    """Transformer from the survey CRS to WGS84 longitude, latitude (degrees)."""
    return pyproj.Transformer.from_crs(pyproj.CRS.from_wkt(crs_wkt), "EPSG:4326", always_xy=True)


def lattice_axes(bounds: dict, spacing_m: float, vertical_spacing_m: float, time_step_ns: int) -> tuple:
    """Node axes (easting, northing, elevation in m; time as datetime64[ns]) covering ``bounds``.

    See :func:`build_lattice` for the parameters.
    """
    return (
        node_axis(*bounds["easting"], spacing_m),
        node_axis(*bounds["northing"], spacing_m),
        node_axis(*bounds["elevation"], vertical_spacing_m),
        time_axis(*bounds["time"], time_step_ns),
    )


def build_lattice(
    bounds: dict,
    crs_wkt: str,
    spacing_m: float,
    vertical_spacing_m: float,
    time_step_ns: int,
    geoid_height_m: float,
) -> Lattice:
    """Evaluate the main field on the lattice covering ``bounds``.

    Parameters
    ----------
    bounds : dict
        ``easting``, ``northing``, ``elevation`` (pairs of float, m) and
        ``time`` (pair of datetime64): the extent of the readings.
    crs_wkt : str
        Survey CRS, WKT.
    spacing_m, vertical_spacing_m : float
        Node spacing in easting and northing, and in elevation, m.
    time_step_ns : int
        Node step in time, ns.
    geoid_height_m : float
        Height of the readings' vertical datum above the WGS84 ellipsoid, m.
    """
    east, north, elev, time = lattice_axes(bounds, spacing_m, vertical_spacing_m, time_step_ns)
    ee, nn, zz = np.meshgrid(east, north, elev, indexing="ij")
    lon, lat = _to_lonlat(crs_wkt).transform(ee.ravel(), nn.ravel())
    values = igrf.total_field_product(lon, lat, zz.ravel() + geoid_height_m, igrf.decimal_year(time))
    return Lattice(east, north, elev, time, values.reshape(ee.shape + (time.size,)))


@numba.njit(cache=True, nogil=True)
def _cell(axis, x, guess):
    """Index i of the cell [axis[i], axis[i + 1]] holding x (-1 outside or NaN), looked for from ``guess``."""
    n = axis.size
    if not (axis[0] <= x <= axis[n - 1]):
        return -1
    if 0 <= guess < n - 1 and axis[guess] <= x <= axis[guess + 1]:
        return guess
    lo, hi = 0, n - 1
    while hi - lo > 1:
        mid = (lo + hi) // 2
        if axis[mid] <= x:
            lo = mid
        else:
            hi = mid
    return lo


@numba.njit(cache=True, nogil=True)
def _quadrilinear(e, n, z, t_ns, t0_ns, nat, ax_e, ax_n, ax_z, ax_t, values, out):
    ie = jn = kz = lt = 0
    cell = (-1, -1, -1, -1)
    # The 8 spatial corners at the two times, and the cell's reciprocal widths,
    # kept while consecutive readings stay in one cell.
    c0 = np.empty(8)
    c1 = np.empty(8)
    re = rn = rz = rt = 0.0
    for r in range(e.size):
        if t_ns[r] == nat:
            out[r] = np.nan
            continue
        t = (t_ns[r] - t0_ns) * 1e-9
        x, y, h = e[r], n[r], z[r]
        # fast path: the previous reading's cell (the search only on a miss)
        if not (ax_e[ie] <= x <= ax_e[ie + 1]):
            ie = _cell(ax_e, x, ie)
        if not (ax_n[jn] <= y <= ax_n[jn + 1]):
            jn = _cell(ax_n, y, jn)
        if not (ax_z[kz] <= h <= ax_z[kz + 1]):
            kz = _cell(ax_z, h, kz)
        if not (ax_t[lt] <= t <= ax_t[lt + 1]):
            lt = _cell(ax_t, t, lt)
        if ie < 0 or jn < 0 or kz < 0 or lt < 0:
            out[r] = np.nan
            ie = max(ie, 0)
            jn = max(jn, 0)
            kz = max(kz, 0)
            lt = max(lt, 0)
            continue
        if cell != (ie, jn, kz, lt):
            cell = (ie, jn, kz, lt)
            q = 0
            for a in range(2):
                for b in range(2):
                    for c in range(2):
                        c0[q] = values[ie + a, jn + b, kz + c, lt]
                        c1[q] = values[ie + a, jn + b, kz + c, lt + 1]
                        q += 1
            re = 1.0 / (ax_e[ie + 1] - ax_e[ie])
            rn = 1.0 / (ax_n[jn + 1] - ax_n[jn])
            rz = 1.0 / (ax_z[kz + 1] - ax_z[kz])
            rt = 1.0 / (ax_t[lt + 1] - ax_t[lt])
        we = (x - ax_e[ie]) * re
        wn = (y - ax_n[jn]) * rn
        wz = (h - ax_z[kz]) * rz
        wt = (t - ax_t[lt]) * rt
        acc = 0.0
        q = 0
        for a in range(2):
            fa = we if a else 1.0 - we
            for b in range(2):
                fb = fa * (wn if b else 1.0 - wn)
                for c in range(2):
                    fc = fb * (wz if c else 1.0 - wz)
                    acc += fc * (c0[q] + wt * (c1[q] - c0[q]))
                    q += 1
        out[r] = acc


def interpolate(easting, northing, elevation, time, *, lattice: Lattice) -> np.ndarray:
    """Main-field total intensity at readings, by interpolation in the lattice.

    A :func:`dask.array.map_blocks` function: every argument is one block
    of the readings' coordinates.

    Parameters
    ----------
    easting, northing, elevation : ndarray of float
        Reading positions, m, survey CRS.
    time : ndarray of datetime64[ns]
        Reading times.
    lattice : Lattice
        Lattice covering the readings.

    Returns
    -------
    ndarray of float
        Total field, nT; NaN where a coordinate is NaN or outside the lattice.
    """
    easting = np.ascontiguousarray(easting, dtype=np.float64)
    out = np.empty(easting.shape, dtype=np.float64)
    if easting.size == 0:
        return out
    t = np.ascontiguousarray(np.asarray(time).astype("datetime64[ns]").astype(np.int64))
    _quadrilinear(
        easting.ravel(),
        np.ascontiguousarray(northing, dtype=np.float64).ravel(),
        np.ascontiguousarray(elevation, dtype=np.float64).ravel(),
        t.ravel(),
        np.int64(lattice.time[0].astype(np.int64)),
        _NAT,
        *(np.ascontiguousarray(a, dtype=np.float64) for a in lattice.axes),
        np.ascontiguousarray(lattice.values, dtype=np.float64),
        out.ravel(),
    )
    return out


def mid_cell_points(lattice: Lattice, count: int, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Centres of ``count`` lattice cells drawn at random.

    The centre of a cell lies half a spacing from the nodes along every
    axis, where linear interpolation errs most.

    Returns
    -------
    positions : ndarray, shape (count, 3)
        Easting, northing, elevation, m.
    times : ndarray of datetime64[ns], shape (count,)
    """
    rng = np.random.default_rng(seed)
    columns = []
    for axis in (lattice.easting, lattice.northing, lattice.elevation):
        cell = rng.integers(0, axis.size - 1, size=count)
        columns.append(0.5 * (axis[cell] + axis[cell + 1]))
    cell = rng.integers(0, lattice.time.size - 1, size=count)
    t = lattice.time.astype(np.int64)
    times = (t[cell] + (t[cell + 1] - t[cell]) // 2).astype("datetime64[ns]")
    return np.column_stack(columns), times


def direct_total_field(easting, northing, elevation, time, crs_wkt: str, geoid_height_m: float) -> np.ndarray:
    """Main-field total intensity by direct evaluation of the model at each point, nT.

    Parameters
    ----------
    easting, northing, elevation : array of float
        Positions, m, survey CRS.
    time : array of datetime64
        Times.
    crs_wkt : str
        Survey CRS, WKT.
    geoid_height_m : float
        Height of the vertical datum above the WGS84 ellipsoid, m.
    """
    lon, lat = _to_lonlat(crs_wkt).transform(np.asarray(easting, float), np.asarray(northing, float))
    return igrf.total_field(lon, lat, np.asarray(elevation, float) + geoid_height_m, time)
