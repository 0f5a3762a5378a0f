"""Base-station series for the diurnal correction: cleaning, merging, smoothing, rate.

The base-station dataset is small (one reading a second or slower), so it is
loaded into memory whole. It is turned into one strictly increasing series
of times and values, cut into *runs* wherever two consecutive samples are
farther apart than ``max_gap_s``. Inside a run the series is the straight
line between neighbouring samples (linear interpolation); across the gap
between two runs, and outside the record, it is not defined.

Cleaning
    A sample is left out when its field is NaN, or when the ingest stage
    flagged it ``time_duplicate`` or ``time_backwards`` (the first sample
    of each file is exempt: ingest compared it with the last sample of the
    previous file, which says nothing about it).
Several files
    Files are taken in ``source_file`` order (the order of the
    ``[inputs.base_station] files`` list). Where files overlap in time the
    first one is kept: a sample of a later file is dropped when it lies in
    the span covered by an earlier file (between two of its samples at most
    ``max_gap_s`` apart). A later file thus fills the gaps of an earlier one
    and extends it, and no sample is averaged across instruments whose
    levels may differ. After sorting, a time that still occurs twice keeps
    its first sample. Different sample rates need nothing special.
Smoothing (optional)
    A centred running mean of width ``smoothing_s``, taken as the average
    of the linear interpolant over the window (clipped to the run), so that
    irregular sampling is weighted by time, not by sample count. Its gain
    for a sinusoid of period ``P`` is ``sin(pi W / P) / (pi W / P)``, zero
    at ``P = W`` (the moving-average response, Smith 1997, ch. 15).
Rate of change
    At a time ``t`` of a run spanning ``[ts, te]``: the slope of the chord
    over ``[max(t - w/2, ts), min(t + w/2, te)]`` for ``w = rate_window_s``,
    in nT per minute; not measurable (NaN) when the clipped chord is shorter
    than ``w / 2`` (a run too short to measure a rate over the window).

References
----------
Smith, S. W. (1997). The Scientist and Engineer's Guide to Digital Signal
    Processing, ch. 15 (moving average filters: frequency response).
    California Technical Publishing. (From memory.)
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd
import xarray as xr

from lodeline.model import DataError, flag_mask

__all__ = [
    "BASE_DIM",
    "BaseSeries",
    "base_arrays",
    "usable_mask",
    "merge_files",
    "run_ids",
    "running_mean",
    "chord_rate",
    "bracket",
    "prepare_base",
    "gap_table",
    "curve_table",
]

BASE_DIM = "base_reading"
_NS = 1_000_000_000
_TIME_ORDER = np.uint32(flag_mask("time_duplicate", "time_backwards"))


@dataclass
class BaseSeries:
    """The cleaned base-station series, ready to interpolate.

    Attributes
    ----------
    t0_ns : int
        Reference time, ns since 1970-01-01 UTC (the first sample used).
    t_s : ndarray of float
        Sample times, s after ``t0_ns``, strictly increasing, with the base
        clock offset applied.
    value : ndarray of float
        Base-station field, nT (smoothed when asked).
    run : ndarray of int
        Run number of each sample (runs are separated by gaps longer than
        ``max_gap_s``).
    rate : ndarray of float
        Rate of change at each sample, nT/min (NaN where not measurable).
    datum_nT : float
        The datum subtracted from the base field, nT.
    counts : dict
        Samples read and left out, by reason, and used.
    """

    t0_ns: int
    t_s: np.ndarray
    value: np.ndarray
    run: np.ndarray
    rate: np.ndarray
    datum_nT: float
    counts: dict = field(default_factory=dict)

    @property
    def run_start(self) -> np.ndarray:
        """Index of the first sample of each run."""
        return np.flatnonzero(np.diff(self.run, prepend=-1) != 0)

    @property
    def run_stop(self) -> np.ndarray:
        """Index after the last sample of each run."""
        return np.append(self.run_start[1:], self.run.size)


def base_arrays(base: xr.Dataset) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Load the base-station dataset into numpy arrays (it is small).

    Parameters
    ----------
    base : xarray.Dataset
        Along ``base_reading``: coordinate ``time`` (UTC), ``total_field``
        (nT), and optionally ``flags`` (uint32) and ``source_file``.

    Returns
    -------
    time_ns, field_nT, flags, source_file : ndarray
        int64 ns since the epoch (NaT as int64 minimum), float64 nT, uint32,
        int64.

    Raises
    ------
    lodeline.model.DataError
        When a needed variable is missing or the field is not in nT.
    """
    for name in ("time", "total_field"):
        if name not in base.variables:
            raise DataError(f"base_station dataset has no {name!r} variable: rerun the ingest stage")
    units = base["total_field"].attrs.get("units", "nT")
    if units != "nT":
        raise DataError(f"base_station total_field is in {units!r}, expected 'nT': check the ingest stage")
    if base["time"].dtype.kind != "M":
        raise DataError(f"base_station time has dtype {base['time'].dtype}, expected datetime64: rerun the ingest stage")
    n = base.sizes.get(BASE_DIM, base["time"].size)
    time_ns = np.asarray(base["time"].values).astype("datetime64[ns]").view(np.int64)
    field_nT = np.asarray(base["total_field"].values, dtype=np.float64)
    flags = np.asarray(base["flags"].values, dtype=np.uint32) if "flags" in base.variables else np.zeros(n, np.uint32)
    files = np.asarray(base["source_file"].values, dtype=np.int64) if "source_file" in base.variables else np.zeros(n, np.int64)
    return time_ns, field_nT, flags, files


def usable_mask(time_ns: np.ndarray, field_nT: np.ndarray, flags: np.ndarray, source_file: np.ndarray) -> tuple[np.ndarray, dict]:
    """Samples usable for interpolation, and how many were left out and why.

    The time-order flags of the first sample of each file (in storage order)
    are ignored: ingest compared that sample with the previous file's last.

    Returns
    -------
    keep : ndarray of bool
    counts : dict
        ``nan_field``, ``time_order`` (flagged duplicate/backwards) and
        ``no_time`` (NaT), samples left out.
    """
    n = time_ns.size
    first_of_file = np.ones(n, dtype=bool)
    first_of_file[1:] = source_file[1:] != source_file[:-1]
    no_time = time_ns == np.iinfo(np.int64).min
    nan_field = ~np.isfinite(field_nT)
    time_order = ((flags & _TIME_ORDER) != 0) & ~first_of_file
    keep = ~(no_time | nan_field | time_order)
    counts = {
        "no_time": int(no_time.sum()),
        "nan_field": int((nan_field & ~no_time).sum()),
        "time_order": int((time_order & ~nan_field & ~no_time).sum()),
    }
    return keep, counts


def merge_files(time_ns: np.ndarray, value: np.ndarray, source_file: np.ndarray, max_gap_ns: int) -> tuple[np.ndarray, np.ndarray, dict]:
    """One strictly increasing series from several files, the first file preferred.

    Parameters
    ----------
    time_ns : ndarray of int64
        Sample times, ns (usable samples only).
    value : ndarray of float
        Field, nT.
    source_file : ndarray of int
        File index of each sample; a smaller index is preferred.
    max_gap_ns : int
        Spacing up to which two samples of a file cover the time between them.

    Returns
    -------
    time_ns, value : ndarray
        Sorted, strictly increasing times and their values.
    counts : dict
        ``overlap`` (samples of later files inside earlier files' coverage)
        and ``duplicate_time`` (repeated times dropped after sorting).
    """
    keep = np.ones(time_ns.size, dtype=bool)
    cover_start = np.zeros(0, dtype=np.int64)
    cover_stop = np.zeros(0, dtype=np.int64)
    for f in np.unique(source_file):
        mine = np.flatnonzero(source_file == f)
        t = time_ns[mine]
        if cover_start.size:
            k = np.searchsorted(cover_start, t, side="right") - 1
            inside = (k >= 0) & (t <= cover_stop[np.clip(k, 0, None)])
            keep[mine[inside]] = False
            t = t[~inside]
        t = np.sort(t)
        if t.size:
            brk = np.flatnonzero(np.diff(t) > max_gap_ns)
            starts = np.concatenate([t[:1], t[brk + 1]])
            stops = np.concatenate([t[brk], t[-1:]])
            cover_start, cover_stop = _union(np.concatenate([cover_start, starts]), np.concatenate([cover_stop, stops]))
    overlap = int((~keep).sum())
    t, v, f = time_ns[keep], value[keep], source_file[keep]
    order = np.lexsort((np.arange(t.size), f, t))
    t, v = t[order], v[order]
    first = np.ones(t.size, dtype=bool)
    first[1:] = t[1:] != t[:-1]
    return t[first], v[first], {"overlap": overlap, "duplicate_time": int((~first).sum())}


def _union(starts: np.ndarray, stops: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Union of closed intervals, as sorted disjoint intervals."""
    order = np.argsort(starts, kind="stable")
    starts, stops = starts[order], stops[order]
    reach = np.maximum.accumulate(stops)
    new = np.ones(starts.size, dtype=bool)
    new[1:] = starts[1:] > reach[:-1]
    idx = np.flatnonzero(new)
    ends = np.append(idx[1:], starts.size) - 1
    return starts[idx], reach[ends]


def run_ids(t_s: np.ndarray, max_gap_s: float) -> np.ndarray:
    """Run number of each sample: a new run starts after a spacing above ``max_gap_s``."""
    if t_s.size == 0:
        return np.zeros(0, dtype=np.int64)
    return np.concatenate([[0], np.cumsum(np.diff(t_s) > max_gap_s)]).astype(np.int64)


def _run_bounds(t_s: np.ndarray, run: np.ndarray, at_run: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """First and last sample time of the runs ``at_run``."""
    start = np.flatnonzero(np.diff(run, prepend=-1) != 0)
    stop = np.append(start[1:], run.size) - 1
    return t_s[start][at_run], t_s[stop][at_run]


def _integral(x: np.ndarray, t: np.ndarray, v: np.ndarray, cum: np.ndarray) -> np.ndarray:
    """Integral of the linear interpolant of (t, v) from t[0] to x (x inside [t[0], t[-1]])."""
    k = np.clip(np.searchsorted(t, x, side="right") - 1, 0, max(t.size - 2, 0))
    vx = np.interp(x, t, v)
    return cum[k] + (x - t[k]) * (v[k] + vx) / 2.0


def running_mean(t_s: np.ndarray, value: np.ndarray, run: np.ndarray, width_s: float) -> np.ndarray:
    """Centred running mean of the linear interpolant over ``width_s``, within each run.

    Parameters
    ----------
    t_s : ndarray of float
        Strictly increasing times, s.
    value : ndarray of float
        Values, nT.
    run : ndarray of int
        Run number of each sample (see :func:`run_ids`).
    width_s : float
        Window width, s; 0 returns ``value`` unchanged.

    Returns
    -------
    ndarray of float
        The mean of the interpolant over ``[t - width/2, t + width/2]``
        clipped to the sample's run, nT (the sample itself for a run of one).
    """
    if width_s <= 0 or t_s.size < 2:
        return value.copy()
    ref = float(np.median(value))
    v = value - ref
    cum = np.concatenate([[0.0], np.cumsum(np.diff(t_s) * (v[1:] + v[:-1]) / 2.0)])
    ts, te = _run_bounds(t_s, run, run)
    a = np.maximum(t_s - width_s / 2.0, ts)
    b = np.minimum(t_s + width_s / 2.0, te)
    span = b - a
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = (_integral(b, t_s, v, cum) - _integral(a, t_s, v, cum)) / span
    return np.where(span > 0, mean, v) + ref


def chord_rate(x_s: np.ndarray, x_run: np.ndarray, t_s: np.ndarray, value: np.ndarray, run: np.ndarray, window_s: float) -> np.ndarray:
    """Rate of change over a chord of ``window_s`` centred on each time, nT/min.

    Parameters
    ----------
    x_s : ndarray of float
        Times at which the rate is wanted, s (each inside run ``x_run``).
    x_run : ndarray of int
        Run of each time.
    t_s, value, run : ndarray
        The base series (see :class:`BaseSeries`).
    window_s : float
        Chord length, s.

    Returns
    -------
    ndarray of float
        ``(B(b) - B(a)) / (b - a) * 60`` with ``[a, b]`` the chord clipped to
        the run; NaN when the clipped chord is shorter than ``window_s / 2``.
    """
    if x_s.size == 0:
        return np.zeros(0)
    ts, te = _run_bounds(t_s, run, x_run)
    a = np.maximum(x_s - window_s / 2.0, ts)
    b = np.minimum(x_s + window_s / 2.0, te)
    span = b - a
    with np.errstate(invalid="ignore", divide="ignore"):
        rate = (np.interp(b, t_s, value) - np.interp(a, t_s, value)) / span * 60.0
    return np.where(span >= window_s / 2.0, rate, np.nan)


def bracket(x_s: np.ndarray, t_s: np.ndarray, run: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The base samples on either side of each time, and whether they bridge it.

    Parameters
    ----------
    x_s : ndarray of float
        Times, s after the series reference (may be NaN).
    t_s, run : ndarray
        Base sample times and run numbers.

    Returns
    -------
    ok : ndarray of bool
        True when ``x`` lies inside the record and its two neighbouring
        samples (the last at or before, the first at or after it) belong to
        the same run, i.e. are at most ``max_gap_s`` apart.
    left, right : ndarray of int
        Indices of those samples (clipped into range where not ``ok``).
    """
    n = t_s.size
    if n == 0:
        z = np.zeros(x_s.size, dtype=np.int64)
        return np.zeros(x_s.size, dtype=bool), z, z
    left = np.clip(np.searchsorted(t_s, x_s, side="right") - 1, 0, n - 1)
    right = np.clip(np.searchsorted(t_s, x_s, side="left"), 0, n - 1)
    inside = (x_s >= t_s[0]) & (x_s <= t_s[-1])
    ok = inside & (run[left] == run[right])
    return ok, left, right


def prepare_base(base: xr.Dataset, settings: dict) -> BaseSeries:
    """Clean, merge, smooth and measure the rate of the base-station series.

    Parameters
    ----------
    base : xarray.Dataset
        The ingest stage's ``base_station`` dataset.
    settings : dict
        The validated ``[diurnal]`` table.

    Returns
    -------
    BaseSeries

    Raises
    ------
    lodeline.model.DataError
        When no base-station sample is usable.
    """
    time_ns, field_nT, flags, files = base_arrays(base)
    keep, counts = usable_mask(time_ns, field_nT, flags, files)
    counts = {"read": int(time_ns.size), **counts}
    offset_ns = int(round(settings["time_offset_s"] * _NS))
    max_gap_ns = int(round(settings["max_gap_s"] * _NS))
    t, v, merged = merge_files(time_ns[keep] + offset_ns, field_nT[keep], files[keep], max_gap_ns)
    counts.update(merged)
    counts["used"] = int(t.size)
    if t.size == 0:
        names = ", ".join(str(s) for s in base.attrs.get("source_files", [])) or "the base-station files"
        raise DataError(
            f"{names}: no usable base-station reading (all NaN, without time or flagged time_duplicate/"
            "time_backwards): check the files, or remove [inputs.base_station] to run without the diurnal correction"
        )
    t0 = int(t[0])
    t_s = (t - t0) / _NS
    run = run_ids(t_s, settings["max_gap_s"])
    value = running_mean(t_s, v, run, settings["smoothing_s"])
    rate = chord_rate(t_s, run, t_s, value, run, settings["rate_window_s"])
    datum = float(np.median(value)) if settings["datum"] == "median" else float(settings["datum_nT"])
    return BaseSeries(t0_ns=t0, t_s=t_s, value=value, run=run, rate=rate, datum_nT=datum, counts=counts)


def _utc(base: BaseSeries, seconds: np.ndarray) -> np.ndarray:
    """Times in s after the reference as datetime64[ns]."""
    return (base.t0_ns + np.round(np.asarray(seconds) * _NS).astype(np.int64)).view("datetime64[ns]")


def gap_table(base: BaseSeries) -> pd.DataFrame:
    """One row per gap between runs: ``last_sample_before`` and ``first_sample_after`` (UTC), ``length_s``."""
    start = base.run_start
    stop = base.run_stop - 1
    before = base.t_s[stop[:-1]]
    after = base.t_s[start[1:]]
    return pd.DataFrame(
        {
            "last_sample_before": _utc(base, before),
            "first_sample_after": _utc(base, after),
            "length_s": after - before,
        }
    )


def curve_table(base: BaseSeries, step_s: float, rate_limit: float, rate_window_s: float) -> pd.DataFrame:
    """The base-station variation on a regular time grid, for plotting.

    Columns: ``time`` (UTC), ``base_nT`` (the series used), ``variation_nT``
    (base minus datum), ``rate_nT_per_min``, ``too_fast`` (rate above the
    limit) and ``in_gap`` (no correction possible); values NaN in gaps.
    """
    start = np.ceil(base.t_s[0] / step_s) * step_s
    grid = np.arange(start, base.t_s[-1] + step_s * 1e-9, step_s)
    ok, left, _ = bracket(grid, base.t_s, base.run)
    value = np.where(ok, np.interp(grid, base.t_s, base.value), np.nan)
    rate = np.full(grid.size, np.nan)
    rate[ok] = chord_rate(grid[ok], base.run[left[ok]], base.t_s, base.value, base.run, rate_window_s)
    with np.errstate(invalid="ignore"):
        fast = np.abs(rate) > rate_limit
    return pd.DataFrame(
        {
            "time": _utc(base, grid),
            "base_nT": value,
            "variation_nT": value - base.datum_nT,
            "rate_nT_per_min": rate,
            "too_fast": fast,
            "in_gap": ~ok,
        }
    )

