"""Point-dipole forward model of the total-field anomaly, and moment angles.

The field of a point dipole of moment ``m`` (A m^2) at ``r`` from it is
``B = (mu0 / 4 pi) (3 (m . r_hat) r_hat - m) / r**3`` (Blakely 1995, ch. 4),
and the total-field anomaly of a field small beside the main field is its
projection on the main-field unit vector ``f`` (Blakely 1995, ch. 12). The
anomaly is linear in the three moment components, so the model is written
as a design matrix ``G`` (one row per reading, three columns per dipole)
with ``anomaly = G @ m``.

Axes are easting, northing and up (metres); the main-field inclination is
positive down and its declination is measured clockwise from grid north.

References
----------
Blakely, R. J. (1995). Potential Theory in Gravity and Magnetic
    Applications. Cambridge University Press. [Blakely1995]_
"""

from __future__ import annotations

import numpy as np

__all__ = ["MU0", "field_unit_vector", "design", "source_gradient", "moment_angles"]

#: Permeability of free space, T m / A (exact enough: 4 pi 1e-7).
MU0 = 4e-7 * np.pi
_K_NT = 1e-7 * 1e9  # mu0 / (4 pi) in T m / A, times 1e9 for nT


def field_unit_vector(inclination_deg: float, declination_deg: float) -> np.ndarray:
    """Unit vector (east, north, up) of the main field.

    Parameters
    ----------
    inclination_deg : float
        Inclination, degrees, positive down.
    declination_deg : float
        Declination, degrees clockwise from grid north.
    """
    inc, dec = np.radians(inclination_deg), np.radians(declination_deg)
    return np.array([np.cos(inc) * np.sin(dec), np.cos(inc) * np.cos(dec), -np.sin(inc)])


def design(obs: np.ndarray, sources: np.ndarray, f_hat: np.ndarray) -> np.ndarray:
    """Design matrix of the total-field anomaly of point dipoles.

    Parameters
    ----------
    obs : ndarray, shape (n, 3)
        Reading positions (east, north, up), m.
    sources : ndarray, shape (k, 3)
        Dipole positions (east, north, up), m.
    f_hat : ndarray, shape (3,)
        Main-field unit vector.

    Returns
    -------
    ndarray, shape (n, 3 k)
        nT per A m^2: column ``3 j + c`` is the anomaly of a unit moment of
        dipole ``j`` along axis ``c`` (east, north, up).
    """
    sources = np.atleast_2d(sources)
    cols = []
    for s in sources:
        r = obs - s
        dist2 = np.einsum("ij,ij->i", r, r)
        inv3 = dist2 ** -1.5
        fr = r @ f_hat
        # f . B for unit moment along axis c: (3 (f.r) r_c / r^2 - f_c) / r^3
        cols.append(_K_NT * (3.0 * (fr / dist2)[:, None] * r - f_hat[None, :]) * inv3[:, None])
    return np.concatenate(cols, axis=1)


def source_gradient(obs: np.ndarray, sources: np.ndarray, moments: np.ndarray, f_hat: np.ndarray) -> np.ndarray:
    """Derivatives of each dipole's total-field anomaly with respect to its own position.

    With ``r`` from the source to the reading, the anomaly is
    ``T = K (3 (f.r)(m.r) / r^5 - (f.m) / r^3)`` (``K = mu0 / 4 pi``), and
    differentiating by the reading position gives
    ``grad T = K (3 (f (m.r) + m (f.r)) / r^5 + 3 (f.m) r / r^5 - 15 (f.r)(m.r) r / r^7)``;
    moving the source instead changes ``r`` the other way, so the result is
    ``-grad T``.

    Parameters
    ----------
    obs : ndarray, shape (n, 3)
        Reading positions (east, north, up), m.
    sources : ndarray, shape (k, 3)
        Dipole positions, m.
    moments : ndarray, shape (k, 3)
        Dipole moments, A m^2.
    f_hat : ndarray, shape (3,)
        Main-field unit vector.

    Returns
    -------
    ndarray, shape (n, 3 k)
        nT per m: column ``3 j + c`` is the derivative of dipole ``j``'s
        anomaly with respect to its coordinate ``c`` (east, north, up).
    """
    sources = np.atleast_2d(sources)
    moments = np.atleast_2d(moments)
    cols = []
    for s, m in zip(sources, moments):
        r = obs - s
        dist2 = np.einsum("ij,ij->i", r, r)
        inv5 = dist2 ** -2.5
        fr, mr, fm = r @ f_hat, r @ m, float(f_hat @ m)
        grad = (3.0 * (f_hat[None, :] * mr[:, None] + m[None, :] * fr[:, None] + fm * r)
                - 15.0 * (fr * mr / dist2)[:, None] * r) * inv5[:, None]
        cols.append(-_K_NT * grad)
    return np.concatenate(cols, axis=1)


def moment_angles(moment: np.ndarray, f_hat: np.ndarray) -> tuple[float, float, float, float]:
    """Magnitude, inclination, declination and angle to the main field of a moment.

    Parameters
    ----------
    moment : ndarray, shape (3,)
        Moment (east, north, up), A m^2.
    f_hat : ndarray, shape (3,)
        Main-field unit vector.

    Returns
    -------
    magnitude_Am2, inclination_deg, declination_deg, angle_to_field_deg : float
        Inclination positive down; declination clockwise from grid north in
        [0, 360); the angle between the moment and the main field in
        [0, 180] (0 for a purely induced moment of a highly permeable body).
    """
    me, mn, mu = (float(v) for v in moment)
    size = float(np.sqrt(me * me + mn * mn + mu * mu))
    if not np.isfinite(size) or size == 0.0:
        return size, np.nan, np.nan, np.nan
    inc = np.degrees(np.arctan2(-mu, np.hypot(me, mn)))
    dec = np.degrees(np.arctan2(me, mn)) % 360.0
    cosang = np.clip(np.dot(moment, f_hat) / size, -1.0, 1.0)
    return size, float(inc), float(dec), float(np.degrees(np.arccos(cosang)))
