"""Main-field removal: subtract the IGRF-14 total field from every reading.

The International Geomagnetic Reference Field, 14th generation (IGRF-14;
the method is described for the 13th generation by Alken et al. 2021), is
evaluated with the general-purpose library ``ppigrf``, which carries the
published IAGA coefficient file, at each reading's position, elevation and
time, and its total intensity ``F = |B|`` is removed as the correction
``main_field`` (nT); the residual is then the crustal anomaly plus whatever
later stages remove.

Speed
    A direct evaluation costs about 50 microseconds a reading, so the model
    is evaluated on a coarse space-time lattice over the survey (easting,
    northing, elevation in the survey CRS, and time) and interpolated
    linearly along each axis for every reading, chunk by chunk (see
    ``steps/_main_field_lattice.py`` for the error analysis). The stage
    checks the lattice itself: it evaluates the model directly at the
    centres of ``check_points`` lattice cells drawn at random (where linear
    interpolation errs most) and stops with a one-line error when the
    interpolation is off by more than 0.01 nT anywhere there. The check
    points, lattice and direct values are written to the table
    ``main_field_checks``.

Positions and heights
    Easting and northing are converted to WGS84 longitude and latitude
    with pyproj from the survey CRS. The model takes the height above the
    WGS84 ellipsoid; reading elevations are relative to the vertical datum
    of the survey (sea level), so the ellipsoidal height is taken as
    ``elevation + geoid_height_m``, where ``geoid_height_m`` is the height
    of that datum (the geoid) above the ellipsoid at the survey. The total
    field falls with height at about ``3 F / r`` (a dipole field falls as
    ``r**-3``; Blakely 1995), 0.0235 nT/m at 50 000 nT and r = 6371.2 km;
    the stage reports the model's own vertical gradient at the survey
    centre. Geoid heights reach about +-100 m (from memory), so leaving
    ``geoid_height_m`` at 0 shifts the whole survey by up to about 2.4 nT,
    nearly uniformly (the geoid height changes by well under a metre over a
    few kilometres), which moves the level of the residual but hardly its
    anomalies. The positions are those the readings carry (corrections for
    antenna-to-sensor offsets belong to other stages); the model's
    horizontal gradient is a few nT/km, so an offset of 10 m changes the
    correction by a few hundredths of a nT.

Direction of the field
    The inclination (positive down), declination (east of true north) and
    intensity of the model at the survey centre (middle of the extent of
    the readings in easting, northing, elevation and time) are written to
    the summary and to the readings' attributes ``main_field_inclination_deg``,
    ``main_field_declination_deg`` and ``main_field_nT``, for the stages that
    reduce to the pole or model dipoles. Declination there is geographic;
    ``grid_convergence_deg`` is the angle from true north to grid north
    (clockwise positive) at the centre, measured by projecting a short step
    along the meridian (Snyder 1987 gives the transverse Mercator formula
    it agrees with), and ``main_field_grid_declination_deg`` =
    declination - convergence is the declination from grid north.

Time
    Each reading's own time is used; readings outside the years the model
    covers (IGRF-14: 1900-01-01 to 2030-01-01) stop the stage with a
    one-line error naming the first such reading.

References
----------
Alken, P., et al. (2021). International Geomagnetic Reference Field: the
    thirteenth generation. Earth, Planets and Space 73, 49. [Alken2021]_
Blakely, R. J. (1995). Potential Theory in Gravity and Magnetic
    Applications. Cambridge University Press. [Blakely1995]_
Snyder, J. P. (1987). Map Projections: A Working Manual. U.S. Geological
    Survey Professional Paper 1395. [Snyder1987]_
IAGA Working Group V-MOD (2024). IGRF-14 coefficients, doi
    10.5281/zenodo.14012302 (as named in the header of ``IGRF14.shc``).
"""

from __future__ import annotations

import contextlib
import warnings

import dask
import dask.array as da
import numpy as np
import pandas as pd
import pyproj
import xarray as xr

from lodeline.model import (
    READING_DIM,
    DataError,
    Stage,
    StageContext,
    StageResult,
    apply_correction,
    validate_readings,
)
from lodeline.params import Param, ParameterError, validate_table

from ._blocks import as_dask, reading_chunks

from . import _main_field_igrf as igrf
from . import _main_field_lattice as lattice_mod

__all__ = ["PARAMS", "STAGE", "run", "check_params", "MAX_INTERPOLATION_ERROR_NT", "grid_convergence_deg"]

#: Largest interpolation error allowed at the check points, nT (the
#: requirement of the stage: well below the 0.05-0.1 nT noise of a
#: marine or airborne magnetometer).
MAX_INTERPOLATION_ERROR_NT = 0.01

#: Most lattice nodes allowed (8 bytes each, so 160 MB, and about
#: 25 microseconds of model evaluation per spatial node and epoch).
MAX_LATTICE_NODES = 20_000_000

#: Half the height step of the vertical-gradient figure, m.
_GRADIENT_STEP_M = 10.0

PARAMS = (
    Param(
        "lattice_spacing_m",
        1000.0,
        "Spacing of the main-field lattice in easting and northing, m.",
        kind=float,
        minimum=1.0,
        maximum=200_000.0,
    ),
    Param(
        "lattice_vertical_spacing_m",
        100.0,
        "Spacing of the main-field lattice in elevation, m.",
        kind=float,
        minimum=0.1,
        maximum=100_000.0,
    ),
    Param(
        "lattice_time_step_h",
        24.0,
        "Step of the main-field lattice in time, hours.",
        kind=float,
        minimum=0.01,
        maximum=8784.0,
    ),
    Param(
        "geoid_height_m",
        0.0,
        "Height of the readings' vertical datum (the geoid, sea level) above the WGS84 ellipsoid at the survey, m.",
        kind=float,
        minimum=-150.0,
        maximum=150.0,
    ),
    Param(
        "check_points",
        48,
        "Lattice cells whose centres are checked against a direct evaluation of the model.",
        kind=int,
        minimum=8,
        maximum=100_000,
    ),
)


# --------------------------------------------------------------------------
# Stage entry point
# --------------------------------------------------------------------------


def run(data: dict, params: dict, context: StageContext) -> StageResult:
    """Subtract the IGRF-14 total field from every reading.

    Parameters
    ----------
    data : dict
        ``data["diurnal"]`` holds ``"readings"`` (dask-backed readings,
        chunk boundaries on segment boundaries) and ``"segments"``.
    params : dict
        The ``[main_field]`` table (see :data:`PARAMS`).
    context : lodeline.model.StageContext
        Run context (``survey["crs_wkt"]`` is used when the readings carry
        no CRS).

    Returns
    -------
    lodeline.model.StageResult
        ``datasets``: ``"readings"`` with the correction ``main_field`` (nT),
        an updated ``residual`` and the main-field direction in its
        attributes, and ``"segments"`` (unchanged). ``tables``:
        ``"main_field_checks"``. Nothing is rejected.

    Raises
    ------
    lodeline.model.DataError
        On readings dated outside the model's years, or no usable position.
    lodeline.params.ParameterError
        On a bad parameter, or a lattice too coarse for 0.01 nT.
    """
    settings = check_params(params)
    upstream = data["diurnal"]
    readings, segments = upstream["readings"], upstream["segments"]
    validate_readings(readings, segments, where="main_field")
    crs_wkt = _crs_wkt(readings, context)

    chunks = reading_chunks(readings, segments, context.chunk_readings)
    coords = {name: as_dask(readings[name], chunks) for name in ("easting", "northing", "elevation", "time")}
    bounds = _extent(coords)
    _check_dates(readings, coords, bounds)

    step_ns = int(round(settings["lattice_time_step_h"] * 3600e9))
    _check_lattice_size(bounds, settings, step_ns)
    lattice = lattice_mod.build_lattice(
        bounds,
        crs_wkt,
        settings["lattice_spacing_m"],
        settings["lattice_vertical_spacing_m"],
        step_ns,
        settings["geoid_height_m"],
    )
    context.log.info(
        "main_field: %s lattice of %s nodes (easting, northing, elevation, time)", igrf.MODEL_NAME, lattice.shape
    )
    checks = _check_lattice(lattice, crs_wkt, settings)
    max_error = float(checks["error_nT"].abs().max())
    context.log.info(
        "main_field: interpolation error at %d mid-cell check points: max %.2e nT", len(checks), max_error
    )
    if not max_error <= MAX_INTERPOLATION_ERROR_NT:
        raise ParameterError(
            f"main_field: the lattice interpolation errs by {max_error:.3g} nT at its check points "
            f"(limit {MAX_INTERPOLATION_ERROR_NT} nT): reduce main_field.lattice_spacing_m "
            f"(now {settings['lattice_spacing_m']:g} m), lattice_vertical_spacing_m or lattice_time_step_h"
        )

    correction = da.map_blocks(
        lattice_mod.interpolate,
        coords["easting"],
        coords["northing"],
        coords["elevation"],
        coords["time"],
        lattice=lattice,
        dtype=np.float64,
        chunks=chunks,
    )
    direction = _centre_field(bounds, crs_wkt, settings["geoid_height_m"])
    removed = _removed_stats(correction, direction["main_field_nT"])

    out = apply_correction(
        readings,
        "main_field",
        correction,
        f"{igrf.MODEL_NAME} total field",
        model=igrf.MODEL_NAME,
        coefficient_file=igrf.coefficient_file().name,
        lattice_spacing_m=settings["lattice_spacing_m"],
        lattice_vertical_spacing_m=settings["lattice_vertical_spacing_m"],
        lattice_time_step_h=settings["lattice_time_step_h"],
        geoid_height_m=settings["geoid_height_m"],
    )
    out.attrs = {
        **readings.attrs,
        "main_field_model": igrf.MODEL_NAME,
        "main_field_nT": direction["main_field_nT"],
        "main_field_inclination_deg": direction["main_field_inclination_deg"],
        "main_field_declination_deg": direction["main_field_declination_deg"],
        "main_field_grid_declination_deg": direction["main_field_grid_declination_deg"],
        "grid_convergence_deg": direction["grid_convergence_deg"],
        "main_field_time": direction["centre_time"],
    }
    summary = {
        "model": igrf.MODEL_NAME,
        "coefficient_file": igrf.coefficient_file().name,
        "lattice_shape": list(lattice.shape),
        "lattice_nodes": int(np.prod(lattice.shape)),
        "interpolation_check_points": int(len(checks)),
        "interpolation_max_error_nT": max_error,
        "interpolation_limit_nT": MAX_INTERPOLATION_ERROR_NT,
        **direction,
        **removed,
    }
    context.log.info(
        "main_field: removed %.1f to %.1f nT (RMS %.1f nT); field at the centre %.1f nT, "
        "inclination %.3f deg, declination %.3f deg east of true north",
        removed["removed_min_nT"],
        removed["removed_max_nT"],
        removed["removed_rms_nT"],
        direction["main_field_nT"],
        direction["main_field_inclination_deg"],
        direction["main_field_declination_deg"],
    )
    return StageResult(
        datasets={"readings": out, "segments": segments},
        tables={"main_field_checks": checks},
        summary=summary,
        rejected={},
    )


def check_params(params: dict | None) -> dict:
    """Validate the ``[main_field]`` table.

    Raises
    ------
    lodeline.params.ParameterError
        On an unknown key, a wrong type or a value out of range.
    """
    return validate_table(PARAMS, params, "main_field")


STAGE = Stage(
    name="main_field",
    run=run,
    params=PARAMS,
    after=("diurnal",),
    order=40,
    summary="Subtract the IGRF-14 main field",
)


# --------------------------------------------------------------------------
# Helpers
# --------------------------------------------------------------------------


def _crs_wkt(readings: xr.Dataset, context: StageContext) -> str:
    """The survey CRS as WKT (from the readings, else from the survey table)."""
    wkt = readings.attrs.get("crs_wkt") or context.survey.get("crs_wkt")
    try:
        crs = pyproj.CRS.from_wkt(wkt)
    except (pyproj.exceptions.CRSError, TypeError) as exc:
        raise DataError(
            f"main_field: the readings' attribute crs_wkt is not a CRS ({exc}): rerun ingest with [survey] crs set"
        ) from None
    if not crs.is_projected:
        raise DataError("main_field: the readings' CRS is not projected: set [survey] crs to a projected CRS in metres")
    return wkt


_NAT = np.iinfo(np.int64).min


@contextlib.contextmanager
def _quiet_all_nan():
    """Silence numpy's all-NaN warnings inside dask reductions (blocks of NaN only)."""
    with warnings.catch_warnings(), np.errstate(invalid="ignore"):
        warnings.filterwarnings("ignore", message="All-NaN")
        yield


def _extent(coords: dict) -> dict:
    """Smallest and largest easting, northing, elevation (m) and time of the readings (one pass)."""
    t = coords["time"].astype(np.int64)
    valid_t = t != _NAT
    big = np.iinfo(np.int64).max
    parts = []
    for name in ("easting", "northing", "elevation"):
        parts += [da.nanmin(coords[name]), da.nanmax(coords[name])]
    parts += [da.min(da.where(valid_t, t, big)), da.max(da.where(valid_t, t, _NAT + 1))]
    with _quiet_all_nan():
        values = dask.compute(*parts)
    floats = np.array(values[:6], dtype=np.float64)
    if not np.all(np.isfinite(floats)):
        raise DataError(
            "main_field: the readings have no finite easting, northing or elevation: check the ingest output"
        )
    if int(values[6]) == big:
        raise DataError("main_field: no reading has a time: check the time column of [inputs.readings]")
    return {
        "easting": (floats[0], floats[1]),
        "northing": (floats[2], floats[3]),
        "elevation": (floats[4], floats[5]),
        "time": (np.int64(values[6]).astype("datetime64[ns]"), np.int64(values[7]).astype("datetime64[ns]")),
    }


def _check_dates(readings: xr.Dataset, coords: dict, bounds: dict) -> None:
    """Stop with a one-line error naming the first reading outside the model's years."""
    first, last = igrf.coverage()
    lo, hi = bounds["time"]
    if lo >= first and hi <= last:
        return
    t = coords["time"].astype(np.int64)
    first_ns, last_ns = (np.int64(x.astype(np.int64)) for x in (first, last))
    bad = (t != _NAT) & ((t < first_ns) | (t > last_ns))
    index = int(da.argmax(bad).compute())
    names = ("source_file", "source_row", "line_index", "sensor_index")
    picked = readings[list(names)].isel({READING_DIM: index}).compute()
    row = {k: int(picked[k].values) for k in names}
    attrs = readings.attrs
    when = np.datetime_as_string(np.asarray(readings["time"].isel({READING_DIM: index}).values), unit="s")
    raise DataError(
        f"main_field: {attrs['source_files'][row['source_file']]} row {row['source_row']} "
        f"(line {attrs['line_names'][row['line_index']]}, sensor {attrs['sensor_names'][row['sensor_index']]}) "
        f"is dated {when}Z, outside the years {igrf.MODEL_NAME} covers "
        f"({np.datetime_as_string(first, unit='D')} to {np.datetime_as_string(last, unit='D')}): "
        "check the time and date columns and time_format of [inputs.readings] "
        "(readings after 2030 need a newer IGRF generation)"
    )


def _check_lattice_size(bounds: dict, settings: dict, step_ns: int) -> None:
    """Stop before building a lattice too large to hold in memory."""
    axes = lattice_mod.lattice_axes(
        bounds, settings["lattice_spacing_m"], settings["lattice_vertical_spacing_m"], step_ns
    )
    shape = tuple(int(a.size) for a in axes)
    if int(np.prod(shape, dtype=np.float64)) > MAX_LATTICE_NODES:
        raise ParameterError(
            f"main_field: the lattice would have {shape} nodes (easting, northing, elevation, time), over "
            f"{MAX_LATTICE_NODES:,}: increase main_field.lattice_spacing_m, lattice_vertical_spacing_m "
            "or lattice_time_step_h (the check against 0.01 nT tells when they are too coarse)"
        )


def _check_lattice(lattice, crs_wkt: str, settings: dict) -> pd.DataFrame:
    """Interpolated against direct values at the centres of random lattice cells."""
    points, times = lattice_mod.mid_cell_points(lattice, settings["check_points"])
    interpolated = lattice_mod.interpolate(points[:, 0], points[:, 1], points[:, 2], times, lattice=lattice)
    direct = lattice_mod.direct_total_field(
        points[:, 0], points[:, 1], points[:, 2], times, crs_wkt, settings["geoid_height_m"]
    )
    return pd.DataFrame(
        {
            "easting_m": points[:, 0],
            "northing_m": points[:, 1],
            "elevation_m": points[:, 2],
            "time": times,
            "lattice_nT": interpolated,
            "direct_nT": direct,
            "error_nT": interpolated - direct,
        }
    )


def grid_convergence_deg(lon: float, lat: float, crs_wkt: str) -> float:
    """Angle from true north to grid north at a point, degrees, clockwise positive.

    Measured by projecting a step of 1e-4 degree north along the meridian
    into the survey CRS: true north then points at grid azimuth
    ``-convergence``.
    """
    to_grid = pyproj.Transformer.from_crs("EPSG:4326", pyproj.CRS.from_wkt(crs_wkt), always_xy=True)
    e0, n0 = to_grid.transform(lon, lat - 5e-5)
    e1, n1 = to_grid.transform(lon, lat + 5e-5)
    return float(-np.degrees(np.arctan2(e1 - e0, n1 - n0)))


def _centre_field(bounds: dict, crs_wkt: str, geoid_height_m: float) -> dict:
    """Intensity, direction and vertical gradient of the model at the survey centre."""
    east = 0.5 * sum(bounds["easting"])
    north = 0.5 * sum(bounds["northing"])
    elev = 0.5 * sum(bounds["elevation"])
    t0, t1 = (t.astype(np.int64) for t in bounds["time"])
    when = np.int64(t0 + (t1 - t0) // 2).astype("datetime64[ns]")
    to_lonlat = pyproj.Transformer.from_crs(pyproj.CRS.from_wkt(crs_wkt), "EPSG:4326", always_xy=True)
    lon, lat = to_lonlat.transform(east, north)
    heights = elev + geoid_height_m + np.array([0.0, -_GRADIENT_STEP_M, _GRADIENT_STEP_M])
    b = igrf.field_components(np.full(3, lon), np.full(3, lat), heights, np.full(3, when))
    total = np.sqrt(np.sum(b * b, axis=0))
    inclination, declination = igrf.inclination_declination(b[:, 0])
    convergence = grid_convergence_deg(lon, lat, crs_wkt)
    return {
        "centre_easting_m": float(east),
        "centre_northing_m": float(north),
        "centre_elevation_m": float(elev),
        "centre_longitude_deg": float(lon),
        "centre_latitude_deg": float(lat),
        "centre_time": np.datetime_as_string(when, unit="s") + "Z",
        "main_field_nT": float(total[0]),
        "main_field_inclination_deg": float(inclination),
        "main_field_declination_deg": float(declination),
        "grid_convergence_deg": convergence,
        "main_field_grid_declination_deg": float(declination - convergence),
        "main_field_vertical_gradient_nT_per_m": float((total[2] - total[1]) / (2 * _GRADIENT_STEP_M)),
    }


def _removed_stats(correction: da.Array, reference_nT: float) -> dict:
    """Range, mean, RMS and spread of the correction over the readings (one pass).

    Sums are taken about ``reference_nT`` (the field at the centre) so that
    the spread does not suffer from cancellation.
    """
    finite = da.isfinite(correction)
    offset = da.where(finite, correction - reference_nT, 0.0)
    with _quiet_all_nan():
        low, high, count, total, square = dask.compute(
            da.nanmin(correction), da.nanmax(correction), finite.sum(), offset.sum(), (offset * offset).sum()
        )
    count = int(count)
    if count == 0:
        raise DataError("main_field: no reading could be given a main-field value: check positions and times")
    shift = float(total) / count
    mean_square = float(square) / count
    mean = reference_nT + shift
    return {
        "readings": int(correction.shape[0]),
        "readings_without_correction": int(correction.shape[0]) - count,
        "removed_min_nT": float(low),
        "removed_max_nT": float(high),
        "removed_range_nT": float(high - low),
        "removed_mean_nT": mean,
        "removed_rms_nT": float(np.sqrt(reference_nT**2 + 2 * reference_nT * shift + mean_square)),
        "removed_std_nT": float(np.sqrt(max(mean_square - shift * shift, 0.0))),
    }
