"""Induced moment per unit mass of iron items, and the factors that widen it.

Sphere
    A sphere of susceptibility ``chi`` in a uniform field ``H0 = B0 / mu0``
    is magnetised uniformly, ``M = 3 chi / (3 + chi) H0`` (its
    demagnetising factor is 1/3; Blakely 1995, ch. 4; Jackson 1999,
    section 5.10). For iron (``chi`` in the hundreds or more) this tends to
    ``M = 3 H0``: the moment of a solid iron sphere of volume ``V`` is
    ``m = 3 V B0 / mu0``, whatever its permeability, and per unit mass
    ``3 B0 / (mu0 rho)``.

Elongation
    A prolate spheroid magnetised along its long axis has
    ``M = chi / (1 + N chi) H0 -> H0 / N`` with ``N`` the demagnetising
    factor of that axis, which for aspect ratio ``c = a / b`` (long over
    short semi-axis) is (Osborn 1945, eq. for the prolate spheroid)
    ``N = (c ln(c + sqrt(c^2 - 1)) / sqrt(c^2 - 1) - 1) / (c^2 - 1)``;
    ``N = 1/3`` for the sphere. The moment per unit volume is raised by
    ``1 / (3 N)`` over the sphere's.

Hollowness
    A highly permeable spherical shell in a uniform field has nearly the
    moment of the solid sphere of the same outer radius (the shell
    carries the flux round the cavity: magnetic shielding by a shell,
    Jackson 1999, section 5.12), when ``chi t / a`` is large (``t`` the
    wall thickness, ``a`` the outer radius). So the moment per unit mass is
    raised by ``solid volume / metal volume = 1 / (1 - (1 - t/a)^3)``.

Remanence
    A remanent moment adds to the induced one; the factor ``1 + Q`` with
    ``Q`` the largest ratio of remanent to induced moment allowed is
    common practice, no published source.

References
----------
Blakely, R. J. (1995). Potential Theory in Gravity and Magnetic
    Applications. Cambridge University Press. [Blakely1995]_
Jackson, J. D. (1999). Classical Electrodynamics, 3rd ed. Wiley.
    [Jackson1999]_ (sections cited from memory)
Osborn, J. A. (1945). Demagnetizing factors of the general ellipsoid.
    Physical Review 67(11-12), 351-357. [Osborn1945]_
"""

from __future__ import annotations

import numpy as np

from ._dipole_model import MU0

__all__ = ["prolate_demagnetising_factor", "sphere_moment_per_kg", "elongation_factor", "hollow_factor"]


def prolate_demagnetising_factor(aspect_ratio: float) -> float:
    """Demagnetising factor along the long axis of a prolate spheroid (Osborn 1945).

    Parameters
    ----------
    aspect_ratio : float
        Long over short semi-axis, >= 1 (1 is the sphere).

    Returns
    -------
    float
        Dimensionless factor in (0, 1/3].
    """
    c = float(aspect_ratio)
    if c < 1.0:
        raise ValueError("aspect ratio must be at least 1")
    if c - 1.0 < 1e-6:
        return 1.0 / 3.0
    s = np.sqrt(c * c - 1.0)
    return float((c * np.log(c + s) / s - 1.0) / (c * c - 1.0))


def sphere_moment_per_kg(main_field_nT: float, density_kg_m3: float) -> float:
    """Induced moment of a solid, highly permeable sphere per kilogram, A m^2 / kg.

    ``m / M = 3 B0 / (mu0 rho)``, with ``B0`` the main-field intensity (T).
    """
    return 3.0 * main_field_nT * 1e-9 / (MU0 * density_kg_m3)


def elongation_factor(aspect_ratio: float) -> float:
    """Moment of an elongated item (long axis along the field) over a sphere's, same volume: ``1 / (3 N)``."""
    return 1.0 / (3.0 * prolate_demagnetising_factor(aspect_ratio))


def hollow_factor(wall_fraction: float) -> float:
    """Solid volume over metal volume of a shell of wall ``wall_fraction`` times its outer radius."""
    t = float(wall_fraction)
    return 1.0 / (1.0 - (1.0 - t) ** 3)
