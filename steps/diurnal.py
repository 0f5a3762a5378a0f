"""Diurnal correction from a base station, with gap and rate-of-change flags.

A magnetometer at a fixed base station records the external (diurnal)
variation of the field during the survey. The base-station field is
interpolated linearly to the time of every reading and its variation about
a datum is subtracted (the base-station diurnal correction, as described
for example by Telford, Geldart & Sheriff 1990)::

    diurnal(t) = B(t + time_offset_s) - datum
    residual   = previous residual - diurnal

``datum`` is the median of the base-station series used (``datum =
"median"``) or a given value ``datum_nT``. It only shifts the whole survey
by a constant; what matters is that it is the same for every reading.

The base-station series is cleaned, merged over several files, optionally
smoothed, and its rate of change measured as described in
:mod:`steps._diurnal_base` (NaN and time-order-flagged samples left out; the
first file preferred where files overlap; a running mean of
``smoothing_s``; the chord slope over ``rate_window_s``).

Flags (nothing is deleted)
    ``base_station_gap``: the reading's two neighbouring base samples are
    more than ``max_gap_s`` apart, or the reading lies outside the
    base-station record. Its correction is NaN (so its residual is NaN): a
    gap is never bridged and the record never extrapolated.
    ``diurnal_rate``: the rate of change at either neighbouring base sample
    exceeds ``rate_limit_nT_per_min`` in size.

Why the defaults are what they are
----------------------------------
``max_gap_s = 30``
    Linear interpolation over a gap of length ``L`` errs by at most
    ``L**2 / 8 * max|B''|`` (the interpolation error bound, Hildebrand
    1974). For the slow daily variation (tens of nT over a day) that is far
    below a thousandth of a nT; the limit is set by micropulsations. For a
    sinusoid of amplitude ``A`` and period ``P``, ``max|B''| = A (2 pi /
    P)**2``: with ``L = 30 s`` and ``A = 1.5 nT`` the error is at most 0.3 nT
    for ``P >= 150 s`` (the Pc5 band, 150-600 s, Jacobs et al. 1964) and
    0.07 nT for ``P >= 300 s``; shorter periods (Pc3-Pc4, 10-150 s) are not
    followed across a gap of that length and would be misrepresented by
    up to their full amplitude. At 1 Hz, 30 s bridges a missing stretch of
    29 samples (a dropout or a logger restart), not an outage of minutes.
    The figure 30 s itself is common practice, no published source.
``rate_limit_nT_per_min = 5`` over ``rate_window_s = 60``
    Survey specifications commonly stop or reject work while the external
    field changes faster than a few nT per minute, because a base station
    some kilometres away no longer records the same short-period
    variation as the survey sensor. 5 nT over a one-minute chord is a
    figure of that kind quoted from memory: common practice, no published
    source; set the limit of your own specification. A one-minute chord
    matches the "per minute" of such limits; the white noise of the base
    station (0.1 nT, say) adds only ``sqrt(2) * 0.1`` nT/min to the rate
    over that chord. A micropulsation of amplitude ``A`` and period ``P``
    gives at most ``2 A sin(pi w / P) / w`` over a chord ``w`` (no more
    than ``2 A`` per chord), so over 60 s only a swing of more than 5 nT
    within the minute (an amplitude above 2.5 nT) triggers the default.
``smoothing_s = 0``
    No smoothing: base-station noise (a tenth of a nT) is below the survey's
    concern, and smoothing also removes micropulsations that the survey
    sensor records too. Set it to a few seconds for a noisy base station.
``curve_step_s = 10``
    The ``diurnal_curve`` table keeps one row per 10 s: about 8 600 rows a
    day, enough to plot micropulsations of a minute and longer.

Limits
    Readings are corrected at their stamped time; a sensor time lag of a
    fraction of a second changes the correction by the rate times the lag
    (0.03 nT at 0.1 nT/s). The base station is assumed to record the same
    external field as the survey; its difference with distance, and level
    differences between two base-station instruments (several files of
    different stations), are not corrected.

References
----------
Hildebrand, F. B. (1974). Introduction to Numerical Analysis, 2nd ed.
    McGraw-Hill: the error of polynomial (here linear) interpolation.
    (From memory; chapter not checked.)
Jacobs, J. A., Kato, Y., Matsushita, S. & Troitskaya, V. A. (1964).
    Classification of geomagnetic micropulsations. Journal of Geophysical
    Research 69(1), 180-181. (From memory.)
Smith, S. W. (1997). The Scientist and Engineer's Guide to Digital Signal
    Processing, ch. 15 (moving average filters). (From memory.)
Telford, W. M., Geldart, L. P. & Sheriff, R. E. (1990). Applied
    Geophysics, 2nd ed. Cambridge University Press: magnetic methods, field
    operations and diurnal corrections. (From memory; section not checked.)
"""

from __future__ import annotations

import dask
import dask.array as da
import numpy as np
import pandas as pd
import xarray as xr

from lodeline.model import (
    Stage,
    StageContext,
    StageResult,
    DataError,
    add_flags,
    apply_correction,
    validate_readings,
)
from lodeline.params import Param, ParameterError, validate_table

from ._diurnal_base import BaseSeries, curve_table, gap_table, prepare_base
from ._blocks import as_dask, block_starts, reading_chunks
from ._diurnal_blocks import (
    GAP_CODE,
    RATE_CODE,
    SEGMENT_STATS,
    block_codes,
    block_correction,
    block_gap_counts,
    block_segment_stats,
    segments_per_block,
)

__all__ = ["PARAMS", "STAGE", "run", "check_params"]

PARAMS = (
    Param(
        "datum",
        "median",
        "Level the base-station variation is taken about: 'median' of the base-station series used, or 'value' (datum_nT).",
        kind=str,
        choices=("median", "value"),
    ),
    Param(
        "datum_nT",
        None,
        "Datum of the base-station field when datum = 'value', nT.",
        kind=float,
        minimum=0.0,
        maximum=1.0e5,
        optional=True,
    ),
    Param(
        "max_gap_s",
        30.0,
        "Longest spacing of base-station samples bridged by interpolation, s; readings in longer gaps are flagged base_station_gap.",
        kind=float,
        minimum=0.0,
        exclusive_minimum=True,
        maximum=86400.0,
    ),
    Param(
        "rate_limit_nT_per_min",
        5.0,
        "Readings where the base-station field changes faster than this are flagged diurnal_rate, nT/min.",
        kind=float,
        minimum=0.0,
        exclusive_minimum=True,
        maximum=1.0e6,
    ),
    Param(
        "rate_window_s",
        60.0,
        "Chord over which the rate of change is measured, s.",
        kind=float,
        minimum=0.0,
        exclusive_minimum=True,
        maximum=86400.0,
    ),
    Param(
        "smoothing_s",
        0.0,
        "Width of a running mean applied to the base-station series, s (0 = none).",
        kind=float,
        minimum=0.0,
        maximum=3600.0,
    ),
    Param(
        "time_offset_s",
        0.0,
        "Seconds added to the base-station times to bring them onto the readings' clock, s.",
        kind=float,
        minimum=-86400.0,
        maximum=86400.0,
    ),
    Param(
        "curve_step_s",
        10.0,
        "Time step of the diurnal_curve table (decimated variation and rate, for plotting), s.",
        kind=float,
        minimum=0.0,
        exclusive_minimum=True,
        maximum=86400.0,
    ),
)

_LONG_NAME = "diurnal variation (base station about its datum)"


def check_params(params: dict | None) -> dict:
    """Validate the ``[diurnal]`` table, including what :class:`Param` cannot say.

    Raises
    ------
    lodeline.params.ParameterError
        On an unknown key, a wrong type or range, ``datum = "value"`` without
        ``datum_nT``, or ``datum_nT`` given with ``datum = "median"``.
    """
    settings = validate_table(PARAMS, params, "diurnal")
    if settings["datum"] == "value" and settings["datum_nT"] is None:
        raise ParameterError("diurnal.datum = 'value' needs diurnal.datum_nT (the datum in nT)")
    if settings["datum"] == "median" and settings["datum_nT"] is not None:
        raise ParameterError(
            f"diurnal.datum_nT = {settings['datum_nT']!r} is only used with datum = 'value': "
            "set diurnal.datum = 'value' or remove datum_nT"
        )
    return settings


def run(data: dict, params: dict, context: StageContext) -> StageResult:
    """Subtract the base-station diurnal variation and flag gaps and fast changes.

    Parameters
    ----------
    data : dict
        ``data["positions"]``: ``"readings"`` and ``"segments"``;
        ``data["ingest"]["base_station"]``: the base-station dataset, absent
        when the survey has none (the correction is then skipped).
    params : dict
        The ``[diurnal]`` table (see :data:`PARAMS`).
    context : lodeline.model.StageContext
        Run context (log).

    Returns
    -------
    lodeline.model.StageResult
        ``datasets``: ``"readings"`` with ``diurnal`` (nT), an updated
        ``residual`` and the flags, and ``"segments"``. ``tables``:
        ``base_station_gaps``, ``diurnal_curve`` and ``diurnal_by_line``.
        Nothing is rejected.

    Raises
    ------
    lodeline.model.DataError
        When no base-station sample is usable, or no reading falls inside
        the base-station record (a clock or date mismatch).
    """
    settings = check_params(params)
    upstream = data["positions"]
    readings, segments = upstream["readings"], upstream["segments"]
    validate_readings(readings, segments, where="diurnal")
    base_ds = (data.get("ingest") or {}).get("base_station")
    if base_ds is None:
        context.log.warning(
            "diurnal: the survey has no base station (no [inputs.base_station]): "
            "diurnal correction SKIPPED, readings passed through uncorrected"
        )
        return StageResult(
            datasets={"readings": readings, "segments": segments},
            summary={"skipped": True, "reason": "no base station"},
            rejected={},
        )

    base = prepare_base(base_ds, settings)
    chunks = reading_chunks(readings, segments, context.chunk_readings)
    time = as_dask(readings["time"], chunks)
    common = {"t0_ns": base.t0_ns, "t_s": base.t_s, "run": base.run}
    corr = da.map_blocks(block_correction, time, value=base.value, datum_nT=base.datum_nT, dtype=np.float64, **common)
    code = da.map_blocks(
        block_codes, time, rate=base.rate, rate_limit=settings["rate_limit_nT_per_min"], dtype=np.uint8, **common
    )
    _, per_block = segments_per_block(segments, chunks)
    stats = da.map_blocks(
        block_segment_stats,
        time,
        code,
        corr,
        block_starts(segments, chunks),
        t0_ns=base.t0_ns,
        dtype=np.float64,
        chunks=(tuple(int(c) * len(SEGMENT_STATS) for c in per_block),),
    )
    n_gap_bins = 3 + int(base.run[-1])
    gap_counts = da.map_blocks(
        block_gap_counts, time, code, dtype=np.float64, chunks=((n_gap_bins,) * len(chunks[0]),), **common
    )
    stats, gap_counts = dask.compute(stats, gap_counts)
    stats = stats.reshape(-1, len(SEGMENT_STATS))
    by_segment = _segment_table(readings, segments, stats, base)
    where_flagged = gap_counts.reshape(-1, n_gap_bins).sum(axis=0).astype(np.int64)
    _check_overlap(by_segment, where_flagged, base, base_ds)

    out = apply_correction(
        readings,
        "diurnal",
        corr,
        _LONG_NAME,
        datum=settings["datum"],
        datum_nT=base.datum_nT,
        max_gap_s=settings["max_gap_s"],
        smoothing_s=settings["smoothing_s"],
        time_offset_s=settings["time_offset_s"],
    )
    out = add_flags(out, (code & GAP_CODE) != 0, "base_station_gap")
    out = add_flags(out, (code & RATE_CODE) != 0, "diurnal_rate")

    gaps = _gaps_with_lines(gap_table(base), by_segment, where_flagged, base)
    curve = curve_table(base, settings["curve_step_s"], settings["rate_limit_nT_per_min"], settings["rate_window_s"])
    summary = _summary(base, stats, by_segment, gaps, curve, where_flagged, settings)
    _log(context, summary)
    return StageResult(
        datasets={"readings": out, "segments": segments},
        tables={"base_station_gaps": gaps, "diurnal_curve": curve, "diurnal_by_line": by_segment},
        summary=summary,
        rejected={},
    )


STAGE = Stage(
    name="diurnal",
    run=run,
    params=PARAMS,
    after=("positions", "ingest"),
    order=30,
    summary="Subtract the base-station diurnal variation about a datum; flag base-station gaps and fast external-field changes",
)


# --------------------------------------------------------------------------
# Tables, checks, summary and log
# --------------------------------------------------------------------------


def _iso(t) -> str | None:
    return None if pd.isna(t) else pd.Timestamp(t).tz_localize("UTC").isoformat()


def _segment_table(readings: xr.Dataset, segments: xr.Dataset, stats: np.ndarray, base: BaseSeries) -> pd.DataFrame:
    """One row per segment (line and sensor): counts and correction statistics."""
    raw = pd.DataFrame(stats, columns=list(SEGMENT_STATS))
    line_index = np.asarray(segments["line_index"].values, dtype=np.int64)
    sensor_index = np.asarray(segments["sensor_index"].values, dtype=np.int64)
    n = raw["corrected"].to_numpy()
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(n > 0, raw["correction_sum"] / n, np.nan)
        rms = np.where(n > 0, np.sqrt(raw["correction_sumsq"] / n), np.nan)

    def utc(seconds):
        ns = np.where(np.isfinite(seconds), base.t0_ns + np.round(np.nan_to_num(seconds) * 1e9), 0).astype(np.int64)
        out = ns.view("datetime64[ns]").copy()
        out[~np.isfinite(seconds)] = np.datetime64("NaT")
        return out

    return pd.DataFrame(
        {
            "line": [str(readings.attrs["line_names"][i]) for i in line_index],
            "sensor": [str(readings.attrs["sensor_names"][i]) for i in sensor_index],
            "line_index": line_index,
            "sensor_index": sensor_index,
            "readings": raw["readings"].astype(np.int64),
            "base_station_gap": raw["base_station_gap"].astype(np.int64),
            "diurnal_rate": raw["diurnal_rate"].astype(np.int64),
            "correction_mean_nT": mean,
            "correction_rms_nT": rms,
            "correction_min_nT": raw["correction_min"],
            "correction_max_nT": raw["correction_max"],
            "time_first": utc(raw["time_first_s"].to_numpy()),
            "time_last": utc(raw["time_last_s"].to_numpy()),
        }
    )


def _check_overlap(by_segment: pd.DataFrame, where_flagged: np.ndarray, base: BaseSeries, base_ds: xr.Dataset) -> None:
    """Refuse a survey none of whose readings lie inside the base-station record."""
    total = int(by_segment["readings"].sum())
    if total == 0 or where_flagged[:3].sum() < total:
        return
    first, last = by_segment["time_first"].min(), by_segment["time_last"].max()
    b0 = pd.Timestamp(base.t0_ns, unit="ns")
    b1 = pd.Timestamp(base.t0_ns + int(round(base.t_s[-1] * 1e9)), unit="ns")
    files = ", ".join(str(s) for s in base_ds.attrs.get("source_files", [])) or "base station"
    raise DataError(
        f"{files}: the base-station record ({b0} to {b1} UTC, after time_offset_s) does not overlap the readings "
        f"({first} to {last} UTC): check the date and time zone of the base-station files or diurnal.time_offset_s"
    )


def _gaps_with_lines(gaps: pd.DataFrame, by_segment: pd.DataFrame, where_flagged: np.ndarray, base: BaseSeries) -> pd.DataFrame:
    """Add to each gap the readings flagged in it and the lines surveyed during it."""
    gaps = gaps.copy()
    gaps["readings_flagged"] = where_flagged[3:].astype(np.int64)
    first = by_segment["time_first"].to_numpy()
    last = by_segment["time_last"].to_numpy()
    names = by_segment["line"].to_numpy()
    lines = []
    for start, end in zip(gaps["last_sample_before"].to_numpy(), gaps["first_sample_after"].to_numpy()):
        during = (first < end) & (last > start)
        lines.append(" ".join(dict.fromkeys(names[during])))
    gaps["lines"] = lines
    return gaps


def _summary(base, stats, by_segment, gaps, curve, where_flagged, settings) -> dict:
    """Figures for the run log and manifest (plain Python numbers)."""
    column = {name: i for i, name in enumerate(SEGMENT_STATS)}
    n = float(stats[:, column["corrected"]].sum())
    total = int(by_segment["readings"].sum())
    mean = float(stats[:, column["correction_sum"]].sum() / n) if n else None
    rms = float(np.sqrt(stats[:, column["correction_sumsq"]].sum() / n)) if n else None
    cmin = float(np.nanmin(by_segment["correction_min_nT"])) if n else None
    cmax = float(np.nanmax(by_segment["correction_max_nT"])) if n else None
    counts = base.counts
    gap_rows = [
        {
            "last_sample_before": _iso(r.last_sample_before),
            "first_sample_after": _iso(r.first_sample_after),
            "length_s": float(r.length_s),
            "readings_flagged": int(r.readings_flagged),
            "lines": r.lines,
        }
        for r in gaps.itertuples(index=False)
    ]
    rate = np.abs(base.rate)
    return {
        "skipped": False,
        "datum": settings["datum"],
        "datum_nT": base.datum_nT,
        "base_readings_read": counts["read"],
        "base_readings_used": counts["used"],
        "base_left_out": {k: counts[k] for k in ("nan_field", "no_time", "time_order", "overlap", "duplicate_time")},
        "base_time_start": _iso(pd.Timestamp(base.t0_ns, unit="ns")),
        "base_time_end": _iso(pd.Timestamp(base.t0_ns + int(round(base.t_s[-1] * 1e9)), unit="ns")),
        "base_gaps": len(gap_rows),
        "base_gap_time_s": float(gaps["length_s"].sum()) if len(gaps) else 0.0,
        "base_gap_list": gap_rows[:100],
        "base_rate_max_nT_per_min": float(np.nanmax(rate)) if np.isfinite(rate).any() else None,
        "base_rate_unmeasured_samples": int((~np.isfinite(rate)).sum()),
        "base_time_too_fast_fraction": float(curve["too_fast"].mean()) if len(curve) else 0.0,
        "readings": total,
        "readings_corrected": int(n),
        "correction_mean_nT": mean,
        "correction_rms_nT": rms,
        "correction_min_nT": cmin,
        "correction_max_nT": cmax,
        "correction_range_nT": None if cmin is None else cmax - cmin,
        "flagged": {
            "base_station_gap": int(by_segment["base_station_gap"].sum()),
            "diurnal_rate": int(by_segment["diurnal_rate"].sum()),
        },
        "base_station_gap_where": {
            "no_time": int(where_flagged[0]),
            "before_record": int(where_flagged[1]),
            "after_record": int(where_flagged[2]),
            "in_gaps": int(where_flagged[3:].sum()),
        },
    }


def _log(context: StageContext, s: dict) -> None:
    """Summary lines in the run log; a warning when readings could not be corrected."""
    context.log.info(
        "diurnal: datum %.2f nT (%s); %d of %d base-station readings used; %d base-station gap(s) longer than the limit",
        s["datum_nT"],
        s["datum"],
        s["base_readings_used"],
        s["base_readings_read"],
        s["base_gaps"],
    )
    if s["readings_corrected"]:
        context.log.info(
            "diurnal: correction %.2f to %.2f nT (RMS %.2f nT) on %d readings; %d flagged diurnal_rate",
            s["correction_min_nT"],
            s["correction_max_nT"],
            s["correction_rms_nT"],
            s["readings_corrected"],
            s["flagged"]["diurnal_rate"],
        )
    flagged = s["flagged"]["base_station_gap"]
    if flagged:
        where = s["base_station_gap_where"]
        context.log.warning(
            "diurnal: %d readings not corrected and flagged base_station_gap (%d in base-station gaps, "
            "%d before and %d after the base-station record): see base_station_gaps.csv",
            flagged,
            where["in_gaps"],
            where["before_record"],
            where["after_record"],
        )
