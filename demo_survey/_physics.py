"""Physical models used by the demo survey generator.

Everything here is a pure function of position and time, so the generator
can evaluate any reading, in any order and in blocks of any size, and get the
same value.

Coordinates are in the survey CRS (projected, metres): ``e`` easting,
``n`` northing, ``z`` elevation positive up relative to the sea surface (the
sea surface is elevation 0; no tide is modelled). Times are seconds of the
survey date, UTC (they may exceed 86400 on multi-day surveys). Fields are in
nT, magnetic moments in A m^2.

References
----------
Blakely, R. J. (1995). Potential Theory in Gravity and Magnetic Applications.
    Cambridge University Press. (Field of a magnetic dipole; total-field
    anomaly; upward continuation of a harmonic field.)
Jackson, J. D. (1999). Classical Electrodynamics, 3rd edition. Wiley,
    chapter 5. (Magnetisation of a permeable sphere in a uniform field.)
IAGA Working Group V-MOD (2024). International Geomagnetic Reference Field,
    14th generation (IGRF-14). Coefficients as distributed with ``ppigrf``.
Weaver, J. T. (1965). Magnetic variations associated with ocean waves and
    swell. Journal of Geophysical Research 70(8), 1921-1929. (From memory;
    why swell noise is narrow-band, see :func:`narrow_band_noise`.)
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass

import harmonica as hm
import numpy as np
import ppigrf
from scipy.interpolate import RegularGridInterpolator

#: Magnetic constant mu0, T m / A (SI value 4 pi 1e-7, adequate here).
MU0 = 4e-7 * np.pi


# --------------------------------------------------------------------------
# Smooth random signals
# --------------------------------------------------------------------------
@dataclass(frozen=True)
class SmoothSignal:
    """Sum of sinusoids ``sum_k a_k sin(w_k t + p_k)``.

    Attributes
    ----------
    amplitude : numpy.ndarray
        Amplitudes, in the unit of the signal.
    omega : numpy.ndarray
        Angular frequencies, rad/s.
    phase : numpy.ndarray
        Phases, rad.
    """

    amplitude: np.ndarray
    omega: np.ndarray
    phase: np.ndarray

    def __call__(self, t):
        """Value at times ``t`` (s)."""
        t = np.asarray(t, dtype=float)
        arg = np.multiply.outer(t, self.omega) + self.phase
        return np.sin(arg) @ self.amplitude

    def rate(self, t):
        """Time derivative at times ``t`` (signal unit per s)."""
        t = np.asarray(t, dtype=float)
        arg = np.multiply.outer(t, self.omega) + self.phase
        return np.cos(arg) @ (self.amplitude * self.omega)


def smooth_signal(rng, rms, periods_s, components=6):
    """Draw a random smooth signal with a given RMS value.

    Periods are drawn log-uniformly in ``periods_s``, phases uniformly,
    amplitudes from a Rayleigh law and then scaled to the requested RMS
    (the RMS of a sum of sinusoids is ``sqrt(sum a_k^2 / 2)``).

    Parameters
    ----------
    rng : numpy.random.Generator
    rms : float
        Root-mean-square value of the signal, in the signal unit.
    periods_s : sequence of two floats
        Shortest and longest period, s.
    components : int
        Number of sinusoids.

    Returns
    -------
    SmoothSignal
    """
    lo, hi = np.log(periods_s[0]), np.log(periods_s[1])
    period = np.exp(rng.uniform(lo, hi, components))
    amp = rng.rayleigh(1.0, components)
    phase = rng.uniform(0.0, 2 * np.pi, components)
    if rms > 0:
        amp *= rms / np.sqrt(np.sum(amp**2) / 2.0)
    else:
        amp[:] = 0.0
    return SmoothSignal(amp, 2 * np.pi / period, phase)


def narrow_band_noise(rng, rms, periods_s, components=12):
    """Draw a swell-like narrow-band noise signal of one sensor on one line.

    Ocean swell disturbs a marine magnetometer record in a narrow band of
    periods of several seconds, through the magnetic field of the seawater
    moving in the main field and through the wave motion of the sensor in
    the field's gradient (Weaver 1965, Magnetic variations associated with
    ocean waves and swell, J. Geophys. Res. 70; quoted from memory). The
    demo models it as :func:`smooth_signal` with many components whose
    periods are confined to ``periods_s`` and random phases: stationary,
    zero mean, RMS ``rms`` (common practice, no published source).

    Parameters
    ----------
    rng : numpy.random.Generator
    rms : float
        Root-mean-square value, nT (0 gives a signal that is zero).
    periods_s : sequence of two floats
        Shortest and longest period, s.
    components : int
        Number of sinusoids.

    Returns
    -------
    SmoothSignal
        Takes the time since the line's first epoch, s.
    """
    return smooth_signal(rng, rms, periods_s, components)


# --------------------------------------------------------------------------
# Seabed
# --------------------------------------------------------------------------
def seabed_elevation(u, v, cfg):
    """Seabed elevation from route coordinates.

    Water depth is ``mean + sum_k a_k sin(2 pi u / L_k + p_k) + slope * v``,
    a smooth invented bathymetry.

    Parameters
    ----------
    u, v : array_like
        Along-route and across-route (positive to starboard when heading
        along the route) coordinates, m.
    cfg : dict
        The ``[seabed]`` table.

    Returns
    -------
    numpy.ndarray
        Seabed elevation, m (negative: below the sea surface).
    """
    u = np.asarray(u, dtype=float)
    depth = np.full(u.shape, float(cfg["mean_depth_m"])) + cfg["cross_slope"] * np.asarray(v)
    for amp, wavelength, phase in cfg["undulations"]:
        depth = depth + amp * np.sin(2 * np.pi * u / wavelength + np.radians(phase))
    return -depth


# --------------------------------------------------------------------------
# Main field
# --------------------------------------------------------------------------
class MainField:
    """IGRF-14 main-field vector on a coarse lattice, linearly interpolated.

    The IGRF varies by well under 0.01 nT between lattice nodes 1 km apart
    compared with a linear interpolation, so the lattice is exact enough.
    IGRF east/north components are rotated into grid east/north by the
    meridian convergence at the site. Heights relative to the sea surface are
    passed to the IGRF as heights above the ellipsoid (the geoid separation
    is ignored; it shifts the field by about 1 nT everywhere).

    Parameters
    ----------
    to_lonlat : pyproj.Transformer
        Survey CRS to EPSG:4326 (always_xy).
    bbox : tuple of float
        ``(e_min, e_max, n_min, n_max)`` to cover, m.
    t_range : tuple of float
        First and last time to cover, s of the survey date, UTC.
    date : datetime.date
        Survey date (time origin).
    grid_rotation : float
        Angle from grid north to true north, rad (clockwise positive).
    cfg : dict
        The ``[main_field]`` table.
    """

    def __init__(self, to_lonlat, bbox, t_range, date, grid_rotation, cfg):
        step = float(cfg["lattice_spacing_m"])
        e_nodes = _nodes(bbox[0] - step, bbox[1] + step, step)
        n_nodes = _nodes(bbox[2] - step, bbox[3] + step, step)
        z_nodes = np.asarray(cfg["lattice_elevations_m"], dtype=float)
        dt_s = float(cfg["lattice_time_step_s"])
        t_nodes = _nodes(t_range[0] - dt_s, t_range[1] + dt_s, dt_s)
        ee, nn = np.meshgrid(e_nodes, n_nodes, indexing="xy")
        lon, lat = to_lonlat.transform(ee, nn)
        origin = dt.datetime(date.year, date.month, date.day)
        dates = [origin + dt.timedelta(seconds=float(t)) for t in t_nodes]
        values = np.empty((t_nodes.size, z_nodes.size, n_nodes.size, e_nodes.size, 3))
        for iz, z in enumerate(z_nodes):
            be, bn, bu = ppigrf.igrf(lon, lat, np.full(lon.shape, z / 1000.0), dates)
            values[:, iz, :, :, :] = _rotate(be, bn, bu, grid_rotation)
        self._interp = RegularGridInterpolator(
            (t_nodes, z_nodes, n_nodes, e_nodes), values, bounds_error=False, fill_value=None
        )

    def __call__(self, e, n, z, t):
        """Main-field vector (grid east, grid north, up), nT, shape ``e.shape + (3,)``."""
        e, n, z, t = np.broadcast_arrays(*(np.asarray(a, dtype=float) for a in (e, n, z, t)))
        pts = np.stack([t.ravel(), z.ravel(), n.ravel(), e.ravel()], axis=-1)
        return self._interp(pts).reshape(e.shape + (3,))


def point_main_field(lon, lat, height_m, seconds, date, grid_rotation):
    """IGRF-14 vector at one place for a series of times (grid frame), nT.

    Parameters
    ----------
    lon, lat : float
        Geodetic position, degrees.
    height_m : float
        Height above the sea surface, m.
    seconds : numpy.ndarray
        Times, s of the survey date, UTC.
    date : datetime.date
    grid_rotation : float
        Angle from grid north to true north, rad.

    Returns
    -------
    numpy.ndarray
        Shape ``seconds.shape + (3,)``.
    """
    origin = dt.datetime(date.year, date.month, date.day)
    dates = [origin + dt.timedelta(seconds=float(t)) for t in seconds]
    be, bn, bu = ppigrf.igrf(lon, lat, height_m / 1000.0, dates)
    return _rotate(be, bn, bu, grid_rotation).reshape(np.shape(seconds) + (3,))


def _nodes(lo, hi, step):
    count = max(2, int(np.ceil((hi - lo) / step)) + 1)
    return lo + step * np.arange(count)


def _rotate(be, bn, bu, alpha):
    """Geographic (east, north, up) to grid (east, north, up)."""
    ge = be * np.cos(alpha) + bn * np.sin(alpha)
    gn = -be * np.sin(alpha) + bn * np.cos(alpha)
    return np.stack([ge, gn, bu], axis=-1)


def total_field_anomaly(main, anomaly):
    """Exact total-field anomaly ``|F + b| - |F|`` (Blakely 1995), nT.

    Parameters
    ----------
    main, anomaly : numpy.ndarray
        Main-field and anomalous-field vectors, nT, last axis of size 3.
    """
    return np.linalg.norm(main + anomaly, axis=-1) - np.linalg.norm(main, axis=-1)


# --------------------------------------------------------------------------
# External (diurnal) field
# --------------------------------------------------------------------------
@dataclass(frozen=True)
class Diurnal:
    """External-field variation seen identically at the site and the base.

    ``D(t) = sum_k a_k cos(2 pi k (tau - 12 h) / 24 h + p_k)
    + (1 + d sin(2 pi t / P_env + p_env)) * M(t)``, with ``tau`` the local
    solar time (UTC plus longitude / 15 h) and ``M`` a sum of sinusoids with
    periods of tens to hundreds of seconds (micropulsations). A smooth model
    chosen for the demo: common practice, no published source.

    Attributes
    ----------
    harmonics_nT, harmonic_phases : numpy.ndarray
        Daily harmonic amplitudes (nT) and phases (rad).
    solar_offset_s : float
        Longitude / 15 h, in s.
    pulsations : SmoothSignal
        Micropulsations, nT.
    envelope_depth, envelope_omega, envelope_phase : float
        Modulation of the micropulsations (fraction, rad/s, rad).
    """

    harmonics_nT: np.ndarray
    harmonic_phases: np.ndarray
    solar_offset_s: float
    pulsations: SmoothSignal
    envelope_depth: float
    envelope_omega: float
    envelope_phase: float

    def __call__(self, t):
        """External field at times ``t`` (s of the survey date, UTC), nT."""
        t = np.asarray(t, dtype=float)
        tau = (t + self.solar_offset_s - 43200.0) / 86400.0
        k = np.arange(1, self.harmonics_nT.size + 1)
        daily = np.cos(2 * np.pi * np.multiply.outer(tau, k) + self.harmonic_phases) @ self.harmonics_nT
        env = 1.0 + self.envelope_depth * np.sin(self.envelope_omega * t + self.envelope_phase)
        return daily + env * self.pulsations(t)


def make_diurnal(rng, cfg, lon):
    """Build the external-field model from the ``[diurnal]`` table.

    Parameters
    ----------
    rng : numpy.random.Generator
    cfg : dict
    lon : float
        Site longitude, degrees (sets local solar time).

    Returns
    -------
    Diurnal
    """
    puls = smooth_signal(
        rng, cfg["micropulsation_rms_nT"], cfg["micropulsation_periods_s"], cfg["micropulsation_components"]
    )
    return Diurnal(
        np.asarray(cfg["harmonics_nT"], dtype=float),
        np.radians(np.asarray(cfg["harmonic_phases_deg"], dtype=float)),
        lon / 15.0 * 3600.0,
        puls,
        float(cfg["envelope_depth"]),
        2 * np.pi / float(cfg["envelope_period_s"]),
        rng.uniform(0, 2 * np.pi),
    )


# --------------------------------------------------------------------------
# Geology
# --------------------------------------------------------------------------
def geology_waves(e, n, z, origin, cfg):
    """Regional total-field anomaly from plane harmonic waves, nT.

    Each wave ``A cos(k . x + p)`` given at the reference elevation ``z0``
    is continued upward as ``exp(-|k| (z - z0))``, the behaviour of any
    harmonic field (Blakely 1995, upward continuation).

    Parameters
    ----------
    e, n, z : array_like
        Positions, m.
    origin : tuple of float
        Route origin (easting, northing), m; wave phases refer to it.
    cfg : dict
        The ``[geology]`` table.
    """
    e = np.asarray(e, dtype=float) - origin[0]
    n = np.asarray(n, dtype=float) - origin[1]
    z = np.asarray(z, dtype=float) - cfg["reference_elevation_m"]
    out = np.zeros(np.broadcast(e, n, z).shape)
    for amp, wavelength, azimuth, phase in cfg["waves"]:
        k = 2 * np.pi / wavelength
        az = np.radians(azimuth)
        out += amp * np.exp(-k * z) * np.cos(k * (e * np.sin(az) + n * np.cos(az)) + np.radians(phase))
    return out


# --------------------------------------------------------------------------
# Dipole sources
# --------------------------------------------------------------------------
def induced_moment(mass_kg, main_nT, axis, k_axial, k_transverse, density):
    """Induced moment of a compact ferrous object, A m^2.

    A highly permeable sphere of volume ``V`` in a field ``B0`` takes the
    moment ``m = 3 V B0 / mu0`` (Jackson 1999, ch. 5). Shape is modelled by
    factors on that moment along the object's axis ``u`` and across it:
    ``m = (3 V / mu0) [k_t B0 + (k_a - k_t) (B0 . u) u]`` (factor ranges:
    common practice, no published source).

    Parameters
    ----------
    mass_kg : numpy.ndarray
        Iron mass, kg, shape (N,).
    main_nT : numpy.ndarray
        Main-field vector at the objects, nT, shape (N, 3) or (3,).
    axis : numpy.ndarray
        Unit axis vectors, shape (N, 3).
    k_axial, k_transverse : numpy.ndarray
        Shape factors, shape (N,).
    density : float
        Density of iron, kg/m^3.

    Returns
    -------
    numpy.ndarray
        Moments (east, north, up), shape (N, 3).
    """
    b0 = np.broadcast_to(np.asarray(main_nT, dtype=float) * 1e-9, axis.shape)
    volume = np.asarray(mass_kg, dtype=float) / density
    along = np.sum(b0 * axis, axis=-1, keepdims=True) * axis
    shaped = k_transverse[:, None] * b0 + (k_axial - k_transverse)[:, None] * along
    return 3.0 * volume[:, None] / MU0 * shaped


def random_unit_vectors(rng, count, max_plunge_deg=90.0):
    """Random unit vectors (east, north, up), azimuth uniform, plunge uniform
    in sine within +-``max_plunge_deg`` (90 gives isotropic directions)."""
    az = rng.uniform(0, 2 * np.pi, count)
    s = np.sin(np.radians(max_plunge_deg))
    up = rng.uniform(-s, s, count)
    h = np.sqrt(1 - up**2)
    return np.stack([h * np.sin(az), h * np.cos(az), up], axis=-1)


def influence_radius(moment_Am2, tolerance_nT, minimum_m):
    """Horizontal distance beyond which a source is neglected, m.

    The dipole field is below ``2e-7 m / r^3`` T (Blakely 1995), so the
    radius where it falls to ``tolerance_nT`` is ``(200 m / tol)^(1/3)``
    with ``m`` in A m^2 and the result in m.
    """
    return np.maximum(minimum_m, np.cbrt(200.0 * np.asarray(moment_Am2) / tolerance_nT))


@dataclass
class Sources:
    """Magnetic point dipoles.

    Attributes
    ----------
    position : numpy.ndarray
        (N, 3) easting, northing, elevation, m.
    moment : numpy.ndarray
        (N, 3) moment east, north, up, A m^2.
    radius : numpy.ndarray
        (N,) horizontal influence radius, m (``inf``: always included).
    """

    position: np.ndarray
    moment: np.ndarray
    radius: np.ndarray

    def field(self, e, n, z):
        """Anomalous field vector of the sources at the given points, nT.

        Dipole field (Blakely 1995) evaluated with
        ``harmonica.dipole_magnetic``. Only sources whose influence radius
        reaches the bounding box of the points are included.

        Parameters
        ----------
        e, n, z : numpy.ndarray
            Points, m (any equal shapes).

        Returns
        -------
        numpy.ndarray
            Shape ``e.shape + (3,)``.
        """
        shape = np.shape(e)
        e, n, z = (np.ravel(a).astype(float) for a in (e, n, z))
        px, py = self.position[:, 0], self.position[:, 1]
        dx = np.maximum(0.0, np.maximum(e.min() - px, px - e.max()))
        dy = np.maximum(0.0, np.maximum(n.min() - py, py - n.max()))
        keep = np.hypot(dx, dy) <= self.radius
        out = np.zeros((e.size, 3))
        if keep.any():
            pos, mom = self.position[keep], self.moment[keep]
            b = hm.dipole_magnetic(
                (e, n, z),
                (pos[:, 0], pos[:, 1], pos[:, 2]),
                (mom[:, 0], mom[:, 1], mom[:, 2]),
                field="b",
                disable_checks=True,
            )
            out[:, 0], out[:, 1], out[:, 2] = b
        return out.reshape(shape + (3,))
