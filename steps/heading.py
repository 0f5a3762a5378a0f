"""Heading-error correction: estimate each sensor's heading error, or take it from a table, and remove it.

A total-field sensor towed or carried on a platform reads a little more or
less depending on the course, because the platform's own magnetisation
turns with it. The error of sensor ``j`` at course ``h`` (grid azimuth,
degrees clockwise from grid north, the ``heading`` variable of the
readings) is modelled as ``a_j + b_j cos(h) + c_j sin(h)`` nT (a
first-order Fourier series in the course; common practice, no published
source for this exact form), or taken from a heading-test table.

Methods (``method``)
    ``"estimate"``
        From the survey itself (``lodeline.steps._heading_fit``): every
        segment is cut into bins of ``bin_m`` metres along track and each
        bin's robust level (the median of its residual field) is taken
        (``lodeline.steps._heading_bins``). One joint weighted least-squares
        fit of all bins gives, per sensor, ``b`` and ``c``, a level and a
        drift, together with a smooth field shared by all sensors (a
        P-spline in route coordinates, Eilers & Marx 1996) that stands for
        the geology and what is left of the external field. Lines flown in
        opposite directions over the same ground separate the heading term
        along the line axis; tie lines across them separate the term across
        it. The constant ``a`` cannot be told apart from the sensor's
        offset (both are the same at every course): it is not estimated,
        the correction leaves it in (``a = 0``), and the sensor's fitted
        level, which holds offset plus ``a``, is reported for the levelling
        stage to equalise. Outlying bins (targets) are down-weighted by
        iteratively reweighted least squares (Huber 1964; Beaton & Tukey
        1974). Standard errors: the larger of a sandwich estimate clustered
        by line (Liang & Zeger 1986) and one with bins independent.
    ``"table"``
        From ``table``: per sensor either coefficients ``a_nT``, ``b_nT``,
        ``c_nT`` (missing ones 0; all three removed) or a heading-test table
        ``heading_deg``/``correction_nT`` interpolated linearly and
        periodically in the course (``lodeline.steps._heading_table``).
    ``"none"``
        No correction (a zero ``heading_error`` is still added).

The correction is added as ``heading_error`` (nT) and subtracted from the
residual, block by block over the segment-aligned dask chunks. A sensor
that cannot be estimated (too few lines, or lines in one direction only)
gets a warning and a zero correction; a reading whose course is unknown
(NaN heading) gets a NaN correction, and so a NaN residual, and is counted.

Tables: ``heading_coefficients``, one row per sensor: ``b_nT``, ``c_nT``
and their standard errors (the larger of a line-clustered and an
independent-bin sandwich estimate; both are kept), the same rotated to the
line axis (``along_nT``, ``across_nT``), the sensor's fitted level
(offset plus ``a``, at the middle time of the survey, about the mean of
the sensors) and drift, and the lines it was estimated from;
``heading_by_line``, one row per segment: course, level, mean correction
and median fit residual.

Limits
    Run after the time-lag and layback corrections: a time lag moves every
    anomaly along track in the direction of travel, which changes sign
    with the direction like a heading error does (on the demo survey an
    uncorrected 0.3 s lag moves the along-axis terms by up to 0.05 nT
    when there are no tie lines). Without lines across the line axis only
    the along-axis combination ``b cos(theta) + c sin(theta)`` is found;
    the rest is set to 0 with a warning. The induced (second-harmonic)
    part of a platform's heading error is not modelled. Bins of tie lines
    beyond the area of the survey lines add little: the shared field there
    is free to follow them. The standard errors count the noise only, not
    a mis-modelled field.

Why the defaults are what they are
----------------------------------
``bin_m = 5``
    Short enough that a bin sits on one place of a smooth field (a 5 m bin
    on a 300 m geological wavelength differs from its centre value by far
    less than the noise) and that a compact target anomaly (a few metres)
    is a small part of few bins; long enough that a bin at 0.2 m sampling
    holds about 25 readings, so its median is a steady level. (Common
    practice, no published source.)
``knot_spacing_m = 20``
    The shared field must not follow a level that alternates between
    adjacent lines flown in opposite directions, so its knot spacing must
    be several line spacings (5 at 4 m); it must still follow the geology
    on the scale of tens of metres. A cubic spline with knots every 20 m
    follows a wave of 300 m wavelength to about 0.001 of its amplitude
    (error of order ``(k h)**4 / 384``, de Boor 1978). Raise it for wider
    line spacings.
``smoothing = 0.1``
    Weight of a second difference of the spline coefficients, relative to
    one bin residual: a light penalty, enough to tie coefficients with few
    bins to their neighbours, small against the tens of bins that touch a
    coefficient in a survey (common practice, no published source).
``drift_degree = 1``
    A straight-line drift per sensor over the survey; a higher degree for
    sensors known to drift unevenly.
``min_lines = 4`` and ``min_cross_lines = 2``
    At least two lines each way give an error from the spread of the
    line-to-line differences; two cross lines give the across term from
    more than one place. (Common practice, no published source.)

References
----------
Beaton, A. E. & Tukey, J. W. (1974). The fitting of power series, meaning
    polynomials, illustrated on band-spectroscopic data. Technometrics
    16(2), 147-185.
de Boor, C. (1978). A Practical Guide to Splines. Springer.
Eilers, P. H. C. & Marx, B. D. (1996). Flexible smoothing with B-splines
    and penalties. Statistical Science 11(2), 89-121.
Huber, P. J. (1964). Robust estimation of a location parameter. Annals of
    Mathematical Statistics 35(1), 73-101.
Liang, K.-Y. & Zeger, S. L. (1986). Longitudinal data analysis using
    generalized linear models. Biometrika 73(1), 13-22.
(Further references of the fit in ``lodeline.steps._heading_fit``.)
"""

from __future__ import annotations

import dask
import dask.array as da
import numpy as np
import pandas as pd
import xarray as xr

from lodeline.model import (
    DEFAULT_EXCLUDE,
    FLAGS,
    READING_DIM,
    DataError,
    Stage,
    StageContext,
    StageResult,
    apply_correction,
    current_residual,
    flag_mask,
    validate_readings,
)
from lodeline.params import Param, ParameterError, validate_table

from ._blocks import as_dask, block_of_segment, reading_chunks

from . import _heading_bins as hbins
from . import _heading_fit as hfit
from . import _heading_table as htable

__all__ = ["PARAMS", "STAGE", "run", "check_params", "level_bins", "models_from_fit"]

PARAMS = (
    Param(
        "method",
        "estimate",
        "How the heading error is found: 'estimate' (from the survey), 'table' (from [heading.table]) or 'none'.",
        kind=str,
        choices=("estimate", "table", "none"),
    ),
    Param(
        "table",
        {},
        "Per sensor, for method 'table': {heading_deg = [...], correction_nT = [...]} (a heading-test table, "
        "interpolated periodically in the course) or {a_nT = ..., b_nT = ..., c_nT = ...} (coefficients), nT.",
        kind=dict,
    ),
    Param(
        "level_statistic",
        "median",
        "Level of a bin of readings: 'median' (robust) or 'mean'.",
        kind=str,
        choices=("median", "mean"),
    ),
    Param(
        "bin_m", 5.0, "Length of a level bin along track, m.",
        kind=float, minimum=0.0, exclusive_minimum=True, maximum=1.0e5,
    ),
    Param(
        "min_bin_readings", 5, "Bins with fewer usable readings are left out.",
        kind=int, minimum=1, maximum=1_000_000,
    ),
    Param(
        "knot_spacing_m",
        20.0,
        "Knot spacing of the smooth field shared by the sensors, m (several line spacings).",
        kind=float,
        minimum=0.0,
        exclusive_minimum=True,
        maximum=1.0e6,
    ),
    Param(
        "smoothing",
        0.1,
        "Weight of the second-difference penalty of that field, relative to one bin (dimensionless).",
        kind=float,
        minimum=0.0,
        exclusive_minimum=True,
        maximum=1.0e6,
    ),
    Param(
        "drift_degree", 1, "Degree of each sensor's drift polynomial in time (0 = none).",
        kind=int, minimum=0, maximum=3,
    ),
    Param(
        "min_lines",
        4,
        "Least number of a sensor's lines along the line axis (both directions present) for an estimate.",
        kind=int,
        minimum=2,
        maximum=100_000,
    ),
    Param(
        "min_cross_lines",
        2,
        "Least number of a sensor's lines across the line axis for its across-axis term; else that term is 0.",
        kind=int,
        minimum=1,
        maximum=100_000,
    ),
    Param("use_tie_lines", True, "Use the tie lines in the estimate.", kind=bool),
    Param("robust", True, "Down-weight outlying bins (Huber, then biweight iterations).", kind=bool),
    Param(
        "exclude_flags",
        list(DEFAULT_EXCLUDE),
        "Readings with any of these flags are left out of the estimate (they are still corrected).",
        kind=list,
        choices=tuple(FLAGS),
        item_kind=str,
    ),
)


def check_params(params: dict | None) -> dict:
    """Validate the ``[heading]`` table.

    Raises
    ------
    lodeline.params.ParameterError
        On an unknown key, a wrong type or value, or method 'table' with an
        empty table.
    """
    settings = validate_table(PARAMS, params, "heading")
    if settings["method"] == "table" and not settings["table"]:
        raise ParameterError(
            "heading.method = 'table' needs heading.table: give one entry per sensor, "
            "e.g. S1 = {heading_deg = [0, 90, 180, 270], correction_nT = [...]}"
        )
    return settings


# --------------------------------------------------------------------------
# Stage entry point
# --------------------------------------------------------------------------


def run(data: dict, params: dict, context: StageContext) -> StageResult:
    """Remove each sensor's heading error from the residual.

    Parameters
    ----------
    data : dict
        ``data["main_field"]`` holds ``"readings"`` (with ``residual``, nT,
        and ``heading``, degrees clockwise from grid north) and
        ``"segments"``.
    params : dict
        The ``[heading]`` table (see :data:`PARAMS`).
    context : lodeline.model.StageContext

    Returns
    -------
    lodeline.model.StageResult
        ``datasets``: ``"readings"`` with ``heading_error`` (nT) and the
        updated ``residual``, and ``"segments"`` (unchanged). ``tables``:
        ``"heading_coefficients"`` (one row per sensor) and, for the
        estimate, ``"heading_by_line"`` (one row per segment). Nothing is
        rejected.
    """
    settings = check_params(params)
    upstream = data["main_field"]
    readings, segments = upstream["readings"], upstream["segments"]
    validate_readings(readings, segments, where="heading")
    if "heading" not in readings.variables:
        raise DataError(
            "heading: the readings have no 'heading' (course over ground, degrees); "
            "the positions stage adds it: run it before this stage"
        )
    sensor_names = [str(s) for s in readings.attrs["sensor_names"]]
    chunks = reading_chunks(readings, segments, context.chunk_readings, current_residual(readings))
    tables: dict[str, pd.DataFrame] = {}
    warnings: list[str] = []
    extra: dict = {}

    if settings["method"] == "none":
        models = [htable.ZERO] * len(sensor_names)
        coefficients = _table_rows(models, sensor_names, "none")
    elif settings["method"] == "table":
        models = htable.parse_table(settings["table"], sensor_names)
        coefficients = _table_rows(models, sensor_names, "table")
    else:
        bins = level_bins(readings, segments, chunks, settings)
        result = hfit.fit(bins, _fit_settings(settings))
        models, coefficients, warnings = models_from_fit(result, sensor_names, settings)
        tables["heading_by_line"] = _line_table(bins, result, models, readings)
        extra = {
            "line_axis_deg": _plain(float(np.degrees(result.theta))),
            "bins": int(len(bins)),
            "bins_used": int(result.rows.sum()),
            "bin_residual_sigma_nT": _plain(float(result.sigma_nT)),
            "iterations": int(result.iterations),
        }
    for message in warnings:
        context.log.warning(message)
    tables["heading_coefficients"] = coefficients

    heading = as_dask(readings["heading"], chunks)
    sensor = as_dask(readings["sensor_index"], chunks)
    correction = da.map_blocks(
        htable.block_correction, heading, sensor, models=tuple(models), dtype=np.float64, chunks=chunks
    )
    unknown = int(da.isnan(correction).sum().compute())
    if unknown:
        warnings.append(
            f"heading: {unknown} readings have no course (NaN heading): their correction and residual are NaN"
        )
        context.log.warning(warnings[-1])
    out = apply_correction(
        readings,
        "heading_error",
        correction,
        "heading error (course-dependent error of each sensor)",
        method=settings["method"],
    )
    _log_sensors(context, coefficients)
    summary = {
        "method": settings["method"],
        **extra,
        "readings_without_heading": unknown,
        "sensors_corrected": int(sum(not m.zero for m in models)),
        "coefficients": {
            row["sensor"]: {k: _plain(row[k]) for k in ("b_nT", "c_nT", "b_se_nT", "c_se_nT") if k in row}
            for row in coefficients.to_dict("records")
        },
        "warnings": warnings,
    }
    return StageResult(
        datasets={"readings": out, "segments": segments}, tables=tables, summary=summary, rejected={}
    )


STAGE = Stage(
    name="heading",
    run=run,
    params=PARAMS,
    after=("main_field",),
    order=50,
    summary="Estimate or look up each sensor's heading error and remove it",
)


# --------------------------------------------------------------------------
# Estimate
# --------------------------------------------------------------------------


def _fit_settings(settings: dict) -> hfit.FitSettings:
    return hfit.FitSettings(
        spacing_m=settings["knot_spacing_m"],
        smoothing=settings["smoothing"],
        drift_degree=settings["drift_degree"],
        min_lines=settings["min_lines"],
        min_cross_lines=settings["min_cross_lines"],
        robust=settings["robust"],
    )


def level_bins(readings: xr.Dataset, segments: xr.Dataset, chunks: tuple, settings: dict) -> pd.DataFrame:
    """Bin levels of every segment (a small table, computed block by block).

    Returns
    -------
    pandas.DataFrame
        The columns of ``_heading_bins.BIN_COLUMNS`` plus ``sensor``,
        ``line`` (indices) and ``kind`` ("survey" or "tie"). Tie lines are
        left out when ``use_tie_lines`` is false.
    """
    residual = current_residual(readings)
    arrays = [as_dask(v, chunks) for v in (residual, readings["heading"], readings["easting"],
                                             readings["northing"], readings["time"], readings["flags"])]
    blocks = [a.to_delayed().ravel() for a in arrays]
    bounds = np.cumsum((0,) + tuple(chunks[0]))
    starts = np.asarray(segments["start"].values, dtype=np.int64)
    block_of = block_of_segment(segments, chunks)
    t0 = readings["time"].isel({READING_DIM: 0}).values if readings.sizes[READING_DIM] else np.datetime64(0, "ns")
    t_ref = int(np.asarray(t0).astype("datetime64[ns]").astype(np.int64))
    exclude = flag_mask(*settings["exclude_flags"])
    parts = []
    for b in range(len(chunks[0])):
        ids = np.flatnonzero(block_of == b)
        parts.append(
            dask.delayed(hbins.block_bins)(
                *(blk[b] for blk in blocks),
                starts[ids] - bounds[b],
                ids,
                bin_m=settings["bin_m"],
                min_count=settings["min_bin_readings"],
                exclude=exclude,
                statistic=settings["level_statistic"],
                t_ref_ns=t_ref,
            )
        )
    computed = dask.compute(*parts)
    table = np.concatenate(computed) if computed else np.zeros((0, len(hbins.BIN_COLUMNS)))
    bins = pd.DataFrame(table, columns=list(hbins.BIN_COLUMNS))
    bins["segment"] = bins["segment"].astype(np.int64)
    bins["count"] = bins["count"].astype(np.int64)
    seg_line = np.asarray(segments["line_index"].values, dtype=np.int64)
    seg_sensor = np.asarray(segments["sensor_index"].values, dtype=np.int64)
    bins["sensor"] = seg_sensor[bins["segment"].to_numpy()]
    bins["line"] = seg_line[bins["segment"].to_numpy()]
    kinds = np.asarray([str(k) for k in readings.attrs["line_kinds"]])
    bins["kind"] = kinds[bins["line"].to_numpy()] if len(bins) else np.array([], dtype=str)
    if not settings["use_tie_lines"]:
        bins = bins[bins["kind"] != "tie"].reset_index(drop=True)
    return bins


#: Leading columns of the ``heading_coefficients`` table of the estimate.
_COEFFICIENT_COLUMNS = (
    "sensor", "method", "estimated", "b_nT", "b_se_nT", "c_nT", "c_se_nT", "along_nT", "along_se_nT",
    "across_nT", "across_se_nT", "axis_deg", "level_nT", "drift_nT_per_h", "forward", "backward", "cross",
    "bins", "bins_downweighted", "note",
)


def models_from_fit(result: hfit.FitResult, sensor_names: list, settings: dict):
    """Per-sensor models, the coefficients table and the warnings from a fit.

    Returns
    -------
    models : list of SensorModel
        ``b cos(h) + c sin(h)`` (a = 0) for estimated sensors, ZERO for the rest.
    table : pandas.DataFrame
        One row per sensor of the survey.
    warnings : list of str
    """
    fitted = result.sensors
    models, rows, warnings = [], [], []
    for j, name in enumerate(sensor_names):
        row = {"sensor": name, "method": "estimate"}
        if j in fitted.index:
            f = fitted.loc[j]
            row.update({k: _plain(v) for k, v in f.items()})
            ok_along, ok_across = bool(f["along_ok"]), bool(f["across_ok"])
        else:
            row.update({"forward": 0, "backward": 0, "cross": 0, "bins": 0})
            ok_along = ok_across = False
        if not ok_along:
            row["estimated"] = "none"
            row["note"] = (
                f"fewer than {settings['min_lines']} lines along the axis or lines in one direction only: "
                "no correction"
            )
            warnings.append(
                f"heading: sensor {name} has {row['forward']} forward and {row['backward']} backward lines "
                f"along the line axis (needs both directions and {settings['min_lines']} in all): "
                "its heading error is not estimated and its correction is 0"
            )
            models.append(htable.ZERO)
            for k in ("b_nT", "c_nT"):
                row[k] = 0.0
        else:
            row["estimated"] = "along and across" if ok_across else "along only"
            row["note"] = "" if ok_across else (
                f"fewer than {settings['min_cross_lines']} cross lines: the across-axis term is set to 0"
            )
            if not ok_across:
                warnings.append(
                    f"heading: sensor {name} has {row['cross']} lines across the line axis "
                    f"(needs {settings['min_cross_lines']}): only the along-axis term is estimated; "
                    "the across term is 0 (it only matters on tie lines)"
                )
            models.append(htable.SensorModel(a=0.0, b=float(f["b_nT"]), c=float(f["c_nT"])))
        row["axis_deg"] = _plain(float(np.degrees(result.theta)))
        rows.append(row)
    table = pd.DataFrame(rows)
    first = [c for c in _COEFFICIENT_COLUMNS if c in table.columns]
    return models, table[first + [c for c in table.columns if c not in first]], warnings


def _table_rows(models, sensor_names, method) -> pd.DataFrame:
    rows = []
    for name, m in zip(sensor_names, models):
        if m.zero:
            rows.append({"sensor": name, "method": method, "a_nT": 0.0, "b_nT": 0.0, "c_nT": 0.0, "table_points": 0})
        elif m.headings is not None:
            # First harmonic of the table (least squares on its points), for information.
            h = np.radians(np.asarray(m.headings))
            G = np.column_stack([np.ones_like(h), np.cos(h), np.sin(h)])
            coef = np.linalg.lstsq(G, np.asarray(m.values), rcond=None)[0] if h.size >= 3 else [np.nan] * 3
            rows.append({"sensor": name, "method": method, "a_nT": coef[0], "b_nT": coef[1], "c_nT": coef[2],
                         "table_points": int(h.size)})
        else:
            rows.append({"sensor": name, "method": method, "a_nT": m.a, "b_nT": m.b, "c_nT": m.c, "table_points": 0})
    return pd.DataFrame(rows)


def _line_table(bins, result, models, readings) -> pd.DataFrame:
    """One row per segment: course, level before and after, and the fit residual."""
    columns = ["line", "sensor", "kind", "course_deg", "bins", "level_nT", "correction_nT", "fit_residual_nT"]
    if bins.empty:
        return pd.DataFrame({c: [] for c in columns})
    b = bins.copy()
    corr = np.zeros(len(b))
    for j in np.unique(b["sensor"]):
        mask = (b["sensor"] == j).to_numpy()
        m = models[int(j)]
        if not m.zero:
            corr[mask] = m.b * b["cos"].to_numpy()[mask] + m.c * b["sin"].to_numpy()[mask]
    b["correction"] = corr
    b["fit_residual"] = np.nan
    b.loc[result.rows, "fit_residual"] = result.residual
    b["wc"], b["ws"] = b["cos"] * b["count"], b["sin"] * b["count"]
    g = b.groupby("segment", sort=True).agg(
        line=("line", "first"), sensor=("sensor", "first"), kind=("kind", "first"), wc=("wc", "sum"),
        ws=("ws", "sum"), bins=("value", "size"), level_nT=("value", "median"),
        correction_nT=("correction", "mean"), fit_residual_nT=("fit_residual", "median"),
    )
    g["course_deg"] = np.mod(np.degrees(np.arctan2(g["ws"], g["wc"])), 360.0)
    g["line"] = [str(readings.attrs["line_names"][i]) for i in g["line"]]
    g["sensor"] = [str(readings.attrs["sensor_names"][i]) for i in g["sensor"]]
    return g.reset_index(drop=True)[columns]


# --------------------------------------------------------------------------
# Plumbing
# --------------------------------------------------------------------------


def _plain(value):
    """Plain Python number for the manifest."""
    if isinstance(value, (np.bool_, bool)):
        return bool(value)
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (np.floating, float)):
        return None if not np.isfinite(value) else float(value)
    return value


def _log_sensors(context: StageContext, table: pd.DataFrame) -> None:
    for row in table.to_dict("records"):
        se_b, se_c = row.get("b_se_nT"), row.get("c_se_nT")
        se = f" +- {se_b:.3f}, {se_c:.3f}" if isinstance(se_b, float) and np.isfinite(se_b) else ""
        context.log.info(
            "heading: sensor %s (%s): b %.3f nT, c %.3f nT%s",
            row["sensor"], row.get("estimated", row["method"]), row["b_nT"], row["c_nT"], se,
        )
