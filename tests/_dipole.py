"""Closed-form total-field anomaly of a point dipole and its gradient, for tests.

Blakely (1995), Potential Theory in Gravity and Magnetic Applications, ch. 4.
"""

from __future__ import annotations

import numpy as np

MU0_4PI = 1.0e-7  # T m / A


def unit_enu(inclination_deg, declination_deg):
    """Unit vector (east, north, up) of a direction given by inclination (down) and declination."""
    inc, dec = np.deg2rad(inclination_deg), np.deg2rad(declination_deg)
    return np.array([np.cos(inc) * np.sin(dec), np.cos(inc) * np.cos(dec), -np.sin(inc)])


def dipole(e, n, u, source, moment_Am2, m_dir, f_dir):
    """Total-field anomaly (nT) of a point dipole and its gradient (nT/m) along east, north, up.

    Closed form (Blakely 1995, ch. 4): T = C (3 (m.r)(f.r) / r**5 - f.m / r**3) with
    C = 1e9 mu0 / (4 pi); the gradient differentiated by hand:
    dT/dx_j = C (3 (m_j (f.r) + f_j (m.r) + (f.m) r_j) / r**5 - 15 (m.r)(f.r) r_j / r**7).
    """
    m = moment_Am2 * unit_enu(*m_dir)
    f = unit_enu(*f_dir)
    r = np.stack([e - source[0], n - source[1], u - source[2]])
    rr = np.sqrt((r**2).sum(axis=0))
    mr, fr, fm = np.tensordot(m, r, 1), np.tensordot(f, r, 1), f @ m
    c = MU0_4PI * 1e9
    total = c * (3 * mr * fr / rr**5 - fm / rr**3)
    grad = [c * (3 * (m[j] * fr + mr * f[j] + fm * r[j]) / rr**5 - 15 * mr * fr * r[j] / rr**7) for j in range(3)]
    return total, grad
