"""Spike, dropout and time-gap flags on raw total-field readings.

Each segment (one line of one sensor, in time order) is checked on its own,
block by block over the segment-aligned dask chunks, and three kinds of
fault are flagged. Nothing is deleted and ``total_field`` is never changed:
the bits ``spike``, ``dropout`` and ``gap_before`` are OR-ed into ``flags``.

Dropouts
    A reading whose total field is NaN, and every reading of a run of at
    least ``stuck_samples`` identical consecutive values (a stuck sensor
    repeating its last value).

Time gaps
    A reading whose time step to the previous reading of its segment exceeds
    ``max(gap_factor * median step of the segment, gap_min_s)`` gets
    ``gap_before``.

Spikes
    Worked on the valid readings of each gap-free run of a segment
    (dropouts are left out, time gaps split the run), in three steps.

    1. *Candidates* from the fourth-difference residual: the departure of a
       reading from the cubic through its four nearest neighbours (two on
       each side; at the run ends, the four on the open side). The fourth
       difference of a cubic is zero (Hildebrand 1974), so this residual is
       ``D4 / c`` where ``D4 = x[s] - 4 x[s+1] + 6 x[s+2] - 4 x[s+3] + x[s+4]``
       is the fourth difference of the five readings starting at ``s`` and
       ``c`` the coefficient of the reading in it (6 in the middle, -4 next
       to it, 1 at the ends). A smooth anomaly is nearly a cubic over five
       samples, so it gives almost nothing; a spike gives its full size,
       but it also leaks into its neighbours (-2/3 and 1/6 of it), and the
       two readings of a two-sample spike get only 1/3 of it against 1/2
       for their neighbours. So the readings next to every candidate are
       taken in as candidates too.
    2. *Confirmation* against the Lagrange cubic through the nearest clean
       readings, two on each side where possible (Hildebrand 1974), in up
       to three passes. Pass 1 bridges over all candidates: a clean reading
       then departs only by the small bias of the bridge, a spike by its
       size, and the candidates departing by at least half the most within
       three readings are "strong". Pass 2 bridges over the strong ones
       only, so a clean neighbour of a spike is judged against its own
       close neighbours and a spike against the clean readings next to it.
       Pass 3 judges again, bridging over everything found so far, the
       readings found in pass 2 that were not strong (a small spike next to
       a large one is not strong, so in pass 2 it was a node and could make
       a clean reading look like a spike); it can only clear readings. A
       candidate with no clean reading on one side (at a run end, where a
       one-sided extrapolation would be too noisy) is judged by the running
       median of step 3 alone.
    3. *Veto for level steps*: a reading next to a level step departs from
       a cubic bridged across the step, but it agrees with its own side. A
       confirmed reading is dropped when it agrees both with the cubic
       extrapolated from one side (the fourth difference of the five
       readings ending or starting at it) and with the detrended running
       median: the median of the ``window_samples`` readings centred on it
       (truncated at the run ends) after removing a local straight line
       whose slope is the median of the successive differences in the
       window (a restriction of Sen's 1968 median-of-slopes estimator to
       successive pairs). The median ranks readings, so a step does not
       move it, and removing the slope keeps a spike on a steep flank
       visible; near the curved peak of an anomaly it is biased by several
       nT, which is why it only vetoes together with the one-sided test.

    Every limit is ``max(threshold_nT, noise_multiple * sigma)``. For the
    fourth-difference and running-median residuals sigma is their robust
    scale over the whole segment, ``1.4826 * MAD`` (median absolute
    deviation about the median), for the fourth difference scaled at the
    run ends by the larger noise of the one-sided stencils (1.5 next to an
    end, 6 at the end: the ratio of the stencil coefficients). For the
    bridged and one-sided cubics sigma is the noise of one reading (the
    fourth-difference sigma times 6 / sqrt(70), white noise) times
    ``sqrt(1 + sum(w**2))`` for the cubic's weights ``w`` (sqrt(70) for
    the one-sided cubic). This is the Hampel identifier (Hampel 1974;
    named by Davies & Gather 1993; moving-window form as in Pearson 2002)
    applied to local residuals.

Why the defaults are what they are
----------------------------------
``noise_multiple = 6``
    For Gaussian noise the chance of a residual beyond 6 sigma is about
    2e-9 per reading (two-sided tail, Abramowitz & Stegun 1964, ch. 26), so
    a million-reading survey expects no false spike from noise alone; the
    1.4826 factor makes the MAD a consistent estimate of sigma for Gaussian
    noise and it has the largest possible breakdown point, 50 % (Rousseeuw
    & Croux 1993), so spikes and anomalies do not inflate it.
``threshold_nT = 1.0``
    A floor below which a departure is not worth flagging in a survey
    whose targets are tens of nT or more, and a guard for quantised or very
    quiet data where the MAD can be zero. With 0.05 nT noise the 6-sigma
    limits are about 0.4 nT (2.5 nT for the one-sided cubics of the step
    veto), so the floor decides: a 20 nT one-sample spike departs by about
    20 nT in every test and is flagged.
    A compact target anomaly of 200 nT peak and a half-width of 10 samples
    (for example a point dipole 4 m below the sensor, sampled every 0.2 m)
    gives a fourth-difference residual of about 0.03 nT at its peak, well
    under the floor; that residual grows as amplitude / half-width**4, so the
    floor is reached only by anomalies sharper than about 6 samples of
    half-width at 1000 nT, or 10 samples at several thousand nT.
``window_samples = 9``
    The smallest odd window whose truncated half at a run end (5 readings)
    still has a majority of clean readings when a two-sample spike sits at
    the end, so spikes at segment starts are handled (that is where the
    running median decides alone); wider windows cost time and, near
    anomalies, add curvature bias.
``stuck_samples = 10``
    With a reading resolution of 0.001 nT and 0.05 nT noise two consecutive
    readings are equal about once in 180, so ten equal readings in a row
    (nine equal steps) happen by chance about once in 10**20 readings; for a
    coarse 0.01 nT resolution on 0.02 nT noise it is still about 2e-8. A
    stuck sensor repeats its value for seconds, i.e. tens of readings at
    5-10 Hz. (Common practice, no published source.)
``gap_factor = 3`` and ``gap_min_s = 0.5``
    Timestamp jitter and one or two missed readings stay below three times
    the median step; the floor of 0.5 s keeps a high-rate sensor from
    reporting every few missed readings as a gap. (Common practice, no
    published source.)

Limits
    Runs of fewer than five valid readings are not tested for spikes. The
    medians tolerate up to (window_samples - 1) / 2 - 1 faulty readings in
    a window, so a burst of spikes denser than that is only partly flagged.
    The noise scalings assume white noise between neighbouring readings. A
    two-sample spike must exceed about three times ``threshold_nT`` to be
    seen. Our own synthetic trials (not a published benchmark): at 0.05 nT
    noise, spikes of 5-500 nT, single, in pairs or one to three readings
    apart, in quiet field, on a slow trend, next to a level step or on and
    around the anomaly of the design case (200 nT, 10 samples of
    half-width) were all flagged and no other reading was; spikes of about
    3 nT on the curved part of that anomaly are sometimes missed. On
    anomalies much larger or sharper (1000 nT or more at 6-8 samples of
    half-width) a spike near the peak may also take clean neighbours, as a
    cubic no longer predicts the field within 1 nT there, and above about
    3000 nT at 6 samples the peak itself is flagged: raise ``threshold_nT``
    for such surveys.

References
----------
Abramowitz, M. & Stegun, I. A. (1964). Handbook of Mathematical Functions,
    ch. 26 (normal probability). National Bureau of Standards. (From memory.)
Davies, L. & Gather, U. (1993). The identification of multiple outliers.
    Journal of the American Statistical Association 88(423), 782-792.
Hampel, F. R. (1974). The influence curve and its role in robust
    estimation. Journal of the American Statistical Association 69(346),
    383-393.
Hildebrand, F. B. (1974). Introduction to Numerical Analysis, 2nd ed.
    McGraw-Hill: Lagrange interpolation, and finite differences (the k-th
    difference of a polynomial of degree below k is zero). (From memory;
    chapter numbers not checked.)
Pearson, R. K. (2002). Outliers in process modeling and identification.
    IEEE Transactions on Control Systems Technology 10(1), 55-63.
    (From memory.)
Rousseeuw, P. J. & Croux, C. (1993). Alternatives to the median absolute
    deviation. Journal of the American Statistical Association 88(424),
    1273-1283.
Sen, P. K. (1968). Estimates of the regression coefficient based on
    Kendall's tau. Journal of the American Statistical Association 63(324),
    1379-1389.
"""

from __future__ import annotations

import dask
import dask.array as da
import numpy as np
import pandas as pd
import xarray as xr

from lodeline.model import (
    READING_DIM,
    Stage,
    StageContext,
    StageResult,
    flag_mask,
    validate_readings,
)
from lodeline.params import Param, ParameterError, validate_table

from ._blocks import as_dask, block_of_segment, block_starts, reading_chunks, segment_ids

__all__ = [
    "PARAMS",
    "STAGE",
    "run",
    "MAD_TO_SIGMA",
    "nan_median_rows",
    "robust_sigma",
    "stuck_mask",
    "gap_mask",
    "run_bounds",
    "fourth_difference_residual",
    "running_median_residual",
    "bridge_residual",
    "one_sided_residual",
    "block_flags",
    "block_stats",
]

#: Consistency factor of the MAD for Gaussian noise (Rousseeuw & Croux 1993).
MAD_TO_SIGMA = 1.4826

#: Coefficients of the fourth difference of five equally spaced readings.
_D4 = np.array([1.0, -4.0, 6.0, -4.0, 1.0])

#: Noise of the interior fourth-difference residual per unit reading noise,
#: sqrt(1 + 16 + 36 + 16 + 1) / 6 (white noise).
_D4_NOISE = np.sqrt(np.sum(_D4**2)) / 6.0

_SPIKE = np.uint32(flag_mask("spike"))
_DROPOUT = np.uint32(flag_mask("dropout"))
_GAP = np.uint32(flag_mask("gap_before"))

#: Rows of the per-segment statistics returned by :func:`block_stats`.
_STATS = (
    "readings",
    "spikes",
    "dropouts",
    "no_value",
    "stuck",
    "gaps",
    "gap_time_s",
    "longest_gap_s",
    "noise_nT",
)

#: Readings handled at once by the running-median gather (bounds memory to a
#: few tens of MB per worker whatever the chunk size).
_SLICE = 1 << 16

PARAMS = (
    Param(
        "threshold_nT",
        1.0,
        "Smallest departure from the neighbouring readings flagged as a spike, nT.",
        kind=float,
        minimum=0.0,
        exclusive_minimum=True,
        maximum=1.0e6,
    ),
    Param(
        "noise_multiple",
        6.0,
        "A spike must also depart by more than this many robust noise sigmas (1.4826 MAD) of its segment.",
        kind=float,
        minimum=1.0,
        maximum=1.0e3,
    ),
    Param(
        "window_samples",
        9,
        "Length of the running-median window, readings (odd).",
        kind=int,
        minimum=5,
        maximum=201,
    ),
    Param(
        "stuck_samples",
        10,
        "A run of at least this many identical consecutive values is a dropout (stuck sensor), readings.",
        kind=int,
        minimum=3,
        maximum=1_000_000,
    ),
    Param(
        "gap_factor",
        3.0,
        "A time step longer than this multiple of the segment's median step is a gap (see also gap_min_s).",
        kind=float,
        minimum=1.0,
        exclusive_minimum=True,
        maximum=1.0e6,
    ),
    Param(
        "gap_min_s",
        0.5,
        "A time step must also be longer than this to be a gap, s.",
        kind=float,
        minimum=0.0,
        maximum=1.0e6,
    ),
)


# --------------------------------------------------------------------------
# Stage entry point
# --------------------------------------------------------------------------


def run(data: dict, params: dict, context: StageContext) -> StageResult:
    """Flag spikes, dropouts and time gaps of every segment.

    Parameters
    ----------
    data : dict
        ``data["ingest"]`` holds ``"readings"`` (dask-backed readings
        dataset, chunk boundaries on segment boundaries) and ``"segments"``.
    params : dict
        The ``[spikes]`` table (see :data:`PARAMS`); validated again here.
    context : lodeline.model.StageContext
        Run context; ``context.log`` gets one line per survey line.

    Returns
    -------
    lodeline.model.StageResult
        ``datasets``: ``"readings"`` (a new dataset, flags OR-ed, lazy) and
        ``"segments"`` (unchanged). ``tables``: ``"spikes_by_line"`` (one
        row per line and sensor) and ``"gaps"`` (one row per flagged gap).
        ``summary``: totals. Nothing is rejected.
    """
    settings = check_params(params)
    upstream = data["ingest"]
    readings, segments = upstream["readings"], upstream["segments"]
    validate_readings(readings, segments, where="spikes")

    chunks = reading_chunks(readings, segments, context.chunk_readings)
    field = as_dask(readings["total_field"], chunks)
    time = as_dask(readings["time"], chunks)
    flags = as_dask(readings["flags"], chunks)
    starts = block_starts(segments, chunks)

    new_flags = da.map_blocks(
        block_flags, field, time, flags, starts, dtype=np.uint32, chunks=chunks, **settings
    )
    counts = np.bincount(block_of_segment(segments, chunks), minlength=len(chunks[0]))
    stats = da.map_blocks(
        block_stats,
        field,
        time,
        new_flags,
        starts,
        stuck_samples=settings["stuck_samples"],
        dtype=np.float64,
        chunks=(tuple(int(c) * len(_STATS) for c in counts),),
    )
    gap_at = da.flatnonzero((new_flags & _GAP) != 0)
    stats, gap_at = dask.compute(stats, gap_at)

    out = readings.assign(flags=readings["flags"].copy(data=new_flags))
    table = _line_table(readings, segments, stats.reshape(-1, len(_STATS)))
    gaps = _gap_table(readings, np.asarray(gap_at, dtype=np.int64))
    _log_lines(context, table)
    return StageResult(
        datasets={"readings": out, "segments": segments},
        tables={"spikes_by_line": table, "gaps": gaps},
        summary=_summary(table, gaps),
        rejected={},
    )


def check_params(params: dict | None) -> dict:
    """Validate the ``[spikes]`` table, including what :class:`Param` cannot say.

    Raises
    ------
    lodeline.params.ParameterError
        On an unknown key, a wrong type, a value out of range or an even
        ``window_samples``.
    """
    settings = validate_table(PARAMS, params, "spikes")
    if settings["window_samples"] % 2 == 0:
        raise ParameterError(
            f"spikes.window_samples = {settings['window_samples']} must be odd "
            "(the window is centred on the reading)"
        )
    return settings


STAGE = Stage(
    name="spikes",
    run=run,
    params=PARAMS,
    after=("ingest",),
    order=10,
    summary="Flag spikes, dropouts and time gaps",
)


# --------------------------------------------------------------------------
# Block functions (one dask block = whole segments)
# --------------------------------------------------------------------------


def block_flags(
    field: np.ndarray,
    time: np.ndarray,
    flags: np.ndarray,
    starts: np.ndarray,
    *,
    threshold_nT: float,
    noise_multiple: float,
    window_samples: int,
    stuck_samples: int,
    gap_factor: float,
    gap_min_s: float,
) -> np.ndarray:
    """Flags of one block of whole segments, with the new bits OR-ed in.

    Parameters
    ----------
    field : ndarray of float
        Total field, nT; NaN is a dropout.
    time : ndarray of datetime64[ns]
        Reading times.
    flags : ndarray of uint32
        Existing flags (kept).
    starts : ndarray of int
        Start of each segment in the block, relative to the block (first 0).
    threshold_nT, noise_multiple, window_samples, stuck_samples, gap_factor, gap_min_s
        See :data:`PARAMS`.

    Returns
    -------
    ndarray of uint32
        ``flags`` with ``dropout``, ``gap_before`` and ``spike`` added.
    """
    x = np.asarray(field, dtype=np.float64)
    n = x.size
    out = np.array(flags, dtype=np.uint32, copy=True)
    if n == 0:
        return out
    seg_id = segment_ids(starts, n, stage="spikes")

    dropout = ~np.isfinite(x) | stuck_mask(x, seg_id, stuck_samples)
    out[dropout] |= _DROPOUT
    out[gap_mask(time, seg_id, gap_factor, gap_min_s)] |= _GAP

    keep = (out & _DROPOUT) == 0
    where = np.flatnonzero(keep)
    spike = _spikes(
        x[where], seg_id[where], (out & _GAP) != 0, where, threshold_nT, noise_multiple, window_samples
    )
    out[where[spike]] |= _SPIKE
    return out


def block_stats(
    field: np.ndarray,
    time: np.ndarray,
    flags: np.ndarray,
    starts: np.ndarray,
    *,
    stuck_samples: int,
) -> np.ndarray:
    """Per-segment counts of one block, flattened (segment-major, see ``_STATS``).

    Parameters
    ----------
    field : ndarray of float
        Total field, nT.
    time : ndarray of datetime64[ns]
        Reading times.
    flags : ndarray of uint32
        Flags after this stage.
    starts : ndarray of int
        Segment starts relative to the block.
    stuck_samples : int
        As in :data:`PARAMS` (to count stuck readings apart from NaN).

    Returns
    -------
    ndarray of float64
        For each segment: readings, spikes, dropouts, no-value readings,
        stuck readings, gaps, total gap time (s), longest gap (s) and the
        robust per-reading noise from the fourth difference (nT, NaN when
        not measurable).
    """
    x = np.asarray(field, dtype=np.float64)
    flags = np.asarray(flags, dtype=np.uint32)
    n, nseg = x.size, len(starts)
    if nseg == 0:
        return np.zeros(0)
    starts = np.asarray(starts, dtype=np.int64)
    seg_id = segment_ids(starts, n, stage="spikes")
    is_gap = (flags & _GAP) != 0
    step_s = np.zeros(n)
    step_s[1:] = np.diff(np.asarray(time).astype("datetime64[ns]").astype(np.int64)) / 1e9
    gap_s = np.where(is_gap, step_s, 0.0)

    def per_segment(values):
        return np.add.reduceat(values.astype(np.float64), starts) if n else np.zeros(nseg)

    table = np.zeros((nseg, len(_STATS)))
    table[:, 0] = np.diff(np.append(starts, n))
    table[:, 1] = per_segment((flags & _SPIKE) != 0)
    table[:, 2] = per_segment((flags & _DROPOUT) != 0)
    table[:, 3] = per_segment(~np.isfinite(x))
    table[:, 4] = per_segment(stuck_mask(x, seg_id, stuck_samples))
    table[:, 5] = per_segment(is_gap)
    table[:, 6] = per_segment(gap_s)
    table[:, 7] = np.maximum.reduceat(gap_s, starts)
    table[:, 8] = _segment_noise(x, seg_id, flags, nseg)
    return table.ravel()


def _segment_noise(x: np.ndarray, seg_id: np.ndarray, flags: np.ndarray, nseg: int) -> np.ndarray:
    """Robust per-reading noise of each segment from the fourth difference, nT."""
    where = np.flatnonzero((flags & _DROPOUT) == 0)
    start, stop = run_bounds(seg_id[where], (flags & _GAP) != 0, where)
    r4, gain = fourth_difference_residual(x[where], start, stop)
    sigma = robust_sigma(r4 / gain, seg_id[where], nseg)
    return sigma / _D4_NOISE


# --------------------------------------------------------------------------
# Numerical kernels (plain numpy, vectorised; no loop over readings)
# --------------------------------------------------------------------------


def stuck_mask(x: np.ndarray, seg_id: np.ndarray, stuck_samples: int) -> np.ndarray:
    """Readings in runs of at least ``stuck_samples`` identical consecutive values.

    Parameters
    ----------
    x : ndarray of float
        Total field, nT (NaN never equals anything, so NaN runs are not
        counted here; they are dropouts anyway).
    seg_id : ndarray of int
        Segment of each reading; runs never cross segments.
    stuck_samples : int
        Shortest run flagged, readings.

    Returns
    -------
    ndarray of bool
    """
    n = x.size
    if n == 0:
        return np.zeros(0, dtype=bool)
    same = np.zeros(n, dtype=bool)
    same[1:] = (x[1:] == x[:-1]) & (seg_id[1:] == seg_id[:-1])
    run_id = np.cumsum(~same) - 1
    return np.bincount(run_id)[run_id] >= stuck_samples


def gap_mask(time: np.ndarray, seg_id: np.ndarray, gap_factor: float, gap_min_s: float) -> np.ndarray:
    """Readings preceded by a time gap within their segment.

    Parameters
    ----------
    time : ndarray of datetime64
        Reading times (NaT never makes a gap).
    seg_id : ndarray of int
        Segment of each reading (segments are contiguous).
    gap_factor : float
        Multiple of the segment's median positive time step.
    gap_min_s : float
        Smallest gap, s.

    Returns
    -------
    ndarray of bool
        True on the first reading after each gap.
    """
    t = np.asarray(time).astype("datetime64[ns]")
    n = t.size
    step = np.full(n, np.nan)
    if n < 2:
        return np.zeros(n, dtype=bool)
    ok = ~np.isnat(t[1:]) & ~np.isnat(t[:-1]) & (seg_id[1:] == seg_id[:-1])
    step[1:] = np.where(ok, np.diff(t.astype(np.int64)).astype(np.float64) / 1e9, np.nan)
    typical = np.full(int(seg_id[-1]) + 1, np.nan)
    bounds = np.flatnonzero(np.diff(seg_id)) + 1
    for s, (a, b) in enumerate(zip(np.r_[0, bounds], np.r_[bounds, n])):
        positive = step[a:b][step[a:b] > 0]
        if positive.size:
            typical[s] = np.median(positive)
    limit = np.fmax(gap_factor * typical, gap_min_s)[seg_id]
    with np.errstate(invalid="ignore"):
        return step > limit


def run_bounds(seg_id: np.ndarray, gap: np.ndarray, where: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Start and stop (exclusive) of the gap-free run of each valid reading.

    Parameters
    ----------
    seg_id : ndarray of int
        Segment of each valid reading.
    gap : ndarray of bool
        ``gap_before`` of every reading of the block (valid or not).
    where : ndarray of int
        Block index of each valid reading (increasing).

    Returns
    -------
    start, stop : ndarray of int
        For each valid reading, the positions (in the valid-reading
        sequence) of the first reading of its run and one past the last.
        A run ends at a segment end and at every time gap, including a gap
        that falls on a dropout.
    """
    m = where.size
    if m == 0:
        return np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int64)
    gaps_so_far = np.cumsum(gap)[where]
    new = np.ones(m, dtype=bool)
    new[1:] = (seg_id[1:] != seg_id[:-1]) | (gaps_so_far[1:] != gaps_so_far[:-1])
    first = np.flatnonzero(new)
    last = np.append(first[1:], m)
    run_id = np.cumsum(new) - 1
    return first[run_id], last[run_id]


def fourth_difference_residual(
    y: np.ndarray, start: np.ndarray, stop: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Departure of each reading from the cubic through its four nearest neighbours.

    Parameters
    ----------
    y : ndarray of float
        Valid readings, nT, in order.
    start, stop : ndarray of int
        Run bounds of each reading (see :func:`run_bounds`).

    Returns
    -------
    residual : ndarray of float
        ``D4 / c``, nT (see the module docstring); NaN in runs shorter than
        five readings.
    gain : ndarray of float
        Noise of the residual relative to that of an interior reading
        (1 inside, 1.5 next to a run end, 6 at a run end).
    """
    m = y.size
    residual = np.full(m, np.nan)
    gain = np.ones(m)
    testable = (stop - start) >= 5
    if not testable.any():
        return residual, gain
    p = np.flatnonzero(testable)
    first = np.clip(p - 2, start[p], stop[p] - 5)
    d4 = np.zeros(p.size)
    for k, c in enumerate(_D4):
        d4 += c * y[first + k]
    coef = _D4[p - first]
    residual[p] = d4 / coef
    gain[p] = 6.0 / np.abs(coef)
    return residual, gain


def running_median_residual(y: np.ndarray, start: np.ndarray, stop: np.ndarray, window: int) -> np.ndarray:
    """Departure of each reading from the detrended median of its window.

    Parameters
    ----------
    y : ndarray of float
        Valid readings, nT, in order.
    start, stop : ndarray of int
        Run bounds of each reading (see :func:`run_bounds`); the window is
        truncated to the run.
    window : int
        Odd window length, readings.

    Returns
    -------
    ndarray of float
        ``y - median(y[i+j] - j * slope)`` over the window offsets ``j``,
        where ``slope`` is the median of the successive differences in the
        window, nT; NaN for a reading alone in its run.
    """
    m = y.size
    half = window // 2
    offsets = np.arange(-half, half + 1)
    residual = np.full(m, np.nan)
    for a in range(0, m, _SLICE):
        p = np.arange(a, min(a + _SLICE, m))
        idx = p[:, None] + offsets
        inside = (idx >= start[p, None]) & (idx < stop[p, None])
        values = np.where(inside, y[np.clip(idx, 0, m - 1)], np.nan)
        slope = nan_median_rows(np.diff(values, axis=1))
        centre = nan_median_rows(values - offsets * slope[:, None])
        residual[p] = y[p] - centre
    return residual


def nan_median_rows(a: np.ndarray) -> np.ndarray:
    """Median of each row of a 2-D array, ignoring NaN (NaN for an all-NaN row).

    Parameters
    ----------
    a : ndarray of float, shape (n, k)

    Returns
    -------
    ndarray of float, shape (n,)
    """
    ordered = np.sort(a, axis=1)  # NaN sort last
    count = np.sum(~np.isnan(a), axis=1)
    low = np.maximum((count - 1) // 2, 0)[:, None]
    high = (count // 2)[:, None]
    median = 0.5 * (np.take_along_axis(ordered, low, 1) + np.take_along_axis(ordered, high, 1))[:, 0]
    median[count == 0] = np.nan
    return median


def robust_sigma(values: np.ndarray, seg_id: np.ndarray, nseg: int) -> np.ndarray:
    """Robust scale, 1.4826 * MAD, of the finite values of each segment.

    Parameters
    ----------
    values : ndarray of float
        Residuals, nT (NaN ignored).
    seg_id : ndarray of int
        Segment of each value (non-decreasing).
    nseg : int
        Number of segments.

    Returns
    -------
    ndarray of float, shape (nseg,)
        NaN for a segment without finite values.
    """
    sigma = np.full(nseg, np.nan)
    edges = np.searchsorted(seg_id, np.arange(nseg + 1))
    for s in range(nseg):
        v = values[edges[s] : edges[s + 1]]
        v = v[np.isfinite(v)]
        if v.size:
            sigma[s] = MAD_TO_SIGMA * np.median(np.abs(v - np.median(v)))
    return sigma


def bridge_residual(
    y: np.ndarray, at: np.ndarray, exclude: np.ndarray, start: np.ndarray, stop: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Departure of readings from the cubic through their nearest usable neighbours.

    Parameters
    ----------
    y : ndarray of float
        Valid readings, nT, in order.
    at : ndarray of int
        Positions of the readings to test (increasing).
    exclude : ndarray of bool
        Readings that may not serve as nodes (suspected spikes). The tested
        reading itself is never a node.
    start, stop : ndarray of int
        Run bounds of each reading (see :func:`run_bounds`); nodes are taken
        from the tested reading's own run only.

    Returns
    -------
    ok : ndarray of bool
        Whether each reading of ``at`` could be bridged: four nodes in its
        run, at least one on each side (two on each side where possible,
        otherwise filled from the other side). One-sided extrapolation is
        not used: it is too noisy (a cubic extrapolated two readings ahead
        has 27 times the noise of one reading).
    residual : ndarray of float
        ``y[at]`` minus the Lagrange cubic through the four nodes, nT (NaN
        where not ``ok``).
    gain : ndarray of float
        ``sqrt(1 + sum(w**2))`` for the Lagrange weights ``w``: the noise of
        the residual in units of the noise of one reading (white noise).
    """
    at = np.asarray(at, dtype=np.int64)
    residual = np.full(at.size, np.nan)
    gain = np.full(at.size, np.nan)
    good = np.flatnonzero(~exclude)
    if at.size == 0 or good.size == 0:
        return np.zeros(at.size, dtype=bool), residual, gain
    # Up to four nodes on each side, nearest first; -1 marks "none".
    left_pos = np.searchsorted(good, at, side="left")[:, None] - 1 - np.arange(4)
    right_pos = np.searchsorted(good, at, side="right")[:, None] + np.arange(4)
    last = good.size - 1
    left = np.where(left_pos >= 0, good[np.clip(left_pos, 0, last)], -1)
    right = np.where(right_pos <= last, good[np.clip(right_pos, 0, last)], -1)
    left = np.where(left >= start[at, None], left, -1)
    right = np.where((right >= 0) & (right < stop[at, None]), right, -1)
    n_left = np.sum(left >= 0, axis=1)
    n_right = np.sum(right >= 0, axis=1)
    take_left = np.minimum(n_left, np.maximum(2, 4 - n_right))
    take_right = np.minimum(n_right, 4 - take_left)
    ok = (take_left + take_right == 4) & (take_left > 0) & (take_right > 0)
    if not ok.any():
        return ok, residual, gain
    c, left, right, take_left = at[ok], left[ok], right[ok], take_left[ok, None]
    # Node j in 0..3: the take_left nearest on the left (farthest first), then the right.
    j = np.arange(4)[None, :]
    nodes = np.where(
        j < take_left,
        np.take_along_axis(left, np.clip(take_left - 1 - j, 0, 3), 1),
        np.take_along_axis(right, np.clip(j - take_left, 0, 3), 1),
    )
    offset = (nodes - c[:, None]).astype(np.float64)
    weights = np.ones_like(offset)
    for p in range(4):
        for q in range(4):
            if p != q:
                weights[:, p] *= offset[:, q] / (offset[:, q] - offset[:, p])
    residual[ok] = y[c] - np.sum(weights * y[nodes], axis=1)
    gain[ok] = np.sqrt(1.0 + np.sum(weights**2, axis=1))
    return ok, residual, gain


def _nearby_max(score: np.ndarray, at: np.ndarray, start: np.ndarray, m: int, reach: int) -> np.ndarray:
    """Largest score of the readings of ``at`` within ``reach`` readings of each, in the same run."""
    dense = np.full(m, np.nan)
    dense[at] = score
    best = dense[at].copy()
    for shift in range(1, reach + 1):
        for other in (at - shift, at + shift):
            inside = (other >= 0) & (other < m)
            idx = np.clip(other, 0, m - 1)
            same_run = inside & (start[idx] == start[at])
            best = np.where(same_run, np.fmax(best, dense[idx]), best)
    return best


def one_sided_residual(y: np.ndarray, start: np.ndarray, stop: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Departure of each reading from the cubic extrapolated from either side.

    Parameters
    ----------
    y : ndarray of float
        Valid readings, nT, in order.
    start, stop : ndarray of int
        Run bounds of each reading (see :func:`run_bounds`).

    Returns
    -------
    from_left, from_right : ndarray of float
        ``y[i]`` minus the cubic through the four readings before it (after
        it), which is the fourth difference of the five readings ending
        (starting) at ``i``, nT; NaN where the run has no four readings on
        that side. Noise: sqrt(70) times that of one reading (white noise).
    """
    m = y.size
    p = np.arange(m)
    left = np.full(m, np.nan)
    right = np.full(m, np.nan)
    ok = p - 4 >= start
    q = p[ok]
    left[q] = sum(c * y[q - 4 + k] for k, c in enumerate(_D4))
    ok = p + 4 < stop
    q = p[ok]
    right[q] = sum(c * y[q + k] for k, c in enumerate(_D4))
    return left, right


def _spikes(
    y: np.ndarray,
    seg_id: np.ndarray,
    gap: np.ndarray,
    where: np.ndarray,
    threshold_nT: float,
    noise_multiple: float,
    window: int,
) -> np.ndarray:
    """Spike test on the valid readings of a block (see the module docstring)."""
    if y.size == 0:
        return np.zeros(0, dtype=bool)
    nseg = int(seg_id[-1]) + 1
    start, stop = run_bounds(seg_id, gap, where)

    def limit(sigma):
        return np.fmax(threshold_nT, noise_multiple * sigma)

    # Step 1: departure from the local cubic (catches spikes and their leak).
    r4, gain4 = fourth_difference_residual(y, start, stop)
    sigma4 = robust_sigma(r4 / gain4, seg_id, nseg)
    with np.errstate(invalid="ignore"):
        candidate = np.abs(r4) > limit(sigma4[seg_id] * gain4)
    # The readings of a two-sample spike can have a smaller residual than
    # their neighbours (1/3 against 1/2 of the spike): take the readings next
    # to every candidate in too, within the run.
    candidate[1:] |= candidate[:-1] & (start[1:] == start[:-1])
    candidate[:-1] |= candidate[1:] & (start[1:] == start[:-1])
    at = np.flatnonzero(candidate)
    if at.size == 0:
        return candidate
    sigma_one = sigma4[seg_id[at]] / _D4_NOISE  # noise of one reading, nT

    # Step 3 (computed first, used below): the detrended running median and
    # the one-sided cubics veto readings that agree with their neighbours on
    # one side (level steps).
    rm = running_median_residual(y, start, stop, window)
    sigma_m = robust_sigma(rm, seg_id, nseg)
    from_left, from_right = one_sided_residual(y, start, stop)
    with np.errstate(invalid="ignore"):
        median_says_no = np.abs(rm[at]) <= limit(sigma_m[seg_id[at]])
        one_side = np.fmin(np.abs(from_left[at]), np.abs(from_right[at]))
        side_agrees = one_side <= limit(sigma_one * np.sqrt(np.sum(_D4**2)))
    veto = median_says_no & side_agrees

    # Step 2, pass 1: bridge every candidate over all candidates. A clean
    # reading then departs only by the (small) bias of the bridge, a spike
    # by its size; those departing by at least half the most within three
    # readings (the reach of a spike's leak into the fourth difference, plus
    # the readings taken in next to it) are "strong".
    ok, residual, gain = bridge_residual(y, at, candidate, start, stop)
    with np.errstate(invalid="ignore"):
        score = np.abs(residual) / limit(sigma_one * gain)
    best = _nearby_max(score, at, start, y.size, reach=3)
    with np.errstate(invalid="ignore"):
        strong = ~ok | ((score > 1.0) & (score >= 0.5 * best))

    # Pass 2: bridge every candidate over the strong ones only, so that a
    # clean neighbour of a spike is judged against its own close neighbours
    # and a spike against the clean readings next to it.
    avoid = np.zeros(y.size, dtype=bool)
    avoid[at[strong]] = True
    ok, residual, gain = bridge_residual(y, at, avoid, start, stop)
    with np.errstate(invalid="ignore"):
        confirmed = np.abs(residual) > limit(sigma_one * gain)
    # Where no clean reading lies on one side (a run end) the running median
    # decides instead.
    decided = np.where(ok, confirmed, ~median_says_no)

    # Pass 3: a spike smaller than half a neighbouring one is not strong, so
    # it may have been a node in pass 2 and made a clean reading look like a
    # spike. Judge again, bridging over everything found so far, the
    # readings found in pass 2 only; this pass can only clear readings.
    again = decided & ~strong
    if again.any():
        avoid[at[decided]] = True
        ok3, residual3, gain3 = bridge_residual(y, at[again], avoid, start, stop)
        with np.errstate(invalid="ignore"):
            kept = np.abs(residual3) > limit(sigma_one[again] * gain3)
        decided[again] = np.where(ok3, kept, ~median_says_no[again])

    spike = np.zeros(y.size, dtype=bool)
    spike[at] = decided & ~veto
    return spike


# --------------------------------------------------------------------------
# Tables, summary and log
# --------------------------------------------------------------------------


def _line_table(readings: xr.Dataset, segments: xr.Dataset, stats: np.ndarray) -> pd.DataFrame:
    """One row per segment (line and sensor) with its counts."""
    line_names = list(readings.attrs["line_names"])
    sensor_names = list(readings.attrs["sensor_names"])
    line_index = np.asarray(segments["line_index"].values, dtype=np.int64)
    sensor_index = np.asarray(segments["sensor_index"].values, dtype=np.int64)
    table = pd.DataFrame(stats, columns=list(_STATS))
    for name in ("readings", "spikes", "dropouts", "no_value", "stuck", "gaps"):
        table[name] = table[name].astype(np.int64)
    table.insert(0, "line", [str(line_names[i]) for i in line_index])
    table.insert(1, "sensor", [str(sensor_names[i]) for i in sensor_index])
    table.insert(2, "line_index", line_index)
    table.insert(3, "sensor_index", sensor_index)
    return table


def _gap_table(readings: xr.Dataset, after: np.ndarray) -> pd.DataFrame:
    """One row per reading flagged ``gap_before``: where it is and how long the gap lasts."""
    columns = ["line", "sensor", "source_file", "source_row", "time_before", "time_after", "duration_s"]
    if after.size == 0:
        return pd.DataFrame({c: [] for c in columns})
    picked = readings[["time", "line_index", "sensor_index", "source_file", "source_row"]]
    at = picked.isel({READING_DIM: after}).compute()
    before = readings["time"].isel({READING_DIM: after - 1}).compute()
    t_after = at["time"].values.astype("datetime64[ns]")
    t_before = before.values.astype("datetime64[ns]")
    names = readings.attrs
    return pd.DataFrame(
        {
            "line": [str(names["line_names"][i]) for i in at["line_index"].values],
            "sensor": [str(names["sensor_names"][i]) for i in at["sensor_index"].values],
            "source_file": [str(names["source_files"][i]) for i in at["source_file"].values],
            "source_row": at["source_row"].values.astype(np.int64),
            "time_before": t_before,
            "time_after": t_after,
            "duration_s": (t_after - t_before).astype(np.int64) / 1e9,
        }
    )


def _summary(table: pd.DataFrame, gaps: pd.DataFrame) -> dict:
    """Totals for the run log and manifest (plain Python numbers)."""
    total = int(table["readings"].sum())
    return {
        "readings": total,
        "segments": int(len(table)),
        "lines": int(table["line_index"].nunique()),
        "spikes": int(table["spikes"].sum()),
        "dropouts": int(table["dropouts"].sum()),
        "dropouts_no_value": int(table["no_value"].sum()),
        "dropouts_stuck": int(table["stuck"].sum()),
        "gaps": int(table["gaps"].sum()),
        "gap_time_s": float(gaps["duration_s"].sum()) if len(gaps) else 0.0,
        "longest_gap_s": float(gaps["duration_s"].max()) if len(gaps) else 0.0,
        "spike_fraction": float(table["spikes"].sum() / total) if total else 0.0,
        "median_noise_nT": (
            float(np.nanmedian(table["noise_nT"])) if table["noise_nT"].notna().any() else None
        ),
    }


def _log_lines(context: StageContext, table: pd.DataFrame) -> None:
    """One log line per survey line, counts summed over its sensors."""
    by_line = table.groupby("line_index", sort=False).agg(
        line=("line", "first"),
        sensors=("sensor", "nunique"),
        readings=("readings", "sum"),
        spikes=("spikes", "sum"),
        dropouts=("dropouts", "sum"),
        gaps=("gaps", "sum"),
        noise_nT=("noise_nT", "median"),
    )
    for row in by_line.itertuples(index=False):
        context.log.info(
            "spikes: line %s (%d sensor%s): %d readings, %d spikes, %d dropouts, %d gaps, "
            "noise %.3g nT",
            row.line,
            row.sensors,
            "" if row.sensors == 1 else "s",
            row.readings,
            row.spikes,
            row.dropouts,
            row.gaps,
            row.noise_nT,
        )
