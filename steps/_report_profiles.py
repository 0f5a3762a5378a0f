"""Profiles of the levelled readings across a target against its fitted dipole.

For each target shown, the levelled residual readings within the fit radius
(chunk by chunk, :func:`lodeline.steps._dipole_select.select_near`) are
compared with the anomaly of the fitted point dipoles near it, forward
modelled with :func:`lodeline.steps._dipole_model.design` (the dipole field
projected on the main-field direction; Blakely 1995, ch. 4 and 12). The
model holds the sources that were fitted together: the target's own dipole,
or every member of its joint fit. The fit's background is not part of the
dipole table, so it is estimated again here, by linear least squares on
the readings less the dipole anomaly (a constant, or a plane in easting
and northing, as the dipole_fit stage's ``background``).

The readings are those within the radius of the pick the dipole was fitted
to (the fit's own selection), or of the target when no pick is known. A
*pass* is the run of readings of one segment (one line of one sensor)
inside the radius; the passes closest to the target are drawn against the
distance along the track from the reading nearest the target.

References
----------
Blakely, R. J. (1995). Potential Theory in Gravity and Magnetic
    Applications. Cambridge University Press. [Blakely1995]_
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ._dipole_model import design, field_unit_vector
from ._dipole_select import select_near
from ._dipole_solve import background_columns

__all__ = ["moment_vector", "dipole_anomaly", "target_profiles"]


def moment_vector(table: pd.DataFrame) -> np.ndarray:
    """Moments (east, north, up), A m^2, one row per table row.

    From ``moment_east_Am2``, ``moment_north_Am2``, ``moment_up_Am2`` when
    present, else from ``moment_Am2`` and its inclination (positive down)
    and declination (clockwise from grid north), degrees.
    """
    cols = ["moment_east_Am2", "moment_north_Am2", "moment_up_Am2"]
    if all(c in table.columns for c in cols):
        return table[cols].to_numpy(float)
    size = table["moment_Am2"].to_numpy(float)
    inc = np.radians(table["moment_inclination_deg"].to_numpy(float))
    dec = np.radians(table["moment_declination_deg"].to_numpy(float))
    return size[:, None] * np.column_stack([np.cos(inc) * np.sin(dec), np.cos(inc) * np.cos(dec), -np.sin(inc)])


def dipole_anomaly(obs: np.ndarray, sources: np.ndarray, moments: np.ndarray, f_hat: np.ndarray) -> np.ndarray:
    """Total-field anomaly of point dipoles at ``obs`` (east, north, up; m), nT."""
    if len(sources) == 0:
        return np.zeros(len(obs))
    return design(obs, sources, f_hat) @ np.asarray(moments, float).ravel()


def _background(obs, rest, kind):
    a = background_columns(obs, kind)
    coef, *_ = np.linalg.lstsq(a, rest, rcond=None)
    return a @ coef


def _passes(idx, obs, observed, model, starts, seg_line, seg_sensor, centre, most):
    seg = np.searchsorted(starts, idx, side="right") - 1
    out = []
    for s in np.unique(seg):
        m = np.flatnonzero(seg == s)
        m = m[np.argsort(idx[m])]
        xy = obs[m, :2]
        dist = np.hypot(*(xy - centre).T)
        near = int(np.argmin(dist))
        if len(m) >= 2:
            u = xy[-1] - xy[0]
            u = u / (np.hypot(*u) or 1.0)
        else:
            u = np.array([1.0, 0.0])
        along = (xy - xy[near]) @ u
        out.append({"segment": int(s), "line_index": int(seg_line[s]), "sensor_index": int(seg_sensor[s]),
                    "offset_m": float(dist[near]), "along_m": along, "observed_nT": observed[m],
                    "model_nT": model[m]})
    out.sort(key=lambda p: p["offset_m"])
    return out[:most]


def target_profiles(readings, segments, shown: pd.DataFrame, sources: list, *, radius_m: float,
                    exclude: int, background: str = "plane", passes: int = 3) -> list[dict]:
    """Readings and modelled anomaly near each target shown.

    Parameters
    ----------
    readings : xarray.Dataset
        Levelled readings (``residual``, nT; ``flags``; main-field attributes
        ``main_field_inclination_deg``, ``main_field_grid_declination_deg``).
    segments : xarray.Dataset
        Segments table (``start``, ``line_index``, ``sensor_index``).
    shown : pandas.DataFrame
        Targets to profile: ``target_id``, ``easting_m``, ``northing_m``
        (the source, m: origin of the passes), and optionally
        ``centre_easting_m``, ``centre_northing_m`` (m): the centre of the
        readings fitted (the pick), used to select the same readings.
    sources : list of pandas.DataFrame
        For each target shown, the dipoles of its model: ``easting_m``,
        ``northing_m``, ``elevation_m`` (m) and the moment (see
        :func:`moment_vector`).
    radius_m : float
        Horizontal radius of the readings used, m.
    exclude : int
        Bit mask of flags whose readings are left out.
    background : str
        ``"constant"`` or ``"plane"``.
    passes : int
        Most passes returned per target.

    Returns
    -------
    list of dict
        Per target: ``target_id``, ``n_readings``, ``rms_nT`` and ``r2`` of
        observed against modelled, ``observed_nT``, ``model_nT`` (all
        readings used) and ``passes`` (closest first).
    """
    f_hat = field_unit_vector(float(readings.attrs["main_field_inclination_deg"]),
                              float(readings.attrs["main_field_grid_declination_deg"]))
    where = shown[["easting_m", "northing_m"]].to_numpy(float)
    centres = where.copy()
    if {"centre_easting_m", "centre_northing_m"} <= set(shown.columns):
        given = shown[["centre_easting_m", "centre_northing_m"]].to_numpy(float)
        ok = np.isfinite(given).all(axis=1)
        centres[ok] = given[ok]
    sel = select_near(readings, "residual", centres, radius_m, exclude)
    obs_all = np.column_stack([sel["easting"], sel["northing"], sel["elevation"]])
    starts = np.asarray(segments["start"].values)
    seg_line, seg_sensor = np.asarray(segments["line_index"].values), np.asarray(segments["sensor_index"].values)
    out = []
    for tid, centre, source_xy, table in zip(shown["target_id"], centres, where, sources):
        src = table[["easting_m", "northing_m", "elevation_m"]].to_numpy(float)
        mom = moment_vector(table)
        good = np.isfinite(src).all(axis=1) & np.isfinite(mom).all(axis=1)
        src, mom = src[good], mom[good]
        near = np.flatnonzero(np.hypot(*(obs_all[:, :2] - centre).T) <= radius_m)
        entry = {"target_id": tid, "n_readings": int(near.size), "passes": [], "rms_nT": np.nan, "r2": np.nan,
                 "observed_nT": np.zeros(0), "model_nT": np.zeros(0), "sources": int(len(src))}
        if near.size >= 3:
            obs, observed = obs_all[near], sel["value"][near]
            model = dipole_anomaly(obs, src, mom, f_hat)
            model = model + _background(obs, observed - model, background)
            misfit = observed - model
            spread = np.sum((observed - observed.mean()) ** 2)
            entry.update(rms_nT=float(np.sqrt(np.mean(misfit**2))),
                         r2=float(1 - np.sum(misfit**2) / spread) if spread > 0 else np.nan,
                         observed_nT=observed, model_nT=model,
                         passes=_passes(sel["index"][near], obs, observed, model, starts, seg_line, seg_sensor,
                                        source_xy, passes))
        out.append(entry)
    return out
