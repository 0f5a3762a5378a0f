"""Fit one pick or a group of picks and turn the fit into table rows.

Starts, bounds and the derived figures of a dipole fit (see
:mod:`lodeline.steps._dipole_solve` for the method): depth below the
sensors (the median elevation of the readings used less the source
elevation), 1-sigma horizontal position error ``sqrt(var_e + var_n)``
(the RMS radial error), depth error ``sqrt(var_up)``, moment-magnitude
error through ``m / |m|``, and the moment's angles
(:func:`lodeline.steps._dipole_model.moment_angles`). Plain bookkeeping,
no published method of its own.
"""

from __future__ import annotations

import numpy as np

from ._dipole_model import moment_angles
from ._dipole_solve import fit_dipoles

__all__ = ["COLUMNS", "empty_row", "fit_group"]

COLUMNS = (
    "pick_id", "kind", "easting_m", "northing_m", "elevation_m", "depth_below_sensor_m",
    "moment_east_Am2", "moment_north_Am2", "moment_up_Am2", "moment_Am2",
    "moment_inclination_deg", "moment_declination_deg", "remanence_angle_deg",
    "fit_r2", "fit_rms_nT", "n_readings", "easting_sigma_m", "northing_sigma_m",
    "position_sigma_m", "depth_sigma_m", "moment_sigma_Am2", "main_field_nT",
    "joint_group", "ok", "note",
)


def empty_row(pick_id, kind, n_readings: int, note: str, main_field_nT: float) -> dict:
    """A row with NaN results and a note (pick not fitted)."""
    row = {c: np.nan for c in COLUMNS}
    row.update(pick_id=pick_id, kind=kind, n_readings=int(n_readings), joint_group=-1, ok=False,
               note=note, main_field_nT=main_field_nT)
    return row


def fit_group(obs, values, f_hat, picks_xy, euler_xyz, settings) -> tuple:
    """Fit dipoles for one pick (or jointly for several) and return rows.

    Parameters
    ----------
    obs : ndarray (n, 3)
        Readings east, north, up, m.
    values : ndarray (n,)
        Residual anomaly, nT.
    f_hat : ndarray (3,)
        Main-field unit vector.
    picks_xy : ndarray (k, 2)
        Pick positions, m (one source each).
    euler_xyz : list of ndarray (3,) or None
        Euler solution (east, north, up, m) for each pick, or None.
    settings : dict
        Validated stage parameters (``radius_m``, ``start_depths_m``,
        ``min_depth_m``, ``max_depth_m``, ``background``).

    Returns
    -------
    fit : DipoleFit
    rows : list of dict
        One per source, all :data:`COLUMNS` but ``pick_id``, ``kind``,
        ``joint_group``, ``ok``, ``note`` and ``main_field_nT``.
    """
    k = picks_xy.shape[0]
    sensor = float(np.median(obs[:, 2]))
    r = settings["radius_m"]
    top, bottom = sensor - settings["min_depth_m"], sensor - settings["max_depth_m"]
    lower = np.column_stack([picks_xy - r, np.full(k, bottom)])
    upper = np.column_stack([picks_xy + r, np.full(k, top)])
    starts = [np.column_stack([picks_xy, np.full(k, sensor - d)]) for d in settings["start_depths_m"]]
    if any(e is not None for e in euler_xyz):
        guess = np.column_stack([picks_xy, np.full(k, sensor - settings["start_depths_m"][0])])
        for j, e in enumerate(euler_xyz):
            if e is not None:
                guess[j] = e
        starts.insert(0, guess)
    fit = fit_dipoles(obs, values, f_hat, starts, lower, upper, settings["background"])
    rows = []
    for j in range(k):
        m = fit.moments[j]
        size, inc, dec, angle = moment_angles(m, f_hat)
        g = m / size if size > 0 else np.zeros(3)
        pc = fit.position_cov[j]
        rows.append({
            "easting_m": fit.positions[j, 0], "northing_m": fit.positions[j, 1],
            "elevation_m": fit.positions[j, 2], "depth_below_sensor_m": sensor - fit.positions[j, 2],
            "moment_east_Am2": m[0], "moment_north_Am2": m[1], "moment_up_Am2": m[2],
            "moment_Am2": size, "moment_inclination_deg": inc, "moment_declination_deg": dec,
            "remanence_angle_deg": angle, "fit_r2": fit.r2, "fit_rms_nT": fit.rms_nT,
            "n_readings": fit.n, "easting_sigma_m": np.sqrt(pc[0, 0]), "northing_sigma_m": np.sqrt(pc[1, 1]),
            "position_sigma_m": np.sqrt(pc[0, 0] + pc[1, 1]), "depth_sigma_m": np.sqrt(pc[2, 2]),
            "moment_sigma_Am2": float(np.sqrt(max(g @ fit.moment_cov[j] @ g, 0.0))),
        })
    return fit, rows
