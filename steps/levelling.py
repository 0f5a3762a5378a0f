"""Levelling: tie-line least squares and along-line running median.

The input residual (total field after the diurnal, main-field and heading
corrections, nT) still carries per-line and per-sensor levels (sensor
offsets and drift, what the earlier corrections left) and, for small-target
work, the geology. This stage removes them in up to three steps, chosen by
``method``, and adds their sum as the variable ``levelling`` (nT) with
:func:`lodeline.model.apply_correction`. The updated ``residual`` is the
levelled residual anomaly that gridding and target picking use (no copy is
kept under another name).

1. *Equalisation of sensor levels* (``equalise_sensors``): a constant per
   sensor, its median level difference from the array over all lines (see
   :mod:`lodeline.steps._levelling_median`).
2. *Tie-line levelling* (``method = "tie_lines"`` or
   ``"tie_lines_then_median"``): crossovers between every survey-line and
   tie-line track, per sensor (segment), are found on decimated tracks
   (:mod:`lodeline.steps._levelling_crossovers`); each track's residual is
   evaluated there by a local straight-line fit in along-track distance
   (:mod:`lodeline.steps._levelling_blocks`); a constant per tie segment and
   a polynomial in time of order ``trend_order`` per survey segment are
   fitted to the crossover differences by least squares
   (:mod:`lodeline.steps._levelling_tie`, after Yarger, Robertson &
   Wentland 1978).
3. *Along-line running median* (``method = "along_line_median"`` or
   ``"tie_lines_then_median"``): the running median over ``median_window_m``
   metres of each segment is subtracted, which takes out geology and slow
   residual drift and keeps compact anomalies (Tukey 1977; see
   :mod:`lodeline.steps._levelling_median`); readings within half a window
   of a segment end get the ``edge`` flag.

Crossover differences (survey minus tie, nT) before and after levelling are
written to the table ``crossovers`` whatever the method, when the survey
has tie lines, and their RMS is reported: after tie-line levelling it
should be close to the noise of a crossover difference (about
``sqrt(2)`` times the noise of a local fit, for white noise).

Limits
------
Segments without a usable crossover keep their level (a warning names
them; ``line_corrections`` says "no crossovers"). Tie segments get a
constant only, so the tie lines should be short in time compared with the
drift. The crossover RMS after the median is not a levelling figure: the
median removes the geology along each track's own direction, so survey and
tie tracks differ at a crossover by the regional's curvature (a few tenths
of a nT on the demo survey); line-to-line levels are then best judged on
overlapping tracks of adjacent lines. Readings within half a median window
of a segment end may lose part of an anomaly there (flag ``edge``).

Our own synthetic trials (``tests/test_levelling.py``; 0.05 nT noise,
offsets of +-3 nT and drifts of +-20 nT/h per segment): crossover RMS 2.0 nT
before, 0.018 nT after tie-line levelling (0.046 nT with
``crossover_window_m = 0``); a 61 nT dipole anomaly keeps 99.6 % of its
peak through a 20-80 m running median and 82 % through a 10 m one.

Why the defaults are what they are
----------------------------------
``method = "tie_lines_then_median"``
    For small-target surveys the residual anomaly must be free of both line
    levels and geology: the tie-line step makes the levels consistent and
    measurable (the crossover RMS is the levelling QC), the running median
    then removes the geology. Surveys without tie lines need
    ``"along_line_median"``; regional mapping, where the geology is the
    signal, uses ``"tie_lines"``.
``trend_order = 1``
    Sensor drift and what the diurnal correction leaves over a line of a
    few minutes are close to linear in time; a quadratic needs three tie
    lines per line and fits noise near the line ends (Mauring et al. 2002
    report polynomial levelling unstable at the ends of lines). The order
    is lowered per segment to one less than the number of tie lines it
    crosses.
``median_window_m = 40``
    The total-field anomaly of a compact item (a point dipole) at depth
    ``z`` below the sensor falls below a tenth of its peak about ``z`` to
    ``1.5 z`` from the peak, so it is some ``2 z`` to ``3 z`` wide
    (Blakely 1995, ch. 4, dipole field; the widths are our reading of the
    closed form): 8-12 m for an item 4 m below the sensor. A median
    ignores what fills less than half of its window, and a window three to
    five times the widest anomaly of interest leaves its peak nearly
    untouched (the median is then moved by the few readings on the
    anomaly's flanks only), while a regional field with wavelengths of
    hundreds of metres is followed within a few per cent of its amplitude.
    (Common practice, no published source, for the factor of 3-5.)
``crossover_window_m = 2``, ``crossover_max_gap_m = 2``
    A straight-line fit over 2 m of track (about ten readings at 0.2 m)
    reduces the noise of the value at the crossover about threefold, and
    over 2 m even a steep anomaly is close to linear; a crossover is only
    used where both tracks have accepted readings within 2 m on each side.
``crossover_min_angle_deg = 30``
    The along-track error of a crossing grows as 1 / sin(angle): 2 at
    30 degrees. Tie lines are normally flown at right angles.
``track_step_m = 1``
    Decimated tracks of one vertex a metre keep the crossover search small
    (a few bytes per metre of track) while a vessel's or aircraft's track
    is straight to millimetres over a metre.
``outlier_multiple = 4``
    Gaussian misfits exceed 4 robust sigmas about once in 16 000
    (Abramowitz & Stegun 1964, ch. 26; from memory), so only crossovers on
    anomalies or bad positions are left out.

References
----------
Abramowitz, M. & Stegun, I. A. (1964). Handbook of Mathematical Functions,
    ch. 26. National Bureau of Standards. (From memory.)
Blakely, R. J. (1995). Potential Theory in Gravity and Magnetic
    Applications. Cambridge University Press.
Mauring, E., Beard, L. P., Kihle, O. & Smethurst, M. A. (2002). A
    comparison of aeromagnetic levelling techniques with an introduction to
    median levelling. Geophysical Prospecting 50, 43-54. (From memory.)
Tukey, J. W. (1977). Exploratory Data Analysis. Addison-Wesley. (From
    memory.)
Yarger, H. L., Robertson, R. R. & Wentland, R. L. (1978). Diurnal drift
    removal from aeromagnetic data using least squares. Geophysics 43(6),
    1148-1156.
"""

from __future__ import annotations

import dask
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
    add_flags,
    apply_correction,
    current_residual,
    flag_mask,
    validate_readings,
)
from lodeline.params import Param, validate_table

from ._blocks import as_dask, reading_chunks
from ._levelling_blocks import (
    TRACK_FIELDS,
    block_polynomial,
    compute_tracks,
    map_segment_blocks,
    normalised_time,
    values_at,
)
from ._levelling_crossovers import find_crossovers
from ._levelling_median import block_median, sensor_levels
from ._levelling_trend import block_trend
from ._levelling_tie import level

__all__ = ["PARAMS", "STAGE", "METHODS", "run", "check_params"]

METHODS = ("tie_lines", "along_line_median", "tie_lines_then_median", "along_line_trend", "tie_lines_then_trend")

PARAMS = (
    Param(
        "method",
        "tie_lines_then_median",
        "How levels are made consistent: tie-line least squares, an along-line running median or robust trend, or tie lines then one of those.",
        kind=str,
        choices=METHODS,
    ),
    Param(
        "trend_order",
        1,
        "Highest order of a survey segment's correction as a polynomial in time (0: a constant per line and sensor).",
        kind=int,
        minimum=0,
        maximum=3,
    ),
    Param(
        "level_ties",
        True,
        "Give each tie segment a constant of its own before the survey lines are levelled to the ties.",
        kind=bool,
    ),
    Param(
        "median_window_m",
        40.0,
        "Length of the along-line running-median window, m (several times the widest anomaly of interest).",
        kind=float,
        minimum=0.0,
        exclusive_minimum=True,
        maximum=1.0e5,
    ),
    Param(
        "trend_knot_spacing_m",
        20.0,
        "Knot spacing of the along-line robust trend (methods '*_trend'), m (at least twice the widest anomaly of interest).",
        kind=float,
        minimum=0.0,
        exclusive_minimum=True,
        maximum=1.0e5,
    ),
    Param(
        "trend_robust_multiple",
        4.685,
        "Biweight cut-off of the robust trend, in robust standard deviations of the residual (4.685: 95 % efficiency for Gaussian noise).",
        kind=float,
        minimum=1.0,
        maximum=100.0,
    ),
    Param(
        "equalise_sensors",
        True,
        "Remove each sensor's median level difference from the array, over all lines.",
        kind=bool,
    ),
    Param(
        "crossover_max_gap_m",
        2.0,
        "A crossover is used only where both tracks have accepted readings this close on each side, m.",
        kind=float,
        minimum=0.0,
        exclusive_minimum=True,
        maximum=1.0e4,
    ),
    Param(
        "crossover_window_m",
        2.0,
        "Length of track over which each residual is fitted by a straight line at a crossover, m "
        "(0: interpolate between neighbours).",
        kind=float,
        minimum=0.0,
        maximum=1.0e3,
    ),
    Param(
        "crossover_min_angle_deg",
        30.0,
        "Smallest angle between two tracks for their crossing to be used, degrees.",
        kind=float,
        minimum=0.0,
        maximum=90.0,
    ),
    Param(
        "track_step_m",
        1.0,
        "Vertex spacing of the decimated tracks searched for crossovers, m.",
        kind=float,
        minimum=0.0,
        exclusive_minimum=True,
        maximum=1.0e3,
    ),
    Param(
        "outlier_multiple",
        4.0,
        "Crossovers misfitting by more than this many robust standard deviations are left out of the fit "
        "(0: keep all).",
        kind=float,
        minimum=0.0,
        maximum=1.0e3,
    ),
    Param(
        "exclude_flags",
        list(DEFAULT_EXCLUDE),
        "Flags whose readings are left out of the crossovers, the medians and the fits (they are still corrected).",
        kind=list,
        item_kind=str,
        choices=tuple(FLAGS),
    ),
)

_EDGE = "edge"


def check_params(params: dict | None) -> dict:
    """Validate the ``[levelling]`` table.

    Raises
    ------
    lodeline.params.ParameterError
        On an unknown key, a wrong type or a value out of range.
    """
    return validate_table(PARAMS, params, "levelling")


# --------------------------------------------------------------------------
# Stage entry point
# --------------------------------------------------------------------------


def run(data: dict, params: dict, context: StageContext) -> StageResult:
    """Level the residual of every segment.

    Parameters
    ----------
    data : dict
        ``data["heading"]`` holds ``"readings"`` (with ``residual``, nT) and
        ``"segments"``.
    params : dict
        The ``[levelling]`` table (see :data:`PARAMS`).
    context : lodeline.model.StageContext
        Run context.

    Returns
    -------
    lodeline.model.StageResult
        ``datasets``: ``"readings"`` with the variable ``levelling`` (nT)
        and the levelled ``residual``, ``edge`` flags added when the median
        is used; ``"segments"`` unchanged. ``tables``: ``"crossovers"``,
        ``"line_corrections"``, ``"sensor_levels"``. ``summary``: crossover
        RMS before and after, counts. Nothing is rejected.

    Raises
    ------
    lodeline.model.DataError
        When tie-line levelling is asked for and the survey has no tie line
        or no crossover between a survey and a tie line.
    """
    settings = check_params(params)
    upstream = data["heading"]
    readings, segments = upstream["readings"], upstream["segments"]
    validate_readings(readings, segments, where="levelling")
    method = settings["method"]
    use_ties = method in ("tie_lines", "tie_lines_then_median", "tie_lines_then_trend")
    use_median = method in ("along_line_median", "tie_lines_then_median")
    use_trend = method in ("along_line_trend", "tie_lines_then_trend")

    info = _segment_info(readings, segments)
    if use_ties and not info["is_tie"].any():
        raise DataError(
            f"levelling: method = {method!r} needs tie lines, but no line of the survey is a tie line; "
            "name them in [inputs.readings] tie_lines or set [levelling] method = \"along_line_median\""
        )

    chunks = reading_chunks(readings, segments, context.chunk_readings)
    residual = current_residual(readings)
    arrays = {
        "easting": as_dask(readings["easting"], chunks),
        "northing": as_dask(readings["northing"], chunks),
        "time": as_dask(readings["time"], chunks),
        "values": as_dask(residual, chunks),
        "flags": as_dask(readings["flags"], chunks),
    }
    exclude = flag_mask(*settings["exclude_flags"])
    t_ref_ns = _reference_time(readings, segments)
    common = {"t_ref_ns": t_ref_ns, "exclude": exclude, "max_gap_m": settings["crossover_max_gap_m"]}

    figures, vertices = compute_tracks(arrays, segments, chunks, step_m=settings["track_step_m"], **common)
    fig = {name: figures[:, i] for i, name in enumerate(TRACK_FIELDS)}
    if not np.nansum(fig["accepted"]) > 0:
        _refuse_all_excluded(readings, settings["exclude_flags"])

    # Equalisation of sensor levels (a constant per sensor).
    n_sensors = len(readings.attrs["sensor_names"])
    if settings["equalise_sensors"]:
        levels, level_lines = sensor_levels(fig["median_nT"], info["line_index"], info["sensor_index"], n_sensors)
    else:
        levels, level_lines = np.zeros(n_sensors), np.zeros(n_sensors, dtype=np.int64)
    eq = levels[info["sensor_index"]]

    # Crossovers and their differences before levelling.
    cross = _crossovers(arrays, segments, chunks, vertices, info, fig, settings, common)
    if use_ties and not np.isfinite(cross["before_nT"]).any():
        raise DataError(
            "levelling: no usable crossover between a survey line and a tie line was found; check that the "
            "tie lines cross the survey lines, or raise [levelling] crossover_max_gap_m, or set "
            "method = \"along_line_median\""
        )

    n_seg = info["line_index"].size
    coefficients = np.zeros((n_seg, settings["trend_order"] + 1))
    coefficients[:, 0] = eq
    order = np.full(n_seg, -1, dtype=np.int64)
    used = np.zeros(len(cross), dtype=bool)
    d_eq = cross["before_nT"].to_numpy() - (eq[cross["seg_line"]] - eq[cross["seg_tie"]]) if len(cross) else np.zeros(0)
    cross["after_tie_nT"] = np.nan
    sigma = float("nan")
    if use_ties:
        sol = level(
            cross["seg_line"].to_numpy(),
            cross["seg_tie"].to_numpy(),
            d_eq,
            cross["tau_line"].to_numpy(),
            info["line_index"][cross["seg_tie"].to_numpy()],
            info["is_tie"],
            trend_order=settings["trend_order"],
            level_ties=settings["level_ties"],
            outlier_multiple=settings["outlier_multiple"],
        )
        coefficients += sol.coefficients
        order, used, sigma = sol.order, sol.used, sol.sigma_nT
        cross["after_tie_nT"] = d_eq - sol.model
    cross["used"] = used

    correction = map_segment_blocks(
        block_polynomial,
        [arrays["time"]],
        segments,
        chunks,
        [coefficients, fig["t_first_s"], fig["t_last_s"]],
        dtype=np.float64,
        t_ref_ns=t_ref_ns,
    )
    out = readings
    if use_median:
        median = map_segment_blocks(
            block_median,
            [arrays["easting"], arrays["northing"], arrays["time"], arrays["values"] - correction, arrays["flags"]],
            segments,
            chunks,
            [],
            dtype=np.float64,
            extra_shape=(2,),
            exclude=exclude,
            window_m=settings["median_window_m"],
        )
        correction = correction + median[:, 0]
        out = add_flags(out, median[:, 1] > 0.5, _EDGE)
    if use_trend:
        trend = map_segment_blocks(
            block_trend,
            [arrays["easting"], arrays["northing"], arrays["time"], arrays["values"] - correction, arrays["flags"]],
            segments,
            chunks,
            [],
            dtype=np.float64,
            extra_shape=(2,),
            exclude=exclude,
            knot_spacing_m=settings["trend_knot_spacing_m"],
            robust_multiple=settings["trend_robust_multiple"],
        )
        correction = correction + trend[:, 0]

    out = apply_correction(
        out,
        "levelling",
        correction,
        "levelling correction (sensor equalisation, tie-line levelling, along-line median or robust trend)",
        method=method,
        trend_order=settings["trend_order"] if use_ties else -1,
        median_window_m=settings["median_window_m"] if use_median else 0.0,
        trend_knot_spacing_m=settings["trend_knot_spacing_m"] if use_trend else 0.0,
        equalise_sensors=int(settings["equalise_sensors"]),
    )

    # Crossover differences after levelling, on the final residual.
    cross["after_nT"] = np.nan
    if len(cross):
        final = dict(arrays, values=as_dask(out["residual"], chunks), flags=arrays["flags"])
        after_line, after_tie = _values_at_both(final, segments, chunks, cross, settings["crossover_window_m"], common)
        cross["after_nT"] = after_line[:, 0] - after_tie[:, 0]

    tables = {
        "crossovers": _crossover_table(cross, info, readings, t_ref_ns),
        "line_corrections": _line_table(cross, info, readings, fig, coefficients, order, eq, use_ties, settings),
        "sensor_levels": pd.DataFrame(
            {"sensor": list(readings.attrs["sensor_names"]), "level_nT": levels, "lines": level_lines}
        ),
    }
    summary = _summary(cross, tables["line_corrections"], levels, readings, method, sigma)
    _log(context, summary, tables["line_corrections"], use_ties)
    return StageResult(datasets={"readings": out, "segments": segments}, tables=tables, summary=summary, rejected={})


def _refuse_all_excluded(readings: xr.Dataset, names: list[str]) -> None:
    """Raise the error for a survey none of whose readings may be levelled, with the flag counts."""
    flags = readings["flags"].data
    counts = dask.compute(*[((flags & np.uint32(flag_mask(n))) != 0).sum() for n in names])
    shown = ", ".join(f"{n} {int(c)}" for n, c in zip(names, counts) if int(c)) or "none"
    raise DataError(
        f"levelling: none of the {readings.sizes[READING_DIM]} readings can be levelled (flagged with "
        f"levelling.exclude_flags: {shown}; any others lack a finite position, time or residual): see the earlier "
        "stages' flags in the run log (a stuck or dead sensor, a base station that misses the survey) "
        "or narrow levelling.exclude_flags"
    )


STAGE = Stage(
    name="levelling",
    run=run,
    params=PARAMS,
    after=("heading",),
    order=60,
    summary="Level lines and sensors (tie-line least squares and/or along-line median)",
)


# --------------------------------------------------------------------------
# Helpers
# --------------------------------------------------------------------------


def _segment_info(readings: xr.Dataset, segments: xr.Dataset) -> dict:
    line_index = np.asarray(segments["line_index"].values, dtype=np.int64)
    sensor_index = np.asarray(segments["sensor_index"].values, dtype=np.int64)
    kinds = np.asarray([str(k) for k in readings.attrs["line_kinds"]])
    is_tie = kinds[line_index] == "tie" if line_index.size else np.zeros(0, dtype=bool)
    return {"line_index": line_index, "sensor_index": sensor_index, "is_tie": is_tie}


def _reference_time(readings: xr.Dataset, segments: xr.Dataset) -> int:
    """Earliest first-reading time of the segments, ns since the epoch (0 when none)."""
    starts = np.asarray(segments["start"].values, dtype=np.int64)
    if starts.size == 0:
        return 0
    t = np.asarray(readings["time"].isel({READING_DIM: starts}).values).astype("datetime64[ns]").astype(np.int64)
    t = t[t != np.iinfo(np.int64).min]
    return int(t.min()) if t.size else 0


def _crossovers(arrays, segments, chunks, vertices, info, fig, settings, common) -> pd.DataFrame:
    """Crossings of survey and tie tracks with the residual of each track there."""
    columns = ["seg_line", "seg_tie", "easting", "northing", "s_line", "s_tie", "angle_deg"]
    if not info["is_tie"].any() or not (~info["is_tie"]).any():
        cross = pd.DataFrame({c: np.zeros(0) for c in columns}).astype({"seg_line": np.int64, "seg_tie": np.int64})
    else:
        cross = find_crossovers(
            vertices,
            info["is_tie"],
            min_angle_deg=settings["crossover_min_angle_deg"],
            merge_m=2.0 * settings["track_step_m"],
        )
    line, tie = _values_at_both(arrays, segments, chunks, cross, settings["crossover_window_m"], common)
    cross["time_line_s"], cross["time_tie_s"] = line[:, 1], tie[:, 1]
    cross["gradient_line_nT_per_m"], cross["gradient_tie_nT_per_m"] = line[:, 2], tie[:, 2]
    cross["before_nT"] = line[:, 0] - tie[:, 0]
    seg = cross["seg_line"].to_numpy()
    cross["tau_line"] = normalised_time(line[:, 1], fig["t_first_s"][seg], fig["t_last_s"][seg]) if len(cross) else []
    return cross


def _values_at_both(arrays, segments, chunks, cross, window_m, common):
    """Values at every crossover on the survey track and on the tie track (one pass over the data)."""
    seg = np.concatenate([cross["seg_line"].to_numpy(), cross["seg_tie"].to_numpy()]).astype(np.int64)
    s = np.concatenate([cross["s_line"].to_numpy(), cross["s_tie"].to_numpy()])
    values = values_at(arrays, segments, chunks, seg, s, window_m=window_m, **common)
    return values[: len(cross)], values[len(cross) :]


def _to_time(t_ref_ns: int, seconds) -> np.ndarray:
    seconds = np.asarray(seconds, dtype=np.float64)
    ns = np.where(np.isfinite(seconds), np.round(np.nan_to_num(seconds) * 1e9), 0).astype(np.int64) + t_ref_ns
    out = ns.astype("datetime64[ns]")
    out[~np.isfinite(seconds)] = np.datetime64("NaT")
    return out


def _crossover_table(cross: pd.DataFrame, info: dict, readings: xr.Dataset, t_ref_ns: int) -> pd.DataFrame:
    lines = list(readings.attrs["line_names"])
    sensors = list(readings.attrs["sensor_names"])
    sl, st = cross["seg_line"].to_numpy(), cross["seg_tie"].to_numpy()
    return pd.DataFrame(
        {
            "line": [str(lines[i]) for i in info["line_index"][sl]],
            "sensor": [str(sensors[i]) for i in info["sensor_index"][sl]],
            "tie": [str(lines[i]) for i in info["line_index"][st]],
            "tie_sensor": [str(sensors[i]) for i in info["sensor_index"][st]],
            "easting": cross["easting"].to_numpy(),
            "northing": cross["northing"].to_numpy(),
            "angle_deg": cross["angle_deg"].to_numpy(),
            "time_line": _to_time(t_ref_ns, cross["time_line_s"]),
            "time_tie": _to_time(t_ref_ns, cross["time_tie_s"]),
            "gradient_line_nT_per_m": cross["gradient_line_nT_per_m"].to_numpy(),
            "gradient_tie_nT_per_m": cross["gradient_tie_nT_per_m"].to_numpy(),
            "before_nT": cross["before_nT"].to_numpy(),
            "after_tie_nT": cross["after_tie_nT"].to_numpy(),
            "after_nT": cross["after_nT"].to_numpy(),
            "used": cross["used"].to_numpy(dtype=bool),
        }
    )


def _line_table(cross, info, readings, fig, coefficients, order, eq, use_ties, settings) -> pd.DataFrame:
    """One row per segment: crossovers, order and the correction (without the median) at start, middle, end."""
    lines = list(readings.attrs["line_names"])
    sensors = list(readings.attrs["sensor_names"])
    n_seg = info["line_index"].size
    valid = np.isfinite(cross["before_nT"].to_numpy()) if len(cross) else np.zeros(0, bool)
    used = cross["used"].to_numpy(dtype=bool) if len(cross) else np.zeros(0, bool)
    n_valid = np.zeros(n_seg, dtype=np.int64)
    n_used = np.zeros(n_seg, dtype=np.int64)
    misfit_ss = np.zeros(n_seg)
    after = cross["after_tie_nT"].to_numpy() if len(cross) else np.zeros(0)
    for col in ("seg_line", "seg_tie"):
        seg = cross[col].to_numpy() if len(cross) else np.zeros(0, np.int64)
        np.add.at(n_valid, seg[valid], 1)
        np.add.at(n_used, seg[used], 1)
        if use_ties:
            np.add.at(misfit_ss, seg[used], after[used] ** 2)
    tau = np.array([-1.0, 0.0, 1.0])
    values = np.zeros((n_seg, 3))
    power = np.ones(3)
    for j in range(coefficients.shape[1]):
        values += coefficients[:, j : j + 1] * power[None, :]
        power = power * tau
    if not use_ties:
        status = np.full(n_seg, "median only" if settings["method"] == "along_line_median" else "")
    else:
        status = np.where(order >= 0, "levelled", "no crossovers").astype(object)
        if not settings["level_ties"]:
            status[info["is_tie"]] = "held"
    rms = np.full(n_seg, np.nan)
    if use_ties:
        rms = np.where(n_used > 0, np.sqrt(misfit_ss / np.maximum(n_used, 1)), np.nan)
    kinds = ["tie" if t else "survey" for t in info["is_tie"]]
    return pd.DataFrame(
        {
            "line": [str(lines[i]) for i in info["line_index"]],
            "kind": kinds,
            "sensor": [str(sensors[i]) for i in info["sensor_index"]],
            "readings_used": fig["accepted"].astype(np.int64),
            "crossovers": n_valid,
            "crossovers_used": n_used,
            "order": order,
            "equalisation_nT": eq,
            "correction_start_nT": values[:, 0],
            "correction_mid_nT": values[:, 1],
            "correction_end_nT": values[:, 2],
            "misfit_rms_nT": rms,
            "status": list(status),
        }
    )


def _rms(x) -> float | None:
    x = np.asarray(x, dtype=np.float64)
    x = x[np.isfinite(x)]
    return float(np.sqrt(np.mean(x * x))) if x.size else None


def _summary(cross, table, levels, readings, method, sigma) -> dict:
    valid = np.isfinite(cross["before_nT"].to_numpy()) if len(cross) else np.zeros(0, bool)
    used = cross["used"].to_numpy(dtype=bool) if len(cross) else np.zeros(0, bool)
    before = cross["before_nT"].to_numpy() if len(cross) else np.zeros(0)
    after_tie = cross["after_tie_nT"].to_numpy() if len(cross) else np.zeros(0)
    after = cross["after_nT"].to_numpy() if len(cross) else np.zeros(0)
    missing = table[table["status"] == "no crossovers"]
    return {
        "method": method,
        "crossovers": int(len(cross)),
        "crossovers_valid": int(valid.sum()),
        "crossovers_used": int(used.sum()),
        "crossovers_rejected": int((valid & ~used).sum()) if used.any() else 0,
        "crossover_rms_before_nT": _rms(before[valid]),
        "crossover_rms_after_tie_nT": _rms(after_tie[used]) if used.any() else None,
        "crossover_rms_after_nT": _rms(after[used]) if used.any() else _rms(after[valid]),
        "crossover_rms_after_all_nT": _rms(after[valid]),
        "crossover_sigma_nT": sigma if np.isfinite(sigma) else None,
        "segments": int(len(table)),
        "segments_without_crossovers": int(len(missing)),
        "lines_without_crossovers": ", ".join(sorted(set(missing["line"]))),
        "sensor_levels_nT": {str(s): float(v) for s, v in zip(readings.attrs["sensor_names"], levels)},
        "largest_line_correction_nT": float(
            np.nanmax(np.abs(table[["correction_start_nT", "correction_end_nT"]].to_numpy()))
        )
        if len(table)
        else 0.0,
    }


def _log(context: StageContext, summary: dict, table: pd.DataFrame, use_ties: bool) -> None:
    def fmt(x):
        return "n/a" if x is None else f"{x:.3f} nT"

    context.log.info(
        "levelling: %s; %d crossovers (%d used); crossover RMS before %s, after tie-line levelling %s, after %s",
        summary["method"],
        summary["crossovers"],
        summary["crossovers_used"],
        fmt(summary["crossover_rms_before_nT"]),
        fmt(summary["crossover_rms_after_tie_nT"]),
        fmt(summary["crossover_rms_after_nT"]),
    )
    if use_ties and summary["segments_without_crossovers"]:
        missing = table[table["status"] == "no crossovers"]
        context.log.warning(
            "levelling: %d segment(s) have no usable crossover and keep their level: %s",
            len(missing),
            ", ".join(f"{r.line}/{r.sensor}" for r in missing.itertuples()),
        )
