"""Sensor positions: layback, offsets and time lag applied to the antenna track.

The readings carry the position of the GNSS antenna at their time stamp.
This stage moves every reading to the position of its sensor at the time it
was measured, and adds the course over ground there.

For each segment (one line of one sensor), see ``steps/_positions_track.py``:

* the antenna track is smoothed by a local quadratic least-squares fit over
  ``course_smoothing_m`` of track (Savitzky & Golay 1964; Cleveland 1979),
  which also gives the course;
* a reading stamped ``T`` was measured at ``T - lag``: the antenna was then
  at the along-track distance ``s(T - lag)``;
* a towed sensor follows the antenna's path ``layback_m`` behind it: it is
  at the point of the smoothed track at ``s(T - lag) - layback``. In the
  first ``layback`` metres of a line that point lies before the start of the
  track: the track is then extrapolated straight back along its first
  course. Those readings are not flagged (no flag of the data model says
  "position extrapolated"); they are counted per segment in the table
  ``positions_by_segment`` and in the summary;
* the along (positive forward) and across (positive to starboard) offsets
  rotate with the course at that point; ``up_m`` is added to the elevation
  (which ingest made from the depth, or the altitude, column). A sensor on
  a rigid boom behind the antenna is a negative ``along_m`` with
  ``layback_m = 0``: it keeps the antenna's current course instead of
  following its path; the two differ across track by about
  ``layback**2 * curvature / 2`` (0.2 m for 12 m on a wander of 0.5 m
  amplitude and 80 m wavelength, curvature 0.5 (2 pi / 80)**2 = 0.003 / m).

The time stamps are not changed. The antenna positions are kept as
``antenna_easting`` / ``antenna_northing`` and the course at the sensor as
``heading`` (degrees clockwise from grid north).

When no lag is given for a sensor it is measured from survey lines run in
opposite directions over the same track (the zig-zag of a lag; see
``steps/_positions_lag.py``): the lag that best aligns the two high-passed
profiles, the median over pairs of lines, and its standard error. The
estimate holds any along-track position error too (a layback error ``dL``
reads as a lag of ``dL / v``).

Why the defaults are what they are
----------------------------------
``course_smoothing_m = 10``
    With RTK-like antenna noise of a few cm and readings every 0.2 m, a
    10 m window takes the course to a fraction of a degree (a 2 m offset
    then moves by under 1 cm), while a vessel's course changes over tens of
    metres; the quadratic fit follows a turn of 20 m radius to 0.3 mm (2.4 mm
    at 10 m, our own computation).
    (Common practice, no published source.)
``lag_search_s = 1``
    Instrument time lags are usually tenths of a second; a second at 2 m/s
    is 4 m of separation between opposite lines. (Common practice, no
    published source.)
``pair_max_separation_m = 1``
    Two passes over the "same" track differ by the steering error, commonly
    half a metre or so, so a tighter limit leaves few readings. The
    along-track peak of an anomaly of a steeply magnetised item shifts
    with the cross-track distance, so each pair's lag carries a bias of
    its own (on the demo survey, at 0.3-0.5 m median separation, pair
    lags scatter with a robust sigma of 0.04 s, and 2 of 15 pairs are
    0.25 s off); the median over pairs resists it and the scatter sets
    the stated uncertainty. (Common practice, no
    published source.)
``pair_min_overlap_m = 30``
    Long enough to hold several compact anomalies at typical item
    densities; shorter overlaps give unstable alignments. (Common
    practice, no published source.)
``highpass_m = 20``
    Removes the regional field, the external variation and level
    differences, which change over tens to hundreds of metres, and keeps
    the anomalies of compact items a few metres below the sensor (a few
    metres wide). (Common practice, no published source.)
``lag_min_correlation = 0.5``
    Below this the two profiles share too little signal for their alignment
    to mean anything (common practice, no published source).

References
----------
Cleveland, W. S. (1979). Robust locally weighted regression and smoothing
    scatterplots. Journal of the American Statistical Association 74(368),
    829-836.
Savitzky, A. & Golay, M. J. E. (1964). Smoothing and differentiation of
    data by simplified least squares procedures. Analytical Chemistry 36(8),
    1627-1639.
See ``steps/_positions_lag.py`` for the references of the lag estimate.
"""

from __future__ import annotations

import dask
import dask.array as da
import numpy as np
import pandas as pd
import xarray as xr

from lodeline.model import (
    DEFAULT_EXCLUDE,
    READING_DIM,
    DataError,
    Stage,
    StageContext,
    StageResult,
    current_residual,
    flag_mask,
    validate_readings,
)
from lodeline.params import Param, ParameterError, validate_table

from ._blocks import as_dask, block_of_segment, reading_chunks
from ._positions_lag import PAIR_COLUMNS, block_tracks, combine, find_pairs, pair_lag
from ._positions_track import OUT_COLUMNS, block_positions, seconds

__all__ = ["PARAMS", "SENSOR_PARAMS", "STAGE", "run", "check_params", "sensor_table"]

PARAMS = (
    Param(
        "sensors",
        {},
        "Per-sensor table {S1 = {across_m = -2.0, along_m = 0.0, up_m = 0.0}, ...}: offsets from the towed "
        "point in m (across positive to starboard, along positive forward, up positive up), and optionally "
        "layback_m and lag_s for that sensor; sensors left out get zero offsets and a warning.",
        kind=dict,
    ),
    Param(
        "layback_m",
        0.0,
        "Distance of the towed sensors behind the GNSS antenna along its track, m (0: not towed).",
        kind=float,
        minimum=0.0,
        maximum=10_000.0,
    ),
    Param(
        "course_smoothing_m",
        10.0,
        "Length of track over which the antenna positions are smoothed before the course is taken, m.",
        kind=float,
        minimum=0.0,
        maximum=10_000.0,
    ),
    Param(
        "lag_s",
        None,
        "Time lag of every sensor, s (a reading stamped T was measured at T - lag); not set: estimated "
        "from opposite-direction lines unless given per sensor.",
        kind=float,
        minimum=-60.0,
        maximum=60.0,
        optional=True,
    ),
    Param(
        "lag_search_s",
        1.0,
        "Largest absolute lag tried by the estimate, s.",
        kind=float,
        minimum=0.0,
        exclusive_minimum=True,
        maximum=60.0,
    ),
    Param(
        "lag_per_sensor",
        False,
        "Estimate one lag per sensor (from its own opposite-direction passes) instead of one for all sensors.",
        kind=bool,
    ),
    Param(
        "pair_max_separation_m",
        1.0,
        "Opposite-direction tracks closer than this (median cross-track distance) form a pair for the lag "
        "estimate; readings farther than this from the other track are left out, m.",
        kind=float,
        minimum=0.0,
        exclusive_minimum=True,
        maximum=1_000.0,
    ),
    Param(
        "pair_min_overlap_m",
        30.0,
        "Least length of overlapping track of a pair, m.",
        kind=float,
        minimum=0.0,
        exclusive_minimum=True,
        maximum=1.0e6,
    ),
    Param(
        "highpass_m",
        20.0,
        "Length of the running mean removed from the profiles before they are aligned, m.",
        kind=float,
        minimum=0.0,
        exclusive_minimum=True,
        maximum=1.0e5,
    ),
    Param(
        "lag_min_correlation",
        0.5,
        "Least correlation of the aligned profiles of a pair for it to count in the estimate.",
        kind=float,
        minimum=-1.0,
        maximum=1.0,
    ),
    Param(
        "lag_max_pairs",
        200,
        "Most pairs of segments used by the estimate (those with the longest overlaps).",
        kind=int,
        minimum=1,
        maximum=100_000,
    ),
)

#: Keys of one entry of the ``sensors`` table.
SENSOR_PARAMS = (
    Param("across_m", 0.0, "Offset to starboard, m.", kind=float, minimum=-1_000.0, maximum=1_000.0),
    Param("along_m", 0.0, "Offset forward, m.", kind=float, minimum=-10_000.0, maximum=10_000.0),
    Param("up_m", 0.0, "Offset up, added to the elevation, m.", kind=float, minimum=-1_000.0, maximum=1_000.0),
    Param("layback_m", None, "Layback of this sensor, m (default: the stage's).", kind=float,
          minimum=0.0, maximum=10_000.0, optional=True),
    Param("lag_s", None, "Time lag of this sensor, s (default: the stage's).", kind=float,
          minimum=-60.0, maximum=60.0, optional=True),
)

_EXCLUDE = np.uint32(flag_mask(*DEFAULT_EXCLUDE))

_UNITS_M = {"units": "m"}


# --------------------------------------------------------------------------
# Stage entry point
# --------------------------------------------------------------------------


def run(data: dict, params: dict, context: StageContext) -> StageResult:
    """Move the readings to their sensors' positions at the time of measurement.

    Parameters
    ----------
    data : dict
        ``data["spikes"]`` holds ``"readings"`` (antenna positions, chunk
        boundaries on segment boundaries) and ``"segments"``.
    params : dict
        The ``[positions]`` table (see :data:`PARAMS`); validated again here.
    context : lodeline.model.StageContext
        Run context.

    Returns
    -------
    lodeline.model.StageResult
        ``datasets``: ``"readings"`` with sensor ``easting`` / ``northing``
        and ``elevation``, and the new coordinates ``antenna_easting``,
        ``antenna_northing`` (m) and ``heading`` (degrees), and
        ``"segments"`` (unchanged). ``tables``: ``"positions_by_segment"``
        and ``"lag_estimate"`` (one row per pair of segments tried).
        ``summary``: the lag applied to each sensor and the estimate with
        its uncertainty. Nothing is rejected.
    """
    settings = check_params(params)
    upstream = data["spikes"]
    readings, segments = upstream["readings"], upstream["segments"]
    validate_readings(readings, segments, where="positions")
    names = [str(s) for s in readings.attrs["sensor_names"]]
    table = sensor_table(settings, names, context)

    chunks = reading_chunks(readings, segments, context.chunk_readings)
    seg_sensor = np.asarray(segments["sensor_index"].values, dtype=np.int64)
    seg_line = np.asarray(segments["line_index"].values, dtype=np.int64)

    estimates, pairs = {}, pd.DataFrame({c: [] for c in PAIR_COLUMNS})
    wanted = [s for s in names if table[s]["lag_s"] is None]
    if wanted and seg_sensor.size:
        estimates, pairs = _estimate_lags(readings, segments, chunks, table, wanted, settings, context)
        for name in wanted:
            table[name]["lag_s"] = estimates[table[name]["group"]]["lag_s"]
    elif wanted:
        for name in wanted:
            table[name]["lag_s"] = 0.0

    per_seg = {key: np.array([table[names[s]][key] for s in seg_sensor], dtype=float)
               for key in ("across_m", "along_m", "up_m", "layback_m", "lag_s")}
    out = _positions(readings, segments, chunks, per_seg, settings["course_smoothing_m"])
    new = _assemble(readings, out)
    by_segment = _segment_table(readings, segments, chunks, out, per_seg, table, names, seg_line, seg_sensor)
    summary = _summary(table, names, estimates, pairs, by_segment)
    _log(context, table, names, estimates, by_segment)
    return StageResult(
        datasets={"readings": new, "segments": segments},
        tables={"positions_by_segment": by_segment, "lag_estimate": pairs},
        summary=summary,
        rejected={},
    )


def check_params(params: dict | None) -> dict:
    """Validate the ``[positions]`` table and every entry of its ``sensors`` table.

    Raises
    ------
    lodeline.params.ParameterError
        On an unknown key, a wrong type or a value out of range, naming the
        key (``positions.sensors.S1.across_m``...).
    """
    settings = validate_table(PARAMS, params, "positions")
    sensors = {}
    for name, entry in settings["sensors"].items():
        where = f"positions.sensors.{name}"
        if not isinstance(entry, dict):
            raise ParameterError(
                f"{where} = {entry!r} must be a table such as {{across_m = -2.0, along_m = 0.0, up_m = 0.0}}"
            )
        sensors[str(name)] = validate_table(SENSOR_PARAMS, entry, where)
    settings["sensors"] = sensors
    return settings


def sensor_table(settings: dict, names: list[str], context: StageContext) -> dict:
    """Offsets, layback, lag and estimation group of every sensor of the data.

    Parameters
    ----------
    settings : dict
        From :func:`check_params`.
    names : list of str
        Sensor names of the readings.
    context : lodeline.model.StageContext
        For the warning about sensors left out of the table.

    Returns
    -------
    dict
        ``{name: {across_m, along_m, up_m, layback_m, lag_s, lag_given, group}}``;
        ``lag_s`` is None where it is to be estimated.

    Raises
    ------
    lodeline.params.ParameterError
        When the table names a sensor that is not in the readings.
    """
    given = settings["sensors"]
    unknown = [s for s in given if s not in names]
    if unknown:
        raise ParameterError(
            f"positions.sensors.{unknown[0]}: there is no sensor {unknown[0]!r} in the readings "
            f"(sensors present: {', '.join(names)}); correct the name or remove the entry"
        )
    missing = [s for s in names if s not in given]
    if missing:
        context.log.warning(
            "positions: no entry in positions.sensors for %s: zero offsets used "
            "(give an empty table, e.g. S1 = {}, to say so)", ", ".join(missing)
        )
    table = {}
    for i, name in enumerate(names):
        entry = given.get(name, {"across_m": 0.0, "along_m": 0.0, "up_m": 0.0, "layback_m": None, "lag_s": None})
        lag = entry["lag_s"] if entry["lag_s"] is not None else settings["lag_s"]
        table[name] = {
            "across_m": float(entry["across_m"]),
            "along_m": float(entry["along_m"]),
            "up_m": float(entry["up_m"]),
            "layback_m": float(entry["layback_m"] if entry["layback_m"] is not None else settings["layback_m"]),
            "lag_s": None if lag is None else float(lag),
            "lag_given": lag is not None,
            "group": name if settings["lag_per_sensor"] else "all",
        }
    return table


STAGE = Stage(
    name="positions",
    run=run,
    params=PARAMS,
    after=("spikes",),
    order=20,
    summary="Move readings from the GNSS antenna to the sensors: layback, offsets, time lag",
)


# --------------------------------------------------------------------------
# Positions of all readings (lazy, block by block)
# --------------------------------------------------------------------------


def _per_block(values: np.ndarray, segments: xr.Dataset, chunks: tuple) -> da.Array:
    """A per-segment array as a dask array with one block per reading block."""
    block = block_of_segment(segments, chunks)
    counts = np.bincount(block, minlength=len(chunks[0])) if block.size else np.zeros(len(chunks[0]), int)
    return da.from_array(np.asarray(values), chunks=(tuple(int(c) for c in counts),))


def _relative_starts(segments: xr.Dataset, chunks: tuple) -> np.ndarray:
    """Segment starts relative to their block."""
    bounds = np.cumsum((0,) + tuple(chunks[0]))
    starts = np.asarray(segments["start"].values, dtype=np.int64)
    return starts - bounds[block_of_segment(segments, chunks)] if starts.size else starts


def _positions(readings, segments, chunks, per_seg: dict, window_m: float) -> da.Array:
    """Lazy (readings, 5) array of :data:`OUT_COLUMNS`."""
    arrays = [as_dask(readings[v], chunks) for v in ("time", "easting", "northing", "elevation")]
    seg_arrays = [_per_block(_relative_starts(segments, chunks), segments, chunks)]
    keys = ("across_m", "along_m", "up_m", "layback_m", "lag_s")
    seg_arrays += [_per_block(per_seg[k], segments, chunks) for k in keys]
    return da.map_blocks(
        block_positions, *arrays, *seg_arrays, window_m=window_m, dtype=np.float64,
        new_axis=1, chunks=(chunks[0], (len(OUT_COLUMNS),)),
    )


def _assemble(readings: xr.Dataset, out: da.Array) -> xr.Dataset:
    """Readings with sensor positions, elevation and the new coordinates."""
    col = {name: out[:, i] for i, name in enumerate(OUT_COLUMNS)}
    chunks = out.chunks[:1]
    east, north = readings["easting"], readings["northing"]
    coords = {
        "antenna_easting": (READING_DIM, as_dask(east, chunks),
                            {**east.attrs, "long_name": "GNSS antenna easting at the time stamp, survey CRS"}),
        "antenna_northing": (READING_DIM, as_dask(north, chunks),
                             {**north.attrs, "long_name": "GNSS antenna northing at the time stamp, survey CRS"}),
        "easting": (READING_DIM, col["easting"], {
            **east.attrs, **_UNITS_M,
            "long_name": "sensor easting at the time of measurement (layback, offsets and time lag applied)"}),
        "northing": (READING_DIM, col["northing"], {
            **north.attrs, **_UNITS_M,
            "long_name": "sensor northing at the time of measurement (layback, offsets and time lag applied)"}),
        "elevation": (READING_DIM, col["elevation"], {
            **readings["elevation"].attrs, **_UNITS_M,
            "long_name": "sensor elevation, positive up (vertical offset applied)"}),
        "heading": (READING_DIM, col["heading"], {
            "units": "degree",
            "long_name": "course over ground at the sensor, clockwise from grid north"}),
    }
    out_ds = readings.assign_coords(coords)
    out_ds.attrs["position_reference"] = "sensor"
    return out_ds


# --------------------------------------------------------------------------
# Lag estimate
# --------------------------------------------------------------------------


def _estimate_lags(readings, segments, chunks, table, wanted, settings, context):
    """Estimate the lag of every group of sensors without a given lag."""
    names = [str(s) for s in readings.attrs["sensor_names"]]
    kinds = list(readings.attrs["line_kinds"])
    seg_sensor = np.asarray(segments["sensor_index"].values, dtype=np.int64)
    seg_line = np.asarray(segments["line_index"].values, dtype=np.int64)
    groups = sorted({table[s]["group"] for s in wanted})
    group_id = {g: i for i, g in enumerate(groups)}
    seg_group = np.array([group_id.get(table[names[s]]["group"], -1) if table[names[s]]["lag_s"] is None else -1
                          for s in seg_sensor], dtype=np.int64)
    # Survey lines only: tie lines cross them and rarely repeat a track.
    seg_group[[kinds[i] != "survey" for i in seg_line]] = -1
    tracks = _tracks(readings, segments, chunks, table, names, seg_group, settings["course_smoothing_m"])
    found = find_pairs(
        tracks, seg_line, seg_group, max_separation_m=settings["pair_max_separation_m"],
        min_overlap_m=settings["pair_min_overlap_m"], max_pairs=settings["lag_max_pairs"],
    )
    rows = []
    loader = _SegmentLoader(readings, segments)
    bar = context.progress(len(found), "lag pairs")
    for pair in found.itertuples(index=False):
        a, b = int(pair.a), int(pair.b)
        off = [{k: table[names[seg_sensor[x]]][k] for k in ("across_m", "along_m", "layback_m")} for x in (a, b)]
        result = pair_lag(
            loader(a), loader(b), offsets_a=off[0], offsets_b=off[1],
            window_m=settings["course_smoothing_m"], max_separation_m=settings["pair_max_separation_m"],
            min_overlap_m=settings["pair_min_overlap_m"], highpass_m=settings["highpass_m"],
            search_s=settings["lag_search_s"], min_correlation=settings["lag_min_correlation"],
        )
        rows.append({
            "group": groups[seg_group[a]],
            "line_a": str(readings.attrs["line_names"][seg_line[a]]), "sensor_a": names[seg_sensor[a]],
            "line_b": str(readings.attrs["line_names"][seg_line[b]]), "sensor_b": names[seg_sensor[b]],
            **{k: result[k] for k in ("overlap_m", "separation_m", "speed_a_m_s", "speed_b_m_s", "readings",
                                      "lag_s", "se_s", "correlation", "used", "note")},
        })
        bar.update(1)
    bar.close()
    pairs = pd.DataFrame(rows, columns=list(PAIR_COLUMNS))
    estimates = {}
    for g in groups:
        used = pairs[(pairs["group"] == g) & pairs["used"]] if len(pairs) else pairs
        if len(used) == 0:
            who = "sensor " + g if g != "all" else "the sensors"
            raise DataError(
                f"positions: cannot estimate the time lag of {who}: no pair of opposite-direction survey "
                f"lines over the same track with a clear alignment ({len(found)} pair(s) tried); "
                "give positions.lag_s (or lag_s per sensor in positions.sensors)"
            )
        estimates[g] = combine(used["lag_s"].to_numpy(), used["se_s"].to_numpy())
        if len(used) < 3:
            context.log.warning("positions: lag of %s estimated from only %d pair(s); its uncertainty is rough",
                                g, len(used))
    return estimates, pairs


def _tracks(readings, segments, chunks, table, names, seg_group, window_m) -> np.ndarray:
    """Decimated sensor tracks (no lag) of the segments with a group, block by block."""
    seg_sensor = np.asarray(segments["sensor_index"].values, dtype=np.int64)
    starts = _relative_starts(segments, chunks)
    block = block_of_segment(segments, chunks)
    ids = np.where(seg_group >= 0, np.arange(seg_sensor.size), -1)
    per = {k: np.array([table[names[s]][k] for s in seg_sensor], dtype=float)
           for k in ("across_m", "along_m", "layback_m")}
    blocks = [as_dask(readings[v], chunks).to_delayed().ravel() for v in ("time", "easting", "northing")]
    tasks = []
    for i, (t, e, n) in enumerate(zip(*blocks)):
        mine = np.flatnonzero(block == i)
        if mine.size == 0 or (ids[mine] < 0).all():
            continue
        tasks.append(dask.delayed(block_tracks)(
            t, e, n, starts[mine], ids[mine], per["across_m"][mine], per["along_m"][mine],
            per["layback_m"][mine], window_m=window_m,
        ))
    parts = dask.compute(*tasks)
    return np.concatenate(parts) if parts else np.zeros((0, 5))


class _SegmentLoader:
    """Loads one segment's time, antenna position and field, keeping the last few."""

    def __init__(self, readings: xr.Dataset, segments: xr.Dataset, keep: int = 4):
        self.readings = readings
        self.start = np.asarray(segments["start"].values, dtype=np.int64)
        self.stop = np.asarray(segments["stop"].values, dtype=np.int64)
        self.keep = keep
        self.cache: dict[int, dict] = {}

    def __call__(self, seg: int) -> dict:
        if seg in self.cache:
            return self.cache[seg]
        part = self.readings.isel({READING_DIM: slice(int(self.start[seg]), int(self.stop[seg]))})
        field = current_residual(part)
        t, e, n, f, flags = dask.compute(part["time"].data, part["easting"].data, part["northing"].data,
                                         field.data, part["flags"].data)
        f = np.asarray(f, dtype=float)
        value = {
            "t": seconds(t), "e": np.asarray(e, float), "n": np.asarray(n, float), "field": f,
            "valid": np.isfinite(f) & ((np.asarray(flags, dtype=np.uint32) & _EXCLUDE) == 0),
        }
        if len(self.cache) >= self.keep:
            self.cache.pop(next(iter(self.cache)))
        self.cache[seg] = value
        return value


# --------------------------------------------------------------------------
# Tables, summary and log
# --------------------------------------------------------------------------


def _segment_stats(extrapolated: np.ndarray, heading: np.ndarray, starts: np.ndarray) -> np.ndarray:
    """Per segment of a block: readings extrapolated, largest extrapolation (m), readings without a course."""
    n = extrapolated.size
    starts = np.asarray(starts, dtype=np.int64)
    if starts.size == 0:
        return np.zeros(0)
    if n == 0:
        return np.zeros(3 * starts.size)
    table = np.zeros((starts.size, 3))
    table[:, 0] = np.add.reduceat((extrapolated > 0).astype(float), starts)
    table[:, 1] = np.maximum.reduceat(extrapolated, starts)
    table[:, 2] = np.add.reduceat((~np.isfinite(heading)).astype(float), starts)
    return table.ravel()


def _segment_table(readings, segments, chunks, out, per_seg, table, names, seg_line, seg_sensor) -> pd.DataFrame:
    """One row per segment: what was applied and how many readings were extrapolated."""
    starts = _per_block(_relative_starts(segments, chunks), segments, chunks)
    counts = starts.chunks[0]
    stats = da.map_blocks(
        _segment_stats, out[:, 4], out[:, 2], starts, dtype=np.float64,
        chunks=(tuple(3 * int(c) for c in counts),),
    ).compute().reshape(-1, 3)
    length = np.asarray(segments["stop"].values) - np.asarray(segments["start"].values)
    return pd.DataFrame({
        "line": [str(readings.attrs["line_names"][i]) for i in seg_line],
        "sensor": [names[i] for i in seg_sensor],
        "readings": length.astype(np.int64),
        "across_m": per_seg["across_m"],
        "along_m": per_seg["along_m"],
        "up_m": per_seg["up_m"],
        "layback_m": per_seg["layback_m"],
        "lag_s": per_seg["lag_s"],
        "lag_source": ["given" if table[names[i]]["lag_given"] else "estimated" for i in seg_sensor],
        "extrapolated": stats[:, 0].astype(np.int64),
        "max_extrapolated_m": stats[:, 1],
        "no_course": stats[:, 2].astype(np.int64),
    })


def _summary(table, names, estimates, pairs, by_segment) -> dict:
    """Figures for the run log and manifest (plain Python numbers)."""
    summary = {f"lag_s_{s}": float(table[s]["lag_s"]) for s in names}
    for g, est in estimates.items():
        suffix = "" if g == "all" else f"_{g}"
        summary[f"lag_estimate_s{suffix}"] = float(est["lag_s"])
        summary[f"lag_uncertainty_s{suffix}"] = float(est["uncertainty_s"])
        summary[f"lag_pairs_used{suffix}"] = int(est["pairs"])
    if estimates:
        summary["lag_pairs_tried"] = int(len(pairs))
    summary["readings_extrapolated"] = int(by_segment["extrapolated"].sum())
    summary["max_extrapolated_m"] = float(by_segment["max_extrapolated_m"].max()) if len(by_segment) else 0.0
    summary["readings_without_course"] = int(by_segment["no_course"].sum())
    return summary


def _log(context, table, names, estimates, by_segment) -> None:
    """Log the lags and the extrapolation."""
    for g, est in estimates.items():
        context.log.info(
            "positions: time lag of %s estimated at %.3f +- %.3f s from %d pair(s) of opposite-direction passes",
            "all sensors" if g == "all" else g, est["lag_s"], est["uncertainty_s"], est["pairs"],
        )
    for s in names:
        t = table[s]
        context.log.info(
            "positions: %s across %.2f m, along %.2f m, up %.2f m, layback %.2f m, lag %.3f s (%s)",
            s, t["across_m"], t["along_m"], t["up_m"], t["layback_m"], t["lag_s"],
            "given" if t["lag_given"] else "estimated",
        )
    if by_segment["extrapolated"].sum():
        context.log.info(
            "positions: %d reading(s) lie beyond the ends of their antenna track (start of lines within the "
            "layback); placed by straight extrapolation of the course, at most %.2f m",
            int(by_segment["extrapolated"].sum()), float(by_segment["max_extrapolated_m"].max()),
        )
    if by_segment["no_course"].sum():
        context.log.warning(
            "positions: %d reading(s) in segments with fewer than two track points keep the antenna position",
            int(by_segment["no_course"].sum()),
        )
