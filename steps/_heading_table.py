"""Heading-error models per sensor: coefficients or a heading-test table (helper of the heading stage).

A sensor's heading error is either

* a first-order Fourier series in the course ``h`` (grid azimuth, degrees
  clockwise from grid north): ``e(h) = a + b cos(h) + c sin(h)``, nT; or
* a heading-test table: the error measured at a few courses
  (``heading_deg``, ``correction_nT``), interpolated linearly and
  periodically in the course (period 360 degrees), so that between the last
  and the first entry the interpolation runs across north.

The correction removed from a reading is ``e(h)`` at the reading's course.

Why a first-order series: a magnetisation fixed to the sensor platform
adds a field whose component along the main field turns with the platform,
so it changes as the cosine and sine of the heading; an induced
magnetisation of the platform adds second harmonics, which this model
leaves out (common practice, no published source for this exact form).

Linear periodic interpolation is :func:`numpy.interp` with ``period=360``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from lodeline.params import ParameterError, closest

__all__ = ["SensorModel", "ZERO", "parse_table", "evaluate", "block_correction"]

_TABLE_KEYS = ("heading_deg", "correction_nT")
_COEF_KEYS = ("a_nT", "b_nT", "c_nT")


@dataclass(frozen=True)
class SensorModel:
    """Heading error of one sensor.

    Attributes
    ----------
    a, b, c : float
        Coefficients of ``a + b cos(h) + c sin(h)``, nT (used when
        ``headings`` is None).
    headings, values : tuple of float, optional
        A heading-test table: courses in degrees within [0, 360), sorted,
        and the heading error at each, nT.
    zero : bool
        No correction at all (the correction is 0 even where the course is
        unknown).
    """

    a: float = 0.0
    b: float = 0.0
    c: float = 0.0
    headings: tuple[float, ...] | None = None
    values: tuple[float, ...] | None = None
    zero: bool = False


#: The model of a sensor that gets no correction.
ZERO = SensorModel(zero=True)


def parse_table(table: dict, sensor_names, where: str = "heading.table") -> list[SensorModel]:
    """Validate a ``[heading.table]`` and return one model per sensor.

    Parameters
    ----------
    table : dict
        Sensor name -> either ``{heading_deg = [...], correction_nT = [...]}``
        (a heading-test table, at least two distinct courses) or
        ``{b_nT = ..., c_nT = ..., a_nT = ...}`` (coefficients; missing ones
        are 0).
    sensor_names : list of str
        Sensors of the survey, in index order; every one must be in the table.
    where : str
        Name of the table in messages.

    Returns
    -------
    list of SensorModel
        In the order of ``sensor_names``.

    Raises
    ------
    lodeline.params.ParameterError
        Naming the sensor and key at fault.
    """
    names = [str(s) for s in sensor_names]
    for key in table:
        if key not in names:
            hint = closest(str(key), names)
            extra = f" (did you mean {hint!r}?)" if hint else ""
            raise ParameterError(
                f"{where}.{key}: no sensor of that name in the survey{extra}; sensors are {', '.join(names)}"
            )
    models = []
    for name in names:
        if name not in table:
            raise ParameterError(
                f"{where} has no entry for sensor {name}: add {where}.{name} = "
                "{heading_deg = [...], correction_nT = [...]} or {b_nT = ..., c_nT = ...}"
            )
        models.append(_parse_entry(table[name], f"{where}.{name}"))
    return models


def _parse_entry(entry, where: str) -> SensorModel:
    if not isinstance(entry, dict):
        raise ParameterError(f"{where} = {entry!r} must be a table (heading_deg/correction_nT or a_nT/b_nT/c_nT)")
    known = _TABLE_KEYS + _COEF_KEYS
    for key in entry:
        if key not in known:
            hint = closest(str(key), known)
            extra = f"; did you mean {hint!r}?" if hint else ""
            raise ParameterError(f"unknown key {where}.{key}{extra} (known: {', '.join(known)})")
    has_table = any(k in entry for k in _TABLE_KEYS)
    has_coef = any(k in entry for k in _COEF_KEYS)
    if has_table and has_coef:
        raise ParameterError(f"{where}: give either heading_deg/correction_nT or a_nT/b_nT/c_nT, not both")
    if has_coef:
        values = {}
        for key in _COEF_KEYS:
            value = entry.get(key, 0.0)
            if isinstance(value, bool) or not isinstance(value, (int, float)) or not np.isfinite(value):
                raise ParameterError(f"{where}.{key} = {value!r} must be a finite number, nT")
            values[key] = float(value)
        return SensorModel(a=values["a_nT"], b=values["b_nT"], c=values["c_nT"])
    for key in _TABLE_KEYS:
        if key not in entry:
            raise ParameterError(
                f"{where}: {key} is missing (a heading-test table needs heading_deg and correction_nT)"
            )
        value = entry[key]
        if not isinstance(value, list) or not all(
            isinstance(v, (int, float)) and not isinstance(v, bool) and np.isfinite(v) for v in value
        ):
            raise ParameterError(f"{where}.{key} = {value!r} must be a list of finite numbers")
    h = np.asarray(entry["heading_deg"], dtype=np.float64)
    v = np.asarray(entry["correction_nT"], dtype=np.float64)
    if h.size != v.size:
        raise ParameterError(
            f"{where}: heading_deg has {h.size} values but correction_nT has {v.size}; give one correction per heading"
        )
    h = np.mod(h, 360.0)
    order = np.argsort(h, kind="stable")
    h, v = h[order], v[order]
    if h.size < 2 or np.any(np.diff(h) <= 0.0):
        raise ParameterError(
            f"{where}.heading_deg must hold at least two different headings (modulo 360), got {entry['heading_deg']!r}"
        )
    return SensorModel(headings=tuple(h.tolist()), values=tuple(v.tolist()))


def evaluate(model: SensorModel, heading_deg) -> np.ndarray:
    """Heading error of one sensor at the given courses, nT.

    Parameters
    ----------
    model : SensorModel
    heading_deg : array of float
        Course, degrees clockwise from grid north (any range; NaN where
        unknown).

    Returns
    -------
    ndarray of float
        ``e(h)``; NaN where the course is NaN, unless the model is
        :data:`ZERO` (then 0 everywhere).
    """
    h = np.asarray(heading_deg, dtype=np.float64)
    if model.zero:
        return np.zeros(h.shape)
    if model.headings is not None:
        out = np.interp(np.mod(h, 360.0), model.headings, model.values, period=360.0)
        return np.where(np.isfinite(h), out, np.nan)
    rad = np.radians(h)
    return model.a + model.b * np.cos(rad) + model.c * np.sin(rad)


def block_correction(heading_deg: np.ndarray, sensor_index: np.ndarray, *, models: tuple) -> np.ndarray:
    """Heading correction of one block of readings, nT (a ``map_blocks`` kernel).

    Parameters
    ----------
    heading_deg : ndarray of float
        Course of each reading, degrees.
    sensor_index : ndarray of int
        Sensor of each reading (index into ``models``).
    models : tuple of SensorModel
        One per sensor of the survey.

    Returns
    -------
    ndarray of float64
        The correction of each reading.
    """
    h = np.asarray(heading_deg, dtype=np.float64)
    s = np.asarray(sensor_index, dtype=np.int64)
    out = np.zeros(h.shape)
    for k in np.unique(s):
        mask = s == k
        out[mask] = evaluate(models[int(k)], h[mask])
    return out
