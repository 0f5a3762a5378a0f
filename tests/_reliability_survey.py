"""A small invented survey that yields targets, for the crash-safety and
determinism tests (tests/test_reliability.py).

It is the tiny survey of ``tests/_bad_input_cases.py`` (three survey lines
4 m apart, a tie line, two sensors 1 m apart, about 1,600 readings) with the
total-field anomalies of a few buried point dipoles added to its readings,
so that every stage down to the target table has something to do, in
reading chunks of about 1,000 readings and grid tiles of 16 cells a side
(several tasks per stage). The dipoles are invented; their anomaly is the point-dipole total-field anomaly
(Blakely 1995, Potential Theory in Gravity and Magnetic Applications, ch. 4)
along an invented main-field direction.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from pyproj import Transformer

from _bad_input_cases import CRS, SENSORS, Survey, make_survey

_TO_GRID = Transformer.from_crs("EPSG:4326", CRS, always_xy=True)
#: Origin of the tiny survey's local frame in the survey CRS (see _bad_input_cases).
ORIGIN = (500000.0 - 2000.0, 6_000_000.0)
#: Invented main-field direction: inclination 68 deg, declination 1 deg.
INCLINATION_DEG, DECLINATION_DEG = 68.0, 1.0
#: Invented buried items: local east, north (m), depth below the sensors (m), induced moment (A m^2).
DIPOLES = ((11.0, 2.0, 3.5, 6.0), (36.0, 6.5, 3.2, 4.0), (42.0, 1.0, 3.8, 10.0))
#: Course of each line of the tiny survey (deg clockwise from grid north).
COURSE_DEG = {"L1": 90.0, "L2": 270.0, "L3": 90.0, "T1": 0.0}


def _unit(inc_deg: float, dec_deg: float) -> np.ndarray:
    inc, dec = np.radians(inc_deg), np.radians(dec_deg)
    return np.array([np.cos(inc) * np.sin(dec), np.cos(inc) * np.cos(dec), -np.sin(inc)])  # east, north, up


def dipole_anomaly_nT(east: np.ndarray, north: np.ndarray, dipoles=DIPOLES) -> np.ndarray:
    """Total-field anomaly (nT) on the sensors' plane of induced point dipoles
    (moment along the main field), B = mu0/(4 pi) (3 (m.r) r / r^5 - m / r^3)."""
    f = _unit(INCLINATION_DEG, DECLINATION_DEG)
    out = np.zeros_like(east, dtype=float)
    for e0, n0, depth, moment in dipoles:
        r = np.stack([east - e0, north - n0, np.full_like(east, depth, dtype=float)])
        dist = np.sqrt((r * r).sum(axis=0))
        m = moment * f
        mr = np.tensordot(m, r, axes=1)
        b = 1e-7 * (3 * mr * r / dist**5 - m[:, None] / dist**3)  # tesla
        out += 1e9 * np.tensordot(f, b, axes=1)
    return out


def make_target_survey(folder: Path, seed: int = 7) -> Survey:
    """The tiny survey with the anomalies of :data:`DIPOLES` added to each reading's field.

    Sensor positions follow the builder: the files give the towed point, and
    a sensor ``across`` m to starboard sits at (cos c, -sin c) * across of it
    for a course c.
    """
    survey = make_survey(folder, seed=seed)
    # Several reading chunks and grid tiles, so that parallel schedulers have
    # tasks to run in different orders (one chunk and one tile by default here).
    # The grid is 38 x 109 cells: tiles of 16 leave edge tiles of 6 and 13 cells,
    # narrower than the 16-cell halo, which the enhancement stage folds into a
    # neighbour (test_properties.py::test_enhancement_tiles_never_share_a_store_chunk).
    survey.config["run"].update(scheduler="threads", chunk_readings=1000)
    survey.config["gridding"].update(tile_cells=16, geotiff=True)  # its GeoTIFF is compared too
    survey.config["enhancement"] = {"halo_cells": 16}
    for name, table in survey.readings.items():
        x, y = _TO_GRID.transform(table["lon"].astype(float).to_numpy(), table["lat"].astype(float).to_numpy())
        course = np.radians(table["line"].map(COURSE_DEG).to_numpy(dtype=float))
        across = table["sensor"].map(SENSORS).to_numpy(dtype=float)
        east = x - ORIGIN[0] + across * np.cos(course)
        north = y - ORIGIN[1] - across * np.sin(course)
        field = table["field_nT"].astype(float).to_numpy() + dipole_anomaly_nT(east, north)
        survey.readings[name] = table.assign(field_nT=[f"{v:.3f}" for v in field])
    return survey
