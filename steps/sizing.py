"""Sizing: a band of equivalent ferrous mass from each fitted dipole moment.

A moment does not fix a mass: shape, hollowness and remanence change the
moment a kilogram of iron gives. The band's ends are:

``mass_max_kg``
    The mass of a solid, compact iron sphere of the fitted moment (the
    least moment per kilogram among the items considered), from
    ``m = 3 V B0 / mu0`` (Blakely 1995, ch. 4; Jackson 1999, section 5.10),
    times ``upper_factor`` (1 by default; raise it to allow for items less
    efficient than the sphere, such as plates across the field).
``mass_min_kg``
    The sphere mass divided by the product of the factors of the most
    efficient item allowed: elongation (prolate spheroid of aspect ratio
    ``aspect_ratio`` with its long axis along the field, ``1 / (3 N)``,
    Osborn 1945), hollowness (a shell of wall ``wall_fraction`` of its
    outer radius, solid over metal volume; shielding by a shell, Jackson
    1999, section 5.12) and remanence (``remanence_factor``, common
    practice, no published source).
``mass_sphere_kg`` and ``mass_central_kg``
    The sphere-equivalent mass, and the geometric middle of the band
    ``sqrt(mass_min_kg * mass_max_kg)``.

The model, every factor's value and its origin are written out in
``docs/size_bands.md``. The main-field intensity comes from the dipole
table's ``main_field_nT`` column (the readings' attribute) unless
``main_field_nT`` is given.

References
----------
Blakely, R. J. (1995). Potential Theory in Gravity and Magnetic
    Applications. Cambridge University Press. [Blakely1995]_
Jackson, J. D. (1999). Classical Electrodynamics, 3rd ed. Wiley.
    [Jackson1999]_
Osborn, J. A. (1945). Demagnetizing factors of the general ellipsoid.
    Physical Review 67(11-12), 351-357. [Osborn1945]_
"""

from __future__ import annotations

import numpy as np

from lodeline.model import DataError, Stage, StageContext, StageResult
from lodeline.params import Param, validate_table

from ._dipole_mass import elongation_factor, hollow_factor, sphere_moment_per_kg

__all__ = ["PARAMS", "STAGE", "run", "band_factors"]

PARAMS = (
    Param("density_kg_m3", 7850.0, "Density of the iron or steel, kg/m^3.", minimum=0, exclusive_minimum=True),
    Param("aspect_ratio", 5.0, "Long over short axis of the most elongated item allowed (1 = sphere).", minimum=1, maximum=100),
    Param("wall_fraction", 0.15, "Wall thickness over outer radius of the thinnest-walled item allowed (1 = solid).",
          minimum=0.01, maximum=1),
    Param("remanence_factor", 2.0, "Largest total over induced moment allowed for remanence (1 = none).", minimum=1),
    Param("upper_factor", 1.0, "Multiplier of the sphere mass giving the band's upper end.", minimum=1),
    Param("main_field_nT", None, "Main-field intensity, nT; default from the dipole table.", minimum=1000, maximum=100000,
          optional=True),
)


def band_factors(settings: dict) -> dict:
    """The factors of the band (see ``docs/size_bands.md``).

    Parameters
    ----------
    settings : dict
        Validated ``[sizing]`` table.

    Returns
    -------
    dict
        ``elongation``, ``hollow``, ``remanence``, ``upper`` (dimensionless)
        and ``ratio`` = mass_max / mass_min.
    """
    out = {
        "elongation": elongation_factor(settings["aspect_ratio"]),
        "hollow": hollow_factor(settings["wall_fraction"]),
        "remanence": float(settings["remanence_factor"]),
        "upper": float(settings["upper_factor"]),
    }
    out["ratio"] = out["elongation"] * out["hollow"] * out["remanence"] * out["upper"]
    return out


def run(data: dict, params: dict, context: StageContext) -> StageResult:
    """Add a mass band to every fitted dipole.

    Parameters
    ----------
    data : dict
        ``data["dipole_fit"]["dipoles"]``: the dipole table (``moment_Am2``,
        A m^2; ``main_field_nT``).
    params : dict
        The ``[sizing]`` table (see :data:`PARAMS`).
    context : lodeline.model.StageContext
        Run context.

    Returns
    -------
    lodeline.model.StageResult
        ``tables["dipoles"]``: the dipole table with ``mass_sphere_kg``,
        ``mass_min_kg``, ``mass_max_kg``, ``mass_central_kg`` (kg; NaN where
        no moment was fitted); the factors in the summary.
    """
    settings = validate_table(PARAMS, params, "sizing")
    table = data["dipole_fit"]["dipoles"].copy()
    if "moment_Am2" not in table.columns:
        raise DataError("sizing: the dipole table lacks the column 'moment_Am2': check the dipole_fit stage output")
    if settings["main_field_nT"] is not None:
        field = np.full(len(table), settings["main_field_nT"])
    elif "main_field_nT" in table.columns:
        field = table["main_field_nT"].to_numpy(float)
    else:
        raise DataError("sizing: the dipole table has no 'main_field_nT' column: give sizing.main_field_nT")
    factors = band_factors(settings)
    per_kg = sphere_moment_per_kg(field, settings["density_kg_m3"])
    moment = table["moment_Am2"].to_numpy(float)
    sphere = moment / per_kg
    table["mass_sphere_kg"] = sphere
    table["mass_max_kg"] = sphere * factors["upper"]
    table["mass_min_kg"] = sphere / (factors["elongation"] * factors["hollow"] * factors["remanence"])
    table["mass_central_kg"] = np.sqrt(table["mass_min_kg"] * table["mass_max_kg"])
    summary = {f"factor_{k}": v for k, v in factors.items()}
    summary.update(sized=int(np.isfinite(sphere).sum()), rows=len(table))
    if np.isfinite(sphere).any():
        summary["median_mass_sphere_kg"] = float(np.nanmedian(sphere))
    context.log.info("sizing: %d dipoles sized; band max/min = %.1f (elongation %.2f, hollow %.2f, remanence %.2f)",
                     summary["sized"], factors["ratio"], factors["elongation"], factors["hollow"], factors["remanence"])
    return StageResult(tables={"dipoles": table}, summary=summary)


STAGE = Stage(
    name="sizing",
    run=run,
    params=PARAMS,
    after=("dipole_fit",),
    order=120,
    summary="Band of equivalent ferrous mass from each dipole moment",
)
