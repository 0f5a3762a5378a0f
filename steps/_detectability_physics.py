"""Point-dipole detection physics: orientation factors, least detectable moment, detection offset, anomaly width.

Field
    A point dipole of moment ``m`` (A m^2) at ``r`` from the sensor gives the
    total-field anomaly ``T = C (3 (m.r)(f.r) / r^5 - (m.f) / r^3)`` with
    ``C = 1e9 mu0 / (4 pi) = 100`` nT m^3 per A m^2 and ``f`` the main-field
    unit vector (Blakely 1995, ch. 4 for the dipole field; ch. 12 for the
    total-field anomaly as its projection on the main field). Its gradient,
    differentiated by hand, is
    ``grad T = 3 C / r^5 (m (f.r) + f (m.r) + (m.f) r - 5 (m.r)(f.r) r / r^2)``,
    and the total gradient amplitude ``|grad T|`` (the amplitude of the 3-D
    analytic signal, Roest, Verhoef & Pilkington 1992) falls as ``r^-4``
    while ``T`` falls as ``r^-3``. Both are linear in ``m``: ``T = a . m``,
    ``grad T = G m``.

Criterion
    ``"gradient"``: the peak of ``|grad T|`` must exceed the threshold
    (nT/m); this is what the picking stage tests (local maxima of the total
    gradient amplitude above a multiple of its measured noise).
    ``"total_field"``: the peak of ``|T|`` must exceed the threshold (nT)
    (picking on the absolute residual, and survey planning from a sensor
    noise in nT).

Geometry
    The sensor runs along a straight horizontal track whose closest point to
    the target is at distance ``r0`` and elevation angle ``phi`` above the
    target's horizontal (``phi = 90`` deg: the track passes straight over
    the target; ``r0 = sqrt(d^2 + z^2)`` for a horizontal offset ``d`` and a
    height ``z`` of the sensor above the target). The quantity that decides
    detection is the **peak of the signal along that track**, which by the
    homogeneity of the dipole field is ``C m F / r0^n`` (``n = 4`` for the
    gradient, 3 for the total field) with a dimensionless orientation factor
    ``F`` that depends on ``phi``, on the horizontal direction of the track,
    on the moment direction and on the main-field inclination only (the
    declination drops out because the track direction is free).

Orientation factors (our definitions)
    ``typical``
        The moment along the main field (a purely induced moment, the
        direction of the conservative induced-only mass model), median over
        the horizontal direction of the track.
    ``worst``
        For the gradient: the least peak over every moment direction (the
        whole sphere: remanence and shape can turn a moment anywhere) and
        every track direction, found on a sampled sphere and refined by a
        Nelder-Mead search (Nelder & Mead 1965). No orientation gives a
        smaller peak on the nearest track. For the total field that least
        value is zero (a moment lying across a track that runs straight over
        it, in a plane that holds the main field, gives no anomaly along the
        track), so ``worst`` is there the 5th percentile over moment
        directions uniform on the sphere and track directions (our choice,
        no published source); use the gradient criterion for a true bound.

    Closed forms that check the tables (Blakely 1995, ch. 4, differentiated
    by hand): straight over the target in a vertical field, the induced
    factor is 6 (gradient) and 2 (total field), and the worst gradient
    factor is 3 (the smallest singular value of ``G``, reached by a
    horizontal moment across the track, whose peak along the track is the
    value overhead).

Anomaly width
    The full width at half maximum of the along-track profile of the
    signal, for the typical orientation, median over track directions, in
    units of ``r0`` (``width_factor``); the width of an anomaly in metres is
    ``width_factor x r0``.

The factors are tabulated every 2 degrees of ``phi`` (0 to 90) once per
inclination and criterion and interpolated linearly (tables cached for the
process).

References
----------
Blakely, R. J. (1995). Potential Theory in Gravity and Magnetic
    Applications. Cambridge University Press. [Blakely1995]_
Nelder, J. A. & Mead, R. (1965). A simplex method for function
    minimization. The Computer Journal 7(4), 308-313. [Nelder1965]_
Roest, W. R., Verhoef, J. & Pilkington, M. (1992). Magnetic interpretation
    using the 3-D analytic signal. Geophysics 57(1), 116-125. [Roest1992]_
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import lru_cache

import numpy as np

__all__ = [
    "C_NT",
    "CRITERIA",
    "EXPONENT",
    "BASES",
    "field_unit",
    "signal_matrices",
    "FactorTable",
    "factor_table",
    "least_moment",
    "peak_signal",
    "detection_offset",
    "overhead_distance",
    "anomaly_width",
    "induced_profile",
    "half_maximum_width",
    "TRACK_AZIMUTHS_DEG",
]

#: mu0 / (4 pi) x 1e9: nT m^3 per A m^2.
C_NT = 100.0
CRITERIA = ("gradient", "total_field")
#: fall-off exponent of the peak signal with distance
EXPONENT = {"gradient": 4, "total_field": 3}
#: orientation of each mass basis: conservative (worst orientation, solid sphere),
#: typical (typical orientation, solid sphere), optimistic (typical orientation, amplified)
BASES = {"conservative": "worst", "typical": "typical", "optimistic": "typical"}

ELEVATIONS_DEG = np.arange(0.0, 90.0 + 1e-9, 2.0)
TRACK_AZIMUTHS_DEG = np.arange(5.0, 180.0, 10.0)  # mirror symmetry about the magnetic meridian
_S_COARSE = np.linspace(-4.0, 4.0, 81)  # along-track positions in units of r0
_S_FINE = np.linspace(-4.0, 4.0, 1601)
_S_SEARCH = np.linspace(-3.0, 3.0, 121)
_N_SPHERE = 300
_STARTS = 4
WORST_PERCENTILE_TOTAL_FIELD = 5.0


def field_unit(inclination_deg: float) -> np.ndarray:
    """Main-field unit vector (east, north, up) for an inclination (positive down) and zero declination."""
    inc = math.radians(inclination_deg)
    return np.array([0.0, math.cos(inc), -math.sin(inc)])


def signal_matrices(p: np.ndarray, f: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Total-field and gradient responses of a unit moment.

    Parameters
    ----------
    p : ndarray (..., 3)
        Sensor positions relative to the dipole (east, north, up), m.
    f : ndarray (3,)
        Main-field unit vector.

    Returns
    -------
    a : ndarray (..., 3)
        ``T = a . m``, nT per A m^2.
    g : ndarray (..., 3, 3)
        ``grad T = g @ m``, nT/m per A m^2.
    """
    r2 = np.sum(p * p, axis=-1)
    r = np.sqrt(r2)
    fr = p @ f
    a = C_NT * (3.0 * (fr / r2)[..., None] * p - f) / r[..., None] ** 3
    eye = np.eye(3)
    g = (3.0 * C_NT / r**5)[..., None, None] * (
        fr[..., None, None] * eye
        + f[:, None] * p[..., None, :]
        + p[..., :, None] * f[None, :]
        - 5.0 * (fr / r2)[..., None, None] * p[..., :, None] * p[..., None, :]
    )
    return a, g


def _track(elevation_deg: float, azimuth_deg: float, s: np.ndarray) -> np.ndarray:
    """Points of a horizontal track at unit closest distance (east, north, up)."""
    ph, b = math.radians(elevation_deg), math.radians(azimuth_deg)
    towards = np.array([math.sin(b), math.cos(b), 0.0])
    along = np.array([math.cos(b), -math.sin(b), 0.0])
    return math.cos(ph) * towards + math.sin(ph) * np.array([0.0, 0.0, 1.0]) + s[:, None] * along


def _signal(elevation_deg: float, azimuth_deg: float, f: np.ndarray, criterion: str, s: np.ndarray,
            m: np.ndarray) -> np.ndarray:
    """|signal| over C (dimensionless) along a track at unit closest distance, for unit moments ``m`` (k, 3).

    Returns an array (len(s), k). The gradient is evaluated directly from
    the closed form (no 3 x 3 matrices), which keeps the sampled search
    over moment directions cheap.
    """
    p = _track(elevation_deg, azimuth_deg, s)
    r2 = np.sum(p * p, axis=-1)
    fr = p @ f
    mr = p @ m.T  # (s, k)
    if criterion == "total_field":
        return np.abs(3.0 * mr * (fr / r2)[:, None] - (m @ f)[None, :]) / (r2**1.5)[:, None]
    g = (m[None, :, :] * fr[:, None, None] + f[None, None, :] * mr[:, :, None]
         + ((m @ f)[None, :] - 5.0 * mr * (fr / r2)[:, None])[:, :, None] * p[:, None, :])
    return 3.0 * np.sqrt(np.sum(g * g, axis=-1)) / (r2**2.5)[:, None]


def _peak(elevation_deg, azimuth_deg, f, criterion, s, m) -> np.ndarray:
    """Peak over the track of |signal| / C for unit moments ``m`` (k, 3): array (k,)."""
    return _signal(elevation_deg, azimuth_deg, f, criterion, s, m).max(axis=0)


def induced_profile(inclination_deg: float, criterion: str, elevation_deg: float, azimuth_deg: float,
                    s: np.ndarray) -> np.ndarray:
    """|signal| / C along a track (positions ``s`` in units of r0) for a unit moment along the main field.

    The track's closest point lies at ``elevation_deg`` above the target and
    at ``azimuth_deg`` from magnetic north; its height over the target's
    distance is unity, so the physical profile is this times ``C m / r0^n``.
    """
    f = field_unit(inclination_deg)
    return _signal(elevation_deg, azimuth_deg, f, criterion, np.asarray(s, dtype=float), f[None, :])[:, 0]


def _sphere(n: int) -> np.ndarray:
    """Fibonacci points on the upper unit hemisphere (|signal| is even in m)."""
    i = np.arange(n) + 0.5
    z = 1.0 - i / n
    rho = np.sqrt(1.0 - z * z)
    th = math.pi * (1.0 + math.sqrt(5.0)) * i
    return np.column_stack([rho * np.cos(th), rho * np.sin(th), z])


def _unit(theta: float, psi: float) -> np.ndarray:
    return np.array([math.sin(theta) * math.cos(psi), math.sin(theta) * math.sin(psi), math.cos(theta)])


def half_maximum_width(profile: np.ndarray, s: np.ndarray) -> float:
    """Length of the contiguous run around the peak where the profile is at least half its peak."""
    k = int(np.argmax(profile))
    half = 0.5 * profile[k]
    lo = k
    while lo > 0 and profile[lo - 1] >= half:
        lo -= 1
    hi = k
    while hi < profile.size - 1 and profile[hi + 1] >= half:
        hi += 1

    def cross(i_in, i_out):
        if i_out < 0 or i_out >= profile.size:
            return s[i_in]
        y0, y1 = profile[i_in], profile[i_out]
        t = (y0 - half) / (y0 - y1) if y0 != y1 else 0.0
        return s[i_in] + t * (s[i_out] - s[i_in])

    return float(cross(hi, hi + 1) - cross(lo, lo - 1))


def _worst_refined(elevation_deg: float, f: np.ndarray, criterion: str, start_m: np.ndarray, start_b: float) -> float:
    """Least peak over moment direction and track direction, refined from a start (Nelder-Mead)."""
    from scipy.optimize import minimize

    def objective(x):
        return float(_peak(elevation_deg, x[2], f, criterion, _S_SEARCH, _unit(x[0], x[1])[None, :])[0])

    theta = math.acos(max(-1.0, min(1.0, start_m[2])))
    psi = math.atan2(start_m[1], start_m[0])
    res = minimize(objective, [theta, psi, start_b], method="Nelder-Mead",
                   options={"xatol": 1e-3, "fatol": 1e-6, "maxiter": 300})
    # the along-track peak of the minimiser on the fine positions
    return float(_peak(elevation_deg, res.x[2], f, criterion, _S_FINE, _unit(res.x[0], res.x[1])[None, :])[0])


@dataclass(frozen=True)
class FactorTable:
    """Orientation and width factors against the elevation angle of the closest approach.

    Attributes
    ----------
    inclination_deg : float
        Main-field inclination, degrees, positive down.
    criterion : str
        ``"gradient"`` or ``"total_field"``.
    elevation_deg : ndarray
        Elevation angles of the table, degrees (0 = level with the target, 90 = overhead).
    worst, typical : ndarray
        Orientation factors (dimensionless): peak signal = C m factor / r0^n.
    width : ndarray
        Full width at half maximum of the typical along-track profile, in units of r0.
    """

    inclination_deg: float
    criterion: str
    elevation_deg: np.ndarray
    worst: np.ndarray
    typical: np.ndarray
    width: np.ndarray

    @property
    def exponent(self) -> int:
        """Fall-off exponent of the peak signal with distance (4 gradient, 3 total field)."""
        return EXPONENT[self.criterion]

    def factor(self, orientation: str, elevation_deg):
        """Orientation factor (``"worst"`` or ``"typical"``) at elevation angles (degrees), interpolated."""
        table = self.worst if orientation == "worst" else self.typical
        return np.interp(np.clip(elevation_deg, 0.0, 90.0), self.elevation_deg, table)

    def width_factor(self, elevation_deg):
        """Half-maximum width of the typical along-track anomaly over r0 at elevation angles (degrees)."""
        return np.interp(np.clip(elevation_deg, 0.0, 90.0), self.elevation_deg, self.width)


@lru_cache(maxsize=16)
def _table(inclination_key: float, criterion: str) -> FactorTable:
    f = field_unit(inclination_key)
    sphere = _sphere(_N_SPHERE)
    worst, typical, width = [], [], []
    for phi in ELEVATIONS_DEG:
        peaks, typ, wid = [], [], []
        for b in TRACK_AZIMUTHS_DEG:
            peaks.append(_peak(phi, b, f, criterion, _S_COARSE, sphere))
            prof = _signal(phi, b, f, criterion, _S_FINE, f[None, :])[:, 0]
            typ.append(float(prof.max()))
            wid.append(half_maximum_width(prof, _S_FINE))
        peaks = np.array(peaks)  # (azimuths, directions)
        if criterion == "gradient":
            # refine from the best sampled direction of each of the _STARTS best track directions
            per_azimuth = peaks.min(axis=1)
            values = [float(per_azimuth.min())]
            for ib in np.argsort(per_azimuth)[:_STARTS]:
                im = int(np.argmin(peaks[ib]))
                values.append(_worst_refined(phi, f, criterion, sphere[im], TRACK_AZIMUTHS_DEG[ib]))
            worst.append(min(values))
        else:
            worst.append(float(np.percentile(peaks, WORST_PERCENTILE_TOTAL_FIELD)))
        typical.append(float(np.median(typ)))
        width.append(float(np.median(wid)))
    return FactorTable(float(inclination_key), criterion, ELEVATIONS_DEG.copy(), np.array(worst), np.array(typical),
                       np.array(width))


def factor_table(inclination_deg: float, criterion: str = "gradient") -> FactorTable:
    """The factor table for a main-field inclination (degrees, positive down; only its magnitude matters).

    Computed once per inclination (rounded to 0.01 degree) and criterion in
    a process, in about two seconds.
    """
    if criterion not in CRITERIA:
        raise ValueError(f"criterion must be one of {CRITERIA}, got {criterion!r}")
    inc = float(inclination_deg)
    if not math.isfinite(inc) or abs(inc) > 90.0:
        raise ValueError(f"inclination must lie in [-90, 90] degrees, got {inclination_deg!r}")
    # the southern hemisphere mirrors the northern one (f -> its reflection; |signal| unchanged)
    return _table(round(abs(inc), 2), criterion)


def _geometry(d, z):
    d = np.asarray(d, dtype=float)
    z = np.asarray(z, dtype=float)
    return np.hypot(d, z), np.degrees(np.arctan2(z, d))


def least_moment(table: FactorTable, orientation: str, threshold: float, d, z):
    """Least moment detected on a track at horizontal offset ``d`` and height ``z`` above the target.

    Parameters
    ----------
    table : FactorTable
    orientation : str
        ``"worst"`` or ``"typical"``.
    threshold : float
        Detection threshold (nT/m for the gradient criterion, nT for the total field).
    d, z : array_like
        Horizontal offset of the track and height of the sensor above the target, m.

    Returns
    -------
    ndarray
        ``threshold r0^n / (C factor)``, A m^2.
    """
    r0, phi = _geometry(d, z)
    return threshold * r0**table.exponent / (C_NT * table.factor(orientation, phi))


def peak_signal(table: FactorTable, orientation: str, moment_Am2: float, d, z):
    """Peak signal along a track at offset ``d`` and height ``z`` (nT/m or nT): ``C m factor / r0^n``."""
    r0, phi = _geometry(d, z)
    return C_NT * moment_Am2 * table.factor(orientation, phi) / r0**table.exponent


def detection_offset(table: FactorTable, orientation: str, moment_Am2: float, threshold: float, z: float) -> float:
    """Largest horizontal track offset up to which the moment is detected at every offset, m.

    NaN when even the track straight over the target does not detect it.
    """
    if peak_signal(table, orientation, moment_Am2, 0.0, z) < threshold:
        return float("nan")
    # the peak falls at least as fast as factor_max / r0^n: beyond that offset nothing is detected
    fmax = float(np.max(table.worst if orientation == "worst" else table.typical))
    far = (C_NT * moment_Am2 * fmax / threshold) ** (1.0 / table.exponent)
    d = np.linspace(0.0, max(far, 1e-6), 4001)
    ok = peak_signal(table, orientation, moment_Am2, d, z) >= threshold
    if ok.all():
        return float(d[-1])
    k = int(np.argmin(ok))  # first offset that fails
    lo, hi = float(d[k - 1]), float(d[k])
    for _ in range(60):
        mid = 0.5 * (lo + hi)
        if peak_signal(table, orientation, moment_Am2, mid, z) >= threshold:
            lo = mid
        else:
            hi = mid
    return lo


def overhead_distance(table: FactorTable, orientation: str, moment_Am2: float, threshold: float) -> float:
    """Largest distance straight below a track at which the moment is detected, m: ``(C m F(90) / t)^(1/n)``."""
    f90 = float(table.factor(orientation, 90.0))
    return (C_NT * moment_Am2 * f90 / threshold) ** (1.0 / table.exponent)


def anomaly_width(table: FactorTable, d, z):
    """Half-maximum width along the track of the typical anomaly seen at offset ``d`` and height ``z``, m."""
    r0, phi = _geometry(d, z)
    return table.width_factor(phi) * r0
