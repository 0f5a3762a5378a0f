"""Survey geometry of the demo survey generator: route, sensor bar, lines.

Route coordinates: ``u`` along the route from KP 0 and ``v`` across it,
positive to starboard when heading along the route, in m. Azimuths are grid
azimuths (clockwise from grid north of the survey CRS) in rad. Times are
seconds of the survey date, UTC; a line's motion signals take the time since
the line's first recorded epoch.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass

import numpy as np
from pyproj import Transformer

if __package__:
    from . import _physics as phys
else:  # imported by generate.py run as a script
    import _physics as phys


@dataclass(frozen=True)
class Route:
    """Straight route with a survey corridor.

    Attributes
    ----------
    e0, n0 : float
        Route start (KP 0), survey CRS, m.
    azimuth : float
        Grid azimuth of the route, rad.
    length, half_width : float
        Route length and corridor half-width, m.
    """

    e0: float
    n0: float
    azimuth: float
    length: float
    half_width: float

    def to_en(self, u, v):
        """Route coordinates (along ``u``, across ``v``, m) to easting, northing."""
        s, c = np.sin(self.azimuth), np.cos(self.azimuth)
        return self.e0 + u * s + v * c, self.n0 + u * c - v * s

    def to_uv(self, e, n):
        """Easting, northing to route coordinates (along, across), m."""
        s, c = np.sin(self.azimuth), np.cos(self.azimuth)
        de, dn = np.asarray(e) - self.e0, np.asarray(n) - self.n0
        return de * s + dn * c, de * c - dn * s


@dataclass(frozen=True)
class Array:
    """Towed sensor bar.

    Attributes
    ----------
    names : list of str
    offsets : numpy.ndarray
        Across-track offsets, m, positive to starboard.
    layback, altitude : float
        Distance behind the antenna and nominal height above seabed, m.
    rate, lag : float
        Sample rate (Hz) and recorded-time lag (s).
    """

    names: list
    offsets: np.ndarray
    layback: float
    altitude: float
    rate: float
    lag: float


@dataclass
class Line:
    """One acquired line: nominal track, timing and motion signals.

    The antenna moves from ``start`` along ``azimuth`` at ``speed`` (plus a
    surge signal) with a cross-track wander signal. Motion signals take the
    time since ``t_start`` in s.
    """

    name: str
    kind: str  # "survey" or "tie"
    index: int
    start: tuple
    azimuth: float  # rad, direction of travel
    across: float  # nominal route v (survey lines) or u (tie lines), m
    speed: float  # m/s
    start_ms: int  # recorded time of the first epoch, ms of the survey date
    n_epochs: int
    surge: phys.SmoothSignal
    wander: phys.SmoothSignal
    altitude: phys.SmoothSignal
    heave: phys.SmoothSignal
    roll: phys.SmoothSignal

    @property
    def t_start(self):
        """Recorded time of the first epoch, s of the survey date."""
        return self.start_ms / 1000.0

    def t_end(self, rate):
        """Recorded time of the last epoch, s of the survey date."""
        return self.t_start + (self.n_epochs - 1) / rate

    def along(self, t):
        """Antenna distance along the line at times ``t``, m."""
        tau = np.asarray(t) - self.t_start
        return self.speed * tau + self.surge(tau)

    def antenna(self, t):
        """True antenna easting, northing at times ``t``, m."""
        s, w = self.along(t), self.wander(np.asarray(t) - self.t_start)
        sa, ca = np.sin(self.azimuth), np.cos(self.azimuth)
        return self.start[0] + s * sa + w * ca, self.start[1] + s * ca - w * sa

    def course(self, t):
        """Grid azimuth of the (smooth) antenna course at times ``t``, rad."""
        tau = np.asarray(t) - self.t_start
        ds, dw = self.speed + self.surge.rate(tau), self.wander.rate(tau)
        sa, ca = np.sin(self.azimuth), np.cos(self.azimuth)
        return np.arctan2(ds * sa + dw * ca, ds * ca - dw * sa)


@dataclass
class World:
    """Everything needed to evaluate a reading."""

    cfg: dict
    route: Route
    array: Array
    date: dt.date
    t_first: float  # first recorded time, s of the survey date
    to_lonlat: Transformer
    grid_rotation: float  # rad, grid north to true north
    main: phys.MainField = None
    sources: phys.Sources = None
    diurnal: phys.Diurnal = None


def sensor_positions(world, line, t):
    """True sensor positions at times ``t``.

    The bar is towed: its centre is where the antenna was when it had
    travelled ``layback`` metres less along the line (it follows the
    antenna's track), and the bar lies across the course of the track at that
    point; sensors are spread across that course; the centre flies at the nominal
    altitude above the seabed below it plus slow wander and heave, and the
    bar rolls.

    Parameters
    ----------
    world : World
    line : Line
    t : numpy.ndarray
        Times, s of the survey date, shape (N,).

    Returns
    -------
    e, n, z : numpy.ndarray
        Sensor easting, northing, elevation, m, shape (N, n_sensors).
    heading : numpy.ndarray
        Course grid azimuth, rad, shape (N,).
    """
    arr, route = world.array, world.route
    t = np.asarray(t, dtype=float)
    # time at which the antenna was layback metres back along the line (Newton on the monotonic along-track distance)
    target = line.along(t) - arr.layback
    tb = t - arr.layback / line.speed
    for _ in range(8):
        tb = tb - (line.along(tb) - target) / (line.speed + line.surge.rate(tb - line.t_start))
    ce, cn = line.antenna(tb)
    h = line.course(tb)
    sh, ch = np.sin(h), np.cos(h)
    e = ce[:, None] + arr.offsets * ch[:, None]
    n = cn[:, None] - arr.offsets * sh[:, None]
    tau = t - line.t_start
    bed = phys.seabed_elevation(*route.to_uv(ce, cn), world.cfg["seabed"])
    zc = bed + arr.altitude + line.altitude(tau) + line.heave(tau)
    z = zc[:, None] - arr.offsets * np.sin(line.roll(tau))[:, None]
    return e, n, z, h


def seabed_at(world, e, n):
    """Seabed elevation at easting, northing, m."""
    return phys.seabed_elevation(*world.route.to_uv(e, n), world.cfg["seabed"])
